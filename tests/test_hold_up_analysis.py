"""Hold-up from a record, against the energy balance ½·C·(V1² − V2²) = P·t (common practice, any
power-supply design text) worked for a synthetic constant-power discharge."""

from __future__ import annotations

import numpy as np
import pytest

from benchctl.analysis.hold_up import energy_hold_up_s, hold_up_metrics

C_F, P_W, V1_V, V2_V, T0_S = 470e-6, 25.0, 48.0, 30.0, 5e-3


def _record(end_s: float, dt_s: float = 1e-6):
    """Input: V1 until T0, then v² = V1² − 2P(t − T0)/C (constant power out of C); the output stays at 5 V
    until the input reaches V2, then collapses."""
    t = np.arange(0.0, end_s, dt_s)
    v2 = np.where(t < T0_S, V1_V ** 2, V1_V ** 2 - 2 * P_W * (t - T0_S) / C_F)
    vin = np.sqrt(np.clip(v2, 0.0, None))
    vout = np.where(vin > V2_V, 5.0, 0.0)
    return t, vin, vout


def test_hold_up_is_the_energy_balance_of_the_bulk_capacitor():
    # by hand: t = ½·470 µF·(48² − 30²)/25 W = 13.198 ms after the dropout at 5 ms
    expect = 0.5 * C_F * (V1_V ** 2 - V2_V ** 2) / P_W
    assert energy_hold_up_s(C_F, V1_V, V2_V, P_W) == pytest.approx(expect) == pytest.approx(13.198e-3, abs=1e-6)
    m = hold_up_metrics(*_record(30e-3), band_v=0.25)
    assert m.dropout_s == pytest.approx(T0_S, abs=2e-6)           # the v² line meets V1² at the dropout
    assert m.hold_up_s == pytest.approx(expect, abs=3e-6)         # within the 1 µs grid of the record
    assert m.at_least_s is None


def test_a_record_that_ends_first_gives_a_lower_bound_and_says_so():
    m = hold_up_metrics(*_record(12e-3), band_v=0.25)
    assert m.hold_up_s is None and m.exit_s is None
    # the output was still in band at the record's end (12 ms): the hold-up is at least 12 − 5 = 7 ms
    assert m.at_least_s == pytest.approx(12e-3 - 1e-6 - T0_S, abs=3e-6)
    assert "at least" in m.reason and "record longer" in m.reason
