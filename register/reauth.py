"""Re-authentication: every signature, countersignature, approval and authorisation
asks the person for the password again (one check, used by every service)."""

from __future__ import annotations

from dataclasses import dataclass

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
    if not user.check_password(password):
        raise ValidationError({"password": f"The password is not correct; {outcome}."})
    return Reauthenticated(user.pk)
