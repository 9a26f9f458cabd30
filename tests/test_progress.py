"""Progress counts planned points, however many records a planned point makes."""

from __future__ import annotations

import subprocess
import sys

from benchctl.bench import Bench
from benchctl.interlock import Interlock
from benchctl.station import StationLimits


def test_two_records_per_planned_point_count_once():
    seen = []

    def recorder(values, units, **kw):
        return len(seen)

    bench = Bench(instruments={}, interlock=Interlock(StationLimits(20.0, 2.0, 6.0, 5.0, 30.0)),
                  recorder=recorder, progress=lambda done, total, values: seen.append((done, total)))
    for point in bench.sweep([{"k": 0}, {"k": 1}, {"k": 2}]):
        bench.record({"a_v": 1.0})
        bench.record({"b_v": 2.0})
    assert all(done <= total for done, total in seen)
    assert seen[-1] == (3, 3)


def test_piped_progress_is_one_complete_line(tmp_path):
    done = subprocess.run([sys.executable, "-m", "benchctl.cli", "demo", "--time-scale", "50"], cwd=tmp_path,
                          capture_output=True, text=True, timeout=600, env={"PATH": "/usr/bin:/bin"})
    assert done.returncode == 0, done.stderr
    lines = done.stdout.splitlines()
    progress = [line for line in lines if "planned points" in line and line.startswith("efficiency_map on ")]
    assert len(progress) == 1
    total = progress[0].split(": ")[-1].split()[0]
    got, planned = total.split("/")
    assert got == planned  # every planned point done, as many as planned
    assert any(line.startswith("run 1: completed") for line in lines)  # on a line of its own
