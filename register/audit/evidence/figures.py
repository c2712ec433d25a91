"""The pack's figures: achieved PFDavg over the period and the PFD(t) series of each SIF's
chart, from one engine run per SIF (the chart is drawn from the series, see ``chart``)."""

from __future__ import annotations

from register import presenters
from register.audit.evidence import chart
from register.audit.evidence.collect import (
    CHART_POINTS,
    Collected,
    _iso,
    _utc,
    as_of,
)
from register.calculations import calculations
from register.models import (
    EvidencePack,
)

# ---------------------------------------------------------------------------------------
# Figures: PFD(t) series and achieved PFDavg over the period
# ---------------------------------------------------------------------------------------


def figures(pack: EvidencePack, col: Collected, progress=None) -> dict[int, dict]:
    """Chart series per SIF (``chart.series``: what its chart is drawn from) and the
    achieved PFDavg over the period itself (set on each entry)."""
    if not col.loaded:
        return {}
    site = pack.site
    t0 = _utc(pack.period_start)
    t1 = min(_utc(pack.period_end, end=True), as_of(pack))
    types = {c.obj.device_type_id for d in col.loaded.values() for c in d.all_components()}
    rates = calculations().rate_table(site, calculations().device_type_stats(site.pk, t1.date(), types),
                               as_of=t1.date())
    charts = {}
    n = len(col.sifs)
    for i, entry in enumerate(col.sifs):
        d = col.loaded[entry["id"]]
        start = t0
        first_service = min((c.obj.in_service_on for c in d.all_components()), default=None)
        if first_service:
            start = max(start, _utc(first_service))
        if start >= t1:
            entry["chart_note"] = "Not in service during the period."
            continue
        try:
            achieved, times, values = calculations().period_figures(d, rates, start, t1,
                                                             CHART_POINTS)
            entry["period_achieved_pfd_avg"] = achieved
            entry["period_window"] = [_iso(start), _iso(t1)]
            episodes = presenters.observed_episodes(
                (entry.get("assessment") or {}).get("detail"))
            charts[entry["id"]] = chart.series(entry["tag"], times, list(values),
                                               entry.get("target_pfd_avg"), start, t1, episodes)
        except calculations().EngineError as exc:
            entry["chart_note"] = f"No chart: {exc}"
        if progress and (i % 10 == 0 or i == n - 1):
            progress(25 + int(40 * (i + 1) / n), f"Charts {i + 1} of {n}")
    return charts
