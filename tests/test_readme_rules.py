"""The README's "From plan to device" example, run as written, and the scan's refusal of widths
the device rules remove.

Outside checks: the plan's widths against the README's own promise (weights at 4 and 8 bits
from the menu, inputs at 8, within its 64 KiB budget), and the exported file against ONNX's
reference evaluator.
"""

from __future__ import annotations

import re
from pathlib import Path

import pytest
import torch
from torch import nn

from qwidgets import DeviceRules, scan

README = Path(__file__).resolve().parents[1] / "README.md"


def _device_example() -> str:
    text = README.read_text()
    part = text[text.index("## From plan to device"):]
    return re.search(r"```python\n(.*?)```", part, re.S).group(1)


def _model():
    torch.manual_seed(0)
    # 85k weights: 83 KiB at 8 bits, 42 KiB at 4, so the README's 64 KiB budget needs both
    return nn.Sequential(nn.Linear(64, 256), nn.BatchNorm1d(256), nn.ReLU(),
                         nn.Linear(256, 256), nn.BatchNorm1d(256), nn.ReLU(), nn.Linear(256, 10)).eval()


def test_the_readme_device_example_plans_four_and_eight_bits(tmp_path, monkeypatch):
    import onnx  # a dev dependency (pyproject.toml)
    from onnx.reference import ReferenceEvaluator

    monkeypatch.chdir(tmp_path)  # the example writes model.onnx in the working directory
    space = {"model": _model(), "calib": torch.randn(256, 64, generator=torch.Generator().manual_seed(1)),
             "test_x": torch.randn(64, 64, generator=torch.Generator().manual_seed(2))}  # held out
    exec(compile(_device_example(), "README.md", "exec"), space)  # noqa: S102 - the README's own code
    plan, table, rules = space["plan"], space["table"], space["rules"]
    assert table.bits == (4, 8) and table.input_bits == (8,)
    weight_widths = {s.weight.bits for s in plan.layers.values()}
    assert weight_widths == {4, 8}  # the budget trades 4 against 8 bits, as promised
    assert all(s.input.bits == 8 for s in plan.layers.values() if s.input is not None)
    assert all(rules.obeys(s.weight, "weight") for s in plan.layers.values())
    assert plan.model_kib <= 64  # the README's budget, the whole model
    x = space["calib"][:4]
    with torch.no_grad():
        want = space["apply_plan"](space["model"], plan)(x).numpy()
    got = ReferenceEvaluator(onnx.load("model.onnx")).run(None, {"input_0": x.numpy()})[0]
    assert abs(got - want).max() <= 1e-4 * max(1.0, abs(want).max())  # float32 rounding order


def test_rules_that_remove_requested_widths_are_an_error_naming_them():
    model, x = _model(), torch.randn(64, 64)
    rules = DeviceRules(pow2_scales=True, symmetric_weights=True, weight_bits=(4, 8), input_bits=(8,))
    with pytest.raises(ValueError, match=r"bits=\(4, 8\) asks for width\(s\) \[4\].*"
                                         r"quantize='separate', bits=\(4, 8\), input_bits=\(8,\)"):
        scan(model, x, bits=(4, 8), quantize="both", rules=rules, progress=False)
    with pytest.raises(ValueError, match=r"bits=\(2, 4, 6, 8\) asks for width\(s\) \[2, 6\].*"
                                         r"scan with bits=\(4, 8\)"):
        scan(model, x, bits=(2, 4, 6, 8), rules=rules, progress=False)
    with pytest.raises(ValueError, match=r"input_bits=\(4, 8\) asks for width\(s\) \[4\].*"
                                         r"input_bits=\(8,\)"):
        scan(model, x, bits=(4, 8), quantize="separate", input_bits=(4, 8), rules=rules, progress=False)
