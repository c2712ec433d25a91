"""Pages by role: each person's menu offers what their roles may use, each lands where
their work is, and a refused or missing page says why and offers the way back."""

import pytest
from django.test import Client

from register import choices
from register.accounts.menu import ITEMS
from tests import factories as f

pytestmark = pytest.mark.django_db

ROLE = choices.Role


@pytest.fixture
def people():
    s = f.site()
    f.unit(s)
    return {r: f.user(r, site=s, role=getattr(ROLE, r.upper()))
            for r in ("lead", "technician", "verifier", "auditor")}


def _menu(client):
    page = client.get("/inbox/")
    assert page.status_code == 200
    return [i.label for i in page.context["menu"]]


MENUS = {
    "lead": ["Overview", "Register", "My tests", "Operations", "To countersign", "Deferrals",
             "Evidence", "Chain check", "Import"],
    "technician": ["Overview", "Register", "My tests", "Operations", "Deferrals"],
    "verifier": ["Overview", "Register", "To countersign", "Evidence"],
    "auditor": ["Overview", "Register", "Evidence", "Chain check"],
}
LANDING = {"lead": "/", "technician": "/field/", "verifier": "/field/verify/",
           "auditor": "/audit/packs/"}


@pytest.mark.parametrize("role", MENUS)
def test_menu_and_landing_follow_the_role(people, role):
    client = Client()
    client.force_login(people[role])
    assert _menu(client) == MENUS[role]
    # every item of the menu opens for this person
    for item in ITEMS:
        if item.label in MENUS[role]:
            assert client.get(item.url).status_code == 200, item.label
    assert client.get("/start/")["Location"] == LANDING[role]


def test_signing_in_lands_on_the_start_page_or_the_page_asked_for(people):
    client = Client()
    resp = client.post("/accounts/login/", {"username": "technician",
                                            "password": f.PASSWORD})
    assert resp["Location"] == "/start/"
    assert client.get("/start/")["Location"] == "/field/"
    client.logout()
    resp = client.post("/accounts/login/?next=/deferrals/",
                       {"username": "technician", "password": f.PASSWORD})
    assert resp["Location"] == "/deferrals/"


def test_a_refused_page_says_why_and_offers_the_way_back(people):
    client = Client(raise_request_exception=False)
    client.force_login(people["technician"])
    resp = client.get("/import/")
    assert resp.status_code == 403
    body = resp.content.decode()
    assert "This page is not open to you" in body
    assert "Only a functional-safety lead imports into the register." in body
    assert 'href="/field/"' in body  # back to the technician's start page
    assert "Sign out" in body  # the full page with its header, not a bare 403


def test_a_missing_page_is_styled_and_the_api_still_answers_json(people):
    client = Client()
    client.force_login(people["auditor"])
    resp = client.get("/sifs/999999/")
    assert resp.status_code == 404 and "Nothing here" in resp.content.decode()
    api = client.get("/api/sifs/999999/")
    assert api.status_code == 404 and api["Content-Type"].startswith("application/json")
    refused = client.post("/api/demands/", {}, content_type="application/json")
    assert refused.status_code == 403 and refused["Content-Type"].startswith(
        "application/json")


def test_api_docs_signed_out_lead_to_the_sign_in_page():
    resp = Client().get("/api/docs/")
    assert resp.status_code == 302
    assert resp["Location"].startswith("/accounts/login/?next=/api/docs/")


def test_the_favicon_is_there():
    from django.contrib.staticfiles import finders

    resp = Client().get("/favicon.ico")
    assert resp.status_code == 301 and resp["Location"].endswith("/favicon.svg")
    assert finders.find("favicon.svg")


def test_the_sif_page_links_to_its_past(people):
    from register.models import PlantUnit

    sif = f.sif(PlantUnit.objects.first())
    client = Client()
    client.force_login(people["auditor"])
    body = client.get(f"/sifs/{sif.pk}/").content.decode()
    assert f'href="/audit/sifs/{sif.pk}/as-of/"' in body


def test_the_field_pages_show_the_same_menu(people):
    client = Client()
    client.force_login(people["technician"])
    nav = client.get("/field/").content.decode().split('<nav aria-label="Main">')[1]
    nav = nav.split("</nav>")[0]
    assert "My tests" in nav and "Operations" in nav
    assert "To countersign" not in nav and "Evidence" not in nav and "Import" not in nav
