"""flash: what a graph + precision plan stores in flash, per layer and in total (docs/memory.md)."""
from __future__ import annotations

from qfit import ops
from qfit.graph.model import LoadedModel
from qfit.memory.options import BudgetOptions
from qfit.quant.plan import Plan, describe_node_precision

FLOAT_BYTES = 4
BIAS_BYTES = 4            # int32 bias
SCALE_BYTES = 4           # one float32 scale per channel (or per tensor)


def count_params(loaded: LoadedModel, plan: Plan) -> int:
    """Elements of the weight and bias constants of layers with weights (Conv, ConvTranspose, Gemm,
    MatMul) and of every float constant of a layer kept float (e.g. an LSTM's W, R, B)."""
    seen: set[str] = set()
    total = 0
    for node in loaded.graph.node:
        # a MatMul has no bias input: the Add of a constant after it is its bias (ops.bias_add_inputs)
        roles = ops.weight_and_bias_inputs(node) | ops.bias_add_inputs(node, loaded.index.producer,
                                                                          loaded.is_constant)
        for i, name in enumerate(node.input):
            if not name or name in seen or name not in loaded.constants:
                continue
            arr = loaded.constants[name]
            if i in roles or (node.name in plan.unsupported_nodes and arr.dtype.kind == "f"):
                seen.add(name)
                total += int(arr.size)
    return total


def _layer_row(node, loaded: LoadedModel, plan: Plan, seen: set[str]) -> tuple[dict, int, int]:
    """One layer's flash row, and the float32 and stored bytes of its weights (for the weight-only
    ratio). Constants already in `seen` belong to an earlier layer; this layer's are added."""
    is_float = node.name in plan.float_nodes
    row = dict(name=node.name, op_type=node.op_type, precision="", weight_bytes=0, bias_bytes=0,
               scale_bytes=0, float_bytes=0, other_bytes=0, total_bytes=0, float32_bytes=0)
    weight_bits = set()
    weight_float32_bytes = weight_stored_bytes = 0
    for i, name in enumerate(node.input):
        if not name or name in seen or name not in loaded.constants:
            continue
        seen.add(name)
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
            if i in ops.of(node).weights or (is_float and i in ops.weight_and_bias_inputs(node)):
                weight_float32_bytes += as_float32
                weight_stored_bytes += n * FLOAT_BYTES
        else:
            row["other_bytes"] += int(arr.nbytes)   # shapes, indices: stored as they are
    row["total_bytes"] = (row["weight_bytes"] + row["bias_bytes"] + row["scale_bytes"]
                          + row["float_bytes"] + row["other_bytes"])
    if is_float:
        row["precision"] = "float"
    elif weight_bits - {8}:
        row["precision"] = "int" + "/".join(str(b) for b in sorted(weight_bits)) + " weights"
    else:
        row["precision"] = describe_node_precision(plan, node)
    return row, weight_float32_bytes, weight_stored_bytes


def flash_map(loaded: LoadedModel, plan: Plan, options: BudgetOptions) -> dict:
    """The flash section: bytes per layer as stored (int8/int16 weights, int32 biases, scales, float
    constants of float layers), activation quantizer parameters, metadata and reserve, the verdict."""
    rows = []
    seen: set[str] = set()   # an initializer shared by several nodes is stored once
    weight_float32_bytes = weight_stored_bytes = 0
    for node in loaded.graph.node:
        row, as_float32, stored = _layer_row(node, loaded, plan, seen)
        weight_float32_bytes += as_float32
        weight_stored_bytes += stored
        if row["float32_bytes"]:
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
        "shrink_ratio": ratio(float_bytes, int8_bytes),
        "weight_shrink_ratio": ratio(weight_float32_bytes, weight_stored_bytes),
        "shrink_ratio_all_in": ratio(float_bytes + meta_bytes + options.flash_reserve_bytes, total),
        "estimates": ["reserve_bytes", "meta_bytes"],
        "layers": rows,
    }


def ratio(a: float, b: float) -> float | None:
    return round(a / b, 4) if b else None
