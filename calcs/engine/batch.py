"""Q_sif(t) and Q_group(t) of many compiled SIFs in a few array operations.

The history model (:mod:`calcs.engine.history`) compiles a SIF into groups of channels,
each channel and each group's common-cause part a list of shares (rate, renewal times),
plus merged outage intervals (repairs, device bypasses) per channel and bypass intervals
of the whole SIF. :func:`evaluate_many` evaluates a list of (compiled SIF, times,
n_right) items, the values just after the first ``n_right`` times of each (right limit)
and just before the rest (left limit), all items together:

* every time and renewal or outage start of the batch is replaced by its rank among all
  of them (exact: equal values get equal ranks, order is kept), so "the last renewal of
  share k at or before t" becomes one ``searchsorted`` of integer keys
  ``2 * (k * M + rank)`` over every (share, time) pair of the batch (odd keys for the
  times: +1 = at or before, right limit; -1 = strictly before, left limit);
* the exposures sum rate x age per channel with ``bincount`` in share order (the same
  additions, in the same order, as one share after the other);
* groups with the same voting shape are combined together (the same operations per
  point as for one group), and the groups of each SIF summed with ``bincount``.

Per point the arithmetic is the one the single-SIF evaluation always did, so a SIF gives
the same values in a batch of one as in a batch of thousands. A batch larger than
``MAX_PAIRS`` (share, time) pairs is split (memory stays bounded).
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import numpy as np

#: The most (share, time) pairs evaluated in one pass (about 70 bytes each at the peak).
MAX_PAIRS = 1_000_000


def _shares(c: Any) -> int:
    return sum(sum(len(ch.segs) for ch in g.channels) + len(g.ccf_segs) for g in c.groups)


def evaluate_many(items: Sequence[tuple], max_pairs: int = MAX_PAIRS
                  ) -> list[tuple[np.ndarray, np.ndarray]]:
    """(Q_sif(t), Q_group(t) as a (G, P) array) for each (compiled, t, n_right) or
    (compiled, t, n_right, run) item. ``run``: the first ``n_right`` points come in runs of
    that many points strictly between two consecutive events of the SIF (the quadrature
    nodes of one piece), so the state of every share is searched once per run. Items are
    evaluated together up to ``max_pairs`` (share, point) pairs at a time."""
    out: list[tuple[np.ndarray, np.ndarray]] = []
    batch: list = []
    work = 0
    for item in items:
        cost = item[1].size * max(1, _shares(item[0]))
        if batch and work + cost > max_pairs:
            out.extend(_evaluate_batch(batch))
            batch, work = [], 0
        batch.append(item)
        work += cost
    if batch:
        out.extend(_evaluate_batch(batch))
    return out


def _ranks(values: list[np.ndarray]) -> tuple[list[np.ndarray], int]:
    """Each array's values replaced by their rank among all values (int64), and the
    number of distinct values."""
    sizes = [v.size for v in values]
    allv = np.concatenate(values) if values else np.empty(0)
    uniq, inv = np.unique(allv, return_inverse=True)
    inv = inv.astype(np.int64, copy=False).ravel()
    cuts = np.cumsum([0] + sizes)
    return [inv[cuts[i]:cuts[i + 1]] for i in range(len(values))], int(uniq.size)


def _pairs(owner_item: np.ndarray, sizes: np.ndarray, node_off: np.ndarray
           ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """For owners (shares or interval sets) each evaluated at every time of its item:
    (owner of each pair, global time index, local time index)."""
    n = sizes[owner_item]
    total = int(n.sum())
    owner = np.repeat(np.arange(owner_item.size), n)
    local = np.arange(total) - np.repeat(np.cumsum(n) - n, n)
    return owner, node_off[owner_item][owner] + local, local


def _last_index(owner: np.ndarray, node: np.ndarray, sorted_ranks: np.ndarray,
                starts: np.ndarray, rank_t: np.ndarray, right: np.ndarray, m: int
                ) -> np.ndarray:
    """Index (into the flat sorted values) of each owner's last value at or before its
    time (right limit) or strictly before it (left limit); -1 where there is none."""
    keys = 2 * (np.repeat(np.arange(starts.size - 1), np.diff(starts)) * m + sorted_ranks)
    q = 2 * (owner * m + rank_t[node]) + np.where(right[node], 1, -1)
    idx = np.searchsorted(keys, q) - 1
    return np.where(idx >= starts[owner], idx, -1)


def _inside(item_of: list[int], s_list: list[np.ndarray], e_list: list[np.ndarray],
            s_ranks: list[np.ndarray], q: _Queries, m: int) -> tuple[np.ndarray, np.ndarray]:
    """Points inside merged intervals: [s, e) for a right limit, (s, e] for a left one.
    Returns (set of each (set, time) pair, inside), the pairs set by set, times in order."""
    items = np.array(item_of, dtype=np.int64)
    owner, node, _ = _pairs(items, q.sizes, q.off)
    starts = np.cumsum([0] + [s.size for s in s_list])
    idx = _last_index(owner, node, np.concatenate(s_ranks), starts, q.rank, q.right, m)
    ends = np.concatenate(e_list)[np.maximum(idx, 0)]
    tn = q.t[node]
    inside = np.where(q.right[node], tn < ends, tn <= ends) & (idx >= 0)
    return q.expand(owner, node, inside)


class _Queries:
    """The points a batch searches at: the first point of each run (points between the
    same two events of their SIF, so every share and interval has the same state along
    it) and every point outside the runs; ``expand`` repeats a value found at a query for
    each point it stands for."""

    def __init__(self, items, sizes: np.ndarray, node_off: np.ndarray, t: np.ndarray):
        local, counts, right = [], [], []
        for (_, _, n_right, run), size in zip(items, sizes.tolist()):
            nr = max(0, min(int(n_right), size))
            run = int(run) if run and nr % int(run) == 0 else 1
            local.append(np.concatenate([np.arange(0, nr, run), np.arange(nr, size)]))
            counts.append(np.concatenate([np.full(nr // run, run), np.ones(size - nr, int)]))
            right.append(np.arange(local[-1].size) < nr // run)
        self.sizes = np.array([x.size for x in local], dtype=np.int64)
        self.off = np.concatenate([[0], np.cumsum(self.sizes)]).astype(np.int64)
        self.t = t[np.concatenate(local) + np.repeat(node_off[:-1], self.sizes)]
        self.counts = np.concatenate(counts).astype(np.int64)
        self.right = np.concatenate(right)
        self.rank = None
        self.node_sizes, self.node_off = sizes, node_off

    def expand(self, owner: np.ndarray, node: np.ndarray, values: np.ndarray
               ) -> tuple[np.ndarray, np.ndarray]:
        reps = self.counts[node]
        return np.repeat(owner, reps), np.repeat(values, reps)


def _evaluate_batch(items: Sequence[tuple]) -> list[tuple[np.ndarray, np.ndarray]]:
    items = [(it[0], it[1], it[2], it[3] if len(it) > 3 else 1) for it in items]
    sizes = np.array([it[1].size for it in items], dtype=np.int64)
    node_off = np.concatenate([[0], np.cumsum(sizes)]).astype(np.int64)
    t = np.concatenate([np.asarray(it[1], dtype=float) for it in items])
    queries = _Queries(items, sizes, node_off, t)

    # slots: one per distinct channel of a group and one per group (common cause), each
    # with its shares; groups in order, each with its channels' slots
    slot_item: list[int] = []
    slot_const: list[float] = []
    seg_slot: list[int] = []
    seg_rate: list[float] = []
    seg_r: list[np.ndarray] = []
    out_slot: list[int] = []
    out_s: list[np.ndarray] = []
    out_e: list[np.ndarray] = []
    byp_item: list[int] = []
    byp_s: list[np.ndarray] = []
    byp_e: list[np.ndarray] = []
    groups: list[tuple[int, int, int, list[int], int]] = []  # item, n, f, channel slots, ccf
    n_groups: list[int] = []

    def add_slot(item: int, const: float, segs) -> int:
        slot = len(slot_item)
        slot_item.append(item)
        slot_const.append(const)
        for rate, r in segs:
            seg_slot.append(slot)
            seg_rate.append(rate)
            seg_r.append(r)
        return slot

    for i, (c, _, _, _) in enumerate(items):
        for g in c.groups:
            done: dict[int, int] = {}
            chans = []
            for ch in g.channels:
                slot = done.get(id(ch))
                if slot is None:
                    slot = done[id(ch)] = add_slot(i, ch.log_surv_dd, ch.segs)
                    if ch.out_s.size:
                        out_slot.append(slot)
                        out_s.append(ch.out_s)
                        out_e.append(ch.out_e)
                chans.append(slot)
            ccf = add_slot(i, g.log_surv_dd_ccf, g.ccf_segs)
            groups.append((i, g.n, g.n - g.m + 1, chans, ccf))
        n_groups.append(len(c.groups))
        if c.byp_s.size:
            byp_item.append(i)
            byp_s.append(c.byp_s)
            byp_e.append(c.byp_e)

    ranks, m = _ranks([queries.t] + seg_r + out_s + byp_s)
    m += 1
    queries.rank = ranks[0]
    seg_ranks = ranks[1:1 + len(seg_r)]
    out_ranks = ranks[1 + len(seg_r):1 + len(seg_r) + len(out_s)]
    byp_ranks = ranks[1 + len(seg_r) + len(out_s):]

    slot_item_a = np.array(slot_item, dtype=np.int64)
    slot_sizes = sizes[slot_item_a]
    slot_base = np.concatenate([[0], np.cumsum(slot_sizes)]).astype(np.int64)
    total = int(slot_base[-1])
    with np.errstate(divide="ignore", invalid="ignore"):
        # exposure of each slot at its item's times: sum of rate x age over its shares
        if seg_r:
            seg_slot_a = np.array(seg_slot, dtype=np.int64)
            owners = slot_item_a[seg_slot_a]
            owner, node, _ = _pairs(owners, queries.sizes, queries.off)
            starts = np.cumsum([0] + [r.size for r in seg_r])
            idx = _last_index(owner, node, np.concatenate(seg_ranks), starts, queries.rank,
                              queries.right, m)
            _, idx = queries.expand(owner, node, np.maximum(idx, starts[owner]))
            owner, node, local = _pairs(owners, sizes, node_off)
            age = t[node] - np.concatenate(seg_r)[idx]
            np.maximum(age, 0.0, out=age)
            age *= np.array(seg_rate)[owner]
            target = slot_base[seg_slot_a][owner] + local
            exposure = np.bincount(target, weights=age, minlength=total)
            del owner, node, local, idx, age, target
        else:
            exposure = np.zeros(total)
        logs = np.repeat(np.array(slot_const, dtype=float), slot_sizes) - exposure
        if out_s:
            owned = [slot_item[s] for s in out_slot]
            _, inside = _inside(owned, out_s, out_e, out_ranks, queries, m)
            owner, _, local = _pairs(np.array(owned, dtype=np.int64), sizes, node_off)
            logs[(slot_base[np.array(out_slot, dtype=np.int64)][owner] + local)[inside]] = (
                -np.inf)

        # groups: those of one shape (n channels, f failed fail it) together
        g_sizes = np.array([sizes[g[0]] for g in groups], dtype=np.int64)
        g_base = np.concatenate([[0], np.cumsum(g_sizes)]).astype(np.int64)
        g_logs = np.empty(int(g_base[-1]))
        shapes: dict[tuple[int, int], list[int]] = {}
        for k, g in enumerate(groups):
            shapes.setdefault((g[1], g[2]), []).append(k)
        for (n, f), ks in shapes.items():
            ka = np.array(ks, dtype=np.int64)
            reps = g_sizes[ka]
            cols = np.arange(int(reps.sum())) - np.repeat(np.cumsum(reps) - reps, reps)
            chan_slots = np.array([groups[k][3] for k in ks], dtype=np.int64).reshape(-1, n)
            rows = [np.repeat(slot_base[chan_slots[:, j]], reps) + cols for j in range(n)]
            lm = logs[np.array(rows)]
            if f == 1:
                log_ind = np.sum(lm, axis=0)
            else:
                qs = -np.expm1(lm)
                if f == n:
                    q_ind = np.prod(qs, axis=0)
                else:
                    dist = np.zeros((n + 1, cols.size))
                    dist[0] = 1.0
                    for j in range(n):
                        q = qs[j]
                        p = 1.0 - q
                        dist[1:j + 2] = dist[1:j + 2] * p + dist[0:j + 1] * q
                        dist[0] *= p
                    q_ind = dist[f:].sum(axis=0)
                log_ind = np.log1p(-np.minimum(q_ind, 1.0))
            ccf = np.repeat(slot_base[np.array([groups[k][4] for k in ks])], reps) + cols
            dest = np.repeat(g_base[ka], reps) + cols
            g_logs[dest] = log_ind + logs[ccf]
        q_groups = -np.expm1(g_logs)
        g_item = np.array([g[0] for g in groups], dtype=np.int64)
        if groups:
            _, node, local = _pairs(g_item, sizes, node_off)
            q_sif = -np.expm1(np.bincount(node, weights=g_logs, minlength=t.size))
        else:
            q_sif = -np.expm1(np.zeros(t.size))
    if byp_s:
        _, inside = _inside(byp_item, byp_s, byp_e, byp_ranks, queries, m)
        _, node, _ = _pairs(np.array(byp_item, dtype=np.int64), sizes, node_off)
        q_sif[node[inside]] = 1.0
    out = []
    gk = 0
    for i in range(len(items)):
        lo, hi = node_off[i], node_off[i + 1]
        ng = n_groups[i]
        q_g = q_groups[g_base[gk]:g_base[gk + ng]].reshape(ng, int(hi - lo))
        gk += ng
        out.append((q_sif[lo:hi], q_g))
    return out
