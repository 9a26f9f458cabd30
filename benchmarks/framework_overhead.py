"""Framework overhead: the efficiency map through benchctl vs a bare pyvisa script.

Both talk to the same simulated bench (settling disabled, so only the instrument
exchanges count) and send the same SCPI: the bare script sets each operating point,
checks the error queue after each setting, as the drivers do, and reads the six meter
quantities plus the two settle readings. benchctl adds the interlock (limit checks and
its background watch), the guarded drivers and a durable commit of every point into
SQLite. Prints the ratio measured in this one run.

    python benchmarks/framework_overhead.py [--repeat 3]
"""

from __future__ import annotations

import argparse
import tempfile
import time
from pathlib import Path

import pyvisa

from benchctl.procedure import load_procedure
from benchctl.runner import execute
from benchctl.station import parse_station
from benchctl.store import Store
from simulated_instruments.bench import SimulatedBench


def bare_script(resources: dict[str, str], plan: list[dict], ilimit_a: float) -> float:
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
    setting(src, f"CURR {ilimit_a:g}")
    setting(src, f"VOLT {plan[0]['vin_set_v']:g}")
    setting(load, "FUNC CURR")
    setting(load, f"CURR {plan[0]['iout_set_a']:g}")
    setting(src, "OUTP ON")
    setting(load, "INP ON")
    vin_now = plan[0]["vin_set_v"]
    rows = []
    for p in plan:
        if p["vin_set_v"] != vin_now:
            setting(src, f"VOLT {p['vin_set_v']:g}")
            vin_now = p["vin_set_v"]
        setting(load, f"CURR {p['iout_set_a']:g}")
        mo.query("MEAS:VOLT?")
        mi.query("MEAS:CURR?")
        rows.append([float(m.query(q)) for m, q in ((mi, "MEAS:VOLT?"), (mi, "MEAS:CURR?"), (mi, "MEAS:POW?"),
                                                    (mo, "MEAS:VOLT?"), (mo, "MEAS:CURR?"), (mo, "MEAS:POW?"))])
    setting(load, "INP OFF")
    setting(src, "OUTP OFF")
    elapsed = time.perf_counter() - t0
    for s in sess.values():
        s.close()
    return elapsed


def framework(bench: SimulatedBench, station_text: str, values: dict, db: Path) -> float:
    proc = load_procedure("efficiency_map")
    params = proc.resolve_parameters(values=values)
    station = parse_station(station_text)
    with Store.open(str(db)) as store:
        t0 = time.perf_counter()
        outcome = execute(proc, params, station, store, settle_enabled=False)
        elapsed = time.perf_counter() - t0
    assert outcome.status == "completed", outcome.message
    return elapsed


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--repeat", type=int, default=3)
    args = ap.parse_args()
    bench = SimulatedBench("flyback-48v-5v", time_scale=50.0).start()
    try:
        values = {**bench.procedure_parameters(), "load_pct": [float(x) for x in range(0, 101, 5)]}
        proc = load_procedure("efficiency_map")
        plan = proc.plan(proc.resolve_parameters(values=values))
        text = bench.station_toml(watch_period_s=0.1)
        bare, ours = [], []
        with tempfile.TemporaryDirectory() as tmp:
            for k in range(args.repeat):
                bare.append(bare_script(bench.resources, plan, bench.limits.source_current_max_a))
                ours.append(framework(bench, text, values, Path(tmp) / f"bench{k}.db"))
        print(f"points per run: {len(plan)}")
        print(f"bare pyvisa script: best {min(bare) * 1e3:.1f} ms")
        print(f"benchctl run      : best {min(ours) * 1e3:.1f} ms (includes instrument open/identify/reset, "
              f"protection set-up, interlock watch, durable commit per point)")
        print(f"ratio benchctl / bare = {min(ours) / min(bare):.2f}  (target <= 1.15)")
    finally:
        bench.stop()


if __name__ == "__main__":
    main()
