"""A phase convention given as text (a caller, a file, the store) is checked before use."""

from __future__ import annotations

import numpy as np
import pytest

from benchctl.analysis.margins import checked_phase_convention, loop_margins
from benchctl.errors import AnalysisInputError
from benchctl.report.loop_plots import bode_figure


def _integrator() -> tuple[np.ndarray, np.ndarray]:
    # T = wc/s with wc = 2*pi*1 kHz: |T| = 1 at 1 kHz, phase -90 deg (textbook integrator)
    f = np.logspace(1, 5, 81)
    return f, 2 * np.pi * 1e3 / (1j * 2 * np.pi * f)


def test_known_conventions_pass_and_others_are_refused_naming_the_caller():
    assert checked_phase_convention("loop") == "loop"
    assert checked_phase_convention("inverted") == "inverted"
    f, h = _integrator()
    with pytest.raises(AnalysisInputError, match=r"loop_margins: phase_convention 'negated' is unknown; use 'loop'"):
        loop_margins(f, h, phase_convention="negated")  # type: ignore[arg-type]  # wrong on purpose
    with pytest.raises(AnalysisInputError, match=r"bode_figure: phase_convention 'Loop' is unknown"):
        bode_figure(f, h, phase_convention="Loop", margins=loop_margins(f, h))


def test_inverted_data_give_the_margins_of_t():
    f, h = _integrator()
    direct = loop_margins(f, h, phase_convention="loop")
    inverted = loop_margins(f, -h, phase_convention=checked_phase_convention("inverted"))
    # an integrator crosses 0 dB at wc/(2 pi) = 1 kHz with 90 deg of phase margin (any control text)
    assert direct.crossover_hz == pytest.approx(1e3, rel=1e-3)
    assert inverted.crossover_hz == pytest.approx(1e3, rel=1e-3)
    assert inverted.worst_phase_margin_deg == pytest.approx(90.0, abs=0.1)
