"""Schema versions and Alembic migrations, on SQLite and on PostgreSQL (``store_url``).

External references: Alembic's own autogenerate comparison
(``alembic.autogenerate.compare_metadata``) and its revision bookkeeping
(``alembic.runtime.migration.MigrationContext.get_current_revision``,
``alembic.script.ScriptDirectory.get_current_head``); RFC 4122 UUIDs checked with the
stdlib ``uuid`` module.
"""

from __future__ import annotations

import hashlib
import uuid

import pytest
from alembic import command
from alembic.autogenerate import compare_metadata
from alembic.runtime.migration import MigrationContext
from alembic.script import ScriptDirectory
from sqlalchemy import create_engine, inspect, text
from sqlalchemy.pool import NullPool

from benchctl.errors import SchemaVersionError, StoreError
from benchctl.store import SCHEMA_VERSION, RunStart, Store, schema_state, upgrade
from benchctl.store import schema as s
from benchctl.store.migrate import AHEAD, BEHIND, CURRENT, DAMAGED, EMPTY, MIGRATIONS_DIR, alembic_config
from benchctl.store.url import normalize_url


def _engine(url: str):
    return create_engine(normalize_url(url), poolclass=NullPool)


def _script_head() -> str:
    return ScriptDirectory(str(MIGRATIONS_DIR)).get_current_head()


def _differences(url: str) -> list:
    engine = _engine(url)
    try:
        with engine.connect() as conn:
            return compare_metadata(MigrationContext.configure(conn), s.metadata)
    finally:
        engine.dispose()


def _revision(url: str) -> str | None:
    engine = _engine(url)
    try:
        with engine.connect() as conn:
            return MigrationContext.configure(conn).get_current_revision()
    finally:
        engine.dispose()


def test_revision_ids_follow_the_schema_version():
    # Alembic's view of the shipped scripts: one linear chain 0001 -> ... -> head
    script = ScriptDirectory(str(MIGRATIONS_DIR))
    chain = [rev.revision for rev in script.walk_revisions()][::-1]
    assert chain == [f"{v:04d}" for v in range(1, SCHEMA_VERSION + 1)]
    assert script.get_heads() == [s.HEAD_REVISION]


def test_new_store_and_migration_chain_give_the_same_schema(store_url, tmp_path):
    # A store created by Store.open (create_all + stamp) ...
    Store.open(store_url).close()
    assert _differences(store_url) == []  # Alembic autogenerate finds nothing to change
    assert _revision(store_url) == _script_head()
    # ... and a database built by running every migration from nothing.
    chained = str(tmp_path / "chained.db")
    result = upgrade(chained)
    assert result.from_version is None and result.to_version == SCHEMA_VERSION
    assert result.revisions_applied == tuple(f"{v:04d}" for v in range(1, SCHEMA_VERSION + 1))
    assert _differences(chained) == []
    assert _revision(chained) == _script_head()
    assert schema_state(chained).status == CURRENT


def test_migration_chain_on_the_same_engine_as_the_store(store_url):
    result = upgrade(store_url)  # empty database of the parametrized engine
    assert result.revisions_applied[0] == "0001"
    assert _differences(store_url) == []
    state = schema_state(store_url)
    assert (state.status, state.schema_version, state.revision) == (CURRENT, SCHEMA_VERSION, s.HEAD_REVISION)
    assert upgrade(store_url).revisions_applied == ()  # a second upgrade does nothing


def _insert_version_1_data(url: str) -> None:
    """Two runs with points, values, an event and a result, written as plain SQL against
    the version-1 layout (no benchctl code involved)."""
    sha = hashlib.sha256(b"efficiency map v1").hexdigest()
    engine = _engine(url)
    with engine.begin() as conn:
        conn.execute(text("INSERT INTO stations (id, name, description, station_text, station_sha256) "
                          "VALUES (1, 'sim-flyback', '36-75 V telecom flyback', NULL, '')"))
        conn.execute(text("INSERT INTO duts (id, part_number, revision, serial) VALUES (1, 'FB-48S05', 'A', 'T1')"))
        for run_id, status in ((1, "completed"), (2, "failed")):
            conn.execute(text(
                "INSERT INTO runs (id, procedure, procedure_sha256, parameters_json, station_id, dut_id, operator, "
                "host, pid, benchctl_version, job_id, status, message, started_utc_s, ended_utc_s) VALUES "
                f"({run_id}, 'efficiency_map', '{sha}', '{{}}', 1, 1, 'day-shift', 'bench-pc-1', 100, '0.1.0', NULL, "
                f"'{status}', '', {1_700_000_000 + run_id * 100}, {1_700_000_050 + run_id * 100})"))
            conn.execute(text(f"INSERT INTO quantities (id, run_id, name, unit) VALUES ({run_id * 10 + 1}, {run_id}, 'vin_v', 'V')"))
            conn.execute(text(f"INSERT INTO quantities (id, run_id, name, unit) VALUES ({run_id * 10 + 2}, {run_id}, 'pout_w', 'W')"))
            for seq in (1, 2, 3):
                conn.execute(text(f"INSERT INTO points (run_id, seq, t_utc_s, tag, settled, settle_time_s) VALUES "
                                  f"({run_id}, {seq}, {1_700_000_000 + run_id * 100 + seq}, 'ascending', TRUE, 0.1)"))
                conn.execute(text(f"INSERT INTO point_values (run_id, seq, quantity_id, value) VALUES "
                                  f"({run_id}, {seq}, {run_id * 10 + 1}, {36.0 + 12 * seq})"))
                conn.execute(text(f"INSERT INTO point_values (run_id, seq, quantity_id, value) VALUES "
                                  f"({run_id}, {seq}, {run_id * 10 + 2}, {5.0 * seq})"))
            conn.execute(text(f"INSERT INTO events (run_id, t_utc_s, kind, message, details_json, point_seq) VALUES "
                              f"({run_id}, 1700000000.5, 'info', 'started', '{{}}', NULL)"))
            conn.execute(text(f"INSERT INTO results (run_id, t_utc_s, name, value, unit, details_json, scope_json) "
                              f"VALUES ({run_id}, 1700000001.0, 'peak_efficiency', 0.9, '', 'null', '{{}}')"))
        if conn.dialect.name == "postgresql":
            # explicit ids do not advance a serial column's sequence (PostgreSQL docs, "Serial Types")
            for table in ("stations", "duts", "runs", "quantities"):
                conn.execute(text(f"SELECT setval(pg_get_serial_sequence('{table}', 'id'), (SELECT max(id) FROM {table}))"))
    engine.dispose()


def _version_1_store(url: str, *, legacy: bool) -> None:
    """A version-1 store with data; ``legacy``: made before migrations existed (no alembic_version)."""
    assert upgrade(url, to_version=1).revisions_applied == ("0001",)
    _insert_version_1_data(url)
    if legacy:
        engine = _engine(url)
        with engine.begin() as conn:
            conn.execute(text("DROP TABLE alembic_version"))
        engine.dispose()


@pytest.mark.parametrize("legacy", [False, True], ids=["stamped", "pre-migration"])
def test_upgrade_from_version_1_with_data_present(store_url, legacy):
    _version_1_store(store_url, legacy=legacy)
    state = schema_state(store_url)
    assert (state.status, state.schema_version) == (BEHIND, 1)
    assert state.revision == (None if legacy else "0001")
    # the store refuses to write to it, and says how to upgrade
    with pytest.raises(SchemaVersionError, match=r"benchctl db upgrade --db "):
        Store.open(store_url)
    assert schema_state(store_url).schema_version == 1  # refusing changed nothing

    result = upgrade(store_url)
    assert (result.from_version, result.to_version) == (1, SCHEMA_VERSION)
    assert result.revisions_applied == tuple(f"{v:04d}" for v in range(2, SCHEMA_VERSION + 1))
    assert _differences(store_url) == []
    assert _revision(store_url) == _script_head()

    with Store.open(store_url, recover=False) as store:
        runs = store.runs()
        assert sorted(runs["run_id"]) == [1, 2]
        uuids = [store.run(r).run_uuid for r in (1, 2)]
        # every existing run got a random (version 4) RFC 4122 UUID, each its own
        assert all(uuid.UUID(u).version == 4 for u in uuids) and uuids[0] != uuids[1]
        for run_id in (1, 2):
            points = store.points(run_id)
            assert points["seq"].tolist() == [1, 2, 3]
            assert points["vin_v"].tolist() == [48.0, 60.0, 72.0]
            assert points["pout_w"].tolist() == [5.0, 10.0, 15.0]
            assert store.events(run_id)["message"].tolist() == ["started"]
            assert store.results(run_id)["value"].tolist() == [0.9]
        info = store.run(1)
        assert (info.station_name, info.dut_part, info.status) == ("sim-flyback", "FB-48S05", "completed")
        # the upgraded store takes new runs, which get their own UUID
        new = store.begin_run(RunStart(procedure="efficiency_map", procedure_sha256="0" * 64,
                                       station_name="sim-flyback", dut_part="FB-48S05", dut_revision="B"))
        assert store.record_point(new, {"vin_v": 48.0}) == 1
        assert store.run(new).run_uuid not in uuids


def test_downgrade_to_version_1_and_back(store_url):
    with Store.open(store_url) as store:
        run_id = store.begin_run(RunStart(procedure="p", procedure_sha256="1" * 64, station_name="sim-pol-buck"))
        store.record_point(run_id, {"vin_v": 12.0, "vout_v": 1.2})
    engine = _engine(store_url)
    with engine.begin() as conn:
        command.downgrade(alembic_config(conn), "0001")
    engine.dispose()
    state = schema_state(store_url)
    assert (state.status, state.schema_version, state.revision) == (BEHIND, 1, "0001")
    assert "run_uuid" not in {c["name"] for c in _columns(store_url, "runs")}
    upgrade(store_url)
    with Store.open(store_url) as store:
        assert store.points(run_id)["vout_v"].tolist() == [1.2]
        assert uuid.UUID(store.run(run_id).run_uuid).version == 4


def _columns(url: str, table: str) -> list:
    engine = _engine(url)
    try:
        with engine.connect() as conn:
            return inspect(conn).get_columns(table)
    finally:
        engine.dispose()


def test_newer_store_is_refused_by_open_and_by_upgrade(store_url):
    Store.open(store_url).close()
    engine = _engine(store_url)
    with engine.begin() as conn:
        conn.execute(text("UPDATE alembic_version SET version_num = :v"), {"v": f"{SCHEMA_VERSION + 1:04d}"})
        conn.execute(text("UPDATE meta SET schema_version = :v"), {"v": SCHEMA_VERSION + 1})
    engine.dispose()
    assert schema_state(store_url).status == AHEAD
    with pytest.raises(SchemaVersionError, match="newer benchctl"):
        Store.open(store_url)
    with pytest.raises(SchemaVersionError, match="newer benchctl"):
        upgrade(store_url)


def test_disagreeing_version_records_are_reported_as_damage(store_url):
    Store.open(store_url).close()
    engine = _engine(store_url)
    with engine.begin() as conn:
        conn.execute(text("UPDATE meta SET schema_version = 1"))
    engine.dispose()
    state = schema_state(store_url)
    assert state.status == DAMAGED and "disagrees" in state.reason
    with pytest.raises(StoreError, match="damaged"):
        Store.open(store_url)
    with pytest.raises(StoreError, match="damaged"):
        upgrade(store_url)


def test_state_of_an_empty_database_and_bad_targets(store_url):
    assert schema_state(store_url).status == EMPTY
    with pytest.raises(StoreError, match="versions 1 to"):
        upgrade(store_url, to_version=SCHEMA_VERSION + 1)
    upgrade(store_url)
    with pytest.raises(SchemaVersionError, match="does not downgrade"):
        upgrade(store_url, to_version=1)
