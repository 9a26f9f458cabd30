"""A loop with a pure delay sampled too coarsely to unwrap its phase, through loop_margins and
``benchctl analyze loop-gain``; and the CLI's smoothing/merging options against the Python API.

Outside reference: the delay loop T(s) = (w_i/s)·e^(-s·t_d) evaluated exactly, its rational part
with ``scipy.signal.freqs`` and the delay as exp(-j·w·t_d) (numpy). Its phase is
-90° - 360°·f·t_d, so it crosses -180° - 360°·k at f_k = (k + 1/4)/t_d, where |T| = w_i/(2·pi·f_k).
"""

from __future__ import annotations

import argparse
import json
import math

import numpy as np
import pytest
import scipy.signal as sig

from benchctl.analysis.frequency_response import large_phase_steps, response_from_gain_phase, unwrapped_phase_deg
from benchctl.analysis.margins import loop_margins
from benchctl.commands.analyze import add_analyze_arguments, cmd_analyze
from benchctl.errors import AnalysisInputError

T_D = 1e-6  # s
W_I = 2 * math.pi * 2e4  # rad/s: |T| = 1 at 20 kHz
F_MAX = 6e6  # Hz: six true phase crossings below it (0.25, 1.25, ..., 5.25 MHz)


def _delay_loop(per_decade: int, f_min: float = 100.0, f_max: float = F_MAX):
    f = np.logspace(math.log10(f_min), math.log10(f_max), int(round(per_decade * math.log10(f_max / f_min))) + 1)
    _, rational = sig.freqs([W_I], [1.0, 0.0], worN=2 * math.pi * f)  # scipy.signal.freqs: w_i/s
    return f, rational * np.exp(-2j * math.pi * f * T_D)


def _true_crossings(f_max: float = F_MAX) -> list[float]:
    return [(k + 0.25) / T_D for k in range(20) if (k + 0.25) / T_D < f_max]


def _write(path, f, h):
    lines = ["freq_hz,re,im"] + [f"{a!r},{b.real!r},{b.imag!r}" for a, b in zip(f.tolist(), h.tolist())]
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return str(path)


def _cli(argv: list[str]) -> int:
    parser = argparse.ArgumentParser(prog="benchctl")
    add_analyze_arguments(parser.add_subparsers(dest="command"))
    return cmd_analyze(parser.parse_args(["analyze", "loop-gain", *argv]))


def test_coarse_sweep_of_a_delay_loop_is_flagged_where_the_phase_cannot_be_unwrapped():
    f, t = _delay_loop(20)
    truth = _true_crossings()
    assert len(truth) == 6
    m = loop_margins(f, t)
    # between neighbours a ratio r apart the delay turns 360 f t_d (r - 1), with r = 10**(1/20): 44 deg x f t_d,
    # more than 90 deg from f = 2.05 MHz, more than 180 deg (unwrapping then folds it) from 4.1 MHz
    step_ratio = f[1] / f[0] - 1  # 10**(1/20.1) - 1 on this grid
    f_limit = 90.0 / (360.0 * T_D * step_ratio)
    assert m.unwrap_ambiguous_from_hz is not None
    assert f_limit <= m.unwrap_ambiguous_from_hz <= f_limit * (1 + step_ratio)  # the first sample past it
    assert m.flags == ("unwrap_ambiguous",)
    assert any("points per decade" in n and "unwrap" in n for n in m.notes)
    # the data as read really are wrong up there: the crossing near 4.25 MHz is missed and a
    # spurious one appears (the fold back at 4.1 MHz)
    found = [c.freq_hz for c in m.phase_crossovers]
    assert len(found) != len(truth) or any(min(abs(x - y) for y in truth) > 0.05 * x for x in found)
    # every crossing below the limit matches the outside formula and is not flagged;
    # every one above it is flagged
    for c in m.phase_crossovers:
        if c.freq_hz < m.unwrap_ambiguous_from_hz:
            assert not c.unwrap_ambiguous
            k = min(range(len(truth)), key=lambda i: abs(truth[i] - c.freq_hz))
            assert c.freq_hz == pytest.approx(truth[k], rel=0.01)
            assert c.gain_db == pytest.approx(20 * math.log10(W_I / (2 * math.pi * truth[k])), abs=0.1)
        else:
            assert c.unwrap_ambiguous
    assert sum(not c.unwrap_ambiguous for c in m.phase_crossovers) == sum(x < m.unwrap_ambiguous_from_hz
                                                                          for x in truth)


def test_dense_sweep_of_the_same_loop_unwraps_and_finds_every_crossing():
    f, t = _delay_loop(200)
    m = loop_margins(f, t)
    assert m.unwrap_ambiguous_from_hz is None and m.flags == ()
    assert large_phase_steps(t).size == 0
    truth = _true_crossings()
    assert [c.freq_hz for c in m.phase_crossovers] == pytest.approx(truth, rel=2e-3)
    assert not any(c.unwrap_ambiguous for c in m.phase_crossovers)
    # unwrapped phase = -90 - 360 f t_d (the formula), to rounding
    assert unwrapped_phase_deg(t) == pytest.approx(-90.0 - 360.0 * f * T_D, abs=1e-6)


def test_large_phase_steps_refuses_a_limit_outside_0_180():
    with pytest.raises(AnalysisInputError, match="between 0 and 180"):
        large_phase_steps(np.ones(3, complex), 180.0)


def test_cli_warns_about_the_coarse_sweep_and_not_about_the_dense_one(tmp_path, capsys):
    coarse = _write(tmp_path / "coarse.csv", *_delay_loop(20))
    assert _cli([coarse, "--json"]) == 0
    report = json.loads(capsys.readouterr().out)
    assert report["flags"] == ["unwrap_ambiguous"]
    assert report["unwrap_ambiguous_from_hz"] == pytest.approx(loop_margins(*_delay_loop(20)).unwrap_ambiguous_from_hz)
    assert any("unwrap" in w and "spurious" in w for w in report["warnings"])
    flagged = [c for c in report["phase_crossovers"] if c["unwrap_ambiguous"]]
    assert flagged and all(c["freq_hz"] >= report["unwrap_ambiguous_from_hz"] for c in flagged)
    assert _cli([coarse]) == 0
    text = " ".join(capsys.readouterr().out.split())
    assert "warning:" in text and "unwrap" in text
    # a stricter limit moves the warning down; a looser one (175 deg) still sees the fold at 4.1 MHz
    assert _cli([coarse, "--json", "--unwrap-step-limit-deg", "45"]) == 0
    strict = json.loads(capsys.readouterr().out)
    assert strict["unwrap_ambiguous_from_hz"] < report["unwrap_ambiguous_from_hz"]
    dense = _write(tmp_path / "dense.csv", *_delay_loop(200))
    assert _cli([dense, "--json"]) == 0
    clean = json.loads(capsys.readouterr().out)
    assert clean["warnings"] == [] and clean["flags"] == [] and clean["unwrap_ambiguous_from_hz"] is None
    assert [c["freq_hz"] for c in clean["phase_crossovers"]] == pytest.approx(_true_crossings(), rel=2e-3)


def test_cli_smoothing_and_merging_are_the_python_api(tmp_path, capsys):
    # seeded noise (0.5 dB rms, 1 deg rms) on w_c/s x 1/(1 + s/w_p), 200 samples per decade:
    # the raw data chatter around 0 dB; w_c/s/(1 + s/w_p) crosses where (w/w_c)^2 (1 + (w/w_p)^2) = 1
    wc, wp = 100.0, 300.0
    f = np.logspace(0, 4, 801)
    _, h = sig.freqs([wc], [1 / wp, 1.0, 0.0], worN=2 * math.pi * f)  # scipy.signal.freqs
    rng = np.random.default_rng(20240611)
    noisy = response_from_gain_phase(20 * np.log10(np.abs(h)) + rng.normal(0, 0.5, f.size),
                                     unwrapped_phase_deg(h) + rng.normal(0, 1.0, f.size))
    path = _write(tmp_path / "noisy.csv", f, noisy)
    assert _cli([path, "--json"]) == 0
    raw = json.loads(capsys.readouterr().out)
    assert len(raw["gain_crossovers"]) > 1
    assert _cli([path, "--json", "--smooth-points", "9", "--merge-decades", "0.1"]) == 0
    clean = json.loads(capsys.readouterr().out)
    api = loop_margins(f, noisy, smooth_points=9, merge_decades=0.1)
    assert clean["smooth_points"] == 9 and clean["merge_decades"] == 0.1
    assert len(clean["gain_crossovers"]) == len(api.gain_crossovers) == 1
    assert clean["crossover_hz"] == pytest.approx(api.crossover_hz, rel=1e-9)
    w_true = wp * math.sqrt((math.sqrt(1 + 4 * (wc / wp) ** 2) - 1) / 2)  # the crossing condition, solved
    assert clean["crossover_hz"] * 2 * math.pi == pytest.approx(w_true, rel=0.03)
    assert _cli([path, "--json", "--merge-decades", "0.1"]) == 0
    merged = json.loads(capsys.readouterr().out)
    assert merged["gain_crossovers"][0]["multiplicity"] == len(raw["gain_crossovers"])
    assert _cli([path, "--smooth-points", "4"]) == 2  # an even window is refused with one clear line
    assert "odd" in " ".join(capsys.readouterr().err.split())
