"""Building a pack's zip (report.pdf, CSV tables, pack.json, charts, manifest.json) and
running a requested pack as a job."""

from __future__ import annotations

import hashlib
import json
import time
import zipfile
from pathlib import Path

from celery.exceptions import SoftTimeLimitExceeded
from django.conf import settings
from django.utils import timezone

from register.audit.chain import verify_chain
from register.audit.evidence.collect import (
    collect,
    packs_dir,
)
from register.audit.evidence.figures import (
    figures,
)
from register.audit.evidence.pdf import (
    render_pdf,
)
from register.audit.evidence.tables import (
    cover_facts,
    csv_files,
)
from register.models import (
    EvidencePack,
)


def build(pack: EvidencePack, progress=None) -> Path:
    """Build the zip for ``pack``; return its path. ``progress(percent, text)`` is called
    along the way."""
    progress = progress or (lambda p, s: None)
    chain = verify_chain(incremental=True)
    progress(5, "Change chain verified")
    col = collect(pack, progress)
    charts = figures(pack, col, progress)
    cover = cover_facts(pack, chain)
    files: dict[str, bytes] = {}
    files.update(csv_files(col))
    files["pack.json"] = json.dumps({**cover, "sifs": col.sifs}, indent=1, ensure_ascii=False,
                                    default=str).encode("utf-8")
    for sif_id, png in charts.items():
        tag = next(e["tag"] for e in col.sifs if e["id"] == sif_id)
        files[f"charts/{_safe(tag)}-pfd.png"] = png
    progress(70, "Writing the report")
    files["report.pdf"] = render_pdf(cover, col.sifs, charts,
                                     lambda f: progress(70 + int(25 * f), "Writing the report"))
    manifest = {"pack_id": pack.pk, "generated_at": cover["generated_at"],
                "chain_head_hash": chain.head_hash,
                "files": [{"name": name, "sha256": hashlib.sha256(data).hexdigest(),
                           "size": len(data)} for name, data in sorted(files.items())]}
    files["manifest.json"] = json.dumps(manifest, indent=1).encode("utf-8")
    path = packs_dir() / f"evidence-pack-{pack.pk}.zip"
    tmp = path.with_suffix(".part")
    with zipfile.ZipFile(tmp, "w", compression=zipfile.ZIP_DEFLATED) as zf:
        for name in ["manifest.json"] + sorted(n for n in files if n != "manifest.json"):
            zf.writestr(name, files[name])
    tmp.replace(path)
    pack.chain_head_hash, pack.chain_head_seq, pack.chain_ok = (chain.head_hash,
                                                                chain.head_seq, chain.ok)
    return path


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
            return EvidencePack.objects.filter(pk=pack_id).exclude(
                status=EvidencePack.Status.DONE).update(
                status=EvidencePack.Status.FAILED, error=error, stage=stage,
                finished_at=timezone.now())
        except (DatabaseError, InterfaceError):
            if attempt == 2 or connection.in_atomic_block:
                raise
            connection.close()
    return 0


def run(pack_id: int, time_limit: int | None = None) -> EvidencePack:
    """Build one pack, recording status and progress on the row as it goes.

    ``time_limit`` (seconds): the build also stops itself at its next step past the limit,
    should the worker's interruption at the soft time limit have been lost (an exception
    raised inside a finaliser is only printed)."""
    began = time.monotonic()
    pack = EvidencePack.objects.select_related("site", "unit", "sif", "requested_by").get(
        pk=pack_id)
    if pack.status == EvidencePack.Status.DONE:
        return pack
    pack.status, pack.started_at, pack.progress, pack.error = (
        EvidencePack.Status.RUNNING, timezone.now(), 1, "")
    EvidencePack.objects.filter(pk=pack.pk).update(status=pack.status, started_at=pack.started_at,
                                                   progress=1, error="", stage="Started")

    def progress(percent: int, text: str):
        if time_limit and time.monotonic() - began > time_limit:
            raise SoftTimeLimitExceeded(f"past the time limit of {time_limit} s")
        EvidencePack.objects.filter(pk=pack.pk).update(progress=min(99, percent),
                                                       stage=text[:200])

    try:
        path = build(pack, progress)
    except Exception as exc:
        if isinstance(exc, SoftTimeLimitExceeded):
            mark_failed(pack.pk, time_limit_message(
                time_limit or settings.PACK_TIME_LIMIT_SECONDS), STOPPED_STAGE)
        else:
            mark_failed(pack.pk, f"{type(exc).__name__}: {exc}")
        raise
    data = path.read_bytes()
    EvidencePack.objects.filter(pk=pack.pk).update(
        status=EvidencePack.Status.DONE, progress=100, stage="Ready",
        result_path=str(path.relative_to(Path(settings.VAR_DIR))),
        result_sha256=hashlib.sha256(data).hexdigest(), result_size=len(data),
        chain_head_hash=pack.chain_head_hash, chain_head_seq=pack.chain_head_seq,
        chain_ok=pack.chain_ok, finished_at=timezone.now())
    pack.refresh_from_db()
    return pack


