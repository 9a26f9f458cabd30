"""Settling cost of the efficiency map: benchctl against the physical limit and against a fixed wait.

One simulated flyback at time scale 1 with readings integrating over one 50 Hz line cycle
(20 ms, as a bench DC power meter does), in this process (the model's truth is needed). Three
figures, all measured in this one run:

* benchctl: ``efficiency_map`` (fit-based settle of Pin and Pout, readings of the instruments
  taken together, setpoints verified), wall time of the sweep from its first setpoint to its
  last committed point;
* the physical limit: for every point, the true time the model needs until input and output
  power stay within the settle tolerance the run used (``ConverterModel.true_settling_time_s``,
  asked right after the point is committed, before the next setting), plus the readings' own
  time: N rounds × one aperture (each instrument integrates once per round: a meter's V, I and
  P come from one integration, trigger then fetch);
* a plain script: the same setpoints, a fixed wait long enough for the slowest point to reach
  the same accuracy (the largest true settling time of the run above), then the same quantities
  read N times one after another, without threads (each meter quantity its own MEASure?).

It prints the two ratios: benchctl / physical limit (goal <= 1.3) and plain script / benchctl
(goal >= 2), and how accurate each was against the model's steady state.

    python benchmarks/settle_efficiency.py [--loads 0,10,20,50,100] [--lines 36,48,75]
"""

from __future__ import annotations

import argparse
import time

import numpy as np

from benchctl.procedure import load_procedure
from benchctl.runner import execute
from benchctl.station import parse_station
from benchctl.store import Store
from benchctl.drivers.dc_source import DcSource
from benchctl.drivers.electronic_load import ElectronicLoad
from benchctl.drivers.power_meter import PowerMeter
from benchctl.simulated_instruments.bench import SimulatedBench

APERTURE_S = 0.02
WATCH_PERIOD_S = 0.1  # the station default (benchctl.station)
#: Integrations per round on the busiest instrument: a meter gives V, I and P of one integration
#: (trigger then fetch), the source its voltage read-back: one each.
INTEGRATIONS_PER_ROUND = 1


def framework(bench: SimulatedBench, values: dict, watch_period_s: float) -> tuple[float, list[dict], dict]:
    """(sweep wall time s, per-point truth and measurement, the run's settle tolerances)."""
    emap = load_procedure("efficiency_map")
    params = emap.resolve_parameters(values={**bench.procedure_parameters(), **values})
    station = parse_station(bench.station_toml(watch_period_s=watch_period_s))
    rel, abs_w = params.settle_rel_tol, params.settle_abs_tol_w
    marks: list[float] = []
    truth: dict[int, dict] = {}

    def progress(done: int, total: int, last) -> None:
        if done == 0 and not marks:
            marks.append(time.perf_counter())
        if last and "plan_index" in last and int(last["plan_index"]) not in truth:
            m = bench.model
            k = int(last["plan_index"])
            t_in = m.true_settling_time_s("input_w", abs_tol=abs_w, rel_tol=rel)
            t_out = m.true_settling_time_s("output_w", abs_tol=abs_w, rel_tol=rel)
            ss = m.steady_state(m.terminals().input_v, "CC", last["iout_set_a"], was_running=True)
            truth[k] = {"settle_s": max(t_in, t_out) / bench.clock.scale,  # model s -> wall s
                        "eta_true": ss.pout_w / ss.pin_w if ss.pin_w else np.nan, "pin_true": ss.pin_w}
            marks.append(time.perf_counter())

    with Store.open("sqlite://") as store:
        outcome = execute(emap, params, station, store, progress=progress)
        assert outcome.status == "completed", outcome.message
        points = store.points(outcome.run_id)
    rows = []
    for _, r in points.iterrows():
        t = truth[int(r["plan_index"])]
        rows.append({**t, "vin_set_v": r["vin_set_v"], "iout_set_a": r["iout_set_a"], "settled": bool(r["settled"]),
                     "eta": r["pout_w"] / r["pin_w"], "pin_w": r["pin_w"]})
    return marks[-1] - marks[0], rows, {"rel": rel, "abs_w": abs_w, "n": params.n_readings}


def plain_script(bench: SimulatedBench, plan: list[dict], wait_s: float, n: int, ilimit_a: float) -> tuple[float, list]:
    """Fixed wait then sequential readings, with the project's drivers (no interlock, no store)."""
    r = bench.resources
    with DcSource(r["source"]) as src, ElectronicLoad(r["load"]) as load, PowerMeter(r["input_meter"]) as mi, \
            PowerMeter(r["output_meter"]) as mo:
        src.set_current_limit(ilimit_a)
        src.set_voltage(plan[0]["vin_set_v"])
        load.set_mode("CC")
        load.set_current(plan[0]["iout_set_a"])
        src.set_output(True)
        time.sleep(0.05)
        load.set_input(True)
        vin_now, rows = plan[0]["vin_set_v"], []
        t0 = time.perf_counter()
        for p in plan:
            if p["vin_set_v"] != vin_now:
                src.set_voltage(p["vin_set_v"])
                vin_now = p["vin_set_v"]
            load.set_current(p["iout_set_a"])
            time.sleep(wait_s)
            values = {k: [] for k in ("vin", "iin", "pin", "vout", "iout", "pout", "vsrc")}
            for _ in range(n):
                for key, read in (("vin", mi.measure_voltage), ("iin", mi.measure_current), ("pin", mi.measure_power),
                                  ("vout", mo.measure_voltage), ("iout", mo.measure_current),
                                  ("pout", mo.measure_power), ("vsrc", src.measure_voltage)):
                    values[key].append(read())
            ss = bench.model.steady_state(bench.model.terminals().input_v, "CC", p["iout_set_a"], was_running=True)
            rows.append((np.mean(values["pout"]) / np.mean(values["pin"]), ss.pout_w / ss.pin_w if ss.pin_w else np.nan))
        sweep = time.perf_counter() - t0
        load.set_input(False)
        src.set_output(False)
    return sweep, rows


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--loads", default="0,10,20,50,100", help="load points, % of rated")
    ap.add_argument("--lines", default="36,48,75", help="input voltages, V")
    args = ap.parse_args()
    loads = [float(x) for x in args.loads.split(",")]
    lines = [float(x) for x in args.lines.split(",")]
    with SimulatedBench("flyback-48v-5v", time_scale=1.0, reading_time_s=APERTURE_S) as bench:
        values = {"vin_v": lines, "load_pct": loads}
        sweep_s, rows, tol = framework(bench, values, WATCH_PERIOD_S)
        # The same sweep with the interlock watch reading every 10 s: what the watch's own readings
        # (20 ms each, on the same instruments) cost the sweep. A diagnostic only.
        quiet_s, quiet_rows, _ = framework(bench, values, 10.0)
        settle_true = [r["settle_s"] for r in rows]
        readings_s = len(rows) * tol["n"] * INTEGRATIONS_PER_ROUND * APERTURE_S
        limit_s = sum(settle_true) + readings_s
        emap = load_procedure("efficiency_map")
        plan = emap.plan(emap.resolve_parameters(values={**bench.procedure_parameters(), **values}))
        wait_s = max(settle_true)
        plain_s, plain_rows = plain_script(bench, plan, wait_s, tol["n"], bench.limits.source_current_max_a)

    loaded = [r for r in rows if r["iout_set_a"] > 0]
    fw_err = max(abs(r["eta"] - r["eta_true"]) for r in loaded) * 100
    pl_err = max(abs(a - b) for (a, b), p in zip(plain_rows, plan) if p["iout_set_a"] > 0) * 100
    print(f"flyback-48v-5v, time scale 1, {APERTURE_S * 1e3:g} ms readings, {len(rows)} points, "
          f"N = {tol['n']} readings, settle tolerance {tol['rel']:g} of Pin/Pout or {tol['abs_w']:g} W")
    print(f"true settling times: sum {sum(settle_true):.3f} s, largest {wait_s:.3f} s; "
          f"readings' own time {readings_s:.3f} s")
    print(f"physical limit      : {limit_s:7.3f} s")
    print(f"benchctl sweep      : {sweep_s:7.3f} s   worst efficiency error {fw_err:.4f} %-points, "
          f"{sum(r['settled'] for r in rows)}/{len(rows)} points settled")
    print(f"fixed-wait script   : {plain_s:7.3f} s   (wait {wait_s:.3f} s per point) worst efficiency error "
          f"{pl_err:.4f} %-points")
    print(f"ratio benchctl / physical limit : {sweep_s / limit_s:.2f}   (goal <= 1.3)")
    print(f"ratio fixed wait / benchctl     : {plain_s / sweep_s:.2f}   (goal >= 2)")
    q_limit = sum(r["settle_s"] for r in quiet_rows) + readings_s
    print(f"diagnostic, interlock watch every 10 s instead of {WATCH_PERIOD_S:g} s: sweep {quiet_s:.3f} s, "
          f"ratio to the physical limit {quiet_s / q_limit:.2f}, fixed wait / benchctl {plain_s / quiet_s:.2f}")


if __name__ == "__main__":
    main()
