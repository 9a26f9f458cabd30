"""Header patterns and mnemonic matching of the SCPI core.

Sources: SCPI-1999 Vol. 1 §6.2.1 (short/long form rule), §6.2.5 (numeric
suffixes), IEEE 488.2-1992 §7.6.1 (program mnemonics, at most 12 characters);
all from memory.
"""

from __future__ import annotations

import logging

import pytest

from benchctl.simulated_instruments.scpi.mnemonics import match_nodes, parse_pattern, short_form_rule

# Long and short forms as printed in SCPI-1999 Vol. 2 command tables (from memory).
PUBLISHED_FORMS = [
    ("MEASure", "MEAS"), ("CURRent", "CURR"), ("INPut", "INP"), ("VOLTage", "VOLT"),
    ("SOURce", "SOUR"), ("LEVel", "LEV"), ("IMMediate", "IMM"), ("AMPLitude", "AMPL"),
    ("PROTection", "PROT"), ("RESistance", "RES"), ("DEFault", "DEF"), ("MINimum", "MIN"),
    ("MAXimum", "MAX"), ("SCALar", "SCAL"), ("OUTPut", "OUTP"), ("SYSTem", "SYST"),
    ("ERRor", "ERR"), ("FREQuency", "FREQ"), ("TRIGger", "TRIG"), ("INITiate", "INIT"),
    ("STATe", "STAT"), ("NEXT", "NEXT"), ("DC", "DC"), ("FETCh", "FETC"),
]


@pytest.mark.parametrize("pattern_word,short", PUBLISHED_FORMS)
def test_short_form_rule_matches_published_forms(pattern_word: str, short: str) -> None:
    # SCPI-1999 Vol. 1 §6.2.1 (from memory): first four letters, three if the fourth is a vowel.
    assert short_form_rule(pattern_word) == short
    # ... and the capitals of the pattern as written are that same short form
    (node,) = parse_pattern(pattern_word)
    assert node.short == short and node.long == pattern_word.upper()


def _match(pattern: str, header: str) -> dict[str, int] | None:
    return match_nodes(parse_pattern(pattern), header.upper().split(":"))


SOURCE_VOLTAGE = "[SOURce:]VOLTage[:LEVel][:IMMediate][:AMPLitude]"


@pytest.mark.parametrize("header", [
    "VOLT", "VOLTAGE", "volt", "VoLtAgE", "SOUR:VOLT", "SOURCE:VOLTAGE", "sour:volt:lev",
    "VOLT:LEV:IMM:AMPL", "SOURce:VOLTage:LEVel:IMMediate:AMPLitude", "VOLT:IMM", "VOLT:AMPL", "VOLT:LEV:AMPL",
])
def test_short_long_mixed_case_and_optional_nodes_match(header: str) -> None:
    # SCPI-1999 Vol. 1 §6.2.1 (case-insensitive, short or long form) and §6.2.2 (optional nodes), from memory
    assert _match(SOURCE_VOLTAGE, header) == {}


@pytest.mark.parametrize("header", [
    "VOLTA", "VOL", "VOLTAG", "SOU:VOLT", "SOURC:VOLT", "VOLT:LEVE", "VOLT:AMPL:LEV", "LEV", "VOLT:VOLT",
])
def test_truncations_and_wrong_order_do_not_match(header: str) -> None:
    # only the exact short or long form is valid (SCPI-1999 Vol. 1 §6.2.1, from memory); order is fixed
    assert _match(SOURCE_VOLTAGE, header) is None


def test_numeric_suffix_defaults_to_one_and_is_delivered() -> None:
    # SCPI-1999 Vol. 1 §6.2.5 (from memory): a missing numeric suffix means 1
    assert _match("OUTPut<n>[:STATe]", "OUTP") == {"n": 1}
    assert _match("OUTPut<n>[:STATe]", "OUTPUT3:STAT") == {"n": 3}
    assert _match("OUTPut<n>[:STATe]", "outp12") == {"n": 12}
    assert _match("CALCulate<c>:MARKer<m>", "CALC2:MARK4") == {"c": 2, "m": 4}
    assert _match("[SENSe<s>:]VOLTage", "VOLT") == {"s": 1}
    # a suffix on a node that takes none does not match; nor does a truncated base
    assert _match("VOLTage", "VOLT2") is None
    assert _match("OUTPut<n>", "OUT2") is None


def test_suffix_range_is_parsed_but_checked_by_caller() -> None:
    nodes = parse_pattern("OUTPut<n:1-2>")
    assert (nodes[0].suffix_min, nodes[0].suffix_max) == (1, 2)
    assert match_nodes(nodes, ["OUTP7"]) == {"n": 7}


@pytest.mark.parametrize("bad", [
    "volt", "VoLTage", "[SOURce:]", "VOLTage[:LEVel", "[SOUR:VOLT]", "OUTPut<n><m>",
    "OUTPut<n>:CHANnel<n>", "VOLTage<n:3-1>", "ABCDEFGHIJKLMnop",
])
def test_malformed_patterns_are_refused(bad: str) -> None:
    with pytest.raises(ValueError, match="header pattern"):
        parse_pattern(bad)


def test_short_form_against_rule_is_warned(caplog: pytest.LogCaptureFixture) -> None:
    # VOLTage written as "VOLtage" breaks SCPI's rule: accepted (the pattern decides) but logged
    with caplog.at_level(logging.WARNING):
        (node,) = parse_pattern("VOLtage")
    assert node.short == "VOL"
    assert "differs from SCPI's rule" in caplog.text
