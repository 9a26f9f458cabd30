"""Schema versions of a store: finding which one a database has, upgrading it (Alembic).

A store records its version twice: Alembic's ``alembic_version`` table holds the
revision (``"0002"`` = schema version 2, see :mod:`benchctl.store.schema`) and the
``meta`` row holds ``schema_version``; the two must agree. Stores made before the
migrations existed have no ``alembic_version`` table; they are schema version 1 and
are stamped ``"0001"`` before the first upgrade.

:func:`upgrade` runs the missing revisions in one transaction, holding the schema lock
(:func:`benchctl.store.engine.lock_schema`), so a failed upgrade leaves the database as
it was and two upgrades at once do not collide. It never goes down: a database of a
newer benchctl is refused. Method: Alembic's programmatic API with a shared connection
(Alembic docs, "Cookbook: Sharing a Connection across one or more programmatic
migration commands").
"""

from __future__ import annotations

import logging
import os
import time
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING

from sqlalchemy import inspect, select
from sqlalchemy.engine import Connection
from sqlalchemy.exc import SQLAlchemyError

import benchctl
from benchctl.errors import SchemaVersionError, StoreError

from . import schema as s
from .engine import WRITE_OPTIONS, lock_schema, make_engine
from .url import mask_url, normalize_url, scrub

if TYPE_CHECKING:
    from alembic.config import Config

log = logging.getLogger(__name__)

MIGRATIONS_DIR = Path(__file__).with_name("migrations")

# SchemaState.status values
EMPTY = "empty"
"""No tables at all: :meth:`Store.open` or :func:`upgrade` creates the current schema."""
CURRENT = "current"
"""The schema this benchctl reads and writes."""
BEHIND = "behind"
"""An older schema: ``benchctl db upgrade`` brings it up to date."""
AHEAD = "ahead"
"""A newer schema (or a revision benchctl does not know): use the benchctl that wrote it."""
NOT_A_STORE = "not a store"
"""A database with tables but no benchctl ``meta`` table: left alone."""
DAMAGED = "damaged"
"""A benchctl store whose version records are missing, disagree, or whose tables are missing."""

STATUSES = frozenset({EMPTY, CURRENT, BEHIND, AHEAD, NOT_A_STORE, DAMAGED})


@dataclass(frozen=True)
class SchemaState:
    """Which schema a database has.

    ``schema_version`` is ``None`` when it cannot be told (empty, not a store, damaged,
    unknown revision); ``revision`` is the Alembic revision, ``None`` when none is
    recorded. ``reason`` says in words what was found.
    """

    url: str
    status: str
    schema_version: int | None
    revision: str | None
    head_version: int
    reason: str


@dataclass(frozen=True)
class UpgradeResult:
    """What :func:`upgrade` did. ``from_version`` is ``None`` when the database was empty;
    ``revisions_applied`` is empty when it was already at the target."""

    url: str
    from_version: int | None
    to_version: int
    revisions_applied: tuple[str, ...]


def read_schema_state(conn: Connection, where: str) -> SchemaState:
    """Inspect the database behind ``conn`` (read only); ``where`` is its masked URL."""
    head = s.SCHEMA_VERSION

    def state(status: str, version: int | None, revision: str | None, reason: str) -> SchemaState:
        return SchemaState(where, status, version, revision, head, reason)

    names = set(inspect(conn).get_table_names())
    if not names:
        return state(EMPTY, None, None, "the database has no tables")
    if s.meta.name not in names:
        listed = ", ".join(sorted(names)[:5]) + (" ..." if len(names) > 5 else "")
        return state(NOT_A_STORE, None, None, f"it has tables {listed} and no 'meta' table")
    meta_version = conn.execute(select(s.meta.c.schema_version).where(s.meta.c.id == 1)).scalar()
    if meta_version is None:
        return state(DAMAGED, None, None, "it has an empty 'meta' table, so its schema version is unknown")
    meta_version = int(meta_version)
    revision: str | None = None
    if s.VERSION_TABLE in names:
        rows = conn.exec_driver_sql(f"SELECT version_num FROM {s.VERSION_TABLE}").scalars().all()
        if len(rows) != 1:
            return state(
                DAMAGED, None, None,
                f"its {s.VERSION_TABLE} table holds {len(rows)} revisions {sorted(map(str, rows))}, not one",
            )
        revision = str(rows[0])
        version = s.version_of_revision(revision)
        if version is None:
            return state(AHEAD, None, revision, f"it is at revision {revision!r}, which this benchctl does not know")
        if version != meta_version:
            return state(
                DAMAGED, None, revision,
                f"its revision {revision!r} (schema version {version}) disagrees with meta.schema_version "
                f"{meta_version}",
            )
    version = meta_version
    if version < head:
        return state(BEHIND, version, revision, f"it has schema version {version}, older than {head}")
    if version > head:
        return state(AHEAD, version, revision, f"it has schema version {version}, newer than {head}")
    missing = set(s.TABLE_NAMES) - names
    if missing:
        return state(
            DAMAGED, version, revision, f"(schema version {version}) it lacks tables {', '.join(sorted(missing))}"
        )
    return state(CURRENT, version, revision, f"it has schema version {version}, the current one")


def upgrade_command(where: str) -> str:
    """The command line that upgrades the store at masked URL ``where``."""
    hint = " (with the real password in place of ***)" if "***" in where else ""
    return f"`benchctl db upgrade --db {where}`{hint}"


def refusal(state: SchemaState) -> StoreError:
    """The error for opening a store that is not at :data:`CURRENT` (or :data:`EMPTY`)."""
    where, head = state.url, state.head_version
    if state.status == NOT_A_STORE:
        return StoreError(
            f"{where} is a database but not a benchctl store ({state.reason}); "
            "give the path of a benchctl store or of a new file"
        )
    if state.status == DAMAGED:
        return StoreError(
            f"store {where} is damaged: {state.reason}; it was not written completely by benchctl - "
            "restore it from a copy"
        )
    shown = "an unknown" if state.schema_version is None else str(state.schema_version)
    if state.status == AHEAD:
        return SchemaVersionError(
            f"store {where} has schema version {shown} (revision {state.revision}), but benchctl "
            f"{benchctl.__version__} needs schema version {head}; it was written by a newer benchctl: "
            "open it with that one, or upgrade benchctl (this one will not write to it)"
        )
    return SchemaVersionError(
        f"store {where} has schema version {shown}, but benchctl {benchctl.__version__} needs schema "
        f"version {head}; nothing was written to it. Upgrade it with {upgrade_command(where)} "
        "(back up a SQLite file first), or open it with the older benchctl that wrote it"
    )


def alembic_config(conn: Connection, *, created_utc_s: float | None = None, created_by: str = "") -> Config:
    """Alembic configuration running the store's revisions on ``conn`` (in its transaction)."""
    from alembic.config import Config

    cfg = Config()
    cfg.set_main_option("script_location", str(MIGRATIONS_DIR))
    cfg.attributes["connection"] = conn
    cfg.attributes["created_utc_s"] = created_utc_s
    cfg.attributes["created_by"] = created_by
    return cfg


def schema_state(url_or_path: str | os.PathLike[str], *, busy_timeout_s: float = 10.0) -> SchemaState:
    """Which schema the database at ``url_or_path`` has (creates nothing but an empty SQLite file)."""
    url = normalize_url(url_or_path)
    where = mask_url(url)
    engine = make_engine(url, busy_timeout_s)
    try:
        with engine.connect() as conn:
            return read_schema_state(conn, where)
    except SQLAlchemyError as exc:
        raise StoreError(
            f"cannot read the schema of {where}: {scrub(str(getattr(exc, 'orig', None) or exc), url)}; "
            "check the path or URL, the server and the credentials"
        ) from exc
    finally:
        engine.dispose()


def upgrade(
    url_or_path: str | os.PathLike[str],
    *,
    to_version: int | None = None,
    busy_timeout_s: float = 10.0,
    clock: Callable[[], float] = time.time,
) -> UpgradeResult:
    """Bring the store at ``url_or_path`` to ``to_version`` (default: the current
    :data:`~benchctl.store.schema.SCHEMA_VERSION`); an empty database is created.

    All in one transaction. Raises :class:`~benchctl.errors.SchemaVersionError` for a
    newer store or a ``to_version`` below the store's, :class:`~benchctl.errors.StoreError`
    for a database that is not a (whole) benchctl store.
    """
    target = s.SCHEMA_VERSION if to_version is None else int(to_version)
    if not 1 <= target <= s.SCHEMA_VERSION:
        raise StoreError(f"cannot upgrade to schema version {target}; this benchctl knows versions 1 to {s.SCHEMA_VERSION}")
    url = normalize_url(url_or_path)
    where = mask_url(url)
    engine = make_engine(url, busy_timeout_s)
    try:
        with engine.connect().execution_options(**WRITE_OPTIONS) as conn, conn.begin():
            lock_schema(conn)
            before = read_schema_state(conn, where)
            if before.status in (NOT_A_STORE, DAMAGED, AHEAD):
                raise refusal(before)
            start = before.schema_version  # None when empty
            if start is not None and start > target:
                raise SchemaVersionError(
                    f"store {where} has schema version {start}, above the requested {target}; "
                    "benchctl does not downgrade stores"
                )
            applied = tuple(s.revision_of_version(v) for v in range((start or 0) + 1, target + 1))
            if applied:
                _run_alembic(conn, before, target, clock)
                after = read_schema_state(conn, where)
                if after.schema_version != target:
                    raise StoreError(
                        f"upgrading {where} to schema version {target} ended at {after.status} ({after.reason}); "
                        "nothing was changed - report this as a benchctl bug"
                    )
    except SQLAlchemyError as exc:
        raise StoreError(
            f"upgrading store {where} failed and nothing was changed: "
            f"{scrub(str(getattr(exc, 'orig', None) or exc), url)}"
        ) from exc
    finally:
        engine.dispose()
    if applied:
        log.info("store %s upgraded from schema version %s to %d", where, start, target)
    return UpgradeResult(url=where, from_version=start, to_version=target, revisions_applied=applied)


def _run_alembic(conn: Connection, before: SchemaState, target: int, clock: Callable[[], float]) -> None:
    from alembic import command
    from alembic.util.exc import CommandError

    cfg = alembic_config(conn, created_utc_s=clock(), created_by=f"benchctl {benchctl.__version__}")
    try:
        if before.status == BEHIND and before.revision is None:
            # made before the migrations existed: record the revision it is at
            command.stamp(cfg, s.revision_of_version(before.schema_version or 1))
        command.upgrade(cfg, s.revision_of_version(target))
    except CommandError as exc:
        raise StoreError(f"upgrading store {before.url} failed and nothing was changed: {exc}") from exc
