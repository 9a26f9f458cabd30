"""benchctl.analysis.output_impedance against python-control and a textbook resonance."""

from __future__ import annotations

import math

import control
import numpy as np
import pytest

from benchctl.analysis.output_impedance import (closed_loop_impedance, impedance_from_ratio, impedance_summary,
                                                magnitude_db_ohm)
from benchctl.errors import AnalysisInputError


def _tf_response(tf: control.TransferFunction, f: np.ndarray) -> np.ndarray:
    return np.asarray(tf(2j * math.pi * f), dtype=complex).ravel()


def test_closed_loop_impedance_matches_python_control_feedback():
    # A buck-like plant: Zout,open = (r + sL) || (1/sC) || R and T = K·wz/(s+...) -- values arbitrary.
    s = control.tf("s")
    r, l, c, rl = 0.01, 10e-6, 200e-6, 1.0
    z_open = 1 / (1 / (r + s * l) + s * c + 1 / rl)
    loop = 2e4 * (1 + s / 2e3) / (s * (1 + s / 6e4) ** 2)
    f = np.geomspace(10, 1e6, 200)
    # python-control: Zout,closed = Zout,open · 1/(1 + T) (control.feedback(1, T) is 1/(1 + T))
    reference = _tf_response(z_open * control.feedback(1, loop), f)
    ours = closed_loop_impedance(_tf_response(z_open, f), _tf_response(loop, f))
    assert np.allclose(ours, reference, rtol=1e-9, atol=0.0)


def test_closed_loop_impedance_refuses_mismatched_grids():
    with pytest.raises(AnalysisInputError):
        closed_loop_impedance(np.ones(3), np.ones(4))


def test_peak_of_a_parallel_rlc_is_r_at_its_resonance():
    # Textbook parallel resonance (e.g. Nilsson & Riedel, Electric Circuits, 10th ed., ch. 14): the
    # admittance 1/R + 1/(jwL) + jwC is real at w0 = 1/sqrt(LC), where |Z| = R is the maximum.
    r, l, c = 0.08, 12e-6, 660e-6
    f0 = 1.0 / (2.0 * math.pi * math.sqrt(l * c))
    f = np.geomspace(10, 100e3, 121)
    w = 2j * math.pi * f
    z = 1.0 / (1.0 / r + 1.0 / (w * l) + w * c)
    s = impedance_summary(f, z)
    assert not s.peak_at_band_edge and s.flags == ()
    # parabola on log|Z| through 3 samples 1/30 decade apart: well inside 1 %
    assert s.peak_ohm == pytest.approx(r, rel=0.01)
    assert s.peak_freq_hz == pytest.approx(f0, rel=0.01)
    assert s.low_freq_ohm == pytest.approx(abs(z[0]))


def test_a_peak_at_the_end_of_the_band_is_flagged():
    r, l, c = 0.08, 12e-6, 660e-6
    f = np.geomspace(10, 500, 40)              # resonance (~1.8 kHz) above the band
    w = 2j * math.pi * f
    s = impedance_summary(f, 1.0 / (1.0 / r + 1.0 / (w * l) + w * c))
    assert s.peak_at_band_edge and s.flags == ("at_band_edge",)
    assert "band edge" in s.notes[0]


def test_ratio_to_impedance_sign_and_monitor_pole():
    f = np.geomspace(100, 1e6, 50)
    z_true = 0.01 + 1j * 2 * math.pi * f * 1e-9
    f_mon = 1e6
    # what the analyzer reports: v/i_monitored with i drawn out of the converter and a one-pole monitor
    h = -z_true * (1 + 1j * f / f_mon)
    assert np.allclose(impedance_from_ratio(f, h, monitor_bandwidth_hz=f_mon), z_true, rtol=1e-12)
    uncorrected = impedance_from_ratio(f, h)
    assert abs(magnitude_db_ohm(uncorrected)[-1] - magnitude_db_ohm(z_true)[-1]) == pytest.approx(
        10 * math.log10(2.0), rel=1e-9)      # |1 + j| = sqrt(2): +3.01 dB at the monitor's bandwidth
    with pytest.raises(AnalysisInputError):
        impedance_from_ratio(f, h, monitor_bandwidth_hz=-1.0)
