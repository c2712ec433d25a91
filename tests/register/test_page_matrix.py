"""Every HTML page x every role x own / other site -> the exact status code, and a test
that every route of the project (pages, exports, API) is covered by a permission matrix.

Roles as in the API matrix (tests/api): lead, technician, verifier and auditor at the own
site, the outsider is the lead of the other site, anonymous is signed out (redirected to
sign in). Objects at a site where the user holds no role answer 404.
"""

from __future__ import annotations

import os

import pytest
from django.core.cache import cache
from django.db import transaction
from django.test import Client
from django.urls import URLPattern, URLResolver, get_resolver, resolve

from register.models import ChainEntry
from tests.api import ROLES, build_world

pytestmark = pytest.mark.django_db

LOGIN = 302  # anonymous: to the sign-in page

# Expected codes in the order of ROLES: lead, technician, verifier, auditor, outsider, anon.
ALL = ((200, 200, 200, 200, 200, LOGIN),) * 2
SITE_READ = ((200, 200, 200, 200, 404, LOGIN), (404, 404, 404, 404, 200, LOGIN))
LEAD_ONLY = ((200, 403, 403, 403, 200, LOGIN),) * 2
LEAD_PAGE = ((200, 403, 403, 403, 404, LOGIN), (404, 404, 404, 404, 200, LOGIN))
EXPORTERS = ((200, 403, 200, 200, 200, LOGIN),) * 2
# the register list's export: the export right somewhere (technicians have none)
EXPORT_LIST = EXPORTERS
CHAIN = ((200, 403, 403, 200, 200, LOGIN),) * 2
# a pack or an as-of view of another site is refused (403), not hidden
EXPORT_PAGE = ((200, 403, 200, 200, 403, LOGIN), (403, 403, 403, 403, 200, LOGIN))
AS_OF_PAGE = ((200, 200, 200, 200, 403, LOGIN), (403, 403, 403, 403, 200, LOGIN))
# a draft is edited by its performer only (the technician here; the outsider at the other)
DRAFT_PAGE = ((403, 200, 403, 403, 404, LOGIN), (404, 404, 404, 404, 200, LOGIN))
RECORDERS = ((200, 200, 302, 403, 200, LOGIN),) * 2
VERIFIERS = ((200, 403, 200, 403, 200, LOGIN),) * 2
RECORD_PAGE = ((200, 200, 403, 403, 404, LOGIN), (404, 404, 404, 404, 200, LOGIN))
# after signing in: on to each person's start page (tests/register/test_role_pages.py)
ONWARD = ((302,) * 6,) * 2

# Forms that only accept POST, posted empty (password missing): refused or shown again
# with errors (200/400), never carried out: the chain does not move.
POSTS = [
    ("record verify", lambda p, w: f"/field/records/{p.signed.pk}/verify/"),
    ("record correct", lambda p, w: f"/field/records/{p.signed.pk}/correct/"),
    ("bypass authorise", lambda p, w: f"/operations/bypasses/{p.bypass.pk}/authorise/"),
    ("bypass close", lambda p, w: f"/operations/bypasses/{p.bypass.pk}/close/"),
    ("finding update", lambda p, w: f"/operations/findings/{p.finding.pk}/update/"),
    ("finding close", lambda p, w: f"/operations/findings/{p.finding.pk}/close/"),
]

# Discarding a draft (POST): only its performer may; for everyone else, nothing changes.
DISCARD = {"lead": 403, "technician": None, "verifier": 403, "auditor": 403,
           "outsider": 404, "anonymous": LOGIN}

# (name, url(place, world), expected)
PAGES = [
    ("home", lambda p, w: "/", ALL),
    ("landing", lambda p, w: "/start/", ONWARD),
    ("sif list", lambda p, w: "/sifs/", ALL),
    ("sif export csv", lambda p, w: "/sifs/export.csv", EXPORT_LIST),
    ("sif list export xlsx", lambda p, w: "/sifs/list.xlsx", EXPORT_LIST),
    ("sif detail", lambda p, w: f"/sifs/{p.sif.pk}/", SITE_READ),
    ("sif chart", lambda p, w: f"/sifs/{p.sif.pk}/chart/pfd.svg", SITE_READ),
    ("test detail", lambda p, w: f"/tests/{p.signed.pk}/", SITE_READ),
    ("edit design", lambda p, w: f"/design/plan/{p.plan.pk}/edit/", LEAD_PAGE),
    ("import", lambda p, w: "/import/", LEAD_ONLY),
    ("worklist", lambda p, w: "/field/", RECORDERS),
    ("start test", lambda p, w: f"/field/plans/{p.plan.pk}/start/", RECORD_PAGE),
    ("record detail", lambda p, w: f"/field/records/{p.signed.pk}/", SITE_READ),
    ("record edit", lambda p, w: f"/field/records/{p.draft.pk}/edit/", DRAFT_PAGE),
    ("judge value", lambda p, w: f"/field/plans/{p.plan.pk}/judge/{p.components[0].pk}/",
     RECORD_PAGE),
    ("verify queue", lambda p, w: "/field/verify/", VERIFIERS),
    ("deferral list", lambda p, w: "/deferrals/", ALL),
    ("inbox", lambda p, w: "/inbox/", ALL),
    ("deferral request", lambda p, w: f"/deferrals/plans/{p.plan.pk}/new/", RECORD_PAGE),
    ("deferral decide", lambda p, w: f"/deferrals/{p.deferral.pk}/decide/", LEAD_PAGE),
    ("chain", lambda p, w: "/audit/chain/", CHAIN),
    ("packs", lambda p, w: "/audit/packs/", EXPORTERS),
    ("pack detail", lambda p, w: f"/audit/packs/{p.pack.pk}/", EXPORT_PAGE),
    ("pack status", lambda p, w: f"/audit/packs/{p.pack.pk}/status.json", EXPORT_PAGE),
    ("as-of", lambda p, w: f"/audit/sifs/{p.sif.pk}/as-of/?date=2026-01-01", AS_OF_PAGE),
    ("operations", lambda p, w: "/operations/?q=SIF", ALL),
    ("findings", lambda p, w: "/operations/findings/?show=all", ALL),
    ("bypass new", lambda p, w: f"/operations/sifs/{p.sif.pk}/bypass/", RECORD_PAGE),
    ("demand new", lambda p, w: f"/operations/sifs/{p.sif.pk}/demand/", RECORD_PAGE),
    ("bypass detail", lambda p, w: f"/operations/bypasses/{p.bypass.pk}/", SITE_READ),
    ("finding detail", lambda p, w: f"/operations/findings/{p.finding.pk}/", SITE_READ),
]

CASES = [
    pytest.param(row, role, where, row[2][where == "other"][ROLES.index(role)],
                 id=f"{row[0]}-{role}-{where}")
    for row in PAGES for role in ROLES for where in ("own", "other")
    if not (row[2][0] == row[2][1] and where == "other")
]


@pytest.fixture(scope="module")
def world(django_db_setup, django_db_blocker):
    with django_db_blocker.unblock(), transaction.atomic():
        yield _with_findings(build_world())
        transaction.set_rollback(True)


def _with_findings(world):
    """Each place also gets a finding: a device that failed to act on a demand."""
    import datetime as dt

    from django.utils import timezone

    from register import services

    for place in (world.own, world.other):
        demand = services.record_demand(
            user=place.performer, sif=place.sif, successful=False,
            occurred_at=timezone.now() - dt.timedelta(days=3),
            description="Valve stayed open", failed_components=[place.components[-1]])
        place.finding = demand.findings.get()
    return world


def _client(world, role):
    c = Client()
    if role != "anonymous":
        c.force_login(world.users[role])
    return c


@pytest.mark.parametrize(("row", "role", "where", "expected"), CASES)
def test_page_status(world, row, role, where, expected):
    cache.clear()
    place = world.own if where == "own" else world.other
    before = ChainEntry.objects.count()
    response = _client(world, role).get(row[1](place, world))
    if os.environ.get("PAGE_MATRIX_DISCOVER"):
        print("DISCOVER", row[0], role, where, response.status_code)
        return
    assert response.status_code == expected, (row[0], role, where)
    assert ChainEntry.objects.count() == before  # a page read writes nothing


@pytest.mark.parametrize("row", POSTS, ids=[r[0] for r in POSTS])
@pytest.mark.parametrize("role", ROLES)
@pytest.mark.parametrize("where", ["own", "other"])
def test_empty_post_writes_nothing(world, row, role, where):
    cache.clear()
    place = world.own if where == "own" else world.other
    before = ChainEntry.objects.count()
    response = _client(world, role).post(row[1](place, world), {})
    assert response.status_code in (200, 302, 400, 403, 404), response.status_code
    if role == "anonymous":
        assert response.status_code == LOGIN
    mine = (where == "own") != (role == "outsider")
    if not mine and role != "anonymous":
        assert response.status_code == 404  # another site's record does not exist for them
    assert ChainEntry.objects.count() == before


@pytest.mark.parametrize("role", [r for r in ROLES if DISCARD[r] is not None])
def test_only_the_performer_discards_a_draft(world, role):
    cache.clear()
    from register.models import TestRecord

    before = ChainEntry.objects.count()
    response = _client(world, role).post(f"/field/records/{world.own.draft.pk}/discard/")
    assert response.status_code == DISCARD[role], role
    assert TestRecord.objects.filter(pk=world.own.draft.pk).exists()
    assert ChainEntry.objects.count() == before


def test_chain_page_shows_only_the_users_sites(world):
    lead = _client(world, "lead").get("/audit/chain/").context["recent"]
    outsider = _client(world, "outsider").get("/audit/chain/").context["recent"]
    assert lead and outsider
    assert not {e.seq for e in lead} & {e.seq for e in outsider}


def _route_names(resolver=None, ns=""):
    resolver = resolver or get_resolver()
    for p in resolver.url_patterns:
        if isinstance(p, URLResolver):
            inner = f"{ns}:{p.namespace}" if ns and p.namespace else (p.namespace or ns)
            yield from _route_names(p, inner)
        elif isinstance(p, URLPattern) and p.name:
            yield f"{ns}:{p.name}" if ns else p.name


def test_every_route_is_in_a_permission_matrix():
    from tests.api.test_permission_matrix import TABLE

    class _P:  # enough of a place to build each URL
        def __getattr__(self, name):
            return _Obj()

    class _Obj:
        pk = 1
        site = unit = sif = None

        def __getattr__(self, name):
            return _Obj()

        def __getitem__(self, i):
            return _Obj()

        def __format__(self, spec):
            return "1"

    covered = set()
    for _name, _m, url, *_ in TABLE:
        covered.add(resolve(url(_P(), _P(), "lead")).view_name)
    for _name, url, _exp in PAGES:
        covered.add(resolve(url(_P(), _P()).split("?")[0]).view_name)
    for _name, url in POSTS:
        covered.add(resolve(url(_P(), _P())).view_name)
    covered.add(resolve("/field/records/1/discard/").view_name)  # DISCARD above
    # covered elsewhere: sign-in and password pages (tests/register/test_login.py), the
    # admin (read-only, tests/register/test_admin_read_only.py), the API's schema, docs,
    # token and bulk endpoints (tests/api/test_api.py), downloads that need a built file
    # (tests/register/test_evidence_pack.py, test_field_views.py)
    elsewhere = {"login", "logout", "password_change", "password_change_done",
                 "password_reset", "password_reset_done", "password_reset_confirm",
                 "password_reset_complete", "admin_login", "api:token", "api:bulk-results",
                 "api:schema", "api:docs", "api:docs-assets", "api:api-root",
                 "audit:pack_download", "field:attachment", "api:evidence-pack-download",
                 "inbox:read", "inbox:read_all",  # own notifications: tests/register/test_inbox.py
                 "audit:chain_verify_full",  # tests/register/test_chain_checkpoint.py
                 # the owner and the site's leads only: tests/register/test_import_job.py
                 "register:import_job", "register:import_job_status",
                 # the person who asked only: tests/register/test_export_jobs.py
                 "register:export_job", "register:export_job_status",
                 "register:export_job_download"}
    missing = sorted(n for n in set(_route_names()) if not n.startswith("admin:")
                     and n not in covered and n not in elsewhere)
    assert not missing, f"routes without a permission matrix row: {missing}"
