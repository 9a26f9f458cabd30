"""Waveform plots: pure functions return Figures with the metrics marked; registered with the report."""

from __future__ import annotations

import math

import numpy as np
from matplotlib.figure import Figure

from benchctl.analysis.ringing import fit_ringing
from benchctl.analysis.ripple import output_ripple
from benchctl.analysis.transient import load_step_metrics
from benchctl.report import registered_plots
from benchctl.report import waveform_plots as wp


def _labels(fig: Figure) -> list[str]:
    return [t.get_text() for ax in fig.axes if ax.get_legend() for t in ax.get_legend().get_texts()]


def test_transient_figure_marks_peak_band_and_recovery():
    t = np.linspace(-1e-4, 1e-3, 2000)
    v = np.where(t >= 0, -0.1 * np.exp(-np.maximum(t, 0) / 1e-4), 0.0)
    m = load_step_metrics(t, v, step_time_s=0.0, band_v=0.01)
    fig = wp.transient_figure(t, v, m, iout_a=np.where(t >= 0, 5.0, 2.5))
    labels = _labels(fig)
    assert any(s.startswith("peak -100 mV") or s.startswith("peak -99.") for s in labels)
    assert any("±10 mV band" in s for s in labels)
    # recovery of an exponential into +/-band: tau ln(A/band) = 230 us (common practice)
    assert any(s == f"recovered {1e-4 * math.log(10) * 1e6:.3g} µs" for s in labels)
    assert len(fig.axes) == 2


def test_ripple_and_ringing_figures():
    t = np.arange(2000) * 5e-9
    v = 0.01 * np.sin(2 * math.pi * 1e6 * t)
    fig = wp.ripple_figure(t, v, output_ripple(t, v, fsw_hz=1e6))
    assert "20 mV pk-pk" in fig.axes[0].get_title(loc="right")
    tr = np.arange(3000) * 0.2e-9
    ring = 74.5 + 60 * np.exp(-2e6 * tr) * np.cos(2 * math.pi * 8e6 * tr)
    fit = fit_ringing(tr, ring, start_index=0)
    fig = wp.ringing_figure(tr, ring, fit)
    assert any("8 MHz" in s for s in _labels(fig))


def test_conduction_map_and_registration():
    fig = wp.conduction_map_figure([36, 36, 75, 75], [0.3, 4, 0.3, 4], [0, 1, 0, 1],
                                   boundary_vin_v=[36, 75], boundary_iout_a=[0.9, 1.3])
    assert _labels(fig) == ["CCM", "DCM", "boundary (threshold)"]
    keys = {e.key for e in registered_plots()}
    assert {"load-transient", "output-ripple", "conduction-mode-map", "switch-node-ringing"} <= keys
