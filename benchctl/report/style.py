"""The look of benchctl plots: palette, typography, figure size, axis styling.

Line colours are the hues of the colour-universal-design set of M. Okabe and K. Ito
("Color Universal Design: how to make figures and presentations that are friendly to
colorblind people", J*Fly, 2008), with the light ones darkened so that every line
reaches a contrast of at least 3:1 against the white background (WCAG 2.1, success
criterion 1.4.11 "Non-text contrast") and stays apart (CIE 1976 colour difference of
10 or more) under simulated protanopia, deuteranopia and tritanopia (Machado, Oliveira
and Fernandes, IEEE TVCG 15(6), 2009). Everything else is quiet: a warm dark-grey
ink for text, a pale dotted grid, no top or right spine.
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Final, TypedDict

from matplotlib.artist import Artist
from matplotlib.axes import Axes
from matplotlib.figure import Figure

if TYPE_CHECKING:
    from matplotlib.typing import FillStyleType, LineStyleType, MarkerType, RcKeyType

FIG_WIDTH_IN: Final = 8.0
FIG_HEIGHT_IN: Final = 5.0
FIG_DPI: Final = 110

BACKGROUND: Final = "#ffffff"
INK: Final = "#2b2d31"  # text, spines, tick labels
MUTED_INK: Final = "#6b6f76"  # captions, secondary annotations
GRID: Final = "#dcdfe4"
LIMIT_INK: Final = "#9b1c31"  # limit lines: a deep red-violet, not used for data
LIMIT_BAND_ALPHA: Final = 0.07
REFERENCE_INK: Final = "#8a8f98"  # nominal values and other references

# One accent per line voltage, in this order (see the module docstring).
LINE_COLOURS: Final[tuple[str, ...]] = (
    "#0072b2",  # blue
    "#c45400",  # vermilion, darkened
    "#00855f",  # bluish green, darkened
    "#b04a8a",  # reddish purple, darkened
    "#2b2d31",  # ink
    "#6b4c00",  # orange, darkened to a brown (an ochre is confused with vermilion by protans)
)

FONT_FAMILY: Final = "DejaVu Sans"
TITLE_SIZE_PT: Final = 13.0
LABEL_SIZE_PT: Final = 11.0
TICK_SIZE_PT: Final = 9.5
LEGEND_SIZE_PT: Final = 9.0
CAPTION_SIZE_PT: Final = 8.5

LINE_WIDTH_PT: Final = 1.8
MARKER_SIZE_PT: Final = 5.5



class PassStyle(TypedDict, total=False):
    """Keyword arguments of ``Axes.plot`` and ``Line2D`` that tell one load pass from the other."""

    linestyle: LineStyleType
    marker: MarkerType
    fillstyle: FillStyleType


class RingStyle(PassStyle, total=False):
    """A :class:`PassStyle` with its own marker size and edge width (pt)."""

    markersize: float
    markeredgewidth: float


# Ascending-pass points are filled; descending-pass points are hollow on a dotted line.
ASCENDING_STYLE: Final[PassStyle] = {"linestyle": "-", "marker": "o", "fillstyle": "full"}
DESCENDING_STYLE: Final[PassStyle] = {"linestyle": ":", "marker": "D", "fillstyle": "none"}
COMPARE_LINESTYLE: Final = (0, (5, 3))  # second run of a comparison: dashed

# Points that did not settle or whose setpoints were not verified: the data marker is drawn
# hollow and ringed in a dark amber (6:1 against white, WCAG 2.1 1.4.11), never the limit ink.
DOUBTFUL_INK: Final = "#8a5a00"
DOUBTFUL_RING: Final[RingStyle] = {"linestyle": "none", "marker": "o", "fillstyle": "none", "markersize": 12.0,
                        "markeredgewidth": 1.5}
# Error bars: the expanded uncertainty U (k = 2) of the plotted figure.
ERRORBAR_WIDTH_PT: Final = 1.0
ERRORBAR_CAPSIZE_PT: Final = 2.5

_RC: Final[dict[RcKeyType, str | float]] = {
    "font.family": FONT_FAMILY,
    "font.size": LABEL_SIZE_PT,
    "text.color": INK,
    "axes.labelcolor": INK,
    "axes.edgecolor": INK,
    "xtick.color": INK,
    "ytick.color": INK,
}


def line_colour(index: int) -> str:
    """The accent colour of the ``index``-th curve (wraps around after the last one)."""
    return LINE_COLOURS[index % len(LINE_COLOURS)]


def new_figure(n_rows: int = 1, *, height_in: float = FIG_HEIGHT_IN, sharex: bool = False) -> tuple[Figure, list[Axes]]:
    """A white figure of FIG_WIDTH_IN x ``height_in`` inches at FIG_DPI with ``n_rows`` styled axes.

    Uses :class:`matplotlib.figure.Figure` directly (no pyplot global state) with the
    constrained layout engine, so legends placed outside the axes stay on the canvas.
    """
    fig = Figure(figsize=(FIG_WIDTH_IN, height_in), dpi=FIG_DPI, facecolor=BACKGROUND, layout="constrained")
    axes_array = fig.subplots(n_rows, 1, sharex=sharex, squeeze=False)
    axes = [ax for row in axes_array for ax in row]
    for ax in axes:
        style_axes(ax)
    return fig, axes


def style_axes(ax: Axes) -> None:
    """Apply the benchctl look to one axes: white face, pale dotted grid, open top/right."""
    ax.set_facecolor(BACKGROUND)
    for side in ("top", "right"):
        ax.spines[side].set_visible(False)
    for side in ("left", "bottom"):
        ax.spines[side].set_color(INK)
        ax.spines[side].set_linewidth(0.8)
    ax.grid(True, which="major", color=GRID, linestyle=(0, (1, 2)), linewidth=0.9)
    ax.set_axisbelow(True)
    ax.tick_params(labelsize=TICK_SIZE_PT, colors=INK, length=3.5, width=0.8)
    ax.xaxis.label.set_fontsize(LABEL_SIZE_PT)
    ax.yaxis.label.set_fontsize(LABEL_SIZE_PT)
    ax.xaxis.label.set_color(INK)
    ax.yaxis.label.set_color(INK)


def set_title(ax: Axes, title: str, subtitle: str = "") -> None:
    """Left-aligned bold title with an optional muted subtitle on the same line."""
    ax.set_title(title, loc="left", fontsize=TITLE_SIZE_PT, fontweight="bold", color=INK, pad=10)
    if subtitle:
        ax.set_title(subtitle, loc="right", fontsize=CAPTION_SIZE_PT, color=MUTED_INK, pad=10)


def legend_outside(ax: Axes, title: str = "", handles: list[Artist] | None = None, labels: list[str] | None = None,
                   *, anchor_x: float = 1.02) -> None:
    """A legend to the right of the data area, so it never hides a curve (``anchor_x`` in axes
    fractions: further right past a second y axis' labels)."""
    kwargs = {} if handles is None else {"handles": handles, "labels": labels}
    leg = ax.legend(
        **kwargs,
        loc="upper left",
        bbox_to_anchor=(anchor_x, 1.0),
        borderaxespad=0.0,
        frameon=False,
        fontsize=LEGEND_SIZE_PT,
        title=title or None,
        title_fontsize=LEGEND_SIZE_PT,
        alignment="left",
    )
    if leg.get_title() is not None:
        leg.get_title().set_color(MUTED_INK)


def matplotlib_rc() -> dict[RcKeyType, str | float]:
    """rc settings to wrap figure creation in (``with matplotlib.rc_context(matplotlib_rc())``)."""
    return dict(_RC)
