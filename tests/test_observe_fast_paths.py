"""The fast paths of observation and running (chunked binning, min/max-only statistics, the entropy
search per group, binning on a worker thread, the lazily built fixed-shape session) give what their
plain definitions give. Each reference below is written from the definition in qfit/observe.py's
docstring, not from the code under test."""
from __future__ import annotations

import numpy as np
import pytest
from onnx import TensorProto, helper, numpy_helper

from qfit.quant import observe as observe_module
from qfit.quant.observe import BIN_CHUNK, HIST_BINS, TensorStats, observe, range_for
from qfit.check import CheckOptions, needs_histograms
from qfit.runtime.sessions import Runner


def reference_histogram(values: np.ndarray, radius: float) -> np.ndarray:
    """Bin j of [-R, R] in HIST_BINS equal bins; x = R goes to the last bin (definition)."""
    x = values.astype(np.float32)
    index = np.floor((x + np.float32(radius)) * np.float32(HIST_BINS / (2 * radius))).astype(np.int64)
    return np.bincount(np.clip(index, 0, HIST_BINS - 1), minlength=HIST_BINS)


def test_binning_in_slices_matches_the_definition_across_slice_boundaries():
    rng = np.random.default_rng(0)
    values = rng.standard_normal(3 * BIN_CHUNK + 123).astype(np.float32) * 3
    radius = float(2.0 ** np.ceil(np.log2(np.abs(values).max())))
    values[0], values[BIN_CHUNK], values[-1] = radius, -radius, np.nextafter(np.float32(radius), 0)
    stats = TensorStats("t")
    stats.update(values)
    assert stats.radius == radius
    assert np.array_equal(stats.hist, reference_histogram(values, radius))
    assert stats.count == values.size and stats.min == -radius and stats.max == radius


def test_nan_and_inf_are_counted_and_left_out_of_the_range():
    values = np.array([1.0, np.nan, -2.0, np.inf, 0.5, -np.inf], np.float32)
    stats = TensorStats("t")
    stats.update(values)
    assert stats.nonfinite == 3 and stats.count == 3
    assert (stats.min, stats.max) == (-2.0, 1.0)
    assert np.array_equal(stats.hist, reference_histogram(np.array([1.0, -2.0, 0.5], np.float32), 2.0))


def test_min_max_only_statistics_give_the_min_max_range_and_refuse_other_methods():
    rng = np.random.default_rng(1)
    full, lean = TensorStats("t"), TensorStats("t", histogram=False)
    for _ in range(3):
        batch = rng.standard_normal(5000).astype(np.float32) * 4 + 1
        full.update(batch)
        lean.update(batch)
    assert (lean.min, lean.max, lean.count) == (full.min, full.max, full.count)
    assert range_for(lean, "minmax") == range_for(full, "minmax")
    for method in ("percentile", "mse", "entropy"):
        with pytest.raises(ValueError, match="needs a histogram"):
            range_for(lean, method)


def kl_by_definition(magnitude: np.ndarray, n: int, levels: int) -> float:
    """KL(P || Q): P = first n bins with the tail added to bin n-1; Q merges P's bins into `levels`
    groups (bin j in group j*levels//n) spread evenly over the non-empty bins (Migacz 2017)."""
    p = magnitude[:n].astype(np.float64).copy()
    p[n - 1] += magnitude[n:].sum()
    reference = magnitude[:n]
    q = np.zeros(n)
    for g in range(levels):
        members = [j for j in range(n) if j * levels // n == g]
        present = [j for j in members if reference[j] > 0]
        for j in present:
            q[j] = reference[members].sum() / len(present)
    if q.sum() == 0:
        return np.inf
    p, q = p / p.sum(), q / q.sum()
    mask = p > 0
    if np.any(q[mask] == 0):
        return np.inf
    return float(np.sum(p[mask] * np.log(p[mask] / q[mask])))


@pytest.mark.parametrize("seed", range(6))
def test_entropy_search_per_group_equals_the_kl_definition(seed):
    rng = np.random.default_rng(seed)
    levels = 128
    last = int(rng.integers(levels + 20, 700))
    magnitude = np.zeros(HIST_BINS // 2)
    magnitude[:last] = np.floor(rng.exponential(500, last) * np.exp(-np.arange(last) / rng.uniform(30, 300)))
    magnitude[last - 1] = max(magnitude[last - 1], 1)
    if seed % 2:
        magnitude[rng.integers(levels, last - 1, 3)] = 0  # empty bins, and an empty last bin for some n
    sizes = np.arange(levels, last + 1, max(1, (last - levels) // 64))
    got = observe_module._kl_quantized(magnitude, sizes, levels)
    expected = np.array([kl_by_definition(magnitude, int(n), levels) for n in sizes])
    assert np.array_equal(np.isfinite(got), np.isfinite(expected))
    finite = np.isfinite(expected)
    assert np.allclose(got[finite], expected[finite], rtol=1e-9, atol=1e-12)


def test_entropy_threshold_is_the_first_minimum_of_the_kl():
    rng = np.random.default_rng(7)
    stats = TensorStats("t")
    stats.update(rng.laplace(0, 1, 200_000).astype(np.float32))
    lo, hi = range_for(stats, "entropy")
    half = HIST_BINS // 2
    magnitude = stats.hist[half:].astype(np.float64) + stats.hist[:half][::-1]
    last = int(np.nonzero(magnitude)[0].max()) + 1
    sizes = range(128, last + 1)  # every candidate threshold
    kls = [kl_by_definition(magnitude, n, 128) for n in sizes]
    best = min(kls)
    first = next(n for n, k in zip(sizes, kls) if k <= best + 1e-12)
    threshold = first * stats.radius / half
    # range_for never widens past the observed range
    assert hi == pytest.approx(min(threshold, stats.max)) and lo == pytest.approx(max(-threshold, stats.min))


class FakeBatch:
    def __init__(self, values):
        self.inputs = {"x": values}
        self.files = [f"sample_{i}" for i in range(len(values))]


def test_observing_on_a_worker_thread_gives_the_plain_loop_statistics():
    rng = np.random.default_rng(2)
    batches = [FakeBatch(rng.standard_normal((4, 300)).astype(np.float32) * (k + 1)) for k in range(6)]
    runner = lambda inputs: {"a": inputs["x"], "b": np.abs(inputs["x"]) * 2}
    got = observe(runner, iter(batches), ["a", "b"])
    for name in ("a", "b"):
        plain = TensorStats(name)
        for batch in batches:
            plain.update(runner(batch.inputs)[name])
        assert np.array_equal(got[name].hist, plain.hist)
        assert (got[name].radius, got[name].min, got[name].max, got[name].count) == \
               (plain.radius, plain.min, plain.max, plain.count)


def test_an_error_in_the_binning_worker_reaches_the_caller():
    batches = [FakeBatch(np.ones((2, 3), np.float32))]
    with pytest.raises(KeyError):
        observe(lambda inputs: {}, iter(batches), ["missing"])


def test_histograms_are_skipped_only_for_min_max_without_a_repair_search():
    base = dict(model_path="m.onnx", calib_dir="c", out_dir="o", flash_limit_bytes=1, sram_limit_bytes=1)
    assert not needs_histograms(CheckOptions(**base, method="minmax"))
    assert needs_histograms(CheckOptions(**base, method="minmax", max_drop_pt=1.0))
    assert not needs_histograms(CheckOptions(**base, method="minmax", max_drop_pt=1.0, repair=False))
    for method in ("percentile", "mse", "entropy"):
        assert needs_histograms(CheckOptions(**base, method=method))


def _model(batch_in_reshape: bool):
    """x (1, 4) -> Relu -> Reshape to (1, 2, 2) [hard-coded batch] or (-1, 2, 2)."""
    shape = np.array([1, 2, 2] if batch_in_reshape else [-1, 2, 2], np.int64)
    graph = helper.make_graph(
        [helper.make_node("Relu", ["x"], ["r"]), helper.make_node("Reshape", ["r", "shape"], ["y"])], "g",
        [helper.make_tensor_value_info("x", TensorProto.FLOAT, [1, 4])],
        [helper.make_tensor_value_info("y", TensorProto.FLOAT, [1, 2, 2])],
        [numpy_helper.from_array(shape, "shape")])
    return helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)], ir_version=9)


def test_runner_batches_without_building_the_fixed_shape_session_until_one_sample_comes():
    x = np.arange(12, dtype=np.float32).reshape(3, 4) - 5
    runner = Runner(_model(False), ["r", "y"], batch_size=4)
    assert runner.batched is not None and runner._session is None
    out = runner({"x": x})
    assert np.array_equal(out["y"], np.maximum(x, 0).reshape(3, 2, 2))
    single = runner({"x": x[:1]})
    assert runner._session is not None
    assert np.array_equal(single["y"], out["y"][:1])


def test_runner_falls_back_to_one_sample_at_a_time_when_the_batch_is_hard_coded():
    x = np.arange(12, dtype=np.float32).reshape(3, 4) - 5
    runner = Runner(_model(True), ["y"], batch_size=4)
    assert runner.batched is None
    assert np.array_equal(runner({"x": x})["y"], np.maximum(x, 0).reshape(3, 2, 2))
