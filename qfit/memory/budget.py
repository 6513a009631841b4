"""budget: graph + precision plan + limits -> flash map, SRAM timeline, arena plan, order, MACs, what-ifs.

Library entry point: `analyze(loaded, plan, BudgetOptions(...)) -> BudgetResult`; `result.to_dict()`
is the JSON report section, `render_text` / `render_markdown` the human-readable ones. Every
convention behind the figures (stored types, aliasing, liveness, what flash counts, estimates) is
written down in docs/memory.md; the code below follows it line by line.
"""
from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from onnx import TensorProto, helper
from tabulate import tabulate

from qfit import ops
from qfit.memory import schedule
from qfit.errors import QfitError
from qfit.graph.load import LoadedModel
from qfit.quant.plan import Plan, describe_node_precision
from qfit.sizes import format_size

FLOAT_BYTES = 4
BIAS_BYTES = 4            # int32 bias
SCALE_BYTES = 4           # one float32 scale per channel (or per tensor)


@dataclass
class BudgetOptions:
    flash_limit_bytes: int | None = None
    sram_limit_bytes: int | None = None
    flash_reserve_bytes: int = 0           # code + runtime, given by the user (an estimate)
    meta_bytes_per_layer: int = 0          # per-node metadata in the model file (an estimate)
    alignment: int = 4                     # arena offsets and sizes are multiples of this
    views: bool = True                     # Reshape/Flatten/Squeeze/Unsqueeze share their input's bytes
    inplace: bool = True                   # elementwise op overwrites an input nobody else reads
    scratch: bool = False                  # im2col-style scratch for convolutions (an estimate)
    order_search: bool = True
    order_time_limit_s: float = 2.0
    cycles_per_mac: float | None = None    # latency estimate = MACs * cycles_per_mac / clock
    clock_mhz: float | None = None
    energy_per_mac_pj: float | None = None
    what_if: bool | None = None            # None: only when something does not fit

    def validate(self) -> None:
        for name in ("flash_limit_bytes", "sram_limit_bytes"):
            value = getattr(self, name)
            if value is not None and value <= 0:
                raise QfitError(f"budget: {name} must be positive, got {value}")
        if self.flash_reserve_bytes < 0 or self.meta_bytes_per_layer < 0:
            raise QfitError("budget: flash reserve and per-layer metadata bytes cannot be negative")
        if self.alignment < 1 or self.alignment & (self.alignment - 1):
            raise QfitError(f"budget: alignment must be a power of two (1, 2, 4, 8, ...), got {self.alignment}")
        if self.order_time_limit_s < 0:
            raise QfitError(f"budget: order time limit must be >= 0 s, got {self.order_time_limit_s}")
        for name in ("cycles_per_mac", "clock_mhz", "energy_per_mac_pj"):
            value = getattr(self, name)
            if value is not None and value <= 0:
                raise QfitError(f"budget: {name} must be positive, got {value}")


@dataclass
class BudgetResult:
    model: dict
    flash: dict
    sram: dict
    arena: dict
    order: dict
    macs: dict
    what_if: dict | None = None
    notes: list[str] = field(default_factory=list)
    memory: "MemoryModel | None" = field(default=None, repr=False)

    @property
    def flash_fits(self) -> bool | None:
        return self.flash["fits"]

    @property
    def sram_fits(self) -> bool | None:
        return self.sram["fits"]

    @property
    def fits(self) -> bool | None:
        """True when both fit, False when either does not, None when no limits were given."""
        verdicts = [v for v in (self.flash_fits, self.sram_fits) if v is not None]
        if not verdicts:
            return None
        return all(verdicts)

    def to_dict(self) -> dict:
        out = {"fits": self.fits, "model": self.model, "flash": self.flash, "sram": self.sram,
               "arena": self.arena, "order": self.order, "macs": self.macs}
        if self.what_if is not None:
            out["what_if"] = self.what_if
        if self.notes:
            out["notes"] = list(self.notes)
        return out


# ---- stored sizes ---------------------------------------------------------------------------------

def _numel(shape) -> int:
    return int(np.prod(shape)) if shape is not None else 0


def _itemsize(elem_type: int) -> int:
    try:
        return np.dtype(helper.tensor_dtype_to_np_dtype(elem_type)).itemsize
    except Exception:
        return FLOAT_BYTES


def _dtype_name(elem_type: int) -> str:
    try:
        return np.dtype(helper.tensor_dtype_to_np_dtype(elem_type)).name
    except Exception:
        return "float32"


def stored_tensor(loaded: LoadedModel, plan: Plan, shapes: dict, tensor: str) -> tuple[int, str]:
    """(bytes, dtype label) of an activation tensor as stored: int8/int16 when the plan quantizes it,
    otherwise its ONNX element type (float32 for float tensors); 0 bytes when fused (not stored)."""
    if tensor in plan.fused:
        return 0, "fused"
    bits = plan.bits_of(tensor)
    n = _numel(shapes.get(tensor))
    if bits:
        return n * (bits // 8), f"int{bits}"
    elem = loaded.elem_types.get(tensor, TensorProto.FLOAT)
    return n * _itemsize(elem), _dtype_name(elem)


# ---- flash ----------------------------------------------------------------------------------------

def _weight_role_inputs(node) -> set[int]:
    entry = ops.info(node.op_type)
    roles = set(entry.weights)
    if entry.bias is not None:
        roles.add(entry.bias)
    return roles


def count_params(loaded: LoadedModel, plan: Plan) -> int:
    """Elements of the weight and bias constants of layers with weights (Conv, ConvTranspose, Gemm,
    MatMul) and of every float constant of a layer kept float (e.g. an LSTM's W, R, B)."""
    seen: set[str] = set()
    total = 0
    producer = {o: n for n in loaded.graph.node for o in n.output}
    for node in loaded.graph.node:
        roles = _weight_role_inputs(node)
        if node.op_type == "Add":
            # MatMul has no bias input: an Add of a constant right after a MatMul with constant
            # weights is that layer's bias (as exporters write a Linear layer).
            for i, name in enumerate(node.input):
                other = node.input[1 - i] if len(node.input) == 2 else None
                prev = producer.get(other) if other else None
                if (name in loaded.constants and prev is not None and prev.op_type == "MatMul"
                        and any(n in loaded.constants for n in prev.input)):
                    roles = roles | {i}
        for i, name in enumerate(node.input):
            if not name or name in seen or name not in loaded.constants:
                continue
            arr = loaded.constants[name]
            if i in roles or (node.name in plan.unsupported_nodes and arr.dtype.kind == "f"):
                seen.add(name)
                total += int(arr.size)
    return total


def _flash(loaded: LoadedModel, plan: Plan, options: BudgetOptions) -> dict:
    rows = []
    seen: set[str] = set()
    weight_float32_bytes = weight_stored_bytes = 0
    for node in loaded.graph.node:
        is_float = node.name in plan.float_nodes
        row = dict(name=node.name, op_type=node.op_type, precision="", weight_bytes=0, bias_bytes=0,
                   scale_bytes=0, float_bytes=0, other_bytes=0, total_bytes=0, float32_bytes=0)
        weight_bits = set()
        for i, name in enumerate(node.input):
            if not name or name in seen or name not in loaded.constants:
                continue
            seen.add(name)  # an initializer shared by several nodes is stored once
            arr = loaded.constants[name]
            n = int(arr.size)
            as_float32 = n * FLOAT_BYTES if arr.dtype.kind == "f" else int(arr.nbytes)
            row["float32_bytes"] += as_float32
            weight = plan.weights.get((node.name, i))
            if weight is not None and not is_float:
                stored = -(-n * weight.bits // 8)          # sub-byte weights are packed
                zero_point_bytes = -(-weight.bits // 8)
                channels = int(arr.shape[weight.axis]) if weight.axis is not None and arr.ndim else 1
                row["weight_bytes"] += stored
                row["scale_bytes"] += channels * (SCALE_BYTES + zero_point_bytes)
                weight_bits.add(weight.bits)
                weight_float32_bytes += as_float32
                weight_stored_bytes += stored
            elif (node.name, i) in plan.biases and not is_float:
                row["bias_bytes"] += n * BIAS_BYTES
            elif arr.dtype.kind == "f":
                row["float_bytes"] += n * FLOAT_BYTES
                if i in ops.info(node.op_type).weights or (is_float and i in _weight_role_inputs(node)):
                    weight_float32_bytes += as_float32
                    weight_stored_bytes += n * FLOAT_BYTES
            else:
                row["other_bytes"] += int(arr.nbytes)   # shapes, indices: stored as they are
        row["total_bytes"] = (row["weight_bytes"] + row["bias_bytes"] + row["scale_bytes"]
                              + row["float_bytes"] + row["other_bytes"])
        if row["float32_bytes"] == 0:
            continue
        if is_float:
            row["precision"] = "float"
        elif weight_bits - {8}:
            row["precision"] = "int" + "/".join(str(b) for b in sorted(weight_bits)) + " weights"
        else:
            row["precision"] = describe_node_precision(plan, node)
        rows.append(row)
    float_bytes = sum(r["float32_bytes"] for r in rows)
    int8_bytes = sum(r["total_bytes"] for r in rows)
    # Activation quantizers: a scale and a zero point for every tensor with a range of its own.
    activation_param_bytes = sum(SCALE_BYTES + q.bits // 8 for q in plan.activations.values()
                                 if q.shared_from is None)
    meta_bytes = options.meta_bytes_per_layer * len(loaded.graph.node)
    total = int8_bytes + activation_param_bytes + meta_bytes + options.flash_reserve_bytes
    limit = options.flash_limit_bytes
    return {
        "float_bytes": float_bytes,
        "int8_bytes": int8_bytes,
        "activation_param_bytes": activation_param_bytes,
        "reserve_bytes": options.flash_reserve_bytes,
        "meta_bytes": meta_bytes,
        "meta_bytes_per_layer": options.meta_bytes_per_layer,
        "total_bytes": total,
        "limit_bytes": limit,
        "fits": None if limit is None else total <= limit,
        "headroom_bytes": None if limit is None else limit - total,
        "shrink_ratio": _ratio(float_bytes, int8_bytes),
        "weight_shrink_ratio": _ratio(weight_float32_bytes, weight_stored_bytes),
        "shrink_ratio_all_in": _ratio(float_bytes + meta_bytes + options.flash_reserve_bytes, total),
        "estimates": ["reserve_bytes", "meta_bytes"],
        "layers": rows,
    }


def _ratio(a: float, b: float) -> float | None:
    return round(a / b, 4) if b else None


# ---- SRAM memory model ----------------------------------------------------------------------------

@dataclass
class MemoryModel:
    """The scheduling problem built from a graph and a plan, plus the names the report needs."""

    problem: schedule.MemoryProblem
    nodes: list                     # NodeProto, in the graph's order (node index = position)
    scratch_bytes: list[int]
    conversion_bytes: list[int]
    buffer_of: dict[str, int]       # tensor -> buffer index


def _scratch_bytes(node, loaded: LoadedModel, plan: Plan, shapes: dict) -> int:
    """im2col-style scratch of a convolution (an estimate): two columns of Cin/groups x kernel
    elements widened to 16 bits for an int8 layer (4 B floats for a float one); a depthwise conv
    one column per channel; a 1x1 stride-1 unpadded conv none."""
    if node.op_type != "Conv" or len(node.input) < 2:
        return 0
    w = shapes.get(node.input[1])
    if not w or len(w) < 3:
        return 0
    kernel = _numel(w[2:])
    strides = ops.attr(node, "strides", [1] * (len(w) - 2))
    pads = ops.attr(node, "pads", [0] * 2 * (len(w) - 2))
    if kernel == 1 and all(s == 1 for s in strides) and not any(pads):
        return 0
    elt = FLOAT_BYTES if node.name in plan.float_nodes else 2
    group = int(ops.attr(node, "group", 1))
    if group > 1 and w[1] == 1:
        return group * kernel * elt
    return 2 * int(w[1]) * kernel * elt


def build_memory_model(loaded: LoadedModel, plan: Plan, options: BudgetOptions,
                       shapes: dict | None = None) -> MemoryModel:
    """Buffers (with aliases resolved), dependencies and step-local bytes, in the graph's node order.
    `shapes` overrides loaded.shapes (the resolution what-if re-sizes the same graph)."""
    shapes = loaded.shapes if shapes is None else shapes
    nodes = list(loaded.graph.node)
    constants = loaded.constants
    producer: dict[str, int] = {}
    consumers: dict[str, list[int]] = {}
    for i, node in enumerate(nodes):
        for out in node.output:
            if out:
                producer[out] = i
        for name in node.input:
            if name and name not in constants and i not in consumers.setdefault(name, []):
                consumers[name].append(i)
    graph_inputs = [n for n in loaded.input_names if n not in constants]
    outputs = set(loaded.output_names)
    tensors = list(graph_inputs) + [o for node in nodes for o in node.output if o]
    size = {t: stored_tensor(loaded, plan, shapes, t) for t in tensors}

    def materialised(t: str) -> int:
        return size[plan.fused[t]][0] if t in plan.fused and plan.fused[t] in size else size[t][0]

    parent = {t: t for t in tensors}

    def find(t: str) -> str:
        while parent[t] != t:
            parent[t] = parent[parent[t]]
            t = parent[t]
        return t

    members: dict[str, list[str]] = {t: [t] for t in tensors}

    def union(keep: str, other: str) -> None:
        a, b = find(keep), find(other)
        if a != b:
            parent[b] = a
            members[a].extend(members.pop(b))

    input_set = set(graph_inputs)
    for i, node in enumerate(nodes):
        entry = ops.info(node.op_type)
        for out in node.output:
            # A fused tensor (Conv -> ReLU folded into requantization) is never stored: the producer
            # writes the clamped result straight into the ReLU's output buffer.
            if out in plan.fused and plan.fused[out] in parent:
                union(out, plan.fused[out])
        if not node.output or not node.output[0]:
            continue
        out = node.output[0]
        if options.views and entry.alias == "view" and node.input and node.input[0] in parent:
            src = node.input[0]
            if materialised(src) == materialised(out) and size[src][1] == size[out][1]:
                union(src, out)
        elif options.inplace and entry.alias == "inplace":
            for src in node.input:
                if not src or src not in parent or find(src) == find(out):
                    continue
                root = find(src)
                if any(m in input_set for m in members[root]) or any(m in outputs for m in members[root]):
                    continue  # the application owns graph inputs; outputs must survive
                readers = {r for m in members[root] for r in consumers.get(m, [])}
                member_producers = {producer[m] for m in members[root] if m in producer}
                if readers - member_producers != {i}:
                    continue
                if materialised(src) != materialised(out) or size[src][1] != _stored_dtype(size, plan, out):
                    continue
                union(src, out)
                break

    buffers: list[schedule.Buffer] = []
    buffer_of: dict[str, int] = {}
    position = {t: k for k, t in enumerate(tensors)}
    for root in sorted(members, key=lambda r: min(position[m] for m in members[r])):
        group = sorted(members[root], key=lambda m: position[m])
        stored = [m for m in group if size[m][0] > 0] or group
        name = stored[0]
        first = group[0]
        readers = frozenset(r for m in group for r in consumers.get(m, []))
        buffers.append(schedule.Buffer(
            name=name, size_bytes=max(size[m][0] for m in group),
            producer=None if first in input_set else producer[first], readers=readers,
            is_output=any(m in outputs for m in group), members=tuple(group), dtype=size[name][1]))
        for m in group:
            buffer_of[m] = len(buffers) - 1

    preds = []
    for i, node in enumerate(nodes):
        preds.append(frozenset(producer[n] for n in node.input if n in producer and producer[n] != i))
    scratch = [(_scratch_bytes(node, loaded, plan, shapes) if options.scratch else 0) for node in nodes]
    conversion = [_conversion_bytes(node, plan, shapes, constants) for node in nodes]
    problem = schedule.MemoryProblem(
        node_names=[n.name for n in nodes], preds=preds, buffers=buffers,
        extra_bytes=[s + c for s, c in zip(scratch, conversion)])
    return MemoryModel(problem, nodes, scratch, conversion, buffer_of)


def _stored_dtype(size: dict, plan: Plan, out: str) -> str:
    target = plan.fused.get(out, out)
    return size.get(target, size[out])[1]


def _conversion_bytes(node, plan: Plan, shapes: dict, constants: dict) -> int:
    """A layer kept float between integer tensors works on float copies: a dequantized copy of each
    integer input and a float result before it is quantized, live during its own step only."""
    if node.name not in plan.float_nodes:
        return 0
    total = 0
    for name in list(node.input) + list(node.output):
        if name and name not in constants and plan.bits_of(name):
            total += _numel(shapes.get(name)) * FLOAT_BYTES
    return total


# ---- SRAM report sections -------------------------------------------------------------------------

def _sram(memory: MemoryModel, live: schedule.Liveness, options: BudgetOptions, required_bytes: int) -> dict:
    problem = memory.problem
    nodes = memory.nodes
    timeline = []
    for s, v in enumerate(live.order):
        live_buffers = live.live_at(s)
        timeline.append({
            "step": s, "node": nodes[v].name, "op_type": nodes[v].op_type,
            "live_bytes": live.step_bytes[s],
            "scratch_bytes": memory.scratch_bytes[v], "conversion_bytes": memory.conversion_bytes[v],
            "live_tensors": [problem.buffers[b].name for b in live_buffers],
        })
    peak_step = live.peak_step
    at_peak = []
    if live.order:
        v = live.order[peak_step]
        for b in sorted(live.live_at(peak_step), key=lambda b: (-problem.buffers[b].size_bytes, b)):
            buf = problem.buffers[b]
            at_peak.append({"tensor": buf.name, "bytes": buf.size_bytes, "dtype": buf.dtype,
                            "producer": "graph input" if buf.producer is None else nodes[buf.producer].name,
                            "aliases": [m for m in buf.members if m != buf.name]})
        if memory.scratch_bytes[v]:
            at_peak.append({"tensor": f"scratch of {nodes[v].name} (estimate)", "bytes": memory.scratch_bytes[v],
                            "dtype": "scratch", "producer": nodes[v].name, "aliases": []})
        if memory.conversion_bytes[v]:
            at_peak.append({"tensor": f"float copies for {nodes[v].name}", "bytes": memory.conversion_bytes[v],
                            "dtype": "float32", "producer": nodes[v].name, "aliases": []})
    elif problem.buffers:
        at_peak = [{"tensor": b.name, "bytes": b.size_bytes, "dtype": b.dtype, "producer": "graph input",
                    "aliases": []} for b in problem.buffers]
    limit = options.sram_limit_bytes
    return {
        "peak_bytes": live.peak_bytes,
        "peak_step": peak_step,
        "peak_node": nodes[live.order[peak_step]].name if live.order else None,
        "live_at_peak": at_peak,
        "required_bytes": required_bytes,
        "limit_bytes": limit,
        "fits": None if limit is None else required_bytes <= limit,
        "headroom_bytes": None if limit is None else limit - required_bytes,
        "order_used": "best" if live.order != problem.default_order else "default",
        "conventions": {"views": options.views, "inplace": options.inplace, "scratch": options.scratch,
                        "alignment": options.alignment},
        "timeline": timeline,
    }


def _arena(memory: MemoryModel, live: schedule.Liveness, alignment: int) -> dict:
    items = []
    for b, buf in enumerate(memory.problem.buffers):
        if buf.size_bytes:
            items.append((buf.name, buf.size_bytes, live.first_step[b], live.last_step[b]))
    # Step-local scratch and float copies get a slot of their own for exactly their step.
    for s, v in enumerate(live.order):
        extra = memory.problem.extra_bytes[v]
        if extra:
            items.append((f"step {s} scratch ({memory.nodes[v].name})", extra, s, s))
    placements, arena_bytes = schedule.plan_arena(items, alignment)
    return {
        "bytes": arena_bytes,
        "ratio_to_peak": _ratio(arena_bytes, live.peak_bytes),
        "alignment": alignment,
        "method": "greedy by size (Pisarchyk & Lee 2020), best of best-fit and first-fit",
        "plan": [{"tensor": p.name, "offset": p.offset, "size": p.size_bytes,
                  "first_step": p.first_step, "last_step": p.last_step} for p in placements],
    }


def sram_for(memory: MemoryModel, options: BudgetOptions):
    """Order search + liveness + arena for one memory model: (OrderResult, Liveness, arena dict)."""
    problem = memory.problem
    if options.order_search:
        best = schedule.search_order(problem, options.order_time_limit_s)
    else:
        default_peak = schedule.peak_of(problem, problem.default_order)
        best = schedule.OrderResult(problem.default_order, default_peak, default_peak, "default order", False)
    live = schedule.liveness(problem, best.order)
    return best, live, _arena(memory, live, options.alignment)


# ---- MACs -----------------------------------------------------------------------------------------

def _macs(loaded: LoadedModel, options: BudgetOptions, shapes: dict | None = None) -> dict:
    shapes = loaded.shapes if shapes is None else shapes
    rows = []
    total_macs = total_elt = 0
    for node in loaded.graph.node:
        macs, elt = ops.cost(node, shapes.get)
        total_macs += macs
        total_elt += elt
        if macs or elt:
            rows.append({"name": node.name, "op_type": node.op_type, "macs": int(macs), "elementwise_ops": int(elt)})
    out = {"total": int(total_macs), "elementwise_ops": int(total_elt), "layers": rows}
    estimates = []
    if options.cycles_per_mac is not None and options.clock_mhz is not None:
        out["latency_ms"] = round(total_macs * options.cycles_per_mac / (options.clock_mhz * 1e6) * 1e3, 3)
        out["cycles_per_mac"] = options.cycles_per_mac
        out["clock_mhz"] = options.clock_mhz
        estimates.append("latency_ms")
    if options.energy_per_mac_pj is not None:
        out["energy_mj"] = round(total_macs * options.energy_per_mac_pj * 1e-9, 6)  # pJ -> mJ
        out["energy_per_mac_pj"] = options.energy_per_mac_pj
        estimates.append("energy_mj")
    if estimates:
        out["estimates"] = estimates
    return out


# ---- entry point ----------------------------------------------------------------------------------

def analyze(loaded: LoadedModel, plan: Plan, options: BudgetOptions | None = None) -> BudgetResult:
    """Flash map, SRAM timeline (best order), arena plan, order search, MACs and, when something does
    not fit (or `options.what_if`), what would make it fit."""
    options = options or BudgetOptions()
    options.validate()
    macs = _macs(loaded, options)
    model = {"params": count_params(loaded, plan), "macs": macs["total"]}
    flash = _flash(loaded, plan, options)
    memory = build_memory_model(loaded, plan, options)
    best, live, arena = sram_for(memory, options)
    sram = _sram(memory, live, options, arena["bytes"])
    order = {
        "default_peak_bytes": best.default_peak_bytes,
        "best_peak_bytes": best.peak_bytes,
        "saved_bytes": best.default_peak_bytes - best.peak_bytes,
        "method": best.method,
        "changed": best.changed,
        "time_limit_s": options.order_time_limit_s,
        "order": [memory.nodes[v].name for v in best.order],
    }
    result = BudgetResult(model=model, flash=flash, sram=sram, arena=arena, order=order, macs=macs,
                          memory=memory)
    wanted = options.what_if
    if wanted is None:
        wanted = flash["fits"] is False or sram["fits"] is False
    if wanted:
        from qfit.memory import whatif
        result.what_if = whatif.what_if(loaded, plan, options, result)
    return result


# ---- renderers ------------------------------------------------------------------------------------

def _verdict(fits: bool | None) -> str:
    return {True: "fits", False: "DOES NOT FIT", None: "no limit given"}[fits]


def _limit_text(limit) -> str:
    return "-" if limit is None else format_size(limit)


def _top_flash_rows(flash: dict, n: int = 12) -> list[dict]:
    return sorted(flash["layers"], key=lambda r: (-r["total_bytes"], r["name"]))[:n]


def _sections(result: BudgetResult) -> list[tuple[str, list[str], list[list], list[str]]]:
    """(heading, table headers, table rows, lines of prose) per section, shared by both renderers."""
    f, s, a, o, m = result.flash, result.sram, result.arena, result.order, result.macs
    out = []
    lines = [f"{result.model['params']:,} parameters, {m['total']:,} MACs, "
             f"{m['elementwise_ops']:,} element operations"]
    if "latency_ms" in m:
        lines.append(f"latency estimate {m['latency_ms']} ms ({m['cycles_per_mac']} cycles/MAC at {m['clock_mhz']} MHz)")
    if "energy_mj" in m:
        lines.append(f"energy estimate {m['energy_mj']} mJ ({m['energy_per_mac_pj']} pJ/MAC)")
    out.append(("Model", [], [], lines))
    rows = [[r["name"], r["op_type"], r["precision"], format_size(r["weight_bytes"]), format_size(r["bias_bytes"]),
             format_size(r["scale_bytes"]), format_size(r["float_bytes"] + r["other_bytes"]),
             format_size(r["total_bytes"])] for r in _top_flash_rows(f)]
    lines = [f"weights and constants {format_size(f['int8_bytes'])} (float32: {format_size(f['float_bytes'])}, "
             f"{f['shrink_ratio']}x smaller)",
             f"activation scales and zero points {format_size(f['activation_param_bytes'])}",
             f"per-layer metadata {format_size(f['meta_bytes'])} (estimate), reserve {format_size(f['reserve_bytes'])} "
             f"(estimate, given)",
             f"total {format_size(f['total_bytes'])} of {_limit_text(f['limit_bytes'])}: {_verdict(f['fits'])}"]
    if len(f["layers"]) > len(rows):
        lines.append(f"largest {len(rows)} of {len(f['layers'])} layers shown")
    out.append(("Flash", ["layer", "op", "precision", "weights", "bias", "scales", "float/other", "total"], rows, lines))
    rows = [[t["tensor"], t["dtype"], format_size(t["bytes"]), t["producer"]] for t in s["live_at_peak"]]
    lines = [f"peak {format_size(s['peak_bytes'])} at step {s['peak_step']} ({s['peak_node']}), "
             f"{s['order_used']} order",
             f"arena {format_size(a['bytes'])} ({a['ratio_to_peak']}x the peak, {a['alignment']}-byte alignment) "
             f"of {_limit_text(s['limit_bytes'])}: {_verdict(s['fits'])}",
             "conventions: " + ", ".join(f"{k} {'on' if v else 'off'}" for k, v in s["conventions"].items()
                                         if k != "alignment")]
    out.append(("SRAM: tensors live at the peak", ["tensor", "stored as", "bytes", "produced by"], rows, lines))
    lines = [f"default order peak {format_size(o['default_peak_bytes'])}, best order peak "
             f"{format_size(o['best_peak_bytes'])} ({o['method']}"
             f"{', order changed' if o['changed'] else ', default order kept'})"]
    out.append(("Execution order", [], [], lines))
    top = sorted(m["layers"], key=lambda r: (-r["macs"], -r["elementwise_ops"], r["name"]))[:8]
    rows = [[r["name"], r["op_type"], f"{r['macs']:,}", f"{r['elementwise_ops']:,}"] for r in top]
    out.append(("MACs (largest layers)", ["layer", "op", "MACs", "element ops"], rows, []))
    if result.what_if:
        from qfit.memory import whatif
        out.extend(whatif.sections(result.what_if))
    return out


def render_text(result: BudgetResult) -> str:
    parts = []
    for heading, headers, rows, lines in _sections(result):
        parts.append(heading)
        parts.append("-" * len(heading))
        parts.extend(lines)
        if rows:
            parts.append(tabulate(rows, headers=headers, tablefmt="simple", disable_numparse=True))
        parts.append("")
    return "\n".join(parts).rstrip() + "\n"


def render_markdown(result: BudgetResult) -> str:
    parts = []
    for heading, headers, rows, lines in _sections(result):
        parts.append(f"### {heading}\n")
        parts.extend(f"- {line}" for line in lines)
        if rows:
            parts.append("")
            parts.append(tabulate(rows, headers=headers, tablefmt="github", disable_numparse=True))
        parts.append("")
    return "\n".join(parts).rstrip() + "\n"
