"""Saving a plan from a widget without ever replacing a file silently."""

from __future__ import annotations

import os

from ..planning.plan import Plan

__all__ = ["save_plan"]


def save_plan(plan: Plan, path, overwrite: bool) -> tuple[str, str]:
    """Write ``plan`` to ``path``, or, when that file exists and ``overwrite`` is False, to the
    first free numbered name beside it (``plan-1.json``, ``plan-2.json``, ...).

    Returns the path written and a sentence saying what was written where.

    >>> import tempfile, os
    >>> from qwidgets import LayerSetting, UniformGrid
    >>> p = Plan({"": LayerSetting(weight=UniformGrid(4, 0.1))}, {"": 4}, fingerprint="-",
    ...          weight_shapes={"": (2, 4)}, macs={"": 8})
    >>> d = tempfile.mkdtemp()
    >>> first, _ = save_plan(p, os.path.join(d, "plan.json"), overwrite=False)
    >>> second, note = save_plan(p, os.path.join(d, "plan.json"), overwrite=False)
    >>> os.path.basename(first), os.path.basename(second), "left as it was" in note
    ('plan.json', 'plan-1.json', True)
    """
    if not isinstance(path, (str, os.PathLike)) or not str(path).strip():
        raise ValueError("type a file path to save the plan to, e.g. plans/board.json")
    path = os.path.expanduser(str(path).strip())
    target, existed = path, os.path.isfile(path)
    if existed and not overwrite:
        stem, ext = os.path.splitext(path)
        n = 1
        while os.path.exists(f"{stem}-{n}{ext}"):
            n += 1
        target = f"{stem}-{n}{ext}"
    plan.save(target)
    verb = "replaced" if existed and overwrite else "wrote"
    note = (f"{verb} {os.path.abspath(target)} with the plan ({len(plan.layers)} layers, "
            + ("" if plan.model_kib is None else f"model_kib {plan.model_kib:,.2f}, ")
            + f"planned_kib {plan.planned_kib:,.2f})")
    if target != path:
        note += f"; {os.path.basename(path)} exists and was left as it was (tick overwrite to replace it)"
    return target, note
