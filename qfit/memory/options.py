"""BudgetOptions: the limits and conventions every memory figure is computed under."""
from __future__ import annotations

import math
from dataclasses import dataclass

from qfit.errors import QfitError


LABELS = {"flash_limit_bytes": "the flash limit (--flash)", "sram_limit_bytes": "the SRAM limit (--sram)",
          "cycles_per_mac": "cycles per MAC (--cycles-per-mac)", "clock_mhz": "the clock (--clock-mhz)",
          "energy_per_mac_pj": "energy per MAC (--energy-per-mac-pj)"}

# The exact search is exponential; past a few minutes it only stalls a CI job (the heuristic
# result is kept when the limit is reached), so a longer limit is refused rather than waited for.
MAX_ORDER_TIME_LIMIT_S = 600.0


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
    order_time_limit_s: float = 2.0        # at most MAX_ORDER_TIME_LIMIT_S
    cycles_per_mac: float | None = None    # latency estimate = MACs * cycles_per_mac / clock
    clock_mhz: float | None = None
    energy_per_mac_pj: float | None = None
    what_if: bool | None = None            # None: only when something does not fit

    def validate(self) -> None:
        # messages name the figure as a user knows it (the CLI option), never the field
        for name in ("flash_limit_bytes", "sram_limit_bytes"):
            value = getattr(self, name)
            if value is not None and not value > 0:
                raise QfitError(f"budget: {LABELS[name]} must be more than 0 bytes, got {value}")
        if self.flash_reserve_bytes < 0 or self.meta_bytes_per_layer < 0:
            raise QfitError("budget: flash reserve and per-layer metadata bytes cannot be negative")
        if self.alignment < 1 or self.alignment & (self.alignment - 1):
            raise QfitError(f"budget: alignment must be a power of two (1, 2, 4, 8, ...), got {self.alignment}")
        if not 0 <= self.order_time_limit_s <= MAX_ORDER_TIME_LIMIT_S:
            raise QfitError(f"budget: order time limit must be between 0 and {MAX_ORDER_TIME_LIMIT_S:g} s, "
                            f"got {self.order_time_limit_s}")
        for name in ("cycles_per_mac", "clock_mhz", "energy_per_mac_pj"):
            value = getattr(self, name)
            if value is not None and not (value > 0 and math.isfinite(value)):
                raise QfitError(f"budget: {LABELS[name]} must be a positive finite number, got {value}")
