"""Client keys (idempotency) are unique within a site: another site's key is neither
visible nor claimable."""

import datetime as dt

import pytest
from django.utils import timezone

from register import choices, services
from register.models import Component, TestRecord
from tests import factories as f

pytestmark = pytest.mark.django_db


WHEN = timezone.now() - dt.timedelta(hours=2)


def _once(user, sif, key):
    results = [services.ResultInput(component=c, as_found="pass", as_left="pass")
               for c in Component.objects.filter(subsystem__sif=sif)]
    return services.save_draft_once(client_key=key, user=user, sif=sif,
                                    kind=choices.TestKind.FULL, results=results,
                                    performed_at=WHEN)


def test_the_same_key_at_two_sites_makes_two_records_and_repeats_stay_single():
    north, south = f.site("north"), f.site("south")
    tech_n = f.user("tn", site=north, role=choices.Role.TECHNICIAN)
    tech_s = f.user("ts", site=south, role=choices.Role.TECHNICIAN)
    sif_n, sif_s = f.sif(f.unit(north)), f.sif(f.unit(south))
    first, created_n = _once(tech_n, sif_n, "tablet-7:0001")
    # the other site's technician uses the same key: no "already used", a record of its own
    second, created_s = _once(tech_s, sif_s, "tablet-7:0001")
    assert created_n and created_s and first.pk != second.pk
    assert {first.key_site_id, second.key_site_id} == {north.pk, south.pk}
    # sent again at the first site: nothing new
    again, created = _once(tech_n, sif_n, "tablet-7:0001")
    assert again.pk == first.pk and not created
    assert TestRecord.objects.filter(client_key="tablet-7:0001").count() == 2
