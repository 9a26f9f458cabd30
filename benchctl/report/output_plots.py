"""Plots of the output impedance and of a two-output converter's cross-regulation.

``impedance_figure``: |Z| (log axes) and phase against frequency, one line per stored
sweep, the peak of each marked; ``cross_regulation_figure``: each output's voltage
against the other output's load, one line per (line voltage, own load). The
``*_figure`` functions are pure; importing the module registers report entries.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import numpy as np
from matplotlib.figure import Figure

from . import style
from .registry import ReportFigure, register_plot
from .run_data import RunData

MAX_TRACES = 8


def impedance_figure(traces: Sequence[tuple[str, Any, Any]], *, title: str = "Output impedance") -> Figure:
    """|Z| and phase against frequency; ``traces``: (label, freq_hz, complex Z in ohm) each."""
    from benchctl.analysis.output_impedance import impedance_summary, phase_deg

    fig, axes = style.new_figure(2, sharex=True)
    ax, ax2 = axes[0], axes[1]
    peaks = []
    for k, (label, f, z) in enumerate(traces):
        f, z = np.asarray(f, float), np.asarray(z, complex)
        colour = style.line_colour(k)
        ax.loglog(f, np.abs(z), color=colour, linewidth=1.0, label=label)
        ax2.semilogx(f, phase_deg(z), color=colour, linewidth=1.0)
        s = impedance_summary(f, z)
        ax.plot([s.peak_freq_hz], [s.peak_ohm], "v", color=colour, markersize=5)
        peaks.append(s.peak_ohm)
    ax.set_ylabel("|Z_out| (ohm)")
    ax2.set_ylabel("phase (deg)")
    ax2.set_xlabel("frequency (Hz)")
    sub = f"largest peak {max(peaks) * 1e3:.3g} mohm" if peaks else ""
    style.set_title(ax, title, sub)
    style.legend_outside(ax)
    return fig


def cross_regulation_figure(points: Any, *, vout1_nom_v: float | None = None, vout2_nom_v: float | None = None,
                            title: str = "Cross-regulation") -> Figure:
    """Each output against the other output's load, one line per (line, own load level)."""
    fig, axes = style.new_figure(2)
    for ax, own, other, v, nominal, name in (
            (axes[0], "iout1_set_a", "iout2_set_a", "vout1_v", vout1_nom_v, "main output"),
            (axes[1], "iout2_set_a", "iout1_set_a", "vout2_v", vout2_nom_v, "second output")):
        k = 0
        for vin in sorted(points["vin_set_v"].unique()):
            at_line = points[points["vin_set_v"] == vin]
            for level in sorted(at_line[own].unique()):
                sel = at_line[at_line[own] == level].sort_values(other)
                ax.plot(sel[other].to_numpy(float), sel[v].to_numpy(float), "o-", color=style.line_colour(k),
                        markersize=4, linewidth=1.0, label=f"{vin:g} V, own {level:g} A")
                k += 1
        if nominal:
            ax.axhline(nominal, color=style.REFERENCE_INK, linewidth=0.8, linestyle=":")
        ax.set_ylabel(f"{name} (V)")
        ax.set_xlabel("the other output's load (A)")
        style.legend_outside(ax)
    style.set_title(axes[0], title, "each output as the other's load moves")
    return fig


# ---------------------------------------------------------------- registration

def _zout_rows(run: RunData) -> list[tuple[int | None, dict]]:
    return run.array_records("zout", limit=MAX_TRACES)


@register_plot("output-impedance", title="Output impedance", order=67, applies=lambda run: bool(_zout_rows(run)))
def _impedance(run: RunData) -> list[ReportFigure]:
    traces = []
    for seq, meta in _zout_rows(run):
        a = run.load_array("zout", seq)
        label = f"{meta.get('vin_set_v', 0):g} V, {meta.get('iout_set_a', 0):g} A"
        traces.append((label, a["freq_hz"], a["re"] + 1j * a["im"]))
    return [ReportFigure("output-impedance", "Closed-loop output impedance",
                         "Z = -v_out/i_load at the output terminals by load modulation (analyzer ratio ch2/ch1, "
                         "the current monitor's pole divided out); the peak of each sweep marked.",
                         impedance_figure(traces))]


def _has_cross_points(run: RunData) -> bool:
    return run.info.procedure == "cross_regulation" and run.has_columns("vout1_v", "vout2_v")


@register_plot("cross-regulation", title="Cross-regulation", order=68, applies=_has_cross_points)
def _cross(run: RunData) -> list[ReportFigure]:
    pts = run.points
    return [ReportFigure("cross-regulation", "Cross-regulation of the two outputs",
                         "Each output's voltage against the other output's load, one line per line voltage and "
                         "own load level; dotted: nominal.",
                         cross_regulation_figure(pts, vout1_nom_v=run.float_parameter("vout1_nom_v"),
                                                 vout2_nom_v=run.float_parameter("vout2_nom_v")))]
