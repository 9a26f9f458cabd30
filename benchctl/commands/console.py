"""The rich consoles of the CLI, tables that fit the width they have, and the safety caution.

On a terminal, output is laid out for the terminal's width. Output that is not a terminal
(a pipe, a file, a test's capture) is plain and complete: no colour, no wrapping of long
lines, tables at their natural width (a pipe has no width to fit).
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass
from functools import lru_cache

from rich.console import Console
from rich.markup import escape
from rich.panel import Panel
from rich.table import Table

#: Width given to output that is not a terminal: wide enough that nothing is cut or folded.
PLAIN_WIDTH = 100_000


def _make(stderr: bool) -> Console:
    probe = Console(stderr=stderr)
    if probe.is_terminal:
        return Console(stderr=stderr, highlight=False)
    return Console(stderr=stderr, highlight=False, width=PLAIN_WIDTH, no_color=True, soft_wrap=True)


@lru_cache(maxsize=1)
def console() -> Console:
    return _make(stderr=False)


@lru_cache(maxsize=1)
def error_console() -> Console:
    return _make(stderr=True)


def print_caution(reason: str = "") -> None:
    """The safety caution, prominent; ``reason`` says why it is shown now."""
    from benchctl.safety import CAUTION

    text = (escape(reason) + "\n\n" if reason else "") + escape(CAUTION)
    err = error_console()
    if err.is_terminal:
        err.print(Panel(text, title="[bold]hazardous voltage[/]", border_style="yellow"))
    else:
        err.print("hazardous voltage: " + (reason + " " if reason else "") + CAUTION, markup=False)


@dataclass(frozen=True)
class Column:
    """A column of a :func:`fitted_table`: ``keep`` orders which columns stay when the
    terminal is narrow (0 always stays; higher numbers go first)."""

    header: str
    keep: int = 0
    justify: str = "left"


def fitted_table(title: str, columns: Sequence[Column], rows: Sequence[Sequence[str]], *,
                 style: Callable[[int, str], str] | None = None, width: int | None = None) -> tuple[Table, list[str]]:
    """A table of plain-text ``rows`` that fits ``width`` (the console's by default) without cutting
    a cell: columns are dropped, least needed first, until the rest fit at their full width.

    Returns the table and the headers of the columns left out (say so under the table).
    ``style(column_index, text)`` may return rich markup for a cell (its text is escaped first).
    """
    out = console()
    width = out.width if width is None else width
    natural = [max([len(c.header)] + [len(str(r[i])) for r in rows]) for i, c in enumerate(columns)]
    shown = list(range(len(columns)))

    def needed(idx: list[int]) -> int:  # cells + padding (2 per column) + borders (n + 1)
        return sum(natural[i] + 2 for i in idx) + len(idx) + 1

    for i in sorted(range(len(columns)), key=lambda k: -columns[k].keep):
        if needed(shown) <= width or columns[i].keep == 0:
            break
        shown.remove(i)
    table = Table(title=title)
    for i in shown:
        table.add_column(columns[i].header, no_wrap=True, justify=columns[i].justify)  # type: ignore[arg-type]
    for r in rows:
        cells = []
        for i in shown:
            text = escape(str(r[i]))
            cells.append(style(i, text) if style is not None else text)
        table.add_row(*cells)
    hidden = [columns[i].header for i in range(len(columns)) if i not in shown]
    return table, hidden


def print_fitted(table: Table, hidden: Sequence[str], notes: Sequence[str] = ()) -> None:
    """Print a :func:`fitted_table`, then the hidden columns' names and long ``notes`` on their own lines."""
    out = console()
    out.print(table)
    if hidden:
        out.print(f"(not shown at this width: {', '.join(hidden)}; widen the terminal or use --json)",
                  markup=False)
    for note in notes:
        out.print(note, markup=False, soft_wrap=True)
