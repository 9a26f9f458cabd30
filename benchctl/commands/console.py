"""The rich consoles of the CLI, and the safety caution."""

from __future__ import annotations

from functools import lru_cache

from rich.console import Console
from rich.markup import escape
from rich.panel import Panel


@lru_cache(maxsize=1)
def console() -> Console:
    return Console(highlight=False)


@lru_cache(maxsize=1)
def error_console() -> Console:
    return Console(stderr=True, highlight=False)


def print_caution(reason: str = "") -> None:
    """The safety caution, prominent; ``reason`` says why it is shown now."""
    from benchctl.cli import CAUTION

    text = (escape(reason) + "\n\n" if reason else "") + escape(CAUTION)
    error_console().print(Panel(text, title="[bold]hazardous voltage[/]", border_style="yellow"))
