"""Tests that read the demo plant, loaded once for the module (rolled back at the end):
the stored verdict (every criterion counts, failures found make figures worse), the
loader's idempotency, and a one-SIF evidence pack of a demo SIF with every element."""

import csv
import datetime as dt
import hashlib
import io
import json

import pytest
from django.contrib.auth import get_user_model
from django.db import transaction
from django.urls import reverse
from django.utils import timezone

from calcs.adapter import latest_assessments, recompute_many
from register import choices, demo, services
from register.audit import chain as audit
from register.audit import evidence
from register.models import (
    Component,
    ComponentResult,
    EvidencePack,
    SafetyFunction,
    TestRecord,
)
from register.schedule import services as schedule_services
from tests import factories as f
from tests.register.test_evidence_pack import _pdf_text, _unzip

pytestmark = pytest.mark.django_db


class _Rollback(Exception):
    pass


@pytest.fixture(scope="module")
def plant(django_db_setup, django_db_blocker):
    with django_db_blocker.unblock():
        try:
            with transaction.atomic():
                site = demo.load(timezone.localdate())
                sifs = {s.tag: s for s in SafetyFunction.objects.filter(unit__site=site)}
                yield site, sifs, latest_assessments([s.pk for s in sifs.values()])
                raise _Rollback
        except _Rollback:
            pass


def test_demo_load_is_idempotent(plant):
    # (shares the module's demo instead of loading its own)
    from register.models import Site, TestPlan, TestRecord

    site, sifs, _ = plant
    counts = (SafetyFunction.objects.count(), TestRecord.objects.count(), Site.objects.count())
    with pytest.raises(demo.DemoAlreadyLoaded):
        demo.load(timezone.localdate())
    assert (SafetyFunction.objects.count(), TestRecord.objects.count(),
            Site.objects.count()) == counts
    assert counts[0] >= 40
    states = set(TestPlan.objects.values_list("cached_state", flat=True))
    assert {"due_soon", "overdue", "escalated", "escalated_2"} <= states


def lines(a):
    return {x["key"]: x for x in a.verdict["lines"]}


def test_every_stored_verdict_is_the_meets_target_flag(plant):
    _, sifs, latest = plant
    assert len(latest) == len(sifs)
    for a in latest.values():
        assert a.meets_target == a.verdict["meets"]
        assert set(lines(a)) == {"design", "achieved_12m", "observed_12m", "projected",
                                 "architecture", "systematic"}


def test_valve_found_failed_three_times_does_not_meet_and_is_a_repeat_offender(plant):
    _, sifs, latest = plant
    a = latest[sifs["U10-SIF-101"].pk]
    assert a.meets_target is False
    assert lines(a)["achieved_12m"]["status"] == "fail"
    assert "above the target" in a.verdict["summary"]
    valve = next(r for r in a.detail["rates"] if r["component"] == "XV-101")
    assert valve["failures"] == 3 and valve["repeat_offender"]
    assert valve["used_per_hour"] > valve["type_per_hour"] > 0
    assert a.rate_basis == choices.RateBasis.FIELD
    assert len([e for e in a.detail["observed_episodes"] if e["components"] == ["XV-101"]]) == 3
    assert any("XV-101" in d for d in a.detail["drivers"])


def test_systematic_capability_below_target_sil_fails_its_line(plant):
    _, sifs, latest = plant
    a = latest[sifs["U10-SIF-107"].pk]
    assert lines(a)["systematic"]["status"] == "fail"
    assert "SC 2" in lines(a)["systematic"]["reason"]
    assert a.meets_target is False


def test_a_clean_sif_still_meets_and_design_line_turns_with_the_interval(plant):
    site, sifs, latest = plant
    meeting = [t for t, s in sifs.items() if latest[s.pk].meets_target]
    assert meeting, "at least one demo SIF must still meet its target"
    tag = meeting[0]
    sif = sifs[tag]
    lead = get_user_model().objects.get(username="lead")
    plan = sif.plans.get(kind=choices.TestKind.FULL)
    with transaction.atomic():
        services.update_design(plan, lead, reason="Longer interval", reference="CR-1",
                               changes={"interval_months": 240})
        (a,) = recompute_many(SafetyFunction.objects.filter(pk=sif.pk), trigger="test")
        assert lines(a)["design"]["status"] == "fail"
        assert a.meets_target is False
        transaction.set_rollback(True)


@pytest.fixture
def small_plant():
    s = f.site()
    u = f.unit(s)
    tech = f.user("tech-small", site=s, role=choices.Role.TECHNICIAN)
    return s, u, tech


_full_test = f.full_test


def test_a_failure_found_at_the_last_test_fails_the_observed_line(small_plant):
    _, u, tech = small_plant
    now = timezone.now()
    ok_sif = f.sif(u, in_service=(now - dt.timedelta(days=800)).date())
    bad_sif = f.sif(u, in_service=(now - dt.timedelta(days=800)).date())
    for s in (ok_sif, bad_sif):
        _full_test(s, tech, now - dt.timedelta(days=400))
    _full_test(ok_sif, tech, now - dt.timedelta(days=35))
    valve = Component.objects.filter(subsystem__sif=bad_sif, subsystem__role="final").first()
    _full_test(bad_sif, tech, now - dt.timedelta(days=35), fail_tag=valve.tag)
    out = {x.sif_id: x for x in recompute_many(
        SafetyFunction.objects.filter(pk__in=[ok_sif.pk, bad_sif.pk]), trigger="t")}
    good, bad = out[ok_sif.pk], out[bad_sif.pk]
    assert good.observed_unavailability == 0.0
    # onset somewhere in the 365 days before the finding, about half of them inside the
    # window (common practice, no source): far above any SIL target
    assert 0.3 < bad.observed_unavailability < 0.6
    assert lines(bad)["observed_12m"]["status"] == "fail"
    assert bad.meets_target is False
    assert bad.achieved_pfd_avg >= good.achieved_pfd_avg
    (episode,) = bad.detail["observed_episodes"]
    assert episode["components"] == [valve.tag] and episode["found_by"] == "full test"


def test_demo_sif_pack_holds_every_element(plant, client, django_capture_on_commit_callbacks,
                                           settings, tmp_path):
    settings.VAR_DIR = tmp_path
    today = timezone.localdate()
    site = plant[0]
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
    deferral = schedule_services.request_deferral(
        user=tech, plan=plan, proposed_on=today + dt.timedelta(days=130),
        reason="Spare solenoid on order", due_on=today + dt.timedelta(days=100))
    schedule_services.decide_deferral(deferral, lead, approve=False, note="Refused: test on time")

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
