"""Who may do what, in one place. Web views, the API, exports, the admin and services all
ask here; no other membership query decides access.

Rights come from a person's roles at the site the object belongs to (the one table
``RIGHTS``); a superuser may do everything. Auditors read and export; they never write.

* ``can(user, action, site_id)`` / ``require(...)``: one object's site.
* ``restrict(queryset, user, action)`` (also ``Model.objects.restrict(user, action)``):
  only rows at sites where the user has the right; the gate for every list and lookup.
* ``can_somewhere(user, action)``: the right at any site (navigation, the API's door).
* ``site_id_of(obj)``: the site of any site-scoped object.
"""

from __future__ import annotations

from django.core.exceptions import PermissionDenied

from register.choices import Role


class Action:
    VIEW = "view"
    VIEW_CHAIN = "view_chain"
    EXPORT = "export"
    EDIT_REGISTER = "edit_register"
    RECORD_TEST = "record_test"
    VERIFY_TEST = "verify_test"
    REQUEST_DEFERRAL = "request_deferral"
    DECIDE_DEFERRAL = "decide_deferral"
    MANAGE_BYPASS = "manage_bypass"
    RECORD_DEMAND = "record_demand"
    AUTHORISE_BYPASS = "authorise_bypass"
    MANAGE_FINDING = "manage_finding"
    CLOSE_FINDING_WITHOUT_RETEST = "close_finding_without_retest"


RIGHTS: dict[str, frozenset[str]] = {
    Action.VIEW: frozenset({Role.LEAD, Role.TECHNICIAN, Role.VERIFIER, Role.AUDITOR}),
    Action.VIEW_CHAIN: frozenset({Role.LEAD, Role.AUDITOR}),
    Action.EXPORT: frozenset({Role.LEAD, Role.VERIFIER, Role.AUDITOR}),
    Action.EDIT_REGISTER: frozenset({Role.LEAD}),
    Action.RECORD_TEST: frozenset({Role.TECHNICIAN, Role.LEAD}),
    Action.VERIFY_TEST: frozenset({Role.VERIFIER, Role.LEAD}),
    Action.REQUEST_DEFERRAL: frozenset({Role.TECHNICIAN, Role.LEAD}),
    Action.DECIDE_DEFERRAL: frozenset({Role.LEAD}),
    Action.MANAGE_BYPASS: frozenset({Role.LEAD, Role.TECHNICIAN}),
    Action.RECORD_DEMAND: frozenset({Role.LEAD, Role.TECHNICIAN}),
    # Never the requester: the service refuses a person authorising their own bypass.
    Action.AUTHORISE_BYPASS: frozenset({Role.LEAD}),
    Action.MANAGE_FINDING: frozenset({Role.LEAD, Role.TECHNICIAN}),
    Action.CLOSE_FINDING_WITHOUT_RETEST: frozenset({Role.LEAD}),
}


def _roles_by_site(user) -> dict[int, set[str]]:
    """Site id -> the roles ``user`` holds there (one query, cached on the user object)."""
    cache = getattr(user, "_ledger_roles", None)
    if cache is None:
        cache = {}
        for site, role in user.memberships.values_list("site_id", "role"):
            cache.setdefault(site, set()).add(role)
        user._ledger_roles = cache
    return cache


def roles_at(user, site_id: int) -> set[str]:
    """The roles ``user`` holds at the site."""
    if user is None or not user.is_authenticated:
        return set()
    return _roles_by_site(user).get(site_id, set())


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


def sites_with(user, action: str) -> set[int] | None:
    """Ids of the sites where ``user`` has the right; None means every site (superuser)."""
    if user is None or not user.is_authenticated or not user.is_active:
        return set()
    if user.is_superuser:
        return None
    allowed = RIGHTS[action]
    return {site for site, roles in _roles_by_site(user).items() if roles & allowed}


def can_somewhere(user, action: str) -> bool:
    """True if the user holds a role with this right at any site."""
    sites = sites_with(user, action)
    return sites is None or bool(sites)


def restrict(queryset, user, action: str = Action.VIEW):
    """``queryset`` limited to the rows at sites where ``user`` has the right."""
    sites = sites_with(user, action)
    path = queryset.model.site_path
    if path is None and queryset.model.__name__ != "Site":
        # shared by every site (the device library): readable by anyone signed in
        return queryset if sites is None or can_somewhere(user, Action.VIEW) \
            else queryset.none()
    if sites is None:
        return queryset
    return queryset.filter(**{f"{path}__in" if path else "pk__in": sorted(sites)})


def site_id_of(obj) -> int | None:
    """Walk ``site_path`` from the object to its site id (no extra query when joined)."""
    path = getattr(obj, "site_path", None)
    if path is None:
        return obj.pk if obj.__class__.__name__ == "Site" else None
    parts = path.split("__")
    for part in parts[:-1]:
        obj = getattr(obj, part)
    return getattr(obj, f"{parts[-1]}_id")
