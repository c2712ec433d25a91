"""Evidence packs: contents of the zip (PDF text, CSV, JSON, manifest), who may get them,
the chain page, and the as-of view."""

import csv
import datetime as dt
import hashlib
import io
import json
import re
import shutil
import subprocess
import zipfile

import pytest
import time_machine
from django.contrib.auth import get_user_model
from django.urls import reverse
from django.utils import timezone

from register import audit, choices, demo, evidence, services
from register.models import (
    ComponentResult,
    EvidencePack,
    SafetyFunction,
    TestRecord,
)
from tests import factories as f
from tests.conftest import need

pytestmark = pytest.mark.django_db


@pytest.fixture(autouse=True)
def _var_dir(settings, tmp_path):
    settings.VAR_DIR = tmp_path


def _pdf_text(data: bytes, tmp_path) -> str:
    need(shutil.which("pdftotext") is not None, "pdftotext (poppler-utils) is not installed")
    pdf = tmp_path / "report.pdf"
    pdf.write_bytes(data)
    out = subprocess.run(["pdftotext", str(pdf), "-"], capture_output=True, check=True)
    return re.sub(r"\s+", " ", out.stdout.decode("utf-8"))


def _unzip(data: bytes) -> dict[str, bytes]:
    with zipfile.ZipFile(io.BytesIO(data)) as zf:
        return {name: zf.read(name) for name in zf.namelist()}


def test_demo_sif_pack_holds_every_element(client, django_capture_on_commit_callbacks,
                                           tmp_path):
    today = timezone.localdate()
    site = demo.load(today)
    User = get_user_model()
    lead, tech, auditor = (User.objects.get(username=n) for n in ("lead", "tech", "auditor"))
    sif = (SafetyFunction.objects.filter(
        unit__site=site, bypasses__ended_at__isnull=False,
        tests__results__failure_mode=choices.FailureMode.DANGEROUS_UNDETECTED,
        tests__performed_at__gte=timezone.now() - dt.timedelta(days=5 * 365))
        .distinct().order_by("tag").first())
    assert sif is not None
    services.update_design(sif, lead, reason="Closing time tightened after pump change",
                           reference="CR-2031", changes={"safe_state": "Inlet and bypass closed"})
    plan = sif.plans.filter(kind=choices.TestKind.FULL).first()
    deferral = services.request_deferral(
        user=tech, plan=plan, proposed_on=today + dt.timedelta(days=130),
        reason="Spare solenoid on order", due_on=today + dt.timedelta(days=100))
    services.decide_deferral(deferral, lead, approve=False, note="Refused: test on time")

    client.force_login(auditor)
    start = today - dt.timedelta(days=5 * 365)
    with django_capture_on_commit_callbacks(execute=True):
        resp = client.post(reverse("audit:packs"), {
            "scope": "sif", "site": site.pk, "sif": sif.pk,
            "period_start": start.isoformat(), "period_end": today.isoformat()})
    pack = EvidencePack.objects.get()
    assert resp.status_code == 302 and resp["Location"] == reverse("audit:pack_detail",
                                                                    args=[pack.pk])
    assert (pack.status, pack.progress, pack.error) == ("done", 100, "")
    status = client.get(reverse("audit:pack_status", args=[pack.pk])).json()
    assert status["finished"] and status["status"] == "done"
    page = client.get(reverse("audit:pack_detail", args=[pack.pk])).content.decode()
    assert "Download the pack" in page and pack.result_sha256 in page

    resp = client.get(reverse("audit:pack_download", args=[pack.pk]))
    assert resp.status_code == 200 and "attachment" in resp["Content-Disposition"]
    data = b"".join(resp.streaming_content)
    assert hashlib.sha256(data).hexdigest() == pack.result_sha256
    files = _unzip(data)

    # Manifest: every other file, with its hash and size.
    manifest = json.loads(files["manifest.json"])
    listed = {e["name"]: e for e in manifest["files"]}
    assert set(listed) == set(files) - {"manifest.json"}
    for name, e in listed.items():
        assert e["sha256"] == hashlib.sha256(files[name]).hexdigest()
        assert e["size"] == len(files[name])
    for name in ("report.pdf", "pack.json", "tests.csv", "failures.csv", "demands.csv",
                 "bypasses.csv", "deferrals.csv", "changes.csv", "sifs.csv"):
        assert name in files
    assert any(n.startswith("charts/") and files[n][:8] == b"\x89PNG\r\n\x1a\n" for n in files)

    # Chain head in the pack is the verified head.
    head = audit.verify_chain()
    assert head.ok
    body = json.loads(files["pack.json"])
    assert body["chain"]["head_hash"] == head.head_hash == pack.chain_head_hash
    assert manifest["chain_head_hash"] == head.head_hash
    assert body["caution"] == evidence.CAUTION

    # JSON contents match the register.
    [entry] = body["sifs"]
    assert entry["tag"] == sif.tag and entry["lopa"]
    assert entry["lopa"][0]["steps"][-2]["step"].startswith("required SIF PFDavg")
    records = TestRecord.objects.filter(sif=sif, performed_at__gte=dt.datetime.combine(
        start, dt.time.min, tzinfo=dt.UTC)).exclude(status="draft")
    assert len(entry["tests"]) == records.count() > 0
    failure = ComponentResult.objects.filter(
        record__in=records, failure_mode=choices.FailureMode.DANGEROUS_UNDETECTED).first()
    assert any(x["description"] == failure.failure_description
               and x["work_done"] == failure.work_done for x in entry["failures"])
    assert entry["bypasses"] and all(b["authorised_by"] for b in entry["bypasses"])
    [dfr] = [d for d in entry["deferrals"] if d["reason"] == "Spare solenoid on order"]
    assert dfr["status"] == "Rejected" and dfr["decision_note"] == "Refused: test on time"
    change = next(c for c in entry["changes"] if "CR-2031" in c["reason"])
    assert "Inlet and bypass closed" in change["what_changed"]
    a = entry["assessment"]
    assert a["design_pfd_avg"] > 0 and a["achieved_pfd_avg_12m"] > 0
    assert entry["period_achieved_pfd_avg"] > 0

    # CSV files carry the same rows.
    tests_csv = list(csv.DictReader(io.StringIO(files["tests.csv"].decode())))
    assert len(tests_csv) == len(entry["tests"])
    assert {r["verifier"] for r in tests_csv} == {"Tomasz Quillfeather"}
    fail_csv = files["failures.csv"].decode()
    assert failure.failure_description in fail_csv
    assert "Spare solenoid on order" in files["deferrals.csv"].decode()
    assert "CR-2031" in files["changes.csv"].decode()
    assert entry["bypasses"][0]["reason"] in files["bypasses.csv"].decode()

    # The PDF says it all too.
    text = _pdf_text(files["report.pdf"], tmp_path)
    assert ("results support, and do not replace, a functional safety assessment by "
            "competent persons under iec 61511 and local regulations") in text.lower()
    assert head.head_hash in text.replace(" ", "") or head.head_hash[:16] in text
    assert "Greta Ashdown" in text  # who generated it
    assert "required SIF PFDavg = tolerable / frequency without the SIF" in text
    assert "IEC 61508-6 Annex B simplified equations" in text
    assert "Time-dependent model" in text
    assert f"{a['design_pfd_avg']:.2e}" in text and f"{a['achieved_pfd_avg_12m']:.2e}" in text
    rec = records.filter(verified_by__isnull=False).first()
    assert rec.performed_by_name.split()[-1] in text and "Quillfeather" in text
    assert failure.work_done.split(";")[0] in text
    assert "Transmitter maintenance" in text or entry["bypasses"][0]["reason"] in text
    assert "Spare solenoid on order" in text and "Refused: test on time" in text
    assert "[CR-2031] Closing time" in text and "tightened after pump change" in text
    assert "Inlet and bypass closed" in text


@pytest.fixture
def two_sites():
    a, b = f.site("alpha"), f.site("beta")
    sif = f.sif(f.unit(a))
    people = {
        "auditor_a": f.user("auditor_a", site=a, role=choices.Role.AUDITOR),
        "auditor_b": f.user("auditor_b", site=b, role=choices.Role.AUDITOR),
        "tech_a": f.user("tech_a", site=a, role=choices.Role.TECHNICIAN),
        "tech_b": f.user("tech_b", site=b, role=choices.Role.TECHNICIAN),
        "lead_a": f.user("lead_a", site=a, role=choices.Role.LEAD),
    }
    today = timezone.localdate()
    pack = EvidencePack.objects.create(scope="site", site=a, requested_by=people["auditor_a"],
                                       period_start=today - dt.timedelta(days=365),
                                       period_end=today)
    evidence.run(pack.pk)
    return a, b, sif, people, pack


def test_pack_download_is_checked_per_site(client, two_sites):
    _a, _b, sif, people, pack = two_sites
    url = reverse("audit:pack_download", args=[pack.pk])
    for who in ("tech_b", "auditor_b", "tech_a"):
        client.force_login(people[who])
        assert client.get(url).status_code == 403, who
        assert client.get(reverse("audit:pack_detail", args=[pack.pk])).status_code == 403
    client.force_login(people["auditor_a"])
    resp = client.get(url)
    assert resp.status_code == 200
    files = _unzip(b"".join(resp.streaming_content))
    assert json.loads(files["pack.json"])["sifs"][0]["tag"] == sif.tag


def test_who_may_ask_for_a_pack(client, two_sites, django_capture_on_commit_callbacks):
    a, _b, _sif, people, _ = two_sites
    today = timezone.localdate()
    form = {"scope": "site", "site": a.pk, "period_start": "2025-01-01",
            "period_end": today.isoformat()}
    client.force_login(people["tech_a"])  # technicians do not export
    assert client.post(reverse("audit:packs"), form).status_code == 403
    client.force_login(people["auditor_b"])  # not at site a: the site is not offered
    resp = client.post(reverse("audit:packs"), form)
    assert resp.status_code == 200 and "site" in resp.context["form"].errors
    assert EvidencePack.objects.count() == 1
    client.force_login(people["lead_a"])
    with django_capture_on_commit_callbacks(execute=True):
        resp = client.post(reverse("audit:packs"), form)
    assert resp.status_code == 302
    assert EvidencePack.objects.filter(requested_by=people["lead_a"], status="done").exists()
    listing = client.get(reverse("audit:packs")).content.decode()
    assert "Download" in listing


def test_chain_page_for_auditors_and_leads_only(client, two_sites):
    _, _, _, people, _ = two_sites
    client.force_login(people["tech_a"])
    assert client.get(reverse("audit:chain")).status_code == 403
    client.force_login(people["auditor_a"])
    page = client.get(reverse("audit:chain")).content.decode()
    assert "Intact." in page and audit.verify_chain().head_hash in page


def test_as_of_view_shows_the_sif_as_it_was(client):
    with time_machine.travel(dt.datetime(2024, 1, 10, 12, tzinfo=dt.UTC), tick=False):
        s = f.site()
        lead = f.user("lead_x", site=s, role=choices.Role.LEAD)
        sif = f.sif(f.unit(s), in_service=dt.date(2023, 1, 1))
        sif.safe_state = "Old safe state"
        services.update_design(sif, lead, reason="first", reference="CR-1",
                               changes={"safe_state": "Old safe state"})
    services.update_design(sif, lead, reason="second", reference="CR-2",
                           changes={"safe_state": "New safe state"})
    auditor = f.user("aud_x", site=s, role=choices.Role.AUDITOR)
    client.force_login(auditor)
    url = reverse("audit:sif_as_of", args=[sif.pk])
    page = client.get(url, {"date": "2024-06-01"}).content.decode()
    assert "Old safe state" in page and "New safe state" not in page
    assert "[CR-1] first" in page
    # On 2024-06-01 the 12-month full test (last credit: in service 2023-01-01) is overdue.
    assert "overdue" in page or "escalated" in page
    assert "Recomputed now with the engine" in page
    page = client.get(url, {"date": timezone.localdate().isoformat()}).content.decode()
    assert "New safe state" in page
    assert client.get(url, {"date": "2023-13-01"}).context["error"]
    outsider = f.user("out_x", site=f.site(), role=choices.Role.AUDITOR)
    client.force_login(outsider)
    assert client.get(url, {"date": "2024-06-01"}).status_code == 403


def test_evidence_pack_command(two_sites, tmp_path, capsys):
    from django.core.management import call_command
    from django.core.management.base import CommandError

    _a, _, sif, _people, _ = two_sites
    out = tmp_path / "copy.zip"
    call_command("evidence_pack", site="alpha", sif=sif.tag, start="2025-01-01",
                 end=timezone.localdate().isoformat(), user="auditor_a", out=str(out))
    pack = EvidencePack.objects.latest("id")
    assert pack.scope == "sif" and pack.status == "done"
    assert hashlib.sha256(out.read_bytes()).hexdigest() == pack.result_sha256
    assert pack.result_sha256 in capsys.readouterr().out
    with pytest.raises(CommandError):
        call_command("evidence_pack", site="alpha", start="2025-01-01", end="2025-06-01",
                     user="tech_a")
