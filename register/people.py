"""How a person is named everywhere (pages, packs, signatures, the change chain)."""

from __future__ import annotations


def person_name(user, empty: str = "") -> str:
    """Full name, or the user name when no full name is recorded; ``empty`` for nobody."""
    if user is None:
        return empty
    return user.get_full_name() or user.get_username()
