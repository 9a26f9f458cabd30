"""``benchctl analyze loop-gain FILE.csv`` on CSV files written here."""

from __future__ import annotations

import argparse
import json
import math

import control
import numpy as np
import pytest
import scipy.signal as sig

from benchctl.analysis.loop_csv import read_loop_csv
from benchctl.commands.analyze import add_analyze_arguments, cmd_analyze
from benchctl.errors import AnalysisInputError


def _run(argv: list[str]) -> int:
    parser = argparse.ArgumentParser(prog="benchctl")
    add_analyze_arguments(parser.add_subparsers(dest="command"))
    return cmd_analyze(parser.parse_args(["analyze", "loop-gain", *argv]))


def _json(capsys, argv: list[str]) -> dict:
    assert _run([*argv, "--json"]) == 0
    return json.loads(capsys.readouterr().out)


def _write_bode(path, num, den, w_rad_s, *, inverted=False, comment=True):
    _, h = sig.freqs(num, den, worN=w_rad_s)  # scipy.signal.freqs: exact response
    if inverted:
        h = -h
    f = w_rad_s / (2 * math.pi)
    lines = (["# phase_convention: inverted"] if inverted and comment else []) + ["freq_hz,gain_db,phase_deg"]
    lines += [f"{float(a)!r},{20 * math.log10(abs(b))!r},{math.degrees(float(np.angle(b)))!r}" for a, b in zip(f, h)]
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return path


@pytest.mark.parametrize("num, den", [([25.0], [1.0, 10.0, 10.0, 10.0]), ([1.0], [1.0, 2.0, 1.0, 0.0])])
def test_margins_agree_with_python_control(tmp_path, capsys, num, den):
    # python-control cross-checks [calc]: control.margin(sys) -> (gm ratio, pm deg, w180, wc) in rad/s.
    gm, pm, w180, wc = control.margin(control.tf(num, den))
    w = np.logspace(-2, 2, 801)
    report = _json(capsys, [str(_write_bode(tmp_path / "loop.csv", num, den, w))])
    assert report["crossover_hz"] == pytest.approx(wc / (2 * math.pi), rel=2e-3)
    assert report["phase_margin_deg"] == pytest.approx(pm, abs=0.1)
    assert report["phase_crossover_hz"] == pytest.approx(w180 / (2 * math.pi), rel=2e-3)
    assert report["gain_margin_db"] == pytest.approx(20 * math.log10(gm), abs=0.05)


def test_inverted_data_from_the_file_comment_and_the_option(tmp_path, capsys):
    num, den = [25.0], [1.0, 10.0, 10.0, 10.0]
    _, pm, _, _ = control.margin(control.tf(num, den))
    w = np.logspace(-2, 2, 801)
    marked = _write_bode(tmp_path / "inv.csv", num, den, w, inverted=True)
    assert _json(capsys, [str(marked)])["phase_margin_deg"] == pytest.approx(pm, abs=0.1)
    bare = _write_bode(tmp_path / "inv2.csv", num, den, w, inverted=True, comment=False)
    report = _json(capsys, [str(bare), "--phase-convention", "inverted"])
    assert report["phase_convention"] == "inverted" and report["phase_margin_deg"] == pytest.approx(pm, abs=0.1)


def test_fit_recovers_a_flyback_plant_with_its_rhp_zero(tmp_path, capsys):
    # Flyback CCM Gvd (Erickson & Maksimovic 2nd ed. ch. 7-8, worked example [calc]):
    # Vg 48 V, n 0.25, Lm 200 uH, C 470 uF, R 6 ohm, D 0.5: Gd0 48 V, f0 1038.21 Hz, Q 18.40, RHP zero 38.197 kHz.
    d, n, lm, c, r, v = 0.5, 0.25, 200e-6, 470e-6, 6.0, 12.0
    dp, lp = 1 - d, n * n * lm
    gd0, w0, q, wz = v / (d * dp), dp / math.sqrt(lp * c), dp * r * math.sqrt(c / lp), dp * dp * r / (d * lp)
    num = [-gd0 / wz, gd0]
    den = [1 / w0**2, 1 / (q * w0), 1.0]
    w = 2 * math.pi * np.logspace(1, 5, 401)
    path = tmp_path / "plant.csv"
    _, h = sig.freqs(num, den, worN=w)
    rows = ["freq_hz,re,im"] + [f"{float(a)!r},{float(b.real)!r},{float(b.imag)!r}"
                                for a, b in zip(w / (2 * math.pi), h)]
    path.write_text("\n".join(rows) + "\n", encoding="utf-8")
    fit = _json(capsys, [str(path), "--fit"])["fit"]
    assert (fit["num_order"], fit["den_order"]) == (1, 2)
    assert fit["dc_gain"] == pytest.approx(48.0, rel=1e-6)
    assert fit["resonances"][0]["f0_hz"] == pytest.approx(1038.21, rel=1e-4)
    assert fit["resonances"][0]["q"] == pytest.approx(18.40, rel=1e-3)
    assert fit["rhp_zeros_hz"] == [pytest.approx(38197.0, rel=1e-4)]
    assert fit["fit_error"]["rms_relative"] < 1e-6


def test_propose_type2_meets_the_k_factor_worked_example(tmp_path, capsys):
    # Venable K factor, worked example [calc]: type 2 on 10/(1 + s/(2 pi 500)),
    # fc 10 kHz, PM 60 deg: boost 57.14 deg, K = 3.3909, fz 2.949 kHz, fp 33.91 kHz.
    wp = 2 * math.pi * 500.0
    w = 2 * math.pi * np.logspace(1, 6, 501)
    path = _write_bode(tmp_path / "plant.csv", [10.0], [1 / wp, 1.0], w)
    pr = _json(capsys, [str(path), "--propose", "--crossover-hz", "10000", "--phase-margin-deg", "60",
                        "--type", "2", "--fsw-hz", "200000"])["proposal"]
    assert pr["type"] == 2
    assert pr["boost_required_deg"] == pytest.approx(57.14, abs=0.02)
    assert pr["k_factor"] == pytest.approx(3.3909, rel=1e-3)
    assert pr["zero_hz"] == pytest.approx(2949.0, rel=1e-3)
    assert pr["pole_hz"] == pytest.approx(33910.0, rel=1e-3)
    assert pr["ideal_parts"]["c2_f"] == pytest.approx(234.4e-12, rel=1e-3)
    # Predicted margins of the E-series parts, checked with python-control on the same network.
    p = pr["eseries_parts"]
    s = control.tf("s")
    za, zb = p["r2_ohm"] + 1 / (s * p["c1_f"]), 1 / (s * p["c2_f"])
    zf = control.minreal(za * zb / (za + zb), verbose=False)  # impedance in parallel
    _, pm, _, wc = control.margin(zf / p["r1_ohm"] * 10 / (1 + s / wp))
    assert pr["predicted_phase_margin_deg"] == pytest.approx(pm, abs=0.3)
    assert pr["predicted_crossover_hz"] == pytest.approx(wc / (2 * math.pi), rel=5e-3)
    # Default choice: type 2 suffices here (boost < 90 deg).
    assert _json(capsys, [str(path), "--propose", "--crossover-hz", "10000"])["proposal"]["type"] == 2


def test_not_found_is_explicit(tmp_path, capsys):
    # A single-pole loop never reaches -180 deg: no gain margin in the band, said so.
    w = 2 * math.pi * np.logspace(0, 4, 201)
    report = _json(capsys, [str(_write_bode(tmp_path / "p.csv", [100.0], [1 / (2 * math.pi * 10), 1.0], w))])
    assert report["gain_margin_db"] is None
    assert "no phase crossover" in report["not_found"]["gain_margin"]
    assert report["phase_margin_deg"] == pytest.approx(90.0 + math.degrees(math.atan(1 / 99.995)), abs=0.2)


@pytest.mark.parametrize("text, expected", [
    ("freq_hz,gain_db\n1,0\n2,0\n3,0\n", r"line 1: missing column phase_deg"),
    ("frequency,gain_db,phase_deg\n1,0,0\n", r"line 1: missing column freq_hz"),
    ("freq_hz,gain_db,phase_deg\n10,1,-90\n20,abc,-91\n30,0,-92\n", r"line 3, column gain_db: 'abc' is not a number"),
    ("# note\nfreq_hz,gain_db,phase_deg\n10,1,-90\n30,0,-92\n20,0,-93\n",
     r"line 5, column freq_hz: frequency 20 Hz does not increase"),
    ("freq_hz;re;im\n10;1;0\n10;0.5;0\n20;0.2;0\n", r"line 3, column freq_hz: frequency 10 Hz does not increase"),
    ("freq_hz,re,im\n10,1,0\n20,,0\n30,0.1,0\n", r"line 3, column re: empty cell"),
])
def test_bad_csv_gives_one_clear_error_and_exit_code_2(tmp_path, capsys, text, expected):
    path = tmp_path / "bad.csv"
    path.write_text(text, encoding="utf-8")
    with pytest.raises(AnalysisInputError, match=expected):
        read_loop_csv(path)
    assert _run([str(path)]) == 2
    err = capsys.readouterr().err
    assert err.count("error:") == 1 and str(path.name) in err
    import re

    assert re.search(expected, " ".join(err.split()))


def test_propose_without_a_crossover_is_bad_input(tmp_path, capsys):
    w = 2 * math.pi * np.logspace(0, 4, 50)
    path = _write_bode(tmp_path / "p.csv", [10.0], [1e-3, 1.0], w)
    assert _run([str(path), "--propose"]) == 2
    assert "--crossover-hz" in capsys.readouterr().err


def test_missing_file_is_bad_input(tmp_path, capsys):
    assert _run([str(tmp_path / "nope.csv")]) == 2
    assert "no such file" in capsys.readouterr().err


def test_a_noisy_trace_gets_an_uncertainty_that_holds_the_truth(tmp_path, capsys):
    # python-control gives the exact margins; the CSV carries 3 % circular noise on each of 61 samples
    num, den = [25.0], [1.0, 10.0, 10.0, 10.0]
    gm, pm, _, _ = control.margin(control.tf(num, den))
    w = np.logspace(-1, 1.5, 61)
    _, h = sig.freqs(num, den, worN=w)
    rng = np.random.default_rng(7)
    h = h * (1 + 0.03 * (rng.standard_normal(w.size) + 1j * rng.standard_normal(w.size)) / math.sqrt(2))
    path = tmp_path / "noisy.csv"
    path.write_text("freq_hz,gain_db,phase_deg\n" + "\n".join(
        f"{float(a) / (2 * math.pi)!r},{20 * math.log10(abs(b))!r},{math.degrees(float(np.angle(b)))!r}"
        for a, b in zip(w, h)) + "\n", encoding="utf-8")
    report = _json(capsys, [str(path)])
    big_u = report["expanded_uncertainty"]
    assert 0.1 < big_u["phase_margin_deg"] < 10 and 0.05 < big_u["gain_margin_db"] < 3
    assert abs(report["phase_margin_deg"] - pm) <= big_u["phase_margin_deg"]
    assert abs(report["gain_margin_db"] - 20 * math.log10(gm)) <= big_u["gain_margin_db"]
    assert _run([str(path)]) == 0
    assert "± " in capsys.readouterr().out   # the table prints value ± U
