"""Tests that read the demo plant, loaded once per session into its own database
(``tests/conftest.py::demo_plant``; each test's writes are rolled back): the stored
verdict (every criterion counts, failures found make figures worse), the loader's
idempotency, its history dated at each event (the as-of view years back), the commands'
output, and a one-SIF evidence pack of a demo SIF with every element."""

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
from django.utils.html import escape

from calcs.adapter import recompute_many
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


@pytest.fixture
def plant(demo_plant):
    return demo_plant.site, demo_plant.sifs, demo_plant.latest


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
    from register.schedule.due import with_state

    states = set(with_state(TestPlan.objects.all()).values_list("state", flat=True))
    assert {"due_soon", "overdue", "escalated", "escalated_2"} <= states


def test_a_load_cut_short_is_finished_on_the_day_it_began(plant):
    from calcs.models import Assessment
    from register.models import ChainEntry, Site

    site, sifs, latest = plant
    counts = (SafetyFunction.objects.count(), TestRecord.objects.count(),
              ChainEntry.objects.count())
    # As left by a load stopped before its last step (every SIF assessed).
    Assessment.objects.filter(sif__unit__site=site).delete()
    began = demo.started_on(site)
    seen = []
    again = demo.load(began + dt.timedelta(days=30),
                      progress=lambda what, done, total: seen.append((what, done)))
    assert again == site and Site.objects.count() == 1
    assert seen[0] == (f"resume {began:%Y-%m-%d}", len(sifs))
    assert (SafetyFunction.objects.count(), TestRecord.objects.count(),
            ChainEntry.objects.count()) == counts  # nothing built twice
    assessed = {a.sif_id: a.meets_target
                for a in Assessment.objects.filter(sif__unit__site=site)}
    assert assessed == {pk: a.meets_target for pk, a in latest.items()}
    with pytest.raises(demo.DemoAlreadyLoaded):
        demo.load(began)


def lines(a):
    return {x["key"]: x for x in a.verdict["lines"]}


def test_the_demo_holds_42_sifs_of_which_23_meet_their_target(plant):
    _, sifs, latest = plant
    meeting = sum(1 for a in latest.values() if a.meets_target)
    assert (len(sifs), meeting, len(sifs) - meeting) == (42, 23, 19)


def test_load_demo_shows_each_sif_as_it_is_built_and_sums_up(demo_plant):
    out = demo_plant.load_output
    shown = [line.split()[-1] for line in out.splitlines() if line.strip().startswith("SIF ")]
    assert shown == [e["tag"] for e in json.loads(demo.DEMO_FILE.read_text())["sifs"]]
    assert f"SIF 42/42 {shown[-1]}" in out
    assert "site, people and device library: done" in out
    assert "demands, bypasses, deferral: done" in out
    assert "Subject:" not in out and "Content-Type:" not in out  # no e-mail text
    meeting = sum(1 for a in demo_plant.latest.values() if a.meets_target)
    assert (f"42 SIFs ({meeting} meet their target, {42 - meeting} do not), "
            f"{TestRecord.objects.count()} test records") in out


def _same_moment(history_rows, moment_of):
    """Rows whose history date is not the moment of their event: (row, expected)."""
    return [(h, moment_of(h)) for h in history_rows if h.history_date != moment_of(h)]


def test_every_history_row_is_dated_when_its_event_happened(demo_plant):
    from register.models import (
        Bypass,
        Deferral,
        Demand,
        DeviceType,
        HazardScenario,
        MeasuredValue,
        Membership,
        PlantUnit,
        Site,
        Subsystem,
        TestPlan,
        TestStep,
    )

    site, sifs = demo_plant.site, demo_plant.sifs
    assert demo.started_on(site) == demo_plant.today
    designed_at = dt.datetime.combine(demo_plant.today - demo.DESIGN_LEAD, dt.time(10),
                                      tzinfo=dt.UTC)
    # The design: recorded before the oldest SIF went into service.
    assert min(s.in_service_on for s in sifs.values()) > designed_at.date()
    for model in (Site, PlantUnit, Membership, DeviceType, SafetyFunction, Subsystem,
                  Component, TestPlan, TestStep, HazardScenario):
        dates = set(model.history.values_list("history_date", flat=True))
        assert dates == {designed_at}, model
    # Tests: drafted and signed when performed, countersigned when verified.
    records = {r.pk: r for r in TestRecord.objects.all()}
    assert len(records) > 600
    moment = {"draft saved": "performed_at", "signed by performer": "signed_at",
              "countersigned by verifier": "verified_at"}
    rows = list(TestRecord.history.all())
    assert len(rows) == 3 * len(records)
    assert not _same_moment(rows, lambda h: getattr(records[h.id],
                                                    moment[h.history_change_reason]))
    performed = {pk: r.performed_at for pk, r in records.items()}
    assert not _same_moment(ComponentResult.history.all(), lambda h: performed[h.record_id])
    result_record = dict(ComponentResult.objects.values_list("pk", "record_id"))
    assert MeasuredValue.history.count() > 1000
    assert not _same_moment(MeasuredValue.history.all(),
                            lambda h: performed[result_record[h.result_id]])
    # Demands when they occurred, bypasses when opened and when closed.
    demands = {d.pk: d.occurred_at for d in Demand.objects.all()}
    assert len(demands) == 10
    assert not _same_moment(Demand.history.all(), lambda h: demands[h.id])
    bypasses = {b.pk: b for b in Bypass.objects.all()}
    assert len(Bypass.history.filter(history_change_reason="bypass closed")) == 12
    assert not _same_moment(Bypass.history.all(), lambda h: (
        bypasses[h.id].ended_at if h.history_change_reason == "bypass closed"
        else bypasses[h.id].started_at))  # opened, and authorised as it started
    # The deferral was asked for on the demo day.
    (request,) = Deferral.history.all()
    assert request.history_date.date() == demo_plant.today


def test_as_of_five_years_back_shows_the_sif_its_plans_and_the_tests_done_by_then(
        demo_plant, client):
    from register.days import end_of_day

    sif = demo_plant.sifs["U10-SIF-101"]
    day = demo_plant.today - dt.timedelta(days=5 * 365)
    end = end_of_day(day, demo_plant.site)
    full = list(TestRecord.objects.filter(sif=sif, kind=choices.TestKind.FULL)
                .order_by("performed_at").values_list("performed_at", flat=True))
    done, later = [t for t in full if t <= end], [t for t in full if t > end]
    assert done and later  # the date falls inside the SIF's test history
    client.force_login(get_user_model().objects.get(username="auditor"))
    page = client.get(reverse("audit:sif_as_of", args=[sif.pk]),
                      {"date": day.isoformat()}).content.decode()
    assert "not in the register yet" not in page
    assert escape(sif.name) in page and "XV-101" in page
    assert "No test plans" not in page
    row = page[page.index("<td>Full proof test"):]
    row = row[:row.index("</tr>")]
    assert f"{done[-1]:%Y-%m-%d}" in row  # the last full test done by then
    assert f"{later[0]:%Y-%m-%d}" not in row
    assert "Recomputed now with the engine from the records up to that date" in page


def test_rundemo_prepares_with_progress_and_sums_up_the_emails_in_one_line(
        demo_plant, settings, tmp_path, capsys):
    from django.core.management import call_command

    from register.models import Notification

    settings.VAR_DIR = tmp_path
    settings.EMAIL_BACKEND = "django.core.mail.backends.console.EmailBackend"  # the demo's
    lead = get_user_model().objects.get(username="lead")
    # An unsent notification from an hour ago: the scan's sweep e-mails it.
    note = Notification.objects.create(
        recipient=lead, site=demo_plant.site, kind=choices.NotificationKind.PLAN_STATE,
        subject_key="test:unsent", message="A notification still to be e-mailed.")
    Notification.objects.filter(pk=note.pk).update(
        created_at=timezone.now() - dt.timedelta(hours=1))
    out = io.StringIO()
    call_command("rundemo", "--no-serve", stdout=out)
    text = out.getvalue() + capsys.readouterr().out
    steps = [line for line in text.splitlines() if line[:4] in ("1/3 ", "2/3 ", "3/3 ")]
    assert [s[:4] for s in steps] == ["1/3 ", "2/3 ", "3/3 "]
    assert "Migrating the database" in steps[0] and "up to date" in steps[0]
    assert "already loaded; nothing changed" in text
    assert "test plans" in text  # the scan's counts
    (summary,) = [line for line in text.splitlines() if line.startswith("E-mails:")]
    emailed_to = summary.split(" e-mailed to ", 1)[1].split(".", 1)[0].split(", ")
    assert "lead" in emailed_to and str(tmp_path / "demo-mail") in summary
    assert "A notification still to be e-mailed." not in text  # no e-mail text dumped
    assert "Subject:" not in text
    files = list((tmp_path / "demo-mail").iterdir())
    assert any("A notification still to be e-mailed." in f.read_text() for f in files)
    Notification.objects.get(pk=note.pk, emailed_at__isnull=False)


def test_rundemo_help_documents_the_address():
    from register.management.commands.rundemo import Command

    text = " ".join(Command().create_parser("manage.py", "rundemo").format_help().split())
    assert "addrport" in text and "0.0.0.0:8000" in text and "127.0.0.1:8000" in text


def test_the_readme_documents_the_demo_address():
    from django.conf import settings

    readme = " ".join((settings.BASE_DIR / "README.md").read_text(encoding="utf-8").split())
    assert "manage.py rundemo 0.0.0.0:8000" in readme and "--no-serve" in readme


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


@pytest.mark.django_db
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
    schedule_services.decide_deferral(deferral, lead, demo.DEMO_PASSWORD, approve=False,
                                      note="Refused: test on time")

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


def test_read_time_state_equals_the_rule_on_every_demo_plan_400_days_on(plant):
    """No scan for 400 days: the states the lists and the API derive in SQL from the
    stored due dates still equal the rule's states from the records, plan by plan."""
    import datetime as _dt

    from register.models import TestPlan as Plan
    from register.schedule.due import compute_statuses, with_state

    plans = Plan.objects.all()
    assert plans.count() > 40
    for later in (0, 5, 400):
        day = timezone.localdate() + _dt.timedelta(days=later)
        sql = dict(with_state(plans, as_of=day).values_list("pk", "state"))
        rule = {pk: st.state for pk, st in compute_statuses(plans, day).items()}
        assert sql == rule, later
