"""whatif: what would make a model fit — a smaller input, tiled first layers, another order, or flash
changes per layer.

  resolution  the largest input size (same aspect ratio, a multiple of 8 or 16) whose arena fits,
              found by re-running ONNX shape inference on a copy of the graph at each size;
  tiling      patch-based execution of the leading high-resolution layers (patch-based inference,
              Lin et al., NeurIPS 2021): for n x n tiles and each place the leading layers could
              stop, the peak SRAM and the extra MACs that the overlapping halos cost, from
              receptive fields traced back through the kernels, strides, paddings and dilations of
              the tiled layers;
  order       the bytes the best execution order saves over the default one;
  flash       when flash does not fit: the excess, the layers whose weights dominate it and what each
              would free with 4-bit weights or at half width (estimates), and which layers at 4 bits
              would remove the excess; for every large layer, what changing its precision saves/costs.

Resolution and tiling are SRAM advice: computed when SRAM does not fit, or when asked for (then
`sram_fits_already` says the advice is not needed).

The halo formula and the memory model of a tiled stage are in docs/memory.md.
"""
from __future__ import annotations

import onnx
from onnx import TensorProto, helper, shape_inference

from qfit import ops
from qfit.graph.model import LoadedModel
from qfit.memory import schedule
from qfit.memory.cost import macs_section
from qfit.memory.options import BudgetOptions
from qfit.memory.sram import MemoryModel, build_memory_model, sram_for
from qfit.quant.plan import Plan
from qfit.sizes import element_count

RESOLUTION_STEPS = (8, 16)
MAX_RESOLUTION_TRIES = 48
TILE_COUNTS = (2, 3, 4)
MAX_SPLIT_CANDIDATES = 16
WHAT_IF_ORDER_TIME_LIMIT_S = 0.25   # order search per re-sized graph: a what-if, not the verdict


def what_if(loaded: LoadedModel, plan: Plan, options: BudgetOptions, memory: MemoryModel, order: dict,
            flash: dict, total_macs: int, sram_fits: bool | None = None) -> dict:
    """All what-if sections for one analysed model (`memory`, `order`, `flash`: its budget figures).
    SRAM advice (resolution, tiling) only when SRAM does not fit or `options.what_if` asks for it."""
    out = {"sram_limit_bytes": options.sram_limit_bytes, "flash_limit_bytes": options.flash_limit_bytes,
           "sram_fits_already": sram_fits is True, "flash_fits_already": flash["fits"] is True}
    limit = options.sram_limit_bytes
    out["order"] = {"default_peak_bytes": order["default_peak_bytes"],
                    "best_peak_bytes": order["best_peak_bytes"],
                    "saves_bytes": order["default_peak_bytes"] - order["best_peak_bytes"]}
    sram_advice = sram_fits is not True or options.what_if is True
    out["resolution"] = resolution_what_if(loaded, plan, options) if limit is not None and sram_advice else None
    out["tiling"] = tiling_what_if(loaded, plan, options, memory, total_macs) if sram_advice else None
    out["flash"] = flash_what_if(flash, loaded)
    return out


# ---- (a) input resolution -----------------------------------------------------------------------

def _image_input(loaded: LoadedModel):
    inputs = [n for n in loaded.input_names if n not in loaded.constants]
    if len(inputs) != 1:
        return None, "needs exactly one input"
    shape = loaded.shapes.get(inputs[0])
    if shape is None or len(shape) != 4:
        return None, "the input is not an image (rank 4)"
    # ONNX convolutions are NCHW; an NHWC input has few channels last.
    axes = (1, 2) if shape[3] <= 4 < shape[1] else (2, 3)
    return (inputs[0], shape, axes), ""


def _light_model(loaded: LoadedModel) -> onnx.ModelProto:
    """A copy of the graph for shape inference only: big float initializers become typed graph
    inputs (shape inference needs their shapes, not their values), small ones stay (Resize scales
    and Reshape shapes are read by shape inference)."""
    model = onnx.ModelProto()
    model.ir_version = loaded.model.ir_version
    model.opset_import.extend(loaded.model.opset_import)
    graph = model.graph
    graph.name = loaded.graph.name
    graph.node.extend(loaded.graph.node)
    graph.input.extend(loaded.graph.input)
    graph.output.extend(loaded.graph.output)
    for init in loaded.graph.initializer:
        if init.data_type in (TensorProto.FLOAT, TensorProto.FLOAT16) and element_count(init.dims) >= 64:
            graph.input.append(helper.make_tensor_value_info(init.name, init.data_type, list(init.dims)))
        else:
            graph.initializer.append(init)
    for out in graph.output:
        out.type.tensor_type.ClearField("shape")
    return model


def shapes_at(light: onnx.ModelProto, loaded: LoadedModel, input_name: str, new_shape) -> dict | None:
    """Static shapes of every tensor when `input_name` has `new_shape`, or None if inference fails."""
    model = onnx.ModelProto()
    model.CopyFrom(light)
    for inp in model.graph.input:
        if inp.name == input_name:
            tt = inp.type.tensor_type
            tt.ClearField("shape")
            tt.shape.dim.extend([onnx.TensorShapeProto.Dimension(dim_value=int(v)) for v in new_shape])
    try:
        inferred = shape_inference.infer_shapes(model, strict_mode=True, data_prop=True)
    except Exception:
        return None
    shapes = {name: shape for name, shape in loaded.shapes.items() if name in loaded.constants}
    for vi in list(inferred.graph.value_info) + list(inferred.graph.input) + list(inferred.graph.output):
        tt = vi.type.tensor_type
        if tt.HasField("shape") and all(d.HasField("dim_value") and d.dim_value > 0 for d in tt.shape.dim):
            shapes[vi.name] = tuple(int(d.dim_value) for d in tt.shape.dim)
    needed = [o for node in loaded.graph.node for o in node.output if o]
    if any(o not in shapes for o in needed) or not _consistent(loaded, shapes):
        return None
    return shapes


def _consistent(loaded: LoadedModel, shapes: dict) -> bool:
    """Shape inference accepts some graphs that cannot run at another size (a Reshape to a fixed
    element count, a Gemm whose K no longer matches): the registry's shape rules reject those."""
    for node in loaded.graph.node:
        rule = ops.of(node).shapes_consistent
        if rule is None:
            continue
        get = [shapes.get(n) if n else None for n in node.input]
        out = shapes.get(node.output[0]) if node.output else None
        if not rule(node, get, out):
            return False
    return True


def resolution_what_if(loaded: LoadedModel, plan: Plan, options: BudgetOptions) -> dict:
    """The largest input size (same aspect ratio) whose arena fits the SRAM limit, per size step."""
    found, why = _image_input(loaded)
    if found is None:
        return {"skipped": why}
    name, shape, (h_axis, w_axis) = found
    h0, w0 = shape[h_axis], shape[w_axis]
    light = _light_model(loaded)
    limit = options.sram_limit_bytes
    quick = BudgetOptions(**{**options.__dict__, "what_if": False,
                             "order_time_limit_s": min(options.order_time_limit_s, WHAT_IF_ORDER_TIME_LIMIT_S)})
    tried: dict[tuple[int, int], dict] = {}

    def width_at(h: int, step: int) -> int:
        return max(step, int(round(h * w0 / h0 / step)) * step)

    def evaluate(h: int, step: int) -> dict:
        w = width_at(h, step)
        if (h, w) in tried:
            return tried[(h, w)]
        new_shape = list(shape)
        new_shape[h_axis], new_shape[w_axis] = h, w
        shapes = shapes_at(light, loaded, name, new_shape)
        if shapes is None:
            row = {"height": h, "width": w, "arena_bytes": None, "peak_bytes": None,
                   "fits": None, "note": "shape inference fails or gives inconsistent shapes at this size"}
        else:
            memory = build_memory_model(loaded, plan, quick, shapes)
            best, live, arena = sram_for(memory, quick)
            macs = macs_section(loaded, quick, shapes)["total"]
            row = {"height": h, "width": w, "arena_bytes": arena["bytes"], "peak_bytes": best.peak_bytes,
                   "macs": macs, "fits": arena["bytes"] <= limit}
        tried[(h, w)] = row
        return row

    current = evaluate(h0, 1)
    answers = _search_heights(evaluate, lambda h, step: (h, width_at(h, step)) not in tried, h0, current["fits"])
    return {
        "input": name,
        "current": {"height": h0, "width": w0, "arena_bytes": current["arena_bytes"], "fits": current["fits"]},
        "criterion": "arena bytes <= SRAM limit, same aspect ratio, both sides multiples of the step",
        "searched": "larger sizes" if current["fits"] else "smaller sizes",
        "largest_fitting": {f"step_{s}": answers.get(s) for s in sorted(RESOLUTION_STEPS)},
        "tried": [tried[k] for k in sorted(tried, reverse=True)],
    }


def _search_heights(evaluate, is_new, h0: int, current_fits: bool | None) -> dict[int, dict | None]:
    """Per step of RESOLUTION_STEPS, the first height (a multiple of the step) whose row fits: the
    largest smaller one when the current size does not fit, else the largest larger one (None when
    nothing larger fits). At most MAX_RESOLUTION_TRIES sizes are evaluated."""
    answers = {}
    step_small = min(RESOLUTION_STEPS)
    if current_fits:
        heights = list(range((2 * h0) // step_small * step_small, h0, -step_small))   # larger sizes that may fit
    else:
        heights = list(range((h0 - 1) // step_small * step_small, 0, -step_small))
    budget_left = MAX_RESOLUTION_TRIES
    for step in sorted(RESOLUTION_STEPS):
        for h in heights:
            if h % step:
                continue
            if budget_left <= 0:
                break
            if is_new(h, step):
                budget_left -= 1
            row = evaluate(h, step)
            if row["fits"]:
                answers[step] = row
                break
        if step not in answers and current_fits:
            answers[step] = None   # nothing larger fits: the current size is the answer
    return answers


# ---- (b) tiled leading layers -------------------------------------------------------------------

def _input_interval(lo: int, hi: int, k: int, s: int, dil: int, pad: int, size: int) -> tuple[int, int]:
    """Input rows [lo', hi'] an output interval [lo, hi] reads: lo*s - pad .. hi*s - pad + (k-1)*dil,
    clipped to the tensor (padding rows are not stored)."""
    return max(0, lo * s - pad), min(size - 1, hi * s - pad + (k - 1) * dil)


def _tileable(node, shapes: dict, constants: dict) -> bool:
    """The registry says the node can run on a tile of rows and columns (a window op, a pointwise
    op, a channel concat)."""
    rule = ops.of(node).tileable
    return rule is not None and rule(node, shapes.get, constants.__contains__)


def _split_candidates(loaded: LoadedModel, plan: Plan, memory: MemoryModel) -> list[tuple[int, str]]:
    """(position p, tensor): after node p of the default order exactly one tensor is still needed,
    and every node up to p can be tiled."""
    nodes = memory.nodes
    shapes, constants = loaded.shapes, loaded.constants
    outputs = set(loaded.output_names)
    last_reader: dict[str, int] = {}
    for i, node in enumerate(nodes):
        for name in node.input:
            if name and name not in constants:
                last_reader[name] = i
    produced_at = {n: -1 for n in loaded.input_names if n not in constants}
    candidates = []
    input_area = max((shapes[n][2] * shapes[n][3] for n in produced_at if len(shapes.get(n, ())) == 4), default=0)
    for p, node in enumerate(nodes):
        if not _tileable(node, shapes, constants):
            break
        for out in node.output:
            produced_at[out] = p
        crossing = [t for t, at in produced_at.items() if at <= p and (last_reader.get(t, -1) > p or t in outputs)]
        if len(crossing) != 1 or crossing[0] in outputs or produced_at[crossing[0]] < 0:
            continue
        if crossing[0] in plan.fused:
            continue   # not stored: the split is after the ReLU it is folded into
        t = crossing[0]
        shape = shapes[t]
        if input_area and shape[2] * shape[3] * 64 < input_area:
            break   # past the high-resolution layers: tiles would be mostly halo
        candidates.append((p, t))
        if len(candidates) >= MAX_SPLIT_CANDIDATES:
            break
    return candidates


def _tile_bounds(size: int, n: int) -> list[tuple[int, int]]:
    return [(size * i // n, size * (i + 1) // n - 1) for i in range(n)]


def _regions(nodes, p: int, split: str, tile, shapes, constants) -> dict[str, tuple]:
    """Rows and columns of every tensor of the stage that one tile needs, traced back from the
    split tensor's tile through the stage's nodes in reverse."""
    regions = {split: tile}
    for node in reversed(nodes[:p + 1]):
        outs = [regions[o] for o in node.output if o in regions]
        if not outs:
            continue
        (r0, r1), (c0, c1) = outs[0]
        acts = [n for n in node.input if n and n not in constants]
        entry = ops.of(node)
        windows = entry.window(node, shapes.get) if entry.window is not None else None
        if windows is not None:
            (kh, sh, dh, ph), (kw, sw, dw, pw) = windows
            h, w = shapes[acts[0]][2], shapes[acts[0]][3]
            needed = [(_input_interval(r0, r1, kh, sh, dh, ph, h), _input_interval(c0, c1, kw, sw, dw, pw, w))]
        else:
            needed = [((r0, r1), (c0, c1))]
        for name in acts:
            (a0, a1), (b0, b1) = needed[0]
            if name in regions:
                (x0, x1), (y0, y1) = regions[name]
                regions[name] = ((min(a0, x0), max(a1, x1)), (min(b0, y0), max(b1, y1)))
            else:
                regions[name] = ((a0, a1), (b0, b1))
    return regions


def _area(region) -> int:
    (r0, r1), (c0, c1) = region
    return max(0, r1 - r0 + 1) * max(0, c1 - c0 + 1)


def tiling_what_if(loaded: LoadedModel, plan: Plan, options: BudgetOptions, memory: MemoryModel,
                   total_macs: int) -> dict:
    nodes = memory.nodes
    shapes, constants = loaded.shapes, loaded.constants
    candidates = _split_candidates(loaded, plan, memory)
    if not candidates:
        return {"skipped": "the first layers cannot be tiled (no spatial Conv/pool stage with a single "
                           "tensor leaving it)", "options": []}
    problem = memory.problem
    default_live = schedule.liveness(problem, problem.default_order)
    node_macs = [sum(ops.cost(node, shapes.get)) for node in nodes]
    limit = options.sram_limit_bytes
    rows = []
    for p, split in candidates:
        split_shape = shapes[split]
        rest_peak = max(default_live.step_bytes[p + 1:], default=0)
        stage_nodes = set(range(p + 1))
        for n in TILE_COUNTS:
            if split_shape[2] < n or split_shape[3] < n:
                continue
            tile_macs = 0
            stage_peak = 0
            for rows_range in _tile_bounds(split_shape[2], n):
                for cols_range in _tile_bounds(split_shape[3], n):
                    regions = _regions(nodes, p, split, (rows_range, cols_range), shapes, constants)
                    for i in stage_nodes:
                        out = nodes[i].output[0]
                        full = shapes[out][2] * shapes[out][3]
                        if out in regions and full:
                            tile_macs += node_macs[i] // full * _area(regions[out])
                    stage_peak = max(stage_peak, _stage_peak(memory, p, split, regions, shapes))
            stage_macs = sum(node_macs[i] for i in stage_nodes)
            extra = tile_macs - stage_macs
            peak = max(stage_peak, rest_peak)
            rows.append({
                "tiles": f"{n}x{n}", "n": n, "split_after": nodes[p].name, "split_tensor": split,
                "split_shape": list(split_shape), "layers_tiled": p + 1,
                "peak_bytes": peak, "stage_peak_bytes": stage_peak, "rest_peak_bytes": rest_peak,
                "fits": None if limit is None else peak <= limit,
                "extra_macs": extra, "extra_macs_pct": round(100.0 * extra / total_macs, 2) if total_macs else 0.0,
            })
    fitting = sorted((r for r in rows if r["fits"]), key=lambda r: (r["extra_macs"], r["peak_bytes"]))
    return {"method": "patch-based inference of the leading layers (Lin et al., NeurIPS 2021)",
            "best": fitting[0] if fitting else None,
            "options": rows}


def _stage_peak(memory: MemoryModel, p: int, split: str, regions: dict, shapes: dict) -> int:
    """Peak of the tiled stage (nodes 0..p in the default order) for one tile: the graph input and
    the split tensor stay whole in SRAM for the whole stage, every other buffer is cut to the tile's
    region (rows x columns it needs, all channels)."""
    problem = memory.problem
    split_buffer = memory.buffer_of[split]
    buffers, index = [], {}
    for b, buf in enumerate(problem.buffers):
        if buf.producer is not None and buf.producer > p:
            continue
        readers = frozenset(r for r in buf.readers if r <= p)
        if buf.producer is None or b == split_buffer:
            size = buf.size_bytes
        else:
            size = 0
            for m in buf.members:
                shape = shapes.get(m)
                if m in regions and shape and len(shape) == 4 and shape[2] * shape[3]:
                    size = max(size, buf.size_bytes * _area(regions[m]) // (shape[2] * shape[3]))
                elif m not in regions:
                    size = max(size, buf.size_bytes if readers else 0)
        index[b] = len(buffers)
        # The split tensor collects every tile's part: it is held from the first tile's first step.
        producer = None if b == split_buffer else buf.producer
        buffers.append(schedule.Buffer(buf.name, size, producer, readers, is_output=(b == split_buffer),
                                       members=buf.members, dtype=buf.dtype))
    sub = schedule.MemoryProblem(problem.node_names[:p + 1], problem.preds[:p + 1], buffers,
                                 problem.extra_bytes[:p + 1])
    return schedule.liveness(sub).peak_bytes


# ---- (c) flash ----------------------------------------------------------------------------------

FLASH_ESTIMATE_NOTE = ("estimates: 4-bit weights lose accuracy (measure the result); a narrower layer changes "
                       "the model and needs retraining, and a residual partner must narrow with it (not counted)")


def flash_what_if(flash: dict, loaded: LoadedModel | None = None, top: int = 8) -> dict:
    """The largest layers in flash and what changing each would free or cost; when flash does not fit,
    the excess and the fewest of them whose weights at 4 bits would remove it."""
    rows = []
    weights_total = flash["int8_bytes"] or 1
    by_name = {layer["name"]: layer for layer in flash["layers"]}
    readers = _weighted_readers(loaded, by_name) if loaded is not None else {}
    for layer in sorted(flash["layers"], key=lambda r: (-r["total_bytes"], r["name"]))[:top]:
        row = {"name": layer["name"], "op_type": layer["op_type"], "precision": layer["precision"],
               "total_bytes": layer["total_bytes"], "share_pct": round(100.0 * layer["total_bytes"] / weights_total, 1)}
        if layer["precision"] == "float":
            # its float constants at 1 B instead of 4 B (per-channel scales, a few bytes, not counted)
            row["if_int8_saves_bytes"] = layer["float_bytes"] - layer["float_bytes"] // 4
        elif layer["precision"].startswith("int16"):
            row["if_int8_saves_bytes"] = layer["weight_bytes"] // 2
        else:
            row["if_float_costs_bytes"] = max(0, layer["float32_bytes"] - layer["total_bytes"])
        row["if_4bit_frees_bytes"] = _four_bit_frees(layer)
        # Half the output channels: this layer's bytes halve, and so do those of the layers reading its
        # output (their input channels halve).
        row["if_half_width_frees_bytes"] = (layer["total_bytes"] - layer["other_bytes"]) // 2 + sum(
            (by_name[r]["total_bytes"] - by_name[r]["other_bytes"]) // 2 for r in readers.get(layer["name"], ()))
        rows.append(row)
    over = None
    if flash["limit_bytes"] is not None:
        over = max(0, flash["total_bytes"] - flash["limit_bytes"])
    out = {"over_limit_bytes": over, "largest_layers": rows, "estimates": ["if_4bit_frees_bytes",
                                                                           "if_half_width_frees_bytes"],
           "estimate_note": FLASH_ESTIMATE_NOTE, "fit_at_4bit": None}
    if over:
        out["excess_bytes"] = over
        out["fit_at_4bit"] = _fewest_at_4bit(flash["layers"], over)
    return out


def _four_bit_frees(layer: dict) -> int:
    """Bytes freed when this layer's weights are stored at 4 bits (packed two per byte); scales,
    biases and zero points stay."""
    if layer["precision"] == "float":
        return layer["float_bytes"] - layer["float_bytes"] // 8
    if layer["precision"].startswith("int16"):
        return layer["weight_bytes"] - layer["weight_bytes"] // 4
    if layer["precision"].startswith("int4"):
        return 0
    return layer["weight_bytes"] - (layer["weight_bytes"] + 1) // 2


def _fewest_at_4bit(layers: list[dict], excess_bytes: int) -> dict:
    """Greedy by bytes freed: the fewest layers whose weights at 4 bits free `excess_bytes`."""
    chosen, freed = [], 0
    for layer in sorted(layers, key=lambda r: (-_four_bit_frees(r), r["name"])):
        if freed >= excess_bytes or _four_bit_frees(layer) <= 0:
            break
        chosen.append(layer["name"])
        freed += _four_bit_frees(layer)
    return {"layers": chosen, "frees_bytes": freed, "enough": freed >= excess_bytes}


def _weighted_readers(loaded: LoadedModel, rows: dict[str, dict]) -> dict[str, list[str]]:
    """Layer -> the layers with flash rows that read its output, through ops without weights of their
    own that keep the channel count (activations, pooling, views)."""
    producers = {out: node for node in loaded.graph.node for out in node.output if out}
    # layers whose weights scale with the channel count (a Clip's bounds are constants too, but fixed)
    weighted = {node.name for node in loaded.graph.node if node.name in rows and ops.of(node).weights}
    readers: dict[str, list[str]] = {}
    for node in loaded.graph.node:
        if node.name not in weighted:
            continue
        for name in node.input[:1]:  # the data input; weights and biases are constants
            seen = set()
            while name in producers and name not in seen:
                seen.add(name)
                source = producers[name]
                if source.name in weighted:
                    readers.setdefault(source.name, []).append(node.name)
                    break
                if len([i for i in source.input if i and i not in loaded.constants]) != 1:
                    break  # a join (Add, Concat): several producers narrow together, not counted
                name = next(i for i in source.input if i and i not in loaded.constants)
    return readers
