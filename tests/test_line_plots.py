"""The line-step, line-rejection and hold-up figures draw what the analysis found."""

from __future__ import annotations

import numpy as np

from benchctl.report.line_plots import hold_up_figure, line_rejection_figure, line_step_figure


def test_line_step_figure_marks_the_first_order_peak_and_recovery():
    # A first-order recovery after the step: v = 0.3·e^(−t/τ) (handbook step response); peak 300 mV at t = 0+,
    # back in a 10 mV band after τ·ln(0.3/0.01) = 1 ms·3.40 = 3.40 ms.
    t = np.linspace(-0.5e-3, 8e-3, 8501)
    v = np.where(t < 0, 0.0, 0.3 * np.exp(-np.clip(t, 0, None) / 1e-3))
    fig = line_step_figure(t, v, np.where(t < 0, 36.0, 48.0), band_v=0.01)
    ax = fig.axes[0]
    labels = [line.get_label() for line in ax.get_lines()]
    assert any(label.startswith("peak +300") for label in labels), labels
    recovery = [line for line in ax.get_lines() if line.get_label().startswith("back in the band")]
    assert recovery and abs(recovery[0].get_xdata()[0] - 1e3 * 1e-3 * np.log(30.0)) < 0.01


def test_line_rejection_figure_draws_noise_bounded_points_hollow():
    fig = line_rejection_figure([100, 1000, 10000], [-35.0, -28.0, -60.0], [False, False, True])
    lines = fig.axes[0].get_lines()
    hollow = [line for line in lines if line.get_markerfacecolor() == "none"]
    assert len(hollow) == 1 and list(hollow[0].get_xdata()) == [10000.0]
    assert "28" in fig.axes[0].get_title(loc="right") or any("28" in t.get_text() for t in fig.texts + fig.axes[0].texts)


def test_hold_up_figure_states_the_hold_up_between_its_marks():
    t = np.linspace(-5e-3, 40e-3, 4501)
    fig = hold_up_figure(t, np.full_like(t, 48.0), np.full_like(t, 5.0), dropout_s=-0.75e-3, exit_s=9.75e-3,
                         band_v=0.25, vout_nominal_v=5.0)
    texts = [fig.axes[0].get_title(loc=k) for k in ("left", "center", "right")] + [t.get_text() for t in fig.texts]
    assert any("10.5 ms" in s for s in texts), texts
