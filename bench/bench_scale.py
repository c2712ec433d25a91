"""Benchmark: the project against the floor on a scale plant, interleaved in one run.

The plant and the floors' SQL live here; the measuring is bench/bench_all.py's (this
script runs its in-process rows: recompute, one SIF after a signed test, scan, pages).

For each step the project's time and query count stand beside the floor: a bare psycopg
read of the same rows (no ORM, no engine, no templates), and their ratio. Run by hand
against PostgreSQL; the database is its own (created if missing, kept for the next run):
    DATABASE_URL=postgres://postgres@127.0.0.1:5432/sif_bench_scale \\
        .venv/bin/python bench/bench_scale.py --sifs 1000 --history-days 365
``--history-days`` adds that many older daily assessments to every SIF (a year of
nightly runs) so the overview and the SIF page are measured against a long history.
"""

import argparse
import os
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))
os.environ.setdefault("DJANGO_SETTINGS_MODULE", "config.settings.base")

INPUT_ROWS = [
    "SELECT s.* FROM register_safetyfunction s JOIN register_plantunit u ON u.id = s.unit_id "
    "JOIN register_site t ON t.id = u.site_id WHERE {sifs}",
    "SELECT b.* FROM register_subsystem b JOIN register_safetyfunction s ON s.id = b.sif_id "
    "JOIN register_plantunit u ON u.id = s.unit_id WHERE {sifs}",
    "SELECT c.* FROM register_component c JOIN register_subsystem b ON b.id = c.subsystem_id "
    "JOIN register_safetyfunction s ON s.id = b.sif_id "
    "JOIN register_plantunit u ON u.id = s.unit_id WHERE {sifs}",
    "SELECT p.* FROM register_testplan p JOIN register_safetyfunction s ON s.id = p.sif_id "
    "JOIN register_plantunit u ON u.id = s.unit_id WHERE {sifs}",
    "SELECT r.component_id, t.performed_at, t.kind, r.failure_mode, r.as_found, r.record_id "
    "FROM register_componentresult r JOIN register_testrecord t ON t.id = r.record_id "
    "JOIN register_safetyfunction s ON s.id = t.sif_id "
    "JOIN register_plantunit u ON u.id = s.unit_id WHERE {sifs} ORDER BY t.performed_at",
    "SELECT x.* FROM register_bypass x JOIN register_safetyfunction s ON s.id = x.sif_id "
    "JOIN register_plantunit u ON u.id = s.unit_id WHERE {sifs}",
    "SELECT x.* FROM register_demand x JOIN register_safetyfunction s ON s.id = x.sif_id "
    "JOIN register_plantunit u ON u.id = s.unit_id WHERE {sifs}",
]
LATEST = ("SELECT DISTINCT ON (a.sif_id) a.sif_id, a.meets_target, a.flags, a.detail "
          "FROM calcs_assessment a JOIN register_safetyfunction s ON s.id = a.sif_id "
          "JOIN register_plantunit u ON u.id = s.unit_id WHERE {sifs} "
          "ORDER BY a.sif_id, a.computed_at DESC, a.id DESC")
#: The same rows read through the flag on the newest (its partial index, one row per SIF):
#: no sort over the history, as the pages read them.
LATEST_FLAGGED = ("SELECT a.sif_id, a.meets_target, a.flags, a.detail "
                  "FROM calcs_assessment a JOIN register_safetyfunction s ON s.id = a.sif_id "
                  "JOIN register_plantunit u ON u.id = s.unit_id WHERE {sifs} AND a.latest "
                  "ORDER BY s.tag")
#: What the overview reads of each SIF's newest assessment: its verdict, flags and rates
#: (not the whole detail, whose parsing alone is most of a read of it).
OVERVIEW_LATEST = LATEST_FLAGGED.replace("a.detail ", "a.detail -> 'rates' AS rates ")
#: The scan's floor: every device's last credit event per kind of test (what a plan's due
#: date is computed from), one grouped read.
LAST_CREDIT = ("SELECT r.component_id, t.kind, max(t.performed_at) FROM "
               "register_componentresult r JOIN register_testrecord t ON t.id = r.record_id "
               "JOIN register_safetyfunction s ON s.id = t.sif_id "
               "JOIN register_plantunit u ON u.id = s.unit_id "
               "WHERE {sifs} AND t.status <> 'draft' GROUP BY 1, 2")
PLANS = ("SELECT p.id, p.sif_id, p.next_due_on, p.due_soon_on, p.escalated_on "
         "FROM register_testplan p JOIN register_safetyfunction s ON s.id = p.sif_id "
         "JOIN register_plantunit u ON u.id = s.unit_id WHERE {sifs}")


def prepare_plant(sifs: int, history_days: int) -> dict:
    """Build (or reuse) the scale plant ``scale<sifs>`` in the database of DATABASE_URL
    (Django set up), with ``history_days`` older assessments per SIF; returns the site, its
    SIFs, the first SIF, a lead and the technician, and the floor's newest-assessment SQL."""
    from django.conf import settings
    from django.contrib.auth import get_user_model
    from django.core.management import call_command
    from django.db import connection

    from calcs.adapter import recompute_many
    from register import choices
    from register.models import Membership, SafetyFunction, Site

    args = argparse.Namespace(sifs=sifs, history_days=history_days)
    settings.ALLOWED_HOSTS = ["*"]
    call_command("migrate", verbosity=0)
    code = f"scale{args.sifs}"
    if not Site.objects.filter(code=code).exists():
        t = time.perf_counter()
        call_command("make_scale_plant", sifs=args.sifs, code=code)
        with connection.cursor() as cur:  # statistics for the planner, as autovacuum would
            cur.execute("ANALYZE")
        print(f"generated in {time.perf_counter() - t:.0f} s")
    site = Site.objects.get(code=code)
    qs = SafetyFunction.objects.filter(unit__site=site)
    sif = qs.order_by("pk").first()
    User = get_user_model()
    lead, _ = User.objects.get_or_create(username=f"{code}-lead")
    Membership.objects.get_or_create(user=lead, site=site, defaults={"role": choices.Role.LEAD})
    tech = User.objects.get(username=f"{code}-tech")
    if not sif.assessments.exists():
        recompute_many(qs, trigger="bench")
    with connection.cursor() as cur:
        cur.execute("SELECT count(*) FROM calcs_assessment a WHERE a.sif_id = %s", [sif.pk])
        have = cur.fetchone()[0]
    if args.history_days and have < args.history_days:
        age_plant(site, args.history_days)
    with connection.cursor() as cur:  # the newest per SIF: by its flag where there is one
        cur.execute("SELECT 1 FROM information_schema.columns WHERE "
                    "table_name = 'calcs_assessment' AND column_name = 'latest'")
        latest = LATEST_FLAGGED if cur.fetchall() else LATEST
    return {"site": site, "qs": qs, "sif": sif, "lead": lead, "tech": tech,
            "latest": latest,
            "overview_latest": OVERVIEW_LATEST if latest is LATEST_FLAGGED else latest}


def age_plant(site, days: int) -> None:
    """Add ``days`` daily assessments to every SIF of ``site``, older than any it has (a
    copy of its newest, a day apart): the stored history of that many nightly runs, each
    of which found the inputs changed (the worst case: an unchanged SIF stores only a
    weekly heartbeat)."""
    from django.db import connection

    with connection.cursor() as cur:
        cur.execute("SELECT column_name FROM information_schema.columns WHERE "
                    "table_name = 'calcs_assessment' AND column_name = 'latest'")
        flag = bool(cur.fetchall())
        t = time.perf_counter()
        cur.execute(
            "WITH span AS (SELECT a.sif_id, max(a.computed_at) - min(a.computed_at) AS back "
            "FROM calcs_assessment a JOIN register_safetyfunction s ON s.id = a.sif_id "
            "JOIN register_plantunit u ON u.id = s.unit_id WHERE u.site_id = %s "
            "GROUP BY a.sif_id), "
            "newest AS (SELECT DISTINCT ON (a.sif_id) a.* FROM calcs_assessment a "
            "JOIN span ON span.sif_id = a.sif_id ORDER BY a.sif_id, a.computed_at DESC, "
            "a.id DESC) "
            "INSERT INTO calcs_assessment (sif_id, computed_at, as_of, inputs_digest, "
            "trigger, target_pfd_avg, design_pfd_avg, achieved_pfd_avg, verdict, "
            "meets_target, rate_basis, flags, detail, error"
            + (", latest" if flag else "") + ") "
            "SELECT a.sif_id, a.computed_at - span.back - g * interval '1 day', "
            "a.as_of - span.back - g * interval '1 day', a.inputs_digest, 'history', "
            "a.target_pfd_avg, a.design_pfd_avg, a.achieved_pfd_avg, a.verdict, "
            "a.meets_target, a.rate_basis, a.flags, a.detail, ''"
            + (", false" if flag else "") + " "
            "FROM newest a JOIN span ON span.sif_id = a.sif_id, generate_series(1, %s) g",
            [site.pk, days])
        cur.execute("ANALYZE calcs_assessment")
    print(f"history: {days} older assessments per SIF added in "
          f"{time.perf_counter() - t:.0f} s")


def bare_connection():
    """A bare psycopg 3 connection to the database Django uses (the floor's)."""
    import psycopg
    from django.conf import settings

    dsn = settings.DATABASES["default"]
    return psycopg.connect(host=dsn["HOST"] or "127.0.0.1", port=dsn["PORT"] or 5432,
                           user=dsn["USER"], password=dsn["PASSWORD"], dbname=dsn["NAME"])


def main():
    """The in-process rows of bench/bench_all.py (its flags pass through)."""
    from bench.bench_all import main as bench_all

    return bench_all(["--only", "recompute", "after-sign", "scan", "overview", "list",
                      "sif-page", "trend", "worklist", *sys.argv[1:]])


if __name__ == "__main__":
    raise SystemExit(main())
