"""Evidence packs: contents of the zip (PDF text, CSV, JSON, manifest), who may get them,
the chain page, and the as-of view."""

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
from django.urls import reverse
from django.utils import timezone

from register import choices, services
from register.audit import chain as audit
from register.audit import evidence
from register.models import (
    EvidencePack,
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


def test_the_pack_prints_the_chain_anchor_kept_outside_the_database(two_sites, tmp_path):
    from register.audit.anchors import write_anchor

    a, _, _sif, people, _ = two_sites
    result = audit.verify_chain()
    anchor = write_anchor(result.head_seq, result.head_hash)
    today = timezone.localdate()
    pack = EvidencePack.objects.create(scope="site", site=a, requested_by=people["auditor_a"],
                                       period_start=today - dt.timedelta(days=30),
                                       period_end=today)
    evidence.run(pack.pk)
    pack.refresh_from_db()
    assert pack.status == "done", pack.error
    files = _unzip(evidence.pack_file(pack).read_bytes())
    cover = json.loads(files["pack.json"])["chain"]
    assert (cover["anchor"]["seq"], cover["anchor"]["hash"]) == (anchor["seq"], anchor["hash"])
    text = _pdf_text(files["report.pdf"], tmp_path)
    assert f"Chain anchored outside the database entry #{anchor['seq']}" in text
