"""Per-layer sensitivity and end metrics, checked against definitions and independent computations."""
from __future__ import annotations

import copy
import math
import os
from fractions import Fraction

import numpy as np
import onnxruntime as ort
import pytest
from onnx import TensorProto, helper, numpy_helper

from digits_folders import HEAVY_LAYER, INPUT_SHAPES, MODEL, digits_split, with_weight_outlier, write_folders
from qfit import check as pipeline
from qfit.data import load_preprocess
from qfit.measure.evaluate import compared_layers, sample_of
from qfit.report.document import ranking_tables
from through_qfit import check_with_report
from qfit.measure import sensitivity
from qfit.measure.compare import ErrorSums
from qfit.data import Batch
from qfit.graph.load import prepare_model
from qfit.quant.observe import TensorStats
from qfit.quant.plan import PlanOptions, make_plan
from qfit.quant.quantize import build_qdq, calibrated_ranges
from qfit.runtime.sessions import Runner


@pytest.fixture(scope="module")
def folders(tmp_path_factory):
    return write_folders(tmp_path_factory.mktemp("digits"))


def _check(model_path, folders, out, **extra):
    calib, evaluation = folders
    options = pipeline.CheckOptions(model_path=str(model_path), calib_dir=calib, eval_dir=evaluation, out_dir=str(out),
                                    flash_limit_bytes=1 << 20, sram_limit_bytes=256 << 10,
                                    input_shapes=INPUT_SHAPES, progress=False, **extra)
    return check_with_report(options)


# ---- the drop and its interval, computed independently of qfit.measure.compare ----------------

def _paired_drop(predictions: dict) -> tuple[float, list[float], int, int]:
    """Drop and 95 % interval from paired predictions: b = float right & int8 wrong, c = the reverse,
    drop = (b - c) / n; the interval is the score interval of tests/test_drop_interval.py (Tango 1998,
    written there independently of qfit.measure.compare)."""
    from test_drop_interval import independent_interval

    f, q, y = (np.asarray(predictions[k]) for k in ("float", "int8", "labels"))
    n = y.size
    b = int(np.sum((f == y) & (q != y)))
    c = int(np.sum((f != y) & (q == y)))
    lower, upper = independent_interval(b, c, n)
    return 100 * (b - c) / n, [100 * lower, 100 * upper], b, c


@pytest.mark.parametrize("damaged", [False, True], ids=["trained", "outlier_per_tensor"])
def test_digits_drop_and_interval_agree_with_an_independent_computation(folders, tmp_path, damaged):
    # Source of the labels: scikit-learn's bundled UCI digits set, split as the model was trained.
    _, _, _, y_test = digits_split()
    if damaged:  # a model with a real drop, so that the interval is not the degenerate [0, 0]
        result = _check(with_weight_outlier(tmp_path / "outlier.onnx"), folders, tmp_path / "out",
                        per_channel=False, isolated_samples=0)
    else:
        result = _check(MODEL, folders, tmp_path / "out", isolated_samples=0)
    accuracy = result.report["accuracy"]
    predictions = result.predictions
    # the evaluation folder holds the held-out set: same labels, as a multiset (file order differs)
    assert np.array_equal(np.sort(predictions["labels"]), np.sort(y_test))
    drop, interval, b, c = _paired_drop(predictions)
    assert accuracy["drop_pt"] == pytest.approx(drop, abs=1e-9)
    assert accuracy["drop_ci95_pt"] == pytest.approx(interval, abs=1e-3)
    assert accuracy["discordant"] == {"float_only_correct": b, "int8_only_correct": c}
    if damaged:
        # a real drop: the interval excludes 0 and has the estimate strictly inside
        assert b + c > 0 and 0 < interval[0] < drop < interval[1]
    else:
        # tests/models/README.md: 98.70 % held out in float; the bar: int8 within 0.5 pt
        assert accuracy["float"] == pytest.approx(100 * 533 / 540, abs=0.01)
        assert drop <= 0.5


@pytest.mark.parametrize("per_channel", [True, False], ids=["per_channel", "per_tensor"])
def test_a_layer_given_one_large_weight_outlier_ranks_first(folders, tmp_path, per_channel):
    # Common practice (Nagel et al., "A White Paper on Neural Network Quantization", 2021, sec. 3):
    # one outlier stretches the symmetric weight range, so every other weight of that scale rounds
    # to a few levels; the damaged layer must come first in "where the accuracy goes".
    result = _check(with_weight_outlier(tmp_path / "outlier.onnx"), folders, tmp_path / "out",
                    per_channel=per_channel, isolated_samples=64)
    section = result.report["sensitivity"]
    assert section["ranking"][0] == HEAVY_LAYER
    row = next(r for r in result.report["layers"] if r["name"] == HEAVY_LAYER)
    assert row["sensitivity_rank"] == 1
    others = [r["isolated_output_sqnr_db"] for r in result.report["layers"]
              if r["name"] != HEAVY_LAYER and r["isolated_output_sqnr_db"] is not None]
    assert row["isolated_output_sqnr_db"] < min(others)
    # and keeping it float recovers the most output SQNR, well beyond its standard error
    recoveries = {r["name"]: r["float_recovery_db"] for r in result.report["layers"] if r["float_recovery_db"] is not None}
    assert max(recoveries, key=recoveries.get) == HEAVY_LAYER
    assert row["float_recovery_db"] > 4 * row["float_recovery_se_db"] > 0
    assert section["samples_used"] == 64 and section["samples_available"] == 540


def test_every_layer_row_carries_the_sensitivity_keys_and_the_sample_count_is_reported(folders, tmp_path):
    result = _check(MODEL, folders, tmp_path / "out", isolated_samples=20)
    section = result.report["sensitivity"]
    assert section["samples_used"] == 20 and section["sample_cap"] == 20
    assert section["runs_per_sample"] == 1 + 2 * section["layers_swept"]
    for row in result.report["layers"]:
        for key in ("sqnr_db", "sqnr_isolated_db", "sensitivity_pt", "float_recovery_pt", "fallback_cost_bytes"):
            assert key in row
        assert row["sqnr_isolated_db"] is not None
    ranks = sorted(r["sensitivity_rank"] for r in result.report["layers"])
    assert ranks == list(range(1, len(ranks) + 1))


# ---- the switch model ---------------------------------------------------------------------------

def _conv_chain(seed=0):
    rng = np.random.default_rng(seed)
    inits = [numpy_helper.from_array(rng.normal(0, 0.3, (8, 3, 3, 3)).astype(np.float32), "w1"),
             numpy_helper.from_array(rng.normal(0, 0.1, 8).astype(np.float32), "b1"),
             numpy_helper.from_array(rng.normal(0, 0.2, (4, 8, 3, 3)).astype(np.float32), "w2")]
    nodes = [helper.make_node("Conv", ["x", "w1", "b1"], ["c1"], pads=[1, 1, 1, 1], name="conv1"),
             helper.make_node("Relu", ["c1"], ["r1"], name="relu1"),
             helper.make_node("Conv", ["r1", "w2"], ["y"], pads=[1, 1, 1, 1], name="conv2")]
    graph = helper.make_graph(nodes, "chain", [helper.make_tensor_value_info("x", TensorProto.FLOAT, [1, 3, 8, 8])],
                              [helper.make_tensor_value_info("y", TensorProto.FLOAT, [1, 4, 8, 8])], inits)
    return helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)], ir_version=9)


def _quantized(model, samples):
    loaded = prepare_model(model)
    plan = make_plan(loaded, PlanOptions())
    runner = Runner(loaded.model, plan.calibrated_tensors())
    stats = {t: TensorStats(t) for t in plan.calibrated_tensors()}
    for x in samples:
        values = runner({"x": x})
        for t in stats:
            stats[t].update(values[t])
    return loaded, plan, build_qdq(loaded, plan, calibrated_ranges(plan, stats, "minmax", 99.99))


class _Samples:
    """Unlabelled in-memory samples (a list of (1, ...) arrays) with DataFolder's batches()."""

    def __init__(self, xs, name="x"):
        self.xs, self.name = xs, name

    def __len__(self):
        return len(self.xs)

    def batches(self, size):
        for i in range(0, len(self.xs), size):
            chunk = np.concatenate(self.xs[i:i + size])
            yield Batch({self.name: chunk}, None, [str(j) for j in range(i, i + len(chunk))])


def _switch_model_run(switch, x, on):
    """The switch model itself (its definition: Where after every quantizer), switches fed as inputs."""
    so = ort.SessionOptions()
    so.add_session_config_entry("session.disable_quant_qdq", "1")
    session = ort.InferenceSession(switch.model.SerializeToString(), so, providers=["CPUExecutionProvider"])
    feeds = {"x": x, **{s: np.array(s in on) for s in switch.switches}}
    return session.run(["y"], feeds)[0]


def test_switch_model_with_every_switch_on_is_the_int8_model_and_off_the_float_model():
    rng = np.random.default_rng(1)
    xs = [rng.normal(0, 1, (1, 3, 8, 8)).astype(np.float32) for _ in range(6)]
    loaded, plan, quantized = _quantized(_conv_chain(), xs)
    layers = compared_layers(loaded, plan)
    switch = sensitivity.build_switch_model(loaded, plan, quantized, layers)
    so = ort.SessionOptions()
    so.add_session_config_entry("session.disable_quant_qdq", "1")
    int8 = ort.InferenceSession(quantized.model.SerializeToString(), so, providers=["CPUExecutionProvider"])
    float_session = ort.InferenceSession(loaded.model.SerializeToString(), providers=["CPUExecutionProvider"])
    for x in xs:
        assert np.array_equal(_switch_model_run(switch, x, set(switch.switches)), int8.run(["y"], {"x": x})[0])
        np.testing.assert_allclose(_switch_model_run(switch, x, set()), float_session.run(["y"], {"x": x})[0],
                                   rtol=1e-5, atol=1e-5)
    # conv1 owns the input quantizer, its weights and its (ReLU-fused) output quantizer
    assert len(switch.layer_switches["conv1"]) == 3 and len(switch.layer_switches["conv2"]) == 2


@pytest.mark.parametrize("group_nodes", [1, 10_000], ids=["a_group_per_layer", "one_group"])
def test_sweep_models_compute_each_configuration_as_the_switch_model_defines_it(monkeypatch, group_nodes):
    # The sweep runs each configuration as a plain model cut at the layer's first quantizer, in groups
    # that hand the float and int8 tensors on; the switch model with the same switches fed is the
    # definition it must reproduce.
    monkeypatch.setattr(sensitivity, "GROUP_NODES", group_nodes)
    rng = np.random.default_rng(4)
    xs = [rng.normal(0, 1, (1, 3, 8, 8)).astype(np.float32) for _ in range(4)]
    loaded, plan, quantized = _quantized(_conv_chain(), xs)
    layers = compared_layers(loaded, plan)
    switch = sensitivity.build_switch_model(loaded, plan, quantized, layers)
    rows = [r for r in layers if switch.layer_switches.get(r["name"])]
    groups = sensitivity.sweep_groups(switch, rows, "y", sensitivity._tensor_types(switch.model))
    assert len(groups) == (2 if group_nodes == 1 else 1)
    for group in groups:
        # a weight's DequantizeLinear is computed once and read by every configuration (emitted per
        # configuration, each held its own float copy of the weights after its start)
        initializers = {t.name for t in group.model.graph.initializer}
        weight_dq = [n.input[0] for n in group.model.graph.node
                     if n.op_type == "DequantizeLinear" and n.input[0] in initializers]
        assert weight_dq and len(weight_dq) == len(set(weight_dq))
    cuts = sensitivity.find_cuts(switch, [r["name"] for r in rows])
    assert cuts.start_of["conv1"] == 0 < cuts.start_of["conv2"]   # conv2 runs from its own quantizers on
    everything = set(switch.switches)
    for x in xs:
        got = {"float@x": x, "int8@x": x}
        for group in groups:
            names = [o.name for o in group.model.graph.output]
            got.update(Runner(group.model, names, faithful=True, batch_size=1)(
                {i.name: got[i.name] for i in group.model.graph.input}))
            for k in group.rows:
                mine = set(switch.layer_switches[rows[k]["name"]])
                np.testing.assert_allclose(got[group.names[(f"alone{k}", "y")]], _switch_model_run(switch, x, mine),
                                           rtol=1e-5, atol=1e-6)
                np.testing.assert_allclose(got[group.names[(f"kept{k}", "y")]],
                                           _switch_model_run(switch, x, everything - mine), rtol=1e-5, atol=1e-6)
            got.update({f"{tag}@{name}": got[group.names[(tag, name)]] for name in group.state_out
                        for tag in ("float", "int8")})
        assert np.array_equal(got[groups[-1].names[("int8", "y")]], _switch_model_run(switch, x, everything))


def test_the_sweep_gives_the_same_figures_in_batches_and_sample_by_sample(monkeypatch):
    # Batches of 4 run the batch-free sweep models; batch 1 runs sample by sample (the path of a graph
    # that hard-codes its batch); a tiny SWEEP_BATCH_BYTES forces the byte cap down to one sample.
    rng = np.random.default_rng(5)
    xs = [rng.normal(0, 1, (1, 3, 8, 8)).astype(np.float32) for _ in range(8)]
    loaded, plan, quantized = _quantized(_conv_chain(), xs)
    layers = compared_layers(loaded, plan)
    batched = sensitivity.sweep(loaded, plan, quantized, layers, _Samples(xs), 4, "score", sample_cap=8)
    single = sensitivity.sweep(loaded, plan, quantized, layers, _Samples(xs), 1, "score", sample_cap=8)
    monkeypatch.setattr(sensitivity, "SWEEP_BATCH_BYTES", 1)
    capped = sensitivity.sweep(loaded, plan, quantized, layers, _Samples(xs), 4, "score", sample_cap=8)
    for other in (single, capped):
        assert other["ranking"] == batched["ranking"] and other["samples_used"] == 8
        for name, row in batched["rows"].items():
            for key, value in row.items():
                if isinstance(value, float):
                    assert other["rows"][name][key] == pytest.approx(value, abs=0.02), (name, key)


def _exact_two_sided_sign_test(worse: int, better: int) -> Fraction:
    """p-value of the exact sign test, from binomial coefficients in exact arithmetic (McNemar 1947,
    exact form: under no effect each discordant sample goes either way with probability 1/2)."""
    n, k = worse + better, max(worse, better)
    return min(Fraction(1), 2 * Fraction(sum(math.comb(n, i) for i in range(k, n + 1)), 2 ** n))


@pytest.mark.parametrize("worse,better", [(6, 0), (5, 0), (10, 2), (9, 3), (0, 7), (1, 1), (0, 0), (20, 9)])
def test_points_count_as_resolved_exactly_when_the_sign_test_rejects_at_5_percent(worse, better):
    expected = worse + better > 0 and _exact_two_sided_sign_test(worse, better) < Fraction(1, 20)
    assert sensitivity.flips_resolved(worse, better) == expected
    if (worse, better) == (6, 0):   # hand value: 2 / 2**6 = 0.03125 < 0.05; five alone give 0.0625
        assert expected and not sensitivity.flips_resolved(5, 0)


def test_a_points_column_appears_only_where_some_layer_resolves_it_and_then_holds_the_exact_drop():
    # Hand-made outputs of 16 labelled samples, float always right: layer "a" alone flips 8 of them
    # (8 discordant, all one way: p = 2 / 2**8, resolved), layer "b" flips 1 (not resolved).
    labels = np.arange(16) % 4
    float_out = np.eye(4)[labels] * 5.0
    flipped = float_out.copy()
    flipped[:8] = np.eye(4)[(labels[:8] + 1) % 4] * 5.0
    one = float_out.copy()
    one[0] = np.eye(4)[1] * 5.0
    layers = [{"name": "a"}, {"name": "b"}]
    rows, summary = sensitivity.figures_of(layers, float_out, float_out, {"a": flipped, "b": one},
                                           {"a": float_out, "b": float_out}, {"a": ErrorSums(), "b": ErrorSums()},
                                           labels, "classification")
    assert summary["points_shown"] == {"isolated": True, "float": False}
    assert summary["isolated_key"] == "sensitivity_pt" and summary["float_key"] is None
    assert rows["a"]["sensitivity_pt"] == 50.0 and rows["b"]["sensitivity_pt"] == 100 / 16
    assert rows["a"]["float_recovery_pt"] is None
    assert summary["ranking"] == ["a", "b"]   # more damage to the output first
    # without any resolved layer, no points column at all
    _, summary = sensitivity.figures_of(layers[1:], float_out, float_out, {"b": one}, {"b": float_out},
                                        {"b": ErrorSums()}, labels, "classification")
    assert summary["isolated_key"] is None and summary["points_shown"] == {"isolated": False, "float": False}


# ---- the demo: the ranking informs (issue 15) ----------------------------------------------------

DEMO = os.path.join(os.path.dirname(os.path.dirname(os.path.abspath(__file__))), "calib_demo")


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    """The demo checked once with the default sweep (the README's command, as a library call)."""
    options = pipeline.CheckOptions(model_path=os.path.join(DEMO, "model.onnx"), calib_dir=os.path.join(DEMO, "calib"),
                                    eval_dir=os.path.join(DEMO, "eval"), out_dir=str(tmp_path_factory.mktemp("demo")),
                                    flash_limit_bytes=1 << 20, sram_limit_bytes=256 << 10,
                                    preprocess=load_preprocess(os.path.join(DEMO, "preprocess.json")), progress=False)
    return check_with_report(options)


def _half(data, parity: int):
    """Every other file of the folder (files are sorted by class, so both halves hold every class)."""
    half = copy.copy(data)
    half.files = data.files[parity::2]
    half.labels = None if data.labels is None else data.labels[parity::2]
    return half


def _spearman(first: list[str], second: list[str]) -> float:
    """Spearman's rank correlation from its definition for rankings without ties (Spearman 1904):
    1 - 6 sum(d^2) / (n (n^2 - 1)), d = difference of a layer's two positions."""
    position = {name: i for i, name in enumerate(second)}
    n = len(first)
    d2 = sum((i - position[name]) ** 2 for i, name in enumerate(first))
    return 1 - 6 * d2 / (n * (n * n - 1))


def test_demo_ranking_agrees_between_the_two_halves_of_the_evaluation_folder(demo):
    # Issue 15's target: rank correlation >= 0.9 between disjoint halves, at the default sample count.
    final = demo.result.final
    quantized, data = final.quantized, final.evaluation.data
    rankings = []
    for parity in (0, 1):
        sample = sample_of(_half(data, parity), sensitivity.DEFAULT_SAMPLE_CAP, 0)
        swept = sensitivity.sweep(quantized.reference, quantized.plan, quantized.model, final.evaluation.layers,
                                  sample, 16, "classification")
        assert swept["samples_used"] == sensitivity.DEFAULT_SAMPLE_CAP
        rankings.append(swept["ranking"])
    assert set(rankings[0]) == set(rankings[1]) and len(rankings[0]) >= 30
    assert not set(_half(data, 0).files) & set(_half(data, 1).files)
    assert _spearman(*rankings) >= 0.9


def test_demo_report_states_the_sample_count_and_no_printed_sensitivity_column_is_constant(demo):
    section = demo.report["sensitivity"]
    assert section["samples_used"] == section["sample_cap"] == sensitivity.DEFAULT_SAMPLE_CAP
    assert "sign test" in section["points_note"] and section["ranked_by"].startswith(sensitivity.RANK_KEY)
    effects, _ = ranking_tables(demo.report, None)
    assert len(effects.rows) == section["layers_swept"]
    for column, header in enumerate(effects.headers[2:], 2):   # after "#" and "layer"
        values = {row[column] for row in effects.rows}
        assert len(values) > 1, f"column {header!r} is constant: {values}"
    # a points column appears only where the samples resolve it; on the demo none does
    assert not any("drop" in header for header in effects.headers) or any(section["points_shown"].values())
    rows = [r for r in demo.report["layers"] if r.get("sensitivity_rank") is not None]
    # every figure carries its standard error (zero only where every sample gives the same value, as
    # for a Flatten whose quantizer repeats its input's: keeping it float changes nothing)
    assert all(r["isolated_output_sample_sqnr_se_db"] > 0 and r["float_recovery_se_db"] >= 0 for r in rows)
    assert sum(r["float_recovery_se_db"] > 0 for r in rows) >= len(rows) - 2


def test_isolated_error_equals_accumulated_error_for_the_first_layer():
    # Definition: the first layer reads only the graph input, so "only this layer quantized" and
    # "everything quantized" give the same tensor at its output.
    rng = np.random.default_rng(2)
    xs = [rng.normal(0, 1, (1, 3, 8, 8)).astype(np.float32) for _ in range(8)]
    loaded, plan, quantized = _quantized(_conv_chain(), xs)
    layers = compared_layers(loaded, plan)
    swept = sensitivity.sweep(loaded, plan, quantized, layers, _Samples(xs), 4, "score", sample_cap=8)
    accumulated = ErrorSums()
    float_runner = Runner(loaded.model, ["r1"])
    int8_runner = Runner(quantized.model, [quantized.dequantized["r1"]], faithful=True)
    for x in xs:
        accumulated.update(float_runner({"x": x})["r1"], int8_runner({"x": x})[quantized.dequantized["r1"]])
    assert swept["rows"]["conv1"]["sqnr_isolated_db"] == pytest.approx(accumulated.sqnr_db(), abs=0.01)
    assert swept["samples_used"] == 8 and swept["metric"] == "output_sqnr_db"


def test_without_labels_the_sensitivity_is_argmax_agreement_with_the_float_model():
    # Definition (issue 4, end metrics): with no labels the end metric is agreement with float.
    import zoo
    loaded = prepare_model(zoo.ds_cnn_kws().model)
    name = loaded.input_names[0]
    xs = np.random.default_rng(3).normal(0, 1, (24, *loaded.shapes[name][1:])).astype(np.float32)
    plan = make_plan(loaded, PlanOptions())
    data = _Samples([x[None] for x in xs], name)
    stats = pipeline.calibrate(loaded, plan, data, 8, False)
    quantized = build_qdq(loaded, plan, calibrated_ranges(plan, stats, "percentile", 99.99))
    layers = compared_layers(loaded, plan)
    swept = sensitivity.sweep(loaded, plan, quantized, layers, data, 8, "classification", sample_cap=16)
    assert swept["metric"] == "agreement_drop_pt" and swept["samples_used"] == 16
    row = swept["rows"][swept["ranking"][0]]
    assert "sensitivity_agreement_pt" in row and "float_recovery_agreement_pt" in row
    assert "sensitivity_pt" not in row
    # disagreement counts whole samples: a multiple of 100 / 16 points
    assert all(abs(r["sensitivity_agreement_pt"] * 16 / 100 - round(r["sensitivity_agreement_pt"] * 16 / 100)) < 1e-6
               for r in swept["rows"].values() if r["sensitivity_agreement_pt"] is not None)
