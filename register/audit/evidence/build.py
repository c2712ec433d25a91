"""Building a pack's zip (report.pdf, CSV tables, pack.json, charts, manifest.json) and
running a requested pack as a job.

A pack is built in sections of SIFs (``begin``: chain verified, cover facts and the plan
written; ``section``: one share of the SIFs, its facts, figures, charts and PDF pages;
``assemble``: everything joined in a fixed order). ``build`` runs them one after the other
in this process; the pack task (``register.audit.tasks``) runs the sections as parallel
tasks on the packs queue and the last one to finish starts the assembly. The sections wait
in ``work_dir(pack)`` under ``VAR_DIR`` (shared by the workers, as the finished packs are).
"""

from __future__ import annotations

import base64
import datetime as dt
import hashlib
import json
import os
import shutil
import zipfile
from pathlib import Path

from celery.exceptions import SoftTimeLimitExceeded
from django.conf import settings
from django.utils import timezone

from register.audit.chain import verify_chain
from register.audit.evidence import chart
from register.audit.evidence.collect import (
    Collected,
    collect,
    packs_dir,
    scope_queryset,
    tables_of,
)
from register.audit.evidence.figures import (
    figures,
)
from register.audit.evidence.pdf import (
    cover_part,
    join,
    sif_part,
)
from register.audit.evidence.tables import (
    cover_facts,
    csv_files,
)
from register.charts import PACK_WIDTH_IN
from register.models import (
    EvidencePack,
)


def section_size() -> int:
    """SIFs per section when none is given (``settings.PACK_SECTION_SIFS``)."""
    return max(1, settings.PACK_SECTION_SIFS)


def work_dir(pack: EvidencePack | int) -> Path:
    """Where the sections of a pack being built wait for the assembly (removed after)."""
    pk = pack if isinstance(pack, int) else pack.pk
    return packs_dir() / f"evidence-pack-{pk}.parts"


def _write(path: Path, data: bytes):
    tmp = path.with_name(path.name + ".part")
    tmp.write_bytes(data)
    tmp.replace(path)


def _json(value) -> bytes:
    return json.dumps(value, ensure_ascii=False, default=str).encode("utf-8")


def _pack_json(cover: dict, sifs: list[dict]) -> bytes:
    """pack.json: the cover's facts indented, then ``sifs`` with one SIF per line. (An
    indented dump goes through the pure-Python encoder: it took seconds for a site.)"""
    head = json.dumps({**cover, "sifs": None}, indent=1, ensure_ascii=False, default=str)
    lines = ",\n".join("  " + json.dumps(e, ensure_ascii=False, default=str) for e in sifs)
    return (head.removesuffix("null\n}") + "[\n" + lines + "\n ]\n}").encode("utf-8")


def begin(pack: EvidencePack, size: int | None = None) -> list[list[int]]:
    """Verify the change chain (incrementally, from the last checkpoint), write the facts
    of the cover and the plan of the sections; return the SIF ids of each section, in the
    order of the report (by tag)."""
    chain = verify_chain(incremental=True)
    pack.chain_head_hash, pack.chain_head_seq, pack.chain_ok = (chain.head_hash,
                                                                chain.head_seq, chain.ok)
    ids = list(scope_queryset(pack).values_list("pk", flat=True))
    size = size or section_size()
    sections = [ids[i:i + size] for i in range(0, len(ids), size)] or [[]]
    folder = work_dir(pack)
    if folder.exists():
        shutil.rmtree(folder)
    folder.mkdir(parents=True)
    _write(folder / "cover.json", _json(cover_facts(pack, chain)))
    _write(folder / "plan.json", _json({"sections": sections}))
    return sections


def _section_path(folder: Path, index: int) -> Path:
    return folder / f"section-{index:05d}.json"


def section(pack: EvidencePack, index: int, sif_ids: list[int], check=None) -> Path:
    """Build one section: the facts, figures, chart and PDF pages of ``sif_ids``.
    ``check()`` is called every few SIFs (it may stop the build by raising)."""
    check = check or (lambda: None)
    folder = work_dir(pack)
    cover = json.loads((folder / "cover.json").read_bytes())
    col = collect(pack, lambda p, s: check(), sif_ids=sif_ids)
    series = figures(pack, col, lambda p, s: check())
    parts, pngs = {}, {}
    for e in col.sifs:
        data = series.get(e["id"])
        parts[str(e["id"])] = base64.b64encode(sif_part(cover, e, data)).decode("ascii")
        if data:
            pngs[str(e["id"])] = base64.b64encode(
                chart.png(chart.drawing(data, PNG_WIDTH_PT))).decode("ascii")
    path = _section_path(folder, index)
    _write(path, _json({"index": index, "sifs": col.sifs, "parts": parts, "charts": pngs}))
    return path


def sections_done(pack: EvidencePack | int) -> tuple[int, int]:
    """(sections written, sections planned) of a pack being built."""
    folder = work_dir(pack)
    planned = len(json.loads((folder / "plan.json").read_bytes())["sections"])
    return len(list(folder.glob("section-*.json"))), planned


def claim_assembly(pack: EvidencePack | int) -> bool:
    """True once, for the caller that finds every section written: it assembles."""
    done, planned = sections_done(pack)
    if done < planned:
        return False
    try:
        os.close(os.open(work_dir(pack) / "assembly", os.O_CREAT | os.O_EXCL | os.O_WRONLY))
    except FileExistsError:
        return False
    return True


#: Width of the zip's PNG charts in points (the PDF's drawing is as wide as its text).
PNG_WIDTH_PT = PACK_WIDTH_IN * 72


def assemble(pack: EvidencePack, progress=None) -> Path:
    """Join the sections in their order: report.pdf (cover, then each SIF's pages), the
    CSV tables, pack.json, the charts and manifest.json, in one zip. The same sections give
    the same bytes however they were shared out."""
    progress = progress or (lambda p, s: None)
    folder = work_dir(pack)
    cover = json.loads((folder / "cover.json").read_bytes())
    planned = json.loads((folder / "plan.json").read_bytes())["sections"]
    sifs, parts, pngs = [], [], {}
    for index in range(len(planned)):
        sec = json.loads(_section_path(folder, index).read_bytes())
        sifs += sec["sifs"]
        parts += [base64.b64decode(sec["parts"][str(e["id"])]) for e in sec["sifs"]]
        pngs.update({int(k): base64.b64decode(v) for k, v in sec["charts"].items()})
    progress(90, "Writing the report")
    files: dict[str, bytes] = {}
    files.update(csv_files(Collected(sifs=sifs, tables=tables_of(sifs))))
    files["pack.json"] = _pack_json(cover, sifs)
    for e in sifs:
        if e["id"] in pngs:
            files[f"charts/{_safe(e['tag'])}-pfd.png"] = pngs[e["id"]]
    files["report.pdf"] = join(cover, [cover_part(cover, sifs)] + parts)
    progress(96, "Writing the zip")
    manifest = {"pack_id": pack.pk, "generated_at": cover["generated_at"],
                "chain_head_hash": cover["chain"]["head_hash"],
                "files": [{"name": name, "sha256": hashlib.sha256(data).hexdigest(),
                           "size": len(data)} for name, data in sorted(files.items())]}
    files["manifest.json"] = json.dumps(manifest, indent=1).encode("utf-8")
    path = packs_dir() / f"evidence-pack-{pack.pk}.zip"
    tmp = path.with_suffix(".part")
    # Fixed entry times (the pack's start): the same files give the same zip.
    when = (pack.started_at or timezone.now()).astimezone(dt.UTC).timetuple()[:6]
    with zipfile.ZipFile(tmp, "w") as zf:
        for name in ["manifest.json"] + sorted(n for n in files if n != "manifest.json"):
            info = zipfile.ZipInfo(name, date_time=max(when, (1980, 1, 1, 0, 0, 0)))
            # PNG and PDF streams are compressed already: stored as they are.
            info.compress_type = (zipfile.ZIP_STORED if name.endswith((".png", ".pdf"))
                                  else zipfile.ZIP_DEFLATED)
            info.external_attr = 0o644 << 16
            zf.writestr(info, files[name])
    tmp.replace(path)
    chain = cover["chain"]
    pack.chain_head_hash, pack.chain_head_seq, pack.chain_ok = (
        chain["head_hash"], chain["head_seq"], chain["verified_ok"])
    shutil.rmtree(folder, ignore_errors=True)
    return path


def build(pack: EvidencePack, progress=None, size: int | None = None) -> Path:
    """Build the zip for ``pack`` in this process, section by section (``size`` SIFs
    each); return its path. ``progress(percent, text)`` is called along the way."""
    progress = progress or (lambda p, s: None)
    plan = begin(pack, size)
    progress(5, "Change chain verified")
    for index, ids in enumerate(plan):
        section(pack, index, ids, lambda i=index: progress(5 + int(85 * i / len(plan)),
                                                           f"Sections {i} of {len(plan)}"))
        progress(5 + int(85 * (index + 1) / len(plan)), f"Sections {index + 1} of {len(plan)}")
    return assemble(pack, progress)


def _safe(text: str) -> str:
    return "".join(ch if ch.isalnum() or ch in "-_." else "_" for ch in text)


#: The pack's step once it was stopped at its time limit.
STOPPED_STAGE = "Stopped at the time limit"


def time_limit_message(seconds: int) -> str:
    """What the pack page says of a pack stopped at its time limit (``seconds``)."""
    took = f"{seconds // 60} minutes" if seconds >= 120 else \
        f"{seconds} second{'s' if seconds != 1 else ''}"
    return (f"The pack took longer than the time limit of {took} and was stopped. Ask for "
            "a shorter period or a smaller scope (one unit or one SIF), or ask the "
            "administrator to raise PACK_TIME_LIMIT_SECONDS.")


def mark_failed(pack_id: int, error: str, stage: str = "Failed") -> int:
    """Mark an unfinished pack failed with ``error`` (the pack page shows it); returns the
    rows changed (0 when the pack was finished meanwhile). Tried again on a fresh database
    connection once, since what stopped the build may have come in the middle of a query."""
    from django.db import DatabaseError, InterfaceError, connection

    for attempt in (1, 2):
        try:
            return EvidencePack.objects.filter(pk=pack_id).fail(error, stage)
        except (DatabaseError, InterfaceError):
            if attempt == 2 or connection.in_atomic_block:
                raise
            connection.close()
    return 0


def start(pack_id: int) -> EvidencePack | None:
    """Mark the pack running from now (None: it is done already)."""
    pack = EvidencePack.objects.select_related("site", "unit", "sif", "requested_by").get(
        pk=pack_id)
    if pack.status == EvidencePack.Status.DONE:
        return None
    pack.status, pack.started_at, pack.progress, pack.error = (
        EvidencePack.Status.RUNNING, timezone.now(), 1, "")
    EvidencePack.objects.filter(pk=pack.pk).update(status=pack.status, started_at=pack.started_at,
                                                   progress=1, error="", stage="Started")
    return pack


def running(pack_id: int) -> EvidencePack | None:
    """The pack, while it is being built (None once done, failed or stopped)."""
    return EvidencePack.objects.select_related("site", "unit", "sif", "requested_by").filter(
        pk=pack_id, status=EvidencePack.Status.RUNNING).first()


def progress_of(pack: EvidencePack, time_limit: int | None):
    """``progress(percent, text)`` for ``pack``: writes the step on the row (the percentage
    never goes back, as sections finish in any order) and raises SoftTimeLimitExceeded
    once the build has run past ``time_limit`` seconds from its start (``text`` None: that
    check only)."""
    began = pack.started_at or timezone.now()

    def progress(percent: int, text: str):
        if time_limit and (timezone.now() - began).total_seconds() > time_limit:
            raise SoftTimeLimitExceeded(f"past the time limit of {time_limit} s")
        if text is None:
            return
        EvidencePack.objects.filter(pk=pack.pk, progress__lte=min(99, percent)).update(
            progress=min(99, percent), stage=text[:200])

    return progress


def failed(pack_id: int, exc: Exception, time_limit: int | None = None):
    """Record why the build of the pack stopped (the pack page shows it)."""
    if isinstance(exc, SoftTimeLimitExceeded):
        mark_failed(pack_id, time_limit_message(time_limit or settings.PACK_TIME_LIMIT_SECONDS),
                    STOPPED_STAGE)
    else:
        mark_failed(pack_id, f"{type(exc).__name__}: {exc}")


def finish(pack: EvidencePack, path: Path) -> EvidencePack:
    """Mark the pack done with its zip at ``path``."""
    data = path.read_bytes()
    EvidencePack.objects.filter(pk=pack.pk).update(
        status=EvidencePack.Status.DONE, progress=100, stage="Ready",
        result_path=str(path.relative_to(Path(settings.VAR_DIR))),
        result_sha256=hashlib.sha256(data).hexdigest(), result_size=len(data),
        chain_head_hash=pack.chain_head_hash, chain_head_seq=pack.chain_head_seq,
        chain_ok=pack.chain_ok, finished_at=timezone.now())
    pack.refresh_from_db()
    return pack


def run(pack_id: int, time_limit: int | None = None) -> EvidencePack:
    """Build one pack in this process, recording status and progress on the row as it goes.

    ``time_limit`` (seconds): the build also stops itself at its next step past the limit,
    should the worker's interruption at the soft time limit have been lost (an exception
    raised inside a finaliser is only printed)."""
    pack = start(pack_id)
    if pack is None:
        return EvidencePack.objects.get(pk=pack_id)
    try:
        path = build(pack, progress_of(pack, time_limit))
    except Exception as exc:
        failed(pack.pk, exc, time_limit)
        raise
    return finish(pack, path)
