"""The scale plant of the benchmarks stores each plan's due date and state dates as the
register does (the lists, the worklist and the scan read the stored columns): the stored
due dates are those the whole rule gives from the generated records."""

import pytest
from django.core.management import call_command
from django.utils import timezone

from register.models import Site, TestPlan
from register.schedule.due import compute_statuses

pytestmark = pytest.mark.django_db


def test_the_scale_plant_stores_the_due_dates_its_records_give():
    call_command("make_scale_plant", sifs=6, years=3, code="dues", verbosity=0)
    plans = TestPlan.objects.filter(sif__unit__site=Site.objects.get(code="dues"))
    by_rule = compute_statuses(plans, timezone.localdate())
    stored = dict(plans.values_list("pk", "next_due_on"))
    assert len(stored) == 6
    assert None not in stored.values()
    assert stored == {pk: s.due_on for pk, s in by_rule.items()}
