"""Template context: the signed-in person's unread notification count, for the header.
Counted only when a template shows it (one query)."""

from django.utils.functional import SimpleLazyObject

from register.inbox.services import unread_count


def unread(request):
    user = getattr(request, "user", None)
    if user is None or not user.is_authenticated:
        return {}
    return {"inbox_unread": SimpleLazyObject(lambda: unread_count(user))}
