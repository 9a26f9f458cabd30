"""Capability and performance indices, normality note and Grubbs' outlier test, against hand
calculations and published constants."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

from benchctl.analysis.capability import D2_TWO, capability, grubbs_critical, grubbs_test


def test_two_sided_indices_by_hand():
    x = [5.01, 4.99, 5.02, 5.00, 4.98]
    c = capability(x, 4.90, 5.10)
    # Hand calculation (ISO 22514-2 indices with the normal model, from memory; see the module):
    # mean = 25.00 / 5 = 5.000; deviations +0.01 -0.01 +0.02 0 -0.02, squares sum 0.0010
    # s = sqrt(0.0010 / 4) = 0.0158114
    s = math.sqrt(0.0010 / 4)
    assert c.mean == pytest.approx(5.000, abs=1e-12) and c.sd == pytest.approx(s, rel=1e-9)
    # Pp = (U - L) / 6 s = 0.20 / 0.0948683 = 2.10819; centred, so Ppk = Pp
    assert c.pp == pytest.approx(0.20 / (6 * s), rel=1e-9) and c.pp == pytest.approx(2.10819, rel=1e-5)
    assert c.ppk == pytest.approx(c.pp, rel=1e-9)
    # moving ranges 0.02 0.03 0.02 0.02 -> MR-bar 0.0225; sigma-within = 0.0225 / 1.1284 = 0.019940
    sw = 0.0225 / (2 / math.sqrt(math.pi))
    assert c.sd_within == pytest.approx(sw, rel=1e-9)
    assert c.cp == pytest.approx(0.20 / (6 * sw), rel=1e-9) and c.cp == pytest.approx(1.67165, rel=1e-4)
    assert (c.minimum, c.maximum, c.n) == (4.98, 5.02, 5)


def test_one_sided_lower_limit_gives_only_the_k_indices():
    x = [0.861, 0.864, 0.859]
    c = capability(x, lsl=0.85)
    # mean 0.8613333; s = sqrt(((-0.0003333)^2 + 0.0026667^2 + (-0.0023333)^2) / 2) = 0.0025166
    mean = (0.861 + 0.864 + 0.859) / 3
    s = math.sqrt(sum((v - mean) ** 2 for v in x) / 2)
    assert s == pytest.approx(0.0025166, rel=1e-4)
    assert c.ppk == pytest.approx((mean - 0.85) / (3 * s), rel=1e-9)  # (x̄ − L) / 3 s = 1.5011
    assert c.ppk == pytest.approx(1.5011, rel=1e-3)
    assert c.cp is None and c.pp is None and "one-sided" in c.note and "only 3 units" in c.note


def test_d2_for_subgroups_of_two_is_the_table_value():
    # d2(n = 2) = 1.128 in the control-chart constant tables (ISO 7870-2:2013, Montgomery; from memory)
    assert D2_TWO == pytest.approx(1.128, abs=5e-4)


def test_pp_interval_is_the_chi_square_interval():
    x = [1.0, 1.2, 0.9, 1.1, 1.05, 0.95]
    c = capability(x, 0.0, 2.0)
    n = len(x)
    # Montgomery, Introduction to SQC, 6th ed., 8.3.5 (from memory): Pp·sqrt(chi2(α/2, n−1)/(n−1)) ...
    lo = c.pp * math.sqrt(stats.chi2.ppf(0.025, n - 1) / (n - 1))
    hi = c.pp * math.sqrt(stats.chi2.ppf(0.975, n - 1) / (n - 1))
    assert c.pp_interval == pytest.approx((lo, hi), rel=1e-12)
    assert c.pp_interval[0] < c.pp < c.pp_interval[1]


def test_no_spread_no_limits_and_small_n_are_said_not_invented():
    same = capability([3.0, 3.0, 3.0], 2.0, 4.0)
    assert same.cp is None and same.pp is None and "same value" in same.note
    none = capability([1.0, 2.0, 3.0])
    assert none.cpk is None and "no specification limit" in none.note
    two = capability([1.0, 2.0], 0.0, 3.0)
    assert "cannot be tested" in two.normality_note and two.normality_p is None
    assert capability([], 0.0, 1.0).n == 0
    three = capability([1.0, 2.0, 3.1], 0.0, 4.0)
    assert three.normality_p is not None and "assumed, not shown" in three.normality_note
    with pytest.raises(ValueError):
        capability([1.0, 2.0], 3.0, 1.0)


@pytest.mark.parametrize("n, alpha, table", [
    # ISO 5725-2:1994 table 5, Grubbs' single-outlier critical values (from memory)
    (4, 0.05, 1.481), (4, 0.01, 1.496), (5, 0.05, 1.715), (5, 0.01, 1.764), (10, 0.05, 2.290), (10, 0.01, 2.482),
    (3, 0.01, 1.155),
])
def test_grubbs_critical_values_match_the_table(n, alpha, table):
    assert grubbs_critical(n, alpha) == pytest.approx(table, abs=1.5e-3)


def test_grubbs_finds_the_one_odd_unit():
    x = [0.861, 0.862, 0.860, 0.861, 0.830, 0.862, 0.861]
    t = grubbs_test(x)
    assert t.is_outlier and t.index == 4
    # G = |x4 − x̄| / s by hand
    arr = np.array(x)
    assert t.g == pytest.approx(abs(arr[4] - arr.mean()) / arr.std(ddof=1), rel=1e-12)
    assert not grubbs_test([0.861, 0.862, 0.860, 0.861, 0.859]).is_outlier
    assert grubbs_test([1.0, 2.0]).index is None
