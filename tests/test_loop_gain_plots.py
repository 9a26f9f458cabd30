"""Bode plot with crossover/PM/GM marked, and the margin map, as pure figures."""

from __future__ import annotations

import math

import control
import numpy as np
import pytest
import scipy.signal as sig

from benchctl.report.loop_plots import bode_figure, margin_map_figure


def _vlines_x(ax) -> list[float]:
    return [line.get_xdata()[0] for line in ax.get_lines() if len(set(line.get_xdata())) == 1
            and len(line.get_xdata()) == 2]


def test_bode_marks_crossover_and_phase_crossover_where_python_control_finds_them():
    num, den = [25.0], [1.0, 10.0, 10.0, 10.0]
    gm, pm, w180, wc = control.margin(control.tf(num, den))  # python-control reference, rad/s
    w = np.logspace(-2, 2, 801)
    _, h = sig.freqs(num, den, worN=w)
    fig = bode_figure(w / (2 * math.pi), h)
    ax_g, ax_p = fig.axes[:2]
    marks = _vlines_x(ax_p)
    assert any(x == pytest.approx(wc / (2 * math.pi), rel=2e-3) for x in marks)
    assert any(x == pytest.approx(w180 / (2 * math.pi), rel=2e-3) for x in marks)
    texts = " ".join(t.get_text() for ax in (ax_g, ax_p) for t in ax.texts)
    assert f"PM {pm:.1f}°" in texts and f"GM {20 * math.log10(gm):.1f} dB" in texts


def test_bode_of_inverted_data_plots_t():
    w = np.logspace(-2, 2, 401)
    _, h = sig.freqs([25.0], [1.0, 10.0, 10.0, 10.0], worN=w)
    fig = bode_figure(w / (2 * math.pi), -h, phase_convention="inverted")
    phase_line = fig.axes[1].get_lines()[0]
    # T itself starts near 0 deg at low frequency (positive DC gain), not near +-180 deg.
    assert abs(phase_line.get_ydata()[0]) < 5.0


def test_margin_map_labels_each_point_and_marks_missing_crossovers():
    fig = margin_map_figure([36, 36, 75, 75, 48], [1, 5, 1, 5, 2.5], [62.6, 40.0, None, 69.1, 65.8],
                            crossover_hz=[2560, 2508, None, 4261, 3110], gain_margin_db=[34.6, 20.4, None, 22.8, 27.1])
    ax = fig.axes[0]
    labels = [t.get_text() for t in ax.texts]
    assert len(labels) == 5 and "PM n/a" in labels[2] and "fc 2.56e+03 Hz" in labels[0]
    legend = [t.get_text() for t in ax.get_legend().get_texts()]
    assert "no crossover in band" in legend and "PM < 45°" in legend  # 45 deg rule of thumb (common practice)
