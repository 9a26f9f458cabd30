"""IEEE 488.2 definite-length arbitrary blocks and oscilloscope waveform scaling.

Block form (IEEE 488.2-1992 §7.7.6 program data, §8.7.9 response data — from memory):
``#<n><n ASCII digits giving the byte count><the bytes>``, with n in 1..9. The
indefinite form ``#0<bytes><NL^END>`` is refused: on a raw socket its end cannot be
told from a newline byte inside binary data. Payload bytes may hold any value,
including b"\\n".

Reading a block from a stream::

    head = read_exactly(2)                          # b"#" and the digit n
    head += read_exactly(header_length(head) - 2)   # the n count digits
    rest = read_exactly(block_length(head) - len(head))
    payload = parse_definite_block(head + rest)

Waveform scaling (the usual scope preamble, common practice):
``t[i] = x_origin + (i − x_reference)·x_increment`` and
``v[i] = y_origin + (code[i] − y_reference)·y_increment``.

Pure functions: no I/O.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Literal

import numpy as np
from numpy.typing import ArrayLike, NDArray

from benchctl.errors import InstrumentResponseError, UsageError

MAX_PAYLOAD_BYTES = 999_999_999
"""The largest payload a 9-digit count can describe."""

SAMPLE_DTYPES = ("int8", "uint8", "int16", "uint16", "float32", "float64")


@dataclass(frozen=True, eq=False)
class Waveform:
    """A scaled waveform: sample times in seconds and values in ``unit`` (read-only arrays)."""

    t_s: NDArray[np.float64]
    values: NDArray[np.float64]
    unit: str


def encode_definite_block(payload: bytes) -> bytes:
    """Wrap ``payload`` in a definite-length block ``#<n><count><payload>`` (IEEE 488.2 §7.7.6).

    An empty payload encodes as ``b"#10"``.
    """
    if len(payload) > MAX_PAYLOAD_BYTES:
        raise UsageError(
            f"payload of {len(payload)} bytes is longer than a definite-length block can describe "
            f"({MAX_PAYLOAD_BYTES} bytes); send it in parts"
        )
    data = bytes(payload)
    count = str(len(data)).encode("ascii")
    return b"#" + str(len(count)).encode("ascii") + count + data


def header_length(prefix: bytes) -> int:
    """Length in bytes of the block header ``#<n><n digits>``, learnt from its first two bytes."""
    if len(prefix) < 2:
        raise InstrumentResponseError(
            f"need at least 2 bytes to read a block header, got {len(prefix)} ({bytes(prefix)!r}); read more first"
        )
    if prefix[0:1] != b"#":
        raise InstrumentResponseError(
            f"a definite-length block must start with b'#', got {bytes(prefix[:16])!r}; "
            "the instrument sent something else - check the query and the data format"
        )
    n_char = prefix[1:2]
    if n_char == b"0":
        raise InstrumentResponseError(
            "indefinite-length block (#0) received; it cannot be framed on a raw socket - "
            "configure the instrument for definite-length blocks"
        )
    if not (b"1" <= n_char <= b"9"):
        raise InstrumentResponseError(
            f"malformed block header {bytes(prefix[:16])!r}: the byte after '#' must be a digit 1-9"
        )
    return 2 + int(n_char)


def block_length(prefix: bytes) -> int:
    """Total length in bytes (header + payload) of the block whose header starts ``prefix``.

    ``prefix`` must hold at least ``header_length(prefix)`` bytes.
    """
    n_head = header_length(prefix)
    if len(prefix) < n_head:
        raise InstrumentResponseError(
            f"block header needs {n_head} bytes, only {len(prefix)} given ({bytes(prefix)!r}); read more first"
        )
    digits = bytes(prefix[2:n_head])
    if not digits.isdigit():
        raise InstrumentResponseError(f"malformed block header {bytes(prefix[:n_head])!r}: byte count is not all digits")
    return n_head + int(digits)


def parse_definite_block(data: bytes) -> bytes:
    """Return the payload of a definite-length block (IEEE 488.2 §8.7.9).

    ``data`` is the whole block, optionally followed by one response terminator
    (b"\\n" or b"\\r\\n"). Raises InstrumentResponseError for the indefinite form,
    a malformed header, a truncated payload or extra bytes after the block.
    """
    raw = bytes(data)
    total = block_length(raw)
    if len(raw) < total:
        raise InstrumentResponseError(
            f"block truncated: header declares {total - header_length(raw)} payload bytes "
            f"but only {len(raw) - header_length(raw)} arrived; read block_length() bytes before parsing"
        )
    tail = raw[total:]
    if tail not in (b"", b"\n", b"\r\n"):
        raise InstrumentResponseError(
            f"{len(tail)} unexpected bytes after the block ({tail[:16]!r}...); "
            "the byte count and the data disagree or two responses were read together"
        )
    return raw[header_length(raw) : total]


def decode_samples(
    payload: bytes, dtype: str, *, byte_order: Literal["little", "big"] = "little"
) -> NDArray[np.generic]:
    """Interpret a block payload as samples of ``dtype`` (one of SAMPLE_DTYPES)."""
    if dtype not in SAMPLE_DTYPES:
        raise InstrumentResponseError(f"unsupported sample type {dtype!r}; use one of {', '.join(SAMPLE_DTYPES)}")
    if byte_order not in ("little", "big"):
        raise UsageError(f"byte_order must be 'little' or 'big', got {byte_order!r}")
    dt = np.dtype(dtype).newbyteorder("<" if byte_order == "little" else ">")
    if len(payload) % dt.itemsize:
        raise InstrumentResponseError(
            f"payload of {len(payload)} bytes is not a whole number of {dtype} samples "
            f"({dt.itemsize} bytes each); check the waveform format setting"
        )
    return np.frombuffer(bytes(payload), dtype=dt)


_TIME_AXIS: dict[tuple[int, float, float, float], NDArray[np.float64]] = {}


def _time_axis(n: int, x_increment: float, x_origin: float, x_reference: float) -> NDArray[np.float64]:
    """Read-only sample times; the channels of one acquisition share one array (the last one kept)."""
    key = (n, x_increment, x_origin, x_reference)
    t = _TIME_AXIS.get(key)
    if t is None:
        t = np.arange(n, dtype=np.float64)
        t *= x_increment
        t += x_origin - x_reference * x_increment
        t.setflags(write=False)
        _TIME_AXIS.clear()
        _TIME_AXIS[key] = t
    return t


def scale_waveform(
    raw: ArrayLike,
    x_increment: float,
    x_origin: float,
    x_reference: float,
    y_increment: float,
    y_origin: float,
    y_reference: float,
    *,
    unit: str = "V",
) -> Waveform:
    """Scale raw scope samples with the preamble values (seconds and ``unit``).

    t[i] = x_origin + (i − x_reference)·x_increment;
    v[i] = y_origin + (code[i] − y_reference)·y_increment (common practice).
    ``raw`` holds int8/uint8/int16/uint16/float32/float64 codes; arithmetic is float64
    so integer codes cannot overflow. Both arrays are read-only; records of the same
    length and timing share one time array. The oscilloscope driver scales with this.
    """
    codes = np.asarray(raw)
    if codes.ndim != 1:
        raise UsageError(f"waveform samples must be a 1-D array, got shape {codes.shape}")
    if codes.dtype.name not in SAMPLE_DTYPES:
        raise InstrumentResponseError(
            f"unsupported sample type {codes.dtype.name!r}; use one of {', '.join(SAMPLE_DTYPES)}"
        )
    for name, value in (
        ("x_increment", x_increment),
        ("x_origin", x_origin),
        ("x_reference", x_reference),
        ("y_increment", y_increment),
        ("y_origin", y_origin),
        ("y_reference", y_reference),
    ):
        if not np.isfinite(value):
            raise InstrumentResponseError(f"preamble value {name} is not finite ({value!r}); re-read the preamble")
    if not x_increment > 0:
        raise InstrumentResponseError(f"preamble x_increment must be positive seconds, got {x_increment!r}")
    t = _time_axis(codes.size, float(x_increment), float(x_origin), float(x_reference))
    values = codes.astype(np.float64)  # a new array: scaled in place, in as few passes as the preamble needs
    if y_reference != 0.0:
        values -= y_reference
    if y_increment != 1.0:
        values *= y_increment
    if y_origin != 0.0:
        values += y_origin
    values.setflags(write=False)
    return Waveform(t_s=t, values=values, unit=unit)
