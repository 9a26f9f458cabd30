"""Format handler return values as IEEE 488.2 response data.

* ``float`` -> NR3 with ten significant digits, ``+5.000000000E+00``
  (IEEE 488.2-1992 §8.7.4, from memory); relative rounding error <= 5e-10.
  Infinity, minus infinity and NaN are sent as +9.9E+37, -9.9E+37 and +9.91E+37
  (SCPI-1999 Vol. 1 §7.2.1.5, from memory).
* ``int`` -> NR1 (§8.7.2); ``bool`` -> ``1``/``0``.
* ``str`` -> sent as it is (character or arbitrary ASCII response data).
* ``bytes`` -> definite-length block ``#<n><len><bytes>`` (§8.7.9).
* a list or tuple (or anything with ``tolist()``) of scalars -> comma list.
"""

from __future__ import annotations

import math
from collections.abc import Sequence

SCPI_INFINITY = 9.9e37
SCPI_NAN = 9.91e37


def format_float(value: float) -> str:
    """NR3 text of ``value`` with ten significant digits."""
    if math.isnan(value):
        value = SCPI_NAN
    elif math.isinf(value):
        value = math.copysign(SCPI_INFINITY, value)
    return f"{value:+.9E}"


def format_block(data: bytes) -> bytes:
    """``#<n><len><bytes>``: ``n`` digits of length, then the bytes."""
    length = str(len(data))
    if len(length) > 9:
        raise ValueError(f"a block of {len(data)} bytes is too long for a definite-length header")
    return f"#{len(length)}{length}".encode("ascii") + bytes(data)


def _plain(value: object) -> object:
    # numpy scalars and arrays without importing numpy
    if type(value).__module__ == "numpy":
        if hasattr(value, "tolist"):
            return value.tolist()
        if hasattr(value, "item"):
            return value.item()
    return value


def _scalar(value: object) -> str:
    value = _plain(value)
    if isinstance(value, bool):
        return "1" if value else "0"
    if isinstance(value, int):
        return str(value)
    if isinstance(value, float):
        return format_float(value)
    if isinstance(value, str):
        return value
    raise TypeError(f"cannot format {type(value).__name__} {value!r} as SCPI response data")


def format_response(value: object) -> bytes:
    """Response bytes (without terminator) for one query's return value."""
    value = _plain(value)
    if value is None:
        raise TypeError("a query handler returned None; return the value to send")
    if isinstance(value, (bytes, bytearray, memoryview)):
        return format_block(bytes(value))
    if isinstance(value, Sequence) and not isinstance(value, str):
        return ",".join(_scalar(item) for item in value).encode("latin-1")
    return _scalar(value).encode("latin-1")
