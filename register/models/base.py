"""What every register model shares: validators, named checks, site-scoped querysets.

Units: failure rates per hour, frequencies per year, probabilities as fractions 0..1.
Validation lives in ``clean()`` (messages keyed by field); named database constraints
back up the most important rules for writes that skip ``full_clean()``.
"""

from __future__ import annotations

from django.core.exceptions import ValidationError
from django.core.validators import MaxValueValidator, MinValueValidator
from django.db import models
from django.db.models import Q

from register.calculations import calculations

probability = [MinValueValidator(0.0), MaxValueValidator(1.0)]
non_negative = [MinValueValidator(0.0)]


def _plausible_rate(value):
    """The one plausibility rule for failure rates (calcs.engine.units.check_rate)."""

    if value is None:
        return
    try:
        calculations().check_rate(value, "rate")
    except calculations().InputError as exc:
        raise ValidationError(exc.message) from None


plausible_rate = [_plausible_rate]
positive_frequency = [MinValueValidator(0.0)]


def _prob_check(field: str) -> models.CheckConstraint:
    return models.CheckConstraint(
        condition=Q(**{f"{field}__gte": 0.0}) & Q(**{f"{field}__lte": 1.0}),
        name=f"%(app_label)s_%(class)s_{field}_0_1",
    )


def _nonneg_check(field: str) -> models.CheckConstraint:
    return models.CheckConstraint(
        condition=Q(**{f"{field}__gte": 0.0}) | Q(**{f"{field}__isnull": True}),
        name=f"%(app_label)s_%(class)s_{field}_nonneg",
    )


class SiteScopedQuerySet(models.QuerySet):
    """Querysets that can be restricted to the sites where a user has a right.

    ``site_path`` on the model names the lookup from the model to its Site.
    """

    def restrict(self, user, action: str = "view"):
        """Only rows at sites where ``user`` has the right (``register.permissions``)."""
        from register.permissions import restrict

        return restrict(self, user, action)


