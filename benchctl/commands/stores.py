"""Opening the store a command works on: one that must exist (reading), or one to write into."""

from __future__ import annotations

from pathlib import Path
from typing import Any

from benchctl.locations import default_db


def _announce(url: str) -> None:
    """Every command that uses a database says which one (on standard error, password masked)."""
    from benchctl.commands.console import error_console
    from benchctl.store.url import mask_secrets

    error_console().print(f"database: {mask_secrets(url)}", style="dim", markup=False, highlight=False)


def existing_store_url(url: str) -> str:
    """``url`` unchanged, or StoreError when it names a SQLite file that is not there."""
    from benchctl.errors import StoreError

    if "://" not in url and not Path(url).exists():
        raise StoreError(f"no database at {url}; run `benchctl demo` or `benchctl run` first, or give --db")
    return url


def open_existing_store(db: str | None) -> Any:
    """The store at ``db`` (default: :func:`benchctl.locations.default_db`), which must exist.

    A store on a read-only medium (or a file one may not write) is opened read-only, and the
    command says so: nothing is written to it and nothing was recovered.
    """
    from benchctl.store import Store

    url = existing_store_url(db or default_db())
    _announce(url)
    store = Store.open(url, read_only=None)
    print_store_notes(store)
    return store


def print_store_notes(store: Any) -> None:
    """What the person should know of how ``store`` was opened (read-only ...), on standard error."""
    from benchctl.commands.console import error_console

    for note in getattr(store, "notes", ()):
        error_console().print(f"note: {note}", style="yellow", markup=False, highlight=False)


def open_store(db: str | None) -> Any:
    """The store at ``db`` (default as above), created with its folder when it is new."""
    from benchctl.store import Store

    url = db or default_db()
    if "://" not in url:
        Path(url).parent.mkdir(parents=True, exist_ok=True)
    _announce(url)
    return Store.open(url)
