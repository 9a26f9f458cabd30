"""The simulated loop analyzer in-process: response, polarity, noise, compression, timing."""

from __future__ import annotations

import math

import numpy as np
import pytest

from benchctl.simulated_instruments.converter import DESIGNS, ConverterModel, ManualClock
from benchctl.simulated_instruments.instruments.loop_analyzer import SimulatedLoopAnalyzer, saturation_describing_function


def _setup(seed: int = 3, polarity: str = "NORM"):
    clock = ManualClock()
    model = ConverterModel(DESIGNS["flyback-48v-5v"], clock=clock, seed=0)
    model.set_source(48.0, 5.0, True)
    model.set_load("CC", 2.5, True)
    inst = SimulatedLoopAnalyzer(model, seed=seed)
    inst.handle_message(f"FREQ:STAR 100;STOP 30000;:SWE:POIN 61;:LOOP:POL {polarity};:FORM ASC")
    return clock, model, inst


def _sweep(clock, inst) -> tuple[np.ndarray, np.ndarray]:
    inst.handle_message("INIT")
    clock.advance(float(inst.handle_message("SWE:TIME?")) * (1.0 + 1e-6))  # the answer has 10 digits
    f = np.array([float(v) for v in inst.handle_message("TRAC? FREQ").split(",")])
    v = np.array([float(x) for x in inst.handle_message("TRAC? RESP").split(",")])
    return f, v[0::2] + 1j * v[1::2]


def test_sweep_completes_after_its_model_time():
    clock, model, inst = _setup()
    inst.handle_message("INIT")
    sweep_s = float(inst.handle_message("SWE:TIME?"))
    # Documented timing: sum over points of averaging·max(5 periods, 1/RBW).
    f = np.geomspace(100.0, 30e3, 61)
    assert sweep_s == pytest.approx(np.sum(np.maximum(5.0 / f, 1.0 / 10.0)), rel=1e-9)
    # Operation condition bit 4 "measuring" (SCPI-1999 Vol. 1 §9, from memory) while it runs.
    assert inst.handle_message("STAT:OPER:COND?") == "16"
    assert inst.handle_message("TRAC:POIN?") == "0"
    clock.advance(0.999 * sweep_s)
    assert inst.handle_message("STAT:OPER:COND?") == "16"
    clock.advance(0.002 * sweep_s)
    assert inst.handle_message("STAT:OPER:COND?") == "0"
    assert inst.handle_message("TRAC:POIN?") == "61"
    assert inst.handle_message("*OPC?") == "1"


def test_inverted_polarity_reports_minus_t():
    # Same seed, same noise: the inverted instrument reports exactly -T_meas
    # (Middlebrook 1975: T = -v_y/v_x; the inverted setting shows v_y/v_x).
    c1, _, normal = _setup(seed=7, polarity="NORM")
    c2, _, inverted = _setup(seed=7, polarity="INV")
    f1, h1 = _sweep(c1, normal)
    f2, h2 = _sweep(c2, inverted)
    np.testing.assert_array_equal(f1, f2)
    np.testing.assert_allclose(h2, -h1, rtol=1e-9)


def test_noise_grows_as_the_injection_shrinks():
    # SNR proportional to the injection amplitude (documented noise model): halving A
    # doubles the scatter of 20·log10|T_meas/T| where the SNR is high enough for the
    # error to be linear in the noise (around crossover; ratio 2 within sampling spread).
    clock, model, inst = _setup(seed=11)
    inst.handle_message("FREQ:STAR 1000;STOP 10000;:SWE:POIN 201")
    scatter = {}
    for amp in (0.004, 0.002):
        inst.handle_message(f"SOUR:VOLT {amp}")
        f, h = _sweep(clock, inst)
        err_db = 20.0 * np.log10(np.abs(h / model.loop_gain(f)))
        scatter[amp] = float(np.std(err_db))
    assert 1.6 < scatter[0.002] / scatter[0.004] < 2.5


def test_saturation_describing_function_matches_the_textbook_formula():
    # Ideal saturation, sine amplitude a, limit d (Gelb & Vander Velde 1968, ch. 2, from memory):
    # N = (2/pi)(asin(d/a) + (d/a)sqrt(1-(d/a)^2)) for a > d, 1 below; N -> 4d/(pi a) for a >> d.
    d = 0.2
    a = np.array([0.1, 0.2, 0.4, 1.0, 20.0])
    expected = [1.0, 1.0, (2 / math.pi) * (math.asin(0.5) + 0.5 * math.sqrt(0.75)),
                (2 / math.pi) * (math.asin(0.2) + 0.2 * math.sqrt(0.96)), None]
    got = saturation_describing_function(a, d)
    np.testing.assert_allclose(got[:4], expected[:4], rtol=1e-12)
    assert got[4] == pytest.approx(4 * d / (math.pi * 20.0), rel=1e-3)


def test_large_injection_compresses_the_gain_above_crossover():
    clock, model, inst = _setup(seed=5)
    inst.handle_message("FREQ:STAR 10;STOP 100000;:SWE:POIN 121")
    inst.handle_message("SOUR:VOLT 1.0")
    f, h = _sweep(clock, inst)
    truth = model.loop_gain(f)
    ratio_db = 20.0 * np.log10(np.abs(h / truth))
    _, n = inst.compressed_loop(f, np.full(f.shape, 1.0))
    # Where the describing function is below 1 the measurement reads that much less gain.
    hit = n < 0.8
    assert hit.any() and f[hit].min() > model.loop_truth().crossover_hz
    np.testing.assert_allclose(ratio_db[hit], 20.0 * np.log10(n[hit]), atol=0.3)
    # Below crossover nothing is compressed.
    low = f < 1000.0
    assert np.all(n[low] == 1.0)


def test_no_loop_to_measure_queues_an_execution_error():
    clock = ManualClock()
    model = ConverterModel(DESIGNS["flyback-48v-5v"], clock=clock, seed=0)
    inst = SimulatedLoopAnalyzer(model)
    inst.handle_message("INIT")
    code, _, message = inst.handle_message("SYST:ERR?").partition(",")
    assert code == "-200" and "no loop to measure" in message
    assert inst.handle_message("TRAC:POIN?") == "0"
