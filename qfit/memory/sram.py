"""sram: the activation memory of a graph + precision plan: stored tensor sizes, buffers with their
aliases (views, in-place ops, fused clamps), step-local scratch and float copies, the peak over the
best execution order, and the arena plan (docs/memory.md)."""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from onnx import TensorProto, helper

from qfit import ops
from qfit.graph.model import LoadedModel
from qfit.memory import schedule
from qfit.memory.flash import FLOAT_BYTES, ratio
from qfit.memory.options import BudgetOptions
from qfit.quant.plan import Plan
from qfit.sizes import element_count


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
    n = element_count(shapes.get(tensor))
    if bits:
        return n * (bits // 8), f"int{bits}"
    elem = loaded.elem_types.get(tensor, TensorProto.FLOAT)
    return n * _itemsize(elem), _dtype_name(elem)


@dataclass
class MemoryModel:
    """The scheduling problem built from a graph and a plan, plus the names the report needs."""

    problem: schedule.MemoryProblem
    nodes: list                     # NodeProto, in the graph's order (node index = position)
    scratch_bytes: list[int]
    conversion_bytes: list[int]
    buffer_of: dict[str, int]       # tensor -> buffer index


def _scratch_bytes(node, plan: Plan, shapes: dict) -> int:
    """Scratch of a layer's kernel (an estimate, from the registry): its elements are widened to 16
    bits for an int8 layer, 4 B floats for a float one."""
    rule = ops.of(node).scratch_bytes
    if rule is None:
        return 0
    return rule(node, shapes.get, FLOAT_BYTES if node.name in plan.float_nodes else 2)


class _Groups:
    """Union-find over tensor names: each group is one buffer; `members` lists a root's tensors."""

    def __init__(self, tensors: list[str]):
        self.parent = {t: t for t in tensors}
        self.members: dict[str, list[str]] = {t: [t] for t in tensors}

    def find(self, t: str) -> str:
        parent = self.parent
        while parent[t] != t:
            parent[t] = parent[parent[t]]
            t = parent[t]
        return t

    def union(self, keep: str, other: str) -> None:
        a, b = self.find(keep), self.find(other)
        if a != b:
            self.parent[b] = a
            self.members[a].extend(self.members.pop(b))


def build_memory_model(loaded: LoadedModel, plan: Plan, options: BudgetOptions,
                       shapes: dict | None = None) -> MemoryModel:
    """Buffers (with aliases resolved), dependencies and step-local bytes, in the graph's node order.
    `shapes` overrides loaded.shapes (the resolution what-if re-sizes the same graph)."""
    shapes = loaded.shapes if shapes is None else shapes
    index = loaded.index
    nodes = list(index.nodes)
    constants = loaded.constants
    producer = index.producer_position
    graph_inputs = [n for n in loaded.input_names if n not in constants]
    tensors = list(graph_inputs) + [o for node in nodes for o in node.output if o]
    size = {t: stored_tensor(loaded, plan, shapes, t) for t in tensors}
    groups = _alias_groups(loaded, plan, options, tensors, size)

    buffers: list[schedule.Buffer] = []
    buffer_of: dict[str, int] = {}
    input_set, outputs = set(graph_inputs), set(loaded.output_names)
    position = {t: k for k, t in enumerate(tensors)}
    members = groups.members
    for root in sorted(members, key=lambda r: min(position[m] for m in members[r])):
        group = sorted(members[root], key=lambda m: position[m])
        stored = [m for m in group if size[m][0] > 0] or group
        name = stored[0]
        first = group[0]
        readers = frozenset(r for m in group for r in index.reader_positions(m))
        buffers.append(schedule.Buffer(
            name=name, size_bytes=max(size[m][0] for m in group),
            producer=None if first in input_set else producer(first), readers=readers,
            is_output=any(m in outputs for m in group), members=tuple(group), dtype=size[name][1]))
        for m in group:
            buffer_of[m] = len(buffers) - 1

    preds = []
    for i, node in enumerate(nodes):
        preds.append(frozenset(producer(n) for n in node.input if producer(n) not in (None, i)))
    scratch = [(_scratch_bytes(node, plan, shapes) if options.scratch else 0) for node in nodes]
    conversion = [_conversion_bytes(node, plan, shapes, constants) for node in nodes]
    problem = schedule.MemoryProblem(
        node_names=[n.name for n in nodes], preds=preds, buffers=buffers,
        extra_bytes=[s + c for s, c in zip(scratch, conversion)])
    return MemoryModel(problem, nodes, scratch, conversion, buffer_of)


def _alias_groups(loaded: LoadedModel, plan: Plan, options: BudgetOptions, tensors: list[str],
                  size: dict) -> _Groups:
    """Tensors that share one buffer: a fused tensor with its clamp's output, a view with its input
    (same bytes and type), an in-place op's output with the one input nobody else reads afterwards."""
    index = loaded.index
    producer = index.producer_position
    input_set = {n for n in loaded.input_names if n not in loaded.constants}
    outputs = set(loaded.output_names)
    groups = _Groups(tensors)
    parent, members, find = groups.parent, groups.members, groups.find

    def materialised(t: str) -> int:
        return size[plan.fused[t]][0] if t in plan.fused and plan.fused[t] in size else size[t][0]

    for i, node in enumerate(index.nodes):
        entry = ops.of(node)
        for out in node.output:
            # A fused tensor (Conv -> ReLU folded into requantization) is never stored: the producer
            # writes the clamped result straight into the ReLU's output buffer.
            if out in plan.fused and plan.fused[out] in parent:
                groups.union(out, plan.fused[out])
        if not node.output or not node.output[0]:
            continue
        out = node.output[0]
        if options.views and entry.alias == "view" and node.input and node.input[0] in parent:
            src = node.input[0]
            if materialised(src) == materialised(out) and size[src][1] == size[out][1]:
                groups.union(src, out)
        elif options.inplace and entry.alias == "inplace":
            for src in node.input:
                if not src or src not in parent or find(src) == find(out):
                    continue
                root = find(src)
                if any(m in input_set for m in members[root]) or any(m in outputs for m in members[root]):
                    continue  # the application owns graph inputs; outputs must survive
                readers = {r for m in members[root] for r in index.reader_positions(m)}
                member_producers = {producer(m) for m in members[root] if producer(m) is not None}
                if readers - member_producers != {i}:
                    continue
                if materialised(src) != materialised(out) or size[src][1] != _stored_dtype(size, plan, out):
                    continue
                groups.union(src, out)
                break
    return groups


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
            total += element_count(shapes.get(name)) * FLOAT_BYTES
    return total


def sram_section(memory: MemoryModel, live: schedule.Liveness, options: BudgetOptions, required_bytes: int) -> dict:
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
        # a peak of 0 or less can only come from a broken count: never let it read as "fits"
        "fits": None if limit is None else 0 < required_bytes <= limit,
        "headroom_bytes": None if limit is None else limit - required_bytes,
        "order_used": "best" if live.order != problem.default_order else "default",
        "conventions": {"views": options.views, "inplace": options.inplace, "scratch": options.scratch,
                        "alignment": options.alignment},
        "timeline": timeline,
    }


def arena_section(memory: MemoryModel, live: schedule.Liveness, alignment: int) -> dict:
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
        "ratio_to_peak": ratio(arena_bytes, live.peak_bytes),
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
    return best, live, arena_section(memory, live, options.alignment)
