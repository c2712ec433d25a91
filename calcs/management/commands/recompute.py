import datetime as dt
import time

from django.conf import settings
from django.core.management.base import BaseCommand
from django.db import connection, reset_queries
from django.utils import timezone

from calcs.adapter import recompute_many
from register import choices
from register.days import end_of_day
from register.models import SafetyFunction


class Command(BaseCommand):
    help = "Recompute the assessment (design, achieved, projected PFDavg) of SIFs."

    def add_arguments(self, parser):
        parser.add_argument("--site", help="site code (default: every site)")
        parser.add_argument("--tag", help="one SIF tag")
        parser.add_argument("--as-of", type=dt.date.fromisoformat,
                            help="evaluate as of this date (YYYY-MM-DD)")

    def handle(self, *args, **opts):
        qs = SafetyFunction.objects.filter(life_stage=choices.LifeStage.IN_SERVICE)
        if opts["site"]:
            qs = qs.filter(unit__site__code=opts["site"])
        if opts["tag"]:
            qs = qs.filter(tag=opts["tag"])
        as_of = None
        if opts["as_of"]:
            as_of = end_of_day(opts["as_of"])
        started = time.perf_counter()
        queries_before = len(connection.queries) if connection.queries_logged else None
        reset_queries()
        # In slices of the nightly chunk's size, all as of one moment: the result does not
        # depend on the slicing (as the night's chunks), and memory stays that of a slice
        # however large the plant (5,000 SIFs at once peaked at 633 MB).
        as_of = as_of or timezone.now()
        ids = list(qs.order_by("pk").values_list("pk", flat=True))
        size = max(1, settings.RECOMPUTE_CHUNK_SIFS)
        out = []
        for i in range(0, len(ids), size):
            out += recompute_many(SafetyFunction.objects.filter(pk__in=ids[i:i + size]),
                                  trigger="command", as_of=as_of)
        took = time.perf_counter() - started
        failing = sum(1 for a in out if a.meets_target is False)
        errors = sum(1 for a in out if a.error)
        self.stdout.write(f"recomputed {len(out)} SIF(s) in {took:.2f} s: {failing} not meeting "
                          f"target, {errors} could not be calculated")
        del queries_before
