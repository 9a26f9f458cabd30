"""Alembic environment: runs the revisions on the connection benchctl hands over.

:mod:`benchctl.store.migrate` puts an open SQLAlchemy connection (already inside a
transaction, with the store's SQLite settings) into ``config.attributes["connection"]``;
Alembic then runs every revision inside that one transaction, so an upgrade is all or
nothing on engines with transactional DDL (PostgreSQL, SQLite). Without a connection
(the ``alembic`` command with ``sqlalchemy.url`` set) an engine is made from the URL.
"""

from __future__ import annotations

from alembic import context
from sqlalchemy import engine_from_config, pool
from sqlalchemy.engine import Connection

config = context.config


def _run(connection: Connection) -> None:
    context.configure(
        connection=connection,
        target_metadata=None,
        # SQLite cannot ALTER most constraints; batch mode would rebuild tables. The
        # revisions avoid needing it, but keep it on so a future one can use op.batch_alter_table.
        render_as_batch=connection.dialect.name == "sqlite",
        transaction_per_migration=False,
    )
    with context.begin_transaction():
        context.run_migrations()


if context.is_offline_mode():
    raise RuntimeError(
        "benchctl migrations run against a live database only; use `benchctl db upgrade --db URL`"
    )

_given = config.attributes.get("connection")
if _given is not None:
    _run(_given)
else:
    if not config.get_main_option("sqlalchemy.url"):
        raise RuntimeError(
            "no database to migrate: use `benchctl db upgrade --db URL` (or set sqlalchemy.url)"
        )
    _engine = engine_from_config(config.get_section(config.config_ini_section, {}), prefix="sqlalchemy.", poolclass=pool.NullPool)
    with _engine.connect() as _conn:
        _run(_conn)
        _conn.commit()
