"""Observed unavailability of a SIF: how much of the time it really could not act.

The achieved PFDavg (:mod:`calcs.engine.history`) is an expectation made before the
tests were done: it says what the recorded test dates and rates lead one to expect.
This module reads the same record after the fact: a dangerous undetected (DU) failure
found by a proof test, or revealed by a real demand on which the device failed to act,
means the channel was failed for part of the time before it was found.

Model (rates per hour, times in hours)
--------------------------------------
Per channel, a DU failure found at t_k had an unknown onset after the last earlier
event that would have revealed it:

    t_prev = the latest of the in-service date (or an overhaul), the end of the last
             restoration, and the last earlier test of that channel whose coverage is at
             least that of the finding test (a real demand counts as coverage 1).

With lambda = the channel's lambda_DU x the finding test's coverage (a demand: 1), the
onset is taken as exponentially distributed and conditioned on falling in
(t_prev, t_k], so the probability that the channel was already failed at t is

    q(t) = (1 - exp(-lambda (t - t_prev))) / (1 - exp(-lambda (t_k - t_prev)))

for t in (t_prev, t_k] (the limit (t - t_prev)/(t_k - t_prev) as lambda -> 0, whose
mean over the interval is 1/2: "failed for about half the interval", common practice);
q = 1 during the restoration (t_k, t_k + restore time], which a later passing test of
the channel ends early; q = 0 elsewhere.

A group (MooN) combines its channels by exact k-out-of-n counting of independent
episodes, except that channels of one group found failed on the same (UTC) day form one
common-cause episode: they share one onset (after the latest of their t_prev), so while
it lasts they fail together with that one q(t). The group is failed when at least
N - M + 1 channels are failed. Subsystems are in series: Q = 1 - prod(1 - Q_group); an
uncompensated bypass makes Q = 1. The observed unavailability is the time average of Q
over the window; with it come the equivalent unavailable hours and the episodes.

Pure Python (numpy); no web framework, no clock.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from datetime import datetime

import numpy as np

from calcs.engine import history as _h
from calcs.engine.errors import InputError
from calcs.engine.voting import parse_voting

#: Findings of one group on the same day (24 h, UTC calendar day) share one onset.
SAME_DAY_HOURS = 24.0


@dataclass(frozen=True)
class Episode:
    """One stretch during which a channel (or several, common cause) was failed."""

    group: str
    channels: tuple[int, ...]  # 0-based channel indexes in the group
    onset_from: datetime  # the onset lies after this moment ...
    found_at: datetime  # ... and before this one (the finding)
    restored_at: datetime
    found_by: str
    common_cause: bool
    hours_in_window: float  # expected failed hours inside the window (one channel)


@dataclass(frozen=True)
class ObservedResult:
    unavailability: float
    window_start: datetime
    window_end: datetime
    hours: float
    unavailable_hours: float
    groups: dict[str, float]
    bypass_hours: float
    episodes: tuple[Episode, ...]
    flags: tuple[str, ...] = ()


@dataclass
class _Ep:
    group: int
    channels: tuple[int, ...]
    a: float  # t_prev
    b: float  # first finding
    lam: float
    found_by: str
    restored: dict[int, float] = field(default_factory=dict)  # per channel
    found: dict[int, float] = field(default_factory=dict)  # per channel finding time


def _q(t: np.ndarray, a: float, b: float, lam: float) -> np.ndarray:
    """q(t) of one episode on (a, b] (zero outside)."""
    out = np.zeros(t.shape)
    if b <= a:
        return out
    inside = (t > a) & (t <= b)
    if not inside.any():
        return out
    u = t[inside] - a
    big = lam * (b - a)
    if big < 1e-9:
        out[inside] = u / (b - a)
    else:
        out[inside] = np.expm1(-lam * u) / math.expm1(-big)
    return out


def _q_integral(a: float, b: float, lam: float, lo: float, hi: float) -> float:
    """Integral of q over (lo, hi] for the episode on (a, b] (closed form)."""
    lo, hi = max(lo, a), min(hi, b)
    if hi <= lo or b <= a:
        return 0.0
    big = lam * (b - a)
    u0, u1 = lo - a, hi - a
    if big < 1e-9:
        return (u1 * u1 - u0 * u0) / (2.0 * (b - a))
    # integral of (1 - exp(-lam u)) du = u + exp(-lam u)/lam
    num = (u1 - u0) + (math.exp(-lam * u1) - math.exp(-lam * u0)) / lam
    return num / (-math.expm1(-big))


def _overlap(s: float, e: float, lo: float, hi: float) -> float:
    return max(0.0, min(e, hi) - max(s, lo))


def _episodes(sif: _h.SifHistory, cutoff_h: float, flags: list[str],
              resolved: list[list[list[_h._Event]]] | None = None) -> list[_Ep]:
    """Every finding of every channel, same-day findings of a group merged. ``resolved``:
    the channels' tests up to ``cutoff_h`` already resolved (per group and channel, see
    :attr:`calcs.engine.history.PreparedHistory.resolved_events`)."""
    out: list[_Ep] = []
    for gi, g in enumerate(sif.groups):
        v = parse_voting(g.voting)
        single: list[_Ep] = []
        same = all(c is g.channels[0] for c in g.channels)
        for ci, ch in enumerate(g.channels):
            label = f"{g.name} channel {ci + 1}" if v.n > 1 and not same else g.name
            ins = _h._hours(ch.in_service, "in_service")
            renewals = [ins]
            if ch.overhaul_at is not None:
                oh = _h._hours(ch.overhaul_at, "overhaul_at")
                if ins <= oh <= cutoff_h:
                    renewals.append(oh)
            if resolved is not None:
                events = resolved[gi][ci]
            else:
                events = [e for e in _h._channel_events(ch, label, ins, cutoff_h, flags)
                          if not e.after_cutoff]
            for k, ev in enumerate(events):
                if not ev.failed:
                    continue
                cov = 1.0 if ev.kind == "demand" else ev.coverage
                t_prev = max(r for r in renewals if r <= ev.at_h)
                for earlier in events[:k]:
                    if earlier.at_h >= ev.at_h:
                        continue
                    if earlier.failed:
                        if earlier.restored_h <= ev.at_h:
                            t_prev = max(t_prev, earlier.restored_h)
                        continue
                    ecov = 1.0 if earlier.kind == "demand" else earlier.coverage
                    if ecov >= cov - 1e-12:
                        t_prev = max(t_prev, earlier.at_h)
                single.append(_Ep(gi, (ci,), t_prev, ev.at_h, float(ch.lambda_du) * cov,
                                  ev.kind, {ci: ev.restored_h}, {ci: ev.at_h}))
        # merge same-day findings of different channels into one common-cause episode
        single.sort(key=lambda e: e.b)
        merged: list[_Ep] = []
        for ep in single:
            day = math.floor(ep.b / SAME_DAY_HOURS)
            host = next((m for m in merged
                         if math.floor(m.b / SAME_DAY_HOURS) == day
                         and not set(m.channels) & set(ep.channels)), None)
            if host is None:
                merged.append(ep)
                continue
            n_before = len(host.channels)
            host.channels = host.channels + ep.channels
            host.a = min(max(host.a, ep.a), host.b)
            host.lam = (host.lam * n_before + ep.lam) / len(host.channels)
            host.restored.update(ep.restored)
            host.found.update(ep.found)
        out.extend(merged)
    return out


def _group_q(n: int, m: int, eps: list[_Ep], t: np.ndarray) -> np.ndarray:
    """Q_group(t): probability that at least N - M + 1 channels are failed."""
    f = n - m + 1
    q_ind = np.zeros((n, t.size))
    blocks: list[tuple[int, np.ndarray]] = []
    for ep in eps:
        pre = _q(t, ep.a, ep.b, ep.lam)
        if len(ep.channels) == 1:
            # a channel's episodes do not overlap (each starts after the last restoration);
            # a finding during an earlier repair must not count the channel twice
            np.maximum(q_ind[ep.channels[0]], pre, out=q_ind[ep.channels[0]])
        else:
            blocks.append((len(ep.channels), pre))
        for ci in ep.channels:
            # known failed from the first finding to this channel's restoration
            down = (t > ep.b) & (t <= ep.restored[ci])
            q_ind[ci][down] = 1.0
    np.minimum(q_ind, 1.0, out=q_ind)
    dist = np.zeros((n + 1, t.size))
    dist[0] = 1.0
    items = [(1, q_ind[i]) for i in range(n)] + blocks
    for size, q in items:
        new = dist * (1.0 - q)
        new[size:] += dist[:-size] * q
        dist = new
    return np.clip(dist[f:].sum(axis=0), 0.0, 1.0)


def observed_unavailability(sif: _h.SifHistory, window_start=None, window_end=None, *,
                            as_of=None, order: int = 8,
                            max_piece_hours: float = 2190.0) -> ObservedResult:
    """Observed unavailability of ``sif`` over [window_start, window_end].

    Window and evaluation date as in :func:`calcs.engine.history.achieved_pfd`
    (``window_start`` None = 12 calendar months before the end, "in_service" = from the
    date every channel is in service). Records after ``as_of`` are not used.
    """
    if window_end is None:
        raise InputError("window_end", "an evaluation date is required")
    end_h = _h._hours(window_end, "window_end")
    p = _h.PreparedHistory(sif, window_end if as_of is None else as_of)
    prepared = p.compiled(end_h), _episodes(sif, p.as_of_h, [], p.resolved_events)
    return _evaluate(sif, prepared, window_start, window_end, order, max_piece_hours)


def _evaluate(sif: _h.SifHistory, prepared, window_start, window_end, order: int = 8,
              max_piece_hours: float = 2190.0) -> ObservedResult:
    return _evaluate_many(sif, prepared, [(window_start, window_end)], order,
                          max_piece_hours)[0]


def _evaluate_many(sif: _h.SifHistory, prepared, windows, order: int = 8,
                   max_piece_hours: float = 2190.0) -> list[ObservedResult]:
    """Each (start, end) window, the nodes of every window evaluated in one pass."""
    c, eps = prepared  # c: bypasses, start of service, flags
    spans = []
    for window_start, window_end in windows:
        end_h = _h._hours(window_end, "window_end")
        flags = list(c.flags)
        a = _h._resolve_start(c, window_start, _h._as_utc_naive(window_end, "window_end"))
        a, b = _h._window(c, a, end_h, flags)
        bounds = [a, b]
        for ep in eps:
            bounds += [ep.a, ep.b, *ep.restored.values()]
        events = _h.sorted_unique(np.concatenate([np.array(bounds, dtype=float), c.byp_s,
                                                  c.byp_e]))
        t, w = _h._nodes(events, a, b, int(order), float(max_piece_hours))
        spans.append((a, b, t, w, flags, _h._is_aware(window_end)))
    t = np.concatenate([x[2] for x in spans])
    cuts = np.cumsum([0] + [x[2].size for x in spans])
    log_up = np.zeros(t.shape)
    q_groups = []
    for gi, g in enumerate(sif.groups):
        v = parse_voting(g.voting)
        qg = _group_q(v.n, v.m, [e for e in eps if e.group == gi], t)
        q_groups.append(qg)
        with np.errstate(divide="ignore"):
            log_up += np.log1p(-qg)
    q_sif = -np.expm1(log_up)
    if c.byp_s.size:
        q_sif[_h._in_intervals(t, c.byp_s, c.byp_e, t.size)] = 1.0  # right limit
    out = []
    for k, (a, b, _, w, flags, aware) in enumerate(spans):
        lo, hi = cuts[k], cuts[k + 1]
        span = b - a
        groups = {g.name: float(np.dot(w, q_groups[gi][lo:hi]) / span)
                  for gi, g in enumerate(sif.groups)}
        value = float(np.dot(w, q_sif[lo:hi]) / span)
        out_eps = []
        for ep in sorted(eps, key=lambda e: e.b):
            g = sif.groups[ep.group]
            restored = max(ep.restored.values())
            hours = _q_integral(ep.a, ep.b, ep.lam, a, b) + _overlap(ep.b, restored, a, b)
            out_eps.append(Episode(
                group=g.name, channels=tuple(sorted(ep.channels)),
                onset_from=_h._to_dt(ep.a, aware), found_at=_h._to_dt(ep.b, aware),
                restored_at=_h._to_dt(restored, aware), found_by=ep.found_by,
                common_cause=len(ep.channels) > 1, hours_in_window=hours))
        out.append(ObservedResult(
            unavailability=value, window_start=_h._to_dt(a, aware),
            window_end=_h._to_dt(b, aware), hours=span, unavailable_hours=value * span,
            groups=groups, bypass_hours=_h._bypass_hours(c, a, b), episodes=tuple(out_eps),
            flags=tuple(dict.fromkeys(flags))))
    return out


def observed_windows(sif: _h.SifHistory, windows, *, as_of,
                     prepared: _h.PreparedHistory | None = None) -> list[ObservedResult]:
    """Several windows sharing one evaluation date (prepared once; ``prepared``: the same
    SIF and evaluation date already prepared by :func:`calcs.engine.history.prepare`)."""
    p = prepared if prepared is not None else _h.PreparedHistory(sif, as_of)
    both = p.compiled(), _episodes(sif, p.as_of_h, [], p.resolved_events)
    return _evaluate_many(sif, both, windows)


def achieved_and_observed_windows(sif: _h.SifHistory, windows, *, as_of,
                                  prepared: _h.PreparedHistory | None = None
                                  ) -> tuple[list[_h.HistoryResult], list[ObservedResult]]:
    """:func:`calcs.engine.history.achieved_pfd_windows` and :func:`observed_windows` of
    the same SIF, windows and evaluation date, with the history model prepared once
    (``prepared``: already prepared for this SIF and date; a projection may reuse it)."""
    p = prepared if prepared is not None else _h.PreparedHistory(sif, as_of)
    return p.windows(windows), observed_windows(sif, windows, as_of=as_of, prepared=p)
