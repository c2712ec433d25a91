"""The read pages cost the same number of queries whatever the size of the plant: the
plant overview, the filtered register list, the SIF page and the technician's worklist,
for a plant of 3 SIFs and one of 12 (each with tests signed and an assessment stored)."""

from __future__ import annotations

import datetime as dt

import pytest
from django.db import connection, transaction
from django.test import Client
from django.test.utils import CaptureQueriesContext
from django.utils import timezone

from register import choices
from register.models import SafetyFunction
from tests import factories as f

pytestmark = pytest.mark.django_db


def _plant(n: int, code: str):
    from calcs.adapter import recompute_many
    from register.schedule import followup

    site = f.site(code)
    unit = f.unit(site)
    tech = f.user(f"{code}-tech", site=site, role=choices.Role.TECHNICIAN)
    lead = f.user(f"{code}-lead", site=site, role=choices.Role.LEAD)
    with followup.suspended():
        for i in range(n):
            sif = f.sif(unit, tag=f"{code.upper()}-{i}", voting="1oo2" if i % 2 else "1oo1")
            for years in (3, 2, 1):
                f.full_test(sif, tech, timezone.now() - dt.timedelta(days=365 * years + i))
    from register.models import TestPlan
    from register.schedule.due import refresh_plans

    refresh_plans(TestPlan.objects.filter(sif__unit__site=site))
    recompute_many(SafetyFunction.objects.filter(unit__site=site), trigger="test")
    return {"site": site, "tech": tech, "lead": lead,
            "sif": SafetyFunction.objects.filter(unit__site=site).order_by("pk").first()}


@pytest.fixture(scope="module")
def plants(django_db_setup, django_db_blocker):
    with django_db_blocker.unblock(), transaction.atomic():
        yield _plant(3, "small"), _plant(12, "big")
        transaction.set_rollback(True)


PAGES = {
    "plant overview": ("lead", lambda p: "/"),
    "filtered register list": ("lead", lambda p: "/sifs/?target_sil=2&overdue=true"),
    "register list": ("lead", lambda p: "/sifs/"),
    "SIF page": ("lead", lambda p: f"/sifs/{p['sif'].pk}/"),
    "technician worklist": ("tech", lambda p: "/field/"),
}


def _queries(plant, who, url) -> int:
    client = Client()
    client.force_login(plant[who])
    client.get(url)  # a first request fills what a session caches
    with CaptureQueriesContext(connection) as q:
        resp = client.get(url)
    assert resp.status_code == 200, url
    return len(q)


@pytest.mark.parametrize("page", PAGES)
def test_a_page_costs_the_same_queries_for_a_bigger_plant(plants, page):
    small, big = plants
    who, url = PAGES[page]
    n_small, n_big = _queries(small, who, url(small)), _queries(big, who, url(big))
    assert n_small == n_big, (page, n_small, n_big)
    assert n_small > 3, "the page reads the plant"
