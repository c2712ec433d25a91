"""Benchmark: the project against the floor on a scale plant, interleaved in one run.

For each step the project's time and query count stand beside the floor: a bare psycopg
read of the same rows (no ORM, no engine, no templates), and their ratio. Run by hand
against PostgreSQL; the database is its own (created if missing, kept for the next run):
    DATABASE_URL=postgres://postgres@127.0.0.1:5432/sif_bench_scale \\
        .venv/bin/python bench/bench_scale.py --sifs 1000 --history-days 365
``--history-days`` adds that many older daily assessments to every SIF (a year of
nightly runs) so the overview and the SIF page are measured against a long history.
"""

import argparse
import datetime as dt
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
PLANS = ("SELECT p.id, p.sif_id, p.next_due_on, p.due_soon_on, p.escalated_on "
         "FROM register_testplan p JOIN register_safetyfunction s ON s.id = p.sif_id "
         "JOIN register_plantunit u ON u.id = s.unit_id WHERE {sifs}")


def main():
    parser = argparse.ArgumentParser()
    parser.add_argument("--sifs", type=int, default=5000)
    parser.add_argument("--history-days", type=int, default=365)
    parser.add_argument("--repeat", type=int, default=3)
    args = parser.parse_args()
    import django

    django.setup()
    import psycopg
    from django.conf import settings
    from django.contrib.auth import get_user_model
    from django.core.management import call_command
    from django.db import connection
    from django.test import Client
    from django.test.utils import CaptureQueriesContext
    from django.utils import timezone

    from calcs.adapter import recompute_many
    from register import choices, services
    from register.models import Component, Membership, SafetyFunction, Site
    from register.schedule import followup
    from register.schedule.scan import scan

    settings.ALLOWED_HOSTS = ["*"]
    call_command("migrate", verbosity=0)
    code = f"scale{args.sifs}"
    if not Site.objects.filter(code=code).exists():
        t = time.perf_counter()
        call_command("make_scale_plant", sifs=args.sifs, code=code)
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
            cur.execute("SELECT column_name FROM information_schema.columns WHERE "
                        "table_name = 'calcs_assessment' AND column_name = 'latest'")
            flag = bool(cur.fetchall())
            t = time.perf_counter()
            cur.execute(
                "INSERT INTO calcs_assessment (sif_id, computed_at, as_of, inputs_digest, "
                "trigger, target_pfd_avg, design_pfd_avg, achieved_pfd_avg, verdict, "
                "meets_target, rate_basis, flags, detail, error"
                + (", latest" if flag else "") + ") "
                "SELECT a.sif_id, a.computed_at - g * interval '1 day', "
                "a.as_of - g * interval '1 day', a.inputs_digest, 'history', "
                "a.target_pfd_avg, a.design_pfd_avg, a.achieved_pfd_avg, a.verdict, "
                "a.meets_target, a.rate_basis, a.flags, a.detail, ''"
                + (", false" if flag else "") + " "
                "FROM calcs_assessment a JOIN register_safetyfunction s ON s.id = a.sif_id "
                "JOIN register_plantunit u ON u.id = s.unit_id, generate_series(1, %s) g "
                "WHERE u.site_id = %s", [args.history_days, site.pk])
            cur.execute("ANALYZE calcs_assessment")
            print(f"history: {args.history_days} older assessments per SIF added in "
                  f"{time.perf_counter() - t:.0f} s")
    dsn = settings.DATABASES["default"]
    bare = psycopg.connect(host=dsn["HOST"] or "127.0.0.1", port=dsn["PORT"] or 5432,
                           user=dsn["USER"], password=dsn["PASSWORD"], dbname=dsn["NAME"])
    with connection.cursor() as cur:  # the newest per SIF: by its flag where there is one
        cur.execute("SELECT 1 FROM information_schema.columns WHERE "
                    "table_name = 'calcs_assessment' AND column_name = 'latest'")
        latest = (LATEST.replace("{sifs}", "{sifs} AND a.latest") if cur.fetchall()
                  else LATEST)
    plant = f"u.site_id = {site.pk}"
    one = f"s.id = {sif.pk}"

    def floor(*sqls, where):
        with bare.cursor() as cur:
            for sql in sqls:
                cur.execute(sql.format(sifs=where))
                cur.fetchall()
        return len(sqls)

    lead_client, tech_client = Client(), Client()
    lead_client.force_login(lead)
    tech_client.force_login(tech)

    def page(client, url):
        def run():
            resp = client.get(url)
            assert resp.status_code == 200, (url, resp.status_code)
        return run

    def after_signed_test():
        with followup.suspended():
            rec = services.save_draft(
                user=tech, sif=sif, kind=choices.TestKind.PARTIAL,
                performed_at=timezone.now() - dt.timedelta(minutes=5),
                results=[services.ResultInput(component=c, as_found="pass", as_left="pass")
                         for c in Component.objects.filter(subsystem__sif=sif)])
            services.sign_record(rec, tech, None, check_password=False)

    as_of = [timezone.now()]

    def recompute_all():
        as_of[0] += dt.timedelta(days=1)  # a new night: every SIF is evaluated again
        recompute_many(qs, trigger="bench", as_of=as_of[0])

    steps = [
        ("recompute all", recompute_all, None, lambda: floor(*INPUT_ROWS, where=plant)),
        ("one SIF after a signed test",
         lambda: recompute_many(SafetyFunction.objects.filter(pk=sif.pk), trigger="bench"),
         after_signed_test, lambda: floor(*INPUT_ROWS, where=one)),
        ("due-date scan", lambda: scan(timezone.localdate(), notify=False), None,
         lambda: floor(PLANS, where=plant)),
        ("plant overview", page(lead_client, "/"), None,
         lambda: floor(latest, PLANS, where=plant)),
        ("filtered register list", page(lead_client, "/sifs/?target_sil=2"), None,
         lambda: floor(latest + " LIMIT 50", where=plant + " AND s.target_sil = 2")),
        ("SIF page, long history", page(lead_client, f"/sifs/{sif.pk}/"), None,
         lambda: floor(*INPUT_ROWS, latest, where=one)),
        ("trend chart, long history", page(lead_client, f"/sifs/{sif.pk}/chart/trend.svg"),
         None, lambda: floor("SELECT computed_at, achieved_pfd_avg, design_pfd_avg FROM "
                             "calcs_assessment a JOIN register_safetyfunction s ON "
                             "s.id = a.sif_id WHERE {sifs} ORDER BY computed_at DESC "
                             "LIMIT 500", where=one)),
        ("technician worklist", page(tech_client, "/field/"), None,
         lambda: floor(PLANS, where=plant)),
    ]
    best: dict[str, list] = {}
    for _ in range(args.repeat):
        for name, run, prepare, bare_read in steps:
            if prepare:
                prepare()
            with CaptureQueriesContext(connection) as q:
                t = time.perf_counter()
                run()
                took = time.perf_counter() - t
            t = time.perf_counter()
            n_floor = bare_read()
            fl = time.perf_counter() - t
            prev = best.get(name)
            if prev is None or took < prev[0]:
                best[name] = [took, len(q), min(fl, prev[2]) if prev else fl, n_floor]
            else:
                prev[2] = min(prev[2], fl)
    print(f"{'step':30} {'project':>10} {'queries':>8} {'floor':>10} {'queries':>8} {'ratio':>7}")
    for name, (took, n, fl, nf) in best.items():
        print(f"{name:30} {took * 1000:8.0f} ms {n:8d} {fl * 1000:8.0f} ms {nf:8d} "
              f"{took / fl if fl else float('inf'):6.1f}x")
    bare.close()


if __name__ == "__main__":
    main()
