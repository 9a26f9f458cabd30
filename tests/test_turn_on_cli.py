"""`benchctl analyze turn-on` and `inrush` on a user's CSV, against closed forms."""

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
