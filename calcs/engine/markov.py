"""Exact periodic Markov model of one voted group (low demand PFDavg).

The design equations of :mod:`calcs.engine.design` are linearised and multiply mean
down times as if they were independent. This module computes the time-average
unavailability of one voted group of identical channels exactly (up to floating point),
so that the design figure can be checked against it.

Model
-----
A channel has two independent failure processes, and it is down while either of them
has it down:

* the **detected** process: ``ok`` -> ``det`` at lambda_DD (for 1oo2D also
  lambda_SD), back to ``ok`` at rate 1/MTTR (the process keeps running during the
  repair); tests do not touch it;
* the **undetected** process, with three independent failure modes that differ in the
  test that reveals them: the partial test (share theta of lambda_DU), the full proof
  test (share PTC - theta) and only the renewal at the mission time (share 1 - PTC).
  A channel records the deepest mode it hides (``dup`` < ``duf`` < ``duu``), which is
  what decides when it works again; so a channel hiding a ``dup`` failure can still fail
  in the ``duf`` or ``duu`` mode, and a partial test does not restore a channel that
  also hides a ``duf`` failure. A revealed channel goes to ``rev`` and is repaired at
  rate 1/MRT (the process keeps running).

With MRT = 0 the undetected process is exactly the independent-modes model of the
partial stroke and imperfect proof test equations. With MRT > 0 the only simplification
is that the repair of a ``dup`` failure found by a partial test in a channel that stays
failed anyway (it also hides a deeper one) is not modelled, which can only add
unavailability.

Common cause: shocks at beta*lambda_DU*share move **every** channel that is ``ok`` or
hides only shallower failures to that ``du*`` state at once; shocks at
beta_D*lambda_DD move every ``ok`` channel of the detected process to ``det`` (for 1oo2D
to ``dcc``, a common cause detected failure, also repaired at 1/MTTR). The independent
rates are (1-beta) and (1-beta_D) times the rates; a single channel has the full rates.
A repair time of 0 means an immediate repair (a detected failure then never counts; a
revealed one goes straight to ``ok``).

Tests are instantaneous, perfect for what they cover, and done on all channels together:

* partial tests at j*T_PST inside every proof test cycle (the schedule restarts at each
  full test, which also reveals what the partial test reveals; a partial test interval
  of T1 or more means no partial tests): ``dup`` -> ``rev``;
* full proof tests at k*T1: ``dup``, ``duf`` -> ``rev``;
* renewal (PTC < 1 only) at the first proof test at or after the mission time MT, that
  is after ceil(MT/T1) cycles (MT itself when it is a multiple of T1; otherwise the
  mission is rounded up to whole cycles, which is conservative and never credits the
  renewal as an extra proof test): every ``du*`` -> ``rev``. A mission time of at most
  T1 means every failure is found at each proof test.

Failed state (the group cannot act on a demand):

* MooN: fewer than M channels are up (a channel with a detected failure, a hidden one or
  under repair is down; the group is not reconfigured, so a 2oo3 with one channel under
  repair needs both others);
* 1oo2D: the diagnostics take a channel with a detected fault offline and the group
  follows the other channel; so the group is failed when no channel is up, except when
  both channels have independent detected faults (both ``det``): both report a fault and
  the output goes to the safe state, not a dangerous failure. A common cause detected
  failure (``dcc``) counts as dangerous for its repair time, as the beta_D*lambda_DD*MTTR
  term of the IEC 61508-6 Annex B 1oo2D equation does. A channel under repair after a
  test (``rev``) is down without forcing the safe state (the process keeps running
  during that repair, as for every other voting).

PFDavg is the time average of the probability of the failed state over one period of
the test schedule, in the periodic steady state of that schedule. The period is T1 when
the proof test finds every undetected failure (PTC = 1, with or without partial tests)
and ceil(MT/T1)*T1 otherwise (then it is the average over the mission of the cycle that
repeats after every renewal, which is the same as the average starting from new channels
when nothing is still under repair at the renewal, e.g. MRT = MTTR = 0).

Computation
-----------
Both processes are lumped (a state counts how many channels are in each channel state;
the channels are identical and exchangeable). The detected process does not see the
tests, so it is in its stationary distribution, found with the GTH algorithm (additions
and divisions of positive numbers only, so small probabilities keep their relative
accuracy). Given a detected-process state with ``a`` channels down and an undetected
state with ``b`` channels down, the down channels form independent uniformly drawn sets,
so the chance that the group is failed is hypergeometric; averaging it over the
stationary detected process gives a weight g for every undetected state, and
PFDavg = time average of sum_b P(b, t) g(b).

For the undetected process, each segment of length L between two test events uses the
block exponential ``expm([[Q, g], [0, 0]] L)`` (Van Loan's construction with g as the
off-diagonal block): it gives both the transition matrix expm(Q L) and the time integral
of the failure probability over the segment. Segments are composed as (A, v) pairs
(transition matrix including the test map, integral vector), repeated segments by binary
powers, and the periodic steady state is found by repeated squaring of the period's
transition matrix; after the exponential every operation works on non-negative numbers.
Structures (states, test maps, generator patterns) are cached by channel count and the
channel states in use.
"""

from __future__ import annotations

import math
from functools import lru_cache
from itertools import combinations_with_replacement

import numpy as np
from scipy.linalg import expm

#: Largest number of channels the model accepts.
MAX_CHANNELS = 4

_OK, _DUP, _DUF, _DUU, _REV = "ok", "dup", "duf", "duu", "rev"
_DU_KINDS = (_DUP, _DUF, _DUU)
# Which du kinds each test event reveals.
_REVEALS = {"pst": (_DUP,), "full": (_DUP, _DUF), "mt": (_DUP, _DUF, _DUU)}
_REL_TIME = 1e-9  # times closer than this (relative) count as equal
_MIN_REPAIR_HOURS = 1e-9 / 3.6  # a repair time below a microsecond counts as immediate
_MIN_SHARE = 1e-9  # a share of lambda_DU below this counts as 0
_SETTLE_REPAIRS = 45.0  # repair times after which a repair still going is negligible


def _count_states(n: int, c: int) -> list[tuple[int, ...]]:
    """All count vectors of n channels over c channel states, all in state 0 first."""
    states = []
    for combo in combinations_with_replacement(range(c), n):
        counts = [0] * c
        for k in combo:
            counts[k] += 1
        states.append(tuple(counts))
    states.sort(key=lambda s: tuple(-x for x in s))
    return states


def _move(s: tuple[int, ...], sources: list[int], dst: int, count: int | None = None):
    """Move ``count`` channels from sources[0] (or every channel of ``sources``) to dst."""
    t = list(s)
    if count is not None:
        t[sources[0]] -= count
        t[dst] += count
        return tuple(t)
    for src in sources:
        t[dst] += t[src]
        t[src] = 0
    return tuple(t)


def _pattern(size: int, pairs) -> np.ndarray:
    g = np.zeros((size, size))
    for i, j, w in pairs:
        if i != j and w:
            g[i, j] += w
            g[i, i] -= w
    return g


class _UndetectedStructure:
    """States, test maps and generator patterns of the undetected process of n channels."""

    def __init__(self, n: int, cats: tuple[str, ...], revealed_to: str):
        pos = {name: i for i, name in enumerate(cats)}
        states = _count_states(n, len(cats))
        index = {s: i for i, s in enumerate(states)}
        size = len(states)
        self.size = size
        ok = pos[_OK]
        self.down = np.array([n - s[ok] for s in states])  # channels down in each state

        self.indep = {}   # one channel (ok or hiding shallower kinds) -> kind
        self.shock = {}   # every such channel -> kind, once
        for depth, kind in enumerate(_DU_KINDS):
            if kind not in pos:
                continue
            k = pos[kind]
            sources = [ok] + [pos[x] for x in _DU_KINDS[:depth] if x in pos]
            self.indep[kind] = _pattern(size, (
                (index[s], index[_move(s, [src], k, 1)], s[src])
                for s in states for src in sources if s[src]))
            self.shock[kind] = _pattern(size, (
                (index[s], index[_move(s, sources, k)], 1)
                for s in states if any(s[src] for src in sources)))
        self.repair = None
        if _REV in pos:
            r = pos[_REV]
            self.repair = _pattern(size, (
                (index[s], index[_move(s, [r], ok, 1)], s[r]) for s in states if s[r]))

        target = pos[revealed_to]
        self.events = {}  # test maps as 0/1 matrices (row: before, column: after)
        for event, kinds in _REVEALS.items():
            e = np.zeros((size, size))
            for i, s in enumerate(states):
                found = [pos[kind] for kind in kinds if kind in pos]
                t = _move(s, found, target) if found else s
                e[i, index[t]] = 1.0
            self.events[event] = e
        self.start = np.zeros(size)
        self.start[0] = 1.0
        # States without a channel under repair: closed between two tests.
        self.calm = np.array([i for i, s in enumerate(states)
                              if _REV not in pos or s[pos[_REV]] == 0])


@lru_cache(maxsize=128)
def _undetected_structure(n: int, cats: tuple[str, ...], revealed_to: str):
    return _UndetectedStructure(n, cats, revealed_to)


def _gth(q: dict[tuple[int, int], float], size: int) -> list[float]:
    """Stationary distribution of the generator with off-diagonal rates ``q`` (GTH).

    Only states reachable from state 0 get a probability (the others get 0).
    """
    reach = {0}
    todo = [0]
    while todo:
        i = todo.pop()
        for (a, b), rate in q.items():
            if a == i and rate > 0 and b not in reach:
                reach.add(b)
                todo.append(b)
    order = sorted(reach)
    m = len(order)
    a = [[q.get((order[i], order[j]), 0.0) if i != j else 0.0 for j in range(m)]
         for i in range(m)]
    sums = [0.0] * m
    for k in range(m - 1, 0, -1):
        s = sum(a[k][j] for j in range(k))
        sums[k] = s
        for i in range(k):
            if a[i][k] == 0.0:
                continue
            f = a[i][k] / s
            for j in range(k):
                if j != i:
                    a[i][j] += f * a[k][j]
    pi = [0.0] * m
    pi[0] = 1.0
    for k in range(1, m):
        pi[k] = sum(pi[i] * a[i][k] for i in range(k)) / sums[k]
    total = sum(pi)
    out = [0.0] * size
    for i, state in enumerate(order):
        out[state] = pi[i] / total
    return out


def _detected_distribution(n: int, diagnostic: bool, rate: float, shock: float,
                           mttr: float) -> list[tuple[int, bool, float]]:
    """Stationary detected process: (channels down, all down with independent faults, p)."""
    if mttr <= 0.0 or (rate <= 0.0 and shock <= 0.0):
        return [(0, False, 1.0)]
    mu = 1.0 / mttr
    cats = 3 if (diagnostic and shock > 0.0) else 2  # ok, det (, dcc)
    states = _count_states(n, cats)
    index = {s: i for i, s in enumerate(states)}
    q: dict[tuple[int, int], float] = {}

    def add(s, t, r):
        if r > 0 and s != t:
            key = (index[s], index[t])
            q[key] = q.get(key, 0.0) + r

    for s in states:
        if s[0]:
            add(s, _move(s, [0], 1, 1), s[0] * rate)
            if shock > 0.0:
                add(s, _move(s, [0], 2 if cats == 3 else 1), shock)
        for k in range(1, cats):
            if s[k]:
                add(s, _move(s, [k], 0, 1), s[k] * mu)
    pi = _gth(q, len(states))
    return [(n - s[0], s[1] == n, p) for s, p in zip(states, pi) if p > 0.0]


def _union_at_least(n: int, a: int, b: int, k: int) -> float:
    """P(|A u B| >= k) for a fixed set A of size a and a uniform random set B of size b."""
    total = 0.0
    for x in range(max(0, a + b - n), min(a, b) + 1):  # x = |A n B|
        if a + b - x >= k:
            total += math.comb(a, x) * math.comb(n - a, b - x)
    return total / math.comb(n, b)


def cycles_per_mission(t1: float, mission: float | None) -> int:
    """Proof test cycles until the renewal of uncovered failures: ceil(MT / T1), at least 1.

    The renewal is taken at the first proof test at or after the mission time (so a
    mission time that is not a multiple of T1 is rounded up to one).
    """
    if mission is None or mission <= t1:
        return 1
    return max(1, math.ceil(mission / t1 * (1 - _REL_TIME)))


def _count_inside(length: float, step: float | None) -> int:
    """Number of times j*step (j >= 1) strictly inside (0, length)."""
    if step is None or step <= 0 or step >= length * (1 - _REL_TIME):
        return 0
    return max(0, math.ceil(length / step * (1 - _REL_TIME)) - 1)


def _compose(first, second):
    a1, v1 = first
    a2, v2 = second
    return a1 @ a2, v1 + a1 @ v2


def _power(block, k: int):
    result = None
    base = block
    while k:
        if k & 1:
            result = base if result is None else _compose(result, base)
        k >>= 1
        if k:
            base = _compose(base, base)
    return result


def _chain(*blocks):
    result = None
    for b in blocks:
        if b is not None:
            result = b if result is None else _compose(result, b)
    return result


def pfd_avg(m: int, n: int, *, ldu: float, ldd: float = 0.0, lsd: float = 0.0,
            beta: float = 0.0, beta_d: float = 0.0, mttr: float = 0.0, mrt: float = 0.0,
            t1: float, ptc: float = 1.0, mission: float | None = None,
            t_pst: float | None = None, theta: float = 0.0,
            diagnostic: bool = False) -> float:
    """Exact PFDavg of an MooN (or 1oo2D, ``diagnostic=True``) group; see the module text.

    Rates per hour, times in hours. ``ptc`` is the proof test coverage (the share of
    lambda_DU the full test reveals; the rest is renewed at ``mission``), ``theta`` the
    share the partial test at interval ``t_pst`` reveals (theta <= ptc). ``lsd`` only
    matters for 1oo2D.
    """
    if diagnostic and (m, n) != (1, 2):
        raise ValueError("the diagnostic variant is defined for 1oo2 only")
    if not 1 <= m <= n <= MAX_CHANNELS:
        raise ValueError(f"{m}oo{n}: the exact model covers 1 to {MAX_CHANNELS} channels")
    if not t1 > 0:
        raise ValueError("t1 must be positive")
    if n == 1:
        beta = beta_d = 0.0  # a single channel: the full rates, no shocks
    mttr = mttr if mttr >= _MIN_REPAIR_HOURS else 0.0
    mrt = mrt if mrt >= _MIN_REPAIR_HOURS else 0.0
    k_fail = n - m + 1  # channels down that fail the group

    # Weight g(b) of an undetected state with b channels down: chance the group is failed,
    # averaged over the stationary detected process.
    detected = _detected_distribution(
        n, diagnostic, (1.0 - beta_d) * ldd + (lsd if diagnostic else 0.0), beta_d * ldd, mttr)
    weight = [0.0] * (n + 1)
    for b in range(n + 1):
        for a, all_independent, p in detected:
            if diagnostic and all_independent:
                continue  # both channels report a fault: safe state
            weight[b] += p * _union_at_least(n, a, b, k_fail)

    # Schedule and shares of lambda_DU. A share below 1e-9 counts as 0 (it is found by
    # the next deeper test instead): its effect is below the rounding of the long
    # products of a mission, and a different schedule must not change the result by
    # rounding alone.
    uncovered = (1.0 - ptc > _MIN_SHARE and mission is not None
                 and mission > t1 * (1 + _REL_TIME))
    cycles = cycles_per_mission(t1, mission) if uncovered else 1
    j = _count_inside(t1, t_pst) if theta > _MIN_SHARE else 0
    shares = {_DUP: theta if j else 0.0, _DUU: (1.0 - ptc) if uncovered else 0.0}
    shares[_DUF] = max(0.0, 1.0 - shares[_DUP] - shares[_DUU])
    cats = [_OK] + ([k for k in _DU_KINDS if shares[k] > 0.0] if ldu > 0.0 else [])
    if len(cats) == 1:
        return min(1.0, weight[0])  # no undetected failures: nothing depends on the tests
    if mrt > 0.0:
        cats.append(_REV)
    st = _undetected_structure(n, tuple(cats), _REV if mrt > 0.0 else _OK)

    q = np.zeros((st.size, st.size))
    for kind, pattern in st.indep.items():
        q += (1.0 - beta) * ldu * shares[kind] * pattern
        if beta > 0.0:
            q += beta * ldu * shares[kind] * st.shock[kind]
    if st.repair is not None:
        q += st.repair / mrt
    g = np.array([weight[b] for b in st.down])

    size = st.size
    aug = np.zeros((size + 1, size + 1))
    aug[:size, :size] = q
    aug[:size, size] = g
    calm = st.calm
    aug_calm = aug[np.append(calm, size)][:, np.append(calm, size)]
    settle = _SETTLE_REPAIRS * mrt
    cache: dict[float, tuple[np.ndarray, np.ndarray]] = {}

    def block_exp(matrix: np.ndarray, length: float, stiff: bool):
        # With repairs in the segment (a stiff matrix) the failure column is scaled by
        # 1/length so that it does not add squarings to the Pade approximant, which would
        # cost the small transition probabilities their relative accuracy; without
        # repairs the unscaled column keeps the small integrals accurate.
        k = matrix.shape[0] - 1
        scale = 1.0 / length if stiff else 1.0
        scaled = matrix * length
        scaled[:k, k] *= scale
        x = expm(scaled)
        return np.maximum(x[:k, :k], 0.0), np.maximum(x[:k, k], 0.0) / scale

    def propagate(length: float):
        # Repairs after a test are fast: exponentiating them over a long segment loses
        # accuracy (many squarings). So the segment is split where every repair has
        # settled (the chance that a repair is still going is below e**-45) and the rest
        # is computed on the states without a repair, which no transition leaves for
        # a state with one before the next test.
        if settle <= 0.0 or len(calm) == size:
            return block_exp(aug, length, False)
        if length <= 2.0 * settle:
            return block_exp(aug, length, True)
        phi1, psi1 = block_exp(aug, settle, True)
        phi2, psi2 = block_exp(aug_calm, length - settle, False)
        to_calm = phi1[:, calm]
        phi = np.zeros((size, size))
        phi[:, calm] = to_calm @ phi2
        return phi, psi1 + to_calm @ psi2

    def segment(length: float, event: str):
        if length not in cache:
            cache[length] = propagate(length)
        phi, psi = cache[length]
        return phi @ st.events[event], psi

    # One proof test cycle: j partial tests inside it, then the end event.
    partials = _power(segment(t_pst, "pst"), j) if j else None
    rest = t1 - j * t_pst if j else t1

    def cycle(end_event: str):
        return _chain(partials, segment(rest, end_event))

    if uncovered:
        a, v = _chain(_power(cycle("full"), cycles - 1) if cycles > 1 else None, cycle("mt"))
    else:
        a, v = cycle("full")

    # Periodic steady state: p = start * A^(2^i - 1) until it stops changing. Rows are
    # renormalised to sum 1 so that rounding in the exponential cannot grow.
    p = st.start
    a = a / a.sum(axis=1, keepdims=True)
    for _ in range(64):
        new = p @ a
        new /= new.sum()
        if np.all(np.abs(new - p) <= 1e-14 * new + 1e-300):
            p = new
            break
        p = new
        a = a @ a
        a /= a.sum(axis=1, keepdims=True)
    value = float(p @ v) / (cycles * t1)
    return min(1.0, max(0.0, value))
