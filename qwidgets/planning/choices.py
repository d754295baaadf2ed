"""The menu the solver chooses from: one option per entry, its predicted noise and its costs.

An option of an entry is a tuple (weight width, input width, weight granularity, input
granularity); None stands for a side that stays float (and for the granularity of a float
side). Input granularities are those of :attr:`SensitivityTable.input_granularities`
(``"token"``: a scale per row at run time, costed like a static grid of its width). Every scanned
granularity of :attr:`SensitivityTable.granularities` is offered with every weight width
(except where the entry skipped it). What a table offers depends on how it was scanned:

- ``quantize="weight"``: every scanned width for the weights, inputs float (BOPs count the
  ``assumed_input_bits``);
- ``"input"``: every scanned width for the input, weights float;
- ``"both"``: the same width for both;
- ``"separate"``: every pair of a scanned weight width and a scanned input width (entries
  with no input rows: weight widths only).

The predicted noise of an option is the additive-noise prediction: quantizing a side at
``b`` bits adds model-output noise power ``signal / 10**(SQNR(b) / 10)`` (its model-scope
SQNR), and the noise powers of sides and entries add (Widrow & Kollar 2008). Costs are exact
integers (see :mod:`qwidgets.planning.costs`), so budgets compare without rounding.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from fractions import Fraction
from numbers import Integral, Real

import numpy as np

from ..core.checks import check_choice, check_int
from ..core.setting import SOURCES
from .costs import COSTS, FLOAT_BITS, grid_storage_bits, layer_bops, weight_storage_bits
from .granularity import check_granularity
from .pins import allowed_input_options, pin_entry
from .pins import menus as _menus
from .table import SensitivityTable

MAX_NOISE = 1e12  # noise power relative to the signal, cap (SQNR >= -120 dB) to keep sums finite



@dataclass(frozen=True)
class Menu:
    """Options per entry: ``options[i]`` lists (weight bits, input bits, granularity, input
    granularity); ``noise[i]`` their predicted noise (relative to the signal power), same order."""

    names: list
    options: list
    noise: list
    assumed_input_bits: int | None  # input width BOPs count where the input stays float
    scale_bits: int = 16  # how block scales are stored
    pinned: tuple = ()  # entries pinned by ``fixed`` (a plan records them)

    def costs(self, table: SensitivityTable, cost: str) -> list:
        """Integer cost of every option of every entry (list of int64 arrays); the products of
        two planned activations are in :meth:`pair_costs` instead. Storage and mean bits count
        the same stored bits (codes, scales, zero points)."""
        out = []
        paired = {n for i, j, _ in self.pairs(table) for n in (self.names[i], self.names[j])}
        for name, opts in zip(self.names, self.options, strict=True):
            macs = table.macs(name)
            act = table.kind(name) == "activation"
            row = []
            for wb, ib, g, _ in opts:
                if cost in ("model_kib", "planned_kib", "mean_bits"):  # stored bits (model_kib: + the unplanned weights)
                    row.append(option_storage_bits(table, name, wb, g, self.scale_bits))
                elif act:  # its product with a float operand (counted at the assumed width)
                    row.append(0 if name in paired else layer_bops(macs, ib, self.assumed_input_bits))
                else:
                    row.append(layer_bops(macs, wb, self.assumed_input_bits if ib is None else ib))
            out.append(np.array(row, dtype=np.int64))
        return out

    def pairs(self, table: SensitivityTable) -> list:
        """``(i, j, macs)``: attention's products whose operands are both planned activations
        (entries ``i`` and ``j``, ``i < j``), each once."""
        at = {n: i for i, n in enumerate(self.names)}
        out = []
        for i, name in enumerate(self.names):
            if table.kind(name) == "activation":
                j = at.get(table.partner(name))
                if j is not None and i < j:
                    out.append((i, j, table.macs(name)))
        return out

    def pair_costs(self, table: SensitivityTable, cost: str) -> list:
        """``(i, j, matrix)`` for each of :meth:`pairs`: the BOPs ``MACs x a x b`` of every
        (option of i, option of j), exact integers; empty for costs other than BOPs."""
        if cost != "bops":
            return []
        return [(i, j, macs * np.outer(a, b)) for i, j, macs, a, b in self._pair_widths(table)]

    def pair_shares(self, table: SensitivityTable, cost: str) -> list:
        """``(i, j, share of i, share of j)``: each product's BOPs split between its operands for
        the Pareto front's dynamic programme, which needs additive costs: ``MACs x a x b`` is
        costed ``ceil(MACs x a^2 / 2) + ceil(MACs x b^2 / 2)``, at least the exact figure
        (``ab <= (a^2 + b^2) / 2``) and equal to it when both widths match, so a point's plan
        never costs more than the front's bound; the front reports each plan's exact BOPs."""
        if cost != "bops":
            return []
        return [(i, j, -(-macs * a * a // 2), -(-macs * b * b // 2))
                for i, j, macs, a, b in self._pair_widths(table)]

    def _pair_widths(self, table: SensitivityTable) -> list:
        """``(i, j, MACs, widths of i's options, widths of j's options)`` for each pair."""
        def widths(k: int) -> np.ndarray:
            return np.array([o[1] for o in self.options[k]], dtype=np.int64)

        return [(i, j, int(macs), widths(i), widths(j)) for i, j, macs in self.pairs(table)]


def option_storage_bits(table, name: str, wb: int | None, granularity, scale_bits: int = 16) -> int:
    """Stored bits of ``name``'s weight at ``wb`` bits on the ``granularity`` grids."""
    p = table.params(name)
    if wb is None:
        return FLOAT_BITS * p
    if granularity == "tensor":
        return weight_storage_bits(p, wb, 1)
    if granularity == "channel":
        return weight_storage_bits(p, wb, table.weight_shape(name)[table.weight_axis(name)])
    return grid_storage_bits(table.weight_grid(name, wb, granularity=granularity), table.weight_shape(name),
                             scale_bits)


def check_table(table) -> SensitivityTable:
    if not isinstance(table, SensitivityTable):
        raise TypeError(f"table must be a SensitivityTable, got {type(table).__name__}")
    return table


def check_cost(cost) -> str:
    return check_choice(cost, COSTS, "cost")


def check_assumed_input_bits(input_bits) -> int | None:
    # None: float inputs
    return check_int(input_bits, "assumed_input_bits", minimum=1, maximum=16, none_ok=True)


def check_budgets(**budgets) -> dict:
    """The budgets given (name -> float), at least one, each a finite number > 0."""
    given = {k: v for k, v in budgets.items() if v is not None}
    if not given:
        raise ValueError(f"give at least one budget ({', '.join(budgets)}); got none")
    for name, value in given.items():
        if isinstance(value, bool) or not isinstance(value, Real):
            raise TypeError(f"{name} must be a number, got {value!r} ({type(value).__name__})")
        if not math.isfinite(value) or value <= 0:
            raise ValueError(f"{name} must be a finite number > 0, got {value}")
    return {k: float(v) for k, v in given.items()}


def limit(cost: str, value: float, table) -> int:
    """The budget as an integer bound on the summed integer costs.

    Computed in exact fractions; the factor ``1 + 2**-50`` (a few float ulps) lets a budget
    that is a float rounding of an exact cost, e.g. ``mean_bits = total_bits / params``, admit
    that cost.
    """
    v = Fraction(value) * (1 + Fraction(1, 2**50))
    return math.floor(v * unit(cost, table))


def unit(cost: str, table) -> int:
    """The divisor that turns a summed integer cost into the budget's unit."""
    if cost in ("model_kib", "planned_kib"):
        return 8192
    if cost == "mean_bits":
        return sum(table.params(n) for n in table.layers)
    return 1


def in_unit(c: int, cost: str, table):
    return c if cost == "bops" else c / unit(cost, table)


def ceil_unit(c: int, cost: str, table) -> str:
    """A summed cost in the budget's unit, rounded up in the last printed digit (so the stated
    budget really is feasible)."""
    if cost == "bops":
        return str(int(c))
    return f"{math.ceil(c / unit(cost, table) * 1e4) / 1e4:.4f}"


def _noise(sq: np.ndarray) -> np.ndarray:
    with np.errstate(over="ignore"):
        return np.minimum(np.power(10.0, -np.asarray(sq, dtype=float) / 10.0), MAX_NOISE)


def _model_rows(table, source: str, granularity=None):
    sq = table.sqnr_array("model", source=source, granularity=granularity) if source == "weight" \
        else table.sqnr_array("model", source=source)
    if sq is None:
        raise ValueError("the table holds no model-scope SQNR; plan budgets need it: "
                         "scan with scope='model' or scope='both'")
    return _noise(sq)


def _check_widths(widths, scanned: tuple, where: str) -> tuple:
    if isinstance(widths, Integral) and not isinstance(widths, bool):
        widths = (widths,)
    if isinstance(widths, (str, bytes)) or not isinstance(widths, Sequence) or not widths:
        raise TypeError(f"{where} must be a non-empty tuple of scanned bit widths, got {widths!r}")
    for b in widths:
        if isinstance(b, bool) or not isinstance(b, Integral):
            raise TypeError(f"{where} must hold ints, got {b!r}")
        if int(b) not in scanned:
            raise ValueError(f"{where} holds {b}, which was not scanned; scanned widths: {list(scanned)}")
    return tuple(sorted({int(b) for b in widths}))


def _allowed(table, allowed_bits) -> tuple[tuple, tuple]:
    """Allowed (weight widths, input widths); a plain tuple restricts the table's own width
    (the weight width, or the input width of a table that quantized inputs only)."""
    w_all, i_all = _menus(table)
    if allowed_bits is None:
        return w_all, i_all
    if isinstance(allowed_bits, Mapping):
        unknown = [k for k in allowed_bits if k not in SOURCES]
        if unknown:
            raise ValueError(f"allowed_bits keys must be 'weight' and / or 'input', got {unknown}")
        w, i = w_all, i_all
        if "weight" in allowed_bits:
            if not w_all:
                raise ValueError("allowed_bits['weight']: this table did not quantize weights "
                                 f"(quantize={table.quantize!r})")
            w = _check_widths(allowed_bits["weight"], w_all, "allowed_bits['weight']")
        if "input" in allowed_bits:
            if not i_all:
                raise ValueError("allowed_bits['input']: this table has no input widths; scan with "
                                 "quantize='separate' (or 'input' / 'both')")
            i = _check_widths(allowed_bits["input"], i_all, "allowed_bits['input']")
        if table.quantize == "both" and "weight" in allowed_bits and "input" in allowed_bits:
            w = i = tuple(sorted(set(w) & set(i)))
            if not w:
                raise ValueError("allowed_bits: a table scanned with quantize='both' uses one width "
                                 "for both sides, and the weight and input menus share none")
        elif table.quantize == "both":
            w = i = w if "weight" in allowed_bits else i
        return w, i
    if table.quantize == "input":
        return w_all, _check_widths(allowed_bits, i_all, "allowed_bits")
    w = _check_widths(allowed_bits, w_all, "allowed_bits")
    return w, (w if table.quantize == "both" else i_all)


def _all_options(table, name: str) -> list:
    q, bits = table.quantize, table.bits
    igs = table.input_granularities if q == "separate" and table.has_input_rows(name) else ("tensor",)
    if table.kind(name) == "activation":  # no weight: an input width only
        return [(None, b, None, ig) for ig in igs for b in (table.input_bits if q == "separate" else bits)]
    if q == "input":
        return [(None, b, None, "tensor") for b in bits]
    if q == "weight":
        pairs = [(b, None) for b in bits]
    elif q == "both":
        pairs = [(b, b) for b in bits]
    elif table.has_input_rows(name):
        pairs = [(w, i) for w in bits for i in table.input_bits]
    else:
        pairs = [(w, None) for w in bits]
    return [(w, i, g, None if i is None else ig) for g in table.granularities for ig in igs
            for w, i in pairs if i is not None or ig == igs[0]]


def _allowed_granularity(table, allowed) -> tuple:
    if allowed is None:
        return tuple(table.granularities)
    allowed = check_granularity(allowed, name="allowed_granularity")
    missing = [g for g in allowed if g not in table.granularities]
    if missing:
        raise ValueError(f"allowed_granularity holds {missing}, which the table did not scan; "
                         f"scanned: {list(table.granularities)}")
    return allowed


def build_menu(table, *, fixed=None, allowed_bits=None, assumed_input_bits: int | None = 8,
               allowed_granularity=None, scale_bits: int = 16, allowed_input_granularity=None) -> Menu:
    """Every entry's options after ``fixed`` pins and the ``allowed_bits``,
    ``allowed_granularity`` and ``allowed_input_granularity`` menus, with noise (options an
    entry skipped in the scan: left out)."""
    check_table(table)
    assumed_input_bits = check_assumed_input_bits(assumed_input_bits)
    w_ok, i_ok = _allowed(table, allowed_bits)
    g_ok = _allowed_granularity(table, allowed_granularity)
    ig_ok = allowed_input_options(table, allowed_input_granularity)
    if fixed is None:
        fixed = {}
    if not isinstance(fixed, Mapping):
        raise TypeError(f"fixed must be a dict of entry name -> width or (weight, input) pair, got {fixed!r}")
    unknown = [n for n in fixed if n not in table.layers]
    if unknown:
        raise ValueError(f"fixed names {unknown}, not in the table; entries: {table.layers}")
    q = table.quantize
    main = {g: _model_rows(table, "weight", g) for g in table.granularities}  # over table.bits
    extra = {ig: _noise(table.sqnr_array("model", "input", None if ig == "tensor" else ig))
             for ig in table.input_granularities} if q == "separate" else None
    col = {b: j for j, b in enumerate(table.bits)}
    i_col = {b: j for j, b in enumerate(table.input_bits)} if q == "separate" else {}
    options, noise = [], []
    for r, name in enumerate(table.layers):
        opts = _all_options(table, name)
        pw = pi = pg = pig = None
        if name in fixed:
            pw, pi, pg, pig = pin_entry(table, name, fixed[name])
        opts = [o for o in opts if (pw is None or o[0] == pw) and (pi is None or o[1] == pi)
                and (pg is None or o[2] == pg) and (pig is None or o[3] == pig)]
        if pw is None and pi is None:  # an entry with pinned widths is not restricted by the menus
            opts = [o for o in opts if (o[0] is None or o[0] in w_ok) and (o[1] is None or o[1] in i_ok)]
        if pg is None:
            opts = [o for o in opts if o[2] is None or o[2] in g_ok]
        if pig is None:
            opts = [o for o in opts if o[3] is None or o[3] in ig_ok]
        # options the entry skipped in the scan (blocks longer than its input axis): not offered
        opts = [o for o in opts if (o[0] is None and q == "separate") or not math.isnan(
            main[o[2] or table.granularities[0]][r, col[o[1] if o[0] is None else o[0]]])]
        if not opts:
            raise ValueError(f"no option is left for {name!r} after fixed, allowed_bits, "
                             "allowed_granularity and allowed_input_granularity")
        n = []
        for wb, ib, g, ig in opts:
            if wb is None and q == "separate":
                v = 0.0  # an activation: its input rows only
            else:
                v = float(main[g or table.granularities[0]][r, col[ib if wb is None else wb]])
            if q == "separate" and ib is not None:
                v += float(extra[ig][r, i_col[ib]])
            n.append(v)
        options.append(opts)
        noise.append(np.array(n, dtype=float))
    return Menu(list(table.layers), options, noise, assumed_input_bits, scale_bits, tuple(n for n in table.layers if n in fixed))
