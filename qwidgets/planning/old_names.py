"""The budget keywords of the previous release, mapped onto today's names (each warns once).

``weight_kib`` counted the whole model by default (``kib_scope="model"``) while
``Plan.weight_kib`` counted the planned entries only; the two figures now have one name each:
``model_kib`` and ``planned_kib``, on the budget and on the plan alike. ``input_bits`` (the
width BOPs assume where an input stays float) is ``assumed_input_bits``, as on the plan.
"""

from __future__ import annotations

from ..core.renamed import warn_renamed

KIB_SCOPES = {"model": "model_kib", "planned": "planned_kib"}


def kib_scope_name(kib_scope, where: str) -> str:
    """The cost name a deprecated ``kib_scope`` selected for ``weight_kib``."""
    warn_renamed("kib_scope", "model_kib= or planned_kib=", where, stacklevel=5)
    if kib_scope not in KIB_SCOPES:
        raise ValueError(f"kib_scope must be 'model' or 'planned', got {kib_scope!r}")
    return KIB_SCOPES[kib_scope]


def budget_keywords(given: dict, where: str) -> dict:
    """Today's keywords for the old ones in ``given`` (``weight_kib``, ``kib_scope``,
    ``input_bits``); unknown keywords raise TypeError as Python would."""
    given = dict(given)
    unknown = [k for k in given if k not in ("weight_kib", "kib_scope", "input_bits")]
    if unknown:
        raise TypeError(f"{where}() got an unexpected keyword argument {unknown[0]!r}")
    out = {}
    scope = kib_scope_name(given.pop("kib_scope"), where) if "kib_scope" in given else "model_kib"
    if "weight_kib" in given:
        warn_renamed("weight_kib", f"{scope} (the whole model: model_kib; the planned entries "
                     "only: planned_kib)", where, stacklevel=4)
        out[scope] = given.pop("weight_kib")
    if "input_bits" in given:
        warn_renamed("input_bits", "assumed_input_bits", where, stacklevel=4)
        out["assumed_input_bits"] = given.pop("input_bits")
    return out


def cost_name(cost, given: dict, where: str):
    """Today's cost name for ``cost`` (``"weight_kib"`` with the ``kib_scope`` in ``given``)."""
    scope = kib_scope_name(given.pop("kib_scope"), where) if "kib_scope" in given else None
    if cost == "weight_kib":
        new = scope or "model_kib"
        warn_renamed("cost='weight_kib'", f"cost={new!r} (the whole model: 'model_kib'; the "
                     "planned entries only: 'planned_kib')", where, stacklevel=4)
        return new
    return cost
