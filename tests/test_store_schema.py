"""Schema creation, version check and the SQLite settings the durability promise rests on."""

from __future__ import annotations

import hashlib
import sqlite3

import pytest

from benchctl.errors import SchemaVersionError, StoreError
from benchctl.store import SCHEMA_VERSION, RunStart, Store


def _start() -> RunStart:
    return RunStart(procedure="efficiency_map", procedure_sha256=hashlib.sha256(b"p").hexdigest(),
                    station_name="sim-flyback")


def test_new_store_has_meta_row_and_head_revision(tmp_path):
    path = tmp_path / "new.db"
    Store.open(path).close()
    # read with the stdlib sqlite3 module, independent of the store's code
    with sqlite3.connect(path) as raw:
        rows = raw.execute("SELECT id, schema_version FROM meta").fetchall()
        revisions = raw.execute("SELECT version_num FROM alembic_version").fetchall()
    assert rows == [(1, SCHEMA_VERSION)]
    # the revision Alembic itself reports as head of the shipped scripts (alembic.script.ScriptDirectory)
    from alembic.script import ScriptDirectory

    from benchctl.store.migrate import MIGRATIONS_DIR

    assert revisions == [(ScriptDirectory(str(MIGRATIONS_DIR)).get_current_head(),)]


def test_sqlite_pragmas_wal_full_foreign_keys(tmp_path):
    path = tmp_path / "pragmas.db"
    with Store.open(path) as store:
        with store._engine.connect() as conn:  # the store's own connections
            dbapi = conn.connection.dbapi_connection
            # SQLite docs, "PRAGMA journal_mode": returns the new mode, 'wal'
            assert dbapi.execute("PRAGMA journal_mode").fetchone()[0] == "wal"
            # SQLite docs, "PRAGMA synchronous": 0 OFF, 1 NORMAL, 2 FULL, 3 EXTRA
            assert dbapi.execute("PRAGMA synchronous").fetchone()[0] == 2
            # SQLite docs, "SQLite Foreign Key Support" §2: off unless PRAGMA foreign_keys=ON per connection
            assert dbapi.execute("PRAGMA foreign_keys").fetchone()[0] == 1
    # WAL is a persistent property of the file (SQLite docs, "Write-Ahead Logging" §3.3)
    with sqlite3.connect(path) as raw:
        assert raw.execute("PRAGMA journal_mode").fetchone()[0] == "wal"


def test_foreign_keys_are_enforced(tmp_path):
    path = tmp_path / "fk.db"
    with Store.open(path) as store:
        with store._engine.connect() as conn:
            dbapi = conn.connection.dbapi_connection
            with pytest.raises(sqlite3.IntegrityError):
                dbapi.execute("INSERT INTO points (run_id, seq, t_utc_s, tag, settled) VALUES (12345, 1, 0, '', 1)")
            dbapi.rollback()


@pytest.mark.parametrize("other_version", [SCHEMA_VERSION + 1, 1])
def test_other_schema_version_is_refused_with_both_versions_named(tmp_path, other_version):
    path = tmp_path / "versioned.db"
    with Store.open(path) as store:
        run_id = store.begin_run(_start())
        store.record_point(run_id, {"vin_v": 48.0})
    with sqlite3.connect(path) as raw:
        raw.execute("UPDATE meta SET schema_version = ?", (other_version,))
        raw.execute("UPDATE alembic_version SET version_num = ?", (f"{other_version:04d}",))
    with pytest.raises(SchemaVersionError) as info:
        Store.open(path)
    text = str(info.value)
    assert f"schema version {other_version}" in text
    assert f"needs schema version {SCHEMA_VERSION}" in text
    assert str(path) in text
    if other_version > SCHEMA_VERSION:
        assert "upgrade benchctl" in text and "newer" in text
    else:
        assert f"benchctl db upgrade --db sqlite:///{path}" in text
    # refusing must not have touched the file: the point is still there, version unchanged
    with sqlite3.connect(path) as raw:
        assert raw.execute("SELECT schema_version FROM meta").fetchone()[0] == other_version
        assert raw.execute("SELECT count(*) FROM points").fetchone()[0] == 1


def test_foreign_sqlite_database_is_not_taken_over(tmp_path):
    path = tmp_path / "other.db"
    with sqlite3.connect(path) as raw:
        raw.execute("CREATE TABLE invoices (id INTEGER PRIMARY KEY)")
    with pytest.raises(StoreError, match="not a benchctl store"):
        Store.open(path)
    with sqlite3.connect(path) as raw:
        names = [r[0] for r in raw.execute("SELECT name FROM sqlite_master WHERE type='table'")]
    assert names == ["invoices"]


def test_file_that_is_not_a_database(tmp_path):
    path = tmp_path / "notes.db"
    path.write_text("this is a text file, not SQLite\n" * 100)
    with pytest.raises(StoreError, match="cannot open store"):
        Store.open(path)


def test_missing_directory_is_reported(tmp_path):
    with pytest.raises(StoreError, match="does not exist"):
        Store.open(tmp_path / "no" / "such" / "dir" / "runs.db")


def test_empty_meta_and_missing_tables_are_reported(tmp_path):
    path = tmp_path / "damaged.db"
    Store.open(path).close()
    with sqlite3.connect(path) as raw:
        raw.execute("DROP TABLE array_columns")
    with pytest.raises(StoreError, match="lacks tables array_columns"):
        Store.open(path)
    with sqlite3.connect(path) as raw:
        raw.execute("DELETE FROM meta")
    with pytest.raises(StoreError, match="empty 'meta'"):
        Store.open(path)


def test_path_and_sqlite_url_open_the_same_file(tmp_path):
    path = tmp_path / "same.db"
    with Store.open(str(path)) as store:
        run_id = store.begin_run(_start())
    with Store.open(f"sqlite:///{path}") as store:
        assert store.run(run_id).procedure == "efficiency_map"
        assert store.url == f"sqlite:///{path}"
