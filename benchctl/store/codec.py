"""Encoding of numpy arrays and JSON documents for storage.

Arrays are stored as their raw bytes in little-endian order, with the numpy dtype
string (``'<f8'``, ``'<c16'``, ``'|b1'`` ...) and the shape recorded beside them, so
float64 and complex128 data come back bit-exact (NaN payloads and signed zeros
included). Complex data is stored as complex, not split into real and imaginary parts.
"""

from __future__ import annotations

import json
import math
from typing import Any

import numpy as np

from benchctl.errors import StoreError

_NUMERIC_KINDS = "biufc"  # bool, signed int, unsigned int, float, complex


def encode_column(name: str, values: Any) -> tuple[str, tuple[int, ...], bytes]:
    """Return ``(dtype_str, shape, little-endian bytes)`` for one array column."""
    arr = np.asarray(values)
    if arr.dtype.kind not in _NUMERIC_KINDS:
        raise StoreError(
            f"array column {name!r} has dtype {arr.dtype} which the store cannot keep; "
            "give a numeric or boolean numpy array (text belongs in the array's meta)"
        )
    little = arr.dtype.newbyteorder("<")  # no-op for '|' (byte-order free) dtypes
    arr = arr.astype(little, copy=False)
    return little.str, tuple(int(n) for n in arr.shape), arr.tobytes(order="C")


def decode_column(dtype_str: str, shape: tuple[int, ...], data: bytes) -> np.ndarray:
    """Inverse of :func:`encode_column`; the returned array owns (and may write) its data."""
    dtype = np.dtype(dtype_str)
    return np.frombuffer(bytes(data), dtype=dtype).reshape(shape).copy()


def _json_default(obj: Any) -> Any:
    if isinstance(obj, np.generic):
        return obj.item()
    if isinstance(obj, np.ndarray):
        return obj.tolist()
    if isinstance(obj, (set, frozenset)):
        return sorted(obj)
    raise TypeError(f"object of type {type(obj).__name__} is not JSON serialisable")


def to_json(what: str, value: Any) -> str:
    """Serialise ``value`` to JSON text; ``what`` names it in the error message.

    numpy scalars and arrays become plain numbers and lists; non-finite floats are
    written as the JSON extensions NaN/Infinity which Python's json reads back.
    """
    try:
        return json.dumps(value, default=_json_default, sort_keys=True, separators=(",", ":"))
    except (TypeError, ValueError) as exc:
        raise StoreError(
            f"{what} cannot be stored as JSON ({exc}); use numbers, text, lists and dicts with text keys"
        ) from exc


def from_json(text: str | None) -> Any:
    """Parse JSON text written by :func:`to_json` (``None`` stays ``None``)."""
    if text is None:
        return None
    return json.loads(text)


def to_float_or_none(what: str, value: Any) -> float | None:
    """Convert a scalar measurement to float; ``None`` and NaN are stored as NULL."""
    if value is None:
        return None
    if isinstance(value, (str, bytes)):
        raise StoreError(f"{what} is text ({value!r}); points and results hold numbers only")
    try:
        number = float(value)
    except (TypeError, ValueError) as exc:
        raise StoreError(f"{what} = {value!r} is not a number; points and results hold numbers only") from exc
    return None if math.isnan(number) else number
