"""``benchctl analyze transient|ripple|mode|ringing FILE.csv`` on files written here, good and bad."""

from __future__ import annotations

import argparse
import json
import math

import numpy as np
import pytest

from benchctl.analysis.waveform_csv import parse_waveform_csv
from benchctl.errors import AnalysisInputError
from benchctl.commands.analyze import add_analyze_arguments, cmd_analyze


def _cli(argv: list[str]) -> int:
    parser = argparse.ArgumentParser(prog="benchctl")
    add_analyze_arguments(parser.add_subparsers(dest="command"))
    return cmd_analyze(parser.parse_args(argv))


def _err(capsys) -> str:
    return " ".join(capsys.readouterr().err.split())  # rich wraps long lines


def _write(path, header, columns):
    rows = "\n".join(",".join(repr(float(v)) for v in row) for row in zip(*columns))
    path.write_text("# exported waveform\n" + header + "\n" + rows + "\n", encoding="utf-8")
    return str(path)


def test_transient_from_csv(tmp_path, capsys):
    # a first-order recovery: v = -A exp(-t/tau) after the step; recovery into +/-band at tau ln(A/band)
    t = np.linspace(-1e-4, 1e-3, 2201)
    a, tau, band = 0.1, 1e-4, 0.01
    v = 5.0 - np.where(t >= 0, a * np.exp(-np.maximum(t, 0) / tau), 0.0)
    i = np.where(t >= 0, 5.0, 2.5)
    f = _write(tmp_path / "step.csv", "time_s,vout_v,iout_a", (t, v, i))
    assert _cli(["analyze", "transient", f, "--band-v", str(band), "--json"]) == 0
    out = json.loads(capsys.readouterr().out)["result"]
    assert out["peak_deviation_v"] == pytest.approx(-a, rel=6e-3)  # within one sample of decay, e^(-dt/tau)
    # exponential decay: t = tau ln(A/band) (common practice), within one sample
    assert out["recovery_after_step_s"] == pytest.approx(tau * math.log(a / band), abs=1e-6)
    assert out["load_step"] == "increase"


def test_ripple_mode_and_ringing_from_csv(tmp_path, capsys):
    fs, n = 100e3, 4000
    t = np.arange(n) * (5 / fs / n)
    tri = 2 * np.abs(2 * ((t * fs) % 1.0) - 1) - 1  # triangle, +/-1
    f = _write(tmp_path / "ripple.csv", "t_s,vout_v", (t, 1.2 + 0.005 * tri))
    assert _cli(["analyze", "ripple", f, "--fsw-hz", str(fs), "--json"]) == 0
    r = json.loads(capsys.readouterr().out)["result"]
    assert r["pk_pk_v"] == pytest.approx(0.010, rel=0.01)
    assert r["rms_ac_v"] == pytest.approx(0.005 / math.sqrt(3), rel=0.01)  # triangle rms = A/sqrt(3)
    # DCM switch current: a triangle from zero in each on-time (common practice)
    phase = (t * fs) % 1.0
    isw = np.where(phase < 0.3, 2.0 * phase / 0.3, 0.0)
    f = _write(tmp_path / "isw.csv", "t_s,i_switch_a", (t, isw))
    assert _cli(["analyze", "mode", f, "--fsw-hz", str(fs), "--json"]) == 0
    assert json.loads(capsys.readouterr().out)["result"]["mode"] == "DCM"
    # damped ring: f = 8 MHz, zeta = 0.05
    tr = np.arange(3000) * 0.2e-9
    wn, z = 2 * math.pi * 8e6, 0.05
    ring = 74.5 + 60 * np.exp(-z * wn * tr) * np.cos(wn * math.sqrt(1 - z * z) * tr)
    f = _write(tmp_path / "drain.csv", "t_s,v_drain_v", (tr, ring))
    assert _cli(["analyze", "ringing", f, "--json"]) == 0
    fit = json.loads(capsys.readouterr().out)["result"]
    assert fit["f_natural_hz"] == pytest.approx(8e6, rel=2e-3)
    assert fit["damping_ratio"] == pytest.approx(0.05, rel=0.02)


def test_table_output(tmp_path, capsys):
    t = np.arange(100) * 1e-6
    f = _write(tmp_path / "r.csv", "t_s,v", (t, np.sin(2 * math.pi * 1e4 * t)))
    assert _cli(["analyze", "ripple", f]) == 0
    assert "pk_pk_v" in capsys.readouterr().out


@pytest.mark.parametrize("text, where", [
    ("t_s,vout_v\n0,1\n1e-6,abc\n2e-6,1\n", "row 3, column 2 (vout_v): 'abc' is not a number"),
    ("t_s,vout_v\n0,1\n1e-6\n", "row 3: 1 field(s) but the header has 2"),
    ("0,1\n1,2\n", "row 1: column 1 is named '0', a number"),
    ("# only comments\n", "no header row"),
    ("t_s,vout_v\n0,1\n2e-6,1\n1e-6,1\n", "row 4, column 1 (t_s): time"),
    ("t_s,vout_v\n0,1\n1e-6,nan\n", "row 3, column 2 (vout_v): 'nan' is not finite"),
    ("t_s\n0\n1\n", "need a time column"),
])
def test_bad_csv_names_row_and_column(text, where):
    with pytest.raises(AnalysisInputError) as err:
        parse_waveform_csv(text, where="bad.csv")
    assert where in str(err.value)


def test_bad_files_exit_2_with_one_clear_line(tmp_path, capsys):
    missing = str(tmp_path / "missing.csv")
    assert _cli(["analyze", "ripple", missing]) == 2
    assert "file not found" in _err(capsys)
    bad = tmp_path / "bad.csv"
    bad.write_text("t_s,vout_v\n0,1\n1e-6,x\n", encoding="utf-8")
    assert _cli(["analyze", "transient", str(bad), "--step-time-s", "0"]) == 2
    assert "row 3" in _err(capsys)
    short = tmp_path / "short.csv"
    short.write_text("t_s,v\n0,1\n1e-6,2\n2e-6,3\n", encoding="utf-8")
    assert _cli(["analyze", "ringing", str(short)]) == 2
    assert "at least 20" in _err(capsys)
    one = tmp_path / "one.csv"
    one.write_text("t_s,v\n" + "\n".join(f"{k}e-6,{k % 2}" for k in range(20)) + "\n", encoding="utf-8")
    assert _cli(["analyze", "transient", str(one)]) == 2
    assert "--step-time-s" in _err(capsys)


def test_transient_cli_averages_over_one_switching_period(tmp_path, capsys):
    # a first-order recovery with 10 mV pk-pk of switching ripple on top:
    # v = 5 - A exp(-(t - t0)/tau) + ripple, 100 samples per switching period
    fsw, tau, a, band = 200e3, 14e-6, 0.2, 0.01
    dt = 1 / fsw / 100
    t = np.arange(-1000, 6000) * dt  # -50 us .. 300 us in 50 ns steps
    t0 = 0.0
    ripple = 0.005 * np.sin(2 * np.pi * fsw * t)
    v = 5.0 - np.where(t >= t0, a * np.exp(-np.maximum(t - t0, 0) / tau), 0.0) + ripple
    i = np.where(t >= t0, 5.0, 2.5)
    f = _write(tmp_path / "step.csv", "time_s,vout_v,iout_a", (t, v, i))
    # ripple-free truth: a first-order response enters +/-band at tau*ln(A/band) (exponential decay,
    # any control text); averaged over one period T it reads A*exp(-t/tau)*sinh(x)/x with x = T/(2 tau)
    # (the mean of an exponential over a centred window, integrated in closed form), so it enters at
    # tau*ln(A*sinh(x)/(x*band))
    x = 1 / fsw / (2 * tau)
    expected = tau * math.log(a * math.sinh(x) / (x * band))
    assert expected == pytest.approx(tau * math.log(a / band), abs=0.1e-6)  # 41.9 us, the boxcar adds 0.07 us
    assert _cli(["analyze", "transient", f, "--band-v", str(band), "--fsw-hz", str(fsw), "--json"]) == 0
    data = json.loads(capsys.readouterr().out)
    assert data["averaged_over_switching_period_s"] == pytest.approx(1 / fsw)
    out = data["result"]
    assert out["settling_after_step_s"] == pytest.approx(expected, abs=2 * dt)
    assert out["recovery_after_step_s"] == pytest.approx(expected, abs=2 * dt)
    # without averaging the ripple's crests keep leaving the band after the response is inside it:
    # the last exit lies between tau*ln(A/band) and tau*ln(A/(band - 5 mV)) = 51.6 us
    assert _cli(["analyze", "transient", f, "--band-v", str(band), "--json"]) == 0
    raw = json.loads(capsys.readouterr().out)
    assert raw["averaged_over_switching_period_s"] is None
    assert expected + 5e-6 < raw["result"]["settling_after_step_s"] <= tau * math.log(a / (band - 0.005)) + dt
    # the CLI and the procedure's Python path agree
    from benchctl.analysis.transient import load_step_metrics, switching_period_average

    m = load_step_metrics(t, switching_period_average(t, v, fsw), iout_a=i, band_v=band, pre_guard_s=0.5 / fsw)
    assert m.settling_after_step_s == pytest.approx(out["settling_after_step_s"], rel=1e-12)
    assert _cli(["analyze", "transient", f, "--band-v", str(band), "--fsw-hz", "0"]) == 2
    assert "--fsw-hz" in _err(capsys)
