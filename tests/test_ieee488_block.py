"""Definite-length arbitrary blocks and waveform scaling.

Block form per IEEE 488.2-1992 §7.7.6 / §8.7.9 (from memory): b"#", one digit n (1-9),
n ASCII digits giving the byte count, then exactly that many bytes of any value. The
blocks below are assembled by hand from that rule, not with the code under test.
"""

from __future__ import annotations

import io
import struct

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from benchctl.errors import InstrumentResponseError, UsageError
from benchctl.drivers.ieee488_block import (
    block_length,
    decode_samples,
    encode_definite_block,
    header_length,
    parse_definite_block,
    scale_waveform,
)


def test_hand_built_blocks_parse():
    assert parse_definite_block(b"#15hello") == b"hello"
    payload = b"ab\ncd\n\r\nxy"  # 10 bytes with newlines inside
    assert parse_definite_block(b"#3010" + payload) == payload  # leading zeros in the count are allowed
    assert parse_definite_block(b"#210" + payload + b"\n") == payload  # trailing response terminator
    assert parse_definite_block(b"#210" + payload + b"\r\n") == payload


def test_lengths_zero_one_and_a_million():
    # IEEE 488.2 (from memory): the empty block is "#10"
    assert encode_definite_block(b"") == b"#10"
    assert parse_definite_block(b"#10") == b""
    assert parse_definite_block(b"#10\n") == b""
    # one byte that is itself a newline
    assert encode_definite_block(b"\n") == b"#11\n"
    assert parse_definite_block(b"#11\n") == b"\n"
    assert parse_definite_block(b"#11\n\n") == b"\n"
    big = bytes(range(256)) * 3906 + b"\n" * 64  # 1 000 000 bytes
    assert len(big) == 10**6
    block = encode_definite_block(big)
    assert block[:9] == b"#71000000"  # 7 digits for 1 000 000
    assert len(block) == 9 + 10**6
    assert parse_definite_block(block) == big


def test_reading_exactly_one_block_from_a_stream():
    first = b"\x00\n\xff#1" * 240  # 1200-byte payload that even contains a fake header
    stream = io.BytesIO(b"#41200" + first + b"\n#13xyz\n")

    def read_exactly(n: int) -> bytes:
        data = stream.read(n)
        assert len(data) == n
        return data

    head = read_exactly(2)
    assert header_length(head) == 6
    head += read_exactly(header_length(head) - 2)
    assert block_length(head) == 6 + 1200
    rest = read_exactly(block_length(head) - len(head))
    assert parse_definite_block(head + rest) == first
    assert stream.read(1) == b"\n"  # the terminator is left for the reader
    assert parse_definite_block(stream.read()) == b"xyz"


@pytest.mark.parametrize(
    ("data", "match"),
    [
        (b"#0abc\n", "indefinite"),  # IEEE 488.2 §8.7.10 indefinite form (from memory): refused
        (b"X15hello", "must start with"),
        (b"#", "at least 2 bytes"),
        (b"", "at least 2 bytes"),
        (b"#A5hello", "digit 1-9"),
        (b"#2x5hello", "not all digits"),
        (b"#3", "needs 5 bytes"),
        (b"#15hel", "truncated"),
        (b"#12abXYZ", "unexpected bytes"),
        (b"#12ab\n\n", "unexpected bytes"),
    ],
)
def test_bad_blocks_are_refused_clearly(data: bytes, match: str):
    with pytest.raises(InstrumentResponseError, match=match):
        parse_definite_block(data)


@settings(max_examples=200, deadline=None)
@given(st.binary(max_size=3000))
def test_round_trip_any_bytes(payload: bytes):
    block = encode_definite_block(payload)
    count = str(len(payload)).encode()
    # the header is '#', the digit count of the length, then the length (IEEE 488.2, from memory)
    assert block == b"#" + str(len(count)).encode() + count + payload
    assert parse_definite_block(block) == payload
    assert block_length(block) == len(block)


def test_payload_too_long_for_nine_digits_is_refused():
    class Huge(bytes):
        def __len__(self) -> int:  # avoid allocating a gigabyte
            return 10**9

    with pytest.raises(UsageError, match="send it in parts"):  # the caller's argument: a usage error
        encode_definite_block(Huge(b""))


def test_scale_int8_codes_with_preamble():
    codes = np.array([-128, -1, 0, 1, 127], dtype=np.int8)
    w = scale_waveform(codes, 1e-9, -2e-6, 2.0, 0.05, 1.2, -16.0, unit="V")
    # preamble formula (common practice): t = x0 + (i - xref)*dx ; v = y0 + (code - yref)*dy
    assert w.t_s.tolist() == pytest.approx([-2e-6 + (i - 2) * 1e-9 for i in range(5)], rel=1e-12)
    assert w.values.tolist() == pytest.approx([1.2 + (c + 16.0) * 0.05 for c in (-128, -1, 0, 1, 127)])
    assert w.unit == "V"
    assert not w.t_s.flags.writeable and not w.values.flags.writeable


def test_scale_int16_big_endian_payload_without_overflow():
    values = [-32768, -1, 0, 32767]
    payload = struct.pack(">4h", *values)  # Python struct as the reference encoder
    block = b"#18" + payload
    codes = decode_samples(parse_definite_block(block), "int16", byte_order="big")
    assert codes.tolist() == values
    w = scale_waveform(codes, 2e-9, 0.0, 0.0, 1e-3, 0.0, -32768.0)
    # 32767 - (-32768) = 65535 would overflow int16; the result must be exact in float64
    assert w.values.tolist() == pytest.approx([(v + 32768) * 1e-3 for v in values], rel=1e-15)


@pytest.mark.parametrize(("fmt", "dtype"), [("<3f", "float32"), ("<3d", "float64")])
def test_scale_float_payloads(fmt: str, dtype: str):
    payload = struct.pack(fmt, 0.5, -1.25, 3.0)
    codes = decode_samples(payload, dtype)
    w = scale_waveform(codes, 1e-6, 1e-3, 0.0, 1.0, 0.0, 0.0, unit="A")
    assert w.values.tolist() == pytest.approx([0.5, -1.25, 3.0])
    assert w.t_s.tolist() == pytest.approx([1e-3, 1e-3 + 1e-6, 1e-3 + 2e-6])
    assert w.unit == "A"


def test_decode_and_scale_errors():
    with pytest.raises(InstrumentResponseError, match="whole number of int16"):
        decode_samples(b"\x00\x01\x02", "int16")
    with pytest.raises(InstrumentResponseError, match="unsupported sample type"):
        decode_samples(b"\x00", "int64")
    with pytest.raises(InstrumentResponseError, match="unsupported sample type"):
        scale_waveform(np.zeros(3, dtype=np.int64), 1e-9, 0, 0, 1, 0, 0)
    with pytest.raises(InstrumentResponseError, match="x_increment must be positive"):
        scale_waveform(np.zeros(3, dtype=np.int8), 0.0, 0, 0, 1, 0, 0)
    with pytest.raises(InstrumentResponseError, match="not finite"):
        scale_waveform(np.zeros(3, dtype=np.int8), 1e-9, 0, 0, float("nan"), 0, 0)
