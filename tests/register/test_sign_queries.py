"""The number of SQL queries of saving and signing a proof test in one web request.

Queries of the history chain (``register.audit.chain``: its savepoint, head lock, read-back
of the history row, entry insert, head update) and SAVEPOINT/RELEASE statements are left
out of the count: they are counted and batched apart. Everything else a sign POST costs
is bounded here, and must not grow with the number of devices in the test.
"""

from __future__ import annotations

import collections
import os
import re
import traceback
from contextlib import contextmanager
from dataclasses import dataclass, field

import pytest
from django.conf import settings
from django.db import connection
from django.urls import reverse

from register import choices
from register.models import Component, TestPlan, TestRecord
from tests import factories as f

#: The bounds reached for the non-chain queries of one save-and-sign POST before its
#: commit (the page's session, user and plan, the form's steps and devices, the draft, the
#: signing, its notices; the plan's new due date is computed once, after the commit, and
#: the message reads it then: ``test_sign_post_in_all_computes_the_plan_status_once``).
#: A failure found also opens a finding and tells the leads.
MAX_NON_CHAIN = {"all-pass": 23, "failure-found": 39}

CHAIN_TABLES = re.compile(r'"register_chain(entry|head)"')
SAVEPOINT = re.compile(r"^\s*(SAVEPOINT|RELEASE SAVEPOINT|ROLLBACK TO SAVEPOINT)\b", re.I)
HERE = os.path.join(str(settings.BASE_DIR), "register") + os.sep


@dataclass
class Recorded:
    sql: str
    frame: str  # the innermost frame in register/ that issued it
    chain: bool  # issued by the history chain (register/audit/chain.py)


@dataclass
class Recorder:
    queries: list[Recorded] = field(default_factory=list)

    def __call__(self, execute, sql, params, many, context):
        frames = [fr for fr in traceback.extract_stack()[:-1] if HERE in fr.filename
                  and "site-packages" not in fr.filename]
        inner = frames[-1] if frames else None
        chain = any(fr.filename.endswith(os.path.join("audit", "chain.py")) for fr in frames)
        where = (f"{inner.filename.split(HERE, 1)[1]}:{inner.name}" if inner else "?")
        self.queries.append(Recorded(sql, where, chain))
        return execute(sql, params, many, context)

    def is_chain(self, q: Recorded) -> bool:
        return q.chain or bool(CHAIN_TABLES.search(q.sql))

    @property
    def non_chain(self) -> list[Recorded]:
        return [q for q in self.queries
                if not self.is_chain(q) and not SAVEPOINT.match(q.sql)]

    def summary(self) -> str:
        """Counts by kind and by issuing frame (shown when a bound fails)."""
        chain = sum(1 for q in self.queries if self.is_chain(q) and not SAVEPOINT.match(q.sql))
        points = sum(1 for q in self.queries if SAVEPOINT.match(q.sql))
        by_frame = collections.Counter(
            (q.frame, q.sql.split()[0].upper()) for q in self.non_chain)
        lines = [f"all {len(self.queries)}: chain {chain}, savepoint/release {points}, "
                 f"other {len(self.non_chain)}"]
        lines += [f"  {n:3d} {verb:7s} {frame}" for (frame, verb), n in by_frame.most_common()]
        return "\n".join(lines)


@contextmanager
def recorded():
    rec = Recorder()
    with connection.execute_wrapper(rec):
        yield rec


def _plant(voting: str):
    """A SIF whose sensing and final subsystems vote ``voting`` (1oo1: 2 devices, 1oo3: 6),
    with a trip step for the transmitters and a timing step for the valves."""
    site = f.site()
    sif = f.sif(f.unit(site), voting=voting, final_voting=voting)
    plan = TestPlan.objects.get(sif=sif)
    trip, closing = f.trip_and_stroke_steps(plan)
    tech = f.user(site=site, role=choices.Role.TECHNICIAN)
    f.user(site=site, role=choices.Role.VERIFIER)
    f.user(site=site, role=choices.Role.LEAD)
    comps = list(Component.objects.filter(subsystem__sif=sif).select_related("subsystem"))
    return {"sif": sif, "plan": plan, "trip": trip, "closing": closing, "tech": tech,
            "comps": comps}


def _sign_data(p, *, fail_first=False):
    from django.utils import timezone

    when = timezone.localtime() - timezone.timedelta(hours=2)
    data = {"form_token": "c" * 32, "kind": "full", "remarks": "",
            "performed_at": when.strftime("%Y-%m-%dT%H:%M"), "action": "sign",
            "password": f.PASSWORD}
    first = True
    for c in p["comps"]:
        failed = fail_first and first and c.subsystem.role == "sensing"
        data[f"c{c.pk}-as_found"] = "fail" if failed else "pass"
        data[f"c{c.pk}-as_left"] = "pass"
        if c.subsystem.role == "sensing":
            data[f"c{c.pk}-v{p['trip'].pk}_found"] = "83.0" if failed else "80.4"
            data[f"c{c.pk}-v{p['trip'].pk}_left"] = "80.1"
            if failed:
                data[f"c{c.pk}-failure_mode"] = "du"
                data[f"c{c.pk}-failure_description"] = "Trip 3 % high (drift)."
                data[f"c{c.pk}-work_done"] = "Recalibrated."
                first = False
        else:
            data[f"c{c.pk}-v{p['closing'].pk}_found"] = "6.2"
    return data


def _signed_post(client, p, **kw) -> Recorder:
    client.force_login(p["tech"])
    url = reverse("field:start", args=[p["plan"].pk])
    data = _sign_data(p, **kw)
    with recorded() as rec:
        resp = client.post(url, data)
    assert resp.status_code == 302, resp.content.decode()[:2000]
    record = TestRecord.objects.get(sif=p["sif"])
    assert record.status == choices.RecordStatus.SIGNED
    assert resp.url == reverse("field:record_detail", args=[record.pk])
    assert record.results.count() == len(p["comps"])
    return rec


@pytest.mark.django_db
@pytest.mark.parametrize("case", MAX_NON_CHAIN)
def test_sign_post_queries_are_bounded_and_do_not_grow_with_devices(client, case):
    fail_first = case == "failure-found"
    small = _signed_post(client, _plant("1oo1"), fail_first=fail_first)
    client.logout()
    large = _signed_post(client, _plant("1oo3"), fail_first=fail_first)
    print("\n2 devices:", small.summary(), "\n6 devices:", large.summary(), sep="\n")
    assert len(small.non_chain) <= MAX_NON_CHAIN[case], small.summary()
    assert len(large.non_chain) == len(small.non_chain), (small.summary(), large.summary())


@pytest.mark.django_db
def test_signed_post_keeps_every_history_row_chained(client):
    """The results and values are inserted at once; each history row still joins the
    chain, and the chain verifies."""
    from register.audit.chain import verify_chain
    from register.models import ChainEntry, ComponentResult, MeasuredValue

    p = _plant("1oo3")
    _signed_post(client, p)
    record = TestRecord.objects.get(sif=p["sif"])
    for model, rows in ((ComponentResult, ComponentResult.history.filter(record_id=record.pk)),
                        (MeasuredValue, MeasuredValue.history.filter(
                            result__record_id=record.pk))):
        ids = set(rows.values_list("history_id", flat=True))
        assert len(ids) == model.objects.filter(
            **({"record": record} if model is ComponentResult else {"result__record": record})
        ).count() > 0
        chained = set(ChainEntry.objects.filter(model_label=model.history.model._meta.label,
                                                history_id__in=ids)
                      .values_list("history_id", flat=True))
        assert chained == ids
    assert set(MeasuredValue.objects.filter(result__record=record).values_list(
        "within_criterion", flat=True)) == {True}  # judged by the rule on insert
    assert verify_chain().ok


@pytest.mark.django_db
def test_a_device_given_twice_is_refused_and_nothing_is_written():
    from django.core.exceptions import ValidationError
    from django.utils import timezone

    from register import services

    p = _plant("1oo1")
    lt = p["comps"][0]
    results = [services.ResultInput(component=lt, as_found="pass", as_left="pass"),
               services.ResultInput(component=lt, as_found="pass", as_left="pass")]
    with pytest.raises(ValidationError) as raised:
        services.save_draft(user=p["tech"], sif=p["sif"], plan=p["plan"], kind="full",
                            performed_at=timezone.now() - timezone.timedelta(hours=1),
                            results=results)
    assert list(raised.value.message_dict) == ["results[1].__all__"]
    assert raised.value.message_dict["results[1].__all__"][0].startswith(f"{lt.tag}: ")
    assert not TestRecord.objects.filter(sif=p["sif"]).exists()


@pytest.mark.django_db
def test_bulk_api_queries_do_not_grow_with_devices():
    """The API's bulk path shares the services: its non-chain queries do not grow with
    the devices of an item either (devices are read without their subsystems there)."""
    from django.utils import timezone
    from rest_framework.test import APIClient

    counts = []
    for voting in ("1oo1", "1oo3"):
        p = _plant(voting)
        api = APIClient()
        api.force_authenticate(p["tech"])
        item = {"client_key": f"wo-{voting}", "sif": p["sif"].pk, "plan": p["plan"].pk,
                "kind": "full",
                "performed_at": (timezone.now() - timezone.timedelta(hours=3)).isoformat(),
                "results": [{"component": c.pk, "as_found": "pass", "as_left": "pass"}
                            for c in p["comps"]]}
        with recorded() as rec:
            r = api.post("/api/test-results/bulk/", {"password": f.PASSWORD,
                                                     "results": [item]}, format="json")
        assert r.status_code == 201, r.content[:1000]
        assert TestRecord.objects.get(sif=p["sif"]).status == choices.RecordStatus.SIGNED
        counts.append(rec)
    print("\nbulk, 2 devices:", counts[0].summary(), "\nbulk, 6 devices:", counts[1].summary(),
          sep="\n")
    assert len(counts[1].non_chain) == len(counts[0].non_chain), (
        counts[0].summary(), counts[1].summary())


@pytest.mark.django_db
def test_history_rows_of_inserted_results_read_as_saved_ones():
    """A result's history row from the one-statement insert holds what a save's would:
    the actor, no reason (NULL), the moment given with ``at``."""
    import datetime as dt

    from django.utils import timezone

    from register import services
    from register.models import ComponentResult

    p = _plant("1oo1")
    at = timezone.now() - dt.timedelta(days=3)
    results = [services.ResultInput(component=c, as_found="pass", as_left="pass")
               for c in p["comps"]]
    record = services.save_draft(user=p["tech"], sif=p["sif"], plan=p["plan"], kind="full",
                                 performed_at=at, results=results, at=at)
    rows = ComponentResult.history.filter(record_id=record.pk)
    assert rows.count() == len(p["comps"])
    for row in rows:
        assert (row.history_user_id, row.history_change_reason, row.history_type,
                row.history_date) == (p["tech"].pk, None, "+", at)


#: The bound reached for everything one save-and-sign POST issues, commit included: its
#: own queries, savepoints, the chain's entries appended at the commit and the refresh of
#: the plan after it (the recompute and the e-mails run in a worker and are left out).
MAX_IN_ALL = 37


@dataclass
class Everything:
    """Every statement of a request, by who issued it."""

    kinds: collections.Counter = field(default_factory=collections.Counter)
    statuses: int = 0  # queries computing plan statuses from the records

    def __call__(self, execute, sql, params, many, context):
        names = [fr.filename for fr in traceback.extract_stack()[:-1]]
        if any(os.sep + "celery" + os.sep in n for n in names):
            kind = "worker"  # an eager task: a worker's work in production
        elif any(n.endswith(os.path.join("audit", "chain.py")) for n in names) \
                or CHAIN_TABLES.search(sql):
            kind = "chain"
        elif SAVEPOINT.match(sql):
            kind = "savepoint"
        else:
            kind = "request"
            if "WITH pl AS" in sql or (any(
                    n.endswith(os.path.join("schedule", "due.py")) for n in names
            ) and "register_componentresult" in sql):
                self.statuses += 1
        self.kinds[kind] += 1
        return execute(sql, params, many, context)

    @property
    def in_all(self) -> int:
        return sum(n for k, n in self.kinds.items() if k != "worker")


@pytest.mark.django_db(transaction=True)
def test_sign_post_in_all_computes_the_plan_status_once(client):
    """Committed for real: the sign POST computes the plan's status once (the refresh
    after the commit; the message reads what it wrote) and stays within ``MAX_IN_ALL``
    statements in all, chain and savepoints included. The message names the new due
    date."""
    from django.contrib.messages import get_messages

    p = _plant("1oo1")
    client.force_login(p["tech"])
    everything = Everything()
    with connection.execute_wrapper(everything):
        resp = client.post(reverse("field:start", args=[p["plan"].pk]), _sign_data(p))
    assert resp.status_code == 302, resp.content.decode()[:2000]
    print("\nin all:", everything.in_all, dict(everything.kinds))
    record = TestRecord.objects.get(sif=p["sif"])
    assert record.status == choices.RecordStatus.SIGNED
    plan = TestPlan.objects.get(pk=p["plan"].pk)
    assert plan.next_due_on is not None
    from register.days import today
    from register.schedule.due import compute_statuses

    assert plan.next_due_on == compute_statuses(
        TestPlan.objects.filter(pk=plan.pk), today(p["sif"].unit.site))[plan.pk].due_on
    text = " ".join(str(m) for m in get_messages(resp.wsgi_request))
    assert f"The next test of this plan is due {plan.next_due_on:%Y-%m-%d}" in text, text
    assert everything.statuses == 1, dict(everything.kinds)
    assert everything.kinds["chain"] > 0  # the chain's entries were appended at the commit
    assert everything.in_all <= MAX_IN_ALL, dict(everything.kinds)
