"""The plot registry: a plot joins the report by registering a function.

Each entry says whether it applies to a run (``applies(run) -> bool``) and makes its
figures (``make(run) -> list[ReportFigure]``; one entry may make several, e.g. one Bode
plot per stored sweep). The report draws every entry that applies, in ``order``::

    @register_plot("ripple", title="Output ripple", order=60,
                   applies=lambda run: not run.array_rows("waveform").empty)
    def _ripple(run: RunData) -> list[ReportFigure]:
        ...
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass

from matplotlib.figure import Figure

from .run_data import RunData


@dataclass(frozen=True)
class ReportFigure:
    """One figure of the report: ``key`` becomes the PNG file name (``<nn>-<key>.png``),
    ``caption`` the text under it (plain text; it is escaped when rendered)."""

    key: str
    title: str
    caption: str
    figure: Figure


MakeFigures = Callable[[RunData], Sequence[ReportFigure]]


@dataclass(frozen=True)
class PlotEntry:
    """A registered plot: ``key`` (unique), ``title``, ``applies``, ``make``, ``order``."""

    key: str
    title: str
    applies: Callable[[RunData], bool]
    make: MakeFigures
    order: int


_ENTRIES: dict[str, PlotEntry] = {}


def register_plot(
    key: str, *, title: str, applies: Callable[[RunData], bool], order: int = 100
) -> Callable[[MakeFigures], MakeFigures]:
    """Decorator registering ``make`` as the plot ``key``; registering a key again replaces it."""
    if not key or not all(c.isalnum() or c in "-_" for c in key):
        raise ValueError(f"plot key {key!r} must be non-empty letters, digits, '-' or '_' (it names a file)")

    def deco(make: MakeFigures) -> MakeFigures:
        _ENTRIES[key] = PlotEntry(key=key, title=title, applies=applies, make=make, order=order)
        return make

    return deco


def unregister_plot(key: str) -> None:
    """Remove the plot ``key`` (no error when it is not registered)."""
    _ENTRIES.pop(key, None)


def registered_plots() -> tuple[PlotEntry, ...]:
    """Every registered plot, by ``order`` then ``key``."""
    return tuple(sorted(_ENTRIES.values(), key=lambda e: (e.order, e.key)))
