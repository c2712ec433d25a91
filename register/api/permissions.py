"""The API's permission class. It asks ``register.permissions`` and holds no rules itself.

A view names, per action, the :class:`register.permissions.Action` it needs in
``write_rights``. Reads need only a signed-in user: querysets are already limited to the
sites where the user holds a role, so objects at other sites answer 404. Writes need the
right at *some* site to get past the door (auditors and outsiders get 403 at once) and the
right at the object's own site once the object is known. For creates the service checks the
target's site again.
"""

from __future__ import annotations

from rest_framework.permissions import SAFE_METHODS, BasePermission

from register.permissions import can, can_somewhere, site_id_of


class LedgerPermission(BasePermission):
    message = "You do not have the right to do this."

    def _right(self, request, view):
        if request.method in SAFE_METHODS:
            return None
        return getattr(view, "write_rights", {}).get(getattr(view, "action", None))

    def has_permission(self, request, view):
        user = request.user
        if not (user and user.is_authenticated and user.is_active):
            return False
        right = self._right(request, view)
        if right is None:
            # Reads, and methods the view does not offer (DRF answers 405 next).
            return True
        return can_somewhere(user, right)

    def has_object_permission(self, request, view, obj):
        right = self._right(request, view)
        if right is None:
            return True
        return can(request.user, right, site_id_of(obj))
