"""The field workflow through the web: list and search, entry, signing, countersigning,
corrections; the entry page and the search on the demo plant."""

import datetime as dt
import re

import pytest
from django.contrib.auth import get_user_model
from django.core.files.uploadedfile import SimpleUploadedFile
from django.test import Client
from django.urls import reverse
from django.utils import timezone

from calcs.models import Assessment
from register import choices, services
from register.models import (
    Attachment,
    Component,
    MeasuredValue,
    PlantUnit,
    SafetyFunction,
    TestPlan,
    TestRecord,
    TestStep,
)
from tests import factories as f


@pytest.fixture
def plant():
    site = f.site()
    unit = f.unit(site)
    sif = f.sif(unit, tag="SIF-101")
    SafetyFunction.objects.filter(pk=sif.pk).update(required_response_time_s=8.0)
    sif.refresh_from_db()
    comps = list(Component.objects.filter(subsystem__sif=sif).order_by("subsystem__position"))
    Component.objects.filter(pk=comps[0].pk).update(tag="LT-101A")
    Component.objects.filter(pk=comps[1].pk).update(tag="XV-101")
    plan = TestPlan.objects.get(sif=sif)
    trip, closing = f.trip_and_stroke_steps(plan)
    other_unit = f.unit(f.site(), code="U9")
    other_sif = f.sif(other_unit, tag="SIF-900")
    people = {
        "tech": f.user("tech", site=site, role=choices.Role.TECHNICIAN),
        "verifier": f.user("verifier", site=site, role=choices.Role.VERIFIER),
        "auditor": f.user("auditor", site=site, role=choices.Role.AUDITOR),
        "outsider": f.user("outsider", site=other_sif.unit.site, role=choices.Role.TECHNICIAN),
    }
    return {"sif": sif, "plan": plan, "lt": Component.objects.get(tag="LT-101A"),
            "xv": Component.objects.get(tag="XV-101"), "trip": trip, "closing": closing,
            "other_plan": TestPlan.objects.get(sif=other_sif), **people}


def login(client, user):
    client.force_login(user)
    return client


def entry_data(p, *, token="a" * 32, when=None, lt_found="80.4", lt_left="80.1",
               lt_found_verdict="pass", xv_found="6.2", action="save", version=None, **extra):
    when = when or (timezone.localtime() - dt.timedelta(hours=2))
    lt, xv, trip, closing = p["lt"], p["xv"], p["trip"], p["closing"]
    data = {
        "form_token": token, "kind": "full", "performed_at": when.strftime("%Y-%m-%dT%H:%M"),
        "remarks": "", "action": action,
        f"c{lt.pk}-as_found": lt_found_verdict, f"c{lt.pk}-as_left": "pass",
        f"c{lt.pk}-v{trip.pk}_found": lt_found, f"c{lt.pk}-v{trip.pk}_left": lt_left,
        f"c{xv.pk}-as_found": "pass", f"c{xv.pk}-as_left": "pass",
        f"c{xv.pk}-v{closing.pk}_found": xv_found,
    }
    # The logic solver is exercised too.
    for comp in Component.objects.filter(subsystem__sif=p["sif"]).exclude(pk__in=[lt.pk, xv.pk]):
        data[f"c{comp.pk}-as_found"] = "pass"
        data[f"c{comp.pk}-as_left"] = "pass"
    if version is not None:
        data["expected_version"] = str(version)
    data.update(extra)
    return data


def start_url(p):
    return reverse("field:start", args=[p["plan"].pk])


# --- the list ----------------------------------------------------------------------------


@pytest.mark.django_db
def test_worklist_finds_plan_by_part_of_a_device_tag(client, plant, django_assert_max_num_queries):
    login(client, plant["tech"])
    with django_assert_max_num_queries(22):  # +2: the request's savepoint (ATOMIC_REQUESTS inside the test's transaction)
        resp = client.get(reverse("field:worklist"), {"q": "101a"})
    body = resp.content.decode()
    assert resp.status_code == 200
    assert "SIF-101" in body and "LT-101A" in body
    assert "Overdue" in body or "Escalated" in body
    assert "SIF-900" not in body  # another site's plan never shows
    miss = client.get(reverse("field:worklist"), {"q": "ZZ-404"}).content.decode()
    assert "SIF-101" not in miss and "No test plan matches" in miss


def _tiles(client, q):
    html = client.get(reverse("field:worklist"), {"q": q}).content.decode()
    return sorted(re.findall(r'<strong class="tag">([^<]+)</strong>', html)), html


@pytest.mark.django_db
def test_worklist_finds_what_technicians_type(client, plant, django_assert_max_num_queries):
    """SIF tag, SIF name (with its equipment), unit code or name, device tag; every word
    must match somewhere; tags with or without separators; a plan naming its devices is
    found by those devices only."""
    site = plant["sif"].unit.site
    gas = f.unit(site, code="U2")
    PlantUnit.objects.filter(pk=gas.pk).update(name="Gas compression")
    compressor = f.sif(gas, tag="SIF-201")
    SafetyFunction.objects.filter(pk=compressor.pk).update(
        name="High-high pressure in compressor K-201 discharge trips feed")
    partial = TestPlan.objects.create(sif=plant["sif"], name="Partial stroke test",
                                      kind=choices.TestKind.PARTIAL, interval_months=6)
    partial.components.set([plant["xv"]])
    login(client, plant["tech"])
    both = ["SIF-101", "SIF-101"]  # the full and the partial test of SIF-101
    cases = {
        "compressor": ["SIF-201"], "k-201": ["SIF-201"], "Gas compression": ["SIF-201"],
        "u2": ["SIF-201"], "level": both, "sif101": both, "SIF 201": ["SIF-201"],
        "lt101a": ["SIF-101"], "LT 101A": ["SIF-101"], "xv-101": both,
        "high": sorted(both + ["SIF-201"]), "level compressor": [], "-": sorted(
            both + ["SIF-201"]),
    }
    for q, expected in cases.items():
        tags, html = _tiles(client, q)
        assert tags == expected, q
    # The plan naming only the valve is not found by the transmitter's tag.
    tags, html = _tiles(client, "LT-101A")
    assert tags == ["SIF-101"] and "Partial stroke test" not in html
    assert "Devices: LT-101A" in html  # the device that matched is named on the tile
    with django_assert_max_num_queries(22):  # +2: the request's savepoint (ATOMIC_REQUESTS inside the test's transaction)
        client.get(reverse("field:worklist"), {"q": "high compressor k-201 u2 sif201"})


# --- the full flow ----------------------------------------------------------------------


@pytest.mark.django_db
def test_draft_sign_verify_moves_due_date_and_recomputes(client, plant,
                                                         django_capture_on_commit_callbacks):
    p = plant
    due_before = TestPlan.objects.get(pk=p["plan"].pk).next_due_on
    assessments_before = Assessment.objects.filter(sif=p["sif"]).count()
    login(client, p["tech"])
    resp = client.post(start_url(p), entry_data(p, lt_found="83.0", lt_found_verdict="fail",
                                                **{f"c{p['lt'].pk}-failure_mode": "du",
                                                   f"c{p['lt'].pk}-failure_description":
                                                   "Trip 3 % high (drift).",
                                                   f"c{p['lt'].pk}-work_done":
                                                   "Recalibrated."}))
    record = TestRecord.objects.get(sif=p["sif"])
    assert resp.status_code == 302 and resp.url == reverse("field:record_edit", args=[record.pk])
    found = MeasuredValue.objects.get(result__record=record, step=p["trip"], phase="found")
    assert found.value == 83.0 and found.within_criterion is False

    with django_capture_on_commit_callbacks(execute=True):
        resp = client.post(reverse("field:record_edit", args=[record.pk]),
                           entry_data(p, token="b" * 32, lt_found="83.0",
                                      lt_found_verdict="fail", action="sign",
                                      password=f.PASSWORD, version=record.draft_version,
                                      **{f"c{p['lt'].pk}-failure_mode": "du",
                                         f"c{p['lt'].pk}-failure_description": "Drift.",
                                         f"c{p['lt'].pk}-work_done": "Recalibrated."}))
    assert resp.status_code == 302, resp.content.decode()[:2000]
    record.refresh_from_db()
    assert record.status == choices.RecordStatus.SIGNED
    plan = TestPlan.objects.get(pk=p["plan"].pk)
    assert plan.next_due_on != due_before
    assert plan.next_due_on > timezone.localdate()
    assert Assessment.objects.filter(sif=p["sif"]).count() > assessments_before

    page = client.get(reverse("field:record_detail", args=[record.pk])).content.decode()
    assert plan.next_due_on.isoformat() in page and "Achieved PFDavg" in page

    client.logout()
    login(client, p["verifier"])
    queue = client.get(reverse("field:verify_queue")).content.decode()
    assert "SIF-101" in queue
    with django_capture_on_commit_callbacks(execute=True):
        resp = client.post(reverse("field:record_verify", args=[record.pk]),
                           {"password": f.PASSWORD})
    record.refresh_from_db()
    assert record.status == choices.RecordStatus.VERIFIED
    assert record.verified_by == p["verifier"]
    assert "SIF-101" not in client.get(reverse("field:verify_queue")).content.decode()


# --- bad input keeps what was typed ------------------------------------------------------


@pytest.mark.django_db
def test_non_number_is_refused_next_to_the_field_and_kept(client, plant):
    login(client, plant["tech"])
    resp = client.post(start_url(plant), entry_data(plant, lt_found="8o.4",
                                                    remarks="typed remark"))
    body = resp.content.decode()
    assert resp.status_code == 400
    assert "is not a number" in body
    assert 'value="8o.4"' in body and "typed remark" in body and 'value="6.2"' in body
    assert not TestRecord.objects.exists()


@pytest.mark.django_db
def test_value_outside_criterion_cannot_pass(client, plant):
    login(client, plant["tech"])
    resp = client.post(start_url(plant), entry_data(plant, xv_found="9.0"))  # > 8 s response
    assert resp.status_code == 400
    assert "outside" in resp.content.decode()
    assert not TestRecord.objects.exists()


@pytest.mark.django_db
def test_future_date_is_refused(client, plant):
    login(client, plant["tech"])
    resp = client.post(start_url(plant), entry_data(
        plant, when=timezone.localtime() + dt.timedelta(days=2)))
    assert resp.status_code == 400
    assert "The test date is in the future." in resp.content.decode()
    assert not TestRecord.objects.exists()


@pytest.mark.django_db
def test_date_before_in_service_is_refused(client, plant):
    login(client, plant["tech"])
    resp = client.post(start_url(plant), entry_data(
        plant, when=timezone.make_aware(dt.datetime(2019, 6, 1, 9, 0))))
    body = resp.content.decode()
    assert resp.status_code == 400
    assert "before the equipment entered service" in body
    assert 'value="80.4"' in body
    assert not TestRecord.objects.exists()


@pytest.mark.django_db
def test_failure_needs_classification_and_description(client, plant):
    login(client, plant["tech"])
    resp = client.post(start_url(plant), entry_data(plant, lt_found="83", lt_found_verdict="fail"))
    body = resp.content.decode()
    assert "Classify the failure found" in body and "Describe the failure found." in body
    assert not TestRecord.objects.exists()


@pytest.mark.django_db
def test_performer_cannot_countersign_own_record(client, plant):
    p = plant
    f.Membership.objects.create(user=p["tech"], site=p["sif"].unit.site,
                                role=choices.Role.VERIFIER)
    login(client, p["tech"])
    client.post(start_url(p), entry_data(p, action="sign", password=f.PASSWORD))
    record = TestRecord.objects.get()
    assert record.status == choices.RecordStatus.SIGNED
    detail = client.get(reverse("field:record_detail", args=[record.pk])).content.decode()
    assert "another person must countersign" in detail
    resp = client.post(reverse("field:record_verify", args=[record.pk]),
                       {"password": f.PASSWORD}, follow=True)
    assert "The verifier must be another person than the performer." in resp.content.decode()
    record.refresh_from_db()
    assert record.status == choices.RecordStatus.SIGNED and record.verified_by is None


@pytest.mark.django_db
def test_same_post_twice_creates_one_record(client, plant):
    login(client, plant["tech"])
    data = entry_data(plant)
    first = client.post(start_url(plant), data)
    second = client.post(start_url(plant), data, follow=True)
    assert TestRecord.objects.count() == 1
    record = TestRecord.objects.get()
    assert first.url == reverse("field:record_edit", args=[record.pk])
    assert second.redirect_chain[-1][0] == reverse("field:record_edit", args=[record.pk])
    assert "nothing was duplicated" in second.content.decode()
    # The same on an edit: the repeated save is recognised, not reported as a conflict.
    edit = reverse("field:record_edit", args=[record.pk])
    again = entry_data(plant, token="c" * 32, version=record.draft_version, lt_found="80.2")
    client.post(edit, again)
    repeat = client.post(edit, again, follow=True)
    assert "nothing was duplicated" in repeat.content.decode()
    assert TestRecord.objects.count() == 1


@pytest.mark.django_db
def test_stale_draft_keeps_the_typing_and_the_other_save(client, plant):
    login(client, plant["tech"])
    client.post(start_url(plant), entry_data(plant))
    record = TestRecord.objects.get()
    edit = reverse("field:record_edit", args=[record.pk])
    version = record.draft_version
    ok = client.post(edit, entry_data(plant, token="d" * 32, version=version, lt_found="80.2"))
    assert ok.status_code == 302
    stale = client.post(edit, entry_data(plant, token="e" * 32, version=version,
                                         lt_found="79.7", remarks="second tab"))
    body = stale.content.decode()
    assert stale.status_code == 400
    assert "saved elsewhere since you opened it" in body
    assert 'value="79.7"' in body and "second tab" in body
    stored = MeasuredValue.objects.get(result__record=record, step=plant["trip"], phase="found")
    assert stored.value == 80.2
    # Saving again from the conflict page replaces the other version on purpose.
    record.refresh_from_db()
    assert f'name="expected_version" value="{record.draft_version}"' in body


@pytest.mark.django_db
def test_attachment_checks_type_and_is_served_as_download(client, plant, settings, tmp_path):
    settings.MEDIA_ROOT = tmp_path
    login(client, plant["tech"])
    fake = SimpleUploadedFile("photo.jpg", b"<html><script>alert(1)</script>",
                              content_type="image/jpeg")
    resp = client.post(start_url(plant), {**entry_data(plant), "attachments": fake})
    assert resp.status_code == 400 and "does not contain what its name says" in resp.content.decode()
    assert not TestRecord.objects.exists()
    png = SimpleUploadedFile("gauge.png", b"\x89PNG\r\n\x1a\n" + b"0" * 64,
                             content_type="image/png")
    client.post(start_url(plant), {**entry_data(plant), "attachments": png})
    att = Attachment.objects.get()
    assert len(att.sha256) == 64 and att.content_type == "image/png"
    got = client.get(reverse("field:attachment", args=[att.pk]))
    assert got["Content-Disposition"].startswith("attachment")
    assert got["X-Content-Type-Options"] == "nosniff"
    client.logout()
    login(client, plant["outsider"])
    assert client.get(reverse("field:attachment", args=[att.pk])).status_code == 404


@pytest.mark.django_db
def test_attachment_size_limit(client, plant, settings):
    settings.ATTACHMENT_MAX_BYTES = 100
    login(client, plant["tech"])
    big = SimpleUploadedFile("big.pdf", b"%PDF-1.4" + b"0" * 500, content_type="application/pdf")
    resp = client.post(start_url(plant), {**entry_data(plant), "attachments": big})
    assert resp.status_code == 400 and "the limit is" in resp.content.decode()
    assert not TestRecord.objects.exists()


@pytest.mark.django_db
def test_correction_needs_reason_and_links_both_versions(client, plant):
    login(client, plant["tech"])
    client.post(start_url(plant), entry_data(plant, action="sign", password=f.PASSWORD))
    original = TestRecord.objects.get()
    url = reverse("field:record_correct", args=[original.pk])
    refused = client.post(url, {"reason": "  "})
    assert refused.status_code == 400 and "A correction needs a reason." in refused.content.decode()
    resp = client.post(url, {"reason": "Wrong date typed"})
    draft = TestRecord.objects.exclude(pk=original.pk).get()
    assert resp.url == reverse("field:record_edit", args=[draft.pk])
    assert draft.supersedes == original
    page = client.get(reverse("field:record_detail", args=[original.pk])).content.decode()
    assert "superseded by" in page and reverse("field:record_detail", args=[draft.pk]) in page


# --- rights ------------------------------------------------------------------------------


@pytest.mark.django_db
def test_wrong_password_keeps_the_draft(client, plant):
    login(client, plant["tech"])
    resp = client.post(start_url(plant), entry_data(plant, action="sign", password="nope"),
                       follow=True)
    record = TestRecord.objects.get()
    assert record.status == choices.RecordStatus.DRAFT
    assert "The password is not correct" in resp.content.decode()


@pytest.mark.django_db
def test_technician_cannot_verify(client, plant):
    login(client, plant["tech"])
    client.post(start_url(plant), entry_data(plant, action="sign", password=f.PASSWORD))
    record = TestRecord.objects.get()
    tech2 = f.user("tech2", site=plant["sif"].unit.site, role=choices.Role.TECHNICIAN)
    client.logout()
    login(client, tech2)
    assert client.post(reverse("field:record_verify", args=[record.pk]),
                       {"password": f.PASSWORD}).status_code == 403
    assert client.get(reverse("field:verify_queue")).status_code == 403
    record.refresh_from_db()
    assert record.status == choices.RecordStatus.SIGNED


@pytest.mark.django_db
def test_auditor_gets_403_on_every_post(client, plant):
    login(client, plant["tech"])
    client.post(start_url(plant), entry_data(plant, action="sign", password=f.PASSWORD))
    signed = TestRecord.objects.get()
    client.post(start_url(plant), entry_data(plant, token="f" * 32))
    draft = TestRecord.objects.get(status=choices.RecordStatus.DRAFT)
    client.logout()
    login(client, plant["auditor"])
    posts = [
        (start_url(plant), entry_data(plant, token="9" * 32)),
        (reverse("field:record_edit", args=[draft.pk]), entry_data(plant)),
        (reverse("field:record_verify", args=[signed.pk]), {"password": f.PASSWORD}),
        (reverse("field:record_correct", args=[signed.pk]), {"reason": "x"}),
    ]
    for url, data in posts:
        assert client.post(url, data).status_code == 403, url
    assert client.get(reverse("field:worklist")).status_code == 403
    assert TestRecord.objects.count() == 2


@pytest.mark.django_db
def test_other_site_user_gets_404(client, plant):
    login(client, plant["tech"])
    client.post(start_url(plant), entry_data(plant, action="sign", password=f.PASSWORD))
    record = TestRecord.objects.get()
    client.logout()
    login(client, plant["outsider"])
    assert client.get(start_url(plant)).status_code == 404
    assert client.post(start_url(plant), entry_data(plant)).status_code == 404
    for name in ("field:record_detail", "field:record_edit"):
        assert client.get(reverse(name, args=[record.pk])).status_code == 404
    for name in ("field:record_verify", "field:record_correct"):
        assert client.post(reverse(name, args=[record.pk]), {"password": "x",
                                                             "reason": "x"}).status_code == 404
    # Their own site works.
    assert client.get(reverse("field:start", args=[plant["other_plan"].pk])).status_code == 200


@pytest.mark.django_db
def test_the_performer_discards_a_draft_and_the_history_keeps_it(client, plant):
    """A draft is deleted only by its performer, through the one service; the deletion is a
    history row attributed to them (so it is chained); a signed record cannot be discarded."""
    from register.models import ChainEntry, TestRecord

    tech = plant["tech"]
    draft = services.save_draft(
        user=tech, sif=plant["sif"], plan=plant["plan"], kind=choices.TestKind.FULL,
        performed_at=timezone.now(), results=[services.ResultInput(
            component=plant["lt"], as_found="pass", as_left="pass")])
    client.force_login(tech)
    before = ChainEntry.objects.count()
    response = client.post(f"/field/records/{draft.pk}/discard/")
    assert response.status_code == 302
    assert not TestRecord.objects.filter(pk=draft.pk).exists()
    deleted = TestRecord.history.filter(id=draft.pk, history_type="-").get()
    assert deleted.history_user == tech and deleted.history_change_reason == "draft discarded"
    assert ChainEntry.objects.count() > before
    signed = services.save_draft(
        user=tech, sif=plant["sif"], plan=plant["plan"], kind=choices.TestKind.FULL,
        performed_at=timezone.now(), results=[services.ResultInput(
            component=plant["lt"], as_found="pass", as_left="pass")])
    services.sign_record(signed, tech, None, check_password=False)
    response = client.post(f"/field/records/{signed.pk}/discard/")
    assert response.status_code == 302 and TestRecord.objects.filter(pk=signed.pk).exists()


# --- the demo plant -----------------------------------------------------------------------


def _demo_client() -> Client:
    client = Client()
    client.force_login(get_user_model().objects.get(username="tech"))
    return client


def _value_steps(html: str, component) -> set[str]:
    return set(re.findall(rf'name="c{component.pk}-v(\d+)_found"', html))


def test_each_device_of_the_demos_u30_sif_301_is_asked_only_its_own_steps(demo_plant):
    sif = demo_plant.sifs["U30-SIF-301"]
    plan = TestPlan.objects.get(sif=sif, name="Full proof test")
    steps = {s.position: s for s in plan.steps.all()}
    trip, check, closing = steps[1], steps[2], steps[3]
    devices = list(Component.objects.filter(subsystem__sif=sif).select_related("subsystem"))
    client = _demo_client()
    expected = {"sensing": {str(trip.pk)}, "logic": set(), "final": {str(closing.pk)}}
    # As loaded (steps read from what they measure), then as the demo should set them.
    for setting in (None, {1: "sensing", 2: "logic", 3: "final"}):
        if setting:
            for position, role in setting.items():
                TestStep.objects.filter(pk=steps[position].pk).update(applies_to_role=role)
        html = client.get(reverse("field:start", args=[plan.pk])).content.decode()
        for device in devices:
            assert _value_steps(html, device) == expected[device.subsystem.role], device.tag
        per_role = {role: sum(d.subsystem.role == role for d in devices) for role in expected}
        assert html.count('class="measured"') == 2 * (per_role["sensing"] + per_role["final"])
        assert html.count(check.instruction) == per_role["logic"]


def _found_tags(client, q: str) -> list[str]:
    html = client.get(reverse("field:worklist"), {"q": q}).content.decode()
    return re.findall(r'<strong class="tag">([^<]+)</strong>\s*<span class="badge', html)


def test_field_search_finds_sif_unit_equipment_and_device_tags_in_the_demo(demo_plant):
    client = _demo_client()
    plans = list(TestPlan.objects.filter(sif__unit__site=demo_plant.site,
                                         sif__life_stage=choices.LifeStage.IN_SERVICE)
                 .select_related("sif__unit").prefetch_related("components",
                                                               "sif__subsystems__components"))

    def expected(word_match):
        return sorted(p.sif.tag for p in plans if word_match(p))

    def devices(p):
        named = list(p.components.all())
        return named or [c for s in p.sif.subsystems.all() for c in s.components.all()]

    def compact(text):
        return re.sub(r"[-\s_/.]", "", text).upper()

    cases = {
        "desalter": lambda p: "desalter" in p.sif.name.lower(),
        "V-1001": lambda p: "v-1001" in p.sif.name.lower(),
        "gas compression": lambda p: "gas compression" in p.sif.unit.name.lower(),
        "U20": lambda p: p.sif.unit.code == "U20",
        "lt101": lambda p: any("LT101" in compact(c.tag) for c in devices(p)),
        "XV 301A": lambda p: any("XV" in c.tag and "301A" in c.tag for c in devices(p)),
        "u30-sif-301": lambda p: p.sif.tag == "U30-SIF-301",
    }
    for q, match in cases.items():
        want = expected(match)
        assert want and len(want) <= 20, q  # a real match, on the first page
        assert sorted(_found_tags(client, q)) == want, q
    # The examples the search box shows all find something in the demo.
    page = client.get(reverse("field:worklist")).content.decode()
    placeholder = re.search(r'id="q"[^>]*placeholder="e\.g\. ([^"]+)"', page).group(1)
    examples = [e.strip() for e in placeholder.split(" or ")]
    assert len(examples) >= 2
    for example in examples:
        assert _found_tags(client, example), example
