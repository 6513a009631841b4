"""cost: multiply-accumulates and element operations per layer (from the operator registry), and
the latency and energy estimates derived from them."""
from __future__ import annotations

from qfit import ops
from qfit.graph.model import LoadedModel
from qfit.memory.options import BudgetOptions


def macs_section(loaded: LoadedModel, options: BudgetOptions, shapes: dict | None = None) -> dict:
    """MACs and element operations per layer and in total; latency and energy when asked for."""
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
