"""Types and helpers shared by the integer kernels (see qfit/ops/kernels/__init__.py)."""
from __future__ import annotations

from dataclasses import dataclass
from typing import Callable, Protocol

import numpy as np
from onnx import NodeProto

FLOAT32_EXACT = 1 << 24  # integers up to 2^24 in magnitude, and every partial sum below it, are exact in float32
FLOAT64_EXACT = 1 << 53
INT32_LIMIT = 1 << 31


@dataclass(frozen=True)
class Grid:
    """The integer grid of a quantized tensor: real = (q - zero_point) * scale, q in [low, high]."""

    scale: np.ndarray        # float64; shape () per tensor, (C,) per channel along `axis`
    zero_point: np.ndarray   # int64, same shape as scale
    low: int
    high: int
    axis: int | None = None

    @property
    def per_tensor(self) -> bool:
        return self.scale.size == 1

    @property
    def s(self) -> float:
        return float(self.scale.reshape(-1)[0])

    @property
    def z(self) -> int:
        return int(self.zero_point.reshape(-1)[0])

    def max_abs_centred(self) -> int:
        """The largest |q - zero_point| the grid allows."""
        z = np.asarray(self.zero_point, np.int64)
        return int(np.max(np.maximum(self.high - z, z - self.low)))

    def same_as(self, other: "Grid") -> bool:
        return (self.per_tensor and other.per_tensor and self.s == other.s and self.z == other.z
                and self.low == other.low and self.high == other.high)


@dataclass
class Operand:
    """One input of a node, as the integer program sees it."""

    kind: str                       # "activation" | "integer_constant" | "constant" | "absent"
    grid: Grid | None = None        # activation and integer_constant
    value: np.ndarray | None = None  # integers (integer_constant) or floats (constant)
    shape: tuple[int, ...] | None = None  # static shape (batch 1) when shape inference knows it

    @property
    def is_integer(self) -> bool:
        return self.kind in ("activation", "integer_constant")


@dataclass
class Prepared:
    """A node ready to run: `run(values)` takes one array per operand (the batch's integers for each
    activation, None for the others) and returns int32 arrays, one per output."""

    run: Callable[[list], list[np.ndarray]]
    requantization: dict | None = None   # what the firmware needs: multipliers, shifts, ...


class Arithmetic(Protocol):
    """What kernels need from the layers above (provided by qfit.measure.integer)."""

    rounding: str

    def multipliers(self, reals) -> tuple[np.ndarray, np.ndarray]:
        """Per-element (M0, shift) of real factors (qfit.quant.fixed_point.quantize_multipliers)."""

    def multiply(self, acc: np.ndarray, m0, shift) -> np.ndarray:
        """acc * M0 * 2^(shift - 31) in the selected rounding, int64."""

    def requantizer(self, m0, shift, zero_point, low: int, high: int, bias=None,
                    acc_bound: int | None = None) -> Callable[[np.ndarray], np.ndarray]:
        """A prepared accumulator -> output integers function (bias, scale, zero point, clamp); the
        accumulator may be a float array of exact integers; `acc_bound`, when known, bounds
        |accumulator + bias| (a narrower, faster path below 2^30)."""

    def compile(self, node: NodeProto, constants: dict[int, np.ndarray]) -> Callable[[list], list]:
        """Run `node` in float32 with the inputs in `constants` fixed; the callable takes the other
        inputs in index order and returns the outputs."""

    def overflow(self, node: NodeProto, count: int) -> None:
        """Report `count` accumulator values of `node` that left the int32 range (saturated)."""


Builder = Callable[[NodeProto, list, list, Arithmetic], "Prepared | None"]


def requantization_record(m0: np.ndarray, shift: np.ndarray, **extra) -> dict:
    """Compact lists for report.json and the C export: one multiplier and shift per channel."""
    return {"multiplier": [int(v) for v in np.ravel(m0)], "shift": [int(v) for v in np.ravel(shift)], **extra}


def storage_dtype(low: int, high: int):
    """The narrowest integer type holding [low, high]: int8 activations are stored as int8, as on the
    device (every pass that reads them reads a quarter of the bytes of int32)."""
    for dtype in (np.int8, np.uint8, np.int16, np.uint16, np.int32):
        info = np.iinfo(dtype)
        if info.min <= low and high <= info.max:
            return dtype
    return np.int64


def one_activation_in(operands: list, outputs: list) -> bool:
    """The node reads one per-tensor integer activation (input 0), constants otherwise, and writes
    per-tensor grids: the shape of every unary kernel (tables, pools, data movement)."""
    x = operands[0]
    return (x.kind == "activation" and x.grid.per_tensor and all(g.per_tensor for g in outputs)
            and all(op.kind in ("constant", "absent") for op in operands[1:]))


def channel_shape(ndim: int, axis: int, size: int) -> tuple[int, ...]:
    """Shape that broadcasts a per-channel vector of `size` along `axis` of an ndim array."""
    shape = [1] * ndim
    shape[axis] = size
    return tuple(shape)


def centred_float(values: np.ndarray, zero_point: int, dtype=np.float32) -> np.ndarray:
    """q - zero_point as floats (exact: |q - z| < 2^17)."""
    return np.subtract(values, dtype(zero_point), dtype=dtype)


def saturate_accumulator(acc: np.ndarray, node: NodeProto, arithmetic: Arithmetic) -> np.ndarray:
    """Detect int32 overflow of an int64 accumulator: report it and saturate (never wrap)."""
    outside = int(np.count_nonzero((acc < -INT32_LIMIT) | (acc >= INT32_LIMIT)))
    if outside:
        arithmetic.overflow(node, outside)
        np.clip(acc, -INT32_LIMIT, INT32_LIMIT - 1, out=acc)
    return acc
