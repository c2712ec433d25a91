"""Parsing of MooN voting strings ("1oo1", "2oo3", "1oo2D").

M out of N channels must act for the group to act; the group fails dangerously
when fewer than M channels work, so it tolerates N - M dangerous faults
(hardware fault tolerance, HFT). A trailing "D" marks a group with diagnostics
that switch to the healthy channel (IEC 61508-6 B.3.2.2.5 style 1oo2D).
"""

from __future__ import annotations

import re
from dataclasses import dataclass

from calcs.engine.errors import InputError

_VOTING_RE = re.compile(r"^\s*(\d+)\s*oo\s*(\d+)\s*(D?)\s*$", re.IGNORECASE)


@dataclass(frozen=True)
class Voting:
    """A parsed MooN voting: ``m`` channels out of ``n`` must act."""

    m: int
    n: int
    diagnostic: bool = False

    @property
    def hft(self) -> int:
        """Hardware fault tolerance: dangerous faults the group survives."""
        return self.n - self.m

    @property
    def failures_to_fail(self) -> int:
        """Number of channels that must fail dangerously to fail the group."""
        return self.n - self.m + 1

    def __str__(self) -> str:
        return f"{self.m}oo{self.n}{'D' if self.diagnostic else ''}"


def parse_voting(text: object, field: str = "voting") -> Voting:
    """Parse ``text`` such as "2oo3" into a :class:`Voting`.

    Raises :class:`InputError` naming ``field`` for anything that is not a
    valid MooN with 1 <= M <= N (so "3oo2" and "0oo1" are refused). The "D"
    suffix is only accepted on 1oo2 (the architecture the standard defines).
    """
    if not isinstance(text, str):
        raise InputError(field, f"must be a text like '1oo2', got {text!r}")
    match = _VOTING_RE.match(text)
    if not match:
        raise InputError(field, f"'{text}' is not a MooN voting such as 1oo1, 1oo2, 2oo3 or 1oo2D")
    m, n, d = int(match.group(1)), int(match.group(2)), bool(match.group(3))
    if n < 1 or m < 1:
        raise InputError(field, f"'{text}': M and N must both be at least 1")
    if m > n:
        raise InputError(field, f"'{text}': M cannot exceed N (at most N channels can act)")
    if n > 16:
        raise InputError(field, f"'{text}': more than 16 channels is not supported")
    if d and (m, n) != (1, 2):
        raise InputError(field, f"'{text}': the diagnostic 'D' variant is defined for 1oo2 only")
    return Voting(m=m, n=n, diagnostic=d)
