"""What every register model shares: validators, named checks, site-scoped querysets.

Units: failure rates per hour, frequencies per year, probabilities as fractions 0..1.
Validation lives in ``clean()`` (messages keyed by field); named database constraints
back up the most important rules for writes that skip ``full_clean()``.
"""

from __future__ import annotations

from django.core.exceptions import ValidationError
from django.core.validators import (
    MaxLengthValidator,
    MinValueValidator,
    ProhibitNullCharactersValidator,
)
from django.db import models
from django.db.models import Q
from django.utils.deconstruct import deconstructible

from register.calculations import calculations

#: Longest free text (reasons, remarks, descriptions) a request or an imported cell may
#: carry, in characters.
MAX_TEXT = 20_000
#: Validators of such free text: no NUL (the database cannot store it), at most MAX_TEXT.
free_text = [ProhibitNullCharactersValidator(), MaxLengthValidator(MAX_TEXT)]


def free_text_errors(instance, *names: str) -> dict[str, list[str]]:
    """The messages of ``free_text`` on the text fields ``names`` of ``instance``, by
    field (for a model's ``clean()`` where a caller's text reaches it without a form)."""
    errors = {}
    for name in names:
        try:
            for check in free_text:
                check(getattr(instance, name) or "")
        except ValidationError as exc:
            errors[name] = exc.messages
    return errors


@deconstructible
class Plausible:
    """A finite number inside the plausible range of ``quantity``, one of the table in
    ``calcs.engine.units.BOUNDS`` (the same ranges as the import and the command)."""

    def __init__(self, quantity: str):
        self.quantity = quantity

    def __call__(self, value):
        if value is None:
            return
        try:
            calculations().check_number(value, self.quantity, "value")
        except calculations().InputError as exc:
            raise ValidationError(exc.message, code="implausible") from None

    def __eq__(self, other):
        return isinstance(other, Plausible) and other.quantity == self.quantity

    def __hash__(self):
        return hash(self.quantity)


def plausible(quantity: str) -> list:
    """Field validators for a number of ``quantity`` (see :class:`Plausible`)."""
    return [Plausible(quantity)]


def plausible_day(value):
    """Field validator: a date or time inside the plausible window (register.days)."""
    from register.days import check_plausible

    check_plausible(value)


plausible_date = [plausible_day]
probability = plausible("fraction")
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


