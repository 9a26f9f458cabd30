"""Where benchctl keeps its data when no ``--db`` is given.

The data folder is ``benchctl-data``: the nearest one found in the working directory or
one of its parents (the way a version-control tool finds its repository), so every
command run anywhere inside a project uses the same database; where none exists yet, a
new one is made in the working directory. ``$BENCHCTL_DB`` names the database instead
(any SQLAlchemy URL or a SQLite path).
"""

from __future__ import annotations

import os
from pathlib import Path

DATA_DIR_NAME = "benchctl-data"
DEFAULT_DB_ENV = "BENCHCTL_DB"
DB_FILE_NAME = "benchctl.db"


def find_data_dir(start: Path | None = None) -> Path | None:
    """The nearest ``benchctl-data`` folder at ``start`` (default: the working directory) or above."""
    here = (Path.cwd() if start is None else Path(start)).resolve()
    for folder in (here, *here.parents):
        candidate = folder / DATA_DIR_NAME
        if candidate.is_dir():
            return candidate
    return None


def data_dir(start: Path | None = None) -> Path:
    """The data folder in use: the nearest existing one, else ``./benchctl-data`` (not created here)."""
    found = find_data_dir(start)
    if found is not None:
        return found
    return (Path.cwd() if start is None else Path(start)) / DATA_DIR_NAME


def default_db() -> str:
    """``$BENCHCTL_DB``, else ``benchctl.db`` in :func:`data_dir`."""
    return os.environ.get(DEFAULT_DB_ENV) or str(data_dir() / DB_FILE_NAME)
