"""Every person's inbox: own notifications only, newest first, the unread count in the
header, marked read one by one or all at once; each links to its item; usable at phone
width. And the notifications the services create: failure found, waiting for
countersignature, deferral requested, decided, withdrawn, each once."""

import datetime as dt
import shutil
from pathlib import Path

import pytest
from django.db import transaction
from django.test import Client
from django.utils import timezone

from register import choices, services
from register.inbox import notices
from register.models import ChainEntry, Deferral, Notification, TestPlan
from register.schedule.services import decide_deferral, request_deferral
from tests import factories as f
from tests.conftest import need

ARTIFACTS = Path(__file__).resolve().parents[2] / "test-artifacts"
Kind = choices.NotificationKind


def _world():
    site, other = f.site("north"), f.site("south")
    people = {
        "lead": f.user("lead", site=site, role=choices.Role.LEAD, email="lead@x.invalid"),
        "lead2": f.user("lead2", site=site, role=choices.Role.LEAD),
        "tech": f.user("tech", site=site, role=choices.Role.TECHNICIAN),
        "verifier": f.user("verifier", site=site, role=choices.Role.VERIFIER),
        "far_lead": f.user("far_lead", site=other, role=choices.Role.LEAD),
        "far_verifier": f.user("far_verifier", site=other, role=choices.Role.VERIFIER),
    }
    # the technician may also countersign others' work: never his own
    services_membership = f.user("tech_verifier", site=site, role=choices.Role.TECHNICIAN)
    from register.models import Membership

    Membership.objects.create(user=services_membership, site=site,
                              role=choices.Role.VERIFIER)
    people["tech_verifier"] = services_membership
    sif = f.sif(f.unit(site), tag="U10-SIF-101",
                in_service=timezone.localdate() - dt.timedelta(days=300))
    return site, other, people, sif


# ---------------------------------------------------------------------------------------
# A technician's phone: 390 px wide
# ---------------------------------------------------------------------------------------


@pytest.fixture
def phone_plant(transactional_db):
    site, other, people, sif = _world()
    rec = f.full_test(sif, people["tech_verifier"], timezone.now() - dt.timedelta(hours=2),
                      fail_tag=f"LT-{sif.tag}-A")
    long = ("U10-SIF-101 Full proof test of the high-high level trip on desalter V-1001 "
            "(LT-U10-SIF-101-A, XV-U10-SIF-101-A): overdue, due 01 Mar 2026, 30 days overdue.")
    for i in range(4):
        Notification.objects.create(recipient=people["verifier"], site=site, kind=Kind.OVERDUE,
                                    subject_key=f"phone:{i}", subject="Overdue", message=long,
                                    link=f"/sifs/{sif.pk}/")
    return {"people": people, "record": rec}


@pytest.mark.browser
def test_the_inbox_fits_a_phone(phone_plant, live_server, page):
    need(shutil.which("chromium") is not None, "Chromium not installed")
    ARTIFACTS.mkdir(exist_ok=True)
    page.set_viewport_size({"width": 390, "height": 844})
    base = live_server.url
    page.goto(f"{base}/accounts/login/?next=/inbox/")
    page.get_by_label("User name").fill("verifier")
    page.get_by_label("Password").fill(f.PASSWORD)
    page.get_by_role("button", name="Sign in").click()
    page.wait_for_url("**/inbox/")
    header = page.locator("a.inbox-link")
    assert header.get_attribute("aria-label") == "Notifications, 5 unread"
    assert page.locator(".note.unread").count() == 5
    # nothing wider than the screen: no sideways scrolling
    assert page.evaluate("document.documentElement.scrollWidth") <= 390
    for box in page.locator(".note form .btn").evaluate_all(
            "els => els.map(e => e.getBoundingClientRect().height)"):
        assert box >= 44  # a target a gloved finger can hit
    page.screenshot(path=str(ARTIFACTS / "inbox-390.png"), full_page=True)
    page.locator(".note.unread").first.get_by_role("button", name="Mark read").click()
    page.wait_for_url("**/inbox/**")
    assert page.locator(".note.unread").count() == 4
    assert page.locator("a.inbox-link").get_attribute("aria-label") == \
        "Notifications, 4 unread"
    # the countersignature request leads to the record and its countersign form
    page.get_by_role("link", name="waiting for countersignature").click()
    page.wait_for_url(f"**/field/records/{phone_plant['record'].pk}/")
    assert page.get_by_role("button", name="Countersign").count() == 1
    page.goto(f"{base}/inbox/")
    page.get_by_role("button", name="Mark all read").click()
    page.wait_for_url("**/inbox/**")
    assert page.locator(".note.unread").count() == 0
    assert page.locator("a.inbox-link").get_attribute("aria-label") == \
        "Notifications, 0 unread"
    assert page.evaluate("document.documentElement.scrollWidth") <= 390


@pytest.fixture(scope="class")
def world(django_db_setup, django_db_blocker):
    """Built once for the class below, rolled back at its end; each test in a savepoint.
    (A class, not the module: the browser test, which needs committed data, runs after
    the database tests and must find this transaction closed.)"""
    with django_db_blocker.unblock(), transaction.atomic():
        site, other, people, sif = _world()
        signed = f.full_test(sif, people["tech_verifier"],
                             timezone.now() - dt.timedelta(hours=3),
                             fail_tag=f"LT-{sif.tag}-A")
        yield {"site": site, "other": other, "people": people, "sif": sif, "signed": signed}
        transaction.set_rollback(True)


@pytest.fixture
def db_world(world, db):
    return world


def _keys(user):
    return set(Notification.objects.filter(recipient=user).values_list("kind", "subject_key"))


def _client(user) -> Client:
    c = Client()
    c.force_login(user)
    return c


def _seed(user, site, n, *, start=None):
    start = start or timezone.now() - dt.timedelta(days=1)
    notes = [Notification.objects.create(recipient=user, site=site, kind=Kind.OVERDUE,
                                         subject_key=f"seed:{user.pk}:{i}",
                                         subject=f"Seed {i}", message=f"Message number {i}.",
                                         link=f"/sifs/{i}/") for i in range(n)]
    for i, note in enumerate(notes):  # created one minute apart, the last one newest
        Notification.objects.filter(pk=note.pk).update(
            created_at=start + dt.timedelta(minutes=i))
    return notes


class TestNoticesAndPages:
    """Against one shared world."""

    # -- what the services notify ---------------------------------------------------------

    def test_a_signed_record_with_a_dangerous_failure_tells_the_leads_and_the_verifiers(
            self, db_world):
        p, rec = db_world["people"], db_world["signed"]
        failure = (Kind.FAILURE_FOUND, f"failure:{rec.pk}")
        countersign = (Kind.COUNTERSIGN, f"countersign:{rec.pk}")
        assert failure in _keys(p["lead"]) and failure in _keys(p["lead2"])
        assert countersign in _keys(p["verifier"])
        # never the performer (who is a verifier too), never another site, never the tech
        assert countersign not in _keys(p["tech_verifier"])
        assert not _keys(p["far_lead"]) and not _keys(p["far_verifier"]) and not _keys(p["tech"])
        note = Notification.objects.get(recipient=p["lead"], kind=Kind.FAILURE_FOUND)
        assert note.link == f"/tests/{rec.pk}/" and f"LT-{rec.sif.tag}-A" in note.message
        assert note.subject == "U10-SIF-101: dangerous failure found"
        verify = Notification.objects.get(recipient=p["verifier"], kind=Kind.COUNTERSIGN)
        assert verify.link == f"/field/records/{rec.pk}/"  # the record, with its countersign form
        # once: calling again for the same record creates nothing
        assert notices.failure_found(rec) == 0
        assert notices.waiting_for_countersignature(rec) == 0

    def test_a_passing_record_tells_only_the_verifiers(self, db_world):
        p, sif = db_world["people"], db_world["sif"]
        rec = f.full_test(sif, p["tech"], timezone.now() - dt.timedelta(hours=1))
        assert (Kind.COUNTERSIGN, f"countersign:{rec.pk}") in _keys(p["verifier"])
        assert (Kind.COUNTERSIGN, f"countersign:{rec.pk}") in _keys(p["tech_verifier"])
        assert not Notification.objects.filter(subject_key=f"failure:{rec.pk}").exists()
        # countersigned: no longer waiting, nothing new for anyone
        before = Notification.objects.count()
        services.verify_record(rec, p["verifier"], f.PASSWORD)
        assert notices.waiting_for_countersignature(rec) == 0
        assert Notification.objects.count() == before

    def test_deferrals_tell_the_leads_then_the_requester(self, db_world):
        p = db_world["people"]
        sif = f.sif(db_world["sif"].unit, tag="U10-SIF-102",
                    in_service=timezone.localdate() - dt.timedelta(days=300))  # due in ~2 months
        plan = TestPlan.objects.get(sif=sif)
        from register.schedule.due import status_of

        due = status_of(plan, timezone.localdate()).due_on
        d = request_deferral(user=p["tech"], plan=plan, proposed_on=due + dt.timedelta(days=20),
                             reason="Turnaround moved")
        asked = (Kind.DEFERRAL_REQUESTED, f"deferral:{d.pk}:requested")
        assert asked in _keys(p["lead"]) and asked in _keys(p["lead2"])
        assert not _keys(p["far_lead"])
        note = Notification.objects.get(recipient=p["lead"], subject_key=asked[1])
        assert note.link == f"/deferrals/{d.pk}/decide/"
        assert notices.deferral_requested(d) == 0
        decide_deferral(d, p["lead"], f.PASSWORD, approve=False,
                        note="Test it at the planned stop.")
        decided = (Kind.DEFERRAL, f"deferral:{d.pk}:rejected")
        assert decided in _keys(p["tech"])
        note = Notification.objects.get(recipient=p["tech"], subject_key=decided[1])
        assert "rejected: Test it at the planned stop." in note.message
        assert note.link == f"/deferrals/#deferral-{d.pk}"
        assert notices.deferral_decided(d) == 0
        # withdrawn (the function the deferral service calls): the requester hears, once
        assert notices.deferral_withdrawn(d) == 1
        assert notices.deferral_withdrawn(Deferral.objects.get(pk=d.pk)) == 0
        assert (Kind.DEFERRAL_WITHDRAWN, f"deferral:{d.pk}:withdrawn") in _keys(p["tech"])


    # -- the inbox pages -------------------------------------------------------------------

    def test_the_inbox_shows_own_notifications_newest_first_with_links(self, db_world):
        p, site = db_world["people"], db_world["site"]
        _seed(p["tech"], site, 3, start=timezone.now() + dt.timedelta(minutes=1))
        _seed(p["far_lead"], db_world["other"], 2)
        page = _client(p["tech"]).get("/inbox/")
        assert page.status_code == 200
        rows = list(page.context["page"])
        assert [n.recipient for n in rows] == [p["tech"]] * len(rows)
        assert [n.pk for n in rows] == sorted((n.pk for n in rows), reverse=True)
        assert rows[0].message == "Message number 2."
        html = page.content.decode()
        assert html.index("Message number 2.") < html.index("Message number 1.")
        assert '<a href="/sifs/2/">Message number 2.</a>' in html
        assert "Message number" in html and "far_lead" not in html
        unread = Notification.objects.filter(recipient=p["tech"], read_at__isnull=True).count()
        assert f'data-unread="{unread}"' in html  # the header's count
        assert f"{unread} unread" in html

    def test_marking_one_and_all_read(self, db_world):
        p, site = db_world["people"], db_world["site"]
        mine = _seed(p["lead2"], site, 3)
        theirs = _seed(p["far_lead"], db_world["other"], 1)[0]
        c = _client(p["lead2"])
        chain = ChainEntry.objects.count()
        r = c.post(f"/inbox/{mine[0].pk}/read/", {"next": "/inbox/?show=unread"})
        assert r.status_code == 302 and r.url == "/inbox/?show=unread"
        assert Notification.objects.get(pk=mine[0].pk).read_at is not None
        assert Notification.objects.get(pk=mine[1].pk).read_at is None
        unread_page = c.get("/inbox/?show=unread")
        assert mine[0].pk not in [n.pk for n in unread_page.context["page"]]
        # somebody else's notification does not exist for this user
        assert c.post(f"/inbox/{theirs.pk}/read/").status_code == 404
        assert Notification.objects.get(pk=theirs.pk).read_at is None
        # an address elsewhere is not followed
        r = c.post(f"/inbox/{mine[1].pk}/read/", {"next": "https://elsewhere.invalid/"})
        assert r.url == "/inbox/"
        assert c.get(f"/inbox/{mine[2].pk}/read/").status_code == 405  # reading changes nothing
        r = c.post("/inbox/read-all/")
        assert r.status_code == 302
        assert not Notification.objects.filter(recipient=p["lead2"], read_at__isnull=True).exists()
        assert Notification.objects.get(pk=theirs.pk).read_at is None
        assert "data-unread" not in c.get("/inbox/").content.decode()  # no count when none
        assert ChainEntry.objects.count() == chain  # not register data: nothing chained

    def test_signed_out_people_are_sent_to_sign_in(self, db_world):
        note = _seed(db_world["people"]["tech"], db_world["site"], 1)[0]
        c = Client()
        for method, url in (("get", "/inbox/"), ("post", f"/inbox/{note.pk}/read/"),
                            ("post", "/inbox/read-all/")):
            r = getattr(c, method)(url)
            assert r.status_code == 302 and "/accounts/login/" in r.url
        assert Notification.objects.get(pk=note.pk).read_at is None

    def test_the_inbox_pages_long_lists(self, db_world):
        p = db_world["people"]
        _seed(p["far_verifier"], db_world["other"], 45)
        c = _client(p["far_verifier"])
        first = c.get("/inbox/")
        assert len(first.context["page"]) == 30 and first.context["page"].has_next()
        second = c.get("/inbox/?page=2")
        assert len(second.context["page"]) == 15
        assert not {n.pk for n in first.context["page"]} & {n.pk for n in second.context["page"]}
