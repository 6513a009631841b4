"""qfit.whatif: largest fitting input resolution, tiled leading layers (halo MACs and peak), flash
changes — checked against figures worked by hand from the layer shapes."""
from __future__ import annotations

import numpy as np
from onnx import TensorProto, helper, numpy_helper

from qfit.memory import budget
from qfit.report.build import build_budget_report
from qfit.report.text import summary_text
from qfit.graph.load import prepare_model
from qfit.quant.plan import PlanOptions, make_plan


def _model(layers, input_shape, out_features=10, reshape_fixed=False):
    """Convs (cout, kernel, stride, pad) without activations, then GlobalAveragePool -> Flatten
    (or a Reshape to a fixed size) -> Gemm."""
    rng = np.random.default_rng(0)
    inits, nodes = [], []
    x, cin = "x", input_shape[1]
    for i, (cout, k, s, p) in enumerate(layers):
        inits.append(numpy_helper.from_array(rng.standard_normal((cout, cin, k, k)).astype(np.float32), f"w{i}"))
        nodes.append(helper.make_node("Conv", [x, f"w{i}"], [f"c{i}"], name=f"conv{i}", kernel_shape=[k, k],
                                      strides=[s, s], pads=[p] * 4))
        x, cin = f"c{i}", cout
    nodes.append(helper.make_node("GlobalAveragePool", [x], ["gap"], name="gap"))
    if reshape_fixed:
        inits.append(numpy_helper.from_array(np.array([1, cin], np.int64), "shape"))
        nodes.append(helper.make_node("Reshape", ["gap", "shape"], ["flat"], name="flat"))
    else:
        nodes.append(helper.make_node("Flatten", ["gap"], ["flat"], name="flat"))
    inits.append(numpy_helper.from_array(rng.standard_normal((out_features, cin)).astype(np.float32), "wf"))
    nodes.append(helper.make_node("Gemm", ["flat", "wf"], ["y"], name="fc", transB=1))
    graph = helper.make_graph(nodes, "m", [helper.make_tensor_value_info("x", TensorProto.FLOAT, list(input_shape))],
                              [helper.make_tensor_value_info("y", TensorProto.FLOAT, [1, out_features])], inits)
    return helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)])


def _run(model, sram, plan_options=None, **options):
    loaded = prepare_model(model)
    plan = make_plan(loaded, plan_options)
    return budget.analyze(loaded, plan, budget.BudgetOptions(sram_limit_bytes=sram, **options))


# ---- (a) resolution -----------------------------------------------------------------------------

def test_largest_fitting_resolution_as_worked_by_hand():
    # One 3->8 conv at HxW: the peak is its input + output, 3HW + 8HW = 11HW bytes in int8 (common
    # practice: a chain peaks at max input + output). Limit 11 x 72 x 72: 72x72 is the largest
    # multiple of 8 that fits (80x80 needs 70 400 B); the largest multiple of 16 is 64x64.
    result = _run(_model([(8, 3, 1, 1)], (1, 3, 96, 96)), sram=11 * 72 * 72)
    res = result.what_if["resolution"]
    assert result.sram["peak_bytes"] == 11 * 96 * 96
    assert res["largest_fitting"]["step_8"]["height"] == 72 and res["largest_fitting"]["step_8"]["width"] == 72
    assert res["largest_fitting"]["step_8"]["arena_bytes"] == 11 * 72 * 72
    assert res["largest_fitting"]["step_16"]["height"] == 64
    assert res["largest_fitting"]["step_16"]["arena_bytes"] == 11 * 64 * 64
    # the MAC count at the smaller size follows the conv formula Cout x H x W x Cin x k x k
    assert res["largest_fitting"]["step_8"]["macs"] == 8 * 72 * 72 * 3 * 9 + 8 * 10
    assert "input 72x72" in summary_text(build_budget_report("conv.onnx", False, result))


def test_resolution_keeps_the_aspect_ratio():
    # 96x128 is 3:4; every size tried keeps 3:4 with both sides multiples of the step.
    result = _run(_model([(8, 3, 1, 1)], (1, 3, 96, 128)), sram=11 * 48 * 64)
    res = result.what_if["resolution"]
    best = res["largest_fitting"]["step_16"]
    assert (best["height"], best["width"]) == (48, 64)
    for row in res["tried"][1:]:
        # the width is the 4/3 height rounded to the nearest multiple of the step (8 or 16)
        assert row["height"] % 8 == 0 and row["width"] % 8 == 0
        assert abs(row["width"] - row["height"] * 4 / 3) <= 8


def test_sizes_whose_shape_inference_fails_are_skipped():
    # A Reshape to a fixed element count only works at the original size: other sizes fail
    # shape inference and are reported, not guessed.
    model = _model([(8, 3, 1, 1)], (1, 3, 32, 32), reshape_fixed=False)
    rng = np.random.default_rng(1)
    # replace Flatten by a Reshape of the conv output to a fixed 1 x (8*32*32)
    g = model.graph
    flat = next(n for n in g.node if n.op_type == "Flatten")
    gap = next(n for n in g.node if n.op_type == "GlobalAveragePool")
    g.node.remove(gap)
    flat.op_type, flat.input[:] = "Reshape", ["c0", "fixed_shape"]
    g.initializer.append(numpy_helper.from_array(np.array([1, 8 * 32 * 32], np.int64), "fixed_shape"))
    wf = next(i for i in g.initializer if i.name == "wf")
    g.initializer.remove(wf)
    g.initializer.append(numpy_helper.from_array(rng.standard_normal((10, 8 * 32 * 32)).astype(np.float32), "wf"))
    result = _run(model, sram=100)
    res = result.what_if["resolution"]
    failed = [r for r in res["tried"] if r["arena_bytes"] is None]
    assert failed and all("shape inference" in r["note"] for r in failed)
    assert res["largest_fitting"]["step_8"] is None


# ---- (b) tiling ---------------------------------------------------------------------------------

def _tiling_rows(result, split):
    return {r["n"]: r for r in result.what_if["tiling"]["options"] if r["split_after"] == split}


def test_tiling_halo_macs_and_peak_as_worked_by_hand():
    # Two 3x3 stride-1 pad-1 convs (2 -> 4 -> 4 channels) on 8x8, tiles of the second conv's output.
    # Source: receptive-field back-propagation (Lin et al., NeurIPS 2021): an output interval
    # [a, b] reads input rows [a*s - pad, b*s - pad + (k-1)*d], clipped to the tensor.
    # 2x2 tiles: output rows [0,3] and [4,7] -> conv0 rows [0,4] and [3,7]: 5x5 per tile,
    # 4 x 25 = 100 positions of conv0 instead of 64 -> 36 extra x (4 x 2 x 9) MACs.
    result = _run(_model([(4, 3, 1, 1), (4, 3, 1, 1)], (1, 2, 8, 8)), sram=400)
    rows = _tiling_rows(result, "conv1")
    per_position = 4 * 2 * 9
    assert rows[2]["extra_macs"] == (4 * 25 - 64) * per_position
    # 3x3 tiles: rows split [0,1] [2,4] [5,7] -> conv0 rows [0,2] [1,5] [4,7] = 3 + 5 + 4 = 12,
    # so 12 x 12 = 144 positions instead of 64.
    assert rows[3]["extra_macs"] == (12 * 12 - 64) * per_position
    # Peak of the tiled stage (docs/memory.md): the input (2x8x8 = 128 B) and the split tensor
    # (4x8x8 = 256 B) stay whole, plus one tile of conv0's output (4 x 5 x 5 = 100 B) -> 484 B.
    # Untiled, the second conv holds 256 + 256 = 512 B.
    assert result.sram["peak_bytes"] == 512
    assert rows[2]["stage_peak_bytes"] == 128 + 256 + 100
    assert rows[2]["peak_bytes"] == 484 and rows[2]["fits"] is False
    assert rows[2]["extra_macs_pct"] == round(100 * rows[2]["extra_macs"] / result.macs["total"], 2)


def test_tiling_halo_through_a_strided_conv():
    # conv0 3x3 stride 2 pad 1: 8x8 -> 4x4; conv1 3x3 stride 1 pad 1: 4x4 -> 4x4. 2x2 tiles of conv1:
    # rows [0,1] -> conv0 rows [0,2], rows [2,3] -> [1,3]: 3x3 per tile, 36 positions instead of 16.
    result = _run(_model([(4, 3, 2, 1), (4, 3, 1, 1)], (1, 2, 8, 8)), sram=100)
    rows = _tiling_rows(result, "conv1")
    assert rows[2]["extra_macs"] == (4 * 9 - 16) * (4 * 2 * 9)


def test_no_halo_when_only_the_first_layer_has_a_window():
    # A 3x3 conv followed by a 1x1 conv: tiles of the 1x1 output need exactly the same rows of the
    # 3x3 output, so tiling adds no MACs (the halo is on the stored input, not on computed values).
    result = _run(_model([(4, 3, 1, 1), (4, 1, 1, 0)], (1, 2, 8, 8)), sram=100)
    assert all(r["extra_macs"] == 0 for r in _tiling_rows(result, "conv1").values())


# ---- (c) flash and the trigger ------------------------------------------------------------------

def test_flash_what_if_prices_precision_changes_per_layer():
    model = _model([(8, 3, 1, 1), (4, 1, 1, 0)], (1, 3, 8, 8))
    loaded = prepare_model(model)
    plan = make_plan(loaded, PlanOptions(float_nodes=frozenset({"conv1"})))
    result = budget.analyze(loaded, plan, budget.BudgetOptions(flash_limit_bytes=100, what_if=None))
    rows = {r["name"]: r for r in result.what_if["flash"]["largest_layers"]}
    # Source: worked by hand. conv1 kept float: 32 weights x 4 B = 128 B; as int8 its weights would
    # be 32 B: saves 96 B. conv0 int8: 216 B weights + 8 x 5 B scales = 256 B; float32 would be 864 B.
    assert rows["conv1"]["if_int8_saves_bytes"] == 128 - 32
    assert rows["conv0"]["total_bytes"] == 216 + 40
    assert rows["conv0"]["if_float_costs_bytes"] == 864 - 256
    assert result.what_if["flash"]["over_limit_bytes"] == result.flash["total_bytes"] - 100


def test_what_ifs_run_only_when_something_does_not_fit_or_when_asked():
    model = _model([(8, 3, 1, 1)], (1, 3, 16, 16))
    assert _run(model, sram=1 << 20).what_if is None
    assert _run(model, sram=1 << 20, what_if=True).what_if is not None
    assert _run(model, sram=100).what_if is not None
