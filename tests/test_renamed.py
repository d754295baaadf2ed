"""The previous release's names keep working for one release, warn once naming the new
spelling, and give what the new spelling gives (qwidgets/core/renamed.py, CHANGELOG.md)."""

from __future__ import annotations

import warnings

import numpy as np
import pytest
import torch

from qwidgets import SensitivityTable, error_stats, pareto_front, plan_budget
from qwidgets.core import renamed
from qwidgets.model.forward import ModelError
from qwidgets.planning.evaluate import PlanReport


@pytest.fixture(autouse=True)
def fresh_warnings(monkeypatch):
    monkeypatch.setattr(renamed, "_warned", set())  # each test sees the first use


@pytest.fixture
def table():
    t = SensitivityTable.synthetic(np.array([[10.0, 30.0], [20.0, 40.0]]), params=[100, 300],
                                   bits=(4, 8), macs=[50, 70])
    return t


def _warned_once(call, new: str):
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        first = call()
        second = call()
    msgs = [str(w.message) for w in caught if issubclass(w.category, DeprecationWarning)]
    assert len(msgs) == 1 and new in msgs[0] and "deprecated" in msgs[0], msgs
    assert second is not None
    return first


def test_weight_kib_is_model_kib_and_with_planned_scope_planned_kib(table):
    kib = table.make_plan({"layer0": 8, "layer1": 4}).model_kib
    old = _warned_once(lambda: plan_budget(table, weight_kib=kib), "model_kib")
    assert old.bits == plan_budget(table, model_kib=kib).bits
    old = plan_budget(table, weight_kib=kib, kib_scope="planned")
    assert old.bits == plan_budget(table, planned_kib=kib).bits


def test_input_bits_is_assumed_input_bits(table):
    old = _warned_once(lambda: plan_budget(table, bops=50 * 8 * 4 + 70 * 4 * 4, input_bits=4),
                       "assumed_input_bits")
    new = plan_budget(table, bops=50 * 8 * 4 + 70 * 4 * 4, assumed_input_bits=4)
    assert old.bits == new.bits and old.bops == new.bops
    front_old = pareto_front(table, "bops", input_bits=4)
    assert [c for c, _, _ in front_old] == [c for c, _, _ in pareto_front(table, "bops", assumed_input_bits=4)]


def test_front_cost_weight_kib_is_model_kib(table):
    old = _warned_once(lambda: pareto_front(table, "weight_kib"), "model_kib")
    assert [c for c, _, _ in old] == [c for c, _, _ in pareto_front(table, "model_kib")]


def test_a_budget_under_both_names_and_unknown_keywords_are_refused(table):
    with pytest.raises(TypeError, match="model_kib twice"):
        plan_budget(table, model_kib=1.0, weight_kib=1.0)
    with pytest.raises(TypeError, match="unexpected keyword argument 'kib_budget'"):
        plan_budget(table, kib_budget=1.0)
    with pytest.raises(TypeError, match="unexpected keyword argument 'weight_kib'"):
        pareto_front(table, "bops", weight_kib=1.0)


def test_plan_attributes_keep_their_old_names(table):
    plan = table.make_plan({"layer0": 8, "layer1": 4})
    assert _warned_once(lambda: plan.weight_kib, "planned_kib") == plan.planned_kib
    assert _warned_once(lambda: plan.mean_weight_bits, "mean_bits") == plan.mean_bits
    assert _warned_once(lambda: plan.float_weight_kib, "float_planned_kib") == plan.float_planned_kib


def test_metric_change_is_minus_drop():
    stats = error_stats(torch.ones(3), torch.ones(3))
    rep = PlanReport(measured_sqnr_db=30.0, predicted_sqnr_db=None, output=stats, metric_float=0.9,
                     metric_planned=0.85, planned_kib=1.0, float_planned_kib=4.0, mean_bits=8.0,
                     bops=1, float_bops=2)
    assert rep.drop == 0.9 - 0.85  # float minus planned, the one sign
    assert _warned_once(lambda: rep.metric_change, "drop") == -rep.drop
    err = ModelError(stats, 0.9, 0.8)
    assert err.drop == 0.9 - 0.8
    assert _warned_once(lambda: err.metric_change, "drop") == -err.drop


def test_plan_input_bits_is_chosen_input_bits_and_make_plan_input_bits_maps_by_meaning():
    t = SensitivityTable.synthetic([[10.0, 30.0]], params=[100], bits=(4, 8),
                                   input_sqnr_db=[[25.0, 35.0]], input_bits=(6, 8), macs=[10])
    plan = t.make_plan({"layer0": 4}, chosen_input_bits={"layer0": 6})
    assert _warned_once(lambda: plan.input_bits, "chosen_input_bits") == plan.chosen_input_bits == {"layer0": 6}
    # on a separate table the old input_bits chose input widths ...
    old = _warned_once(lambda: t.make_plan({"layer0": 4}, input_bits={"layer0": 6}), "chosen_input_bits")
    assert old.chosen_input_bits == {"layer0": 6}
    # ... on a weight table it was the width BOPs assume
    w = SensitivityTable.synthetic([[10.0, 30.0]], params=[100], bits=(4, 8), macs=[10])
    renamed._warned.clear()
    old = _warned_once(lambda: w.make_plan({"layer0": 4}, input_bits=6), "assumed_input_bits")
    assert old.bops == w.make_plan({"layer0": 4}, assumed_input_bits=6).bops == 10 * 4 * 6
