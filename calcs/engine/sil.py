"""Safety integrity level (SIL) bands and architectural constraints.

Sources of the tables (standard trade knowledge, no product wording):

* Low demand mode, PFDavg bands: IEC 61508-1:2010 Table 2 / IEC 61511-1:2016
  Table 4. Each band includes its lower bound: SIL 1 is 1e-2 <= PFDavg < 1e-1.
* High demand / continuous mode, PFH bands (per hour): IEC 61508-1:2010
  Table 3 / IEC 61511-1:2016 Table 5, same convention.
* Values outside the tables (conventions of this engine, not of the standard):
  PFDavg >= 0.1 (or PFH >= 1e-5 /h) gives 0, meaning "no SIL"; a PFDavg below
  1e-5 (or PFH below 1e-9 /h) is reported as SIL 4, the highest level.
* A value less than 1e-9 (relative) below a band limit is taken as equal to
  the limit: floating-point rounding of LOPA products such as
  1e-5 / (0.1 x 0.1) must not move a result into the next band.
* Minimum hardware fault tolerance (HFT): IEC 61511-1:2016 clause 11.4,
  Table 6 (the same numbers as IEC 61508-2:2010 Route 2H, 7.4.4.3.1).
* Route 1H: IEC 61508-2:2010 Table 2 (type A elements) and Table 3 (type B
  elements): highest SIL allowed for a safe failure fraction (SFF) and HFT.

Demand modes are the strings ``"low"`` and ``"high"`` ("continuous" is
accepted as a synonym of ``"high"``).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

from calcs.engine.errors import InputError

LOW = "low"
HIGH = "high"
DEMAND_MODES = (LOW, HIGH)

# (sil, lower bound inclusive, upper bound exclusive)
_PFD_BANDS = {1: (1e-2, 1e-1), 2: (1e-3, 1e-2), 3: (1e-4, 1e-3), 4: (1e-5, 1e-4)}
_PFH_BANDS = {1: (1e-6, 1e-5), 2: (1e-7, 1e-6), 3: (1e-8, 1e-7), 4: (1e-9, 1e-8)}
#: Relative distance below a band limit that still counts as the limit itself.
_EDGE_RTOL = 1e-9


def normalise_mode(mode: object, field: str = "demand_mode") -> str:
    """Return ``"low"`` or ``"high"`` for an accepted demand-mode text."""
    if isinstance(mode, str):
        text = mode.strip().lower()
        if text == LOW:
            return LOW
        if text in (HIGH, "continuous"):
            return HIGH
    raise InputError(field, f"must be 'low' or 'high', got {mode!r}")


def _bands(mode: str) -> dict[int, tuple[float, float]]:
    return _PFD_BANDS if normalise_mode(mode, "mode") == LOW else _PFH_BANDS


def sil_band(sil: int, mode: str = LOW) -> tuple[float, float]:
    """Limits ``(low, high)`` of the band of ``sil`` (1..4) in ``mode``.

    The low limit belongs to the band, the high limit does not. Low demand
    limits are PFDavg values, high demand limits are PFH values per hour.
    """
    bands = _bands(mode)
    if sil not in bands:
        raise InputError("sil", f"must be 1, 2, 3 or 4, got {sil!r}")
    return bands[sil]


def _band_lookup(value: float, bands: dict[int, tuple[float, float]], field: str) -> int:
    if not isinstance(value, (int, float)) or math.isnan(value) or value < 0:
        raise InputError(field, f"must be a number of at least 0, got {value!r}")
    # A value within _EDGE_RTOL of a band limit counts as equal to the limit,
    # so that rounding in products such as 1e-5 / (0.1 * 0.1) does not move a
    # result across a limit (the lower limit belongs to the band).
    if value >= bands[1][1] * (1.0 - _EDGE_RTOL):
        return 0
    for sil in (1, 2, 3):
        if value >= bands[sil][0] * (1.0 - _EDGE_RTOL):
            return sil
    return 4  # includes values below the SIL 4 band: capped at SIL 4


def sil_from_pfd(pfd_avg: float) -> int:
    """SIL band (0..4) of a low demand PFDavg; 0 means "no SIL"."""
    return _band_lookup(pfd_avg, _PFD_BANDS, "pfd_avg")


def sil_from_pfh(pfh_per_hour: float) -> int:
    """SIL band (0..4) of a high demand PFH (per hour); 0 means "no SIL"."""
    return _band_lookup(pfh_per_hour, _PFH_BANDS, "pfh_per_hour")


def sil_for(value: float, mode: str = LOW) -> int:
    """SIL band of ``value``: a PFDavg in low demand, a PFH in high demand."""
    return sil_from_pfd(value) if normalise_mode(mode, "mode") == LOW else sil_from_pfh(value)


def rrf(pfd_avg: float) -> float:
    """Risk reduction factor 1 / PFDavg (infinite for a PFDavg of 0)."""
    if not isinstance(pfd_avg, (int, float)) or math.isnan(pfd_avg) or pfd_avg < 0:
        raise InputError("pfd_avg", f"must be a number of at least 0, got {pfd_avg!r}")
    return float("inf") if pfd_avg == 0 else 1.0 / pfd_avg


def min_hft(sil: int, mode: str = LOW) -> int:
    """Minimum HFT for ``sil`` per IEC 61511-1:2016 Table 6.

    SIL 1: 0 (any mode); SIL 2: 0 in low demand, 1 in high demand or
    continuous mode; SIL 3: 1; SIL 4: 2.
    """
    mode = normalise_mode(mode, "mode")
    if sil not in (1, 2, 3, 4):
        raise InputError("sil", f"must be 1, 2, 3 or 4, got {sil!r}")
    if sil == 1:
        return 0
    if sil == 2:
        return 0 if mode == LOW else 1
    if sil == 3:
        return 1
    return 2


def max_sil_by_hft(hft: int, mode: str = LOW) -> int:
    """Highest SIL whose minimum HFT (IEC 61511-1:2016 Table 6) is <= ``hft``."""
    if not isinstance(hft, int) or hft < 0:
        raise InputError("hft", f"must be a whole number of at least 0, got {hft!r}")
    best = 0
    for sil in (1, 2, 3, 4):
        if min_hft(sil, mode) <= hft:
            best = sil
    return best


# Route 1H tables, IEC 61508-2:2010 Table 2 (type A) and Table 3 (type B).
# Rows: SFF < 60 %, 60 % - < 90 %, 90 % - < 99 %, >= 99 %; columns HFT 0, 1, 2.
_ROUTE_1H = {
    "A": ((1, 2, 3), (2, 3, 4), (3, 4, 4), (3, 4, 4)),
    "B": ((0, 1, 2), (1, 2, 3), (2, 3, 4), (3, 4, 4)),
}


def route_1h_max_sil(sff: float, element_type: str, hft: int) -> int:
    """Highest SIL allowed by IEC 61508-2:2010 Route 1H (Tables 2 and 3).

    Returns 0 where the table says "not allowed" (type B, SFF < 60 %, HFT 0).
    An HFT above 2 is read in the HFT 2 column, the last one the tables have
    (a conservative reading).
    """
    if not isinstance(sff, (int, float)) or not 0.0 <= sff <= 1.0:
        raise InputError("sff", f"must be between 0 and 1, got {sff!r}")
    kind = element_type.strip().upper() if isinstance(element_type, str) else element_type
    if kind not in _ROUTE_1H:
        raise InputError("hft_type", f"must be 'A' or 'B', got {element_type!r}")
    if not isinstance(hft, int) or hft < 0:
        raise InputError("hft", f"must be a whole number of at least 0, got {hft!r}")
    if sff < 0.60:
        row = 0
    elif sff < 0.90:
        row = 1
    elif sff < 0.99:
        row = 2
    else:
        row = 3
    return _ROUTE_1H[kind][row][min(hft, 2)]


def sff(lambda_s: float, lambda_dd: float, lambda_du: float) -> float:
    """Safe failure fraction (lambda_S + lambda_DD) / (lambda_S + lambda_DD + lambda_DU).

    IEC 61508-2:2010 definition (no-effect failures are not counted as safe).
    """
    for name, value in (("lambda_s", lambda_s), ("lambda_dd", lambda_dd), ("lambda_du", lambda_du)):
        if not isinstance(value, (int, float)) or math.isnan(value) or value < 0:
            raise InputError(name, f"must be a rate of at least 0, got {value!r}")
    total = lambda_s + lambda_dd + lambda_du
    if total == 0:
        raise InputError("lambda_du", "SFF is undefined when all failure rates are 0")
    return (lambda_s + lambda_dd) / total


def dc(lambda_dd: float, lambda_du: float) -> float:
    """Diagnostic coverage lambda_DD / (lambda_DD + lambda_DU)."""
    for name, value in (("lambda_dd", lambda_dd), ("lambda_du", lambda_du)):
        if not isinstance(value, (int, float)) or math.isnan(value) or value < 0:
            raise InputError(name, f"must be a rate of at least 0, got {value!r}")
    total = lambda_dd + lambda_du
    if total == 0:
        raise InputError("lambda_du", "DC is undefined when both dangerous rates are 0")
    return lambda_dd / total


# ---------------------------------------------------------------------------
# Architectural limit of a subsystem and of a whole SIF

ROUTE_AUTO = "auto"
ROUTE_61511 = "61511"
ROUTE_1H = "1H"
ROUTES = (ROUTE_AUTO, ROUTE_61511, ROUTE_1H)


@dataclass(frozen=True)
class ArchitectureLimit:
    """Highest SIL a subsystem's architecture allows.

    ``by_61511`` is the IEC 61511-1:2016 Table 6 answer (from the HFT alone).
    ``by_route_1h`` is the IEC 61508-2 Route 1H answer, or None when the SFF
    or the element type is not known. ``sil`` is the value used, chosen by
    ``route``: "61511", "1H", or "auto". IEC 61511-1:2016 11.4 allows the
    IEC 61508-2 routes as an alternative to its Table 6, so a subsystem that
    satisfies either one is acceptable: "auto" takes the higher of the two
    (Table 6 alone when SFF or type is unknown) and names the route used.
    """

    hft: int
    by_61511: int
    by_route_1h: int | None
    route: str
    sil: int


def architectural_limit(
    hft: int,
    mode: str = LOW,
    sff_value: float | None = None,
    element_type: str | None = None,
    route: str = ROUTE_AUTO,
) -> ArchitectureLimit:
    """Architectural SIL limit of one subsystem (see :class:`ArchitectureLimit`)."""
    if route not in ROUTES:
        raise InputError("route", f"must be one of {', '.join(ROUTES)}, got {route!r}")
    by_61511 = max_sil_by_hft(hft, mode)
    by_1h = None
    if sff_value is not None and element_type is not None:
        by_1h = route_1h_max_sil(sff_value, element_type, hft)
    if route == ROUTE_1H:
        if by_1h is None:
            raise InputError("sff", "Route 1H needs both the SFF and the element type (A or B)")
        used, sil = ROUTE_1H, by_1h
    elif route == ROUTE_AUTO and by_1h is not None and by_1h > by_61511:
        used, sil = ROUTE_1H, by_1h
    else:
        used, sil = ROUTE_61511, by_61511
    return ArchitectureLimit(hft=hft, by_61511=by_61511, by_route_1h=by_1h, route=used, sil=sil)


@dataclass(frozen=True)
class SifLimit:
    """SIL a SIF can claim once architecture and systematic capability are applied.

    ``limited_by`` names what sets ``sil``: "pfd_avg" / "pfh" (the computed
    band), "architecture:<subsystem>" or "systematic_capability:<subsystem>".
    When several limits are equally low, the computed band is named first,
    then architecture, then systematic capability.
    """

    band_sil: int
    architectural_sil: int
    systematic_capability: int | None
    sil: int
    limited_by: str


def sif_limit(
    band_sil: int,
    architecture: dict[str, int],
    systematic_capability: dict[str, int | None],
    measure: str = "pfd_avg",
) -> SifLimit:
    """Combine the band SIL with per-subsystem limits (min over subsystems).

    ``architecture`` maps subsystem name to its architectural SIL;
    ``systematic_capability`` maps subsystem name to its SC (1..4) or None.
    """
    arch_name, arch_sil = None, 4
    for name, value in architecture.items():
        if arch_name is None or value < arch_sil:
            arch_name, arch_sil = name, value
    sc_name, sc_sil = None, None
    for name, value in systematic_capability.items():
        if value is not None and (sc_sil is None or value < sc_sil):
            sc_name, sc_sil = name, value
    sil, limited_by = band_sil, measure
    if arch_name is not None and arch_sil < sil:
        sil, limited_by = arch_sil, f"architecture:{arch_name}"
    if sc_sil is not None and sc_sil < sil:
        sil, limited_by = sc_sil, f"systematic_capability:{sc_name}"
    return SifLimit(
        band_sil=band_sil,
        architectural_sil=arch_sil if arch_name is not None else band_sil,
        systematic_capability=sc_sil,
        sil=sil,
        limited_by=limited_by,
    )
