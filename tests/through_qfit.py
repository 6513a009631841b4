"""Helpers for tests that push a float ONNX model through `qfit check` and judge what comes out.

* `write_samples` writes synthetic calibration data as real .npy (one input) or .npz (several
  inputs) files, one sample per file, as a user's folder would hold them.
* `check` saves the model, writes the data and runs the whole job, through `qfit.cli.main`
  (exit code, report.json, the written int8 file) or through `qfit.pipeline.check`.
* `forced_agreement` and `free_running_agreement` compare the int8 model as qfit evaluates it
  (onnxruntime, QDQ fusion disabled: qfit.run's faithful path) with `onnx.reference`, the ONNX
  project's executable operator spec, running the same QDQ graph.

Why a "forced" comparison exists: two correct float32 runtimes sum products in different orders,
so a value that lands within one ulp of a rounding tie (x / s = k + 1/2) can round to k in one and
to k + 1 in the other. In a deep network a single such flip moves later sums a little, which flips
a few more levels downstream, and so on (measured on the zoo's MobileNetV2: one flipped level in
block 3 reached a quarter of the last conv's elements and 2 steps at the output). Judging every
quantizer with both runtimes fed the same integer inputs checks each layer against the spec
without that cascade; the free-running comparison checks the graph output end to end.
"""
from __future__ import annotations

import json
import pathlib
from dataclasses import dataclass

import numpy as np
import onnx
import onnxruntime as ort
from onnx import TensorProto, helper
from onnx.reference import ReferenceEvaluator

from qfit import cli
from qfit import check as pipeline
from qfit.report.build import build_report
from qfit.runtime.sessions import Runner, batch_free

UNLIMITED = str(1 << 30)  # flash / SRAM limits that every test model fits


def write_samples(folder: pathlib.Path, inputs: dict[str, tuple[int, ...]], count: int = 8, seed: int = 0,
                  low: float | None = None, high: float | None = None) -> pathlib.Path:
    """`count` seeded samples: standard normal, or uniform in [low, high] when both are given."""
    folder.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(seed)
    for i in range(count):
        sample = {}
        for name, shape in inputs.items():
            if low is not None and high is not None:
                sample[name] = rng.uniform(low, high, shape).astype(np.float32)
            else:
                sample[name] = rng.standard_normal(shape).astype(np.float32)
        if len(sample) == 1:
            np.save(folder / f"sample_{i:03d}.npy", next(iter(sample.values())))
        else:
            np.savez(folder / f"sample_{i:03d}.npz", **sample)
    return folder


def model_inputs(model: onnx.ModelProto) -> dict[str, tuple[int, ...]]:
    inits = {i.name for i in model.graph.initializer}
    return {vi.name: tuple(d.dim_value for d in vi.type.tensor_type.shape.dim)
            for vi in model.graph.input if vi.name not in inits}


@dataclass
class Checked:
    """What one `qfit check` run produced."""

    exit_code: int
    report: dict
    int8_model: onnx.ModelProto
    result: pipeline.CheckResult | None   # only for runs through the library
    calib_dir: pathlib.Path
    model_path: pathlib.Path


def check(model: onnx.ModelProto, tmp_path: pathlib.Path, name: str = "model", samples: int = 8,
          seed: int = 0, via_cli: bool = True, extra_args: list[str] | None = None,
          low: float | None = None, high: float | None = None, **options) -> Checked:
    """Run `qfit check` on `model` with synthetic calibration data written to `tmp_path`."""
    model_path = tmp_path / f"{name}.onnx"
    onnx.save(model, str(model_path))
    calib = write_samples(tmp_path / f"{name}_calib", model_inputs(model), samples, seed, low, high)
    out = tmp_path / f"{name}_out"
    if via_cli:
        argv = ["check", str(model_path), "--calib", str(calib), "--out", str(out), "--flash", UNLIMITED,
                "--sram", UNLIMITED, "--quiet", *(extra_args or [])]
        code = cli.main(argv)
        assert code in (0, 1), f"qfit check exited {code}"
        report = json.loads((out / "report.json").read_text())
        int8 = onnx.load(str(out / report["outputs"]["model"]))
        return Checked(code, report, int8, None, calib, model_path)
    result = pipeline.check(pipeline.CheckOptions(
        model_path=str(model_path), calib_dir=str(calib), out_dir=str(out), flash_limit_bytes=1 << 30,
        sram_limit_bytes=1 << 30, progress=False, **options))
    return Checked(result.exit_code, build_report(result), result.quantized.model, result, calib, model_path)


@dataclass
class Reported:
    """A library check's result (qfit.check.CheckResult) with its report dict (qfit.report.build)."""

    result: pipeline.CheckResult
    report: dict

    def __getattr__(self, name):
        return getattr(self.result, name)


def check_with_report(options: pipeline.CheckOptions) -> Reported:
    result = pipeline.check(options)
    return Reported(result, build_report(result))


# ---- agreement with onnx.reference ---------------------------------------------------------------

def _quantizers(model: onnx.ModelProto) -> list[onnx.NodeProto]:
    return [n for n in model.graph.node if n.op_type == "QuantizeLinear"]


def _zero_point_type(model: onnx.ModelProto, node: onnx.NodeProto) -> int:
    inits = {i.name: i for i in model.graph.initializer}
    return inits[node.input[2]].data_type if len(node.input) > 2 and node.input[2] in inits else TensorProto.UINT8


def _forced_copy(model: onnx.ModelProto) -> tuple[onnx.ModelProto, dict[str, str]]:
    """The QDQ graph with every QuantizeLinear output exposed and every reader of it fed from a new
    graph input instead: integer tensor -> name of the input that replaces it for its readers."""
    forced = onnx.ModelProto()
    forced.CopyFrom(model)
    graph = forced.graph
    replaced = {}
    for q in _quantizers(forced):
        name = q.output[0]
        replaced[name] = f"{name}__forced"
        elem = _zero_point_type(forced, q)
        graph.input.append(helper.make_tensor_value_info(replaced[name], elem, None))
        graph.output.append(helper.make_tensor_value_info(name, elem, None))
    for node in graph.node:
        if node.op_type == "QuantizeLinear":
            continue
        for i, name in enumerate(node.input):
            if name in replaced:
                node.input[i] = replaced[name]
    del graph.value_info[:]
    return forced, replaced


def _ort_with_integers(model: onnx.ModelProto, feeds: dict[str, np.ndarray]) -> dict[str, np.ndarray]:
    """Every QuantizeLinear output and the graph outputs of the faithful onnxruntime run."""
    exposed = onnx.ModelProto()
    exposed.CopyFrom(model)
    for q in _quantizers(exposed):
        exposed.graph.output.append(helper.make_tensor_value_info(q.output[0], _zero_point_type(exposed, q), None))
    names = [o.name for o in exposed.graph.output]
    so = ort.SessionOptions()
    so.log_severity_level = 3
    so.add_session_config_entry("session.disable_quant_qdq", "1")  # qfit.run's faithful path
    session = ort.InferenceSession(exposed.SerializeToString(), so, providers=["CPUExecutionProvider"])
    return dict(zip(names, session.run(names, feeds)))


@dataclass
class Agreement:
    integer_elements: int     # elements of every quantized tensor compared
    integer_within_one: int   # of those, how many differ by at most one integer level
    output_elements: int
    output_within_one: int    # graph-output elements within one output quantization step
    max_integer_diff: int

    @property
    def integer_fraction(self) -> float:
        return self.integer_within_one / self.integer_elements if self.integer_elements else 1.0

    @property
    def output_fraction(self) -> float:
        return self.output_within_one / self.output_elements if self.output_elements else 1.0


def _output_steps(model: onnx.ModelProto) -> dict[str, float]:
    """Graph output -> the scale of the QuantizeLinear/DequantizeLinear pair that produces it."""
    inits = {i.name: onnx.numpy_helper.to_array(i) for i in model.graph.initializer}
    producer = {o: n for n in model.graph.node for o in n.output}
    steps = {}
    for out in model.graph.output:
        node = producer.get(out.name)
        if node is not None and node.op_type == "DequantizeLinear" and node.input[1] in inits:
            steps[out.name] = float(np.max(inits[node.input[1]]))
    return steps


def _count_outputs(model, got: dict, expected: dict, float_tolerance: float) -> tuple[int, int]:
    steps = _output_steps(model)
    total = within = 0
    for out in model.graph.output:
        a, b = np.asarray(got[out.name], np.float64), np.asarray(expected[out.name], np.float64)
        assert a.shape == b.shape, (out.name, a.shape, b.shape)
        # One output quantization step (plus float32 rounding of the dequantized value); a float
        # output (produced by an op kept float) gets a float tolerance instead.
        tolerance = steps[out.name] * (1 + 1e-5) if out.name in steps else float_tolerance * (1 + np.abs(b))
        total += a.size
        within += int(np.sum(np.abs(a - b) <= tolerance))
    return total, within


def forced_agreement(model: onnx.ModelProto, samples: list[dict[str, np.ndarray]],
                     float_tolerance: float = 1e-4) -> Agreement:
    """Every quantized tensor and every graph output, with onnx.reference fed onnxruntime's integers."""
    forced, replaced = _forced_copy(model)
    reference = ReferenceEvaluator(forced)
    outputs = [o.name for o in model.graph.output]
    n_int = within_int = n_out = within_out = 0
    worst = 0
    for feeds in samples:
        got = _ort_with_integers(model, feeds)
        ref_feeds = dict(feeds)
        ref_feeds.update({replaced[name]: got[name] for name in replaced})
        names = list(replaced) + outputs
        ref = dict(zip(names, reference.run(names, ref_feeds)))
        for name in replaced:
            diff = np.abs(got[name].astype(np.int64) - ref[name].astype(np.int64))
            n_int += diff.size
            within_int += int(np.sum(diff <= 1))
            worst = max(worst, int(diff.max()) if diff.size else 0)
        total, within = _count_outputs(model, got, ref, float_tolerance)
        n_out += total
        within_out += within
    return Agreement(n_int, within_int, n_out, within_out, worst)


def free_running_agreement(model: onnx.ModelProto, batch: dict[str, np.ndarray],
                           float_tolerance: float = 1e-4) -> Agreement:
    """Graph outputs of the faithful onnxruntime run and of onnx.reference, each on its own values."""
    outputs = [o.name for o in model.graph.output]
    n = next(iter(batch.values())).shape[0]
    got = Runner(model, outputs, faithful=True, batch_size=n)(batch)
    try:
        ref_values = ReferenceEvaluator(batch_free(model)).run(outputs, batch)
    except Exception:  # a graph that hard-codes its batch (a Reshape to [1, ...]): one sample at a time
        evaluator = ReferenceEvaluator(model)
        parts = [evaluator.run(outputs, {k: v[i:i + 1] for k, v in batch.items()}) for i in range(n)]
        ref_values = [np.concatenate([p[j] for p in parts]) for j in range(len(outputs))]
    ref = dict(zip(outputs, ref_values))
    total, within = _count_outputs(model, got, ref, float_tolerance)
    return Agreement(0, 0, total, within, 0)


def random_batch(model: onnx.ModelProto, n: int, seed: int) -> dict[str, np.ndarray]:
    rng = np.random.default_rng(seed)
    return {name: rng.standard_normal((n, *shape[1:])).astype(np.float32)
            for name, shape in model_inputs(model).items()}


def single_samples(model: onnx.ModelProto, n: int, seed: int) -> list[dict[str, np.ndarray]]:
    batch = random_batch(model, n, seed)
    return [{k: v[i:i + 1] for k, v in batch.items()} for i in range(n)]


def ort_default_outputs(model: onnx.ModelProto, feeds: dict[str, np.ndarray]) -> list[np.ndarray]:
    """The int8 model in a plain onnxruntime session, as a user would run it (QDQ fusion on)."""
    so = ort.SessionOptions()
    so.log_severity_level = 3
    session = ort.InferenceSession(model.SerializeToString(), so, providers=["CPUExecutionProvider"])
    return session.run(None, feeds)


def op_types(model: onnx.ModelProto) -> list[str]:
    return [n.op_type for n in model.graph.node]


def report_layer(report: dict, section: str, name: str) -> dict:
    """The row of report[section]['layers'] (flash or macs) for node `name`."""
    rows = [r for r in report[section]["layers"] if r["name"] == name]
    assert len(rows) == 1, (section, name, [r["name"] for r in report[section]["layers"]])
    return rows[0]

