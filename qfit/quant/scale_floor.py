"""scale_floor: the smallest scales qfit writes, so that every scale, and every bias scale
s_in * s_w computed from them in float32, is a positive normal float32.

A weight channel of denormal values (say 1e-41) would otherwise get a scale near 1e-43, itself
denormal, and its bias scale s_in * s_w would round to 0 or to another denormal: runtimes flush
those to zero, and a bias scale of 0 makes the model unusable. The floors are far below any scale a
trained layer needs: weights smaller than 127 * 2**-40 (about 1.2e-10) in a whole channel quantize
to zero, which changes that channel's output by less than its float rounding.
"""
from __future__ import annotations

import numpy as np

MIN_WEIGHT_SCALE = float(2.0 ** -40)
MIN_ACTIVATION_SCALE = float(2.0 ** -60)  # with MIN_WEIGHT_SCALE: s_in * s_w >= 2**-100, normal float32
# The range histogram of qfit.quant.observe spans [-R, R] with R >= this: its bins per unit, 4096 / 2R,
# stay a finite float32 (a pixel scale of 1e-45 gave denormal R, an infinite bin width, negative bins).
# Values smaller than one bin (R / 2048) share the bins around 0, far below MIN_ACTIVATION_SCALE anyway.
MIN_HISTOGRAM_RADIUS = float(2.0 ** -100)


def floor_weight_scale(scale: np.ndarray) -> np.ndarray:
    """Per-channel (or per-tensor) weight scales raised to MIN_WEIGHT_SCALE, as float32."""
    return np.maximum(np.asarray(scale, np.float32), np.float32(MIN_WEIGHT_SCALE)).astype(np.float32)


def floor_activation_scale(scale: float) -> float:
    return max(float(scale), MIN_ACTIVATION_SCALE)
