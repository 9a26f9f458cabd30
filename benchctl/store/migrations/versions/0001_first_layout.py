"""Schema version 1: the first layout of the store (every table, and the meta row).

The table definitions below are a frozen copy of version 1; later layouts live in
later revisions and in ``benchctl/store/schema.py``, never here.
"""

from __future__ import annotations

import time

from alembic import context, op
from sqlalchemy import (
    Boolean,
    CheckConstraint,
    Column,
    Float,
    ForeignKey,
    ForeignKeyConstraint,
    Index,
    Integer,
    LargeBinary,
    MetaData,
    String,
    Table,
    Text,
    UniqueConstraint,
)

revision = "0001"
down_revision = None
branch_labels = None
depends_on = None

metadata = MetaData()

meta = Table(
    "meta",
    metadata,
    Column("id", Integer, primary_key=True, autoincrement=False),
    Column("schema_version", Integer, nullable=False),
    Column("created_utc_s", Float, nullable=False),
    Column("created_by", String(64), nullable=False, server_default=""),
    CheckConstraint("id = 1", name="meta_single_row"),
)

stations = Table(
    "stations",
    metadata,
    Column("id", Integer, primary_key=True),
    Column("name", String(200), nullable=False),
    Column("description", Text, nullable=False, server_default=""),
    Column("station_text", Text, nullable=True),
    Column("station_sha256", String(64), nullable=False, server_default=""),
    Index("stations_lookup_idx", "name", "station_sha256"),
)

duts = Table(
    "duts",
    metadata,
    Column("id", Integer, primary_key=True),
    Column("part_number", String(200), nullable=False),
    Column("revision", String(100), nullable=False, server_default=""),
    Column("serial", String(200), nullable=False, server_default=""),
    UniqueConstraint("part_number", "revision", "serial", name="duts_identity"),
)

runs = Table(
    "runs",
    metadata,
    Column("id", Integer, primary_key=True),
    Column("procedure", String(200), nullable=False),
    Column("procedure_sha256", String(64), nullable=False),
    Column("parameters_json", Text, nullable=False, server_default="{}"),
    Column("station_id", Integer, ForeignKey("stations.id"), nullable=False),
    Column("dut_id", Integer, ForeignKey("duts.id"), nullable=True),
    Column("operator", String(200), nullable=False, server_default=""),
    Column("host", String(255), nullable=False, server_default=""),
    Column("pid", Integer, nullable=False),
    Column("benchctl_version", String(64), nullable=False, server_default=""),
    Column("job_id", Integer, nullable=True),
    Column("status", String(16), nullable=False),
    Column("message", Text, nullable=False, server_default=""),
    Column("started_utc_s", Float, nullable=False),
    Column("ended_utc_s", Float, nullable=True),
    CheckConstraint(
        "status IN ('running', 'completed', 'failed', 'tripped', 'interrupted')",
        name="runs_status_known",
    ),
    Index("runs_status_idx", "status"),
    Index("runs_job_idx", "job_id"),
)

instruments = Table(
    "instruments",
    metadata,
    Column("id", Integer, primary_key=True),
    Column("run_id", Integer, ForeignKey("runs.id"), nullable=False, index=True),
    Column("station_id", Integer, ForeignKey("stations.id"), nullable=False),
    Column("role", String(100), nullable=False),
    Column("driver", String(200), nullable=False),
    Column("resource", String(500), nullable=False),
    Column("identity", String(500), nullable=False, server_default=""),
    UniqueConstraint("run_id", "role", name="instruments_role_per_run"),
)

quantities = Table(
    "quantities",
    metadata,
    Column("id", Integer, primary_key=True),
    Column("run_id", Integer, ForeignKey("runs.id"), nullable=False),
    Column("name", String(200), nullable=False),
    Column("unit", String(50), nullable=False, server_default=""),
    UniqueConstraint("run_id", "name", name="quantities_name_per_run"),
)

points = Table(
    "points",
    metadata,
    Column("run_id", Integer, ForeignKey("runs.id"), primary_key=True, autoincrement=False),
    Column("seq", Integer, primary_key=True, autoincrement=False),
    Column("t_utc_s", Float, nullable=False),
    Column("tag", String(100), nullable=False, server_default=""),
    Column("settled", Boolean, nullable=False),
    Column("settle_time_s", Float, nullable=True),
)

point_values = Table(
    "point_values",
    metadata,
    Column("run_id", Integer, primary_key=True, autoincrement=False),
    Column("seq", Integer, primary_key=True, autoincrement=False),
    Column("quantity_id", Integer, ForeignKey("quantities.id"), primary_key=True, autoincrement=False),
    Column("value", Float, nullable=True),
    ForeignKeyConstraint(["run_id", "seq"], ["points.run_id", "points.seq"], name="point_values_point"),
)

events = Table(
    "events",
    metadata,
    Column("id", Integer, primary_key=True),
    Column("run_id", Integer, ForeignKey("runs.id"), nullable=False, index=True),
    Column("t_utc_s", Float, nullable=False),
    Column("kind", String(64), nullable=False),
    Column("message", Text, nullable=False, server_default=""),
    Column("details_json", Text, nullable=False, server_default="{}"),
    Column("point_seq", Integer, nullable=True),
)

results = Table(
    "results",
    metadata,
    Column("id", Integer, primary_key=True),
    Column("run_id", Integer, ForeignKey("runs.id"), nullable=False, index=True),
    Column("t_utc_s", Float, nullable=False),
    Column("name", String(200), nullable=False),
    Column("value", Float, nullable=True),
    Column("unit", String(50), nullable=False, server_default=""),
    Column("details_json", Text, nullable=False, server_default="null"),
    Column("scope_json", Text, nullable=False, server_default="{}"),
)

arrays = Table(
    "arrays",
    metadata,
    Column("id", Integer, primary_key=True),
    Column("run_id", Integer, ForeignKey("runs.id"), nullable=False),
    Column("point_seq", Integer, nullable=True),
    Column("name", String(200), nullable=False),
    Column("t_utc_s", Float, nullable=False),
    Column("meta_json", Text, nullable=False, server_default="{}"),
    Index("arrays_lookup_idx", "run_id", "name", "point_seq"),
)

array_columns = Table(
    "array_columns",
    metadata,
    Column("array_id", Integer, ForeignKey("arrays.id"), primary_key=True, autoincrement=False),
    Column("position", Integer, primary_key=True, autoincrement=False),
    Column("name", String(200), nullable=False),
    Column("unit", String(50), nullable=False, server_default=""),
    Column("dtype", String(32), nullable=False),
    Column("shape_json", String(200), nullable=False),
    Column("data", LargeBinary, nullable=False),
)


def upgrade() -> None:
    bind = op.get_bind()
    metadata.create_all(bind)
    attributes = context.config.attributes
    bind.execute(
        meta.insert().values(
            id=1,
            schema_version=1,
            created_utc_s=float(attributes.get("created_utc_s") or time.time()),
            created_by=str(attributes.get("created_by") or "benchctl migration 0001")[:64],
        )
    )


def downgrade() -> None:
    metadata.drop_all(op.get_bind())
