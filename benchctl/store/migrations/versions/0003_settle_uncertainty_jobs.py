"""Schema version 3: how each point settled, uncertainty of results, and a jobs table.

- ``points.settle_json``: how the point was settled and verified (method, window, estimated
  time constant, predicted residual, setpoint verification, reason when unsettled); ``{}``
  for points stored before version 3.
- ``results.uncertainty`` and ``results.expanded_uncertainty``: standard uncertainty and
  expanded uncertainty (coverage factor k = 2) of a derived result, in its unit (JCGM
  100:2008, the GUM, 2.3.1 and 2.3.5); NULL where none was evaluated.
- ``jobs``: one row per job; ``jobs.id`` is assigned by the database, so two stations
  starting jobs at the same moment on one shared database get different ids. Every job id
  already present in ``runs.job_id`` gets its row (same id, a new UUID).

Columns are added ``NOT NULL DEFAULT`` or nullable because SQLite can add a NOT NULL
column only with a default (SQLite docs, "ALTER TABLE", "ALTER TABLE ADD COLUMN").
"""

from __future__ import annotations

import uuid

from alembic import op
from sqlalchemy import Column, Float, Integer, String, Text, column, func, insert, select, table, text, update

revision = "0003"
down_revision = "0002"
branch_labels = None
depends_on = None

_runs = table("runs", column("id", Integer), column("job_id", Integer), column("started_utc_s", Float))
_meta = table("meta", column("id", Integer), column("schema_version", Integer))


def upgrade() -> None:
    op.add_column("points", Column("settle_json", Text, nullable=False, server_default="{}"))
    op.add_column("results", Column("uncertainty", Float, nullable=True))
    op.add_column("results", Column("expanded_uncertainty", Float, nullable=True))
    jobs = op.create_table(
        "jobs",
        Column("id", Integer, primary_key=True),
        Column("job_uuid", String(36), nullable=False),
        Column("name", String(200), nullable=False, server_default=""),
        Column("station_name", String(200), nullable=False, server_default=""),
        Column("host", String(255), nullable=False, server_default=""),
        Column("started_utc_s", Float, nullable=False),
    )
    op.create_index("jobs_uuid_idx", "jobs", ["job_uuid"], unique=True)
    bind = op.get_bind()
    existing = bind.execute(
        select(_runs.c.job_id, func.min(_runs.c.started_utc_s))
        .where(_runs.c.job_id.is_not(None)).group_by(_runs.c.job_id).order_by(_runs.c.job_id)
    ).all()
    if existing:
        bind.execute(insert(jobs), [{"id": int(j), "job_uuid": str(uuid.uuid4()), "name": "", "station_name": "",
                                     "host": "", "started_utc_s": float(t)} for j, t in existing])
        if bind.dialect.name == "postgresql":  # explicit ids do not advance the serial's sequence
            bind.execute(text("SELECT setval(pg_get_serial_sequence('jobs', 'id'), (SELECT max(id) FROM jobs))"))
    bind.execute(update(_meta).where(_meta.c.id == 1).values(schema_version=3))


def downgrade() -> None:
    op.drop_index("jobs_uuid_idx", table_name="jobs")
    op.drop_table("jobs")
    with op.batch_alter_table("results") as batch:
        batch.drop_column("expanded_uncertainty")
        batch.drop_column("uncertainty")
    with op.batch_alter_table("points") as batch:
        batch.drop_column("settle_json")
    op.get_bind().execute(update(_meta).where(_meta.c.id == 1).values(schema_version=2))
