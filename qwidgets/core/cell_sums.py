"""Squared quantization error of many candidate grids over rows of values, from sorted prefix sums.

The rows are a 2-D ``(rows, values)`` view: the channels of a per-channel fit, the blocks of a
block fit, or the whole tensor as one row. Each row is sorted once, with float64 prefix sums of
``x`` and ``x**2``. On a grid with levels ``g_j`` and rounding boundaries between them, the values
that round to ``g_j`` are one run of the sorted row (found by binary search at the boundaries;
the two outermost runs hold the clipped values), so the squared error is, exactly,

    sum over runs of  S2 - 2 g S1 + n g**2  =  sum(x**2) - sum over runs of g (2 S1 - g n)

and one candidate grid costs ``O(levels x log n)`` instead of quantizing ``n`` values. Many bit
widths are evaluated in one pass: the boundaries of every width sit side by side in one row of
search values, each width's run framed by -inf / +inf sentinels (so its first and last runs are
the clipping runs). A width with more than one level per 512 values of the row gains nothing
from the runs (binary searches cost more than rounding): it is measured by rounding the sorted row
directly (:data:`DIRECT_LEVELS_PER_VALUE`).

:meth:`SortedRows.clip_sse` is the error of the two clipping runs alone, and
:meth:`SortedRows.clamp_sse` the error of the values beyond the outermost levels (a part of
those runs): lower bounds of the whole error, used to skip candidates of the sweep that cannot
win. :meth:`SortedRows.sse_rows` measures one grid per listed row (the candidates a sweep
keeps differ from row to row), with the numbers :meth:`SortedRows.sse` gives.
"""

from __future__ import annotations

import numpy as np
import torch

__all__ = ["SortedRows", "Layout", "DIRECT_LEVELS_PER_VALUE"]

_CHUNK_ELEMS = 1 << 20  # search values (rows x candidates x boundaries) per block: bounds memory
_ROUND_ELEMS = 1 << 19  # values rounded per block (2 MiB of float32: about a core's L2 cache)
_ROW_SUM = 1 << 20  # a longer row's squared errors are summed in float32 pieces of this many values
# a width is rounded directly when its levels exceed this fraction of the row's values: a run
# costs a binary search (about 100 ns in torch) and a few float64 operations, a directly rounded
# value seven vectorised float32 ones (measured on the benchmark network's and the decoder's
# weights: 1/512 fitted 1.2-1.7x faster than 1/32)
DIRECT_LEVELS_PER_VALUE = 1 / 512


class Layout:
    """Where each width's boundaries and runs sit in one row of search values.

    ``qmin`` / ``qmax``: the integer codes of each width (lists, one entry per width). For width
    ``w`` the positions ``start[w] .. start[w] + n_w`` hold -inf, its ``n_w - 1`` boundaries,
    +inf; run ``start[w] + j`` (between positions ``start[w] + j`` and ``+ j + 1``) takes code
    ``qmin + j``.
    """

    def __init__(self, qmin, qmax, device=None):
        self.qmin, self.qmax = list(qmin), list(qmax)
        ecode, sentinel, widx, gcode, start = [], [], [], [], []
        for w, (lo, hi) in enumerate(zip(self.qmin, self.qmax, strict=True)):
            start.append(len(ecode))
            k = [float(c) for c in range(lo, hi + 1)]
            ecode += [0.0] + [c + 0.5 for c in k[:-1]] + [0.0]
            sentinel += [-torch.inf] + [0.0] * (len(k) - 1) + [torch.inf]
            gcode += k + [0.0]  # the last entry: the gap between this width and the next
            widx += [w] * (len(k) + 1)

        def f64(v):
            return torch.tensor(v, dtype=torch.float64, device=device)

        self.ecode, self.sentinel, self.gcode = f64(ecode), f64(sentinel), f64(gcode[:-1])
        self.widx = torch.tensor(widx, dtype=torch.int64, device=device)
        self.start, self.size = start, len(ecode)
        self.first_edge = f64([[lo + 0.5] for lo in self.qmin])  # (W, 1)
        self.last_edge = f64([[hi - 0.5] for hi in self.qmax])
        self.low, self.high = f64([[lo] for lo in self.qmin]), f64([[hi] for hi in self.qmax])
        self.device, self._parts = device, {}

    def part(self, widths: tuple[int, ...]) -> Layout:
        """The layout of some of the widths (by index), made once."""
        if widths not in self._parts:
            self._parts[widths] = Layout([self.qmin[j] for j in widths], [self.qmax[j] for j in widths],
                                         self.device)
        return self._parts[widths]


class SortedRows:
    """Rows of values sorted once, with float64 prefix sums; squared errors of candidate grids.

    >>> import torch
    >>> x = torch.tensor([[-1.0, -0.2, 0.1, 0.4, 0.9]])
    >>> rows = SortedRows(x)
    >>> lay = Layout([-2], [1])                       # one 2-bit signed width
    >>> s = torch.tensor([[[0.5]]], dtype=torch.float64)
    >>> err = rows.sse(lay, s, torch.zeros_like(s))   # levels -1, -0.5, 0, 0.5
    >>> q = (x / 0.5).round().clamp(-2, 1) * 0.5
    >>> round(float(err), 6) == round(float(((q - x) ** 2).sum()), 6)
    True
    """

    def __init__(self, xf: torch.Tensor):
        self.xs = _sorted_rows(xf.float())
        c, m = self.xs.shape
        xd = self.xs.double()
        # prefix sums written after a zero column (no concatenated copies)
        self.p1 = torch.zeros(c, m + 1, dtype=torch.float64, device=xf.device)
        torch.cumsum(xd, dim=1, out=self.p1[:, 1:])
        self.p2 = torch.zeros_like(self.p1)
        torch.cumsum(xd.square_(), dim=1, out=self.p2[:, 1:])
        del xd
        self.total1, self.total2 = self.p1[:, -1], self.p2[:, -1]
        self.m = self.xs.shape[1]

    def direct_widths(self, lay: Layout) -> list[bool]:
        """Which widths of ``lay`` are measured by rounding the row (many levels per value)."""
        return [hi - lo + 1 > self.m * DIRECT_LEVELS_PER_VALUE for lo, hi in zip(lay.qmin, lay.qmax, strict=True)]

    def sse(self, lay: Layout, scale: torch.Tensor, offset: torch.Tensor) -> torch.Tensor:
        """Sum of squared errors of each row on each candidate grid.

        ``scale`` and ``offset``: float64 ``(rows, widths, candidates)``, the widths of ``lay``.
        Returns float64 of that shape. Each entry depends only on its own row and grid (the
        same numbers whatever else is evaluated with it).
        """
        c, w, k = scale.shape
        direct = self.direct_widths(lay)
        if all(direct):  # every width rounded (short rows): no picking
            return self._rounded(lay, scale, offset).clamp_(min=0)
        out = torch.empty(c, w, k, dtype=torch.float64, device=scale.device)
        by_runs = tuple(j for j in range(w) if not direct[j])
        part = lay.part(by_runs) if len(by_runs) < w else lay
        pick = torch.tensor(by_runs, device=scale.device)
        s_runs, o_runs = scale.index_select(1, pick), offset.index_select(1, pick)
        per = max(1, _CHUNK_ELEMS // part.size)  # (row, candidate) pairs a block
        k_step = max(1, min(k, per))
        c_step = max(1, min(c, per // k_step))
        for c0 in range(0, c, c_step):
            rows = slice(c0, c0 + c_step)
            for k0 in range(0, k, k_step):
                cand = slice(k0, k0 + k_step)
                runs = self._runs(part, rows, s_runs[rows, :, cand], o_runs[rows, :, cand])
                for i, j in enumerate(by_runs):
                    a = part.start[i]
                    n = part.qmax[i] - part.qmin[i] + 1
                    out[rows, j, cand] = self.total2[rows, None] - runs[..., a:a + n].sum(dim=2)
        rounded = tuple(j for j in range(w) if direct[j])
        if rounded:
            pick = torch.tensor(rounded, device=scale.device)
            out.index_copy_(1, pick, self._rounded(lay.part(rounded), scale.index_select(1, pick),
                                                   offset.index_select(1, pick)))
        return out.clamp_(min=0)

    def _runs(self, lay, rows, s, o):
        """g (2 S1 - g n) of every run, (c, k, positions - 1); a width's runs are its slice."""
        c, _, k = s.shape
        se = s.transpose(1, 2).index_select(2, lay.widx)  # (c, k, E): each position's scale
        oe = o.transpose(1, 2).index_select(2, lay.widx)
        edges = (se * lay.ecode + oe + lay.sentinel).float().reshape(c, -1)
        idx = torch.searchsorted(self.xs[rows], edges)
        s1 = self.p1[rows].gather(1, idx).reshape(c, k, -1).diff(dim=2)
        cnt = idx.reshape(c, k, -1).diff(dim=2).double()
        g = se[..., :-1] * lay.gcode + oe[..., :-1]
        return g * (2 * s1 - g * cnt)

    def _rounded(self, lay, s, o):
        """(c, w, k) squared errors by rounding every value of every row (float32, as quantize).

        Laid out (widths, candidates, rows, values): the rows broadcast over the leading axes and
        each candidate's scale over its row, both of which torch runs at full speed; in blocks of
        rows of about ``_ROUND_ELEMS`` values (kept in the core's cache)."""
        c, m = self.xs.shape
        w, k = s.shape[1:]
        s32 = s.float().permute(1, 2, 0).unsqueeze(3)  # (w, k, c, 1)
        o32 = o.float().permute(1, 2, 0).unsqueeze(3)
        centred = bool((o32 == 0).all())  # x - 0 is x: skip the subtraction
        out = torch.empty(w, k, c, dtype=torch.float64, device=self.xs.device)
        piece = min(m, _ROW_SUM)
        c_step = max(1, _ROUND_ELEMS // (w * k * piece))
        for c0 in range(0, c, c_step):
            rows = slice(c0, c0 + c_step)
            ss, oo = s32[:, :, rows], o32[:, :, rows]
            for m0 in range(0, m, piece):
                xx = self.xs[rows, m0:m0 + piece]
                t = (xx / ss) if centred else (xx - oo).div_(ss)
                t.round_()
                for j in range(w):
                    t[j].clamp_(lay.qmin[j], lay.qmax[j])
                t.mul_(ss)
                if not centred:
                    t.add_(oo)
                sums = _square_sums(t.sub_(xx))
                if m0 == 0:
                    out[:, :, rows] = sums
                else:
                    out[:, :, rows] += sums
        return out.permute(2, 0, 1)

    def sse_rows(self, lay: Layout, rows: torch.Tensor, scale: torch.Tensor, offset: torch.Tensor) -> torch.Tensor:
        """Squared error of row ``rows[i]`` on the grid (``scale[i]``, ``offset[i]``), by rounding
        the row: ``lay`` holds one width, measured by rounding (:meth:`direct_widths`). Each
        entry is the number :meth:`sse` gives for that row and grid (the same float32 operations
        over the row and the same sum), float64 of ``scale``'s shape (N,)."""
        n = rows.numel()
        out = torch.zeros(n, dtype=torch.float64, device=scale.device)
        piece = min(self.m, _ROW_SUM)
        step = max(1, _ROUND_ELEMS // piece)
        lo, hi = lay.qmin[0], lay.qmax[0]
        for i in range(0, n, step):
            s32, o32 = scale[i:i + step, None].float(), offset[i:i + step, None].float()
            centred = bool((o32 == 0).all())
            some = self.xs.index_select(0, rows[i:i + step])
            for m0 in range(0, self.m, piece):
                xx = some[:, m0:m0 + piece]
                t = (xx / s32) if centred else (xx - o32).div_(s32)
                t.round_().clamp_(lo, hi).mul_(s32)
                if not centred:
                    t.add_(o32)
                out[i:i + step] += _square_sums(t.sub_(xx))
        return out.clamp_(min=0)

    def clip_sse(self, lay: Layout, scale: torch.Tensor, offset: torch.Tensor) -> torch.Tensor:
        """Squared error of the two clipping runs alone (below the first boundary, above the last):
        a lower bound of :meth:`sse` (every other run adds a square), same shapes."""
        lo_g, hi_g = scale * lay.low + offset, scale * lay.high + offset
        below, above = self._outer_runs(scale * lay.first_edge + offset, lo_g, scale * lay.last_edge + offset, hi_g)
        return below + above

    def clamp_sse(self, lay: Layout, scale: torch.Tensor, offset: torch.Tensor):
        """(below, above): the squared error of the values below the lowest level and of those
        from the highest up (those values round to that level), each a lower bound of the error
        of :meth:`sse`'s clipping runs; same shapes. On grids whose outermost levels move
        outwards, each can only fall: the values beyond shrink, and each one's distance."""
        lo_g, hi_g = scale * lay.low + offset, scale * lay.high + offset
        return self._outer_runs(lo_g, lo_g, hi_g, hi_g)

    def _outer_runs(self, lo_edge, lo_g, hi_edge, hi_g):
        """The error of the values below ``lo_edge`` at level ``lo_g`` and of those from
        ``hi_edge`` up at ``hi_g`` (the edges rounded to float32, as the values are); both
        edges of a row searched in one pass over it."""
        c, w, k = lo_g.shape
        edges = torch.cat([lo_edge.float().reshape(c, -1), hi_edge.float().reshape(c, -1)], dim=1)
        idx = torch.searchsorted(self.xs, edges)
        s1, s2 = self.p1.gather(1, idx), self.p2.gather(1, idx)
        half = w * k

        def run_error(n, s1, s2, g):  # a run of n values with sums s1, s2, at level g
            n, s1, s2 = n.double().reshape(c, w, k), s1.reshape(c, w, k), s2.reshape(c, w, k)
            return (s2 - g * (2 * s1 - g * n)).clamp_(min=0)

        # the prefix sums start at 0.0 and end at the totals: the runs' sums without lookups there
        below = run_error(idx[:, :half], s1[:, :half], s2[:, :half], lo_g)
        above = run_error(self.m - idx[:, half:], self.total1[:, None] - s1[:, half:],
                          self.total2[:, None] - s2[:, half:], hi_g)
        return below, above


def _square_sums(t: torch.Tensor) -> torch.Tensor:
    """sum(t**2) over the last axis, in float32 (the caller stores it in float64, exactly).

    torch sums float32 values in several vectorised partial sums, about 20x faster than into
    float64 (measured), with a relative error near 1e-7 for the few thousand values of a row:
    that can only flip a comparison of two candidates whose errors are as close (a near-tie)."""
    return t.square_().sum(dim=-1)


def _sorted_rows(xf: torch.Tensor) -> torch.Tensor:
    """Each row of a float32 (rows, values) tensor sorted ascending (a contiguous copy).

    On the CPU NumPy's sort (vectorised sorting networks) is 9-30x faster than torch's here
    (measured on 128 x 1152 and 1000 x 128 weights); the sorted values are the same (only the
    order of -0.0 and 0.0 may differ, which no sum or search below can see).
    """
    if xf.device.type != "cpu":
        return xf.sort(dim=1).values.contiguous()
    return torch.from_numpy(np.sort(xf.detach().numpy(), axis=1))
