"""Byte sizes: parse at the edges ("256KiB", "1M", "1048576"), bytes everywhere inside.

1 KiB = 1 k = 1024 B and 1 MiB = 1 M = 1024 KiB, as MCU datasheets count memory.
"""
import re
from fractions import Fraction

from qfit.errors import QfitError

MAX_SIZE_BYTES = 2 ** 63 - 1  # sizes are summed and compared as int64 in places (JSON readers, numpy)
_MAX_DIGITS = 40

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
