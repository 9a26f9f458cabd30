"""benchctl.analysis.cross_regulation against hand-calculated figures, and the second winding's physics."""

from __future__ import annotations

import pytest

from benchctl.analysis.cross_regulation import output_regulation
from benchctl.errors import AnalysisInputError
from benchctl.simulated_instruments.converter import ConverterModel, ManualClock
from benchctl.simulated_instruments.converter.designs import DESIGNS, SECOND_OUTPUTS
from benchctl.simulated_instruments.converter.second_output import SecondOutput


def test_cross_and_load_regulation_of_a_hand_calculated_grid():
    # Second output of a two-output supply, nominal 3.3 V; by hand (common practice definitions):
    #   own 0.1 A: other 0.5 A -> 3.20 V, other 5 A -> 3.33 V  => cross change +0.13 V
    #   own 1.5 A: other 0.5 A -> 3.10 V, other 5 A -> 3.22 V  => cross change +0.12 V
    #   worst cross = +0.13 V = +3.939 % of 3.3 V, at own 0.1 A
    #   load change with other 0.5 A: 3.10 - 3.20 = -0.10 V; with other 5 A: 3.22 - 3.33 = -0.11 V
    #   worst load = -0.11 V = -3.333 %, window = max |V - 3.3| = 0.20 V = 6.061 %
    own = [0.1, 0.1, 1.5, 1.5]
    other = [0.5, 5.0, 0.5, 5.0]
    v = [3.20, 3.33, 3.10, 3.22]
    r = output_regulation(own, other, v, nominal_v=3.3)
    assert r.cross_delta_v == pytest.approx(0.13) and r.cross_at_own_a == 0.1
    assert r.cross_pct == pytest.approx(100 * 0.13 / 3.3)
    assert r.load_delta_v == pytest.approx(-0.11) and r.load_at_other_a == 5.0
    assert r.load_pct == pytest.approx(-100 * 0.11 / 3.3)
    assert r.window_pct == pytest.approx(100 * 0.2 / 3.3)
    assert (r.v_min_v, r.v_max_v) == (3.10, 3.33)
    assert sorted(r.cross_changes) == [(0.1, pytest.approx(0.13)), (1.5, pytest.approx(0.12))]


def test_repeated_points_are_averaged_and_a_missing_pair_is_not_found():
    r = output_regulation([1.0, 1.0, 1.0], [0.0, 0.0, 2.0], [5.00, 5.02, 5.05], nominal_v=5.0)
    assert r.cross_delta_v == pytest.approx(5.05 - 5.01)
    # only one own level: no load-regulation pair exists -> None, never 0
    assert r.load_delta_v is None and r.load_pct is None
    with pytest.raises(AnalysisInputError):
        output_regulation([1.0], [1.0], [5.0], nominal_v=5.0)
    with pytest.raises(AnalysisInputError):
        output_regulation([1.0, 2.0], [1.0, 1.0], [5.0, 5.0], nominal_v=0.0)


def test_second_output_voltage_by_hand_at_a_ccm_point():
    # First-order multiple-output flyback (Billings & Morey, Switching Power Supply Handbook, 3rd ed.,
    # from memory; commutation drop common practice), by hand from the design values at the model's
    # own duty D (CCM: conduction fraction 1 - D, leakage factor 1):
    #   Vm = V1s + Vf1 + r1·I1/(1-D) + L1·fsw·I1/(1-D)^2,  V2 = N·Vm - Vf2 - r2·I2/(1-D) - L2·fsw·I2/(1-D)^2
    design = DESIGNS["flyback-48v-5v-3v3"]
    w = SECOND_OUTPUTS[design.name]
    model = ConverterModel(design, clock=ManualClock())
    second = SecondOutput(model, w)
    model.set_source(48.0, 1.389, True)
    model.set_load("CC", 5.0, True)
    second.set_load("CC", 1.0, True)
    op = model.operating_point()
    assert op.conduction_mode == "CCM"
    dp = 1.0 - op.duty
    ls = design.losses
    i1 = op.iout_a + op.vsense_v / ls.sense_divider_ohm
    vm = op.vsense_v + 0.30 + (0.006 + 0.010) * i1 / dp + 40e-9 * 150e3 * i1 / dp ** 2
    v2 = (2 / 3) * vm - 0.30 - (0.008 + 0.020) * 1.0 / dp - 60e-9 * 150e3 * 1.0 / dp ** 2
    got, i2 = second.steady_state()
    assert i2 == 1.0
    assert got == pytest.approx(v2, abs=1e-9)
    # the stage carries the second output's ampere-turns: N·I2 more than the main's current
    assert model.auxiliary_stage_current_a == pytest.approx(2 / 3)


def test_the_second_output_loads_the_stage_and_the_main_stays_regulated():
    design = DESIGNS["flyback-48v-5v-3v3"]
    model = ConverterModel(design, clock=ManualClock())
    second = SecondOutput(model, SECOND_OUTPUTS[design.name])
    model.set_source(48.0, 1.389, True)
    model.set_load("CC", 2.5, True)
    before = model.operating_point()
    second.set_load("CC", 1.5, True)
    after = model.operating_point()
    v2, i2 = second.steady_state()
    # energy balance: the input delivers the second output's power too (and a little more loss)
    assert after.pin_w - before.pin_w > v2 * i2
    assert after.iout_a == pytest.approx(2.5, abs=1e-9)            # the main's terminal current is its own
    assert abs(after.vout_v - before.vout_v) < 2e-3                  # regulated: a finite loop gain's error only
    assert after.duty > before.duty
