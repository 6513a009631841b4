"""What would make flash fit (qfit.memory.whatif.flash_what_if), on the demo model (calib_demo/).

The bytes a layer frees with 4-bit weights are checked against the element count of its weight
initializer read from the ONNX file (int8: one byte per weight; 4-bit: two weights per byte, the
packing of sub-byte weights that is common practice), and against the budget of the same plan with
those weights really set to 4 bits.
"""
from __future__ import annotations

import dataclasses
import math
import pathlib

import numpy as np
import onnx
import pytest
from onnx import numpy_helper

from qfit.graph.load import load_model
from qfit.memory import budget
from qfit.quant.plan import make_plan

DEMO_MODEL = pathlib.Path(__file__).resolve().parent.parent / "calib_demo" / "model.onnx"


@pytest.fixture(scope="module")
def demo():
    loaded = load_model(str(DEMO_MODEL))
    return loaded, make_plan(loaded)


def _analyze(loaded, plan, flash_limit: int, sram_limit: int = 256 << 10, **extra):
    options = budget.BudgetOptions(flash_limit_bytes=flash_limit, sram_limit_bytes=sram_limit,
                                   order_time_limit_s=0.5, **extra)
    return budget.analyze(loaded, plan, options)


def _conv_weight_elements() -> dict[str, int]:
    """Conv node name -> element count of its weight, from the ONNX file itself."""
    model = onnx.load(str(DEMO_MODEL))
    sizes = {init.name: int(np.prod(numpy_helper.to_array(init).shape)) for init in model.graph.initializer}
    return {node.name: sizes[node.input[1]] for node in model.graph.node if node.op_type == "Conv"}


def test_flash_failing_demo_gets_the_excess_and_4bit_and_width_estimates(demo):
    loaded, plan = demo
    result = _analyze(loaded, plan, 64 << 10)
    flash = result.what_if["flash"]
    assert result.flash_fits is False and result.sram_fits is True
    assert flash["excess_bytes"] == result.flash["total_bytes"] - (64 << 10) > 0
    # SRAM fits already: no SRAM advice (resolution, tiling) for a flash failure
    assert result.what_if["sram_fits_already"] is True
    assert result.what_if["resolution"] is None and result.what_if["tiling"] is None
    elements = _conv_weight_elements()
    for row in flash["largest_layers"]:
        if row["op_type"] == "Conv":
            n = elements[row["name"]]
            assert row["if_4bit_frees_bytes"] == n - math.ceil(n / 2)
        assert row["if_half_width_frees_bytes"] >= row["total_bytes"] // 2 - 64  # its own half at least
    assert set(flash["estimates"]) == {"if_4bit_frees_bytes", "if_half_width_frees_bytes"}
    assert "estimates" in flash["estimate_note"]


def test_the_layers_named_for_4bit_really_remove_the_excess(demo):
    loaded, plan = demo
    total = _analyze(loaded, plan, None, what_if=False).flash["total_bytes"]
    limit = total - 100_000                      # 100 kB over: a few large layers at 4 bits suffice
    result = _analyze(loaded, plan, limit)
    advice = result.what_if["flash"]["fit_at_4bit"]
    assert advice["enough"] and advice["frees_bytes"] >= 100_000
    # the fewest layers: without the last one named, the others free too little
    rows = {row["name"]: row for row in result.flash["layers"]}
    freed = {name: _four_bit_frees(rows[name]["weight_bytes"]) for name in advice["layers"]}
    assert advice["frees_bytes"] == sum(freed.values())
    assert advice["frees_bytes"] - freed[advice["layers"][-1]] < 100_000
    # The plan with those layers' weights really at 4 bits: flash fits, by the budget's own count
    weights = {key: (dataclasses.replace(w, bits=4) if key[0] in advice["layers"] else w)
               for key, w in plan.weights.items()}
    four_bit = dataclasses.replace(plan, weights=weights)
    after = _analyze(loaded, four_bit, limit, what_if=False)
    assert after.flash_fits is True
    assert total - after.flash["total_bytes"] == advice["frees_bytes"]


def _four_bit_frees(int8_weight_bytes: int) -> int:
    """int8: one byte per weight; 4-bit: two weights per byte, rounded up."""
    return int8_weight_bytes - math.ceil(int8_weight_bytes / 2)


def test_sram_advice_is_still_given_when_sram_fails(demo):
    loaded, plan = demo
    result = _analyze(loaded, plan, 64 << 10, sram_limit=128 << 10)
    assert result.what_if["sram_fits_already"] is False
    assert result.what_if["resolution"] is not None and result.what_if["tiling"] is not None
