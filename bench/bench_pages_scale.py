"""Benchmark: the read pages of a scale plant against their floor, interleaved in one run.

The plant overview, the filtered register list, the SIF page with a long history and the
technician's worklist, each beside a bare psycopg read of the same rows (the floors of
``bench_scale.py``) and their ratio. Nothing is generated or recomputed here: run
``bench_scale.py`` (or ``make_scale_plant``) on the database first. Run by hand:
    DATABASE_URL=postgres://postgres@127.0.0.1:5432/<a copy of the scale plant> \\
        .venv/bin/python bench/bench_pages_scale.py --sifs 5000 --repeat 5
``--profile NAME`` prints where the time of one page goes (cProfile, cumulative).
"""

import argparse
import cProfile
import os
import pstats
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "bench"))
os.environ.setdefault("DJANGO_SETTINGS_MODULE", "config.settings.base")

from bench_scale import INPUT_ROWS, LATEST, PLANS  # noqa: E402 (after the path is set)

PAGES = ("plant overview", "filtered register list", "filtered list, overdue",
         "SIF page, long history", "technician worklist")


def main():
    parser = argparse.ArgumentParser()
    parser.add_argument("--sifs", type=int, default=5000)
    parser.add_argument("--repeat", type=int, default=5)
    parser.add_argument("--profile", choices=PAGES)
    args = parser.parse_args()
    import django

    django.setup()
    import psycopg
    from django.conf import settings
    from django.contrib.auth import get_user_model
    from django.db import connection
    from django.test import Client
    from django.test.utils import CaptureQueriesContext

    from register import choices
    from register.models import Membership, SafetyFunction, Site

    settings.ALLOWED_HOSTS = ["*"]
    code = f"scale{args.sifs}"
    site = Site.objects.get(code=code)
    sif = SafetyFunction.objects.filter(unit__site=site).order_by("pk").first()
    User = get_user_model()
    lead, _ = User.objects.get_or_create(username=f"{code}-lead")
    Membership.objects.get_or_create(user=lead, site=site, defaults={"role": choices.Role.LEAD})
    tech = User.objects.get(username=f"{code}-tech")
    dsn = settings.DATABASES["default"]
    bare = psycopg.connect(host=dsn["HOST"] or "127.0.0.1", port=dsn["PORT"] or 5432,
                           user=dsn["USER"], password=dsn["PASSWORD"], dbname=dsn["NAME"])
    latest = LATEST.replace("{sifs}", "{sifs} AND a.latest")
    plant = f"u.site_id = {site.pk}"
    one = f"s.id = {sif.pk}"
    overdue = (" AND EXISTS (SELECT 1 FROM register_testplan p WHERE p.sif_id = s.id "
               "AND p.next_due_on < current_date)")

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

    steps = {
        "plant overview": (page(lead_client, "/"),
                           lambda: floor(latest, PLANS, where=plant)),
        "filtered register list": (page(lead_client, "/sifs/?target_sil=2"), lambda: floor(
            latest + " LIMIT 50", where=plant + " AND s.target_sil = 2")),
        "filtered list, overdue": (page(lead_client, "/sifs/?target_sil=2&overdue=true"),
                                   lambda: floor(latest + " LIMIT 50", where=plant
                                                 + " AND s.target_sil = 2" + overdue)),
        "SIF page, long history": (page(lead_client, f"/sifs/{sif.pk}/"),
                                   lambda: floor(*INPUT_ROWS, latest, where=one)),
        "technician worklist": (page(tech_client, "/field/"),
                                lambda: floor(PLANS, where=plant)),
    }
    if args.profile:
        run = steps[args.profile][0]
        run()
        prof = cProfile.Profile()
        prof.enable()
        run()
        prof.disable()
        pstats.Stats(prof).sort_stats("cumulative").print_stats(40)
        return
    best: dict[str, list] = {}
    for _ in range(args.repeat):
        for name, (run, bare_read) in steps.items():
            with CaptureQueriesContext(connection) as q:
                t = time.perf_counter()
                run()
                took = time.perf_counter() - t
            t = time.perf_counter()
            n_floor = bare_read()
            fl = time.perf_counter() - t
            prev = best.get(name)
            if prev is None:
                best[name] = [took, len(q), fl, n_floor]
            else:
                prev[0], prev[2] = min(prev[0], took), min(prev[2], fl)
    print(f"{'page':30} {'project':>10} {'queries':>8} {'floor':>10} {'queries':>8} {'ratio':>7}")
    for name, (took, n, fl, nf) in best.items():
        print(f"{name:30} {took * 1000:8.0f} ms {n:8d} {fl * 1000:8.1f} ms {nf:8d} "
              f"{took / fl if fl else float('inf'):6.1f}x")
    bare.close()


if __name__ == "__main__":
    main()
