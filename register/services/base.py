"""What the write services share: the site and SIF of an object, the password check of
every signature and approval, and the rule that a write names only objects of its own SIF
(or site)."""

from __future__ import annotations

from django.core.exceptions import ValidationError

from register.models import (
    SafetyFunction,
)
from register.permissions import site_id_of
from register.reauth import Reauthenticated, confirm_password  # noqa: F401 (the one check)


def _sif_id_of(instance) -> int | None:
    if isinstance(instance, SafetyFunction):
        return instance.pk
    for path in ("sif_id", "subsystem.sif_id", "plan.sif_id"):
        obj = instance
        try:
            for part in path.split("."):
                obj = getattr(obj, part)
            return obj
        except AttributeError:
            continue
    return None


# ---------------------------------------------------------------------------------------
# References: a write names only objects of its own SIF or site
# ---------------------------------------------------------------------------------------


def _label(obj) -> str:
    return str(getattr(obj, "tag", None) or getattr(obj, "name", None) or f"#{obj.pk}")


def check_references(owner, **fields) -> None:
    """Every object a write refers to belongs to the same SIF as ``owner`` (a SIF, or an
    object of one), or to the same site when ``owner`` is not of one SIF (a site, a unit).

    ``fields``: field name -> one object, an iterable of objects, or None. Raises one
    ValidationError keyed by each field naming objects of another SIF or site; the caller
    writes nothing. Used by the services (demands, bypasses, test records, plan scopes)
    and through them by the forms, the API and the import.
    """
    errors = reference_errors(owner, **fields)
    if errors:
        raise ValidationError(errors)


def reference_errors(owner, **fields) -> dict[str, list[str]]:
    """The messages of :func:`check_references`, by field (empty when all is well)."""
    sif_id = _sif_id_of(owner)
    site_id = site_id_of(owner)
    where = (getattr(owner, "tag", None) if isinstance(owner, SafetyFunction) else None)
    errors: dict[str, list[str]] = {}
    for name, value in fields.items():
        if value is None:
            continue
        objs = [value] if hasattr(value, "pk") else list(value)
        if sif_id is not None:
            bad = [o for o in objs if o is not None and _sif_id_of(o) != sif_id]
            scope = f"of {where}" if where else "of this SIF"
        else:
            bad = [o for o in objs if o is not None and site_id_of(o) != site_id]
            scope = "of this site"
        if bad:
            errors[name] = [f"Not {scope}: {', '.join(_label(o) for o in bad)}."]
    return errors
