"""Reading a measured loop gain (or plant response) from a CSV file.

Format (plain CSV, common practice for analyzer exports): an optional block of comment
lines starting with ``#``, one header row, then one row per frequency. Columns, matched
case-insensitively after trimming:

* frequency: ``freq_hz`` (or ``frequency_hz``, ``f_hz``), Hz, strictly increasing, > 0;
* either ``gain_db`` and ``phase_deg`` (Bode form, dB and degrees),
* or ``re`` and ``im`` (also ``real``/``imag``): the complex response.

Other columns are ignored. A comment ``# phase_convention: inverted`` (or ``loop``) says
whether the data are −T or T; it is only a default, the caller may override it. The
delimiter is a comma, a semicolon or a tab (whichever the header uses).

Every problem raises :class:`~benchctl.errors.AnalysisInputError` naming the file, the
line number and the column, and saying what to do.
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

__all__ = ["LoopCsv", "read_loop_csv", "parse_loop_csv"]

_FREQ = ("freq_hz", "frequency_hz", "f_hz")
_GAIN = ("gain_db",)
_PHASE = ("phase_deg",)
_RE = ("re", "real")
_IM = ("im", "imag")


@dataclass(frozen=True, eq=False)
class LoopCsv:
    """A frequency response read from CSV: ``freq_hz`` (Hz) and complex ``response``.

    ``form`` is "bode" (gain_db/phase_deg columns) or "complex" (re/im);
    ``phase_convention`` is "loop", "inverted" or None when the file does not say.
    """

    path: str
    freq_hz: NDArray[np.float64]
    response: NDArray[np.complex128]
    form: str
    phase_convention: str | None
    columns: tuple[str, ...]


def read_loop_csv(path: str | Path) -> LoopCsv:
    """Read ``path`` (see the module docstring for the format)."""
    p = Path(path)
    try:
        text = p.read_text(encoding="utf-8-sig")
    except FileNotFoundError:
        raise AnalysisInputError(f"{p}: no such file; give the path of a CSV with freq_hz and gain_db/phase_deg "
                                 "or re/im columns") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise AnalysisInputError(f"{p}: cannot be read as UTF-8 text ({exc})") from exc
    return parse_loop_csv(text, name=str(p))


def _find(header: list[str], names: tuple[str, ...]) -> int | None:
    for k, h in enumerate(header):
        if h in names:
            return k
    return None


def parse_loop_csv(text: str, *, name: str = "<text>") -> LoopCsv:
    """Parse CSV ``text``; ``name`` is how errors refer to it."""
    lines = text.splitlines()
    convention: str | None = None
    first = None
    for k, line in enumerate(lines):
        stripped = line.strip()
        if not stripped:
            continue
        if stripped.startswith("#"):
            body = stripped.lstrip("#").strip()
            key, sep, value = body.partition(":")
            if sep and key.strip().lower() == "phase_convention":
                value = value.strip().lower()
                if value not in ("loop", "inverted"):
                    raise AnalysisInputError(
                        f"{name}, line {k + 1}: phase_convention {value!r} must be 'loop' (data are T) "
                        "or 'inverted' (data are -T)")
                convention = value
            continue
        first = k
        break
    if first is None:
        raise AnalysisInputError(f"{name}: no header row found; the first non-comment line must name the columns, "
                                 "e.g. freq_hz,gain_db,phase_deg")
    header_line = lines[first]
    delimiter = max((",", ";", "\t"), key=header_line.count)
    reader = csv.reader(io.StringIO("\n".join(lines[first:])), delimiter=delimiter)
    header_raw = next(reader)
    header = [h.strip().lower() for h in header_raw]
    i_f = _find(header, _FREQ)
    if i_f is None:
        raise AnalysisInputError(
            f"{name}, line {first + 1}: missing column freq_hz (frequency in Hz); the header has "
            f"{', '.join(h for h in header_raw) or 'no columns'}")
    i_g, i_p, i_re, i_im = _find(header, _GAIN), _find(header, _PHASE), _find(header, _RE), _find(header, _IM)
    if i_g is not None or i_p is not None:
        if i_g is None or i_p is None:
            missing = "gain_db" if i_g is None else "phase_deg"
            raise AnalysisInputError(f"{name}, line {first + 1}: missing column {missing}; Bode data need both "
                                     "gain_db and phase_deg")
        form, cols = "bode", (i_f, i_g, i_p)
    elif i_re is not None or i_im is not None:
        if i_re is None or i_im is None:
            missing = "re" if i_re is None else "im"
            raise AnalysisInputError(f"{name}, line {first + 1}: missing column {missing}; complex data need both "
                                     "re and im")
        form, cols = "complex", (i_f, i_re, i_im)
    else:
        raise AnalysisInputError(
            f"{name}, line {first + 1}: missing columns gain_db and phase_deg (or re and im); the header has "
            f"{', '.join(header_raw)}")
    names = tuple(header_raw[c].strip() for c in cols)
    rows: list[tuple[float, float, float]] = []
    line_no = first + 1
    line_of_row: list[int] = []
    for record in reader:
        line_no += 1
        if not record or all(not c.strip() for c in record) or record[0].strip().startswith("#"):
            continue
        values = []
        for c, col_name in zip(cols, names):
            if c >= len(record) or not record[c].strip():
                raise AnalysisInputError(f"{name}, line {line_no}, column {col_name}: empty cell; every row needs "
                                         "a number in each of " + ", ".join(names))
            cell = record[c].strip()
            try:
                v = float(cell)
            except ValueError:
                raise AnalysisInputError(f"{name}, line {line_no}, column {col_name}: {cell!r} is not a number; "
                                         "fix or delete that row") from None
            if not math.isfinite(v):
                raise AnalysisInputError(f"{name}, line {line_no}, column {col_name}: {cell!r} is not finite; "
                                         "remove or re-measure that point")
            values.append(v)
        rows.append((values[0], values[1], values[2]))
        line_of_row.append(line_no)
    if len(rows) < 3:
        raise AnalysisInputError(f"{name}: {len(rows)} data row(s); at least 3 frequencies are needed")
    data = np.array(rows, dtype=float)
    f = data[:, 0]
    col_f = names[0]
    if f[0] <= 0.0:
        raise AnalysisInputError(f"{name}, line {line_of_row[0]}, column {col_f}: frequency {f[0]:g} Hz must be > 0")
    steps = np.diff(f)
    if np.any(steps <= 0.0):
        k = int(np.flatnonzero(steps <= 0.0)[0]) + 1
        raise AnalysisInputError(
            f"{name}, line {line_of_row[k]}, column {col_f}: frequency {f[k]:g} Hz does not increase "
            f"(previous row {f[k - 1]:g} Hz); sort the rows by frequency and drop repeated frequencies")
    if form == "bode":
        response = (10.0 ** (data[:, 1] / 20.0)) * np.exp(1j * np.deg2rad(data[:, 2]))
    else:
        response = data[:, 1] + 1j * data[:, 2]
        zero = np.flatnonzero(response == 0)
        if zero.size:
            k = int(zero[0])
            raise AnalysisInputError(f"{name}, line {line_of_row[k]}: re and im are both 0, the phase is undefined; "
                                     "drop that row")
    return LoopCsv(path=name, freq_hz=f, response=response.astype(np.complex128), form=form,
                   phase_convention=convention, columns=names)
