"""short_circuit end to end on the protected simulated bench against the model's hiccup and restart."""

from __future__ import annotations

import numpy as np
import pytest

from benchctl.procedure import load_procedure
from benchctl.runner import execute
from benchctl.simulated_instruments.converter.dynamics import OUTPUT_V


def _model_recovery_s(model, t_release_s: float, level_v: float, band_v: float) -> float:
    """The model's own output after the release: when it enters ±band of level for good (1 µs grid)."""
    t = t_release_s + np.arange(0.0, 0.1, 1e-6)
    v = model.terminal_series(t)[OUTPUT_V]
    outside = np.flatnonzero(np.abs(v - level_v) > band_v)
    return float(t[outside[-1] + 1] - t_release_s)


@pytest.mark.parametrize("time_scale, reading_time_s", [(1.0, None), (20.0, 0.002)])
def test_short_circuit_figures_match_the_model(protected_bench, check_protection_run, station_for, benchctl_store,
                                               tmp_path, time_scale,
                                               reading_time_s):
    bench = protected_bench(time_scale, reading_time_s)
    proc = load_procedure("short_circuit")
    params = proc.resolve_parameters(values={})
    out = execute(proc, params, station_for(bench), benchctl_store)
    assert out.status == "completed", out.message
    pts = benchctl_store.points(out.run_id)
    short = pts[pts["tag"] == "short"].iloc[-1]
    rec = pts[pts["tag"] == "recovery"].iloc[-1]
    f, d = bench.model.protection, bench.design
    assert short["clipped_samples"] == 0.0
    # Peak: the CC load sinks its setting while the output capacitance discharges (the model's first
    # on-time, converter/protection.py). 2 %: the record's maximum picks the scope noise's largest
    # excursion (a few ×0.01 A on this screen) and the int16 step.
    assert short["peak_current_a"] == pytest.approx(params.short_a, rel=0.02)
    # Later cycles: I_lim for fault_blank_s of each period, 0 between — the mean of a rectangle wave is
    # level × duty (handbook, any signals text). 2 %: the output capacitance's discharge tails at each
    # edge (τ = C·V_min/I ≈ 40 µs) and the noise's mean over the window.
    assert short["average_current_a"] == pytest.approx(d.protection.current_limit_a * f.hiccup_duty, rel=0.02)
    # Period and duty from mid-reference edges (IEEE 181-2011): the edges are rectangular to within the
    # capacitor's 40 µs and the 2 µs sample grid: period within 10 µs (0.03 %), duty within 0.003.
    assert short["hiccup_period_s"] == pytest.approx(f.hiccup_period_s, abs=1e-5)
    assert short["hiccup_duty"] == pytest.approx(f.hiccup_duty, abs=3e-3)
    # Recovery: the model's restart after the release (the next retry, then the soft start); truth from
    # the model's own output waveform, from the load's release step (the scope's trigger). 0.3 ms (≈ 1 %):
    # the model takes the event a little after the load stamps its step (processing time, tens of µs of
    # model time when accelerated) and the scope noise at the band crossing.
    start = bench.model.start_up_truth()
    release = list(bench.instruments["load"].activity.steps_between(start.t0_s - 1.0, start.t0_s + 1.0))[-1]
    assert release.to_a == pytest.approx(params.iout_a)
    truth = _model_recovery_s(bench.model, release.t_s, float(short["vout_before_v"]), params.band_v)
    assert rec["recovery_s"] == pytest.approx(truth, abs=3e-4)
    assert rec["recovery_s"] > start.switching_start_s - start.t0_s      # the retry delay is inside it
    res = benchctl_store.results(out.run_id).set_index("name")
    for name in ("short_peak_current_a", "short_average_current_a", "hiccup_period_s", "hiccup_duty",
                 "short_recovery_s"):
        assert np.isfinite(res.loc[name, "value"]), name
    assert "test_envelope" in set(benchctl_store.events(out.run_id)["kind"])
    if time_scale > 1.0:        # the report draws the procedure's plot (once: the accelerated run)
        check_protection_run(out.run_id, proc.name, "short-circuit")
