"""Who may do what, in one place. Web views, the API, exports and services all ask here.

Rights come from a person's roles at the site the object belongs to; a superuser may do
everything. Auditors read and export; they never write.
"""

from __future__ import annotations

from django.core.exceptions import PermissionDenied

from .choices import Role


class Action:
    VIEW = "view"
    EXPORT = "export"
    EDIT_REGISTER = "edit_register"
    RECORD_TEST = "record_test"
    VERIFY_TEST = "verify_test"
    REQUEST_DEFERRAL = "request_deferral"
    DECIDE_DEFERRAL = "decide_deferral"
    MANAGE_BYPASS = "manage_bypass"
    RECORD_DEMAND = "record_demand"


RIGHTS: dict[str, frozenset[str]] = {
    Action.VIEW: frozenset({Role.LEAD, Role.TECHNICIAN, Role.VERIFIER, Role.AUDITOR}),
    Action.EXPORT: frozenset({Role.LEAD, Role.VERIFIER, Role.AUDITOR}),
    Action.EDIT_REGISTER: frozenset({Role.LEAD}),
    Action.RECORD_TEST: frozenset({Role.TECHNICIAN, Role.LEAD}),
    Action.VERIFY_TEST: frozenset({Role.VERIFIER, Role.LEAD}),
    Action.REQUEST_DEFERRAL: frozenset({Role.TECHNICIAN, Role.LEAD}),
    Action.DECIDE_DEFERRAL: frozenset({Role.LEAD}),
    Action.MANAGE_BYPASS: frozenset({Role.LEAD, Role.TECHNICIAN}),
    Action.RECORD_DEMAND: frozenset({Role.LEAD, Role.TECHNICIAN}),
}


def roles_at(user, site_id: int) -> set[str]:
    """The roles ``user`` holds at the site (cached on the user object per request)."""
    if user is None or not user.is_authenticated:
        return set()
    cache = getattr(user, "_ledger_roles", None)
    if cache is None:
        from .models import Membership

        cache = {}
        for site, role in Membership.objects.filter(user=user).values_list("site_id", "role"):
            cache.setdefault(site, set()).add(role)
        user._ledger_roles = cache
    return cache.get(site_id, set())


def can(user, action: str, site_id: int) -> bool:
    if user is None or not user.is_authenticated or not user.is_active:
        return False
    if user.is_superuser:
        return True
    return bool(roles_at(user, site_id) & RIGHTS[action])


def require(user, action: str, site_id: int) -> None:
    """Raise PermissionDenied unless ``user`` may do ``action`` at the site."""
    if not can(user, action, site_id):
        raise PermissionDenied(f"You do not have the right to {action.replace('_', ' ')} "
                               "at this site.")


def roles_for(action: str) -> frozenset[str]:
    return RIGHTS[action]
