"""``manage.py recompute`` works through the SIFs in slices of RECOMPUTE_CHUNK_SIFS, all as
of one moment, and stores what one recompute of all of them at once stores."""

import datetime as dt
import io

import pytest
from django.core.management import call_command
from django.db import transaction

from calcs.adapter import recompute_many
from calcs.models import Assessment
from register import choices
from register.days import end_of_day
from register.models import SafetyFunction, Site

pytestmark = pytest.mark.django_db

FIELDS = ("sif_id", "as_of", "design_pfd_avg", "achieved_pfd_avg", "meets_target",
          "verdict", "flags", "inputs_digest", "error")


def _newest(ids) -> dict[int, tuple]:
    return {row[0]: row for row in Assessment.objects.filter(sif_id__in=ids, latest=True)
            .values_list(*FIELDS)}


def test_the_command_in_slices_stores_what_one_recompute_of_all_stores(settings):
    call_command("make_scale_plant", sifs=12, years=3, code="rcmd", verbosity=0)
    site = Site.objects.get(code="rcmd")
    qs = SafetyFunction.objects.filter(unit__site=site, life_stage=choices.LifeStage.IN_SERVICE)
    ids = list(qs.values_list("pk", flat=True))
    day = dt.date.today() - dt.timedelta(days=3)
    with transaction.atomic():
        recompute_many(qs, trigger="command", as_of=end_of_day(day))
        at_once = _newest(ids)
        transaction.set_rollback(True)
    assert len(at_once) == len(ids) == 12

    settings.RECOMPUTE_CHUNK_SIFS = 5  # slices of 5, 5 and 2
    out = io.StringIO()
    call_command("recompute", "--site", "rcmd", "--as-of", day.isoformat(), stdout=out)
    assert out.getvalue().startswith("recomputed 12 SIF(s)")
    assert _newest(ids) == at_once
