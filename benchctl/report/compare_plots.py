"""Difference plots of a comparison: the change B − A of one quantity against load, one curve
per line voltage, with the tolerance band that flags a change drawn around zero.

Pure: deltas in, a :class:`matplotlib.figure.Figure` out. Efficiency is shown in
percentage points (its stored unit is a fraction). Changes beyond the tolerance are ringed
in the limit colour; the band is the one tolerance applied to every delta of the quantity
(:class:`benchctl.compare.Tolerance`), so what is drawn is what flagged.
"""

from __future__ import annotations

from collections.abc import Sequence

import matplotlib
import numpy as np
from matplotlib.figure import Figure

from benchctl.compare import Delta, Tolerance

from . import style

#: Display scale and unit text of quantities stored as fractions.
_SCALE = {"efficiency": (100.0, "%-points")}
_LOAD_KEYS = ("iout_set_a", "iout_a")
_LINE_KEYS = ("vin_set_v", "vin_v")


def scale_of(quantity: str, unit: str = "") -> tuple[float, str]:
    """(factor, unit text) a quantity's change is drawn in."""
    if quantity in _SCALE:
        return _SCALE[quantity]
    from benchctl.units import unit_from_name

    return 1.0, unit or unit_from_name(quantity)


def can_draw(deltas: Sequence[Delta]) -> bool:
    """True when the deltas have a load setpoint to draw against."""
    return any(any(k in d.where for k in _LOAD_KEYS) for d in deltas)


def difference_figure(quantity: str, deltas: Sequence[Delta], tolerance: Tolerance, *, title: str,
                      subtitle: str = "", unit: str = "") -> Figure:
    """The change of ``quantity`` against load per line voltage, with ±tolerance shaded."""
    factor, unit_text = scale_of(quantity, unit)
    with matplotlib.rc_context(style.matplotlib_rc()):
        fig, (ax,) = style.new_figure()
        rows = [d for d in deltas if d.quantity == quantity and any(k in d.where for k in _LOAD_KEYS)]
        load_key = next((k for k in _LOAD_KEYS if any(k in d.where for d in rows)), _LOAD_KEYS[0])
        line_key = next((k for k in _LINE_KEYS if any(k in d.where for d in rows)), None)
        lines = sorted({round(d.where.get(line_key, np.nan), 3) for d in rows}) if line_key else [np.nan]
        xs_all = [d.where[load_key] for d in rows if load_key in d.where]
        x_lo, x_hi = (min(xs_all), max(xs_all)) if xs_all else (0.0, 1.0)
        pad = 0.03 * ((x_hi - x_lo) or 1.0)
        band = tolerance.value * factor
        ax.axhspan(-band, band, color=style.LINE_COLOURS[0], alpha=0.12, linewidth=0,
                   label=f"tolerance ±{band:.3g} {unit_text}")
        ax.axhline(0.0, color=style.MUTED_INK, linewidth=0.8)
        n_beyond = 0
        for i, vin in enumerate(lines):
            sel = [d for d in rows if line_key is None or round(d.where.get(line_key, np.nan), 3) == vin]
            sel.sort(key=lambda d: d.where[load_key])
            x = np.array([d.where[load_key] for d in sel])
            y = np.array([d.delta * factor for d in sel])
            colour = style.line_colour(i)
            label = f"{vin:g} V" if line_key and np.isfinite(vin) else quantity
            ax.plot(x, y, marker="o", color=colour, linewidth=1.6, markersize=5, label=label)
            out = np.array([d.flagged for d in sel], dtype=bool)
            if out.any():
                n_beyond += int(out.sum())
                ax.plot(x[out], y[out], linestyle="none", marker="o", markersize=11, fillstyle="none",
                        markeredgewidth=1.5, color=style.LIMIT_INK)
        if n_beyond:
            ax.plot([], [], linestyle="none", marker="o", markersize=11, fillstyle="none", markeredgewidth=1.5,
                    color=style.LIMIT_INK, label=f"beyond tolerance ({n_beyond})")
        ax.set_xlim(x_lo - pad, x_hi + pad)
        ax.set_xlabel("output current setpoint (A)" if load_key == "iout_set_a" else "output current (A)")
        ax.set_ylabel(f"change B − A ({unit_text})")
        style.set_title(ax, title, subtitle)
        style.legend_outside(ax, "line voltage")
    return fig


__all__ = ["can_draw", "difference_figure", "scale_of"]
