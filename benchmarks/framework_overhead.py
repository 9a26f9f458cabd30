"""Framework overhead: the efficiency map through benchctl vs a bare pyvisa script.

Both talk to the same simulated bench, served by a separate process as real instruments
would be (in-process servers would share the interpreter lock with the client's threads
and charge the framework's interlock thread to the instruments), with settling disabled, so only the instrument
exchanges count) and send the same SCPI: the bare script sets each operating point,
checks the error queue after each setting, as the drivers do, and reads what
``efficiency_map`` reads with ``n_readings = 1``: one settle round (input and output power),
each meter's voltage, current and power of one integration (INIT, then FETC), and the
source's voltage read-back. benchctl adds the interlock (limit checks and
its background watch), the guarded drivers and a durable commit of every point into
SQLite. Prints ratios measured in this one run: for the whole run (benchctl also opens,
identifies and resets the instruments, programs their protection and computes the
derived results) and for the sweep alone (first to last point), with the store on disk
(every point fsync'ed: synchronous=FULL) and in memory (the framework's own cost).

    python benchmarks/framework_overhead.py [--repeat 3]
"""

from __future__ import annotations

import argparse
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import pyvisa

from benchctl.procedure import load_procedure
from benchctl.runner import execute
from benchctl.station import parse_station
from benchctl.store import Store
from benchctl.simulated_instruments.bench import SimulatedBench


def bare_script(resources: dict[str, str], plan: list[dict], ilimit_a: float) -> tuple[float, float]:
    """(whole script, sweep) in seconds, timed like the framework's."""
    rm = pyvisa.ResourceManager("@py")
    sess = {}
    for role, res in resources.items():
        s = rm.open_resource(res, read_termination="\n", write_termination="\n", timeout=2000)
        sock = rm.visalib.sessions[s.session].interface  # same TCP_NODELAY as the drivers
        import socket
        sock.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
        sess[role] = s
    src, load, mi, mo = sess["source"], sess["load"], sess["input_meter"], sess["output_meter"]

    def setting(s, text):
        s.write(text)
        s.query("SYST:ERR?")

    t0 = time.perf_counter()
    for s in sess.values():
        s.query("*IDN?")
    setting(src, f"CURR {ilimit_a:g}")
    setting(src, f"VOLT {plan[0]['vin_set_v']:g}")
    setting(load, "FUNC CURR")
    setting(load, f"CURR {plan[0]['iout_set_a']:g}")
    setting(src, "OUTP ON")
    setting(load, "INP ON")
    vin_now = plan[0]["vin_set_v"]
    rows = []
    t_sweep = time.perf_counter()
    for p in plan:
        if p["vin_set_v"] != vin_now:
            setting(src, f"VOLT {p['vin_set_v']:g}")
            vin_now = p["vin_set_v"]
        setting(load, f"CURR {p['iout_set_a']:g}")
        mi.query("MEAS:POW?")  # the settle's one round (settling disabled): Pin, Pout
        mo.query("MEAS:POW?")
        row = []
        for m in (mi, mo):  # each meter's V, I, P of one integration, as the driver reads them
            setting(m, "INIT")
            row += [float(m.query(q)) for q in ("FETC:VOLT?", "FETC:CURR?", "FETC:POW?")]
        row.append(float(src.query("MEAS:VOLT?")))  # the source read-back the setpoint is verified with
        rows.append(row)
    sweep = time.perf_counter() - t_sweep
    setting(load, "INP OFF")
    setting(src, "OUTP OFF")
    elapsed = time.perf_counter() - t0
    for s in sess.values():
        s.close()
    return elapsed, sweep


def framework(bench: object, station_text: str, values: dict, db: str) -> tuple[float, float]:
    """(whole run, sweep from the first setpoint to the last point) in seconds."""
    proc = load_procedure("efficiency_map")
    params = proc.resolve_parameters(values=values)
    station = parse_station(station_text)
    marks: list[float] = []

    def progress(done: int, total: int, _values) -> None:
        if done == 0 or done == total:
            marks.append(time.perf_counter())

    with Store.open(db) as store:
        t0 = time.perf_counter()
        outcome = execute(proc, params, station, store, settle_enabled=False, progress=progress)
        elapsed = time.perf_counter() - t0
    assert outcome.status == "completed", outcome.message
    return elapsed, marks[-1] - marks[0]


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--repeat", type=int, default=5)
    args = ap.parse_args()
    design = SimulatedBench("flyback-48v-5v")  # for its parameters and limits only; not started
    tmp_dir = tempfile.TemporaryDirectory(dir=".")
    station_file = Path(tmp_dir.name) / "station.toml"
    server = subprocess.Popen([sys.executable, "-m", "benchctl.cli", "sim", "--time-scale", "50",
                               "--station-out", str(station_file)],
                              stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    try:
        deadline = time.monotonic() + 60
        while not station_file.exists() and time.monotonic() < deadline:
            time.sleep(0.05)
        time.sleep(0.2)
        station = parse_station(station_file.read_text())
        resources = {role: cfg.resource for role, cfg in station.instruments.items()}
        values = {**design.procedure_parameters(), "load_pct": [float(x) for x in range(0, 101, 2)],
                  "n_readings": 1}  # one reading per quantity, as the bare script takes
        proc = load_procedure("efficiency_map")
        plan = proc.plan(proc.resolve_parameters(values=values))
        text = station_file.read_text().replace("watch_period_s = 0.05", "watch_period_s = 0.1")
        bare, disk, memory = [], [], []
        for k in range(args.repeat):
            bare.append(bare_script(resources, plan, design.limits.source_current_max_a))
            disk.append(framework(None, text, values, str(Path(tmp_dir.name) / f"bench{k}.db")))
            memory.append(framework(None, text, values, "sqlite://"))
        best = {name: (min(r[0] for r in runs), min(r[1] for r in runs))
                for name, runs in (("bare", bare), ("disk", disk), ("memory", memory))}
        print(f"points per run: {len(plan)}; best of {args.repeat}; whole run / sweep only")
        print(f"bare pyvisa script          : {best['bare'][0] * 1e3:7.1f} ms / {best['bare'][1] * 1e3:7.1f} ms")
        for name, label in (("memory", "benchctl, store in memory  "), ("disk", "benchctl, store on disk    ")):
            whole, sweep = best[name]
            print(f"{label} : {whole * 1e3:7.1f} ms / {sweep * 1e3:7.1f} ms   ratio "
                  f"{whole / best['bare'][0]:.2f} / {sweep / best['bare'][1]:.2f}")
        print("target: sweep ratio <= 1.15 for the framework's own cost (store in memory); "
              "on disk each point also waits for its fsync")
    finally:
        server.terminate()
        server.wait(timeout=10)
        tmp_dir.cleanup()


if __name__ == "__main__":
    main()
