"""The model's line-to-output truth against an independent build of Gvg/(1+T) with scipy.signal."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import signal

from benchctl.simulated_instruments.converter import DESIGNS, ConverterModel
from benchctl.simulated_instruments.converter.clock import ManualClock


def _regulating(name: str, vin_v: float, iout_a: float) -> ConverterModel:
    d = DESIGNS[name]
    clock = ManualClock()
    m = ConverterModel(d, clock=clock)
    m.set_load("CC", iout_a, True)
    m.set_source(vin_v, 10.0, True)
    clock.advance(2.0)
    assert m.operating_point().state == "regulating"
    return m


def test_buck_ccm_closed_loop_line_transfer_is_d_h_over_one_plus_t():
    # Erickson & Maksimović, Fundamentals of Power Electronics, 2nd ed., ch. 8 (Table 8.2) and ch. 9:
    # Gvg = D·(1 + s·rc·C)/(LC(1 + rc/R)s² + (L/R + rc·C)s + 1), closed loop Gvg/(1 + T)
    m = _regulating("buck-12v-1v2", 12.0, 5.0)
    op, st = m.operating_point(), m.design.stage
    assert op.conduction_mode == "CCM"
    r, c, l, rc = op.r_load_eff_ohm, st.c_out_f, st.inductance_h, st.esr_ohm
    gvg = signal.lti([op.duty * rc * c, op.duty], [l * c * (1 + rc / r), l / r + rc * c, 1.0])
    loop = m.loop_transfer()
    f = np.logspace(1, 5, 25)
    w = 2 * np.pi * f
    _, h_gvg = signal.freqs(gvg.num, gvg.den, worN=w)
    _, h_t = signal.freqs(loop.num, loop.den, worN=w)
    expected = h_gvg / (1 + h_t)
    got = m.line_to_output(f)
    np.testing.assert_allclose(20 * np.log10(np.abs(got)), 20 * np.log10(np.abs(expected)), atol=1e-6)
    assert m.line_to_output_transfer().dc_gain() == pytest.approx(op.duty / (1 + loop.dc_gain()), rel=1e-9)


def test_flyback_line_step_moves_the_output_by_the_step_response_of_gvg_cl():
    m = _regulating("flyback-48v-5v", 36.0, 2.0)
    t0 = m.clock.now_s()
    v_before = m.terminals().output_v
    m.set_source(48.0, 10.0, True)
    step = m.line_step_truth()
    assert step is not None and step.dv_v == pytest.approx(12.0)
    tf = m.line_to_output_transfer()
    t = np.linspace(0.0, 5e-3, 501)
    # scipy.signal.step of the closed-loop Gvg (the same rational function), times the step size
    _, y = signal.step((tf.num, tf.den), T=t)
    model = m.terminal_series(t0 + t)[4] - v_before
    # The model adds its large-signal static shift (new minus old operating point) in place of the
    # small-signal G(0)·ΔV (about 0.5 mV for 12 V) and lets the difference decay with the loop's time
    # constant: 0.15 mV (0.04 % of the 0.38 V peak) bounds that.
    np.testing.assert_allclose(model[1:], 12.0 * y[1:], atol=1.5e-4)
    assert np.max(np.abs(model)) > 0.05       # a real transient (hundreds of mV for a 12 V step), not a no-op
