"""`benchctl analyze turn-on`, `inrush`, `line-step`, `hold-up` and `warm-up` on a user's CSV, against closed forms."""

from __future__ import annotations

import argparse
import json
import math

import numpy as np
import pytest

from benchctl.commands.analyze import add_analyze_arguments, cmd_analyze


def _cli(argv: list[str]) -> int:
    parser = argparse.ArgumentParser(prog="benchctl")
    add_analyze_arguments(parser.add_subparsers(dest="command"))
    return cmd_analyze(parser.parse_args(argv))


def _write(path, header, columns):
    rows = "\n".join(",".join(repr(float(v)) for v in row) for row in zip(*columns))
    path.write_text(header + "\n" + rows + "\n", encoding="utf-8")
    return str(path)


def test_turn_on_and_turn_off_from_csv(tmp_path, capsys):
    # input steps to 48 V at 0; output ramps linearly from 2 ms over 8 ms: delay 2.8 ms from the
    # input's 90 % level, rise 0.8 × 8 ms (IEEE 181-2011 10/90 % levels, from memory)
    t = np.arange(-1000, 15001) * 1e-6
    vin = np.where(t >= 0, 48.0, 0.0)
    vout = 5.0 * np.clip((t - 2e-3) / 8e-3, 0.0, 1.0)
    f = _write(tmp_path / "start.csv", "time_s,vout_v,vin_v", (t, vout, vin))
    assert _cli(["analyze", "turn-on", f, "--vin-column", "vin_v", "--json"]) == 0
    out = json.loads(capsys.readouterr().out)["result"]
    assert out["rise_time_s"] == pytest.approx(6.4e-3, rel=1e-6)
    assert out["delay_s"] == pytest.approx(2.8e-3, abs=1.1e-6)     # the input edge lies within one sample
    assert out["monotonic"] is True
    # turn-off: an RC discharge from 5 V, 90 -> 10 % in RC·ln 9
    rc = 1e-3
    vout_off = np.where(t < 0, 5.0, 5.0 * np.exp(-np.maximum(t, 0) / rc))
    f = _write(tmp_path / "stop.csv", "time_s,vout_v,vin_v", (t, vout_off, 48.0 - vin))
    assert _cli(["analyze", "turn-on", f, "--vin-column", "vin_v", "--turn-off", "--final-v", "0", "--json"]) == 0
    out = json.loads(capsys.readouterr().out)["result"]
    assert out["fall_time_s"] == pytest.approx(rc * math.log(9.0), rel=1e-3)


def test_inrush_from_csv(tmp_path, capsys):
    # a source at its 2 A limit charging 10 µF to 48 V: 240 µs at 2 A, I²t = I·C·V = 9.6e-4 A²s
    t = np.arange(-50, 500) * 1e-6
    i = np.where((t >= 0) & (t < 240e-6), 2.0, 0.0)
    f = _write(tmp_path / "iin.csv", "time_s,iin_a", (t, i))
    assert _cli(["analyze", "inrush", f, "--source-limit-a", "2", "--json"]) == 0
    out = json.loads(capsys.readouterr().out)["result"]
    assert out["peak_a"] == 2.0 and out["peak_to_limit"] == 1.0
    assert out["i2t_a2s"] == pytest.approx(2.0 * 10e-6 * 48.0, rel=0.01)


def test_line_step_of_a_first_order_recovery(tmp_path, capsys):
    # v = 5 + 0.2·e^(−t/τ) after the step (first-order step response, handbook): peak +0.2 V at 0+, back in a
    # 10 mV band after τ·ln(0.2/0.01) = 0.5 ms · 3.0 = 1.50 ms
    t = np.arange(-500, 5001) * 1e-6
    v = np.where(t < 0, 5.0, 5.0 + 0.2 * np.exp(-np.clip(t, 0, None) / 0.5e-3))
    f = _write(tmp_path / "step.csv", "time_s,vout_v", (t, v))
    assert _cli(["analyze", "line-step", f, "--band-v", "0.01", "--json"]) == 0
    out = json.loads(capsys.readouterr().out)["result"]
    assert out["peak_deviation_v"] == pytest.approx(0.2, rel=1e-3)
    assert out["recovery_s"] == pytest.approx(0.5e-3 * math.log(20.0), abs=2e-6)  # one sample of 1 µs
    assert out["recovered"] is True


def test_hold_up_at_constant_power_against_the_energy_balance(tmp_path, capsys):
    # 470 µF from 48 V at 25 W: v² falls linearly, v(t)² = V1² − 2·P·t/C; the output leaves its band when
    # the input reaches 32 V, after ½·C·(48² − 32²)/P = 12.03 ms (energy balance, common practice)
    c, p, v1, v2 = 470e-6, 25.0, 48.0, 32.0
    t_hold = 0.5 * c * (v1 ** 2 - v2 ** 2) / p
    t = np.arange(-2000, 20001) * 1e-6
    vin = np.sqrt(np.clip(v1 ** 2 - 2 * p * np.clip(t, 0, None) / c, v2 ** 2, None))
    vout = np.where(t < t_hold, 5.0, 5.0 - 2000.0 * (t - t_hold))  # then it drains at 2 kV/s
    vout = np.clip(vout, 0.0, None)
    f = _write(tmp_path / "dropout.csv", "time_s,vin_v,vout_v", (t, vin, vout))
    assert _cli(["analyze", "hold-up", f, "--vin-column", "vin_v", "--vout-column", "vout_v", "--band-v", "0.25",
                 "--capacitance-f", str(c), "--power-w", str(p), "--json"]) == 0
    data = json.loads(capsys.readouterr().out)
    out = data["result"]
    # the output leaves the 0.25 V band 0.125 ms after the input reaches 32 V (0.25 V at 2 kV/s)
    assert out["hold_up_s"] == pytest.approx(t_hold + 0.125e-3, rel=0.01)
    assert float(data["energy_hold_up_s"]) == pytest.approx(t_hold, rel=0.01)


def test_warm_up_fit_recovers_the_time_constant(tmp_path, capsys):
    # T(t) = T∞ + (T0 − T∞)·e^(−t/τ) (first-order thermal network, common practice), τ = 240 s, 25 -> 80 °C
    t = np.arange(0, 1800, 5.0)
    temp = 80.0 + (25.0 - 80.0) * np.exp(-t / 240.0)
    f = _write(tmp_path / "log.csv", "time_s,rectifier_c,ambient_c", (t, temp, np.full_like(t, 25.0)))
    assert _cli(["analyze", "warm-up", f, "--column", "rectifier_c", "--ambient-column", "ambient_c", "--json"]) == 0
    data = json.loads(capsys.readouterr().out)
    assert data["result"]["tau_s"] == pytest.approx(240.0, rel=1e-3)
    assert data["result"]["t_final_c"] == pytest.approx(80.0, abs=0.01)
    assert float(data["rise_at_end_k"]) == pytest.approx(55.0, abs=0.01)


def test_hiccup_of_a_rectangle_wave(tmp_path, capsys):
    # 6 A for 3 ms every 30 ms (a hiccup current limit), after a 9 A first discharge: period 30 ms, duty 0.1,
    # mean over whole periods = level·duty = 0.6 A (the mean of a rectangle wave, handbook)
    t = np.arange(0, 200_000) * 1e-6
    i = np.where((t % 30e-3) < 3e-3, 6.0, 0.0)
    i[t < 0.5e-3] = 9.0
    f = _write(tmp_path / "short.csv", "time_s,iout_a", (t, i))
    assert _cli(["analyze", "hiccup", f, "--skip-s", "0.01", "--json"]) == 0
    out = json.loads(capsys.readouterr().out)["result"]
    assert out["peak_a"] == pytest.approx(9.0)
    assert out["period_s"] == pytest.approx(30e-3, abs=2e-6)
    assert out["duty"] == pytest.approx(0.1, abs=1e-3)
    assert out["average_a"] == pytest.approx(0.6, rel=1e-3)
