"""The store's tables (SQLAlchemy Core) and the one place the schema is created.

Layout (``→`` is a foreign key)::

    meta            one row: schema_version, created_utc_s, created_by
    stations        name, description, station file text and its sha256
    duts            part_number, revision, serial
    runs            run_uuid, procedure, procedure_sha256, parameters_json, → stations, → duts,
                    operator, host, pid, benchctl_version, job_id, status, message,
                    started_utc_s, ended_utc_s
    instruments     → runs, → stations, role, driver, resource, identity (as found at run start)
    quantities      → runs, name, unit           (one row per quantity name of a run)
    points          (run_id, seq) key, t_utc_s, tag, settled, settle_time_s, settle_json
    point_values    (run_id, seq) → points, → quantities, value   (long form)
    events          → runs, t_utc_s, kind, message, details_json, point_seq
    results         → runs, name, value (nullable), unit, details_json, scope_json,
                    uncertainty, expanded_uncertainty (nullable; standard and k = 2)
    jobs            job_uuid, name, station_name, host, started_utc_s (runs.job_id names a row)
    arrays          → runs, point_seq (nullable), name, meta_json
    array_columns   → arrays, position, name, unit, dtype, shape_json, data (raw little-endian bytes)

Times are float seconds since the Unix epoch, UTC (portable across engines, 0.2 µs
resolution today). Text columns use ``""`` rather than NULL where "unknown" needs
no distinction, so unique constraints behave the same on every engine.

Schema version 3 adds how each point settled (``points.settle_json``), the uncertainty
of results and the ``jobs`` table whose ids the database assigns.

``runs.run_uuid`` (schema version 2) names a run the same way in every database it is
copied to, so moving a run from a station's file to the shared database is idempotent.

Versions: the layout below is :data:`SCHEMA_VERSION`; each version has one Alembic
revision in :mod:`benchctl.store.migrations` whose id is the version number written
with four digits (version 2 = revision ``"0002"``). Only :func:`create_schema` creates
tables in an empty database (at the head revision); older stores are brought up to
date by the migrations (``benchctl db upgrade``).
"""

from __future__ import annotations

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
    PrimaryKeyConstraint,
    String,
    Table,
    Text,
    UniqueConstraint,
)
from sqlalchemy.engine import Connection

SCHEMA_VERSION = 3
"""Integer version of the table layout below; bump it with every layout change and add
the migration that makes it (``benchctl/store/migrations/versions/NNNN_*.py``)."""

VERSION_TABLE = "alembic_version"
"""Table where Alembic keeps the revision a database is at (Alembic's default name)."""


def revision_of_version(version: int) -> str:
    """Alembic revision id of a schema version: ``2`` -> ``"0002"``."""
    return f"{int(version):04d}"


def version_of_revision(revision: str) -> int | None:
    """Schema version of an Alembic revision id, ``None`` for an id benchctl never wrote."""
    text = revision.strip()
    if len(text) != 4 or not text.isdigit():
        return None
    return int(text)


HEAD_REVISION = revision_of_version(SCHEMA_VERSION)

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
    # uuid4 text (RFC 4122); "" only as the column default so ADD COLUMN works on every
    # engine - every run the store writes or copies has one (unique index below).
    Column("run_uuid", String(36), nullable=False, server_default=""),
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
    Index("runs_uuid_idx", "run_uuid", unique=True),
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
    # How the point was settled and verified (JSON object; ``{}`` before schema version 3).
    Column("settle_json", Text, nullable=False, server_default="{}"),
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
    Column("uncertainty", Float, nullable=True),  # standard uncertainty u, in ``unit`` (GUM 2.3.1)
    Column("expanded_uncertainty", Float, nullable=True),  # U = k·u with k = 2 (GUM 2.3.5)
)

jobs = Table(
    "jobs",
    metadata,
    Column("id", Integer, primary_key=True),  # assigned by the database: unique across stations
    Column("job_uuid", String(36), nullable=False),
    Column("name", String(200), nullable=False, server_default=""),
    Column("station_name", String(200), nullable=False, server_default=""),
    Column("host", String(255), nullable=False, server_default=""),
    Column("started_utc_s", Float, nullable=False),
    Index("jobs_uuid_idx", "job_uuid", unique=True),
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

# Tables that must all be present in a store of this version.
TABLE_NAMES = tuple(metadata.tables)


# Alembic's version table, as Alembic itself creates it (alembic.runtime.migration).
_version_metadata = MetaData()
alembic_version = Table(
    VERSION_TABLE,
    _version_metadata,
    Column("version_num", String(32), nullable=False),
    PrimaryKeyConstraint("version_num", name="alembic_version_pkc"),
)


def create_schema(conn: Connection, *, created_utc_s: float, created_by: str) -> None:
    """Create every table and the meta row in an empty database (inside ``conn``'s
    transaction), stamped with the head revision.

    Method: create the current tables, then record the head revision - the way Alembic
    documents for a new database (Alembic docs, "Cookbook: Building an Up to Date
    Database from Scratch"); the test suite checks it equals running every migration.
    """
    metadata.create_all(conn)
    _version_metadata.create_all(conn)
    conn.execute(alembic_version.insert().values(version_num=HEAD_REVISION))
    conn.execute(
        meta.insert().values(
            id=1, schema_version=SCHEMA_VERSION, created_utc_s=created_utc_s, created_by=created_by[:64]
        )
    )
