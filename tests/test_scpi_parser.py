"""Lexer, suffix multipliers, parameter conversion and response formatting.

Sources (all from memory unless marked): IEEE 488.2-1992 ch. 7 (program data:
§7.7.2 decimal numeric, §7.7.3 suffix and Table 7-1 multipliers, §7.7.4
non-decimal numeric, §7.7.5 strings, §7.7.6 arbitrary blocks), ch. 8 (response
data: §8.7.2 NR1, §8.7.4 NR3, §8.7.9 definite-length block); SCPI-1999 Vol. 1
ch. 7 (MIN/MAX/DEF, Boolean) and Vol. 2 ch. 21 (error numbers).
"""

from __future__ import annotations

import math
import re

import pytest
from hypothesis import given
from hypothesis import strategies as st

from benchctl.simulated_instruments.scpi import Block, Boolean, Choice, Numeric, ScpiError, Text, format_response
from benchctl.simulated_instruments.scpi.lexer import (BlockToken, NumberToken, StringToken, WordToken, parse_unit,
                                              split_units)
from benchctl.simulated_instruments.scpi.params import convert_params
from benchctl.simulated_instruments.scpi.responses import format_float
from benchctl.simulated_instruments.scpi.suffixes import suffix_scale


def _code(fn, *args) -> int:
    with pytest.raises(ScpiError) as info:
        fn(*args)
    return info.value.code


# ---------------------------------------------------------------- message units
def test_units_split_at_semicolons_but_not_inside_strings_or_blocks() -> None:
    # IEEE 488.2-1992 §7.3.2: ';' separates units; inside §7.7.5 strings and §7.7.6 blocks it is data
    msg = "VOLT 5;DISP:TEXT 'a;b';LIST:VOLT #14;;;x;*OPC?"
    assert split_units(msg) == ["VOLT 5", "DISP:TEXT 'a;b'", "LIST:VOLT #14;;;x", "*OPC?"]
    assert split_units('DISP:TEXT "say ""hi;"""') == ['DISP:TEXT "say ""hi;"""']


def test_header_parts() -> None:
    unit = parse_unit(":sour:volt:lev? MAX")
    h = unit.header
    assert (h.absolute, h.query, h.common, h.mnemonics) == (True, True, False, ("SOUR", "VOLT", "LEV"))
    assert unit.params == (WordToken("MAX"),)
    star = parse_unit("*ese 32").header
    assert (star.common, star.mnemonics, star.query) == (True, ("ESE",), False)


@pytest.mark.parametrize("unit,code", [
    ("\xffVOLT 5", -101),          # byte above 0x7E (488.2 §7.4, from memory)
    ("VOLT 5\xe9", -101),
    ("VOLT:", -102),               # header ending in a colon
    ("::VOLT", -102),
    ("5 V", -102),                 # a unit must start with a header
    ("VOLT 5 V X", -103),          # data elements are separated by ','
    ("VOLT 5,", -102),
    ("VOLT (@1)", -104),           # expression data is not accepted
    ("VOLT,5", -111),              # header and data need white space between them
    ("VERYLONGMNEMONIC 5", -112),  # more than 12 characters (488.2 §7.6.1.4.1)
    ("VOLT 5.5.5", -120),
    ("VOLT +", -120),
    ("VOLT 1e999", -120),
    ("DISP:TEXT 'open", -102),
    ("LIST:VOLT #0abc", -161),     # indefinite block refused on a socket
    ("LIST:VOLT #3ab", -161),      # block header without its length digits
    ("LIST:VOLT #15abc", -161),    # fewer bytes than declared
])
def test_malformed_units_raise_the_standard_error(unit: str, code: int) -> None:
    assert _code(parse_unit, unit) == code


def test_numeric_forms_and_suffixes() -> None:
    # NR1, NR2, NR3 and suffixes with or without white space (488.2 §7.7.2, §7.7.3)
    values = parse_unit("X 5, -2.5, +.5, 1e3, 2.5E-3, 5 V, 100mA, 2.5kHz, 10 UA").params
    assert [t.value for t in values] == [5, -2.5, 0.5, 1000, 0.0025, 5, 100, 2.5, 10]
    assert [t.suffix for t in values] == [None, None, None, None, None, "V", "MA", "KHZ", "UA"]


def test_non_decimal_numbers() -> None:
    # IEEE 488.2-1992 §7.7.4: #H hexadecimal, #Q octal, #B binary
    values = parse_unit("X #H1F,#q17,#B101").params
    assert [t.value for t in values] == [31, 15, 5]
    assert _code(parse_unit, "X #B102") == -120


def test_strings_and_blocks() -> None:
    # 488.2 §7.7.5: either quote, the quote doubled inside; §7.7.6: #<n><len><bytes>, any bytes
    payload = "\n;\"'\x00\xff\r\n,12"
    params = parse_unit(f"X 'it''s', \"a \"\"b\"\"\", #2{len(payload)}{payload}").params
    assert params[0] == StringToken("it's")
    assert params[1] == StringToken('a "b"')
    assert params[2] == BlockToken(b"\n;\"'\x00\xff\r\n,12")
    utf8 = "Ω 48 V".encode("utf-8").decode("latin-1")
    assert parse_unit(f"X '{utf8}'").params == (StringToken("Ω 48 V"),)
    assert _code(parse_unit, "X '\xff'") == -101


# ------------------------------------------------------------------ suffixes
@pytest.mark.parametrize("suffix,unit,scale", [
    # IEEE 488.2-1992 Table 7-1 (from memory): M milli, MA mega, K kilo, U micro ...
    ("V", "V", 1.0), ("MV", "V", 1e-3), ("KV", "V", 1e3), ("UV", "V", 1e-6), ("MAV", "V", 1e6),
    ("mA", "A", 1e-3), ("MA", "A", 1e-3), ("UA", "A", 1e-6), ("NA", "A", 1e-9), ("MAA", "A", 1e6),
    ("KHZ", "HZ", 1e3), ("kHz", "HZ", 1e3), ("GHZ", "HZ", 1e9),
    ("MHZ", "HZ", 1e6),    # special case: MHZ is megahertz
    ("MOHM", "OHM", 1e6),  # special case: MOHM is megaohm
    ("KOHM", "OHM", 1e3), ("MAOHM", "OHM", 1e6),
    ("US", "S", 1e-6), ("NS", "S", 1e-9), ("PS", "S", 1e-12), ("FS", "S", 1e-15), ("TS", "S", 1e12),
    ("PEV", "V", 1e15), ("EXV", "V", 1e18), ("AA", "A", 1e-18),
])
def test_suffix_multipliers(suffix: str, unit: str, scale: float) -> None:
    assert suffix_scale(suffix, unit) == scale


@pytest.mark.parametrize("suffix,unit", [("A", "V"), ("XV", "V"), ("HZ", "V"), ("MHZV", "V"), ("VV", "V")])
def test_wrong_suffixes_do_not_fit(suffix: str, unit: str) -> None:
    assert suffix_scale(suffix, unit) is None


# --------------------------------------------------------------- parameters
VOLT = Numeric(unit="V", minimum=0.0, maximum=80.0, default=0.0)


def _convert(spec, text: str):
    (value,) = convert_params((spec,), parse_unit(f"X {text}").params, "X")
    return value


@pytest.mark.parametrize("text,value", [
    ("5", 5.0), ("5 V", 5.0), ("5V", 5.0), ("5000 mV", 5.0), ("0.05 KV", 50.0), ("48E0", 48.0),
    ("MIN", 0.0), ("MAX", 80.0), ("DEF", 0.0), ("minimum", 0.0), ("Maximum", 80.0), ("default", 0.0),
])
def test_numeric_values(text: str, value: float) -> None:
    # SCPI-1999 Vol. 1 §7.2 (from memory): MINimum, MAXimum, DEFault in either form
    assert _convert(VOLT, text) == pytest.approx(value, rel=1e-15)


@pytest.mark.parametrize("spec,text,code", [
    (VOLT, "5 A", -131),                        # wrong unit: Invalid suffix
    (Numeric(minimum=0, maximum=9), "5 V", -138),  # no unit allowed: Suffix not allowed
    (VOLT, "80.001", -222), (VOLT, "-1", -222), (VOLT, "81000 mV", -222),
    (VOLT, "LOTS", -141), (VOLT, "'5'", -104), (VOLT, "#11x", -104),
    (Numeric(unit="V"), "MAX", -224),           # no maximum defined
    (Boolean(), "MAYBE", -224), (Boolean(), "1 V", -138), (Boolean(), "'ON'", -104),
    (Choice("CURRent", "RESistance"), "VOLT", -224), (Choice("CURRent", "RESistance"), "CURRE", -224),
    (Choice("CURRent", "RESistance"), "1", -104),
    (Text(), "HELLO", -104), (Block(), "'abc'", -104),
])
def test_parameter_errors(spec, text: str, code: int) -> None:
    assert _code(_convert, spec, text) == code


def test_out_of_range_detail_names_header_value_and_limit() -> None:
    with pytest.raises(ScpiError) as info:
        _convert(VOLT, "500")
    assert info.value.code == -222 and info.value.message == "Data out of range"
    assert info.value.detail == "X 500 V exceeds the maximum 80 V"


def test_boolean_choice_text_block_values() -> None:
    # SCPI-1999 Vol. 1 §7.3 (from memory): ON|OFF|1|0, numbers rounded, non-zero is ON
    assert [_convert(Boolean(), t) for t in ("ON", "off", "1", "0", "0.4", "0.6", "-3")] == \
        [True, False, True, False, False, True, True]
    mode = Choice("CURRent", "RESistance", "VOLTage", "POWer")
    assert [_convert(mode, t) for t in ("CURR", "current", "res", "RESISTANCE", "POW")] == \
        ["CURR", "CURR", "RES", "RES", "POW"]
    assert _convert(Text(), "'Flyback 36-75 V'") == "Flyback 36-75 V"
    assert _convert(Block(), "#15\n\r\x00;,") == b"\n\r\x00;,"


def test_integer_numeric_rounds_half_away_from_zero() -> None:
    spec = Numeric(minimum=-10, maximum=255, integer=True)
    assert [_convert(spec, t) for t in ("2.5", "3.5", "-2.5", "254.6")] == [3, 4, -3, 255]
    assert _code(_convert, spec, "255.5") == -222


def test_parameter_count() -> None:
    specs = (Numeric(), Numeric(optional=True, default=7.0))
    assert convert_params(specs, parse_unit("X 1").params, "X") == [1.0, 7.0]
    assert _code(convert_params, specs, parse_unit("X 1,2,3").params, "X") == -108
    assert _code(convert_params, specs, parse_unit("X").params, "X") == -109
    assert _code(convert_params, (), parse_unit("X 1").params, "X") == -108


# ---------------------------------------------------------------- responses
NR3 = re.compile(r"^[+-]\d\.\d{9}E[+-]\d{2,3}$")


@given(st.floats(min_value=-1e300, max_value=1e300).filter(lambda v: v == 0.0 or abs(v) >= 1e-300))
def test_nr3_round_trips_within_1e_9(value: float) -> None:
    # NR3 per IEEE 488.2-1992 §8.7.4: explicit sign, mantissa, exponent; 10 significant digits.
    # (Subnormal doubles carry fewer digits themselves and are left out.)
    text = format_float(value)
    assert NR3.match(text), text
    assert float(text) == pytest.approx(value, rel=1e-9, abs=0.0)


def test_response_formats() -> None:
    assert format_response(5.0) == b"+5.000000000E+00"
    assert format_response(-0.0012) == b"-1.200000000E-03"
    assert format_response(42) == b"42"                       # NR1, 488.2 §8.7.2
    assert format_response(True) == b"1" and format_response(False) == b"0"
    assert format_response("CURR") == b"CURR"
    assert format_response(b"\x00\n\xff") == b"#13\x00\n\xff"  # 488.2 §8.7.9 definite-length block
    assert format_response(b"x" * 1234) == b"#41234" + b"x" * 1234
    assert format_response(b"") == b"#10"
    assert format_response([1.5, 2, True]) == b"+1.500000000E+00,2,1"
    # SCPI-1999 Vol. 1 §7.2.1.5 (from memory): 9.9E37 infinity, 9.91E37 not-a-number
    assert float(format_response(math.inf)) == 9.9e37 and float(format_response(-math.inf)) == -9.9e37
    assert float(format_response(math.nan)) == 9.91e37
    with pytest.raises(TypeError, match="returned None"):
        format_response(None)


def test_numpy_values_format_like_python_values() -> None:
    np = pytest.importorskip("numpy")
    assert format_response(np.float64(2.5)) == format_response(2.5)
    assert format_response(np.int32(7)) == b"7"
    assert format_response(np.array([1.0, 2.0])) == b"+1.000000000E+00,+2.000000000E+00"
