"""Does a SIF meet its target? One rule, every criterion named.

The register stores the verdict with each assessment; the SIF page, the overview counts,
the register filter, the API, the evidence pack and the notifications all read that one
stored result, so they cannot disagree.

A SIF meets its target only when every line passes:

* design PFDavg <= target (low demand) or design PFH <= target PFH (high demand);
* achieved PFDavg over the last 12 months <= target (low demand);
* observed unavailability over the last 12 months <= target (low demand): the share of
  the time the function could not act, estimated from the failures actually found;
* projected PFDavg until the next due full test <= target (low demand);
* architectural SIL (hardware fault tolerance) >= target SIL
  (IEC 61511-1:2016 clause 11.4);
* systematic capability of every device >= target SIL (IEC 61511-1:2016 clause 11.5).

Each line is "pass", "fail" or "unknown" (not calculable) with its reason in plain words.
Overall: False when any line fails, True when every line passes, None otherwise (the SIF
is not shown to meet its target, and the page says which line could not be calculated).
Pure Python: no Django import, no clock.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass

PASS = "pass"
FAIL = "fail"
UNKNOWN = "unknown"

DESIGN = "design"
ACHIEVED = "achieved_12m"
OBSERVED = "observed_12m"
PROJECTED = "projected"
ARCHITECTURE = "architecture"
SYSTEMATIC = "systematic"
CRITERIA = (DESIGN, ACHIEVED, OBSERVED, PROJECTED, ARCHITECTURE, SYSTEMATIC)

LABELS = {
    DESIGN: "Design PFDavg within target",
    ACHIEVED: "Achieved PFDavg, last 12 months, within target",
    OBSERVED: "Observed unavailability, last 12 months, within target",
    PROJECTED: "Projected PFDavg until the next due test within target",
    ARCHITECTURE: "Architecture (hardware fault tolerance) allows the target SIL",
    SYSTEMATIC: "Systematic capability of every device reaches the target SIL",
}


@dataclass(frozen=True)
class Line:
    key: str
    label: str
    status: str
    reason: str
    value: float | None = None
    limit: float | None = None


@dataclass(frozen=True)
class Verdict:
    meets: bool | None
    lines: tuple[Line, ...]

    @property
    def failed(self) -> tuple[Line, ...]:
        return tuple(x for x in self.lines if x.status == FAIL)

    @property
    def unknown(self) -> tuple[Line, ...]:
        return tuple(x for x in self.lines if x.status == UNKNOWN)

    def summary(self) -> str:
        """One sentence: the overall verdict and the lines that decide it."""
        if self.meets:
            return "Meets its target: every criterion holds."
        if self.meets is False:
            return "Does not meet its target: " + "; ".join(x.reason for x in self.failed) + "."
        return ("Not shown to meet its target: "
                + "; ".join(x.reason for x in self.unknown) + ".")

    def as_dict(self) -> dict:
        return {"meets": self.meets, "summary": self.summary(),
                "lines": [asdict(x) for x in self.lines]}


def _figure(key: str, what: str, value: float | None, target: float | None,
            missing: str) -> Line:
    label = LABELS[key]
    if target is None:
        return Line(key, label, UNKNOWN, "no PFDavg target is set (no target and no LOPA "
                                         "scenario giving one)")
    if value is None:
        return Line(key, label, UNKNOWN, missing, None, target)
    if value <= target:
        return Line(key, label, PASS, f"{what} {value:.2e} is within the target {target:.2e}",
                    value, target)
    return Line(key, label, FAIL, f"{what} {value:.2e} is above the target {target:.2e}",
                value, target)


def _sil_line(key: str, value: int | None, target_sil: int | None, what: str, unit: str,
              missing: str) -> Line:
    """A line comparing a SIL-like level (architecture, systematic capability) with the
    target SIL."""
    if target_sil is None:
        return Line(key, LABELS[key], UNKNOWN, "no target SIL is set")
    if value is None:
        return Line(key, LABELS[key], UNKNOWN, missing)
    if value >= target_sil:
        return Line(key, LABELS[key], PASS, f"{what} {unit} {value}, target SIL {target_sil}",
                    value, target_sil)
    return Line(key, LABELS[key], FAIL,
                f"{what} only {unit} {value}, below the target SIL {target_sil}", value,
                target_sil)


def judge(*, target_sil: int | None, low_demand: bool = True,
          target_pfd_avg: float | None = None, target_pfh_per_hour: float | None = None,
          design_pfd_avg: float | None = None, design_pfh_per_hour: float | None = None,
          achieved_pfd_avg_12m: float | None = None,
          observed_unavailability_12m: float | None = None,
          projected_pfd_avg: float | None = None, projection_missing: str | None = None,
          architectural_sil: int | None = None, systematic_capability: int | None = None,
          error: str | None = None) -> Verdict:
    """The verdict from the figures of one assessment (see the module docstring)."""
    lines: list[Line] = []
    if error:
        why = f"the calculation failed: {error}"
        lines = [Line(k, LABELS[k], UNKNOWN, why) for k in CRITERIA]
        return Verdict(None, tuple(lines))
    if low_demand:
        lines.append(_figure(DESIGN, "design PFDavg", design_pfd_avg, target_pfd_avg,
                             "the design PFDavg could not be calculated"))
        lines.append(_figure(ACHIEVED, "achieved PFDavg over the last 12 months",
                             achieved_pfd_avg_12m, target_pfd_avg,
                             "the achieved PFDavg could not be calculated"))
        lines.append(_figure(OBSERVED, "observed unavailability over the last 12 months",
                             observed_unavailability_12m, target_pfd_avg,
                             "the observed unavailability could not be calculated"))
        lines.append(_figure(PROJECTED, "projected PFDavg until the next due test",
                             projected_pfd_avg, target_pfd_avg,
                             projection_missing or "no full proof test is due (no plan)"))
    else:
        label = LABELS[DESIGN].replace("PFDavg", "PFH")
        if target_pfh_per_hour is None:
            lines.append(Line(DESIGN, label, UNKNOWN, "no PFH target is set"))
        elif design_pfh_per_hour is None:
            lines.append(Line(DESIGN, label, UNKNOWN, "the design PFH could not be calculated"))
        elif design_pfh_per_hour <= target_pfh_per_hour:
            lines.append(Line(DESIGN, label, PASS,
                              f"design PFH {design_pfh_per_hour:.2e}/h is within the target "
                              f"{target_pfh_per_hour:.2e}/h", design_pfh_per_hour,
                              target_pfh_per_hour))
        else:
            lines.append(Line(DESIGN, label, FAIL,
                              f"design PFH {design_pfh_per_hour:.2e}/h is above the target "
                              f"{target_pfh_per_hour:.2e}/h", design_pfh_per_hour,
                              target_pfh_per_hour))
        for key in (ACHIEVED, OBSERVED, PROJECTED):
            lines.append(Line(key, LABELS[key], UNKNOWN,
                              "a PFDavg is a low-demand measure; this function runs in high "
                              "demand or continuous mode"))
    lines.append(_sil_line(ARCHITECTURE, architectural_sil, target_sil, "the architecture allows",
                           "SIL", "the architectural limit could not be determined"))
    lines.append(_sil_line(SYSTEMATIC, systematic_capability, target_sil,
                           "the lowest systematic capability is", "SC",
                           "no systematic capability is recorded for the devices"))
    statuses = {x.status for x in lines}
    meets = False if FAIL in statuses else (True if statuses == {PASS} else None)
    return Verdict(meets, tuple(lines))
