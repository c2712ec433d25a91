"""Hostile and careless input against the API's writes, lists and a few pages.

One table: each write endpoint (bypasses, demands, deferrals, test records, design changes
of a SIF, subsystem, component and plan) x each bad value (NaN, Infinity, 1e308, -1, year 1,
year 9999, a NUL character, 200,000 characters, an unknown key). Every case answers 400
naming the field, writes nothing (rows, history and chain counted before and after), and
the lists of that object still answer 200 afterwards. Then the body's shape (nesting,
size), NUL in address parameters, bad filter dates, evidence-pack periods and chart text.
"""

from __future__ import annotations

import datetime as dt
import json

import pytest
from django.core.cache import cache
from django.db import transaction
from django.test import Client
from django.utils import timezone

from register.models import (
    Bypass,
    ChainEntry,
    Component,
    Deferral,
    Demand,
    EvidencePack,
    SafetyFunction,
    Subsystem,
    TestPlan,
    TestRecord,
)
from tests.api import build_world

pytestmark = pytest.mark.django_db

LONG = "x" * 200_000


def _ago(**kw):
    return (timezone.now() - dt.timedelta(**kw)).isoformat()


def _design(**extra):
    return {**extra, "change_reason": "Hostile input check", "change_reference": "CR-0"}


def _record(p, **extra):
    return {"sif": p.sif.pk, "plan": p.plan.pk, "kind": "full", "performed_at": _ago(hours=3),
            "results": [{"component": c.pk, "as_found": "pass", "as_left": "pass"}
                        for c in p.components], **extra}


def _measured(p, value):
    body = _record(p)
    body["results"][0]["measurements"] = [{"quantity": "level", "value": value}]
    return body


# name -> (method, url, body(place, field, value), model, fields by kind, lists)
# Fields by kind: "number" and "date" (or "datetime") and "text"; None where the endpoint
# takes none of that kind. Lists: the API list and the page that show the object.
ENDPOINTS = {
    "bypass": ("post", lambda p: "/api/bypasses/", lambda p, k, v: {
        "sif": p.sif.pk, "component": p.components[0].pk, "started_at": _ago(hours=1),
        "authorised_hours": 4, "reason": "Valve maintenance", k: v}, Bypass,
        {"number": "authorised_hours", "datetime": "started_at", "text": "reason"},
        ("/api/bypasses/", "/operations/")),
    "demand": ("post", lambda p: "/api/demands/", lambda p, k, v: {
        "sif": p.sif.pk, "occurred_at": _ago(days=1), "successful": True,
        "description": "Trip on high level", k: v}, Demand,
        {"datetime": "occurred_at", "text": "description"},
        ("/api/demands/", "/operations/")),
    "deferral": ("post", lambda p: "/api/deferrals/", lambda p, k, v: {
        "plan": p.plan.pk, "reason": "Shutdown moved by six weeks",
        "proposed_on": (timezone.localdate() + dt.timedelta(days=45)).isoformat(), k: v},
        Deferral, {"date": "proposed_on", "text": "reason"},
        ("/api/deferrals/", "/deferrals/")),
    "test record": ("post", lambda p: "/api/test-records/", lambda p, k, v: (
        _measured(p, v) if k == "results" else _record(p, **{k: v})), TestRecord,
        {"number": "results", "datetime": "performed_at", "text": "remarks"},
        ("/api/test-records/", "/field/")),
    "sif": ("patch", lambda p: f"/api/sifs/{p.sif.pk}/", lambda p, k, v: _design(**{k: v}),
            SafetyFunction, {"number": "target_pfd_avg", "date": "in_service_on",
                             "text": "name"}, ("/api/sifs/", "/sifs/")),
    "subsystem": ("patch", lambda p: f"/api/subsystems/{p.subsystem.pk}/",
                  lambda p, k, v: _design(**{k: v}), Subsystem,
                  {"number": "mttr_hours", "text": "name"}, ("/api/subsystems/", "/sifs/")),
    "component": ("patch", lambda p: f"/api/components/{p.components[0].pk}/",
                  lambda p, k, v: _design(**{k: v}), Component,
                  {"number": "proof_test_coverage", "date": "in_service_on", "text": "tag"},
                  ("/api/components/", "/sifs/")),
    "plan": ("patch", lambda p: f"/api/test-plans/{p.plan.pk}/",
             lambda p, k, v: _design(**{k: v}), TestPlan,
             {"number": "coverage", "date": "effective_from", "text": "name"},
             ("/api/test-plans/", "/field/")),
}
NAN, INF = float("nan"), float("inf")
# (name, kind of field, value); "unknown" is a key no serializer has.
VALUES = [
    ("NaN", "number", NAN),
    ("Infinity", "number", INF),
    ("-Infinity", "number", -INF),
    ("1e308", "number", 1e308),
    ("-1", "number", -1),
    ("0001-01-01", "date", "0001-01-01"),
    ("9999-12-31", "date", "9999-12-31"),
    ("NUL", "text", "trip\x00"),
    ("200,000 characters", "text", LONG),
    ("unknown key", "unknown", "red"),
]
# A measured value may be negative (a pressure below zero on a gauge, a temperature).
ALLOWED = {("test record", "-1")}


def _field(fields: dict, kind: str):
    if kind == "unknown":
        return "colour"
    if kind == "date":
        return fields.get("date") or fields.get("datetime")
    return fields.get(kind)


def _value(fields: dict, kind: str, value):
    if kind == "date" and "datetime" in fields:
        return f"{value}T{'00:00:00' if value.startswith('0001') else '23:59:59'}Z"
    return value


CASES = [
    pytest.param(endpoint, name, kind, value, id=f"{endpoint}-{name}")
    for endpoint, spec in ENDPOINTS.items() for name, kind, value in VALUES
    if _field(spec[4], kind) and (endpoint, name) not in ALLOWED
]


@pytest.fixture(scope="module")
def world(django_db_setup, django_db_blocker):
    """One two-site world for the module; each case runs in a savepoint rolled back."""
    with django_db_blocker.unblock(), transaction.atomic():
        yield build_world()
        transaction.set_rollback(True)


@pytest.fixture
def case(world):
    cache.clear()  # throttling counters
    with transaction.atomic():
        yield world
        transaction.set_rollback(True)


def _counts(model) -> tuple:
    return model.objects.count(), model.history.count(), ChainEntry.objects.count()


def _send(client, method, url, body):
    """The body as JSON, NaN and Infinity raw on the wire as JavaScript writes them
    (json.dumps allow_nan); a change names the version it is based on."""
    if method == "patch":
        version = client.get(url).json().get("version")
        if version is not None:
            body = {**body, "expected_version": version}
    return getattr(client, method)(url, json.dumps(body), content_type="application/json")


@pytest.mark.parametrize(("endpoint", "name", "kind", "value"), CASES)
def test_refused_naming_the_field_and_nothing_written(case, endpoint, name, kind, value):
    method, url, body, model, fields, lists = ENDPOINTS[endpoint]
    place = case.own
    field = _field(fields, kind)
    client = case.client("lead")
    before = _counts(model)
    response = _send(client, method, url(place), body(place, field, _value(fields, kind,
                                                                           value)))
    assert response.status_code == 400, (endpoint, name, response.content[:300])
    errors = response.json()
    assert field in errors, (endpoint, name, errors)
    if field == "results":  # a measured value, inside the first result
        assert "value" in json.dumps(errors), errors
    assert _counts(model) == before, (endpoint, name)
    api_list, page = lists
    assert client.get(api_list).status_code == 200
    browser = Client()
    browser.force_login(case.users["lead"])
    assert browser.get(page).status_code == 200


GOOD = {"bypass": ("reason", "Transmitter swap"), "demand": ("description", "Trip"),
        "deferral": ("reason", "Spare on order"), "test record": ("remarks", "Annual"),
        "sif": ("name", "High high level trip"), "subsystem": ("name", "Level sensing"),
        "component": ("tag", "LT-NEW-1"), "plan": ("name", "Full proof test, annual")}


@pytest.mark.parametrize("endpoint", list(ENDPOINTS))
def test_the_same_bodies_with_a_good_value_are_accepted(case, endpoint):
    """The table's bodies are good apart from the one bad value (else it proves little)."""
    method, url, body, model, _, _ = ENDPOINTS[endpoint]
    before = model.objects.count()
    response = _send(case.client("lead"), method, url(case.own), body(case.own,
                                                                      *GOOD[endpoint]))
    assert response.status_code in (200, 201), (endpoint, response.content[:300])
    assert model.objects.count() == before + (method == "post")


@pytest.mark.parametrize("body", [
    pytest.param("[" * 10_000 + "]" * 10_000, id="10,000 nested lists"),
    pytest.param('{"a":' * 10_000 + "1" + "}" * 10_000, id="10,000 nested objects"),
    pytest.param('{"remarks": ' + "[" * 40 + "]" * 40 + "}", id="40 levels"),
])
@pytest.mark.parametrize("url", ["/api/demands/", "/api/test-records/", "/api/bypasses/"])
def test_deep_nesting_is_a_400(case, url, body):
    before = ChainEntry.objects.count()
    response = case.client("lead").post(url, body, content_type="application/json")
    assert response.status_code == 400, response.content[:300]
    assert "nested more than" in response.json()["detail"]
    assert ChainEntry.objects.count() == before


def test_a_number_too_large_for_a_float_is_named(case):
    """1e400 is valid JSON that reads as infinity."""
    response = case.client("lead").patch(
        f"/api/components/{case.own.components[0].pk}/",
        '{"proof_test_coverage": 1e400, "change_reason": "x", "change_reference": "y"}',
        content_type="application/json")
    assert response.status_code == 400
    assert "finite" in response.json()["proof_test_coverage"][0]


def test_a_body_over_the_request_limit_is_a_413(case, settings):
    settings.REQUEST_MAX_BYTES = 1000
    before = Demand.objects.count()
    response = case.client("lead").post("/api/demands/", {
        "sif": case.own.sif.pk, "occurred_at": _ago(days=1), "successful": True,
        "description": "y" * 2000}, format="json")
    assert response.status_code == 413 and "body" in response.json()
    assert Demand.objects.count() == before


@pytest.mark.parametrize("url", [
    "/field/?q=%00", "/field/?q=LT%00", "/operations/?q=%00", "/sifs/?q=%00",
    "/sifs/list.csv?q=%00", "/inbox/?show=%00", "/field/?page=%00",
])
def test_nul_in_a_page_parameter_is_a_400(case, url):
    browser = Client()
    browser.force_login(case.users["lead"])
    response = browser.get(url)
    assert response.status_code == 400
    name = url.split("?")[1].split("=")[0]
    assert f"{name}: Null characters are not allowed." in response.content.decode()
    assert browser.get(url.split("?")[0]).status_code == 200


@pytest.mark.parametrize(("url", "name"), [
    ("/api/sifs/?q=%00", "q"), ("/api/components/?tag=LT%00", "tag"),
    ("/api/test-records/?client_key=%00", "client_key"), ("/api/sifs/?page=%00", "page"),
    ("/api/test-records/?performed_after=notadate", "performed_after"),
    ("/api/demands/?occurred_before=notadate", "occurred_before"),
    ("/api/test-plans/?next_due_on__gte=notadate", "next_due_on__gte"),
    ("/api/assessments/?computed_after=notadate", "computed_after"),
    ("/api/sifs/?unit=notanumber", "unit"),
])
def test_bad_api_filter_values_are_a_400_naming_the_filter(case, url, name):
    response = case.client("lead").get(url)
    assert response.status_code == 400 and name in response.json(), response.content[:300]


def test_bad_register_list_filters_are_shown_on_the_page(case):
    browser = Client()
    browser.force_login(case.users["lead"])
    response = browser.get("/sifs/?target_sil=notanumber")
    assert response.status_code == 200 and b'class="error"' in response.content
    response = browser.get(f"/audit/sifs/{case.own.sif.pk}/as-of/?date=notadate")
    assert response.status_code == 200 and b"YYYY-MM-DD" in response.content


# --- Evidence-pack periods ----------------------------------------------------------------


def _today():
    return timezone.localdate()


PERIODS = [
    # (what, start, end, field named, words of the message)
    ("year 1", "0001-01-01", None, "period_start", "earliest plausible date"),
    ("year 9999", None, "9999-12-31", "period_end", "years ahead"),
    ("before the service life", "2019-12-31", None, "period_start",
     "first in service on 2020-01-01"),
    ("ends before it starts", "2024-06-01", "2024-05-31", "period_end", "before it starts"),
    ("in the future", None, "+1", "period_end", "future"),
]


def _period(start, end):
    today = _today()
    end = (today + dt.timedelta(days=1)).isoformat() if end == "+1" else end
    return start or "2021-01-01", end or today.isoformat()


@pytest.mark.parametrize(("what", "start", "end", "field", "words"), [
    pytest.param(*p, id=p[0]) for p in PERIODS])
def test_pack_periods_are_bounded_in_the_api_and_the_form(case, what, start, end, field,
                                                          words):
    start, end = _period(start, end)
    before = EvidencePack.objects.count()
    body = {"scope": "sif", "site": case.own.site.pk, "sif": case.own.sif.pk,
            "period_start": start, "period_end": end}
    response = case.client("auditor").post("/api/evidence-packs/", body, format="json")
    assert response.status_code == 400, response.content[:300]
    assert words in response.json()[field][0]
    browser = Client()
    browser.force_login(case.users["auditor"])
    page = browser.post("/audit/packs/", body)
    assert page.status_code == 200
    assert words in " ".join(page.context["form"].errors[field])
    assert EvidencePack.objects.count() == before


def test_pack_period_longest_span(case):
    """A period of MAX_PACK_YEARS years is taken; one day more is not."""
    from register.audit.evidence import MAX_PACK_YEARS, pack_request_errors

    sif = case.own.sif
    start = dt.date(2000, 1, 1)
    SafetyFunction.objects.filter(pk=sif.pk).update(in_service_on=start)
    Component.objects.filter(subsystem__sif=sif).update(in_service_on=start)
    end = start.replace(year=start.year + MAX_PACK_YEARS)
    ok = pack_request_errors(scope="sif", site=case.own.site, sif=sif, period_start=start,
                             period_end=end)
    assert ok == {}
    too_long = pack_request_errors(scope="sif", site=case.own.site, sif=sif,
                                   period_start=start,
                                   period_end=end + dt.timedelta(days=1))
    assert f"at most {MAX_PACK_YEARS} years" in too_long["period_start"]


# --- Text drawn in charts ----------------------------------------------------------------


@pytest.mark.parametrize("tag", ["XV-$\\frac{$", "PT-$^^$", "T$\\nosuchcommand$", "a$_$b"])
def test_a_tag_with_dollar_signs_draws_as_text(case, tag):
    """matplotlib reads $...$ as math; a tag like these once broke every chart of its SIF
    (page and evidence pack)."""
    from register.audit.evidence import chart

    SafetyFunction.objects.filter(pk=case.own.sif.pk).update(tag=tag)
    browser = Client()
    browser.force_login(case.users["lead"])
    for which in ("pfd", "trend"):
        response = browser.get(f"/sifs/{case.own.sif.pk}/chart/{which}.svg")
        assert response.status_code == 200, which
        assert response.content.lstrip().startswith(b"<?xml")
    start = timezone.now() - dt.timedelta(days=200)
    series = chart.series(tag, [start, timezone.now()], [1e-3, 2e-3], 5e-3, start,
                          timezone.now(), [])
    drawing = chart.drawing(series, 500)
    assert any(getattr(s, "text", None) == f"{tag}: PFD(t) over the period"
               for s in drawing.getContents())
    assert chart.png(drawing).startswith(b"\x89PNG")
