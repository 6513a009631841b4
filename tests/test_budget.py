"""qfit.budget: flash map, SRAM timeline, arena, MACs, QDQ read-back and the `qfit budget` command,
checked against published architecture figures and figures worked by hand from the shapes."""
from __future__ import annotations

import hashlib
import json
import os
import sys

import numpy as np
import onnx
import pytest
from onnx import TensorProto, helper, numpy_helper

from qfit.memory import budget
from qfit.report.build import build_budget_report
from qfit.report.markdown import markdown
from qfit.report.text import summary_text
from qfit.quant import qdq_read
from qfit.errors import QfitError
from qfit.graph.load import prepare_model
from qfit.quant.plan import PlanOptions, make_plan

sys.path.insert(0, os.path.dirname(__file__))
import zoo  # noqa: E402
from test_schedule import assert_no_overlap  # noqa: E402

NO_WHAT_IF = dict(what_if=False)


def analyze(model, plan_options=None, **options):
    loaded = prepare_model(model)
    plan = make_plan(loaded, plan_options)
    return loaded, plan, budget.analyze(loaded, plan, budget.BudgetOptions(**{**NO_WHAT_IF, **options}))


# ---- published architectures ------------------------------------------------------------------

@pytest.fixture(scope="module")
def mobilenet_v2():
    zm = zoo.mobilenet_v2()
    loaded = prepare_model(zm.model)
    plan = make_plan(loaded)
    return loaded, budget.analyze(loaded, plan, budget.BudgetOptions(**NO_WHAT_IF))


def test_mobilenet_v2_params_and_macs_match_the_paper(mobilenet_v2):
    _, result = mobilenet_v2
    # Source: Sandler et al., CVPR 2018, Table 4 — MobileNetV2 1.0 at 224: 3.4 M parameters, 300 M MAdds.
    assert 3.4e6 <= result.model["params"] <= 3.5e6
    assert abs(result.model["macs"] - 300e6) / 300e6 < 0.01
    assert result.macs["total"] == result.model["macs"]


def test_mobilenet_v2_int8_peak_is_the_expanded_tensor_of_the_second_block(mobilenet_v2):
    loaded, result = mobilenet_v2
    # Source: Sandler et al., CVPR 2018, Table 2. Stem 3x3/2 -> 112x112x32; bottleneck 1 (t=1, c=16)
    # -> 112x112x16; bottleneck 2 (t=6, c=24, s=2) expands 16 -> 96 channels at 112x112, then its
    # depthwise 3x3/2 reads that and writes 56x56x96. In layer order with int8 activations the peak
    # is that depthwise step: input + output (1.4-1.5 MB, the figure practitioners quote).
    expanded = 112 * 112 * 96
    depthwise_out = 56 * 56 * 96
    assert result.sram["peak_bytes"] == expanded + depthwise_out == 1_505_280
    assert result.order["default_peak_bytes"] == 1_505_280
    peak_node = next(n for n in loaded.graph.node if n.name == result.sram["peak_node"])
    assert peak_node.op_type == "Conv" and loaded.shapes[peak_node.input[1]] == (96, 1, 3, 3)
    assert sorted(t["bytes"] for t in result.sram["live_at_peak"]) == [depthwise_out, expanded]
    assert_no_overlap(result.arena["plan"])
    assert result.arena["bytes"] >= result.sram["peak_bytes"]


def test_resnet18_params_and_macs_match_the_paper():
    zm = zoo.resnet18()
    _, _, result = analyze(zm.model)
    # Source: He et al., CVPR 2016, Table 1: 1.8 x 10^9 FLOPs (multiply-adds) for 18 layers;
    # 11.7 M parameters is the figure commonly quoted for it (common practice).
    assert round(result.model["params"] / 1e6, 1) == 11.7
    assert 1.75e9 <= result.model["macs"] <= 1.85e9
    assert_no_overlap(result.arena["plan"])


# ---- a small model worked by hand -------------------------------------------------------------

def _hand_model():
    """x 1x3x8x8 -> Conv1 (8x3x3x3 + bias, pad 1) -> Relu -> Conv2 (4x8x1x1 + bias, kept float)
    -> Reshape [1, 256] -> Gemm (10x256, transB, + bias) -> y."""
    rng = np.random.default_rng(1)

    def w(name, shape):
        return numpy_helper.from_array(rng.standard_normal(shape).astype(np.float32), name)

    inits = [w("w1", (8, 3, 3, 3)), w("b1", (8,)), w("w2", (4, 8, 1, 1)), w("b2", (4,)),
             w("w3", (10, 256)), w("b3", (10,)), numpy_helper.from_array(np.array([1, 256], np.int64), "shape")]
    nodes = [helper.make_node("Conv", ["x", "w1", "b1"], ["c1"], name="conv1", pads=[1, 1, 1, 1]),
             helper.make_node("Relu", ["c1"], ["r1"], name="relu1"),
             helper.make_node("Conv", ["r1", "w2", "b2"], ["c2"], name="conv2"),
             helper.make_node("Reshape", ["c2", "shape"], ["flat"], name="reshape"),
             helper.make_node("Gemm", ["flat", "w3", "b3"], ["y"], name="fc", transB=1)]
    graph = helper.make_graph(nodes, "hand", [helper.make_tensor_value_info("x", TensorProto.FLOAT, [1, 3, 8, 8])],
                              [helper.make_tensor_value_info("y", TensorProto.FLOAT, [1, 10])], inits)
    return helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)])


def _hand_analysis(**options):
    loaded = prepare_model(_hand_model())
    plan = make_plan(loaded, PlanOptions(float_nodes=frozenset({"conv2"})))
    plan.weights[("fc", 1)].bits = 16          # a layer with 16-bit weights
    result = budget.analyze(loaded, plan, budget.BudgetOptions(**{**NO_WHAT_IF, **options}))
    return loaded, plan, result


def test_flash_map_counts_each_storage_kind_as_worked_by_hand():
    _, _, result = _hand_analysis(meta_bytes_per_layer=100, flash_reserve_bytes=1000, flash_limit_bytes=7188)
    f = result.flash
    rows = {r["name"]: r for r in f["layers"]}
    # Source: worked by hand. int8 weights 1 B, int32 bias 4 B, a float32 scale (4 B) and an int8
    # zero point (1 B) per output channel; 16-bit weights 2 B with a 2 B zero point; float 4 B.
    assert rows["conv1"]["weight_bytes"] == 8 * 3 * 3 * 3
    assert rows["conv1"]["bias_bytes"] == 8 * 4
    assert rows["conv1"]["scale_bytes"] == 8 * (4 + 1)
    assert rows["conv1"]["total_bytes"] == 216 + 32 + 40
    assert rows["conv2"]["precision"] == "float"
    assert rows["conv2"]["float_bytes"] == rows["conv2"]["total_bytes"] == (32 + 4) * 4
    assert rows["fc"]["weight_bytes"] == 2560 * 2
    assert rows["fc"]["scale_bytes"] == 10 * (4 + 2)
    assert rows["fc"]["bias_bytes"] == 10 * 4
    assert rows["reshape"]["other_bytes"] == 16                    # the int64 shape, stored as is
    int8_bytes = 288 + 144 + (5120 + 60 + 40) + 16
    assert f["int8_bytes"] == int8_bytes
    assert f["float_bytes"] == (216 + 8 + 32 + 4 + 2560 + 10) * 4 + 16
    # Activation quantizers of their own: x, r1, c2, y (the Reshape shares c2's) -> 4 x (4 B + 1 B).
    assert f["activation_param_bytes"] == 4 * 5
    assert f["meta_bytes"] == 5 * 100
    assert f["total_bytes"] == int8_bytes + 20 + 500 + 1000 == 7188
    assert f["fits"] is True
    assert f["shrink_ratio"] == round(f["float_bytes"] / int8_bytes, 4)


def test_sram_stored_types_fusion_views_and_float_copies_as_worked_by_hand():
    loaded, plan, result = _hand_analysis()
    s = result.sram
    steps = {row["node"]: row for row in s["timeline"]}
    # Source: worked by hand from the conventions in docs/memory.md.
    # conv1: x (int8, 192 B) + r1 (conv1's output folded into the ReLU: int8 512 B)
    assert steps["conv1"]["live_bytes"] == 192 + 512
    assert steps["relu1"]["live_bytes"] == 512                       # writes into its own input's bytes
    # conv2 is float: r1 512 + c2 (int8, 256) + float copies of r1 (512 x 4) and of c2 (256 x 4)
    assert steps["conv2"]["conversion_bytes"] == 512 * 4 + 256 * 4
    assert steps["conv2"]["live_bytes"] == 512 + 256 + 3072
    assert steps["reshape"]["live_bytes"] == 256                     # a view: no second buffer
    assert steps["fc"]["live_bytes"] == 256 + 10
    assert s["peak_bytes"] == 3840 and s["peak_node"] == "conv2"
    assert_no_overlap(result.arena["plan"])
    _, _, no_views = _hand_analysis(views=False)
    assert {r["node"]: r for r in no_views.sram["timeline"]}["reshape"]["live_bytes"] == 512


def test_int16_activation_is_stored_at_two_bytes():
    loaded = prepare_model(_hand_model())
    plan = make_plan(loaded, PlanOptions(activation_bits={"c2": 16}))
    result = budget.analyze(loaded, plan, budget.BudgetOptions(**NO_WHAT_IF))
    steps = {row["node"]: row for row in result.sram["timeline"]}
    # Source: int16 = 2 B per element (common practice); c2 is 4x8x8 = 256 elements.
    assert steps["conv2"]["live_bytes"] == 512 + 256 * 2


def _inplace_model():
    rng = np.random.default_rng(2)
    inits = [numpy_helper.from_array(rng.standard_normal((4, 2, 1, 1)).astype(np.float32), "w1"),
             numpy_helper.from_array(rng.standard_normal((2, 4, 1, 1)).astype(np.float32), "w2")]
    nodes = [helper.make_node("Conv", ["x", "w1"], ["c1"], name="conv1"),
             helper.make_node("MaxPool", ["c1"], ["p1"], name="pool", kernel_shape=[2, 2], strides=[2, 2]),
             helper.make_node("Sigmoid", ["p1"], ["s1"], name="sigmoid"),
             helper.make_node("Conv", ["s1", "w2"], ["y"], name="conv2")]
    graph = helper.make_graph(nodes, "inplace", [helper.make_tensor_value_info("x", TensorProto.FLOAT, [1, 2, 8, 8])],
                              [helper.make_tensor_value_info("y", TensorProto.FLOAT, [1, 2, 4, 4])], inits)
    return helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)])


def test_elementwise_op_runs_in_place_only_when_the_option_is_on():
    # Source: worked by hand. p1 = 4x4x4 int8 = 64 B; Sigmoid in place adds nothing, else 64 B more.
    _, _, on = analyze(_inplace_model())
    _, _, off = analyze(_inplace_model(), inplace=False)
    step_on = {r["node"]: r for r in on.sram["timeline"]}["sigmoid"]
    step_off = {r["node"]: r for r in off.sram["timeline"]}["sigmoid"]
    assert step_on["live_bytes"] == 64 and step_off["live_bytes"] == 128
    assert on.sram["conventions"]["inplace"] is True and off.sram["conventions"]["inplace"] is False


def test_scratch_estimate_is_added_only_to_its_own_step():
    # im2col-style estimate (docs/memory.md): 2 columns x Cin x k x k at 2 B for an int8 3x3 conv.
    _, _, plain = _hand_analysis()
    _, _, with_scratch = _hand_analysis(scratch=True)
    a = {r["node"]: r for r in plain.sram["timeline"]}
    b = {r["node"]: r for r in with_scratch.sram["timeline"]}
    assert b["conv1"]["scratch_bytes"] == 2 * 3 * 9 * 2
    assert b["conv1"]["live_bytes"] == a["conv1"]["live_bytes"] + 108
    assert b["conv2"]["scratch_bytes"] == 0            # 1x1, stride 1, no padding: no im2col
    assert b["relu1"]["live_bytes"] == a["relu1"]["live_bytes"]
    assert_no_overlap(with_scratch.arena["plan"])


def test_macs_and_latency_estimate_are_linear_in_macs():
    from test_schedule import _chain_model
    _, _, result = analyze(_chain_model(), cycles_per_mac=2.0, clock_mhz=100.0, energy_per_mac_pj=5.0)
    # Source: conv MACs = Cout x Hout x Wout x Cin/groups x k x k (common practice).
    macs = 8 * 32 * 32 * 3 * 9 + 16 * 16 * 16 * 8 * 9 + 4 * 8 * 8 * 16
    assert result.macs["total"] == macs == 520_192
    assert result.macs["latency_ms"] == round(macs * 2.0 / 100e6 * 1e3, 3)
    assert result.macs["energy_mj"] == round(macs * 5.0e-12 * 1e3, 6)
    pools = {r["name"]: r for r in result.macs["layers"]}
    assert pools["p1"]["elementwise_ops"] == 8 * 16 * 16 * 4           # 2x2 window per output
    assert set(result.macs["estimates"]) == {"latency_ms", "energy_mj"}


def test_to_dict_has_every_section_and_key_the_report_uses():
    _, _, result = _hand_analysis(flash_limit_bytes=1 << 20, sram_limit_bytes=1 << 10, what_if=True)
    d = json.loads(json.dumps(result.to_dict(), allow_nan=False))
    assert set(d["model"]) >= {"params", "macs"}
    assert set(d["flash"]) >= {"float_bytes", "int8_bytes", "reserve_bytes", "meta_bytes", "total_bytes",
                               "limit_bytes", "fits", "shrink_ratio", "shrink_ratio_all_in", "layers"}
    assert set(d["flash"]["layers"][0]) >= {"name", "op_type", "precision", "weight_bytes", "bias_bytes",
                                            "scale_bytes", "float_bytes", "total_bytes"}
    assert set(d["sram"]) >= {"peak_bytes", "peak_step", "peak_node", "live_at_peak", "limit_bytes", "fits",
                              "timeline", "conventions"}
    assert set(d["sram"]["live_at_peak"][0]) >= {"tensor", "bytes", "dtype", "producer"}
    assert set(d["sram"]["timeline"][0]) >= {"step", "node", "op_type", "live_bytes"}
    assert set(d["arena"]) >= {"bytes", "ratio_to_peak", "alignment", "plan"}
    assert set(d["arena"]["plan"][0]) >= {"tensor", "offset", "size", "first_step", "last_step"}
    assert set(d["order"]) >= {"default_peak_bytes", "best_peak_bytes", "method", "order", "changed"}
    assert set(d["macs"]) >= {"total", "elementwise_ops", "layers"}
    assert set(d["what_if"]) >= {"resolution", "tiling", "flash"}
    assert d["sram"]["fits"] is False and d["fits"] is False
    report = build_budget_report("hand.onnx", False, result)
    assert report["verdict"]["failed"] == ["sram"] and report["verdict"]["exit_code"] == 1
    assert "conv2" in summary_text(report) and "| conv2" in markdown(report)


def test_bad_options_are_one_line_errors():
    loaded = prepare_model(_hand_model())
    plan = make_plan(loaded)
    for bad in (dict(alignment=3), dict(sram_limit_bytes=0), dict(order_time_limit_s=-1)):
        with pytest.raises(QfitError):
            budget.analyze(loaded, plan, budget.BudgetOptions(**bad))


@pytest.mark.parametrize("name", sorted(zoo.ZOO))
def test_arena_plan_has_no_overlap_on_every_zoo_model(name):
    # Source: the definition of an arena plan — buffers live at the same step never share bytes.
    zm = zoo.ZOO[name]()
    _, _, result = analyze(zm.model, alignment=8)
    assert_no_overlap(result.arena["plan"])
    assert all(p["offset"] % 8 == 0 for p in result.arena["plan"])
    assert result.arena["bytes"] >= result.order["best_peak_bytes"]
    # params/MACs against the zoo's own hand counts (tests/zoo.py, computed as each layer is added)
    assert result.model["macs"] == zm.macs
    assert result.model["params"] == zm.params


@pytest.mark.parametrize("name", ["mobilenet_v2_small"])
def test_zoo_layer_order_peak_matches_the_zoo_hand_figure(name):
    # Source: tests/zoo.py, hand-computed int8 layer-order peak (same conventions: BN folded, ReLU in place).
    zm = zoo.ZOO[name]()
    _, _, result = analyze(zm.model)
    assert result.order["default_peak_bytes"] == zm.int8_layer_order_peak_bytes


# ---- QDQ read-back ----------------------------------------------------------------------------

def _qdq_model():
    """x -> Q/DQ int8 -> Conv1 (int8 per-channel weights, int32 bias, via DQ) -> Q/DQ int16 ->
    Conv2 with float weights (a layer kept float) -> y (float)."""
    rng = np.random.default_rng(3)
    f32 = np.float32
    inits = [
        numpy_helper.from_array(np.array(0.05, f32), "x_scale"),
        numpy_helper.from_array(np.array(0, np.int8), "x_zero"),
        numpy_helper.from_array(rng.integers(-127, 128, (4, 2, 3, 3)).astype(np.int8), "w1_q"),
        numpy_helper.from_array(np.array([0.01, 0.02, 0.03, 0.04], f32), "w1_scale"),
        numpy_helper.from_array(np.zeros(4, np.int8), "w1_zero"),
        numpy_helper.from_array(rng.integers(-1000, 1000, (4,)).astype(np.int32), "b1_q"),
        numpy_helper.from_array(np.array([5e-4, 1e-3, 1.5e-3, 2e-3], f32), "b1_scale"),
        numpy_helper.from_array(np.zeros(4, np.int32), "b1_zero"),
        numpy_helper.from_array(np.array(0.001, f32), "c1_scale"),
        numpy_helper.from_array(np.array(0, np.int16), "c1_zero"),
        numpy_helper.from_array(rng.standard_normal((3, 4, 1, 1)).astype(f32), "w2"),
        numpy_helper.from_array(rng.standard_normal((3,)).astype(f32), "b2"),
    ]
    nodes = [
        helper.make_node("QuantizeLinear", ["x", "x_scale", "x_zero"], ["x_q"], name="q_x"),
        helper.make_node("DequantizeLinear", ["x_q", "x_scale", "x_zero"], ["x_dq"], name="dq_x"),
        helper.make_node("DequantizeLinear", ["w1_q", "w1_scale", "w1_zero"], ["w1_dq"], name="dq_w1", axis=0),
        helper.make_node("DequantizeLinear", ["b1_q", "b1_scale", "b1_zero"], ["b1_dq"], name="dq_b1", axis=0),
        helper.make_node("Conv", ["x_dq", "w1_dq", "b1_dq"], ["c1"], name="conv1", pads=[1, 1, 1, 1]),
        helper.make_node("QuantizeLinear", ["c1", "c1_scale", "c1_zero"], ["c1_q"], name="q_c1"),
        helper.make_node("DequantizeLinear", ["c1_q", "c1_scale", "c1_zero"], ["c1_dq"], name="dq_c1"),
        helper.make_node("Conv", ["c1_dq", "w2", "b2"], ["y"], name="conv2"),
    ]
    graph = helper.make_graph(nodes, "qdq", [helper.make_tensor_value_info("x", TensorProto.FLOAT, [1, 2, 4, 4])],
                              [helper.make_tensor_value_info("y", TensorProto.FLOAT, [1, 3, 4, 4])], inits)
    return helper.make_model(graph, opset_imports=[helper.make_opsetid("", 21)])


def test_qdq_read_back_counts_int8_int16_and_float_layers_as_worked_by_hand():
    model = _qdq_model()
    before = model.SerializeToString()
    loaded, plan = qdq_read.read_qdq(model)
    assert model.SerializeToString() == before                     # the input model is untouched
    assert plan.bits_of("x") == 8 and plan.bits_of("c1") == 16 and plan.bits_of("y") is None
    assert plan.weights[("conv1", 1)].axis == 0 and plan.biases[("conv1", 2)] == "b1_dq"
    assert plan.float_nodes == {"conv2"}
    # the dequantized weights are (q - zero) x scale per output channel (ONNX DequantizeLinear spec)
    q = numpy_helper.to_array(next(i for i in model.graph.initializer if i.name == "w1_q")).astype(np.float32)
    expected_w = q * np.array([0.01, 0.02, 0.03, 0.04], np.float32).reshape(4, 1, 1, 1)
    np.testing.assert_allclose(loaded.constants["w1_dq"], expected_w, rtol=1e-6)
    result = budget.analyze(loaded, plan, budget.BudgetOptions(**NO_WHAT_IF))
    rows = {r["name"]: r for r in result.flash["layers"]}
    # Source: worked by hand. conv1: 72 int8 weights + 4 int32 biases + 4 x (4 B scale + 1 B zero point);
    # conv2 kept float: (12 + 3) x 4 B.
    assert rows["conv1"]["total_bytes"] == 72 + 16 + 20
    assert rows["conv2"]["total_bytes"] == 60 and rows["conv2"]["precision"] == "float"
    assert result.flash["int8_bytes"] == 168
    assert result.flash["activation_param_bytes"] == (4 + 1) + (4 + 2)    # x int8, c1 int16
    steps = {r["node"]: r for r in result.sram["timeline"]}
    # conv1: x int8 (32 B) + c1 int16 (64 x 2 B); conv2 (float): c1 128 B + y float (48 x 4 B)
    # + a float copy of c1 (64 x 4 B) for the float layer.
    assert steps["conv1"]["live_bytes"] == 32 + 128
    assert steps["conv2"]["live_bytes"] == 128 + 192 + 256
    assert result.sram["peak_bytes"] == 576
    assert_no_overlap(result.arena["plan"])


def test_qdq_written_by_qfit_reads_back_to_the_same_budget():
    # Round trip: a plan -> qfit's QDQ writer -> qdq_read must give the same flash and SRAM figures.
    from qfit.quant import quantize
    zm = zoo.resnet_small()
    loaded = prepare_model(zm.model)
    # a Conv kept float is recognisable in QDQ (float weights); a weightless op kept float between
    # Q/DQ pairs is not (docs/memory.md), so the round trip keeps a Conv float
    float_node = [n.name for n in loaded.graph.node if n.op_type == "Conv"][1]
    first_act = next(iter(make_plan(loaded).activations))
    plan = make_plan(loaded, PlanOptions(float_nodes=frozenset({float_node}), activation_bits={first_act: 16}))
    written = quantize.build_qdq(loaded, plan, {t: (-1.0, 1.0) for t in plan.activations}).model
    loaded_back, plan_back = qdq_read.read_qdq(written)
    a = budget.analyze(loaded, plan, budget.BudgetOptions(**NO_WHAT_IF)).to_dict()
    b = budget.analyze(loaded_back, plan_back, budget.BudgetOptions(**NO_WHAT_IF)).to_dict()
    for key in ("int8_bytes", "float_bytes", "total_bytes"):
        assert a["flash"][key] == b["flash"][key], key
    assert a["sram"]["peak_bytes"] == b["sram"]["peak_bytes"]
    assert a["model"] == b["model"]


def test_dequantize_of_a_non_constant_without_quantize_is_a_clear_error():
    model = _qdq_model()
    del model.graph.node[0]     # x_q is now nobody's output
    model.graph.input.append(helper.make_tensor_value_info("x_q", TensorProto.INT8, [1, 2, 4, 4]))
    with pytest.raises(QfitError, match="dq_x"):
        qdq_read.read_qdq(model)


# ---- the command ------------------------------------------------------------------------------

def _cli(argv):
    from qfit import cli
    return cli.main(argv)


def test_budget_command_exit_codes_json_and_untouched_model(tmp_path, capsys):
    path = tmp_path / "hand.onnx"
    onnx.save(_hand_model(), path)
    digest = hashlib.sha256(path.read_bytes()).hexdigest()
    out = tmp_path / "budget.json"
    assert _cli(["budget", str(path), "--flash", "1MiB", "--sram", "256KiB", "--json", str(out)]) == 0
    data = json.loads(out.read_text())
    assert data["sram"]["fits"] is True and data["flash"]["limit_bytes"] == 1 << 20
    assert [p.name for p in tmp_path.iterdir() if p.name.endswith(".partial")] == []
    capsys.readouterr()
    assert _cli(["budget", str(path), "--flash", "1MiB", "--sram", "600"]) == 1
    printed = capsys.readouterr().out
    # Acceptance: when SRAM does not fit, at least one concrete way to fit is printed.
    assert "What would make SRAM fit" in printed and ("fits:" in printed or "tile the first" in printed)
    assert _cli(["budget", str(path), "--flash", "1MiB", "--sram", "lots"]) == 2
    assert _cli(["budget", str(tmp_path / "missing.onnx"), "--flash", "1MiB", "--sram", "1KiB"]) == 2
    assert _cli(["budget", str(path), "--flash", "1MiB", "--sram", "1KiB", "--cycles-per-mac", "2"]) == 2
    err = capsys.readouterr().err
    assert "Traceback" not in err and err.count("qfit: error:") == 3
    assert hashlib.sha256(path.read_bytes()).hexdigest() == digest


def test_budget_command_reads_a_qdq_model(tmp_path, capsys):
    path = tmp_path / "qdq.onnx"
    onnx.save(_qdq_model(), path)
    out = tmp_path / "b.json"
    assert _cli(["budget", str(path), "--flash", "64KiB", "--sram", "64KiB", "--json", str(out)]) == 0
    data = json.loads(out.read_text())
    assert data["model_kind"] == "qdq" and data["sram"]["peak_bytes"] == 576
    assert "QDQ model" in capsys.readouterr().out


DEMO_MODEL = os.path.join(os.path.dirname(__file__), "..", "calib_demo", "model.onnx")


@pytest.mark.skipif(not os.path.exists(DEMO_MODEL), reason="calib_demo/model.onnx not built")
def test_demo_below_its_peak_exits_1_and_names_a_way_to_fit(tmp_path, capsys):
    # Acceptance (issue 3): the flash map, the peak with its live tensors and the arena are printed;
    # with --sram below the peak the command exits 1 and prints at least one concrete way to fit.
    out = tmp_path / "demo.json"
    assert _cli(["budget", DEMO_MODEL, "--flash", "1MiB", "--sram", "4MiB", "--json", str(out)]) == 0
    data = json.loads(out.read_text())
    peak = data["sram"]["peak_bytes"]
    assert_no_overlap(data["arena"]["plan"])
    capsys.readouterr()
    assert _cli(["budget", DEMO_MODEL, "--flash", "1MiB", "--sram", str(peak - 1)]) == 1
    printed = capsys.readouterr().out
    assert "Flash" in printed and "tensors live at the peak" in printed and "arena" in printed
    assert "fits: arena" in printed or "tile the first" in printed
