"""The default database is found the same way from any folder of a project, and named."""

from __future__ import annotations

import subprocess
import sys

from benchctl.locations import data_dir, default_db, find_data_dir
from benchctl.store import RunStart, Store


def test_the_nearest_data_folder_up_the_tree(tmp_path, monkeypatch):
    monkeypatch.delenv("BENCHCTL_DB", raising=False)
    (tmp_path / "benchctl-data").mkdir()
    deep = tmp_path / "a" / "b"
    deep.mkdir(parents=True)
    monkeypatch.chdir(deep)
    assert find_data_dir() == (tmp_path / "benchctl-data").resolve()
    assert default_db() == str((tmp_path / "benchctl-data" / "benchctl.db").resolve())
    monkeypatch.setenv("BENCHCTL_DB", "sqlite:///elsewhere.db")
    assert default_db() == "sqlite:///elsewhere.db"


def test_without_a_data_folder_a_new_one_is_in_the_working_directory(tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    assert find_data_dir() is None
    assert data_dir() == tmp_path / "benchctl-data"


def test_commands_say_which_database_and_find_it_from_a_sub_folder(tmp_path):
    (tmp_path / "benchctl-data").mkdir()
    with Store.open(tmp_path / "benchctl-data" / "benchctl.db") as st:
        run = st.begin_run(RunStart(procedure="efficiency_map", procedure_sha256="e" * 64, station_name="bench-3"))
        st.end_run(run, "completed")
    sub = tmp_path / "analysis"
    sub.mkdir()
    done = subprocess.run([sys.executable, "-m", "benchctl.cli", "runs"], cwd=sub, capture_output=True, text=True,
                          timeout=120, env={"PATH": "/usr/bin:/bin"})
    assert done.returncode == 0, done.stderr
    assert f"database: {tmp_path / 'benchctl-data' / 'benchctl.db'}" in done.stderr
    assert "efficiency_map" in done.stdout
