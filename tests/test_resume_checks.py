"""A resume checks what it resumes on: a changed station is refused before anything is reset or
switched (or accepted, and the change stored with the run); options that would change the run
are refused; a run whose points are all done is finished without switching the DUT on.

Through real sockets; "nothing reset, nothing switched" is read from the simulated
instruments' own audit logs.
"""

from __future__ import annotations

import json
import tomllib

import pytest

from benchctl.cli import EXIT_BAD_INPUT, EXIT_OK, main
from benchctl.procedure import load_procedure
from benchctl.runner import DutInfo, execute
from benchctl.station import load_station
from benchctl.store import Store

VALUES = {"vin_v": [48.0], "load_pct": [25.0, 50.0, 75.0, 100.0]}


class _StopAfter:
    """A progress callback that stops the run (as Ctrl-C does) once ``n`` planned points are done."""

    def __init__(self, n: int) -> None:
        self.n = n

    def __call__(self, done: int, total: int, values) -> None:
        if done >= self.n and values:
            raise KeyboardInterrupt


def _interrupted_run(bench, station_path, db, stop_after: int) -> int:
    emap = load_procedure("efficiency_map")
    params = emap.resolve_parameters(values={**bench.procedure_parameters(), **VALUES})
    with Store.open(db) as store:
        outcome = execute(emap, params, load_station(station_path), store, dut=DutInfo("FB-48S05", "B", "7"),
                          progress=_StopAfter(stop_after))
    assert outcome.status == "interrupted", outcome.message
    return outcome.run_id


def _mark(bench) -> dict[str, int]:
    """The last audit sequence number of every instrument (what happens later is newer)."""
    return {role: max((e.seq for e in inst.audit.entries()), default=0) for role, inst in bench.instruments.items()}


def _since(bench, mark: dict[str, int]) -> dict[str, list]:
    return {role: [e for e in inst.audit.entries() if e.seq > mark[role]] for role, inst in bench.instruments.items()}


def _switched_on(entries) -> list:
    return [e for e in entries if e.kind == "state" and e.text in ("output", "input") and e.value is True]


def _resets(entries) -> list:
    return [e for e in entries if e.kind == "command" and e.text.upper().startswith("*RST")]


def test_resume_on_a_changed_station_is_refused_then_accepted_and_stored(simulated_bench, tmp_path, capsys):
    bench = simulated_bench("flyback-48v-5v", time_scale=50.0, seed=1)
    other = simulated_bench("flyback-48v-5v", time_scale=50.0, seed=2)  # another source, another serial
    path = bench.write_station(tmp_path / "bench-7.toml", name="bench-7", watch_period_s=0.05)
    original = path.read_text(encoding="utf-8")
    db = tmp_path / "runs.db"
    run_id = _interrupted_run(bench, path, db, stop_after=2)

    power = bench.limits.load_power_max_w
    changed = (original.replace(bench.resources["source"], other.resources["source"])
               .replace("watch_period_s = 0.05", "watch_period_s = 0.1")
               .replace(f"load_power_max_w = {power!r}", f"load_power_max_w = {0.95 * power!r}"))
    path.write_text(changed, encoding="utf-8")
    marks = (_mark(bench), _mark(other))
    code = main(["run", "--resume", str(run_id), "--station", str(path), "--db", str(db)])
    err = " ".join(capsys.readouterr().err.split())
    assert code == EXIT_BAD_INPUT, err
    for key in ("instruments.source.resource", "instruments.source.identity", "limits.load_power_max_w",
                "station.watch_period_s"):
        assert key in err
    assert "S0001" in err and "S0002" in err  # the identities (*IDN? serials) recorded and found
    assert "nothing was reset or switched" in err and "--accept-station-change" in err
    for b, mark in zip((bench, other), marks):
        later = [e for entries in _since(b, mark).values() for e in entries]
        assert not _resets(later) and not _switched_on(later)
    with Store.open(db) as store:
        assert store.run(run_id).status == "interrupted" and store.run(run_id).n_points == 2

    # The same instruments again, other limits and watch period: accepted when asked, and stored.
    accepted = changed.replace(other.resources["source"], bench.resources["source"])
    path.write_text(accepted, encoding="utf-8")
    assert main(["run", "--resume", str(run_id), "--station", str(path), "--db", str(db)]) == EXIT_BAD_INPUT
    capsys.readouterr()
    code = main(["run", "--resume", str(run_id), "--station", str(path), "--db", str(db), "--accept-station-change",
                 "--json"])
    out = capsys.readouterr()
    assert code == EXIT_OK, out.err
    assert json.loads(out.out.strip().splitlines()[-1])["status"] == "completed"
    with Store.open(db) as store:
        info = store.run(run_id)
        assert info.n_points == 4 and info.status == "completed"
        assert tomllib.loads(info.station_text)["station"]["watch_period_s"] == 0.1  # the new station is the record
        events = store.events(run_id)
        change = events[events["kind"] == "station_changed"]
        assert len(change) == 1
        details = change.iloc[0]["details"]
        assert {d["key"] for d in details["differences"]} == {"limits.load_power_max_w", "station.watch_period_s"}
        assert tomllib.loads(details["previous_station_text"])["station"]["watch_period_s"] == 0.05
        assert details["previous_station_sha256"] != info.station_sha256


def test_options_that_would_change_a_resumed_run_are_refused(simulated_bench, tmp_path, capsys):
    bench = simulated_bench("flyback-48v-5v")
    path = bench.write_station(tmp_path / "bench-8.toml", name="bench-8")
    params = tmp_path / "p.toml"
    params.write_text("vin_v = [36.0]\n", encoding="utf-8")
    for extra in (["--set", "vin_v=36"], ["--params", str(params)], ["--dut-part", "X"], ["--dut-rev", "C"],
                  ["--dut-serial", "9"], ["--no-settle"]):
        code = main(["run", "--resume", "1", "--station", str(path), "--db", str(tmp_path / "none.db"), *extra])
        err = " ".join(capsys.readouterr().err.split())
        assert code == EXIT_BAD_INPUT and f"{extra[0]} cannot be given with --resume" in err
    assert not (tmp_path / "none.db").exists()  # refused before the store was even opened
    assert main(["run", "efficiency_map", "--station", str(path), "--db", str(tmp_path / "none.db"),
                 "--accept-station-change"]) == EXIT_BAD_INPUT
    assert "goes with --resume" in capsys.readouterr().err
    assert not any(e.kind == "command" for inst in bench.instruments.values() for e in inst.audit.entries())


def test_resuming_a_run_with_every_point_done_finishes_it_without_switching_anything(simulated_bench, tmp_path,
                                                                                    capsys):
    bench = simulated_bench("flyback-48v-5v", time_scale=50.0)
    path = bench.write_station(tmp_path / "bench-9.toml", name="bench-9")
    db = tmp_path / "runs.db"
    run_id = _interrupted_run(bench, path, db, stop_after=len(VALUES["load_pct"]))
    with Store.open(db) as store:
        assert store.run(run_id).n_points == 4 and store.results(run_id).empty  # stopped before its analysis
    mark = _mark(bench)
    code = main(["run", "--resume", str(run_id), "--station", str(path), "--db", str(db), "--json"])
    out = capsys.readouterr()
    assert code == EXIT_OK, out.err
    result = json.loads(out.out.strip().splitlines()[-1])
    assert result["status"] == "completed" and "without opening any instrument" in result["message"]
    # Not a single message reached any instrument: nothing opened, nothing reset, nothing switched on.
    assert all(not entries for entries in _since(bench, mark).values())
    with Store.open(db) as store:
        assert store.run(run_id).status == "completed"
        names = set(store.results(run_id)["name"])
        assert {"efficiency", "load_regulation_pct"} <= names


@pytest.mark.parametrize("status", ["completed", "running"])
def test_a_run_that_cannot_be_resumed_says_why(tmp_path, capsys, status):
    from benchctl.store import RunStart

    db = tmp_path / "runs.db"
    with Store.open(db) as store:
        run_id = store.begin_run(RunStart(procedure="efficiency_map", procedure_sha256="0" * 64,
                                          station_name="bench-9", host="renamed-machine", pid=4242))
        if status == "completed":
            store.end_run(run_id, "completed")
    station = tmp_path / "bench-9.toml"
    station.write_text('[station]\nname = "bench-9"\n[limits]\nsource_voltage_max_v = 20.0\n'
                       'source_current_max_a = 1.0\ndut_output_voltage_max_v = 6.0\nload_current_max_a = 1.0\n'
                       'load_power_max_w = 5.0\n[instruments.source]\ndriver = "dc_source"\n'
                       'resource = "TCPIP::127.0.0.1::1::SOCKET"\n', encoding="utf-8")
    code = main(["run", "--resume", str(run_id), "--station", str(station), "--db", str(db)])
    err = " ".join(capsys.readouterr().err.split())
    assert code == EXIT_BAD_INPUT
    if status == "completed":
        assert "only interrupted or tripped runs can be resumed" in err
    else:
        assert "host renamed-machine, pid 4242" in err and f"benchctl mark-interrupted {run_id}" in err
