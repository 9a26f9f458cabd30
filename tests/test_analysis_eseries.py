"""IEC 60063 preferred-number series and nearest-value rounding."""

from __future__ import annotations

import math

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from benchctl.analysis.eseries import SERIES, nearest_preferred, series_values
from benchctl.errors import AnalysisInputError


@pytest.mark.parametrize("name,count", [("E6", 6), ("E12", 12), ("E24", 24), ("E48", 48), ("E96", 96)])
def test_values_per_decade(name: str, count: int) -> None:
    # IEC 60063 (from memory): the series number is the count of values per decade.
    values = series_values(name)
    assert len(values) == count
    assert values[0] == 1.0 and values[-1] < 10.0
    assert all(a < b for a, b in zip(values, values[1:]))


def test_known_entries_of_e24_and_e12() -> None:
    # IEC 60063 E24 (from memory): 1.0 1.1 1.2 1.3 1.5 1.6 1.8 2.0 2.2 2.4 2.7 3.0 3.3 3.6 3.9
    # 4.3 4.7 5.1 5.6 6.2 6.8 7.5 8.2 9.1; E12 = 1.0 1.2 1.5 1.8 2.2 2.7 3.3 3.9 4.7 5.6 6.8 8.2.
    e24 = series_values("E24")
    for v in (2.7, 3.0, 3.3, 3.6, 3.9, 4.3, 4.7, 5.1, 8.2, 9.1):
        assert v in e24
    e12 = series_values("E12")
    for v in (1.2, 1.8, 2.7, 3.9, 5.6, 8.2):
        assert v in e12
    assert 3.0 not in e12 and 9.1 not in e12
    assert series_values("E6") == (1.0, 1.5, 2.2, 3.3, 4.7, 6.8)


def test_e24_is_not_the_rounded_geometric_series() -> None:
    # IEC 60063 (from memory): the historic E24 values 2.7 ... 4.7 and 8.2 differ from
    # round(10**(i/24), 1) -- the table must be written out, not computed.
    geometric = [round(10 ** (i / 24), 1) for i in range(24)]
    e24 = list(series_values("E24"))
    differing = {e24[i] for i in range(24) if e24[i] != geometric[i]}
    assert differing == {2.7, 3.0, 3.3, 3.6, 3.9, 4.3, 4.7, 8.2}


@pytest.mark.parametrize("name,n", [("E48", 48), ("E96", 96)])
def test_e48_e96_are_three_digit_geometric(name: str, n: int) -> None:
    # IEC 60063 (from memory): E48 and E96 are 10**(i/n) rounded to three significant digits.
    assert series_values(name) == tuple(round(10 ** (i / n), 2) for i in range(n))


@pytest.mark.parametrize("coarse,fine", [("E6", "E12"), ("E12", "E24"), ("E48", "E96")])
def test_each_series_is_every_other_value_of_the_next(coarse: str, fine: str) -> None:
    # IEC 60063 structure (from memory): E6 subset of E12 subset of E24; E48 subset of E96.
    assert series_values(coarse) == series_values(fine)[::2]


def test_spacing_follows_the_series_tolerance() -> None:
    # IEC 60063 (from memory): neighbouring E24 values are about 10**(1/24) = 1.10 apart, so
    # +/-5 % parts cover the decade; E96 steps are about 1.024 (+/-1 % parts).
    for name, n in (("E24", 24), ("E96", 96)):
        v = series_values(name) + (10.0,)
        for a, b in zip(v, v[1:]):
            assert b / a == pytest.approx(10 ** (1 / n), rel=0.05)


@pytest.mark.parametrize(
    "value,series,expected",
    [
        (4.8e3, "E12", 4.7e3),
        (9.6, "E24", 10.0),  # log distance 0.0177 to 10 vs 0.0232 to 9.1: crosses the decade
        (0.95, "E6", 1.0),
        (1.04e-9, "E6", 1.0e-9),
        (1.098, "E12", 1.2),  # linear distance would pick 1.0; log midpoint is sqrt(1.2)=1.0954
        (1.094, "E12", 1.0),
        (1.015e5, "E96", 1.02e5),
        (2.461e-9, "E12", 2.7e-9),  # log midpoint of 2.2 and 2.7 is 2.437
        (234.4e-12, "E24", 240e-12),
        (21.93e3, "E96", 22.1e3),
        (3.3e-12, "E24", 3.3e-12),
        (6.5e6, "E24", 6.8e6),  # 0.0196 decade to 6.8 vs 0.0205 to 6.2
        (6.4e6, "E24", 6.2e6),
    ],
)
def test_nearest_preferred_in_log_distance(value: float, series: str, expected: float) -> None:
    # Common practice: round to the preferred value with the smallest ratio error.
    assert nearest_preferred(value, series) == pytest.approx(expected, rel=1e-12)


@settings(max_examples=200, deadline=None)
@given(
    value=st.floats(min_value=1e-13, max_value=1e8, allow_nan=False, allow_infinity=False),
    series=st.sampled_from(sorted(SERIES)),
)
def test_nearest_preferred_is_the_closest_member_of_any_decade(value: float, series: str) -> None:
    # Checked by brute force over all members of three decades around the value.
    got = nearest_preferred(value, series)
    mantissa = got / 10 ** math.floor(math.log10(got))
    assert any(abs(mantissa - m) < 1e-9 for m in SERIES[series] + (10.0,))
    e = math.floor(math.log10(value))
    best = min(
        abs(math.log10(m * 10.0**k / value)) for k in (e - 1, e, e + 1) for m in SERIES[series]
    )
    assert abs(math.log10(got / value)) <= best + 1e-9


@pytest.mark.parametrize("bad", [0.0, -1.0, float("nan"), float("inf")])
def test_unusable_values_are_refused(bad: float) -> None:
    with pytest.raises(AnalysisInputError, match="finite value > 0"):
        nearest_preferred(bad, "E12")


def test_unknown_series_is_refused() -> None:
    with pytest.raises(AnalysisInputError, match="E6, E12, E24, E48, E96"):
        nearest_preferred(1.0, "E13")
    assert series_values("e24") == series_values("E24")
