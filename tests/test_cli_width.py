"""The command line reads well at 80 columns and in a pipe (nothing cut, errors on their own lines)."""

from __future__ import annotations

import subprocess
import sys

from rich.console import Console

from benchctl.commands.console import Column, fitted_table
from benchctl.store import RunStart, Store


def _render(table, width: int) -> str:
    con = Console(width=width, record=True, no_color=True)
    con.print(table)
    return con.export_text()


def test_a_narrow_terminal_drops_columns_instead_of_cutting_cells():
    columns = [Column("run id", 0), Column("procedure", 0), Column("station", 3), Column("status", 0),
               Column("started utc", 1), Column("n points", 2)]
    rows = [["12", "efficiency_map", "bench-3 telecom brick station", "interrupted", "2026-12-02 04:28:16", "143"]]
    table, hidden = fitted_table("runs", columns, rows, width=80)
    text = _render(table, 80)
    assert "…" not in text
    for cell in ("interrupted", "2026-12-02 04:28:16", "efficiency_map"):
        assert cell in text
    assert hidden == ["station"]
    assert max(len(line) for line in text.splitlines()) <= 80


def _cli(*args: str, cwd) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "benchctl.cli", *args], cwd=cwd, capture_output=True, text=True,
                          timeout=120, env={"PATH": "/usr/bin:/bin", "COLUMNS": "80"})


def test_runs_in_a_pipe_is_complete(tmp_path):
    with Store.open(tmp_path / "t.db") as st:
        run = st.begin_run(RunStart(procedure="efficiency_map", procedure_sha256="e" * 64,
                                    station_name="a-station-name-long-enough-to-crowd-the-table",
                                    dut_part="FB-48S05", dut_revision="B", dut_serial="0007"))
        st.end_run(run, "interrupted", "stopped")
    out = _cli("runs", "--db", str(tmp_path / "t.db"), cwd=tmp_path).stdout
    for cell in ("interrupted", "a-station-name-long-enough-to-crowd-the-table", "FB-48S05", "0007"):
        assert cell in out
    assert "…" not in out and "\x1b[" not in out  # nothing cut, no colour codes in a pipe


def test_an_unreachable_instrument_is_one_note_under_the_table(tmp_path):
    station = tmp_path / "st.toml"
    station.write_text(
        '[station]\nname = "b"\n[limits]\nsource_voltage_max_v = 20.0\nsource_current_max_a = 2.0\n'
        'dut_output_voltage_max_v = 6.0\nload_current_max_a = 5.5\nload_power_max_w = 33.0\n'
        '[instruments.source]\ndriver = "dc_source"\nresource = "TCPIP::127.0.0.1::1::SOCKET"\ntimeout_s = 0.5\n',
        encoding="utf-8")
    done = _cli("instruments", "--station", str(station), cwd=tmp_path)
    assert done.returncode == 3
    lines = done.stdout.splitlines()
    assert len(lines) <= 8, done.stdout
    note = [line for line in lines if line.startswith("1. source: FAILED")]
    assert note and "connection refused" in note[0]
