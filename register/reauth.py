"""Re-authentication: every signature, countersignature, approval and authorisation
asks the person for the password again (one check, used by every service)."""

from __future__ import annotations

import hashlib
from dataclasses import dataclass

from django.conf import settings
from django.core.cache import cache
from django.core.exceptions import ValidationError


@dataclass(frozen=True)
class Reauthenticated:
    """Proof that ``user_id`` re-entered the password in this request. A batch (the bulk
    API, a spreadsheet import) checks the password once and signs each record with the
    proof, instead of hashing the password once per record."""

    user_id: int


def confirm_password(user, password, *, outcome: str = "nothing was written") -> Reauthenticated:
    """The one check of a person's password before they sign, countersign, approve or
    authorise. ``password`` is what they typed, or the :class:`Reauthenticated` proof of
    this same person from earlier in the request. A missing or wrong password raises a
    ValidationError keyed ``password``; ``outcome`` tells what stays as it was."""
    if isinstance(password, Reauthenticated):
        if password.user_id == user.pk:
            return password
        password = None
    if not password:
        raise ValidationError({"password": f"Enter your password to confirm; {outcome}."})
    key = _failures_key(user)
    minutes = int(settings.AXES_COOLOFF_TIME.total_seconds() // 60)
    if cache.get(key, 0) >= settings.AXES_FAILURE_LIMIT:
        raise ValidationError({"password": (
            f"Too many wrong passwords in a row; confirming is locked for {minutes} "
            f"minutes after the last one; {outcome}.")})
    if not user.check_password(password):
        # counted like sign-ins (SIGNIN_MAX_FAILURES within SIGNIN_LOCK_MINUTES), so a
        # stolen session or token cannot be used to guess the password by signing
        if not cache.add(key, 1, timeout=minutes * 60):
            try:
                cache.incr(key)
            except ValueError:  # expired in between
                cache.add(key, 1, timeout=minutes * 60)
            cache.touch(key, timeout=minutes * 60)
        raise ValidationError({"password": f"The password is not correct; {outcome}."})
    cache.delete(key)
    return Reauthenticated(user.pk)


def _failures_key(user) -> str:
    """Wrong re-entered passwords of this user under this password (a new password, or
    a new user with a reused id, starts again from nothing)."""
    stamp = hashlib.sha256(f"{user.pk}:{user.password}".encode()).hexdigest()[:24]
    return f"reauth-failures:{stamp}"
