"""The CSV/JSON export: provenance header, derived columns, one time form, integer columns."""

from __future__ import annotations

import io
import json
import re
import subprocess
import sys

import pandas as pd

from benchctl.store import RunStart, Store

ISO_Z = re.compile(r"^\d{4}-\d{2}-\d{2}T\d{2}:\d{2}:\d{2}\.\d{6}Z$")  # ISO 8601, UTC designator Z


def _store(tmp_path):
    path = tmp_path / "e.db"
    with Store.open(path) as st:
        run = st.begin_run(RunStart(procedure="efficiency_map", procedure_sha256="e" * 64, station_name="bench-3",
                                    dut_part="FB-48S05", dut_revision="B", dut_serial="0007"))
        st.record_point(run, {"plan_index": 0, "pin_w": 5.6, "pout_w": 5.0, "n_readings": 8})
        st.record_point(run, {"plan_index": 1, "pin_w": 0.3, "pout_w": 0.0, "n_readings": 8})
        st.end_run(run, "completed")
    return path


def _cli(*args, cwd):
    return subprocess.run([sys.executable, "-m", "benchctl.cli", *args], cwd=cwd, capture_output=True, text=True,
                          timeout=120, check=True).stdout


def test_csv_has_provenance_derived_columns_and_integers(tmp_path):
    db = _store(tmp_path)
    text = _cli("export", "1", "--db", str(db), "--format", "csv", cwd=tmp_path)
    header = [line for line in text.splitlines() if line.startswith("# ")]
    assert any("efficiency_map on station bench-3" in line for line in header)
    assert any("FB-48S05 revision B serial 0007" in line for line in header)
    frame = pd.read_csv(io.StringIO(text), comment="#")
    # efficiency = Pout/Pin (common practice): 5.0/5.6
    assert abs(frame["efficiency_pct"].iloc[0] - 100 * 5.0 / 5.6) < 1e-9
    assert pd.isna(frame["efficiency_pct"].iloc[1])  # undefined at no load
    assert abs(frame["loss_w"].iloc[1] - 0.3) < 1e-12
    body = text.split("\n", len(header))[-1]
    assert ",0,5.6," in body.replace(" ", "") and "0.0,5.6" not in body  # plan_index 0, not 0.0
    assert all(ISO_Z.match(t) for t in frame["t_utc"])


def test_json_times_are_one_iso_form(tmp_path):
    db = _store(tmp_path)
    exported = json.loads(_cli("export", "1", "--db", str(db), "--format", "json", cwd=tmp_path))
    assert all(ISO_Z.match(p["t_utc"]) for p in exported["points"])
    assert exported["points"][0]["plan_index"] == 0 and isinstance(exported["points"][0]["plan_index"], int)
    shown = json.loads(_cli("show", "1", "--db", str(db), "--json", cwd=tmp_path))
    assert ISO_Z.match(shown["started_utc"]) and ISO_Z.match(shown["ended_utc"])
    listed = json.loads(_cli("runs", "--db", str(db), "--json", cwd=tmp_path))
    assert ISO_Z.match(listed[0]["started_utc"])
