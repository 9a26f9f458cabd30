"""Loop-gain margins checked against python-control and handbook relations.

Reference library: python-control ``control.stability_margins(sys, returnall=True)``
returns (gm ratios, pm deg, sm, w_pc, w_gc, w_sm) with frequencies in rad/s and
gain margin as a ratio (not dB); ``control.margin`` returns (gm, pm, wpc, wgc).
Exact frequency responses come from ``scipy.signal.freqs``.
"""

from __future__ import annotations

import math

import control
import numpy as np
import pytest
import scipy.signal

from benchctl.analysis.frequency_response import (
    interpolate_response,
    response_from_gain_phase,
    unwrapped_phase_deg,
)
from benchctl.analysis.margins import (
    GainCrossover,
    LoopMargins,
    NotFound,
    PhaseCrossover,
    closed_loop_q,
    loop_margins,
)
from benchctl.errors import AnalysisInputError

S = control.tf("s")
TWO_PI = 2.0 * math.pi


def _tf_coeffs(sys: control.TransferFunction) -> tuple[np.ndarray, np.ndarray]:
    return np.asarray(sys.num[0][0], dtype=float), np.asarray(sys.den[0][0], dtype=float)


def _sample(sys: control.TransferFunction, w_lo: float, w_hi: float, per_decade: int):
    """freq_hz and exact complex response (scipy.signal.freqs) on a log grid in rad/s."""
    decades = math.log10(w_hi / w_lo)
    w = np.logspace(math.log10(w_lo), math.log10(w_hi), int(round(decades * per_decade)) + 1)
    num, den = _tf_coeffs(sys)
    _, h = scipy.signal.freqs(num, den, worN=w)
    return w / TWO_PI, h


def _buck_type3_loop() -> control.TransferFunction:
    """12 V -> 1.2 V point-of-load buck (CCM Gvd, Erickson & Maksimovic 2nd ed. ch. 8, from
    memory) with a 1 V PWM ramp and a type-3 compensator (two zeros, two poles, integrator)."""
    vg, l_h, c_f, rc, r = 12.0, 2.2e-6, 200e-6, 2e-3, 0.12
    gvd = vg * (1 + S * rc * c_f) / (1 + S * (l_h / r + rc * c_f) + S**2 * l_h * c_f * (1 + rc / r))
    wz, wp = TWO_PI * 5e3, TWO_PI * 150e3
    gc = 1.2e4 * (1 + S / wz) ** 2 / (S * (1 + S / wp) ** 2)
    return gc * gvd


def _delay_loop() -> control.TransferFunction:
    num, den = control.pade(0.05, 5)  # 50 ms modulator delay, 5th-order Pade
    return 5 / (S * (1 + S / 20)) * control.tf(num, den)


# (name, loop, w_lo, w_hi) -- loops of our own choosing; ranges cover every crossing.
CASES = [
    # python-control cross-check [calc] (PYTHON-CONTROL): gm 2.0 at 1 rad/s, pm 21.386 deg at 0.6823 rad/s.
    ("integrator_two_poles", 1 / (S**3 + 2 * S**2 + S), 1e-3, 1e3),
    # python-control cross-check [calc] (PYTHON-CONTROL): gm 3.6 at 3.1623 rad/s, pm 29.110 deg at 1.7844 rad/s.
    ("third_order", 25 / (S**3 + 10 * S**2 + 10 * S + 10), 1e-3, 1e3),
    # conditionally stable: three phase crossovers, two below the gain crossover.
    ("conditionally_stable", 3 * (S + 1) ** 2 / (S * (S + 0.1) ** 2 * (S / 30 + 1) ** 2), 1e-3, 1e4),
    # right-half-plane zero (boost / flyback-like phase lag).
    ("rhp_zero", 2 * (1 - S / 5) / (S * (1 + S)), 1e-3, 1e4),
    # phase tends to -180 but never crosses it: no phase crossover.
    ("no_phase_crossover", 10 / (S * (1 + S / 2)), 1e-3, 1e4),
    # resonant peak pushes |T| above 1 again: three gain crossovers.
    ("resonant_three_gain_crossovers", (2 / S) * 100 / (S**2 + 0.2 * S + 100), 1e-2, 1e4),
    # unstable loop: negative phase margin, gain margin below 0 dB.
    ("unstable", 100 / ((S + 1) * (S + 2) * (S + 3)), 1e-3, 1e3),
    ("integrator_three_poles", 4 / (S * (S + 1) * (S + 2)), 1e-3, 1e3),
    # transport delay (Pade): several phase crossovers above the gain crossover.
    ("pade_delay", _delay_loop(), 1e-2, 1e4),
    # converter-like: type-3 compensator times a buck double pole with ESR zero.
    ("buck_type3", _buck_type3_loop(), TWO_PI * 10.0, TWO_PI * 2e6),
    # the type-2 K-factor worked example [calc] (VENABLE-1983; its loop, ideal parts).
    (
        "kfactor_type2_example",
        (10 / (1 + S / (TWO_PI * 500)))
        * (1 + S / (TWO_PI * 2949.08))
        / (S * 10000 * (2.4606e-9 + 234.387e-12) * (1 + S / (TWO_PI * 33908.9))),
        TWO_PI * 1.0,
        TWO_PI * 1e7,
    ),
]


@pytest.mark.parametrize("name,sys,w_lo,w_hi", CASES, ids=[c[0] for c in CASES])
def test_every_crossing_matches_python_control(name, sys, w_lo, w_hi) -> None:
    # Reference: python-control stability_margins(returnall=True), poly method (exact roots).
    gm_ref, pm_ref, sm_ref, wpc_ref, wgc_ref, _wsm_ref = control.stability_margins(sys, returnall=True)
    f, h = _sample(sys, w_lo, w_hi, per_decade=200)
    m = loop_margins(f, h)

    w_gc = np.array([g.freq_hz * TWO_PI for g in m.gain_crossovers])
    assert w_gc.size == len(wgc_ref), (name, w_gc, wgc_ref)
    np.testing.assert_allclose(w_gc, np.sort(wgc_ref), rtol=2e-4)
    order = np.argsort(wgc_ref)
    np.testing.assert_allclose(
        [g.phase_margin_deg for g in m.gain_crossovers], np.asarray(pm_ref)[order], atol=0.02
    )

    w_pc = np.array([p.freq_hz * TWO_PI for p in m.phase_crossovers])
    assert w_pc.size == len(wpc_ref), (name, w_pc, wpc_ref)
    order = np.argsort(wpc_ref)
    np.testing.assert_allclose(w_pc, np.asarray(wpc_ref)[order], rtol=2e-4)
    gm_db_ref = 20 * np.log10(np.asarray(gm_ref)[order])  # gm is a ratio in python-control
    np.testing.assert_allclose([p.gain_margin_db for p in m.phase_crossovers], gm_db_ref, atol=0.01)

    # modulus margin = min |1 + T| = python-control's stability margin sm (its minimum)
    assert m.modulus_margin == pytest.approx(float(np.min(sm_ref)), rel=1e-3)


@pytest.mark.parametrize("name,sys,w_lo,w_hi", CASES, ids=[c[0] for c in CASES])
def test_worst_gain_margin_matches_python_control_choice(name, sys, w_lo, w_hi) -> None:
    # python-control stability_margins (returnall=False) picks the gain margin with the
    # smallest |log gm|, as LoopMargins.worst_gain_margin does.
    gm, _pm, _sm, wpc, _wgc, _wsm = control.stability_margins(sys)
    f, h = _sample(sys, w_lo, w_hi, per_decade=200)
    m = loop_margins(f, h)
    if math.isinf(gm):
        assert isinstance(m.worst_gain_margin, NotFound)
        assert m.worst_gain_margin_db is None
    else:
        assert m.worst_gain_margin_db == pytest.approx(20 * math.log10(gm), abs=0.01)
        assert m.worst_gain_margin.freq_hz * TWO_PI == pytest.approx(wpc, rel=2e-4)


def test_reference_cross_checks_literal_values() -> None:
    # python-control control.margin cross-checks [calc] (PYTHON-CONTROL).
    f, h = _sample(1 / (S**3 + 2 * S**2 + S), 1e-3, 1e3, per_decade=200)
    m = loop_margins(f, h)
    assert m.worst_gain_margin_db == pytest.approx(20 * math.log10(2.0), abs=0.01)
    assert m.worst_gain_margin.freq_hz * TWO_PI == pytest.approx(1.0, rel=1e-4)
    assert m.worst_phase_margin_deg == pytest.approx(21.386, abs=0.01)
    assert m.crossover_hz * TWO_PI == pytest.approx(0.6823, rel=1e-3)

    f, h = _sample(25 / (S**3 + 10 * S**2 + 10 * S + 10), 1e-3, 1e3, per_decade=200)
    m = loop_margins(f, h)
    assert m.worst_gain_margin_db == pytest.approx(20 * math.log10(3.6), abs=0.01)
    assert m.worst_gain_margin.freq_hz * TWO_PI == pytest.approx(3.1623, rel=1e-4)
    assert m.worst_phase_margin_deg == pytest.approx(29.110, abs=0.01)
    assert m.crossover_hz * TWO_PI == pytest.approx(1.7844, rel=1e-3)


def test_control_margin_return_order_for_converter_loop() -> None:
    # python-control control.margin returns (gm ratio, pm deg, wpc rad/s, wgc rad/s).
    sys = _buck_type3_loop()
    gm, pm, wpc, wgc = control.margin(sys)
    f, h = _sample(sys, TWO_PI * 10.0, TWO_PI * 2e6, per_decade=200)
    m = loop_margins(f, h)
    assert m.worst_phase_margin_deg == pytest.approx(pm, abs=0.02)
    assert m.crossover_hz == pytest.approx(wgc / TWO_PI, rel=2e-4)
    assert m.worst_gain_margin_db == pytest.approx(20 * math.log10(gm), abs=0.01)
    assert m.worst_gain_margin.freq_hz == pytest.approx(wpc / TWO_PI, rel=2e-4)


def test_conditionally_stable_loop_reports_signed_gain_margins() -> None:
    # python-control stability_margins(returnall=True) gives gm < 1 for the two crossings below
    # the gain crossover (gain may fall that far) and gm > 1 above it.
    sys = 3 * (S + 1) ** 2 / (S * (S + 0.1) ** 2 * (S / 30 + 1) ** 2)
    gm_ref, *_ = control.stability_margins(sys, returnall=True)
    f, h = _sample(sys, 1e-3, 1e4, per_decade=200)
    m = loop_margins(f, h)
    assert len(m.phase_crossovers) == 3
    signs = [math.copysign(1, p.gain_margin_db) for p in m.phase_crossovers]
    assert signs == [math.copysign(1, math.log10(g)) for g in gm_ref]
    assert signs == [-1.0, -1.0, 1.0]
    assert len(m.gain_crossovers) == 1
    assert m.phase_crossovers[0].freq_hz < m.gain_crossovers[0].freq_hz < m.phase_crossovers[2].freq_hz


def test_coarse_grid_ten_points_per_decade() -> None:
    # 10 points/decade, tolerance stated: fc within 1 %, PM within 0.5 deg, GM within 0.3 dB
    # of python-control control.margin (exact); the interpolation is linear in log-f.
    sys = 4 / (S * (S + 1) * (S + 2))
    gm, pm, wpc, wgc = control.margin(sys)
    f, h = _sample(sys, 1e-2, 1e2, per_decade=10)
    assert f.size == 41
    m = loop_margins(f, h, edge_decades=0.0, edge_points=0)
    assert m.crossover_hz * TWO_PI == pytest.approx(wgc, rel=0.01)
    assert m.worst_phase_margin_deg == pytest.approx(pm, abs=0.5)
    assert m.worst_gain_margin_db == pytest.approx(20 * math.log10(gm), abs=0.3)
    assert m.worst_gain_margin.freq_hz * TWO_PI == pytest.approx(wpc, rel=0.01)


def test_noisy_data_smoothing_and_merging_give_one_accurate_crossover() -> None:
    # Seeded noise (0.5 dB rms, 1 deg rms) on a -20 dB/decade crossing sampled 200/decade:
    # the raw data chatter around 0 dB. Reference: python-control control.margin on the
    # noise-free loop; tolerances stated: fc within 3 %, PM within 2 deg (common practice for
    # a 1 deg-rms analyzer).
    sys = 100 / (S * (1 + S / 300))
    _gm, pm, _wpc, wgc = control.margin(sys)
    f, h = _sample(sys, 1.0, 1e4, per_decade=200)
    rng = np.random.default_rng(20240611)
    gain_db = 20 * np.log10(np.abs(h)) + rng.normal(0.0, 0.5, f.size)
    phase_deg = unwrapped_phase_deg(h) + rng.normal(0.0, 1.0, f.size)
    noisy = response_from_gain_phase(gain_db, phase_deg)

    raw = loop_margins(f, noisy)
    assert len(raw.gain_crossovers) > 1  # the seeded noise does chatter
    assert any("possibly noise" in n for n in raw.notes)

    clean = loop_margins(f, noisy, smooth_points=9, merge_decades=0.1)
    assert len(clean.gain_crossovers) == 1
    g = clean.gain_crossovers[0]
    assert g.freq_hz * TWO_PI == pytest.approx(wgc, rel=0.03)
    assert g.phase_margin_deg == pytest.approx(pm, abs=2.0)

    merged_only = loop_margins(f, noisy, merge_decades=0.1)
    assert len(merged_only.gain_crossovers) == 1
    assert merged_only.gain_crossovers[0].multiplicity == len(raw.gain_crossovers)
    assert merged_only.gain_crossovers[0].freq_hz * TWO_PI == pytest.approx(wgc, rel=0.03)


def test_band_edge_flag() -> None:
    # Project rule (module docstring, common practice): flag crossings within 1/3 decade of
    # either band end. Crossover of 1/(s(1+s/100)) near 1 rad/s (python-control control.margin).
    sys = 1 / (S * (1 + S / 100))
    _gm, _pm, _wpc, wgc = control.margin(sys)
    f, h = _sample(sys, wgc / 10 ** 0.2, 1e4, per_decade=100)  # fc 0.2 decade above band start
    near = loop_margins(f, h)
    assert near.gain_crossovers[0].near_band_edge is True
    assert any("near the band edge" in n for n in near.notes)
    f, h = _sample(sys, wgc / 100, 1e4, per_decade=100)  # fc 2 decades inside
    far = loop_margins(f, h)
    assert far.gain_crossovers[0].near_band_edge is False
    assert not any("near the band edge" in n for n in far.notes)


def test_not_found_cases_are_explicit() -> None:
    sys = 1000 / (S * (1 + S / 10))
    # band entirely below the crossover (|T| > 1 everywhere, python-control puts wgc ~ 100 rad/s)
    _gm, _pm, _wpc, wgc = control.margin(sys)
    f, h = _sample(sys, 1e-2, wgc / 10, per_decade=50)
    m = loop_margins(f, h)
    assert m.gain_crossovers == ()
    assert isinstance(m.worst_phase_margin, NotFound)
    assert "above 1" in m.worst_phase_margin.reason and "upward" in m.worst_phase_margin.reason
    assert m.worst_phase_margin_deg is None and m.crossover_hz is None
    # two-pole loop: the phase never reaches -180 deg, python-control finds no phase crossover
    gm, *_ = control.stability_margins(sys)
    assert math.isinf(gm)
    f, h = _sample(sys, 1e-2, 1e5, per_decade=50)
    m = loop_margins(f, h)
    assert isinstance(m.worst_gain_margin, NotFound)
    assert "-180" in m.worst_gain_margin.reason
    assert m.worst_gain_margin_db is None
    assert isinstance(m.worst_phase_margin, GainCrossover)


def test_inverted_convention_equals_loop_convention() -> None:
    # Common practice: an analyzer that reports the inverting stage's 180 deg shows -T, whose
    # phase at crossover reads directly as the phase margin (PM = 180 + angle T).
    sys = 25 / (S**3 + 10 * S**2 + 10 * S + 10)
    _gm, pm, _wpc, wgc = control.margin(sys)
    f, h = _sample(sys, 1e-3, 1e3, per_decade=200)
    as_loop = loop_margins(f, h)
    as_shown = loop_margins(f, -h, phase_convention="inverted")
    assert as_shown.worst_phase_margin_deg == pytest.approx(as_loop.worst_phase_margin_deg, abs=1e-9)
    assert as_shown.worst_gain_margin_db == pytest.approx(as_loop.worst_gain_margin_db, abs=1e-9)
    shown_phase_at_fc = np.angle(interpolate_response(f, -h, wgc / TWO_PI), deg=True)
    assert float(shown_phase_at_fc) == pytest.approx(pm, abs=0.02)
    # treating the inverted display as T would report the wrong (opposite) margin
    wrong = loop_margins(f, -h)
    assert wrong.worst_phase_margin_deg != pytest.approx(pm, abs=10)


def test_gain_phase_input_matches_python_control_data_mode() -> None:
    # python-control stability_margins((mag, phase_deg, omega)) on the same Bode data.
    sys = 2 * (1 - S / 5) / (S * (1 + S))
    w = np.logspace(-2, 3, 1001)
    mag, phase_rad, _ = control.frequency_response(sys, w)
    gain_db = 20 * np.log10(mag)
    phase_deg = np.rad2deg(phase_rad)
    m = loop_margins(w / TWO_PI, response_from_gain_phase(gain_db, phase_deg))
    gm, pm, _sm, wpc, wgc, _wsm = control.stability_margins((mag, phase_deg, w))
    assert m.worst_phase_margin_deg == pytest.approx(pm, abs=0.05)
    assert m.crossover_hz * TWO_PI == pytest.approx(wgc, rel=1e-3)
    assert m.worst_gain_margin_db == pytest.approx(20 * math.log10(gm), abs=0.02)
    assert m.worst_gain_margin.freq_hz * TWO_PI == pytest.approx(wpc, rel=1e-3)


def test_phase_margin_to_closed_loop_q() -> None:
    # Erickson & Maksimovic 2nd ed. sec. 9.4 (from memory): Q = sqrt(cos pm)/sin pm, exact for
    # T = 1/((s/w0)(1 + s/w2)); ERICKSON-2E §9.4 (from memory): 45 deg -> 1.189, 60 deg -> 0.816.
    assert closed_loop_q(45.0) == pytest.approx(1.189, abs=5e-4)
    assert closed_loop_q(60.0) == pytest.approx(0.816, abs=5e-4)
    for w2_over_w0 in (0.5, 1.0, 3.0, 10.0):
        w0 = 100.0
        loop = 1 / ((S / w0) * (1 + S / (w0 * w2_over_w0)))
        den = np.asarray(control.feedback(loop, 1).den[0][0], dtype=float)  # a2 s^2 + a1 s + a0
        q_closed = math.sqrt(den[0] * den[2]) / den[1]
        f, h = _sample(loop, 1.0, 1e5, per_decade=200)
        pm = loop_margins(f, h).worst_phase_margin_deg
        assert closed_loop_q(pm) == pytest.approx(q_closed, rel=1e-3)
    with pytest.raises(AnalysisInputError):
        closed_loop_q(95.0)


def test_results_are_frozen_dataclasses() -> None:
    f, h = _sample(1 / (S**3 + 2 * S**2 + S), 1e-3, 1e3, per_decade=50)
    m = loop_margins(f, h)
    assert isinstance(m, LoopMargins)
    assert isinstance(m.phase_crossovers[0], PhaseCrossover)
    with pytest.raises(AttributeError):
        m.modulus_margin = 1.0  # type: ignore[misc]


@pytest.mark.parametrize(
    "freq_hz,response,expected",
    [
        ([1.0, 2.0, 3.0], [1.0, 0.5], "3 points but response has 2"),
        ([1.0, 2.0, np.nan], [1.0, 0.5, 0.2], "freq_hz[2]"),
        ([1.0, 2.0, 3.0], [1.0, np.nan, 0.2], "response[1]"),
        ([1.0, 3.0, 2.0], [1.0, 0.5, 0.2], "not strictly increasing at index 2"),
        ([1.0, 2.0, 2.0], [1.0, 0.5, 0.2], "not strictly increasing"),
        ([1.0, 2.0], [1.0, 0.5], "at least 3 needed"),
        ([0.0, 2.0, 3.0], [1.0, 0.5, 0.2], "must be > 0"),
        ([1.0, 2.0, 3.0], [1.0, 0.0, 0.2], "exactly zero"),
    ],
)
def test_unusable_input_is_refused_with_a_clear_message(freq_hz, response, expected) -> None:
    with pytest.raises(AnalysisInputError, match=expected.replace("[", r"\[").replace("]", r"\]")):
        loop_margins(np.asarray(freq_hz), np.asarray(response, dtype=complex))


def test_unknown_phase_convention_is_refused() -> None:
    with pytest.raises(AnalysisInputError, match="phase_convention"):
        loop_margins([1.0, 2.0, 3.0], [2.0, 1.0, 0.5], phase_convention="shown")  # type: ignore[arg-type]


def test_interpolation_is_linear_in_log_frequency() -> None:
    # Bode reading (common practice): a -20 dB/decade line with linear phase in log f is
    # reproduced exactly between samples; outside the band nothing is extrapolated.
    f = np.array([10.0, 100.0, 1000.0])
    h = response_from_gain_phase([20.0, 0.0, -20.0], [-90.0, -100.0, -110.0])
    mid = interpolate_response(f, h, math.sqrt(10.0 * 100.0))
    assert 20 * math.log10(abs(mid)) == pytest.approx(10.0, abs=1e-12)
    assert math.degrees(np.angle(mid)) == pytest.approx(-95.0, abs=1e-12)
    with pytest.raises(AnalysisInputError, match="outside|cover"):
        interpolate_response(f, h, 5000.0)
