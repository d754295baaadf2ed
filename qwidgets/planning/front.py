"""The Pareto front of (cost, predicted noise) for one budget.

Two exact methods, each point the optimum of its own cost (measured against one
mixed-integer programme per point in benchmarks/bench_planning.py: both are far faster):

- every Pareto-optimal point, by a dynamic programme over entries: the states after entry
  ``i`` are the sums of one option per entry so far, sorted by cost, dominated ones dropped.
  Its state count grows quickly with the number of entries, so it is used while it stays
  under ``max_states``;
- otherwise the vertices of the front's lower convex hull: each entry's options reduced to
  their own lower convex hull, all hull segments taken in order of noise removed per unit
  cost (the lower hull of a sum of sets is the sum of their hulls, its edges sorted by
  slope). Each vertex is a plan no cheaper plan beats, found in milliseconds for hundreds of
  entries; plans between vertices are left to :func:`qwidgets.plan_budget`.
"""

from __future__ import annotations

import numpy as np


def _pareto_step(c, n, costs_i, noise_i):
    """All (state, option) sums, sorted by cost, dominated ones dropped."""
    k = costs_i.shape[0]
    cc = (c[:, None] + costs_i[None, :]).ravel()
    nn = (n[:, None] + noise_i[None, :]).ravel()
    par = np.repeat(np.arange(c.shape[0]), k)
    opt = np.tile(np.arange(k), c.shape[0])
    order = np.lexsort((nn, cc))
    cc, nn, par, opt = cc[order], nn[order], par[order], opt[order]
    best_before = np.minimum.accumulate(nn)
    keep = np.empty(cc.size, dtype=bool)
    keep[0] = True
    keep[1:] = nn[1:] < best_before[:-1]  # strictly less noise than every cheaper state
    return cc[keep], nn[keep], par[keep], opt[keep]


MAX_STATES = 20_000  # above this many states per step the dynamic programme gives way to the hull


def front(costs: list, noise: list, max_states: int = MAX_STATES):
    """The Pareto front: (costs, noises, choices) sorted by rising cost; every point while
    the dynamic programme stays under ``max_states`` states, else the lower-hull vertices.

    ``costs[i]`` / ``noise[i]``: integer costs and noise of entry ``i``'s options (entries may
    have different numbers of options); ``choices`` is (points x entries) option indices.
    """
    costs = [np.asarray(ci, dtype=np.int64) for ci in costs]
    noise = [np.asarray(ni, dtype=float) for ni in noise]
    c, n = np.zeros(1, np.int64), np.zeros(1)
    parents = []
    for ci, ni in zip(costs, noise, strict=True):
        if c.size * ci.size > max_states:
            return hull_front(costs, noise)
        c, n, par, opt = _pareto_step(c, n, ci, ni)
        parents.append((par, opt))
    idx = np.arange(c.size)
    out = np.empty((idx.size, len(parents)), dtype=np.int64)
    for i in range(len(parents) - 1, -1, -1):
        par, opt = parents[i]
        out[:, i] = opt[idx]
        idx = par[idx]
    return c, n, out


def thin(front_c: np.ndarray, max_points: int | None) -> list[int]:
    """Indices of at most ``max_points`` front points spread evenly in cost, both ends kept."""
    if max_points is None or front_c.size <= max_points:
        return list(range(front_c.size))
    targets = np.linspace(float(front_c[0]), float(front_c[-1]), max_points)
    idx = np.clip(np.searchsorted(front_c, targets), 0, front_c.size - 1)
    lower = np.clip(idx - 1, 0, front_c.size - 1)
    pick = np.where(np.abs(front_c[lower] - targets) < np.abs(front_c[idx] - targets), lower, idx)
    return sorted(set(pick.tolist()) | {0, front_c.size - 1})


def _lower_hull(c: np.ndarray, n: np.ndarray) -> list[int]:
    """Indices of the lower-left convex hull of points (c, n), by rising cost, falling noise."""
    pts: list[int] = []
    for j in np.lexsort((n, c)):
        if pts and n[j] >= n[pts[-1]]:
            continue  # no cheaper-or-equal point is noisier: dominated
        while len(pts) >= 2:
            a, b = pts[-2], pts[-1]
            if (n[b] - n[a]) * (c[j] - c[a]) >= (n[j] - n[a]) * (c[b] - c[a]):
                pts.pop()  # b lies on or above the segment a -> j
            else:
                break
        pts.append(int(j))
    return pts


def hull_front(costs: list, noise: list):
    """Vertices of the lower convex hull of all plans' (cost, noise): (costs, noises, choices).

    Start from each entry's cheapest hull option; take the hull segments of all entries in
    order of falling noise removed per unit cost (within an entry they come in order, its
    hull being convex). Every prefix is a plan on the hull of the sum, hence the least noisy
    plan of its cost or less.
    """
    start, segs = [], []
    for i, (ci, ni) in enumerate(zip(costs, noise, strict=True)):
        h = _lower_hull(ci.astype(float), ni)
        start.append(h[0])
        for a, b in zip(h[:-1], h[1:], strict=False):
            dc, dn = int(ci[b] - ci[a]), float(ni[a] - ni[b])
            segs.append((dn / dc, i, b, dc))
    segs.sort(key=lambda s: -s[0])  # stable: one entry's segments keep their order
    choice = np.array(start, dtype=np.int64)
    rows = np.arange(len(costs))
    cost0 = int(sum(int(ci[k]) for ci, k in zip(costs, choice, strict=True)))
    out_c = [cost0]
    out = [choice.copy()]
    cur = cost0
    for _, i, b, dc in segs:
        choice[i] = b
        cur += dc
        out_c.append(cur)
        out.append(choice.copy())
    choices = np.array(out)
    pad = np.zeros((len(noise), max(len(ni) for ni in noise)))
    for i, ni in enumerate(noise):
        pad[i, : len(ni)] = ni
    noise_sum = pad[rows[None, :], choices].sum(axis=1)
    return np.array(out_c, dtype=np.int64), noise_sum, choices
