"""A person's own notifications: the inbox, its unread count, marking read.

Every function takes the signed-in user and touches only that user's notifications; a
notification of somebody else does not exist for them. Marking read changes no register
data (it is not history and not chained)."""

from __future__ import annotations

from django.utils import timezone

from register.models import Notification


def inbox(user):
    """The user's notifications, newest first."""
    return Notification.objects.filter(recipient=user).select_related("site").order_by(
        "-created_at", "-id")


def unread_count(user) -> int:
    if not user.is_authenticated:
        return 0
    return Notification.objects.filter(recipient=user, read_at__isnull=True).count()


def mark_read(user, note_id: int) -> Notification:
    """Mark one of the user's notifications read (again: nothing changes). Raises
    ``Notification.DoesNotExist`` for somebody else's."""
    note = Notification.objects.get(pk=note_id, recipient=user)
    if note.read_at is None:
        Notification.objects.filter(pk=note.pk, read_at__isnull=True).update(
            read_at=timezone.now())
        note.refresh_from_db(fields=["read_at"])
    return note


def mark_all_read(user) -> int:
    """Mark every unread notification of the user read; returns how many."""
    return Notification.objects.filter(recipient=user, read_at__isnull=True).update(
        read_at=timezone.now())
