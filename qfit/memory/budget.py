"""budget: graph + precision plan + limits -> flash map, SRAM timeline, arena plan, order, MACs, what-ifs.

Library entry point: `analyze(loaded, plan, BudgetOptions(...)) -> BudgetResult`; `result.to_dict()`
is the JSON report section, `render_text` / `render_markdown` the human-readable ones. The figures
come from flash.py, sram.py (with schedule.py) and cost.py; what would make a model fit from
whatif.py. Every convention behind the figures (stored types, aliasing, liveness, what flash counts,
estimates) is written down in docs/memory.md.
"""
from __future__ import annotations

from dataclasses import dataclass, field

from tabulate import tabulate

from qfit.graph.model import LoadedModel
from qfit.memory import whatif
from qfit.memory.cost import macs_section
from qfit.memory.flash import BIAS_BYTES, FLOAT_BYTES, SCALE_BYTES, count_params, flash_map  # noqa: F401
from qfit.memory.options import BudgetOptions
from qfit.memory.sram import MemoryModel, build_memory_model, sram_for, sram_section, stored_tensor  # noqa: F401
from qfit.quant.plan import Plan
from qfit.sizes import format_size


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
    memory: MemoryModel | None = field(default=None, repr=False)

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


# ---- entry point ----------------------------------------------------------------------------------

def analyze(loaded: LoadedModel, plan: Plan, options: BudgetOptions | None = None) -> BudgetResult:
    """Flash map, SRAM timeline (best order), arena plan, order search, MACs and, when something does
    not fit (or `options.what_if`), what would make it fit."""
    options = options or BudgetOptions()
    options.validate()
    macs = macs_section(loaded, options)
    model = {"params": count_params(loaded, plan), "macs": macs["total"]}
    flash = flash_map(loaded, plan, options)
    memory = build_memory_model(loaded, plan, options)
    best, live, arena = sram_for(memory, options)
    sram = sram_section(memory, live, options, arena["bytes"])
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
        result.what_if = whatif.what_if(loaded, plan, options, memory, order, flash, macs["total"])
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
