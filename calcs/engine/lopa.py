"""Layer of protection analysis (LOPA) arithmetic: the PFDavg a SIF must reach.

For one scenario (one hazardous consequence with its causes):

* frequency without the SIF = sum of initiating cause frequencies (per year)
  x product of the PFDs of the other independent protection layers (IPLs)
  x product of the conditional modifiers (probabilities such as occupancy
  or ignition);
* required SIF PFDavg = tolerable frequency / frequency without the SIF;
* required RRF = 1 / required PFDavg; the required SIL is the band of the
  required PFDavg (IEC 61511-1:2016 Table 4; the SIF must still reach the
  required PFDavg itself, which may lie inside the band).

Outcome of a scenario (conventions of this engine):

* required PFDavg >= 1: ``"no_sif_needed"`` - the other layers already meet
  the tolerable frequency;
* 0.1 <= required PFDavg < 1: ``"below_sil1"`` - a risk reduction below
  SIL 1 is needed (SIL 0 / non-SIL protection can provide it; required SIL 0);
* 1e-5 <= required PFDavg < 0.1: ``"sil"`` - a SIL 1 to 4 SIF;
* required PFDavg < 1e-5: ``"beyond_sil4"`` - more than one SIL 4 SIF could
  provide: redesign the process or add other layers (required SIL None).

When several scenarios are protected by the same SIF, the one with the
smallest required PFDavg governs.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

from calcs.engine.errors import InputError
from calcs.engine.sil import sil_from_pfd
from calcs.engine.units import HOURS_PER_YEAR

NO_SIF_NEEDED = "no_sif_needed"
BELOW_SIL1 = "below_sil1"
SIL_NEEDED = "sil"
BEYOND_SIL4 = "beyond_sil4"

_OUTCOME_TEXT = {
    NO_SIF_NEEDED: "no SIF needed: the other layers meet the tolerable frequency",
    BELOW_SIL1: "risk reduction below SIL 1 needed (SIL 0 / non-SIL protection)",
    SIL_NEEDED: "SIF needed",
    BEYOND_SIL4: "beyond SIL 4: redesign the process or add other protection layers",
}


def _positive(value: object, name: str) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
        raise InputError(name, f"must be a finite number, got {value!r}")
    if value <= 0:
        raise InputError(name, f"must be greater than 0, got {value:g}")
    return float(value)


def _open_probability(value: object, name: str) -> float:
    value = _positive(value, name)
    if value > 1:
        raise InputError(name, f"must be greater than 0 and at most 1, got {value:g}")
    return value


def _text(value: object, name: str) -> str:
    if not isinstance(value, str) or not value.strip():
        raise InputError(name, f"must be a non-empty text, got {value!r}")
    return value


@dataclass(frozen=True)
class InitiatingCause:
    name: str
    frequency_per_year: float

    def __post_init__(self) -> None:
        _text(self.name, "name")
        object.__setattr__(self, "frequency_per_year",
                           _positive(self.frequency_per_year, "frequency_per_year"))


@dataclass(frozen=True)
class ProtectionLayer:
    """An independent protection layer other than the SIF, with its PFD."""

    name: str
    pfd: float

    def __post_init__(self) -> None:
        _text(self.name, "name")
        object.__setattr__(self, "pfd", _open_probability(self.pfd, "pfd"))


@dataclass(frozen=True)
class ConditionalModifier:
    """A probability that the consequence follows (occupancy, ignition, ...)."""

    name: str
    probability: float

    def __post_init__(self) -> None:
        _text(self.name, "name")
        object.__setattr__(self, "probability", _open_probability(self.probability, "probability"))


@dataclass(frozen=True)
class Scenario:
    name: str
    tolerable_frequency_per_year: float
    causes: tuple[InitiatingCause, ...]
    layers: tuple[ProtectionLayer, ...] = ()
    modifiers: tuple[ConditionalModifier, ...] = ()

    def __post_init__(self) -> None:
        _text(self.name, "name")
        put = object.__setattr__
        put(self, "tolerable_frequency_per_year",
            _positive(self.tolerable_frequency_per_year, "tolerable_frequency_per_year"))
        for key, kind in (("causes", InitiatingCause), ("layers", ProtectionLayer),
                          ("modifiers", ConditionalModifier)):
            items = tuple(getattr(self, key))
            for i, item in enumerate(items):
                if not isinstance(item, kind):
                    raise InputError(f"{key}[{i}]", f"must be a {kind.__name__}")
            put(self, key, items)
        if not self.causes:
            raise InputError("causes", "at least one initiating cause is needed")


@dataclass(frozen=True)
class ScenarioResult:
    name: str
    initiating_frequency_per_year: float
    layers_pfd_product: float
    modifiers_product: float
    frequency_without_sif_per_year: float
    required_pfd_avg: float
    required_rrf: float
    required_sil: int | None
    outcome: str
    outcome_text: str
    steps: tuple[tuple[str, float], ...]


@dataclass(frozen=True)
class LopaResult:
    """All scenarios of one SIF; ``governing`` is the index of the strictest."""

    scenarios: tuple[ScenarioResult, ...]
    governing: int

    @property
    def governing_scenario(self) -> ScenarioResult:
        return self.scenarios[self.governing]

    @property
    def required_pfd_avg(self) -> float:
        return self.governing_scenario.required_pfd_avg

    @property
    def required_sil(self) -> int | None:
        return self.governing_scenario.required_sil

    @property
    def outcome(self) -> str:
        return self.governing_scenario.outcome


def frequency_from_mtbf_years(mtbf_years: float) -> float:
    """Initiating frequency per year of a cause with a mean time between events (years)."""
    return 1.0 / _positive(mtbf_years, "mtbf_years")


def frequency_per_year_from_rate_per_hour(rate_per_hour: float) -> float:
    """Convert a rate per hour to a frequency per year (x 8760)."""
    return _positive(rate_per_hour, "rate_per_hour") * HOURS_PER_YEAR


def mitigated_frequency(initiating_frequency_per_year: float, pfds: Sequence[float]) -> float:
    """Event frequency after all layers: initiating frequency x product of PFDs."""
    freq = _positive(initiating_frequency_per_year, "initiating_frequency_per_year")
    for i, p in enumerate(pfds):
        freq *= _open_probability(p, f"pfds[{i}]")
    return freq


def classify_requirement(required_pfd: float) -> tuple[str, int | None]:
    """Outcome and required SIL for a required SIF PFDavg (see module docstring)."""
    edge = 1.0 - 1e-9  # same rounding allowance as the SIL band lookup
    if required_pfd >= 1.0 * edge:
        return NO_SIF_NEEDED, 0
    if required_pfd >= 0.1 * edge:
        return BELOW_SIL1, 0
    if required_pfd < 1e-5 * edge:
        return BEYOND_SIL4, None
    return SIL_NEEDED, sil_from_pfd(required_pfd)


def evaluate_scenario(scenario: Scenario) -> ScenarioResult:
    """Required SIF PFDavg of one scenario, with the arithmetic as steps."""
    steps: list[tuple[str, float]] = []
    f_ie = 0.0
    for cause in scenario.causes:
        steps.append((f"initiating cause '{cause.name}' (per year)", cause.frequency_per_year))
        f_ie += cause.frequency_per_year
    steps.append(("sum of initiating frequencies (per year)", f_ie))
    p_layers = 1.0
    for layer in scenario.layers:
        steps.append((f"PFD of protection layer '{layer.name}'", layer.pfd))
        p_layers *= layer.pfd
    steps.append(("product of protection layer PFDs", p_layers))
    p_mod = 1.0
    for mod in scenario.modifiers:
        steps.append((f"conditional modifier '{mod.name}'", mod.probability))
        p_mod *= mod.probability
    steps.append(("product of conditional modifiers", p_mod))
    f_without = f_ie * p_layers * p_mod
    steps.append(("frequency without the SIF (per year) = sum x layers x modifiers", f_without))
    steps.append(("tolerable frequency (per year)", scenario.tolerable_frequency_per_year))
    required = scenario.tolerable_frequency_per_year / f_without
    steps.append(("required SIF PFDavg = tolerable / frequency without the SIF", required))
    rrf = 1.0 / required
    steps.append(("required RRF = 1 / required PFDavg", rrf))
    outcome, sil = classify_requirement(required)
    return ScenarioResult(
        name=scenario.name, initiating_frequency_per_year=f_ie, layers_pfd_product=p_layers,
        modifiers_product=p_mod, frequency_without_sif_per_year=f_without,
        required_pfd_avg=required, required_rrf=rrf, required_sil=sil, outcome=outcome,
        outcome_text=_OUTCOME_TEXT[outcome], steps=tuple(steps),
    )


def evaluate_scenarios(scenarios: Sequence[Scenario]) -> LopaResult:
    """Evaluate every scenario of one SIF; the smallest required PFDavg governs.

    On a tie the first scenario in the given order governs.
    """
    items = tuple(scenarios)
    if not items:
        raise InputError("scenarios", "at least one scenario is needed")
    results = []
    for i, sc in enumerate(items):
        if not isinstance(sc, Scenario):
            raise InputError(f"scenarios[{i}]", "must be a Scenario")
        results.append(evaluate_scenario(sc))
    governing = min(range(len(results)), key=lambda i: (results[i].required_pfd_avg, i))
    return LopaResult(scenarios=tuple(results), governing=governing)
