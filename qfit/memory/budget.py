"""budget: graph + precision plan + limits -> flash map, SRAM timeline, arena plan, order, MACs, what-ifs.

Library entry point: `analyze(loaded, plan, BudgetOptions(...)) -> BudgetResult`; `result.to_dict()`
is the JSON report section (rendered by qfit/report/ like every other section). The figures
come from flash.py, sram.py (with schedule.py) and cost.py; what would make a model fit from
whatif.py. Every convention behind the figures (stored types, aliasing, liveness, what flash counts,
estimates) is written down in docs/memory.md.
"""
from __future__ import annotations

from dataclasses import dataclass, field

from qfit.graph.model import LoadedModel
from qfit.memory import whatif
from qfit.memory.cost import macs_section
from qfit.memory.flash import BIAS_BYTES, FLOAT_BYTES, SCALE_BYTES, count_params, flash_map  # noqa: F401
from qfit.memory.options import BudgetOptions
from qfit.memory.sram import MemoryModel, build_memory_model, sram_for, sram_section, stored_tensor  # noqa: F401
from qfit.quant.plan import Plan


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
        result.what_if = whatif.what_if(loaded, plan, options, memory, order, flash, macs["total"],
                                         sram_fits=sram["fits"])
    return result
