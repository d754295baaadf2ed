"""The batched 1-D search behind the MSE range fit: each row's best clipping fraction t in (0, 1].

A geometric sweep of :data:`SWEEP_POINTS` fractions from 1e-4 to 1, then golden-section steps
inside the bracket around each row's best sweep point; the best fraction seen wins (of equal
sweep minima the widest: it clips least of data not seen here). A "row" here is one (row,
width) pair of a fit: every pair searches on its own, all of them in one tensor operation.

The sweep is pruned per row with two lower bounds of a candidate's error: the error of the
values beyond the grid's outermost levels (``floor``: it can only fall as t grows, where the
outermost levels move outwards with t, so each row's first candidate still in play is found by
bisection, about six evaluations instead of one per candidate), and the error of the two
clipping runs (``lower``: tighter, checked at the point the sweep picks). A candidate whose
floor exceeds the best error its row has measured cannot be that row's minimum, nor tie with
it, so measuring only the candidates from each row's first one in play upwards picks the point
that measuring every candidate picks. Where the clipping bound at the picked point exceeds the
error measured there (float rounding past the bounds' safety margins, never seen), the sweep
runs as it did before (:func:`minimise_fraction_reference`), so the grids are always its grids.

``problem`` (duck-typed): ``n`` rows, ``device``, ``prune`` and ``prune_reference`` (whether
the sweep, and the reference search, use the bounds),
``error(t)`` for fractions ``(n, K)``, ``error_items(rows, t)`` for one fraction ``(N,)`` per
listed row, ``floor(t)`` and ``lower(t)`` (the bounds less their safety margins, ``(n, K)``).
"""

from __future__ import annotations

import math

import torch

__all__ = ["SWEEP_POINTS", "GOLDEN_STEPS", "sweep_fractions", "minimise_fraction", "minimise_fraction_reference"]

SWEEP_POINTS = 48  # candidate fractions in the sweep
_SWEEP_LOW = 1e-4  # the smallest, as a fraction of the min-max range
GOLDEN_STEPS = 22  # golden-section steps after the sweep: bracket shrinks by 0.618**22 ~ 2.5e-5
_GOLD = (math.sqrt(5.0) - 1.0) / 2.0


def sweep_fractions(device=None) -> torch.Tensor:
    """The sweep's fractions, ascending (float64)."""
    return torch.logspace(math.log10(_SWEEP_LOW), 0.0, SWEEP_POINTS, dtype=torch.float64, device=device)


def minimise_fraction(problem) -> torch.Tensor:
    """The best fraction per row, shape ``(n,)`` (see the module docstring)."""
    t = sweep_fractions(problem.device)
    if not problem.prune:
        err = problem.error(t.expand(problem.n, -1))
        best_i = SWEEP_POINTS - 1 - err.flip(1).argmin(dim=1)
        return _golden(problem.error, t, best_i, err.gather(1, best_i[:, None]).squeeze(1))
    picked = _pruned_sweep(problem, t)
    if picked is None:
        return minimise_fraction_reference(problem)
    return _golden(problem.error, t, *picked)


def _pruned_sweep(problem, t):
    """(best index, its error) per row from the floor-pruned sweep; None where the clipping
    bound at a picked point exceeds the error measured there."""
    n, last = problem.n, SWEEP_POINTS - 1
    err = torch.full((n, SWEEP_POINTS), math.inf, dtype=torch.float64, device=problem.device)
    err[:, last] = problem.error(t[last:].expand(n, 1))[:, 0]
    top = torch.full((n,), last, dtype=torch.int64, device=problem.device)
    k = _first_alive(problem.floor, t, err[:, last], torch.full_like(top, -1), top)
    # every row's candidates from its first one in play up to t = 1, less those measured
    count = last - k
    rows = torch.repeat_interleave(torch.arange(n, device=problem.device), count)
    if rows.numel():
        start = torch.cumsum(count, 0) - count
        cand = k[rows] + torch.arange(rows.numel(), device=problem.device) - start[rows]
        todo = torch.isinf(err[rows, cand])
        rows, cand = rows[todo], cand[todo]
        err[rows, cand] = problem.error_items(rows, t[cand])
    best_i = last - err.flip(1).argmin(dim=1)
    best_e = err.gather(1, best_i[:, None]).squeeze(1)
    if bool((problem.lower(t[best_i][:, None])[:, 0] > best_e).any()):
        return None
    return best_i, best_e


def _first_alive(floor, t, best, dead, alive) -> torch.Tensor:
    """Per row, the smallest sweep index whose floor does not exceed ``best``, by bisection
    between an index known out of play (``dead``, -1 for none) and ``alive`` (t = 1 is taken
    as in play: its floor cannot exceed the row's best error)."""
    while True:
        open_ = alive - dead > 1
        if not bool(open_.any()):
            return alive
        mid = torch.where(open_, (dead + alive) // 2, alive)
        ok = floor(t[mid][:, None])[:, 0] <= best
        alive = torch.where(open_ & ok, mid, alive)
        dead = torch.where(open_ & ~ok, mid, dead)


def minimise_fraction_reference(problem) -> torch.Tensor:
    """The search with the sweep pruned by the clipping bound alone, for every row from the
    smallest index any row keeps (the search before the floor bound; the same grids)."""
    t = sweep_fractions(problem.device)
    n, last = problem.n, SWEEP_POINTS - 1
    grid = t.expand(n, -1)
    if not problem.prune_reference:
        err = problem.error(grid)
    else:
        bound = problem.lower(grid)
        err = torch.full((n, SWEEP_POINTS), math.inf, dtype=torch.float64, device=problem.device)
        err[:, last:] = problem.error(grid[:, last:])
        k0 = _first_alive_any(bound, err)
        if last - k0 > 2:  # one more point halfway: a tighter bound for the rest
            mid = (k0 + last) // 2
            err[:, mid:mid + 1] = problem.error(grid[:, mid:mid + 1])
            k0 = _first_alive_any(bound, err)
        if k0 < last:
            err[:, k0:last] = problem.error(grid[:, k0:last])
        err = torch.where(bound <= err.min(dim=1, keepdim=True).values, err, math.inf)
    best_i = last - err.flip(1).argmin(dim=1)
    return _golden(problem.error, t, best_i, err.gather(1, best_i[:, None]).squeeze(1))


def _first_alive_any(bound: torch.Tensor, err: torch.Tensor) -> int:
    """The smallest sweep index whose bound does not exceed its row's best error, in any row."""
    alive = (bound <= err.min(dim=1, keepdim=True).values).any(dim=0)
    alive[-1] = True
    return int(alive.nonzero()[0])


def _golden(evaluate, t, best_i, best_e) -> torch.Tensor:
    """Golden-section steps in the bracket around each row's best sweep point; the best seen.

    After each step both inner points are compared with the best so far, the lower one first
    (strictly better wins). From the second step on, the point kept from the step before was
    compared then and the best has only fallen since, so only the new point can win: the same
    picks with fewer operations."""
    best_t = t[best_i]
    a = t[(best_i - 1).clamp(min=0)]
    b = t[(best_i + 1).clamp(max=SWEEP_POINTS - 1)]
    a = torch.where(best_i == 0, torch.zeros_like(a), a)  # open the bracket down to 0

    c, d = b - _GOLD * (b - a), a + _GOLD * (b - a)
    f = evaluate(torch.stack([c, d], dim=1))
    fc, fd = f[:, 0], f[:, 1]
    for step in range(GOLDEN_STEPS):
        left = fc <= fd  # the minimum lies in [a, d]
        b = torch.where(left, d, b)
        a = torch.where(left, a, c)
        gap = _GOLD * (b - a)
        new = torch.where(left, b - gap, a + gap)
        fnew = evaluate(new[:, None]).squeeze(1)
        c, d, fc, fd = (
            torch.where(left, new, d),
            torch.where(left, c, new),
            torch.where(left, fnew, fd),
            torch.where(left, fc, fnew),
        )
        for cand, f in ((c, fc), (d, fd)) if step == 0 else ((new, fnew),):
            better = f < best_e
            best_t = torch.where(better, cand, best_t)
            best_e = torch.where(better, f, best_e)
    return best_t
