"""collect: an int8 QDQ model + qfit's budget -> the export's data: parameter arrays, layers, tensors.

Everything the firmware needs is read from the model file itself (the integers, scales and zero
points of its QuantizeLinear / DequantizeLinear nodes) and from the budget qfit computed for it (the
execution order and the arena plan), so the export cannot disagree with the report:
  * a layer is a quantized node of the graph `qdq_read` recovers; a ReLU/Clip that the plan fuses
    into the layer before it is not a layer of its own: its bounds become that layer's clamp;
  * a tensor is an activation stored in the arena: its offset and lifetime are those of its buffer
    in the budget's arena plan (a view or an in-place output shares its input's buffer);
  * requantization factors become (multiplier, shift) pairs through qfit.quant.fixed_point, the
    same function the integer evaluation path uses.
The export covers models whose layers and activations are all int8 with int8 weights; anything else
is refused with a message naming the layer (the kernels that would run it are not int8 kernels).
"""
from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import onnx
from onnx import numpy_helper

from qfit import ops
from qfit.errors import QfitError
from qfit.graph.model import LoadedModel
from qfit.memory.budget import BudgetResult
from qfit.quant.fixed_point import quantize_multipliers
from qfit.quant.plan import Plan

# Layer kinds of the export format, numbered in this order (1, 2, ...); which ONNX op is which
# kind is the registry's `export_kind` (qfit/ops/).
KINDS = ("CONV", "FULLY_CONNECTED", "ADD", "MUL", "AVERAGE_POOL", "GLOBAL_AVERAGE_POOL", "MAX_POOL",
         "GLOBAL_MAX_POOL", "RESHAPE", "CONCAT", "CLAMP")
# Kinds whose output takes the input's quantizer unchanged (no rescaling when the scales agree).
PASS_THROUGH_KINDS = ("RESHAPE", "MAX_POOL", "GLOBAL_MAX_POOL")
MAX_RANK = 4
ADD_LEFT_SHIFT = 20   # the integer path's L for 8-bit inputs: (q - z) << 20 stays inside int32
INT8_MIN, INT8_MAX = -128, 127


@dataclass
class ParamArray:
    """One constant array of the export (stored in flash)."""

    role: str                 # "weights" | "bias" | "multipliers" | "shifts"
    ctype: str                # "int8_t" | "int32_t"
    values: np.ndarray        # int64, flattened in the documented layout
    shape: list[int]
    layer: int                # index of the layer that uses it
    source: str               # ONNX tensor it was read from, or how it was computed
    c_name: str = ""          # filled by the C writer's name table

    @property
    def elem_bytes(self) -> int:
        return 1 if self.ctype == "int8_t" else 4

    @property
    def bytes(self) -> int:
        return int(self.values.size) * self.elem_bytes


@dataclass
class Tensor:
    index: int
    name: str
    shape: list[int]
    scale: float
    zero_point: int
    buffer: int               # arena slot (tensors in one slot share bytes by design: views, in place)
    arena_offset: int
    first_step: int
    last_step: int

    @property
    def bytes(self) -> int:
        return int(np.prod(self.shape)) if self.shape else 1

    @property
    def layout(self) -> str:
        return "NCHW" if len(self.shape) == 4 else "ND"


@dataclass
class Layer:
    index: int
    name: str
    op_type: str
    kind: str
    step: int                 # position in the budget's execution order
    inputs: list[int]
    output: int
    kernel: list[int] = field(default_factory=lambda: [1, 1])        # height, width
    stride: list[int] = field(default_factory=lambda: [1, 1])
    pads: list[int] = field(default_factory=lambda: [0, 0, 0, 0])    # top, left, bottom, right
    dilation: list[int] = field(default_factory=lambda: [1, 1])
    groups: int = 1
    axis: int = 0             # CONCAT: the joined axis
    left_shift: int = 0       # ADD: inputs are shifted left by this before their multipliers
    act_min: int = INT8_MIN
    act_max: int = INT8_MAX
    fused_activation: str | None = None   # name of the ReLU/Clip node folded into the clamp
    weights: ParamArray | None = None
    bias: ParamArray | None = None
    multipliers: ParamArray | None = None
    shifts: ParamArray | None = None
    table: ParamArray | None = None       # CLAMP: output integer for every input integer

    def arrays(self) -> list[ParamArray]:
        return [a for a in (self.weights, self.bias, self.multipliers, self.shifts, self.table) if a is not None]


@dataclass
class ExportModel:
    layers: list[Layer]
    tensors: list[Tensor]
    input_tensors: list[int]
    output_tensors: list[int]
    arena_bytes: int
    arena_alignment_bytes: int
    order_method: str
    report_param_bytes: int   # the budget's flash rows: weights + biases + weight scales

    def arrays(self) -> list[ParamArray]:
        return [a for layer in self.layers for a in layer.arrays()]


class _Quantizers:
    """Integer constants and activation quantizers of the original QDQ model, by tensor name as the
    graph read back by qdq_read names them."""

    def __init__(self, model: onnx.ModelProto, path: str):
        self.path = path
        graph = model.graph
        self.values = {i.name: numpy_helper.to_array(i) for i in graph.initializer}
        for node in graph.node:   # scales written as Constant nodes
            hook = ops.of(node).constant_value
            value = hook(node) if hook is not None else None
            if value is not None:
                self.values[node.output[0]] = value
        self.dq_by_output = {n.output[0]: n for n in graph.node if n.op_type == "DequantizeLinear"}
        self.q_by_input: dict[str, onnx.NodeProto] = {}
        self.q_by_output: dict[str, onnx.NodeProto] = {}
        for n in graph.node:
            if n.op_type == "QuantizeLinear":
                self.q_by_input.setdefault(n.input[0], n)
                self.q_by_output[n.output[0]] = n

    def _scale_zero(self, node: onnx.NodeProto) -> tuple[np.ndarray, np.ndarray, np.dtype]:
        """(scale, zero point as int64, the zero point's stored type: uint8 when absent, as the spec says)."""
        scale = self.values[node.input[1]].astype(np.float32)
        if len(node.input) > 2 and node.input[2]:
            zero = self.values[node.input[2]]
            return scale, zero.astype(np.int64), zero.dtype
        return scale, np.zeros(scale.shape, np.int64), np.dtype(np.uint8)

    def activation(self, tensor: str, where: str) -> tuple[float, int]:
        """(scale, zero point) of an int8 activation tensor."""
        q = self.q_by_input.get(tensor)
        if q is None and tensor in self.dq_by_output:       # a graph output kept its DQ's name
            q = self.q_by_output.get(self.dq_by_output[tensor].input[0])
        if q is None:
            raise QfitError(f"export: {self.path}: tensor '{tensor}' ({where}) has no QuantizeLinear")
        scale, zero, zero_type = self._scale_zero(q)
        if zero_type != np.int8 or scale.size != 1:
            raise QfitError(f"export: {self.path}: tensor '{tensor}' ({where}) is not stored as per-tensor int8 "
                            "(the export covers int8 activations)")
        return float(scale.reshape(-1)[0]), int(zero.reshape(-1)[0])

    def constant(self, tensor: str, where: str) -> tuple[np.ndarray, np.ndarray, np.ndarray, int]:
        """(integers, scale, zero point, axis) of a dequantized constant (a weight or a bias)."""
        dq = self.dq_by_output.get(tensor)
        if dq is None or dq.input[0] not in self.values:
            raise QfitError(f"export: {self.path}: {where} is not an integer constant")
        scale, zero, _ = self._scale_zero(dq)
        return self.values[dq.input[0]], scale, zero, int(ops.attr(dq, "axis", 1))


def _requant(layer: Layer, reals, source: str) -> None:
    """Per-channel or per-input factors -> (multiplier, shift) arrays, as the integer path computes them."""
    m0, shift = quantize_multipliers(np.asarray(reals, dtype=np.float64).reshape(-1))
    layer.multipliers = ParamArray("multipliers", "int32_t", m0.astype(np.int64), [int(m0.size)], layer.index, source)
    layer.shifts = ParamArray("shifts", "int8_t", shift.astype(np.int64), [int(shift.size)], layer.index, source)


def _quantize_bound(value: float, scale: float, zero_point: int) -> int:
    """Where QuantizeLinear puts `value` (x / s rounded half to even in float32, + z, saturated to
    int8): a clamp before the quantizer equals this clamp after it, since quantizing is monotonic."""
    q = np.rint(np.float32(value) / np.float32(scale)) + zero_point
    return int(np.clip(q, INT8_MIN, INT8_MAX))


def _clamp(layer: Layer, node: onnx.NodeProto, constants: dict, scale: float, zero_point: int) -> None:
    """Narrow the layer's int8 output range to a clamp's bounds (ReLU, ReLU6, Clip; from the registry)."""
    bounds = ops.clamp_bounds(node, constants.get)
    if bounds is None:
        raise QfitError(f"export: layer '{node.name}': clamp bounds must be constants")
    low, high = bounds
    if low is not None and np.isfinite(low):
        layer.act_min = max(layer.act_min, _quantize_bound(low, scale, zero_point))
    if high is not None and np.isfinite(high):
        layer.act_max = min(layer.act_max, _quantize_bound(high, scale, zero_point))


def _clamp_table(layer: Layer, grid_in: tuple[float, int], grid_out: tuple[float, int]) -> None:
    """A clamp that is a layer of its own, as the integer path runs it (qfit.ops.kernels, a lookup
    over every input integer): dequantize in float32, clamp, QuantizeLinear's rounding. The clamp is
    exact in float32, so the table needs no runtime: entry q + 128 is the output for input q."""
    (s_in, z_in), (s_out, z_out) = grid_in, grid_out
    every = np.arange(INT8_MIN, INT8_MAX + 1, dtype=np.int64)
    real = (every - z_in).astype(np.float32) * np.float32(s_in)
    # the bounds as reals on the output grid: clip(Q(x)) = Q(clip(x)), Q monotonic
    q = np.clip(np.rint(real / np.float32(s_out)) + z_out, layer.act_min, layer.act_max)
    layer.table = ParamArray("table", "int8_t", q.astype(np.int64), [int(q.size)], layer.index,
                             "clamp(s_in (q - z_in)) quantized to the output, for q = -128..127")


def _spatial(layer: Layer, node: onnx.NodeProto, kernel: list[int], in_shape, out_shape) -> None:
    """Kernel, stride, padding (top, left, bottom, right) and dilation of a 2-D window op."""
    layer.kernel = [int(k) for k in kernel]
    layer.stride = [int(s) for s in ops.attr(node, "strides", [1, 1])]
    layer.dilation = [int(d) for d in ops.attr(node, "dilations", [1, 1])]
    auto_pad = ops.attr(node, "auto_pad", b"NOTSET")
    auto_pad = auto_pad.decode() if isinstance(auto_pad, bytes) else str(auto_pad)
    if auto_pad in ("NOTSET", ""):
        layer.pads = [int(p) for p in ops.attr(node, "pads", [0, 0, 0, 0])]
        return
    layer.pads = [0, 0, 0, 0]
    if auto_pad == "VALID":
        return
    for d in range(2):  # SAME_UPPER / SAME_LOWER: the ONNX spec's padding that keeps ceil(in / stride)
        total = max(0, (out_shape[2 + d] - 1) * layer.stride[d] + (layer.kernel[d] - 1) * layer.dilation[d]
                    + 1 - in_shape[2 + d])
        small, large = total // 2, total - total // 2
        layer.pads[d], layer.pads[2 + d] = (small, large) if auto_pad == "SAME_UPPER" else (large, small)


def _weights(layer: Layer, quantizers: _Quantizers, tensor: str, channel_axis: int) -> np.ndarray:
    """int8 weights with per-output-channel scales; returns the scales (one per channel, or one)."""
    where = f"layer '{layer.name}' weights"
    q, scale, zero, axis = quantizers.constant(tensor, where)
    if q.dtype != np.int8:
        raise QfitError(f"export: {quantizers.path}: {where} are {q.dtype}, not int8")
    if np.any(zero != 0):
        raise QfitError(f"export: {quantizers.path}: {where} have a nonzero zero point (the export expects "
                        "symmetric weights)")
    if scale.size > 1 and axis % q.ndim != channel_axis:
        raise QfitError(f"export: {quantizers.path}: {where} have scales along axis {axis}, not the output channels")
    if channel_axis != 0:   # a [K, N] matrix is stored as [N, K]: one row per output channel
        q = np.moveaxis(q, channel_axis, 0)
    layer.weights = ParamArray("weights", "int8_t", np.ascontiguousarray(q).astype(np.int64).reshape(-1),
                               [int(d) for d in q.shape], layer.index,
                               quantizers.dq_by_output[tensor].input[0])
    return scale.reshape(-1).astype(np.float64)


def _bias(layer: Layer, quantizers: _Quantizers, tensor: str, in_scale: float, weight_scale: np.ndarray) -> None:
    """int32 bias, checked to have the scale an integer kernel assumes (input scale x weight scale)."""
    where = f"layer '{layer.name}' bias"
    q, scale, zero, _ = quantizers.constant(tensor, where)
    if q.dtype != np.int32 or np.any(zero != 0):
        raise QfitError(f"export: {quantizers.path}: {where} is not int32 with zero point 0")
    expected = np.float64(in_scale) * weight_scale
    if not np.allclose(np.broadcast_to(scale.astype(np.float64), expected.shape) if scale.size == 1 else scale,
                       expected, rtol=1e-6, atol=0):
        raise QfitError(f"export: {quantizers.path}: {where} scale is not input scale x weight scale, so an "
                        "integer kernel cannot add it to the accumulator")
    layer.bias = ParamArray("bias", "int32_t", q.astype(np.int64).reshape(-1), [int(q.size)], layer.index,
                            quantizers.dq_by_output[tensor].input[0])


@dataclass
class _Context:
    loaded: LoadedModel
    plan: Plan
    quantizers: _Quantizers
    tensor_index: dict[str, int]
    scales: dict[str, tuple[float, int]]

    def shape(self, tensor: str) -> list[int]:
        return [int(d) for d in self.loaded.shapes[tensor]]

    def scale(self, tensor: str) -> float:
        return self.scales[tensor][0]


def _weight_input(node: onnx.NodeProto, ctx: _Context) -> tuple[int, int]:
    """(input index, output-channel axis) of the layer's constant weight, from the registry."""
    for index, axis_rule in ops.of(node).weights.items():
        if index < len(node.input) and node.input[index] in ctx.loaded.constants:
            shape = ctx.loaded.shapes[node.input[index]]
            axis = axis_rule(node, shape)
            if index == 0 or len(shape) < 2 or axis is None:
                break
            return index, axis % len(shape)
    raise QfitError(f"export: layer '{node.name}' ({node.op_type}): only a constant weight on the right with "
                    "per-channel or per-tensor scales along the output channels is exported")


def _weighted_layer(layer: Layer, node: onnx.NodeProto, ctx: _Context, in_t: str, out_t: str) -> None:
    """CONV and FULLY_CONNECTED: int8 weights, int32 bias, one (multiplier, shift) per output channel."""
    q = ctx.quantizers
    s_in, s_out = ctx.scale(in_t), ctx.scale(out_t)
    if ops.attr(node, "transA", 0) or ops.product_scale(node) != 1.0 or ops.bias_scale(node) != 1.0:
        raise QfitError(f"export: layer '{node.name}': a transposed input, alpha or beta is not exported")
    index, axis = _weight_input(node, ctx)
    w_shape = ctx.loaded.shapes[node.input[index]]
    if layer.kind == "CONV":
        if len(w_shape) != 4:
            raise QfitError(f"export: layer '{node.name}': only 2-D convolutions are exported")
        _spatial(layer, node, list(w_shape[2:]), ctx.shape(in_t), ctx.shape(out_t))
        layer.groups = int(ops.attr(node, "group", 1))
    elif len(w_shape) != 2:
        raise QfitError(f"export: layer '{node.name}': only a 2-D weight matrix is exported")
    s_w = _weights(layer, q, node.input[index], axis)
    bias = ops.of(node).bias
    if bias is not None and bias < len(node.input) and node.input[bias]:
        _bias(layer, q, node.input[bias], s_in, s_w)
    _requant(layer, np.float64(s_in) * s_w / np.float64(s_out), "input scale x weight scale / output scale")


def _add_requant(layer: Layer, in_scales: list[float], s_out: float) -> None:
    """ADD as the integer path runs it (qfit.ops.kernels.elementwise; Jacob et al., CVPR 2018, 2.4):
    each input, centred and shifted left by L, is scaled by M(s_i / 2max), the sum by
    M(2max / (2^L s_out)). Entry 0 is the output factor, entries 1 and 2 the inputs'."""
    layer.left_shift = ADD_LEFT_SHIFT
    twice_max = 2.0 * max(in_scales)
    common = twice_max / (1 << ADD_LEFT_SHIFT)
    _requant(layer, [common / s_out] + [s / twice_max for s in in_scales],
             "output 2max / (2^L s_out), then inputs s_i / 2max")


def _window_counts(layer: Layer, in_shape: list[int], out_shape: list[int]) -> np.ndarray:
    """Input values inside each output position's window (padding is not counted), row-major over
    the output's height x width; one entry when every window is full."""
    per_axis = []
    for d in range(2):
        starts = np.arange(out_shape[2 + d]) * layer.stride[d] - layer.pads[d]
        taps = starts[:, None] + np.arange(layer.kernel[d])[None, :] * layer.dilation[d]
        per_axis.append(((taps >= 0) & (taps < in_shape[2 + d])).sum(axis=1))
    counts = np.outer(per_axis[0], per_axis[1]).reshape(-1)
    return counts[:1] if np.all(counts == counts[0]) else counts


def _window_layer(layer: Layer, node: onnx.NodeProto, ctx: _Context, in_t: str, out_t: str) -> None:
    in_shape, out_shape = ctx.shape(in_t), ctx.shape(out_t)
    if len(in_shape) != 4:
        raise QfitError(f"export: layer '{node.name}': only 2-D pooling is exported")
    if layer.kind in ("GLOBAL_AVERAGE_POOL", "GLOBAL_MAX_POOL"):
        layer.kernel = in_shape[2:]
        return
    if ops.attr(node, "ceil_mode", 0) or ops.attr(node, "count_include_pad", 0) or ops.attr(node, "storage_order", 0):
        raise QfitError(f"export: layer '{node.name}': ceil_mode, count_include_pad and storage_order must be 0")
    _spatial(layer, node, list(ops.attr(node, "kernel_shape")), in_shape, out_shape)


def _activation_inputs(node: onnx.NodeProto, ctx: _Context, kind: str) -> list[str]:
    if kind in ("CONV", "FULLY_CONNECTED", "RESHAPE", "CLAMP", "AVERAGE_POOL", "GLOBAL_AVERAGE_POOL",
                "MAX_POOL", "GLOBAL_MAX_POOL"):
        names = [node.input[0]]
    else:
        names = [n for n in node.input if n]
    for name in names:
        if name in ctx.loaded.constants:
            raise QfitError(f"export: layer '{node.name}' ({node.op_type}): a constant operand '{name}' "
                            "is not exported")
    return names


def _build_layer(index: int, step: int, node: onnx.NodeProto, out_t: str, ctx: _Context) -> Layer:
    kind = ops.of(node).export_kind
    in_names = _activation_inputs(node, ctx, kind)
    layer = Layer(index=index, name=node.name, op_type=node.op_type, kind=kind, step=step,
                  inputs=[ctx.tensor_index[n] for n in in_names], output=ctx.tensor_index[out_t])
    s_out = ctx.scale(out_t)
    if kind in ("AVERAGE_POOL", "GLOBAL_AVERAGE_POOL", "MAX_POOL", "GLOBAL_MAX_POOL"):
        _window_layer(layer, node, ctx, in_names[0], out_t)
    if kind in ("CONV", "FULLY_CONNECTED"):
        _weighted_layer(layer, node, ctx, in_names[0], out_t)
    elif kind == "ADD":
        _add_requant(layer, [ctx.scale(n) for n in in_names], s_out)
    elif kind == "MUL":
        _requant(layer, [ctx.scale(in_names[0]) * ctx.scale(in_names[1]) / s_out], "s_a x s_b / s_out")
    elif kind in ("AVERAGE_POOL", "GLOBAL_AVERAGE_POOL"):
        counts = _window_counts(layer, ctx.shape(in_names[0]), ctx.shape(out_t))
        _requant(layer, ctx.scale(in_names[0]) / (s_out * counts.astype(np.float64)),
                 "s_in / (s_out x values in the window), per output position")
    elif kind in PASS_THROUGH_KINDS and ctx.scales[in_names[0]] == ctx.scales[out_t]:
        pass    # same quantizer in and out: the kernel moves bytes, nothing to rescale
    elif kind == "CLAMP":
        _clamp(layer, node, ctx.loaded.constants, *ctx.scales[out_t])
        _clamp_table(layer, ctx.scales[in_names[0]], ctx.scales[out_t])
    else:
        _requant(layer, [ctx.scale(n) / s_out for n in in_names], "s_in / s_out, per input")
    if kind == "CONCAT":
        layer.axis = int(ops.attr(node, "axis", 0)) % len(ctx.shape(out_t))
    return layer


def _add_tensor(name: str, where: str, ctx: _Context, tensors: list[Tensor], memory, placement: dict) -> None:
    if name in ctx.tensor_index:
        return
    if ctx.plan.bits_of(name) != 8:
        raise QfitError(f"export: {ctx.quantizers.path}: tensor '{name}' ({where}) is not stored as int8 "
                        "(the export covers int8 activations)")
    shape = ctx.shape(name)
    if len(shape) > MAX_RANK:
        raise QfitError(f"export: tensor '{name}' ({where}) has rank {len(shape)}; at most {MAX_RANK} is exported")
    ctx.scales[name] = ctx.quantizers.activation(name, where)
    buffer = memory.buffer_of[name]
    slot = placement[memory.problem.buffers[buffer].name]
    ctx.tensor_index[name] = len(tensors)
    tensors.append(Tensor(len(tensors), name, shape, *ctx.scales[name], buffer=buffer, arena_offset=slot["offset"],
                          first_step=slot["first_step"], last_step=slot["last_step"]))


def _check_all_int8(plan: Plan, loaded: LoadedModel, path: str) -> None:
    for node in loaded.graph.node:
        if node.name in plan.float_nodes:
            raise QfitError(f"export: {path}: layer '{node.name}' ({node.op_type}) is kept float; the export "
                            "covers models whose layers are all int8")
        if ops.of(node).export_kind is None:
            raise QfitError(f"export: {path}: layer '{node.name}' ({node.op_type}) has no layer kind in the export "
                            f"(exported: {', '.join(sorted(t for t, op in ops.OPS.items() if op.export_kind))})")
    for (node, _), weight in plan.weights.items():
        if weight.bits != 8:
            raise QfitError(f"export: {path}: layer '{node}' has {weight.bits}-bit weights; the export covers int8")


def collect(model: onnx.ModelProto, path: str, loaded: LoadedModel, plan: Plan, budget: BudgetResult) -> ExportModel:
    """The export's layers (in the budget's execution order), tensors (at the budget's arena offsets)
    and parameter arrays for the QDQ `model`, read back as (`loaded`, `plan`) by qdq_read."""
    _check_all_int8(plan, loaded, path)
    nodes = {n.name: n for n in loaded.graph.node}
    order = list(budget.order["order"])
    if sorted(order) != sorted(nodes):
        raise RuntimeError("export: the budget's execution order does not name the model's nodes")
    memory = budget.memory
    placement = {slot["tensor"]: slot for slot in budget.arena["plan"]}
    ctx = _Context(loaded, plan, _Quantizers(model, path), {}, {})
    tensors: list[Tensor] = []
    for name in loaded.input_names:
        if name not in loaded.constants:
            _add_tensor(name, "graph input", ctx, tensors, memory, placement)
    layers: list[Layer] = []
    for step, name in enumerate(order):
        node = nodes[name]
        if ops.clamp_bounds(node, loaded.constants.get) is not None and node.input[0] in plan.fused:
            continue    # folded into the previous layer's clamp
        out = node.output[0]
        fused = loaded.index.consumers(out)[0] if out in plan.fused else None
        out_t = plan.fused.get(out, out)
        _add_tensor(out_t, f"output of '{name}'", ctx, tensors, memory, placement)
        layer = _build_layer(len(layers), step, node, out_t, ctx)
        if fused is not None:
            _clamp(layer, fused, loaded.constants, *ctx.scales[out_t])
            layer.fused_activation = fused.name
        layers.append(layer)
    rows = budget.flash["layers"]
    return ExportModel(
        layers=layers, tensors=tensors,
        input_tensors=[ctx.tensor_index[n] for n in loaded.input_names if n in ctx.tensor_index],
        output_tensors=[ctx.tensor_index[n] for n in loaded.output_names],
        arena_bytes=int(budget.arena["bytes"]), arena_alignment_bytes=int(budget.arena["alignment"]),
        order_method=str(budget.order["method"]),
        report_param_bytes=sum(r["weight_bytes"] + r["bias_bytes"] + r["scale_bytes"] for r in rows))
