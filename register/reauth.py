"""Re-authentication: every signature, countersignature, approval and authorisation
asks the person for the password again (one check, used by every service).

A maintenance system posting signed results all day may instead present a *signing
grant* (:func:`issue_grant`): proof that the person re-entered the password at most
``SIGNING_GRANT_MINUTES`` ago, bound to that person, to the credential it was asked with
(the API token, or the browser session) and to the password as it was then. A password
change, a new token or session, or the end of its lifetime ends it; it is signed with the
site's secret key, so it cannot be made or stretched without the password.
"""

from __future__ import annotations

import datetime as dt
import hashlib
import logging
from dataclasses import dataclass

from django.conf import settings
from django.core import signing
from django.core.cache import cache
from django.core.exceptions import ValidationError
from django.utils import timezone

log = logging.getLogger("register.reauth")

#: Salt of signing grants (no other signed value of the project can pass as one).
GRANT_SALT = "register.reauth.signing-grant"


@dataclass(frozen=True)
class Reauthenticated:
    """Proof that ``user_id`` re-entered the password in this request. A batch (the bulk
    API, a spreadsheet import) checks the password once and signs each record with the
    proof, instead of hashing the password once per record. ``how`` says how the person
    proved it: the password in this request, or a signing grant and when it was issued
    (for a signature's record in the audit trail)."""

    user_id: int
    how: str = "password"


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
    return f"reauth-failures:{password_stamp(user)}"


def password_stamp(user) -> str:
    """A short digest of the user's id and stored password hash: it changes with the
    password (and differs for a new user with a reused id)."""
    return hashlib.sha256(f"{user.pk}:{user.password}".encode()).hexdigest()[:24]


def grant_lifetime() -> dt.timedelta:
    return dt.timedelta(minutes=settings.SIGNING_GRANT_MINUTES)


def _binding(credential: str) -> str:
    return hashlib.sha256(credential.encode()).hexdigest()[:32]


def issue_grant(user, password, credential: str) -> tuple[str, dt.datetime]:
    """Check ``password`` once (:func:`confirm_password`, with its lock) and return a
    signing grant for ``user`` presented with ``credential`` (the API token's key, or
    ``"session:"`` and the session key), and when it expires. Raises ValidationError
    keyed ``password`` on a missing or wrong password, or when grants are switched off
    (``SIGNING_GRANT_MINUTES=0``)."""
    if settings.SIGNING_GRANT_MINUTES <= 0:
        raise ValidationError({"password": "Signing grants are switched off here; send "
                                           "the password with each signature."})
    confirm_password(user, password, outcome="no signing grant was issued")
    issued = timezone.now()
    grant = signing.dumps({"u": user.pk, "c": _binding(credential), "p": password_stamp(user),
                           "t": issued.isoformat(timespec="seconds")}, salt=GRANT_SALT)
    expires = issued + grant_lifetime()
    log.info("signing grant issued to user %s until %s", user.pk, expires.isoformat())
    return grant, expires


def redeem_grant(user, grant: str, credential: str, *,
                 outcome: str = "nothing was written") -> Reauthenticated:
    """The :class:`Reauthenticated` proof a valid signing grant stands for. A grant that
    was made for someone else or another credential, is older than its lifetime, or
    predates a password change raises ValidationError keyed ``signing_grant``."""
    def refused(why):
        return ValidationError({"signing_grant": (
            f"{why}; ask for a new one with your password; {outcome}.")})

    if settings.SIGNING_GRANT_MINUTES <= 0:
        raise refused("Signing grants are switched off here")
    try:
        claims = signing.loads(grant, salt=GRANT_SALT,
                               max_age=grant_lifetime().total_seconds())
    except signing.SignatureExpired:
        raise refused(f"The signing grant has expired (a grant lasts "
                      f"{settings.SIGNING_GRANT_MINUTES} minutes)") from None
    except signing.BadSignature:
        raise refused("This is not a valid signing grant") from None
    if not isinstance(claims, dict) or claims.get("u") != user.pk \
            or claims.get("c") != _binding(credential):
        raise refused("This signing grant was issued to another user or credential")
    if claims.get("p") != password_stamp(user):
        raise refused("The password has changed since this signing grant was issued")
    return Reauthenticated(user.pk, how=f"signing grant issued {claims.get('t')}")
