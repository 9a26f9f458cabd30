"""Waveform plots: the load transient with its metrics marked, the ripple, the CCM/DCM map over
the envelope, and the drain ring with its fitted damped sinusoid.

The ``*_figure`` functions are pure (arrays and analysis results in, a matplotlib Figure
out). Importing the module registers report entries for runs that stored ``waveform``
arrays (:mod:`benchctl.report.registry`); each entry draws at most ``MAX_FIGURES`` records.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np
from matplotlib.figure import Figure
from numpy.typing import ArrayLike

from . import style
from .registry import ReportFigure, register_plot
from .run_data import RunData

MAX_FIGURES = 6


def _time_axis(t_s: np.ndarray) -> tuple[float, str]:
    """A factor and unit that keep the time labels readable."""
    span = float(np.max(np.abs(t_s))) if t_s.size else 1.0
    for limit, factor, unit in ((1e-6, 1e9, "ns"), (1e-3, 1e6, "µs"), (1.0, 1e3, "ms")):
        if span < limit:
            return factor, unit
    return 1.0, "s"


def _fmt_time(t_s: float) -> str:
    factor, unit = _time_axis(np.array([t_s * 1.0001]))
    return f"{t_s * factor:.3g} {unit}"


def transient_figure(t_s: ArrayLike, vout_v: ArrayLike, metrics: Any, *, iout_a: ArrayLike | None = None,
                     vout_avg_v: ArrayLike | None = None, title: str = "Load transient") -> Figure:
    """Output voltage (and load current) against time with the pre-step level, the band,
    the peak and the recovery/settling instants marked. ``metrics`` is a TransientMetrics
    (of ``vout_avg_v``, the switching-period average, when it is given: drawn on top)."""
    t = np.asarray(t_s, float)
    v = np.asarray(vout_v, float)
    k, unit = _time_axis(t)
    fig, axes = style.new_figure(2 if iout_a is not None else 1, sharex=True, height_in=6.0)
    ax = axes[0]
    if vout_avg_v is None:
        ax.plot(t * k, v * 1e3, color=style.line_colour(0), linewidth=1.0, label="output (AC)")
    else:
        ax.plot(t * k, v * 1e3, color=style.line_colour(0), linewidth=0.6, alpha=0.35, label="output (AC), raw")
        ax.plot(t * k, np.asarray(vout_avg_v, float) * 1e3, color=style.line_colour(0), linewidth=1.6,
                label="averaged over one switching period")
    pre, band = metrics.pre_step_v, metrics.band_v
    ax.axhline(pre * 1e3, color=style.REFERENCE_INK, linewidth=0.8, linestyle="--", label="pre-step value")
    ax.axhspan((pre - band) * 1e3, (pre + band) * 1e3, color=style.LIMIT_INK, alpha=style.LIMIT_BAND_ALPHA,
               label=f"±{band * 1e3:.3g} mV band")
    ax.axvline(metrics.step_time_s * k, color=style.MUTED_INK, linewidth=0.8)
    ax.plot([metrics.peak_time_s * k], [metrics.peak_v * 1e3], "o", color=style.LIMIT_INK,
            label=f"peak {metrics.peak_deviation_v * 1e3:+.3g} mV")
    if metrics.recovered and metrics.recovery_after_step_s is not None:
        ax.axvline((metrics.step_time_s + metrics.recovery_after_step_s) * k, color=style.line_colour(2),
                   linestyle=":", label=f"recovered {_fmt_time(metrics.recovery_after_step_s)}")
    if metrics.settled and metrics.settling_after_step_s is not None:
        ax.axvline((metrics.step_time_s + metrics.settling_after_step_s) * k, color=style.line_colour(3),
                   linestyle="-.", label=f"settled {_fmt_time(metrics.settling_after_step_s)}")
    ax.set_ylabel("output deviation (mV)")
    style.set_title(ax, title, f"{metrics.load_step} step")
    style.legend_outside(ax)
    if iout_a is not None:
        axes[1].plot(t * k, np.asarray(iout_a, float), color=style.line_colour(1), linewidth=1.0)
        axes[1].set_ylabel("load current (A)")
    axes[-1].set_xlabel(f"time from trigger ({unit})")
    return fig


def ripple_figure(t_s: ArrayLike, vout_v: ArrayLike, measurement: Any, *, title: str = "Output ripple") -> Figure:
    """AC output voltage with the pk-pk extremes and the RMS level marked (``measurement``: RippleMeasurement)."""
    t = np.asarray(t_s, float)
    v = np.asarray(vout_v, float) - measurement.mean_v
    k, unit = _time_axis(t)
    fig, (ax,) = style.new_figure(1)
    ax.plot(t * k, v * 1e3, color=style.line_colour(0), linewidth=1.0)
    for level in (v.max(), v.min()):
        ax.axhline(level * 1e3, color=style.LIMIT_INK, linewidth=0.8, linestyle="--")
    ax.axhline(measurement.rms_ac_v * 1e3, color=style.REFERENCE_INK, linewidth=0.8, linestyle=":")
    bw = measurement.bandwidth_limit_hz
    ax.set_xlabel(f"time ({unit})")
    ax.set_ylabel("ripple (mV)")
    style.set_title(ax, title, f"{measurement.pk_pk_v * 1e3:.3g} mV pk-pk, {measurement.rms_ac_v * 1e3:.3g} mV rms"
                    + (f", BW {bw / 1e6:.3g} MHz" if bw else ""))
    return fig


def conduction_map_figure(vin_v: ArrayLike, iout_a: ArrayLike, ccm: ArrayLike, *,
                          boundary_vin_v: ArrayLike = (), boundary_iout_a: ArrayLike = (),
                          extrapolated_vin_v: ArrayLike = (), extrapolated_iout_a: ArrayLike = (),
                          title: str = "Conduction mode over the envelope") -> Figure:
    """CCM (filled) and DCM (hollow) points over line x load, with the boundary found at each line."""
    vin, iout, mode = (np.asarray(x, float) for x in (vin_v, iout_a, ccm))
    fig, (ax,) = style.new_figure(1)
    sel = mode > 0.5
    ax.plot(iout[sel], vin[sel], "o", color=style.line_colour(0), label="CCM")
    ax.plot(iout[~sel], vin[~sel], "o", color=style.line_colour(1), fillstyle="none", label="DCM")
    bv, bi = np.asarray(boundary_vin_v, float), np.asarray(boundary_iout_a, float)
    ok = np.isfinite(bi)
    if ok.any():
        order = np.argsort(bv[ok])
        ax.plot(bi[ok][order], bv[ok][order], "-", color=style.LIMIT_INK, marker="D", label="boundary (threshold)")
    ev, ei = np.asarray(extrapolated_vin_v, float), np.asarray(extrapolated_iout_a, float)
    ok = np.isfinite(ei)
    if ok.any():
        order = np.argsort(ev[ok])
        ax.plot(ei[ok][order], ev[ok][order], "--", color=style.line_colour(2), marker="s",
                label="boundary (start current → 0)")
    ax.set_xlabel("load current (A)")
    ax.set_ylabel("input voltage (V)")
    style.set_title(ax, title)
    style.legend_outside(ax)
    return fig


def ringing_figure(t_s: ArrayLike, v_v: ArrayLike, fit: Any, *, title: str = "Switch-node ringing") -> Figure:
    """Drain voltage with the fitted damped sinusoid over the fitted segment (``fit``: RingingFit)."""
    t = np.asarray(t_s, float)
    v = np.asarray(v_v, float)
    k, unit = _time_axis(t)
    fig, (ax,) = style.new_figure(1)
    ax.plot(t * k, v, color=style.line_colour(0), linewidth=1.0, label="measured")
    seg = t[fit.start_index: fit.start_index + fit.samples_used]
    tr = seg - fit.start_time_s
    model = fit.amplitude_v * np.exp(-fit.decay_rate_per_s * tr) * np.sin(
        2 * math.pi * fit.f_ring_hz * tr + fit.phase_rad) + fit.offset_v
    ax.plot(seg * k, model, color=style.LIMIT_INK, linewidth=1.2, linestyle="--",
            label=f"fit {fit.f_ring_hz / 1e6:.4g} MHz, ζ = {fit.damping_ratio:.3g}")
    ax.set_xlabel(f"time from trigger ({unit})")
    ax.set_ylabel("drain voltage (V)")
    style.set_title(ax, title, f"peak {np.max(v):.4g} V")
    style.legend_outside(ax)
    return fig


# ---------------------------------------------------------------- registration

def _records(run: RunData, kind: str) -> list[Any]:
    return run.array_records("waveform", kind, MAX_FIGURES)


def _has(kind: str):
    return lambda run: bool(_records(run, kind))


@register_plot("load-transient", title="Load transients", order=60, applies=_has("load_transient"))
def _transients(run: RunData) -> list[ReportFigure]:
    from benchctl.analysis.transient import load_step_metrics

    figs = []
    for seq, meta in _records(run, "load_transient"):
        a = run.load_array("waveform", seq)
        iout = a.columns.get("iout_a")
        vavg = a.columns.get("vout_avg_v")
        m = load_step_metrics(a["t_s"], a["vout_ac_v"] if vavg is None else vavg,
                              step_time_s=None if iout is not None else 0.0, iout_a=iout,
                              band_v=float(meta.get("band_v") or 0.05), load_step=meta.get("load_step"))
        what = f"{meta.get('vin_set_v', 0):g} V, {meta.get('iout_from_a', 0):g} → {meta.get('iout_to_a', 0):g} A"
        figs.append(ReportFigure(f"load-transient-{seq}", f"Load transient at {what}",
                                 f"Output voltage (AC) after a {meta.get('slew_a_per_s', 0):g} A/s load step; "
                                 "peak from the pre-step value, recovery into the band (common practice).",
                                 transient_figure(a["t_s"], a["vout_ac_v"], m, iout_a=iout, vout_avg_v=vavg,
                                                  title=f"Load transient, {what}")))
    return figs


@register_plot("output-ripple", title="Output ripple", order=61, applies=_has("ripple"))
def _ripples(run: RunData) -> list[ReportFigure]:
    from benchctl.analysis.ripple import output_ripple

    figs = []
    for seq, meta in _records(run, "ripple"):
        a = run.load_array("waveform", seq)
        r = output_ripple(a["t_s"], a["vout_ac_v"], fsw_hz=meta.get("fsw_hz"))
        r = type(r)(**{**r.__dict__, "bandwidth_limit_hz": meta.get("bandwidth_limit_hz")})
        what = f"{meta.get('vin_set_v', 0):g} V, {meta.get('iout_set_a', 0):g} A"
        figs.append(ReportFigure(f"output-ripple-{seq}", f"Output ripple at {what}",
                                 "AC output voltage through the scope's bandwidth limit, over whole switching periods.",
                                 ripple_figure(a["t_s"], a["vout_ac_v"], r, title=f"Output ripple, {what}")))
    return figs


def _has_mode_map(run: RunData) -> bool:
    return run.has_columns("ccm") and "tag" in run.points.columns


@register_plot("conduction-mode-map", title="Conduction mode map", order=62, applies=_has_mode_map)
def _mode_map(run: RunData) -> list[ReportFigure]:
    pts = run.points
    m = pts[pts["tag"].isin(["map", "bisection"])]
    b = pts[pts["tag"] == "boundary"]
    res = run.results
    ex = res[res["name"] == "ccm_dcm_boundary_extrapolated_a"] if not res.empty else res
    fig = conduction_map_figure(m["vin_set_v"], m["iout_set_a"], m["ccm"],
                                boundary_vin_v=b["vin_set_v"] if not b.empty else (),
                                boundary_iout_a=b["boundary_iout_a"] if not b.empty else (),
                                extrapolated_vin_v=[sc.get("vin_set_v") for sc in ex["scope"]] if len(ex) else (),
                                extrapolated_iout_a=ex["value"] if len(ex) else ())
    return [ReportFigure("conduction-mode-map", "Conduction mode over the envelope",
                         "Each measured point classified from the switch current at the start of the on-time; "
                         "the solid line joins the boundary found by bisection (start/peak threshold), the dashed one "
                         "where the CCM start current extrapolates to zero.", fig)]


@register_plot("switch-node-ringing", title="Switch-node ringing", order=63, applies=_has("switch_node"))
def _ringing(run: RunData) -> list[ReportFigure]:
    from benchctl.analysis.ringing import fit_ringing
    from benchctl.analysis.ringing import ring_start_index

    figs = []
    for seq, meta in _records(run, "switch_node"):
        a = run.load_array("waveform", seq)
        fit = fit_ringing(a["t_s"], a["v_drain_v"], start_index=ring_start_index(a["v_drain_v"]))
        what = f"{meta.get('vin_set_v', 0):g} V, {meta.get('iout_set_a', 0):g} A"
        figs.append(ReportFigure(f"switch-node-ringing-{seq}", f"Switch-node ringing at {what}",
                                 "Drain voltage at full bandwidth with a damped sinusoid fitted to the ring "
                                 "(scipy.optimize.least_squares).",
                                 ringing_figure(a["t_s"], a["v_drain_v"], fit, title=f"Switch-node ringing, {what}")))
    return figs
