"""The run report: plots (matplotlib, Agg) and one self-contained HTML page.

::

    from benchctl.report import build_report
    files = build_report(store, "latest")          # -> ReportFiles(html_path, png_paths, ...)

Modules: :mod:`.build` (the report of one run), :mod:`.plots` (one pure function per
plot), :mod:`.registry` (plots join the report by registering), :mod:`.standard_plots`
(the plots every report offers), :mod:`.html` (the page), :mod:`.style` (the look),
:mod:`.limit_marks` (limit-check results), :mod:`.result_summary` (results table),
:mod:`.run_data` (one run read from the store).
"""

from __future__ import annotations

from .build import ReportFiles, build_report, default_out_dir
from .comparison import build_comparison_report
from .registry import PlotEntry, ReportFigure, register_plot, registered_plots, unregister_plot
from .run_data import RunData

__all__ = [
    "PlotEntry",
    "ReportFigure",
    "ReportFiles",
    "RunData",
    "build_comparison_report",
    "build_report",
    "default_out_dir",
    "register_plot",
    "registered_plots",
    "unregister_plot",
]
