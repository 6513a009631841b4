"""integer: run qfit's int8 QDQ model in integers, as an MCU kernel library does.

The QDQ model is read as an integer program. A node whose quantized inputs all come through
DequantizeLinear (activations) or are integer constants (int8 weights, int32 biases), and whose
output goes, directly or through a fused ReLU/ReLU6, only into a QuantizeLinear, runs as an integer
kernel (qfit.ops.kernels): int8 activations and weights, int32 bias and accumulation, fixed-point
requantization per output channel in the selected rounding, saturation and the fused clamp in one
step. Any other node runs in float32 between a dequantize and a quantize, as a device runs a float
kernel; `float_nodes` lists them. An accumulator that leaves int32 is counted per node in
`overflows` and saturated, never wrapped.

Roundings (qfit.quant.fixed_point, docs/quantization.md): "double", the two-step scheme of Jacob et
al. (CVPR 2018) and of common MCU kernel libraries (from memory), and "single", one rounding of
acc * M0 * 2^(shift - 31), half away from zero.

`layer_requantization(model)` gives the per-layer multipliers and shifts without running anything
(the C export uses it); `IntegerRunner` has the call interface of qfit.runtime.sessions.Runner.
"""
from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field

import numpy as np
import onnx
import onnxruntime as ort
from onnx import NodeProto, TensorProto, helper, numpy_helper

from qfit.errors import QfitError
from qfit import ops
from qfit.ops import attr
from qfit.ops.kernels import Grid, Operand, Prepared, kernel_for
from qfit.quant import fixed_point
from qfit.runtime.sessions import Runner, session_options

ARITHMETICS = ("integer", "float")
ROUNDINGS = fixed_point.ROUNDINGS
ROUNDING_TEXT = {"double": "double rounding (saturating rounding doubling high multiply, then rounding "
                           "right shift, ties away from zero)",
                 "single": "single rounding (acc x M0 x 2^(shift-31) rounded once, half away from zero)"}
FLOAT_PREVIEW_PATH = ("float preview: onnxruntime CPU with QDQ fusion disabled (session.disable_quant_qdq=1): int8 "
                      "values dequantized exactly, products summed in float32, one rounding (half to even) at "
                      "each QuantizeLinear")

_INT_RANGE = {TensorProto.INT8: (-128, 127), TensorProto.UINT8: (0, 255), TensorProto.INT16: (-32768, 32767),
              TensorProto.UINT16: (0, 65535), TensorProto.INT32: (-(1 << 31), (1 << 31) - 1)}


def evaluation_path(arithmetic: str, rounding: str) -> str:
    """The report's `evaluation_path`: which arithmetic and rounding produced the figures."""
    if arithmetic == "float":
        return FLOAT_PREVIEW_PATH
    return ("integer: int8 activations and weights, int32 bias and accumulation (overflow counted, saturated), "
            f"per-channel fixed-point requantization with {ROUNDING_TEXT[rounding]}, saturation, fused clamps")


class FixedPointArithmetic:
    """The qfit.ops.kernels.Arithmetic the kernels run with: fixed point in one rounding, float32
    single-node onnxruntime sessions for exact sums and data movement, an overflow tally."""

    def __init__(self, rounding: str, opsets):
        if rounding not in fixed_point._MULTIPLY:
            raise ValueError(f"unknown rounding '{rounding}' (choose from {', '.join(ROUNDINGS)})")
        self.rounding = rounding
        self.opsets = list(opsets)
        self.overflows: dict[str, int] = {}

    def multipliers(self, reals):
        return fixed_point.quantize_multipliers(np.asarray(reals, np.float64))

    def multiply(self, acc, m0, shift):
        return fixed_point.multiply(acc, m0, shift, self.rounding)

    def requantizer(self, m0, shift, zero_point, low, high, bias=None, acc_bound=None):
        return fixed_point.Requantizer(m0, shift, zero_point, self.rounding, low, high, bias, acc_bound)

    def overflow(self, node: NodeProto, count: int) -> None:
        self.overflows[node.name] = self.overflows.get(node.name, 0) + int(count)

    def compile(self, node: NodeProto, constants: dict, input_types: dict | None = None,
                output_types: list | None = None):
        return compile_node(node, constants, self.opsets, input_types, output_types)


def compile_node(node: NodeProto, constants: dict, opsets, input_types: dict | None = None,
                 output_types: list | None = None):
    """A callable running `node` alone in onnxruntime: the inputs in `constants` (index -> array) are
    fixed, the others are passed in index order (a name repeated is passed once)."""
    initializers, inputs, dynamic = [], [], []
    for i, name in enumerate(node.input):
        if not name:
            continue
        if i in constants:
            if name not in {t.name for t in initializers}:
                initializers.append(numpy_helper.from_array(np.asarray(constants[i]), name))
        elif name not in dynamic:
            dynamic.append(name)
            elem = (input_types or {}).get(i, TensorProto.FLOAT)
            inputs.append(helper.make_tensor_value_info(name, elem, None))
    outputs = [helper.make_tensor_value_info(name, (output_types or [TensorProto.FLOAT] * len(node.output))[k], None)
               for k, name in enumerate(node.output) if name]
    graph = helper.make_graph([node], "qfit_node", inputs, outputs, initializers)
    model = helper.make_model(graph, opset_imports=opsets)
    model.ir_version = max(8, helper.find_min_ir_version_for(opsets))
    session = ort.InferenceSession(model.SerializeToString(), session_options(False),
                                   providers=["CPUExecutionProvider"])
    names = [o.name for o in outputs]

    def run(values):
        return session.run(names, dict(zip(dynamic, values)))

    return run


@dataclass
class _Step:
    kind: str                          # "integer" | "float" | "quantize"
    node: NodeProto | None = None
    reads: list = field(default_factory=list)    # names read from the environment, one per operand (None: fixed)
    writes: list = field(default_factory=list)
    prepared: Prepared | None = None
    run_float: object = None
    grid: Grid | None = None           # quantize steps


def _array(inits: dict, name: str):
    return inits.get(name)


def _grid_of(node: NodeProto, inits: dict, value_dtype: int | None) -> Grid | None:
    """The integer grid of a QuantizeLinear/DequantizeLinear node (None when scale/zero point vary)."""
    scale = inits.get(node.input[1])
    if scale is None:
        return None
    zero = inits.get(node.input[2]) if len(node.input) > 2 and node.input[2] else None
    elem = value_dtype
    if zero is not None:
        elem = helper.np_dtype_to_tensor_dtype(zero.dtype)
    elif node.op_type == "QuantizeLinear":
        elem = attr(node, "output_dtype", 0) or TensorProto.UINT8
    if elem not in _INT_RANGE:
        return None
    low, high = _INT_RANGE[elem]
    zero = np.zeros_like(scale, dtype=np.int64) if zero is None else zero.astype(np.int64)
    axis = int(attr(node, "axis", 1)) if scale.size > 1 else None
    return Grid(scale.astype(np.float64).reshape(-1) if scale.size > 1 else scale.astype(np.float64).reshape(()),
                zero.reshape(-1) if zero.size > 1 else zero.reshape(()), low, high, axis)


def _clamp_bounds(node: NodeProto, inits: dict) -> tuple[float, float] | None:
    """Real bounds of a ReLU-family clamp (the registry's `clamp_bounds`), None when they are not
    constants or the node is no clamp."""
    rule = ops.of(node).clamp_bounds
    bounds = rule(node, inits.get) if rule is not None else None
    if bounds is None:
        return None
    low, high = bounds
    return (float("-inf") if low is None else float(low)), (float("inf") if high is None else float(high))


def _narrow(grid: Grid, bounds: tuple[float, float]) -> Grid:
    """The output grid with a fused clamp: Q(clip(x)) = clip(Q(x), Q(lo), Q(hi)), Q monotonic."""
    def q(v):
        return int(np.clip(np.rint(np.float32(v) / np.float32(grid.s)) + grid.z, grid.low, grid.high))
    low = grid.low if bounds[0] == float("-inf") else max(grid.low, q(bounds[0]))
    high = grid.high if bounds[1] == float("inf") else min(grid.high, q(bounds[1]))
    return Grid(grid.scale, grid.zero_point, low, high, grid.axis)


class IntegerProgram:
    """The QDQ `model` as a list of integer, float and quantize steps (see the module docstring)."""

    def __init__(self, model: onnx.ModelProto, rounding: str = "double"):
        self.arithmetic = FixedPointArithmetic(rounding, model.opset_import)
        graph = model.graph
        inits = {i.name: numpy_helper.to_array(i) for i in graph.initializer}
        for node in graph.node:
            value = ops.of(node).constant_value(node) if ops.of(node).constant_value else None
            if value is not None:
                inits[node.output[0]] = value
        self._read_types_and_shapes(model)
        self._release_plans: dict[tuple[str, ...], list[list[str]]] = {}
        self.quantizers: dict[str, Grid] = {}       # Q output -> grid
        self.dequantized: dict[str, str] = {}       # activation DQ output -> Q output
        integer_constants = self._read_quantizers(graph, inits)   # DQ of a constant -> integers and grid
        float_constants = {**inits, **{name: _dequantize(op.value, op.grid) for name, op in integer_constants.items()}}
        self.steps: list[_Step] = []
        self.requantization: dict[str, dict] = {}
        self.integer_nodes: list[str] = []
        self.float_nodes: list[str] = []
        self.pre_quantizer: dict[str, str] = {}   # float name of an integer step's output -> its Q output
        consumers: dict[str, list[NodeProto]] = {}
        for node in graph.node:
            for name in node.input:
                consumers.setdefault(name, []).append(node)
        graph_outputs = {o.name for o in graph.output}
        produced, absorbed = set(), set()
        for node in graph.node:
            if node.output and node.output[0] in inits or id(node) in absorbed:
                continue
            if node.op_type == "DequantizeLinear" and (node.output[0] in integer_constants
                                                        or node.output[0] in self.dequantized):
                continue
            if node.op_type == "QuantizeLinear" and node.output[0] in self.quantizers:
                if node.output[0] not in produced:
                    self.steps.append(_Step("quantize", node, [node.input[0]], [node.output[0]],
                                            grid=self.quantizers[node.output[0]]))
                continue
            step = self._integer_step(node, consumers, graph_outputs, inits, integer_constants, absorbed)
            if step is not None:
                produced.update(step.writes)
                self.steps.append(step)
                self.integer_nodes.append(node.name)
                if step.prepared.requantization is not None:
                    self.requantization[node.name] = step.prepared.requantization
                continue
            self.steps.append(self._float_step(node, float_constants))
            if not ops.is_qdq(node):
                self.float_nodes.append(node.name)

    def _read_types_and_shapes(self, model: onnx.ModelProto) -> None:
        try:
            inferred = onnx.shape_inference.infer_shapes(model)
            infos = list(inferred.graph.value_info) + list(inferred.graph.input) + list(inferred.graph.output)
        except Exception:  # shapes only refine the records; types default to float
            infos = list(model.graph.input) + list(model.graph.output)
        self.elem_types = {vi.name: vi.type.tensor_type.elem_type for vi in infos}
        self.shapes = {vi.name: tuple(d.dim_value for d in vi.type.tensor_type.shape.dim)
                       for vi in infos if vi.type.tensor_type.HasField("shape")
                       and all(d.HasField("dim_value") for d in vi.type.tensor_type.shape.dim)}

    def _read_quantizers(self, graph, inits: dict) -> dict[str, Operand]:
        """Fill `quantizers` (activation Q outputs) and `dequantized` (their DQ readers); return the
        integer constants read through a DequantizeLinear (int8 weights, int32 biases)."""
        integer_constants: dict[str, Operand] = {}
        for node in graph.node:
            if node.op_type == "QuantizeLinear":
                grid = _grid_of(node, inits, None)
                if grid is not None and node.input[0] not in inits:
                    self.quantizers[node.output[0]] = grid
        for node in graph.node:
            if node.op_type != "DequantizeLinear":
                continue
            source = node.input[0]
            if source in inits:
                values = inits[source]
                grid = _grid_of(node, inits, helper.np_dtype_to_tensor_dtype(values.dtype))
                if grid is not None:
                    integer_constants[node.output[0]] = Operand("integer_constant", grid, values.astype(np.int64))
            elif source in self.quantizers:
                dq_grid = _grid_of(node, inits, None)
                if dq_grid is not None and dq_grid.same_as(self.quantizers[source]):
                    self.dequantized[node.output[0]] = source
        return integer_constants

    def _integer_step(self, node, consumers, graph_outputs, inits, integer_constants, absorbed) -> _Step | None:
        builder = kernel_for(node.op_type)
        if builder is None or node.domain not in ("", "ai.onnx"):
            return None
        operands, reads = [], []
        for name in node.input:
            if not name:
                operands.append(Operand("absent")); reads.append(None)
            elif name in self.dequantized:
                q = self.dequantized[name]
                operands.append(Operand("activation", self.quantizers[q], shape=self.shapes.get(name)))
                reads.append(q)
            elif name in integer_constants:
                operands.append(integer_constants[name]); reads.append(None)
            elif name in inits:
                operands.append(Operand("constant", value=inits[name])); reads.append(None)
            else:
                return None  # a float tensor computed at run time
        if not any(op.kind == "activation" for op in operands):
            return None
        grids, writes, fused = [], [], []
        for out in node.output:
            if not out or out in graph_outputs:
                return None
            users = consumers.get(out, [])
            clamp = None
            bounds = _clamp_bounds(users[0], inits) if len(users) == 1 else None
            if (bounds is not None and ops.of(node).takes_fused_activation and users[0].input[0] == out
                    and users[0].output[0] not in graph_outputs):
                clamp = users[0]
                users = consumers.get(clamp.output[0], [])
            if len(users) != 1 or users[0].op_type != "QuantizeLinear" or users[0].output[0] not in self.quantizers:
                return None
            grid = self.quantizers[users[0].output[0]]
            if clamp is not None:
                grid = _narrow(grid, bounds)
                fused.append(clamp)
            grids.append(grid)
            writes.append(users[0].output[0])
        prepared = builder(node, operands, grids, self.arithmetic)
        if prepared is None:
            return None
        for clamp in fused:
            absorbed.add(id(clamp))
            self.pre_quantizer[clamp.output[0]] = writes[0]
        for out, q in zip(node.output, writes):
            self.pre_quantizer[out] = q
        return _Step("integer", node, reads, writes, prepared)

    def _float_step(self, node: NodeProto, float_constants: dict) -> _Step:
        constants = {i: float_constants[name] for i, name in enumerate(node.input) if name in float_constants}
        reads = [name for i, name in enumerate(node.input) if name and i not in constants]
        reads = list(dict.fromkeys(reads))
        types = {i: self.elem_types.get(name) or TensorProto.FLOAT for i, name in enumerate(node.input)}
        out_types = [self.elem_types.get(name) or TensorProto.FLOAT for name in node.output]
        run = compile_node(node, constants, self.arithmetic.opsets, types, out_types)
        return _Step("float", node, reads, [o for o in node.output if o], run_float=run)

    # ---- running -------------------------------------------------------------------------------

    def value(self, env: dict, name: str) -> np.ndarray:
        """A float tensor (an integer tensor read through its DequantizeLinear is dequantized)."""
        if name in env:
            return env[name]
        q = self.dequantized.get(name) or self.pre_quantizer.get(name)
        if q is None or q not in env:
            raise KeyError(name)
        env[name] = _dequantize(env[q], self.quantizers[q])
        return env[name]

    def _source(self, name: str) -> str | None:
        """The integer tensor (a Q output) whose dequantized values `name` is, if any."""
        return self.dequantized.get(name) or self.pre_quantizer.get(name)

    def _releases(self, wanted: tuple[str, ...]) -> list[list[str]]:
        """Per step, the tensors no later step reads (liveness from the steps' reads): dropped right
        after it, so a batch holds only the tensors still to be read, not the whole graph's."""
        keep = set(wanted) | {self._source(name) for name in wanted}
        last_step: dict[str, int] = {}
        for index, step in enumerate(self.steps):
            for name in step.reads:
                if name is not None:
                    last_step[name] = index
                    if step.kind != "integer" and self._source(name):   # read through self.value
                        last_step[self._source(name)] = index
            for name in step.writes:
                last_step.setdefault(name, index)   # written, never read: dropped at once
        releases: list[list[str]] = [[] for _ in self.steps]
        for name, index in last_step.items():
            if name not in keep:
                releases[index].append(name)
        return releases

    def run(self, feeds: dict[str, np.ndarray], wanted: list[str]) -> "StoredTensors":
        """The tensors `wanted` for `feeds`; an integer tensor's float view is returned as its integers
        and grid, dequantized when read (a quarter of the bytes of float32 while it waits)."""
        wanted = tuple(wanted)
        releases = self._release_plans.get(wanted)
        if releases is None:
            releases = self._release_plans[wanted] = self._releases(wanted)
        env = dict(feeds)
        for step, released in zip(self.steps, releases):
            if step.kind == "integer":
                outs = step.prepared.run([env[r] if r is not None else None for r in step.reads])
                env.update(zip(step.writes, outs))
            elif step.kind == "quantize":
                env[step.writes[0]] = _quantize(self.value(env, step.reads[0]), step.grid)
            else:
                outs = step.run_float([self.value(env, r) for r in step.reads])
                env.update(zip(step.writes, outs))
            for name in released:
                env.pop(name, None)
        stored = {}
        for name in wanted:
            source = self._source(name)
            if source in env:
                stored[name] = (env[source], self.quantizers[source])
            else:
                stored[name] = (self.value(env, name), None)
        return StoredTensors(stored)


class StoredTensors(Mapping):
    """One run's tensors by name as the integer path stores them: (integers, grid) for an integer
    tensor, dequantized to float32 on each read (the same values as DequantizeLinear), or (floats, None)."""

    def __init__(self, stored: dict[str, tuple[np.ndarray, Grid | None]]):
        self.stored = stored

    def __getitem__(self, name: str) -> np.ndarray:
        values, grid = self.stored[name]
        return values if grid is None else _dequantize(values, grid)

    def __iter__(self):
        return iter(self.stored)

    def __len__(self) -> int:
        return len(self.stored)

    @staticmethod
    def concatenate(parts: list["StoredTensors"]) -> "StoredTensors":
        """The runs of consecutive samples as one batch (the grids are the program's, the same in each)."""
        return StoredTensors({name: (np.concatenate([p.stored[name][0] for p in parts], axis=0), grid)
                              for name, (_, grid) in parts[0].stored.items()})


def _broadcast(grid: Grid, ndim: int) -> tuple[np.ndarray, np.ndarray]:
    """(float32 scale, zero point) of `grid`, shaped to broadcast against an ndim tensor."""
    scale, zero = grid.scale.astype(np.float32), grid.zero_point
    if not grid.per_tensor:
        shape = [1] * ndim
        shape[grid.axis % ndim] = -1
        scale, zero = scale.reshape(shape), zero.reshape(shape)
    return scale, zero


def _dequantize(q: np.ndarray, grid: Grid) -> np.ndarray:
    """DequantizeLinear in float32: (q - z) * s."""
    scale, zero = _broadcast(grid, q.ndim)
    out = np.subtract(q, zero, dtype=np.float32)   # exact: |q - z| < 2^24
    out *= scale
    return out


def _quantize(x: np.ndarray, grid: Grid) -> np.ndarray:
    """QuantizeLinear: saturate(round_half_even(x / s) + z), x / s in float32."""
    scale, zero = _broadcast(grid, np.ndim(x))
    q = np.rint(np.asarray(x, np.float32) / scale) + zero
    return np.clip(q, grid.low, grid.high).astype(fixed_point.storage_dtype(grid.low, grid.high))


class IntegerRunner:
    """Runs the QDQ `model` in integers and returns the float view of `outputs` (same call interface as
    qfit.runtime.sessions.Runner). Batches run whole; a graph that hard-codes its batch runs sample by
    sample."""

    def __init__(self, model: onnx.ModelProto, outputs: list[str], rounding: str = "double", batch_size: int = 16):
        self.program = IntegerProgram(model, rounding)
        self.outputs = list(outputs)
        self.batched = batch_size > 1

    def __call__(self, inputs: dict[str, np.ndarray]) -> StoredTensors:
        n = next(iter(inputs.values())).shape[0]
        if n > 1 and self.batched:
            try:
                got = self.program.run(inputs, self.outputs)
                if all(v.ndim and v.shape[0] == n for v, _ in got.stored.values()):
                    return got
            except Exception:  # onnxruntime refuses a batch the graph hard-codes: fall back below
                pass
            self.batched = False
        return StoredTensors.concatenate([self.program.run({k: v[i:i + 1] for k, v in inputs.items()}, self.outputs)
                                          for i in range(n)])

    @property
    def overflows(self) -> dict[str, int]:
        return dict(self.program.arithmetic.overflows)


def layer_requantization(model: onnx.ModelProto) -> dict[str, dict]:
    """Per node of the QDQ `model` that runs in integers: its fixed-point multipliers and shifts
    (`multiplier`, `shift`: one per output channel; Add also per input) as report.json lists them."""
    return dict(IntegerProgram(model, "double").requantization)


# ---- the evaluation's choice of arithmetic (qfit.measure.evaluate, qfit.check) --------------------

def check_arithmetic_options(arithmetic: str, rounding: str) -> None:
    """One-line errors for --arithmetic and --rounding."""
    if arithmetic not in ARITHMETICS:
        raise QfitError(f"--arithmetic: unknown arithmetic '{arithmetic}' (choose from {', '.join(ARITHMETICS)})")
    if rounding not in ROUNDINGS:
        raise QfitError(f"--rounding: unknown rounding '{rounding}' (choose from {', '.join(ROUNDINGS)})")


def quantized_runner(model: onnx.ModelProto, outputs: list[str], arithmetic: str = "integer",
                     rounding: str = "double", batch_size: int = 16, threads: int = 0):
    """The runner of the QDQ model in the selected arithmetic: the integer path, or the float preview."""
    if arithmetic == "float":
        return Runner(model, outputs, faithful=True, batch_size=batch_size, threads=threads)
    return IntegerRunner(model, outputs, rounding, batch_size)


class PreviewComparison:
    """With the integer path selected: the float preview of the same model over the same samples, and
    how many samples change their prediction (argmax of the first output) between the two."""

    def __init__(self, model: onnx.ModelProto, output: str, arithmetic: str, classification: bool,
                 batch_size: int = 16, threads: int = 0):
        self.output = output
        self.enabled = arithmetic == "integer"
        self.classification = classification
        self.runner = Runner(model, [output], faithful=True, batch_size=batch_size, threads=threads) \
            if self.enabled else None
        self.samples = 0
        self.changed = 0
        self.max_abs_output_difference = 0.0

    def update(self, inputs: dict[str, np.ndarray], integer_output: np.ndarray) -> None:
        if not self.enabled:
            return
        preview = self.runner(inputs)[self.output]
        n = preview.shape[0]
        self.samples += n
        if preview.size:
            self.max_abs_output_difference = max(self.max_abs_output_difference,
                                                 float(np.max(np.abs(preview - integer_output))))
        if self.classification:
            self.changed += int(np.sum(np.argmax(preview.reshape(n, -1), axis=1)
                                       != np.argmax(integer_output.reshape(n, -1), axis=1)))

    def result(self) -> dict | None:
        if not self.enabled:
            return None
        return {"samples": self.samples,
                "prediction_changes": self.changed if self.classification else None,
                "prediction_changes_pct": (round(100.0 * self.changed / self.samples, 4)
                                           if self.classification and self.samples else None),
                "max_abs_output_difference": self.max_abs_output_difference}


def arithmetic_section(arithmetic: str, rounding: str, runner, comparison: PreviewComparison | None) -> dict:
    """The report's "arithmetic" section: what computed the int8 figures, and how they compare."""
    section = {"arithmetic": arithmetic, "rounding": rounding if arithmetic == "integer" else None,
               "path": evaluation_path(arithmetic, rounding)}
    if arithmetic == "integer":
        program = runner.program
        section.update({"integer_nodes": len(program.integer_nodes), "float_nodes": list(program.float_nodes),
                        "accumulator_overflows": dict(program.arithmetic.overflows),
                        "float_preview": comparison.result() if comparison is not None else None})
    return section
