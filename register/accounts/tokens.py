"""API tokens: how long one lasts, issuing a fresh one, revoking a user's tokens.

A token lasts ``API_TOKEN_DAYS`` days from its issue (``Token.created``). Changing a
user's password revokes every token of theirs (:func:`revoke_on_password_change`, connected
in ``register.apps``), so a token obtained with the old password stops working at once.
"""

from __future__ import annotations

import datetime as dt

from django.conf import settings
from django.utils import timezone
from rest_framework.authtoken.models import Token


def lifetime() -> dt.timedelta:
    return dt.timedelta(days=settings.API_TOKEN_DAYS)


def expires_at(token: Token) -> dt.datetime:
    return token.created + lifetime()


def is_expired(token: Token, now: dt.datetime | None = None) -> bool:
    return (now or timezone.now()) >= expires_at(token)


def issue(user) -> Token:
    """The user's token, a new one when theirs has expired (or there is none)."""
    token, created = Token.objects.get_or_create(user=user)
    if not created and is_expired(token):
        token.delete()
        token = Token.objects.create(user=user)
    return token


def revoke(user) -> int:
    """Delete every token of ``user``; return how many there were."""
    return Token.objects.filter(user=user).delete()[0]


def note_password_change(sender, instance, raw=False, update_fields=None, **kwargs):
    """pre_save of the user model: remember whether the stored password hash changes."""
    instance._ledger_password_changed = False
    if raw or instance.pk is None or (update_fields is not None
                                      and "password" not in update_fields):
        return
    stored = (sender._default_manager.filter(pk=instance.pk)
              .values_list("password", flat=True).first())
    instance._ledger_password_changed = stored is not None and stored != instance.password


def revoke_on_password_change(sender, instance, created=False, **kwargs):
    """post_save of the user model: a changed password revokes the user's API tokens."""
    if getattr(instance, "_ledger_password_changed", False):
        revoke(instance)
        instance._ledger_password_changed = False
