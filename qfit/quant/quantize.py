"""quantize: loaded float graph + plan + calibrated ranges -> a standard ONNX QDQ model.

Formulas (Jacob et al., "Quantization and Training of Neural Networks for Efficient Integer-
Arithmetic-Only Inference", CVPR 2018; the ONNX QuantizeLinear/DequantizeLinear spec):
  q = saturate(round_half_even(x / s) + z),  x' = (q - z) * s
  weights   per output channel c: s_c = max|W_c| / 127, z = 0, q in [-127, 127]
  bias      int32, s_b = s_in * s_w(c), z = 0
  8-bit activations, asymmetric: s = (hi - lo) / 255, z = round(-128 - lo / s) in [-128, 127]
  8-bit activations, symmetric:  s = max(|lo|, |hi|) / 127, z = 0
  16-bit activations (symmetric, common practice): s = max(|lo|, |hi|) / 32767, z = 0
Degenerate ranges (an all-zero tensor or channel) get s = 1, so nothing divides by zero and zeros
stay exactly zero.
"""
from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import onnx
from onnx import TensorProto, helper, numpy_helper

from qfit.errors import QfitError
from qfit.graph.load import LoadedModel
from qfit.quant.observe import TensorStats, observe, range_for
from qfit.quant.plan import Plan, PlanOptions, make_plan
from qfit.runtime.sessions import Runner
from qfit.quant.scale_floor import floor_activation_scale, floor_weight_scale

INT_RANGE = {8: (-128, 127), 16: (-32768, 32767)}
WEIGHT_QMAX = {8: 127, 16: 32767}
INT_TYPE = {8: (np.int8, TensorProto.INT8), 16: (np.int16, TensorProto.INT16)}
INT32_MIN, INT32_MAX = -(2 ** 31), 2 ** 31 - 1


@dataclass
class ActivationParams:
    scale: float
    zero_point: int
    bits: int
    lo: float
    hi: float


@dataclass
class QuantizedModel:
    """The QDQ model and the parameters written into it (the report reads these)."""

    model: onnx.ModelProto
    activations: dict[str, ActivationParams] = field(default_factory=dict)
    weight_scales: dict[tuple[str, int], np.ndarray] = field(default_factory=dict)
    dequantized: dict[str, str] = field(default_factory=dict)  # tensor -> name of its int8 value, dequantized


def activation_params(lo: float, hi: float, bits: int = 8, symmetric: bool = False) -> tuple[float, int]:
    """(scale, zero point) for the range [lo, hi], which is widened to contain 0."""
    lo, hi = min(float(lo), 0.0), max(float(hi), 0.0)
    qmin, qmax = INT_RANGE[bits]
    if symmetric or bits > 8:
        bound = max(-lo, hi)
        scale = bound / qmax if bound > 0 else 1.0
        return float(np.float32(floor_activation_scale(scale))), 0
    scale = (hi - lo) / (qmax - qmin)
    if not scale > 0 or not np.isfinite(scale):
        return 1.0, 0
    scale = float(np.float32(floor_activation_scale(scale)))
    zero_point = int(np.clip(np.round(qmin - lo / scale), qmin, qmax))
    return scale, zero_point


def quantize_weight(w: np.ndarray, axis: int | None, bits: int = 8) -> tuple[np.ndarray, np.ndarray]:
    """Symmetric weight quantization: (q, scale), per channel along `axis` or per tensor."""
    qmax = WEIGHT_QMAX[bits]
    w = np.asarray(w, dtype=np.float32)
    if axis is None:
        amax = np.array(np.abs(w).max() if w.size else 0.0, dtype=np.float32)
        scale = floor_weight_scale(np.where(amax > 0, amax / qmax, 1.0))
        q = np.clip(np.round(w / scale), -qmax, qmax)
        return q.astype(INT_TYPE[bits][0]), scale.reshape(())
    moved = np.moveaxis(w, axis, 0).reshape(w.shape[axis], -1)
    amax = np.abs(moved).max(axis=1) if moved.size else np.zeros(w.shape[axis], np.float32)
    scale = floor_weight_scale(np.where(amax > 0, amax / qmax, 1.0))
    shape = [1] * w.ndim
    shape[axis] = -1
    q = np.clip(np.round(w / scale.reshape(shape)), -qmax, qmax)
    return q.astype(INT_TYPE[bits][0]), scale


def quantize_bias(b: np.ndarray, input_scale: float, weight_scale: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """int32 bias with scale input_scale * weight_scale (per channel), zero point 0."""
    scale = (np.float32(input_scale) * np.asarray(weight_scale, np.float32)).astype(np.float32)
    scale = np.broadcast_to(scale, np.shape(b)).astype(np.float32)
    safe = np.where(scale > 0, scale, 1.0)
    q = np.clip(np.round(np.asarray(b, np.float64) / safe), INT32_MIN, INT32_MAX).astype(np.int32)
    return q, safe.astype(np.float32)


QDQ_MIN_OPSET = 21  # first opset whose QuantizeLinear/DequantizeLinear accept int16


def qdq_opset_imports(model: onnx.ModelProto) -> list[onnx.OperatorSetIdProto]:
    """The model's opset imports, with the default domain lowered to the oldest opset (>= 21) at
    which every op of the float graph still has the definition it has at the model's own opset.

    The graph means exactly the same at that opset, and the QuantizeLinear/DequantizeLinear added
    by qfit get the most widely implemented version: a model exported at the newest opset would
    otherwise ask runtimes for a QuantizeLinear revision they may not have yet (onnxruntime 1.32
    implements it up to opset 27, onnx 1.23 defines 28)."""
    imports = []
    for imp in model.opset_import:
        if imp.domain not in ("", "ai.onnx") or imp.version <= QDQ_MIN_OPSET:
            imports.append(helper.make_opsetid(imp.domain, imp.version))
            continue
        needed = QDQ_MIN_OPSET
        for node in model.graph.node:
            if node.domain in ("", "ai.onnx"):
                try:
                    needed = max(needed, onnx.defs.get_schema(node.op_type, imp.version, "").since_version)
                except onnx.defs.SchemaError:  # an op onnx does not know here: keep the model's opset
                    needed = imp.version
        imports.append(helper.make_opsetid(imp.domain, min(needed, imp.version)))
    return imports


def calibrated_ranges(plan: Plan, stats: dict[str, TensorStats], method: str,
                      percentile: float) -> dict[str, tuple[float, float]]:
    """Range of every tensor with its own quantizer, by its own method or the run's method."""
    ranges = {}
    for name in plan.calibrated_tensors():
        q = plan.activations[name]
        ranges[name] = range_for(stats[name], q.method or method, q.bits, q.symmetric, percentile)
    return ranges


def activation_table(plan: Plan, ranges: dict[str, tuple[float, float]]) -> dict[str, ActivationParams]:
    """Scale and zero point of every stored activation (a shared quantizer takes its source's range)."""
    params = {}
    for name, q in plan.activations.items():
        lo, hi = ranges[plan.source_of(name)]
        scale, zero_point = activation_params(lo, hi, q.bits, q.symmetric)
        params[name] = ActivationParams(scale, zero_point, q.bits, lo, hi)
    return params


class _QdqWriter:
    """The nodes and initializers a QDQ graph adds, in the order they are written, each freshly named."""

    def __init__(self, fresh):
        self.fresh = fresh
        self.initializers: list[onnx.TensorProto] = []
        self.nodes: list[onnx.NodeProto] = []

    def constant(self, array: np.ndarray, base: str) -> str:
        name = self.fresh(base)
        self.initializers.append(numpy_helper.from_array(array, name))
        return name

    def qdq_pair(self, p: ActivationParams, tensor: str, read_name: str, out_name: str) -> None:
        s = self.constant(np.array(p.scale, np.float32), f"{tensor}_scale")
        z = self.constant(np.array(p.zero_point, INT_TYPE[p.bits][0]), f"{tensor}_zero_point")
        quantized = self.fresh(f"{tensor}_quantized")
        self.nodes.append(helper.make_node("QuantizeLinear", [read_name, s, z], [quantized],
                                           name=self.fresh(f"{tensor}_QuantizeLinear")))
        self.nodes.append(helper.make_node("DequantizeLinear", [quantized, s, z], [out_name],
                                           name=self.fresh(f"{tensor}_DequantizeLinear")))

    def dequantized_constant(self, q: np.ndarray, scale: np.ndarray, zero: np.ndarray, base: str,
                             axis: int | None) -> str:
        """A stored integer constant with its scale and zero point, and the DequantizeLinear reading it."""
        qname = self.constant(q, f"{base}_quantized")
        sname = self.constant(scale, f"{base}_scale")
        zname = self.constant(zero, f"{base}_zero_point")
        dname = self.fresh(f"{base}_dequantized")
        attrs = {"axis": axis} if axis is not None else {}
        self.nodes.append(helper.make_node("DequantizeLinear", [qname, sname, zname], [dname],
                                           name=self.fresh(f"{dname}_DequantizeLinear"), **attrs))
        return dname


def build_qdq(loaded: LoadedModel, plan: Plan, ranges: dict[str, tuple[float, float]]) -> QuantizedModel:
    """Write the QDQ model for `plan` with activation ranges `ranges` (see the module docstring)."""
    result = QuantizedModel(model=onnx.ModelProto(), activations=activation_table(plan, ranges))
    writer = _QdqWriter(loaded.index.fresh_names())
    outputs = set(loaded.output_names)
    # Tensors read through their dequantized copy; a graph output keeps its name on the DQ side.
    read_as: dict[str, str] = {}
    renamed_output: dict[str, str] = {}
    for name in plan.activations:
        if name in outputs:
            renamed_output[name] = writer.fresh(f"{name}_float")
            read_as[name] = name
        else:
            read_as[name] = writer.fresh(f"{name}_dequantized")
    result.dequantized = dict(read_as)
    for name in loaded.input_names:
        if name in plan.activations:
            writer.qdq_pair(result.activations[name], name, name, read_as[name])
    for node in loaded.graph.node:
        new = _rewired(node, loaded, plan, result, writer, read_as)
        for i, out in enumerate(node.output):
            if out in renamed_output:
                new.output[i] = renamed_output[out]
        writer.nodes.append(new)
        for out in node.output:
            if out in plan.activations:
                writer.qdq_pair(result.activations[out], out, renamed_output.get(out, out), read_as[out])
    result.model = _assemble(loaded, writer)
    return result


def _rewired(node: onnx.NodeProto, loaded: LoadedModel, plan: Plan, result: QuantizedModel, writer: _QdqWriter,
             read_as: dict[str, str]) -> onnx.NodeProto:
    """A copy of `node` reading its weights and bias as stored integers (their DequantizeLinear nodes are
    written first) and its quantized inputs through their dequantized copies."""
    new = onnx.NodeProto()
    new.CopyFrom(node)
    for i, inp in enumerate(node.input):
        key = (node.name, i)
        if key in plan.weights:
            wq = plan.weights[key]
            qw, scale = quantize_weight(loaded.constants[inp], wq.axis, wq.bits)
            result.weight_scales[key] = scale
            new.input[i] = writer.dequantized_constant(qw, scale, np.zeros(scale.shape, INT_TYPE[wq.bits][0]),
                                                       f"{inp}_{node.name}", wq.axis)
        elif key in plan.biases and (node.name, 1) in result.weight_scales:
            qb, sb = quantize_bias(loaded.constants[inp], result.activations[node.input[0]].scale,
                                   result.weight_scales[(node.name, 1)])
            new.input[i] = writer.dequantized_constant(qb, sb, np.zeros(sb.shape, np.int32), f"{inp}_{node.name}", 0)
        elif inp in read_as:
            new.input[i] = read_as[inp]
    return new


def _assemble(loaded: LoadedModel, writer: _QdqWriter) -> onnx.ModelProto:
    """The QDQ model: the float graph's initializers still read, then the written ones; the oldest
    equivalent opset; the float model's metadata."""
    graph = loaded.graph
    referenced = {i for n in writer.nodes for i in n.input}
    kept_inits = [init for init in graph.initializer if init.name in referenced]
    new_graph = helper.make_graph(writer.nodes, graph.name or "qfit", list(graph.input), list(graph.output),
                                  kept_inits + writer.initializers)
    opsets = qdq_opset_imports(loaded.model)
    model = helper.make_model(new_graph, opset_imports=opsets, producer_name="qfit",
                              ir_version=max(loaded.model.ir_version, helper.find_min_ir_version_for(opsets)))
    for prop in loaded.model.metadata_props:
        model.metadata_props.append(prop)
    return model


# ---- the one way from precision choices to a QDQ model ---------------------------------------------

class Quantizer:
    """PlanOptions -> (Plan, QDQ model), for one float graph and its calibration statistics.

    The pipeline, the repair search and the sensitivity costs all build their models through this.
    A plan that quantizes a tensor the first calibration pass did not observe (e.g. the output of a
    MaxPool that no longer shares an int16 input's quantizer) gets one more pass over `calib`; those
    statistics stay in this quantizer (it copies the ones it is given, so two quantizers never share
    a dict) and `extra_calibration_passes` counts the passes.
    """

    def __init__(self, loaded: LoadedModel, stats: dict[str, TensorStats], method: str, percentile: float,
                 calib=None, batch_size: int = 16, bias_correction=None, threads: int = 0):
        self.loaded = loaded
        self.method = method
        self.percentile = percentile
        self.calib = calib                      # calibration DataFolder, for tensors a new plan needs
        self.batch_size = batch_size
        self.bias_correction = bias_correction  # qfit.quant.equalize.BiasCorrection or None
        self.threads = threads
        self._stats = dict(stats)
        self.extra_calibration_passes = 0

    @property
    def stats(self) -> dict[str, TensorStats]:
        """A copy of the statistics this quantizer holds (for a quantizer of a changed graph)."""
        return dict(self._stats)

    def plan(self, options: PlanOptions) -> Plan:
        return make_plan(self.loaded, options)

    def _observe_missing(self, plan: Plan) -> None:
        missing = [t for t in plan.calibrated_tensors() if t not in self._stats]
        if not missing:
            return
        if self.calib is None:
            raise QfitError(f"calibration: no statistics for tensor '{missing[0]}' and no calibration data")
        runner = Runner(self.loaded.model, missing, batch_size=self.batch_size, threads=self.threads)
        self._stats.update(observe(runner, self.calib.batches(self.batch_size), missing))
        self.extra_calibration_passes += 1

    def build(self, options: PlanOptions) -> tuple[Plan, QuantizedModel]:
        return self.build_plan(self.plan(options))

    def build_plan(self, plan: Plan) -> tuple[Plan, QuantizedModel]:
        self._observe_missing(plan)
        ranges = calibrated_ranges(plan, self._stats, self.method, self.percentile)
        source = self.loaded
        if self.bias_correction is not None and self.bias_correction.fixes:
            from qfit.graph.model import with_constants
            source = with_constants(self.loaded, self.bias_correction.values_for(plan))
        return plan, build_qdq(source, plan, ranges)
