"""Waveform CSV files from any scope: a time column in seconds and one or more value columns.

Format: an optional block of comment lines starting with ``#``, one header row of column
names, then one row per sample, comma separated. The first column is the time in
seconds (its name is free: ``t_s``, ``time``, ``Time (s)`` ...); the others are values
in SI units (V, A). Errors name the file, the row (1-based, as an editor shows it) and
the column, and say what to change.
"""

from __future__ import annotations

import csv
import io
import math
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from numpy.typing import NDArray

from benchctl.errors import AnalysisInputError


@dataclass(frozen=True, eq=False)
class WaveformTable:
    """A waveform read from a CSV file: ``t_s`` (s) and ``columns`` by header name."""

    path: str
    time_column: str
    t_s: NDArray[np.float64]
    columns: dict[str, NDArray[np.float64]]

    def column(self, name: str | None = None, *, position: int = 0) -> tuple[str, NDArray[np.float64]]:
        """The column called ``name``, or the value column at ``position`` (0 = first after time)."""
        names = list(self.columns)
        if name is not None:
            if name not in self.columns:
                raise AnalysisInputError(f"{self.path}: no column {name!r}; columns are: {', '.join(names)}")
            return name, self.columns[name]
        if position >= len(names):
            raise AnalysisInputError(
                f"{self.path}: needs at least {position + 1} value column(s) after the time column; "
                f"it has {len(names)} ({', '.join(names) or 'none'})")
        return names[position], self.columns[names[position]]


def read_waveform_csv(path: str | Path, *, min_rows: int = 2) -> WaveformTable:
    """Read a waveform CSV (see the module docstring); raises AnalysisInputError with row and column."""
    where = str(path)
    try:
        text = Path(path).read_text(encoding="utf-8-sig")
    except FileNotFoundError:
        raise AnalysisInputError(f"{where}: file not found; give the path of a waveform CSV file") from None
    except UnicodeDecodeError as exc:
        raise AnalysisInputError(f"{where}: not a text file ({exc}); export the waveform as CSV") from None
    except OSError as exc:
        raise AnalysisInputError(f"{where}: cannot be read: {exc}") from exc
    return parse_waveform_csv(text, where=where, min_rows=min_rows)


def parse_waveform_csv(text: str, *, where: str = "CSV text", min_rows: int = 2) -> WaveformTable:
    """Parse waveform CSV text; ``where`` names it in errors."""
    lines = text.splitlines()
    first = 0
    while first < len(lines) and (not lines[first].strip() or lines[first].lstrip().startswith("#")):
        first += 1
    if first == len(lines):
        raise AnalysisInputError(f"{where}: no header row; the first line must name the columns, e.g. t_s,vout_v")
    reader = csv.reader(io.StringIO("\n".join(lines[first:])))
    header = [h.strip() for h in next(reader)]
    header_row = first + 1
    if len(header) < 2:
        raise AnalysisInputError(
            f"{where} row {header_row}: header {lines[first]!r} has {len(header)} column(s); need a time column "
            "and at least one value column separated by commas")
    for k, name in enumerate(header):
        if not name:
            raise AnalysisInputError(f"{where} row {header_row}: column {k + 1} has no name; name every column")
        try:
            float(name)
        except ValueError:
            continue
        raise AnalysisInputError(
            f"{where} row {header_row}: column {k + 1} is named {name!r}, a number; the first row must be a "
            "header of column names (add one, e.g. t_s,vout_v)")
    dupes = sorted({h for h in header if header.count(h) > 1})
    if dupes:
        raise AnalysisInputError(f"{where} row {header_row}: duplicate column name(s) {', '.join(dupes)}")
    rows: list[list[float]] = []
    for offset, raw in enumerate(reader):
        row_no = header_row + 1 + offset
        if not raw or all(not c.strip() for c in raw):
            continue
        if raw[0].lstrip().startswith("#"):
            continue
        if len(raw) != len(header):
            raise AnalysisInputError(
                f"{where} row {row_no}: {len(raw)} field(s) but the header has {len(header)}; "
                "every row needs one value per column")
        values = []
        for k, cell in enumerate(raw):
            try:
                value = float(cell)
            except ValueError:
                raise AnalysisInputError(
                    f"{where} row {row_no}, column {k + 1} ({header[k]}): {cell.strip()!r} is not a number; "
                    "use plain numbers in SI units (a dot as decimal separator)") from None
            if not math.isfinite(value):
                raise AnalysisInputError(
                    f"{where} row {row_no}, column {k + 1} ({header[k]}): {cell.strip()!r} is not finite; "
                    "remove or interpolate the sample")
            values.append(value)
        rows.append(values)
    if len(rows) < min_rows:
        raise AnalysisInputError(f"{where}: {len(rows)} data row(s); at least {min_rows} are needed")
    data = np.asarray(rows, dtype=float)
    t = data[:, 0]
    bad = np.flatnonzero(np.diff(t) <= 0)
    if bad.size:
        i = int(bad[0])
        raise AnalysisInputError(
            f"{where} row {_row_of(lines, first, i + 1)}, column 1 ({header[0]}): time {t[i + 1]!r} s does not "
            f"increase from the row before ({t[i]!r} s); the time column must be strictly increasing seconds")
    return WaveformTable(where, header[0], t, {h: data[:, k] for k, h in enumerate(header) if k > 0})


def _row_of(lines: list[str], first: int, data_index: int) -> int:
    """1-based file row of the ``data_index``-th data row (0-based) after the header at ``lines[first]``."""
    seen = -1
    for n in range(first + 1, len(lines)):
        s = lines[n].strip()
        if not s or s.startswith("#") or all(not c.strip() for c in s.split(",")):
            continue
        seen += 1
        if seen == data_index:
            return n + 1
    return len(lines)
