"""Every chart of the project, for the SIF page (SVG) and the evidence pack (PNG at print
resolution): one drawing per chart, one scaling, one set of SIL bands.

Both charts must read in black and white and on paper: the SIL bands differ by hatch
pattern and carry their name as text, the target is a dashed line with a label, and
series differ by line style and marker, not only by colour. On the PFD(t) chart each
observed episode (a failure found, from its estimated onset to its restoration) is a
vertical band with its own hatch, and the moment it was found a dotted vertical line.
"""

from __future__ import annotations

import datetime as dt
import io

import matplotlib

matplotlib.use("Agg")
import matplotlib.dates as mdates
from django.core.cache import cache
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure
from matplotlib.ticker import FuncFormatter, LogLocator, NullFormatter

from register.calculations import calculations

#: Hatch per SIL band: distinct patterns so bands differ without colour.
BAND_HATCH = {1: "////", 2: "\\\\\\\\", 3: "xxx", 4: "...."}
BAND_GREY = {1: "#f2f2f2", 2: "#e4e4e4", 3: "#d6d6d6", 4: "#c8c8c8"}
WIDTH_IN, HEIGHT_IN = 9.0, 3.6
CHART_SIZE = (WIDTH_IN, HEIGHT_IN)
#: The pack's charts (``register.audit.evidence.chart``): sized for an A4 page.
PACK_WIDTH_IN, PACK_HEIGHT_IN = 7.2, 2.8
#: Observed episodes: vertical bands, hatched unlike any SIL band.
EPISODE_HATCH = "||"
EPISODE_FACE = "#f6d8d8"
EPISODE_EDGE = "#7a1f1f"
EPISODE_LABEL = "failed channel: possible onset to restoration"
FOUND_LABEL = "failure found"


#: Every text drawn is plain text: a tag or name holding "$" (``XV-$1``, ``T$_$``) is
#: printed as written, never read as matplotlib math, which it could break.
PLAIN = {"parse_math": False}


def _figure(title: str, size=(WIDTH_IN, HEIGHT_IN), dpi=100, fontsize=11):
    """A figure of its own (no pyplot state, so safe in threads) with one titled axis."""
    fig = Figure(figsize=size, dpi=dpi)
    FigureCanvasAgg(fig)
    ax = fig.add_subplot(1, 1, 1)
    ax.set_title(title, fontsize=fontsize, loc="left", **PLAIN)
    ax.grid(True, which="major", color="#999999", linewidth=0.4, linestyle=":")
    return fig, ax


def _shade_bands(ax, low: float, high: float, mode: str = "low"):
    """Shade the SIL bands that fall inside the visible range, labelled at the right."""
    for sil in (1, 2, 3, 4):
        lo, hi = calculations().sil_band(sil, mode)
        if hi <= low or lo >= high:
            continue
        ax.axhspan(max(lo, low), min(hi, high), facecolor=BAND_GREY[sil],
                   hatch=BAND_HATCH[sil], edgecolor="#9a9a9a", linewidth=0, zorder=0)
        mid = (max(lo, low) * min(hi, high)) ** 0.5
        ax.text(1.01, mid, f"SIL {sil}", transform=ax.get_yaxis_transform(),
                va="center", ha="left", fontsize=9, **PLAIN)


def _target(ax, target: float | None):
    if target:
        ax.axhline(target, color="black", linestyle="--", linewidth=1.4, zorder=3)
        ax.annotate(f"target {target:.1e}", xy=(0.005, target), xycoords=("axes fraction",
                    "data"), xytext=(0, 3), textcoords="offset points", fontsize=9,
                    bbox={"facecolor": "white", "edgecolor": "none", "pad": 1}, **PLAIN)


def _limits(values, target):
    data = [v for v in values if v and v > 0]
    if target:
        data.append(target)
    if not data:
        return 1e-5, 1e-1
    low = min(data) / 3
    high = max(data) * 3
    return max(low, 1e-7), min(max(high, low * 10), 1.0)


def shade_episodes(ax, episodes, start: dt.datetime | None = None,
                   end: dt.datetime | None = None) -> int:
    """Shade each observed episode from its estimated onset (``onset_from``) to its
    restoration (``restored_at``), clipped to ``start``..``end``, and mark the moment it was
    found (``onset_to``) with a dotted line. Episodes carry datetimes (``presenters.observed_episodes``).
    Adds one legend entry for the bands and one for the marks; returns how many were drawn.
    """
    drawn = 0
    found = []
    for ep in episodes or []:
        lo, hi = ep["onset_from"], ep["restored_at"]
        if start is not None:
            lo = max(lo, start)
        if end is not None:
            hi = min(hi, end)
        if hi <= lo:
            continue
        ax.axvspan(lo, hi, facecolor=EPISODE_FACE, edgecolor=EPISODE_EDGE, hatch=EPISODE_HATCH,
                   linewidth=0.6, alpha=0.75, zorder=1,
                   label=EPISODE_LABEL if drawn == 0 else None)
        at = ep.get("onset_to")
        if at is not None and lo <= at <= hi:
            found.append(at)
        drawn += 1
    for i, at in enumerate(found):
        ax.axvline(at, color=EPISODE_EDGE, linestyle=(0, (1, 1.5)), linewidth=1.3, zorder=5,
                   label=FOUND_LABEL if i == 0 else None)
    return drawn


def _log_axis(ax, low: float, high: float):
    """Log scale with plain tick labels (1e-03), no math text."""
    ax.set_yscale("log")
    ax.set_ylim(low, high)
    ax.yaxis.set_major_locator(LogLocator(base=10, numticks=12))
    ax.yaxis.set_major_formatter(FuncFormatter(lambda v, _: f"{v:.0e}"))
    ax.yaxis.set_minor_formatter(NullFormatter())


def _save(fig, fmt: str) -> bytes:
    fig.tight_layout(pad=0.5)
    buf = io.BytesIO()
    fig.savefig(buf, format=fmt)
    return buf.getvalue()


def _svg(fig) -> bytes:
    return _save(fig, "svg")


def _draw_pfd(ax, times, values, target, start=None, end=None, episodes=None):
    """PFD(t): sawtooth from the recorded tests, target line, SIL bands hatched, and the
    observed episodes (see ``shade_episodes``) within ``start``..``end`` (default: the
    plotted times)."""
    values = [max(float(v), 1e-9) for v in values]
    low, high = _limits(values, target)
    _shade_bands(ax, low, high)
    if times:
        start = start or min(times)
        end = end or max(times)
        ax.plot(times, values, color="black", linewidth=1.3, label="PFD(t)", zorder=4)
        shade_episodes(ax, episodes, start, end)
        if end > start:
            ax.set_xlim(start, end)
    _target(ax, target)
    _log_axis(ax, low, high)
    ax.set_ylabel("PFD(t)", **PLAIN)
    ax.xaxis.set_major_formatter(mdates.DateFormatter("%Y-%m"))
    ax.legend(loc="lower right", fontsize=8, framealpha=1)


def pfd_chart(times: list[dt.datetime], values, target: float | None, tag: str,
              episodes=None) -> bytes:
    """The SIF page's PFD(t) chart (SVG)."""
    fig, ax = _figure(f"{tag}: probability of failure on demand over time")
    _draw_pfd(ax, times, list(values), target, episodes=episodes)
    return _svg(fig)


def trend_chart(points: list[tuple[dt.datetime, float | None, float | None]],
                target: float | None, tag: str) -> bytes:
    """Achieved (last 12 months) and design PFDavg of the stored assessments over time."""
    fig, ax = _figure(f"{tag}: achieved PFDavg at each recalculation")
    achieved = [(t, a) for t, a, _ in points if a]
    design = [(t, d) for t, _, d in points if d]
    low, high = _limits([a for _, a in achieved] + [d for _, d in design], target)
    _shade_bands(ax, low, high)
    if achieved:
        ax.plot([t for t, _ in achieved], [a for _, a in achieved], color="black",
                linestyle="-", marker="o", markersize=4, label="achieved, last 12 months",
                zorder=4)
    if design:
        ax.plot([t for t, _ in design], [d for _, d in design], color="#333333",
                linestyle=":", marker="s", markersize=3, label="design", zorder=4)
    if not points:
        ax.text(0.5, 0.5, "No calculation stored yet", transform=ax.transAxes,
                ha="center", va="center", **PLAIN)
    _target(ax, target)
    _log_axis(ax, low, high)
    times = [t for t, _, _ in points]
    if times and max(times) - min(times) < dt.timedelta(days=30):
        middle = min(times) + (max(times) - min(times)) / 2
        ax.set_xlim(middle - dt.timedelta(days=15), middle + dt.timedelta(days=15))
    ax.set_ylabel("PFDavg", **PLAIN)
    ax.xaxis.set_major_formatter(mdates.DateFormatter("%Y-%m-%d"))
    fig.autofmt_xdate()
    if points:
        ax.legend(loc="lower right", fontsize=8, framealpha=1)
    return _svg(fig)


#: How long a drawn chart stays cached. The key names everything the drawing depends on,
#: so a change of inputs misses the cache at once; the time limit only frees space.
CHART_CACHE_SECONDS = 7 * 24 * 3600


def chart_cache_key(kind: str, digest: str, size=CHART_SIZE, *extra) -> str:
    """The cache key of one chart: its kind, size, the assessment's inputs digest and
    anything else the drawing depends on (the window's end day, the newest snapshot)."""
    parts = [kind, f"{size[0]}x{size[1]}", digest, *(str(x) for x in extra)]
    return "chart:" + ":".join(parts)


def cached_chart(kind: str, digest: str | None, draw, size=(WIDTH_IN, HEIGHT_IN),
                 *extra) -> bytes:
    """``draw()`` once per key (see ``chart_cache_key``); without a digest (no assessment
    stored yet) the chart is drawn every time."""
    if not digest:
        return draw()
    key = chart_cache_key(kind, digest, size, *extra)
    chart = cache.get(key)
    if chart is None:
        chart = draw()
        cache.set(key, chart, CHART_CACHE_SECONDS)
    return chart
