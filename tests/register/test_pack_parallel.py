"""Evidence packs built in sections: the same zip, byte for byte, whatever the size of the
sections; the pack task's group of section tasks and its assembly (eager here; on real
worker processes in test_pack_parallel_workers.py); the report's pages numbered across
the parts, its charts vector; a failing or late section marks the pack failed and the
assembly does not run."""

import datetime as dt
import io
import json
import re
import shutil
import subprocess
import zipfile

import pytest
from django.core.management import call_command
from django.db import transaction
from django.utils import timezone

from calcs.adapter import recompute_many
from register.audit.evidence import build_steps as b
from register.audit.evidence.build import STOPPED_STAGE, time_limit_message
from register.audit.tasks import (
    assemble_evidence_pack,
    build_evidence_pack,
    build_pack_section,
)
from register.models import EvidencePack, SafetyFunction, Site
from tests import factories as f
from tests.conftest import need

SIFS = 7

pytestmark = pytest.mark.django_db


@pytest.fixture(scope="module")
def world(django_db_setup, django_db_blocker):
    """A small plant with three years of tests, failures, demands and bypasses, and one
    stored assessment per SIF; built once, rolled back at the end."""
    with django_db_blocker.unblock(), transaction.atomic():
        call_command("make_scale_plant", sifs=SIFS, years=3, code="ppar", verbosity=0)
        site = Site.objects.get(code="ppar")
        recompute_many(SafetyFunction.objects.filter(unit__site=site), trigger="test")
        auditor = f.user("ppar-auditor", site=site)
        yield site, auditor
        transaction.set_rollback(True)


@pytest.fixture
def pack(world, settings, tmp_path):
    settings.VAR_DIR = tmp_path
    site, auditor = world
    today = timezone.localdate()
    return EvidencePack.objects.create(scope="site", site=site, requested_by=auditor,
                                       period_start=today - dt.timedelta(days=3 * 365),
                                       period_end=today)


def _unzip(data: bytes) -> dict[str, bytes]:
    with zipfile.ZipFile(io.BytesIO(data)) as zf:
        return {name: zf.read(name) for name in zf.namelist()}


def _pages(pdf: bytes, tmp_path, first=1) -> list[str]:
    need(shutil.which("pdftotext") is not None, "pdftotext (poppler-utils) is not installed")
    path = tmp_path / "report-text.pdf"
    path.write_bytes(pdf)
    out = subprocess.run(["pdftotext", "-f", str(first), str(path), "-"], capture_output=True,
                         check=True).stdout.decode("utf-8")
    return [re.sub(r"\s+", " ", page).strip() for page in out.split("\f")[:-1]]


def same_pack(one: dict[str, bytes], one_pk: int, other: dict[str, bytes], other_pk: int,
              tmp_path) -> tuple[list[str], list[str]]:
    """Assert two unzipped packs of the same facts hold the same files, the same tables
    and charts byte for byte, and report pages after the cover that say the same (the
    pack's number and the chain head it was built at aside); returns those pages."""
    assert set(one) == set(other)
    for name in one:
        if name.endswith(".csv") or name.startswith("charts/"):
            assert one[name] == other[name], name

    def plain(pages, pk):
        return [re.sub(r"chain head [0-9a-f]{16}", "chain head H",
                       text.replace(f"pack {pk} ", "pack N ")) for text in pages]

    a = plain(_pages(one["report.pdf"], tmp_path, 2), one_pk)
    c = plain(_pages(other["report.pdf"], tmp_path, 2), other_pk)
    assert a == c
    return a, c


def _built(pack, size: int) -> tuple[bytes, int]:
    plan = b.begin(pack, size)
    for index, ids in enumerate(plan):
        b.section(pack, index, ids)
    return b.assemble(pack).read_bytes(), len(plan)


def test_the_same_pack_in_sections_of_any_size_is_the_same_zip(pack, tmp_path):
    pack.started_at = timezone.now()
    b.begin(pack)  # the chain's checkpoint now at its head: each build below starts there
    zips = {}
    for size in (1, 3, SIFS):
        zips[size], sections = _built(pack, size)
        assert sections == -(-SIFS // size)
        assert not b.work_dir(pack).exists()  # the sections are cleared once joined
    assert zips[1] == zips[3] == zips[SIFS]

    files = _unzip(zips[1])
    manifest = json.loads(files["manifest.json"])
    assert {e["name"] for e in manifest["files"]} == set(files) - {"manifest.json"}
    pdf = files["report.pdf"]
    assert b"/Subtype /Image" not in pdf  # the charts are drawn as vector graphics
    tags = list(SafetyFunction.objects.filter(unit__site=pack.site).order_by("tag")
                .values_list("tag", flat=True))
    charts = sorted(n for n in files if n.startswith("charts/"))
    assert charts and all(files[n][:8] == b"\x89PNG\r\n\x1a\n" for n in charts)
    assert len(charts) == sum(1 for e in json.loads(files["pack.json"])["sifs"]
                              if e.get("period_window"))
    pages = _pages(pdf, tmp_path)
    count = int(re.search(rb"/Count (\d+) /Kids", pdf)[1])
    assert len(pages) == count > SIFS
    # Numbered across the parts, once per page, beside the footer and the caution.
    for number, text in enumerate(pages, start=1):
        assert re.findall(r"\bpage (\d+)\b", text)[-1] == str(number), text[-300:]
        assert f"Evidence pack {pack.pk}" in text and "Caution: " in text
    # Each SIF from a page of its own, in the order of the tags, its chart's labels as text.
    starts = [next(i for i, text in enumerate(pages) if text.startswith(tag + " "))
              for tag in tags]
    assert starts == sorted(starts) and starts[0] > 0
    assert any(f"{tag}: PFD(t) over the period" in " ".join(pages) for tag in tags)


def test_the_pack_task_builds_it_through_a_group_of_sections(pack, settings, tmp_path):
    """Eager tasks (the tests' and the demo's setting): the start task's group of sections
    runs, the last section starts the assembly, the pack is done; its facts are those of
    the pack built in one process."""
    settings.PACK_SECTION_SIFS = 2
    result = build_evidence_pack.delay(pack.pk).get()
    pack.refresh_from_db()
    assert (pack.status, pack.progress, pack.stage) == ("done", 100, "Ready"), pack.error
    assert result == {"pack": pack.pk, "status": "done", "sha256": pack.result_sha256}
    assert not b.work_dir(pack).exists()
    grouped = _unzip((tmp_path / pack.result_path).read_bytes())

    alone = EvidencePack.objects.create(scope="site", site=pack.site,
                                        requested_by=pack.requested_by,
                                        period_start=pack.period_start,
                                        period_end=pack.period_end)
    alone.started_at = pack.started_at  # the facts of the same moment, in one section
    single = _unzip(b.build(alone, size=1000).read_bytes())
    a, c = same_pack(grouped, pack.pk, single, alone.pk, tmp_path)
    assert len(a) == len(c) > SIFS


def test_a_failing_section_marks_the_pack_failed_and_nothing_is_assembled(pack, tmp_path):
    started = b.start(pack.pk)
    plan = b.begin(started, 3)
    (b.work_dir(pack) / "cover.json").unlink()  # what a section needs is gone
    with pytest.raises(FileNotFoundError):
        build_pack_section.apply(args=[pack.pk, 0, plan[0]], throw=True)
    pack.refresh_from_db()
    assert pack.status == "failed" and pack.error.startswith("FileNotFoundError: ")
    # The other sections and the assembly see a pack no longer running and do nothing.
    assert build_pack_section.apply(args=[pack.pk, 1, plan[1]]).get()["status"] == "failed"
    assert not b.sections_done(pack)[0]
    assert assemble_evidence_pack.apply(args=[pack.pk]).get()["status"] == "failed"
    assert not (tmp_path / "evidence" / f"evidence-pack-{pack.pk}.zip").exists()


def test_a_section_past_the_packs_time_limit_stops_it(pack, settings):
    settings.PACK_TIME_LIMIT_SECONDS = 60
    started = b.start(pack.pk)
    plan = b.begin(started, 3)
    # The pack started 61 s ago: its first section, on time or not, stops the build.
    EvidencePack.objects.filter(pk=pack.pk).update(
        started_at=timezone.now() - dt.timedelta(seconds=61))
    assert build_pack_section.apply(args=[pack.pk, 0, plan[0]]).get()["status"] == "failed"
    pack.refresh_from_db()
    assert (pack.status, pack.stage, pack.error) == ("failed", STOPPED_STAGE,
                                                     time_limit_message(60))
    assert not b.sections_done(pack)[0]
