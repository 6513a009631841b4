"""Byte sizes: parse at the edges ("256KiB", "1M", "1048576"), bytes everywhere inside.

1 KiB = 1 k = 1024 B and 1 MiB = 1 M = 1024 KiB, as MCU datasheets count memory.
"""
import math
import re
from fractions import Fraction

from qfit.errors import QfitError

MAX_SIZE_BYTES = 2 ** 63 - 1  # sizes are summed and compared as int64 in places (JSON readers, numpy)
_MAX_DIGITS = 40

# The ceiling on one tensor: 2**32 elements (16 GiB as float32), thousands of times any MCU memory.
# Below it, every byte, element and MAC count qfit derives stays far inside int64, also where numpy
# sums them; above it a shape is a typo or an attack and is refused, never wrapped around.
MAX_TENSOR_ELEMENTS = 2 ** 32

_UNITS = {"": 1, "b": 1, "k": 1024, "kb": 1024, "kib": 1024,
          "m": 1024 ** 2, "mb": 1024 ** 2, "mib": 1024 ** 2,
          "g": 1024 ** 3, "gb": 1024 ** 3, "gib": 1024 ** 3}
_SIZE = re.compile(r"^\s*([0-9]+(?:\.[0-9]+)?)\s*([a-zA-Z]*)\s*$")


def parse_size(text: str, what: str = "size") -> int:
    """Return the number of bytes in `text`; raise QfitError naming `what` if it does not parse."""
    match = _SIZE.match(str(text))
    unit = match.group(2).lower() if match else None
    if not match or unit not in _UNITS:
        raise QfitError(f"{what}: cannot read '{text}' as a size (use bytes, or a number with KiB/MiB/k/M)")
    number = match.group(1)
    if len(number) > _MAX_DIGITS:  # no memory needs them; and int() refuses over 4300 digits
        raise QfitError(f"{what}: '{str(text)[:40]}...' has too many digits to be a size")
    value = Fraction(number) * _UNITS[unit]  # exact: a float would round long numbers
    if value.denominator != 1:
        raise QfitError(f"{what}: '{text}' is not a whole number of bytes")
    if value > MAX_SIZE_BYTES:
        raise QfitError(f"{what}: '{text}' is larger than any memory (over 8 EiB)")
    return int(value)


def format_size(n_bytes: float) -> str:
    """Human-readable bytes: '812 B', '231.5 KiB', '1.23 MiB'."""
    n = float(n_bytes)
    if abs(n) < 1024:
        return f"{int(n)} B"
    if abs(n) < 1024 ** 2:
        return f"{n / 1024:.1f} KiB"
    return f"{n / 1024 ** 2:.2f} MiB"


def element_count(shape) -> int:
    """Elements of a tensor of `shape`, as a Python integer (exact, no int64 wrap-around); 0 when the
    shape is unknown (None)."""
    return math.prod(int(d) for d in shape) if shape is not None else 0


def check_tensor_elements(shape, what: str) -> int:
    """`element_count(shape)`, refused with a one-line message above MAX_TENSOR_ELEMENTS or when a
    dimension is negative."""
    if shape is not None and any(int(d) < 0 for d in shape):
        raise QfitError(f"{what}: shape {'x'.join(str(int(d)) for d in shape)} has a negative dimension")
    count = element_count(shape)
    if count > MAX_TENSOR_ELEMENTS:
        raise QfitError(f"{what}: shape {'x'.join(str(int(d)) for d in shape)} holds {count} elements, over "
                        f"qfit's ceiling of {MAX_TENSOR_ELEMENTS} (2**32) per tensor")
    return count
