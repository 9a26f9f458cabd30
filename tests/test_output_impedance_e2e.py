"""output_impedance end to end: load modulation + analyzer ratio over real sockets, against the model."""

from __future__ import annotations

import numpy as np
import pytest

from benchctl.commands.check import load_run_data
from benchctl.exit_codes import EXIT_OK
from benchctl.limits import check_limits, load_limits
from benchctl.procedure import load_procedure, procedures_dir
from benchctl.report import build_report
from benchctl.runner import execute
from benchctl.simulated_instruments.converter import ConverterModel, ManualClock

LIMIT_A = 1.389     # the simulated flyback station's source_current_max_a


def _truth(bench, vin_v, iout_a, f):
    """The model's closed-loop output impedance at the terminals at the same settings (a fresh model)."""
    model = ConverterModel(bench.design, clock=ManualClock(), seed=0)
    model.set_source(vin_v, LIMIT_A, True)
    model.set_load("CC", iout_a, True)
    return model.terminal_output_impedance(f)


def _errors(store, run_id, bench):
    out = []
    for _, row in store.points(run_id).iterrows():
        a = store.array(run_id, "zout", int(row["seq"]))
        z = a["re"] + 1j * a["im"]
        zt = _truth(bench, row["vin_set_v"], row["iout_set_a"], a["freq_hz"])
        out.append((row, a, 20 * np.log10(np.abs(z) / np.abs(zt)), np.rad2deg(np.angle(z / zt)), zt))
    return out


# Tolerances: each analyzer channel carries complex noise of sigma = 5 uV/sqrt(Hz)·sqrt(RBW) (16 uV at
# 10 Hz); the smallest signal is ~1 mV (|Z| ~ 2 mohm x 0.5 A at 10 Hz; above the load modulator's 30 kHz
# pole the current falls, ~1.7 mV at 100 kHz), so the relative error stays below 4 sigma/|v| ~ 6 %:
# 0.5 dB and 3.5 deg.  The issue asks for 1 dB; the phase is held to 4 deg.  The monitor's 1 MHz pole
# (5.7 deg at 100 kHz) is divided out by the procedure, so it is not in the error.
MAG_TOL_DB, PHASE_TOL_DEG = 1.0, 4.0


def test_output_impedance_matches_the_model_over_the_band(simulated_bench, station_for, benchctl_store, tmp_path):
    bench = simulated_bench("flyback-48v-5v", time_scale=200.0)
    proc = load_procedure("output_impedance")
    params = proc.resolve_parameters(values={"vin_v": [36.0, 75.0], "iout_a": [2.5, 5.0],
                                             "source_current_limit_a": LIMIT_A})
    out = execute(proc, params, station_for(bench), benchctl_store)
    assert out.status == "completed", out.message
    errors = _errors(benchctl_store, out.run_id, bench)
    assert len(errors) == 4
    for row, a, err_db, err_deg, zt in errors:
        assert a["freq_hz"][0] == pytest.approx(10.0) and a["freq_hz"][-1] == pytest.approx(100e3)
        assert np.max(np.abs(err_db)) < MAG_TOL_DB
        assert np.max(np.abs(err_deg)) < PHASE_TOL_DEG
        # the stored figures: the peak within 1 dB of the truth's largest |Z| on the same grid
        assert 20 * np.log10(row["zout_peak_ohm"] / np.max(np.abs(zt))) == pytest.approx(0.0, abs=MAG_TOL_DB)
        assert row["zout_peak_at_edge"] == 0.0
        assert a.units["mag_ohm"] == "ohm" and a.units["freq_hz"] == "Hz"
        assert a.meta["monitor_bandwidth_hz"] == pytest.approx(1e6)
    res = benchctl_store.results(out.run_id)
    assert {"zout_peak_ohm", "zout_peak_freq_hz", "zout_low_freq_ohm", "max_zout_peak_ohm"} <= set(res["name"])
    peak = res[res["name"] == "zout_peak_ohm"]
    assert set(peak["unit"]) == {"ohm"}
    report = build_report(benchctl_store, out.run_id, tmp_path / "report")
    assert any("output-impedance" in p.name for p in report.png_paths), (report.png_paths, report.notes)
    limits = load_limits(procedures_dir() / "limits" / "flyback-48v-5v-outputs.toml")
    checked = check_limits(limits, load_run_data(benchctl_store, out.run_id))
    assert {o.limit.quantity for o in checked.outcomes} == {"zout_peak_ohm", "zout_low_freq_ohm"}
    assert checked.exit_code == EXIT_OK, checked.summary


def test_without_the_monitor_correction_the_phase_error_is_the_monitor_pole(simulated_bench, station_for,
                                                                             benchctl_store):
    # The load's current monitor has one pole at 1 MHz: uncorrected, the measured phase leads the truth by
    # atan(f/1 MHz) (5.7 deg at 100 kHz), which the correction removes (the test above).
    bench = simulated_bench("flyback-48v-5v", time_scale=200.0)
    proc = load_procedure("output_impedance")
    params = proc.resolve_parameters(values={"vin_v": [48.0], "iout_a": [2.5], "monitor_correction": False,
                                             "source_current_limit_a": LIMIT_A})
    out = execute(proc, params, station_for(bench), benchctl_store)
    assert out.status == "completed", out.message
    (row, a, err_db, err_deg, _), = _errors(benchctl_store, out.run_id, bench)
    expected = np.rad2deg(np.arctan(a["freq_hz"] / 1e6))
    assert np.max(np.abs(err_deg - expected)) < PHASE_TOL_DEG
    assert err_deg[-1] == pytest.approx(5.7, abs=2.0)


def test_a_modulation_larger_than_the_load_allows_is_refused(simulated_bench, station_for, benchctl_store):
    bench = simulated_bench("flyback-48v-5v", time_scale=200.0)
    proc = load_procedure("output_impedance")
    params = proc.resolve_parameters(values={"vin_v": [48.0], "iout_a": [1.0], "stimulus_v": 0.5,
                                             "source_current_limit_a": LIMIT_A})
    out = execute(proc, params, station_for(bench), benchctl_store)
    assert out.status != "completed"
    assert "modulation of ±1 A" in out.message and "lower stimulus_v" in out.message
    assert benchctl_store.points(out.run_id).empty


def test_output_impedance_at_time_scale_one(simulated_bench, station_for, benchctl_store):
    # Real time, realistic reading time (20 ms): a short sweep, same tolerances as above.
    bench = simulated_bench("flyback-48v-5v", time_scale=1.0, reading_time_s=0.02)
    proc = load_procedure("output_impedance")
    params = proc.resolve_parameters(values={"vin_v": [48.0], "iout_a": [2.5], "start_hz": 200.0,
                                             "stop_hz": 20e3, "points": 11, "stimulus_v": 0.5,
                                             "source_current_limit_a": LIMIT_A})
    out = execute(proc, params, station_for(bench), benchctl_store)
    assert out.status == "completed", out.message
    (row, a, err_db, err_deg, _), = _errors(benchctl_store, out.run_id, bench)
    assert np.max(np.abs(err_db)) < MAG_TOL_DB and np.max(np.abs(err_deg)) < PHASE_TOL_DEG
