"""Schema version 2: ``runs.run_uuid``, a stable name of a run across databases.

Every existing run gets a random UUID (RFC 4122 version 4, Python's ``uuid.uuid4``);
a unique index makes copying a run into another database idempotent. The column is
added ``NOT NULL DEFAULT ''`` because SQLite can add a NOT NULL column only with a
default (SQLite docs, "ALTER TABLE", section "ALTER TABLE ADD COLUMN").
"""

from __future__ import annotations

import uuid

from alembic import op
from sqlalchemy import Column, Integer, String, bindparam, column, select, table, update

revision = "0002"
down_revision = "0001"
branch_labels = None
depends_on = None

_runs = table("runs", column("id", Integer), column("run_uuid", String(36)))
_meta = table("meta", column("id", Integer), column("schema_version", Integer))


def upgrade() -> None:
    op.add_column("runs", Column("run_uuid", String(36), nullable=False, server_default=""))
    bind = op.get_bind()
    ids = [int(i) for i in bind.execute(select(_runs.c.id).order_by(_runs.c.id)).scalars()]
    if ids:
        bind.execute(
            update(_runs).where(_runs.c.id == bindparam("run_id")).values(run_uuid=bindparam("new_uuid")),
            [{"run_id": i, "new_uuid": str(uuid.uuid4())} for i in ids],
        )
    op.create_index("runs_uuid_idx", "runs", ["run_uuid"], unique=True)
    bind.execute(update(_meta).where(_meta.c.id == 1).values(schema_version=2))


def downgrade() -> None:
    op.drop_index("runs_uuid_idx", table_name="runs")
    op.drop_column("runs", "run_uuid")
    op.get_bind().execute(update(_meta).where(_meta.c.id == 1).values(schema_version=1))
