"""First-order propagation of uncertainty against hand-worked cases (JCGM 100:2008, the GUM).

Each expected number is worked by hand in the comment beside it, with the clause of the
GUM it follows; the GUM's own example H.2 (simultaneous measurement of resistance and
reactance) is re-computed from its five sets of readings.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from benchctl.analysis.uncertainty import (
    AccuracyTerm,
    QuantityAccuracy,
    average_efficiency_uncertainty,
    combined_standard_uncertainty,
    efficiency_uncertainty,
    line_regulation_uncertainty,
    load_regulation_uncertainty,
    loss_uncertainty,
    reading_uncertainty,
    scatter_column,
    type_a_standard,
)


def spec(pct: float, offset: float, **kw) -> QuantityAccuracy:
    return QuantityAccuracy((AccuracyTerm(pct, offset, **kw),))


# ---------------------------------------------------------------- GUM H.2
# GUM H.2, Table H.2 (from memory): five simultaneous sets of V (V), I (mA), phi (rad).
H2_V = np.array([5.007, 4.994, 5.005, 4.990, 4.999])
H2_I = np.array([19.663, 19.639, 19.640, 19.685, 19.678]) * 1e-3
H2_PHI = np.array([1.0456, 1.0438, 1.0468, 1.0428, 1.0433])


def test_gum_h2_simultaneous_measurement_of_resistance_and_reactance():
    n = 5
    # GUM 4.2.3: s(q-bar) = s(q)/sqrt(n); Table H.2 gives s(V-bar) = 0.0032 V, s(I-bar) = 0.0095 mA,
    # s(phi-bar) = 0.00075 rad (from memory).
    u = [type_a_standard(x.std(ddof=1), n) for x in (H2_V, H2_I, H2_PHI)]
    assert u[0] == pytest.approx(0.0032, abs=0.00005)
    assert u[1] == pytest.approx(0.0095e-3, abs=0.00005e-3)
    assert u[2] == pytest.approx(0.00075, abs=0.000005)
    # GUM 5.2.2 Eq. (17), correlation from the simultaneous readings; Table H.2: r(V,I) = -0.36,
    # r(V,phi) = 0.86, r(I,phi) = -0.65 (from memory).
    r = np.corrcoef([H2_V, H2_I, H2_PHI])
    assert (r[0, 1], r[0, 2], r[1, 2]) == pytest.approx((-0.36, 0.86, -0.65), abs=0.006)
    v, i, phi = H2_V.mean(), H2_I.mean(), H2_PHI.mean()
    resistance, reactance, impedance = v / i * math.cos(phi), v / i * math.sin(phi), v / i
    # R = V/I cos(phi): c_V = R/V, c_I = -R/I, c_phi = -X; X = V/I sin(phi): c_V = X/V, c_I = -X/I, c_phi = R;
    # Z = V/I: c_V = Z/V, c_I = -Z/I. Table H.3 (from memory): R = 127.732 ohm, u = 0.071 ohm;
    # X = 219.847 ohm, u = 0.295 ohm; Z = 254.260 ohm, u = 0.236 ohm.
    assert resistance == pytest.approx(127.732, abs=0.001)
    assert reactance == pytest.approx(219.847, abs=0.001)
    assert impedance == pytest.approx(254.260, abs=0.001)
    assert combined_standard_uncertainty([resistance / v, -resistance / i, -reactance], u, r) == \
        pytest.approx(0.071, abs=0.0006)
    assert combined_standard_uncertainty([reactance / v, -reactance / i, resistance], u, r) == \
        pytest.approx(0.295, abs=0.001)
    assert combined_standard_uncertainty([impedance / v, -impedance / i, 0.0], u, r) == \
        pytest.approx(0.236, abs=0.0006)
    # Without the correlations (GUM 5.1.2, Eq. 10) the answer is different: they matter here.
    assert combined_standard_uncertainty([impedance / v, -impedance / i, 0.0], u) != pytest.approx(0.236, abs=0.01)


# ---------------------------------------------------------------- type A and type B of one reading
def test_rectangular_triangular_and_normal_type_b():
    # GUM 4.3.7: rectangular over +/-a -> u = a/sqrt(3); a = 0.05 % x 10 V + 5 mV = 10 mV.
    r = reading_uncertainty(10.0, spec(0.05, 0.005), instrument="m", quantity="voltage")
    assert r.u_type_b == pytest.approx(0.010 / math.sqrt(3.0), rel=1e-12)
    # GUM 4.3.9: triangular -> a/sqrt(6).
    t = reading_uncertainty(10.0, spec(0.05, 0.005, distribution="triangular"))
    assert t.u_type_b == pytest.approx(0.010 / math.sqrt(6.0), rel=1e-12)
    # GUM 4.3.3: a bound stated as an expanded uncertainty at k = 2 -> a/2.
    k2 = reading_uncertainty(10.0, spec(0.05, 0.005, distribution="normal", coverage_factor=2.0))
    assert k2.u_type_b == pytest.approx(0.005, rel=1e-12)


def test_per_range_term_and_over_range():
    acc = QuantityAccuracy((AccuracyTerm(0.1, 0.0002, range_max=1.0), AccuracyTerm(0.1, 0.002, range_max=10.0)))
    # 0.8 A is on the 1 A range: a = 0.1 % x 0.8 + 0.2 mA = 1.0 mA.
    assert reading_uncertainty(0.8, acc).u_type_b == pytest.approx(0.0010 / math.sqrt(3.0), rel=1e-12)
    # 1.2 A is on the 10 A range: a = 1.2 mA + 2 mA = 3.2 mA.
    assert reading_uncertainty(1.2, acc).u_type_b == pytest.approx(0.0032 / math.sqrt(3.0), rel=1e-12)
    # Above the largest range the specification says nothing: unknown, and the reason is given.
    over = reading_uncertainty(12.0, acc, instrument="load", quantity="current")
    assert not over.known and "above the largest range" in over.note


def test_type_a_combines_with_type_b():
    # GUM 4.2.3: s = 0.02 W over N = 16 readings -> u_A = 0.02/4 = 0.005 W;
    # type B 0.1 % x 28 W + 2 mW = 30 mW -> 0.030/sqrt(3) W; GUM 5.1.2: u = sqrt(0.0003 + 0.000025).
    r = reading_uncertainty(28.0, spec(0.1, 0.002), sd=0.02, n_readings=16)
    assert r.u_type_a == pytest.approx(0.005)
    assert r.u == pytest.approx(math.sqrt(0.000325), rel=1e-12)
    # One reading carries no scatter of its own.
    assert type_a_standard(0.02, 1) == 0.0 and type_a_standard(None, 16) == 0.0


def test_no_accuracy_means_unknown_not_zero():
    r = reading_uncertainty(5.0, None, instrument="output_meter", quantity="voltage", sd=0.001, n_readings=10)
    assert not r.known and "no accuracy" in r.note
    pin = reading_uncertainty(28.0, spec(0.1, 0.002))
    eta = efficiency_uncertainty(r, pin)
    assert not eta.known and "output_meter" in eta.note


# ---------------------------------------------------------------- efficiency, loss (a simple ratio)
def test_efficiency_of_two_independent_meters_worked_by_hand():
    # Input meter +/-(0.1 % + 2 mW), Pin = 28 W, s = 0.02 W over 16 readings:
    #   u^2(Pin) = (0.030)^2/3 + 0.005^2 = 0.000325 W^2.
    # Output meter +/-(0.05 % + 1 mW), Pout = 25 W, s = 0.008 W over 16 readings:
    #   a = 0.0125 + 0.001 = 0.0135 W; u^2(Pout) = 0.0135^2/3 + 0.002^2 = 0.00006475 W^2.
    pin = reading_uncertainty(28.0, spec(0.1, 0.002), instrument="in", quantity="power", sd=0.02, n_readings=16)
    pout = reading_uncertainty(25.0, spec(0.05, 0.001), instrument="out", quantity="power", sd=0.008,
                               n_readings=16)
    assert pin.u ** 2 == pytest.approx(0.000325, rel=1e-12)
    assert pout.u ** 2 == pytest.approx(0.00006475, rel=1e-12)
    # GUM 5.1.6 (a quotient of independent inputs): (u(eta)/eta)^2 = u^2(Pout)/Pout^2 + u^2(Pin)/Pin^2
    #   = 0.00006475/625 + 0.000325/784 = 1.036e-7 + 4.1454082e-7 = 5.1814082e-7;
    # eta = 25/28 = 0.89285714; u(eta) = 0.89285714 x sqrt(5.1814082e-7) = 6.42698e-4.
    eta = efficiency_uncertainty(pout, pin)
    assert eta.value == pytest.approx(25.0 / 28.0, rel=1e-15)
    assert eta.u == pytest.approx(6.42698e-4, rel=1e-5)
    assert eta.expanded == pytest.approx(2 * 6.42698e-4, rel=1e-5)  # GUM 6.2.1, k = 2
    # Loss = Pin - Pout = 3 W; u^2 = 0.000325 + 0.00006475 = 0.00038975 W^2 (GUM 5.1.2, c = +/-1).
    loss = loss_uncertainty(pout, pin)
    assert loss.value == pytest.approx(3.0)
    assert loss.u == pytest.approx(math.sqrt(0.00038975), rel=1e-12)


def test_efficiency_read_by_one_meter_shares_its_gain_error():
    # One instrument reads both powers on one range, +/-(0.1 % + 2 mW), no scatter.
    # u_B(Pin) = 0.030/sqrt(3), u_B(Pout) = (0.025 + 0.002)/sqrt(3) = 0.027/sqrt(3); the gain parts
    # 0.028/sqrt(3) and 0.025/sqrt(3) are fully correlated: u(Pin, Pout) = 0.028 x 0.025/3 = 0.0007/3 (GUM 5.2.2).
    # c_out = 1/28, c_in = -25/784:
    #   c_out^2 u^2(Pout) = 0.000243/784         = 3.0994898e-7
    #   c_in^2 u^2(Pin)   = 625/614656 x 0.0003  = 3.0504852e-7
    #   2 c_out c_in u(Pin, Pout) = -0.035/65856 = -5.3146259e-7
    #   u^2(eta) = 8.353491e-8 -> u(eta) = 2.890241e-4
    acc = spec(0.1, 0.002)
    pin = reading_uncertainty(28.0, acc, instrument="analyzer", quantity="power")
    pout = reading_uncertainty(25.0, acc, instrument="analyzer", quantity="power")
    assert efficiency_uncertainty(pout, pin).u == pytest.approx(2.890241e-4, rel=1e-5)
    # A pure gain error (no offset) cancels in the ratio altogether: Pout(1+g)/(Pin(1+g)) = Pout/Pin.
    gain_only = spec(0.2, 0.0)
    pin_g = reading_uncertainty(28.0, gain_only, instrument="analyzer", quantity="power")
    pout_g = reading_uncertainty(25.0, gain_only, instrument="analyzer", quantity="power")
    assert efficiency_uncertainty(pout_g, pin_g).u == pytest.approx(0.0, abs=1e-15)
    # ... but not in the loss: Pin - Pout = 3 W with errors 0.2 % x (28 - 25) W: u = 0.006/sqrt(3) W.
    assert loss_uncertainty(pout_g, pin_g).u == pytest.approx(0.006 / math.sqrt(3.0), rel=1e-9)


# ---------------------------------------------------------------- regulation and the average
def test_line_regulation_of_one_meter_worked_by_hand():
    # Output meter +/-(0.02 % + 1 mV), Vo = 5.010 V at Vin,min and 5.000 V at Vin,max, Vo,nom = 5 V.
    # Line regulation = (5.000 - 5.010)/5 x 100 = -0.2 %.
    # u_B(5.010) = (0.001002 + 0.001)/sqrt(3), gain part 0.001002/sqrt(3);
    # u_B(5.000) = (0.001 + 0.001)/sqrt(3), gain part 0.001/sqrt(3).
    # c = -/+ 100/5 = -/+ 20 %/V; u^2 = 400 x [ (0.002002^2 + 0.002^2 - 2 x 0.001002 x 0.001)/3 ]
    #   = 400 x (4.008004e-6 + 4e-6 - 2.004e-6)/3 = 400 x 2.001335e-6 = 8.00534e-4 -> u = 0.0282937 %.
    acc = spec(0.02, 0.001)
    lo = reading_uncertainty(5.010, acc, instrument="out", quantity="voltage")
    hi = reading_uncertainty(5.000, acc, instrument="out", quantity="voltage")
    reg = line_regulation_uncertainty([lo], [hi], 5.0)
    assert reg.value == pytest.approx(-0.2, abs=1e-12)
    assert reg.u == pytest.approx(math.sqrt(8.00534e-4), rel=1e-5)


def test_load_regulation_textbook_and_rated_worked_by_hand():
    # V_NL = 5.02 V, V_FL = 4.98 V, each +/-(0 % + 2 mV) (offset only: independent), u = 0.002/sqrt(3) each.
    acc = spec(0.0, 0.002)
    nl = reading_uncertainty(5.02, acc, instrument="out", quantity="voltage")
    fl = reading_uncertainty(4.98, acc, instrument="out", quantity="voltage")
    u1 = 0.002 / math.sqrt(3.0)
    # textbook: (V_NL - V_FL)/V_FL x 100 = 0.04/4.98 x 100 = 0.8032129 %;
    # c_NL = 100/4.98 = 20.080321, c_FL = -100 x 5.02/4.98^2 = -20.241609 (GUM 5.1.3).
    t = load_regulation_uncertainty([nl], [fl], convention="textbook")
    assert t.value == pytest.approx(0.8032129, rel=1e-6)
    assert t.u == pytest.approx(u1 * math.hypot(20.080321, 20.241609), rel=1e-6)
    # rated (V_rated = 5 V): 0.04/5 x 100 = 0.8 %, c = +/-20: u = 20 x sqrt(2) x u1.
    r = load_regulation_uncertainty([nl], [fl], convention="rated", vout_rated_v=5.0)
    assert r.value == pytest.approx(0.8, rel=1e-9)
    assert r.u == pytest.approx(20.0 * math.sqrt(2.0) * u1, rel=1e-6)


def test_four_point_average_keeps_the_common_gain_error():
    # Four load levels, separate input and output meters with gain-only specifications
    # (0.1 % on Pout, 0.2 % on Pin, rectangular), one point per level.
    # Every efficiency scales by the same (1 + g_out)/(1 + g_in), so the average's relative uncertainty
    # is that of one efficiency: sqrt((0.001^2 + 0.002^2)/3) (GUM 5.2.2 with r = 1 between the levels).
    out_acc, in_acc = spec(0.1, 0.0), spec(0.2, 0.0)
    pairs = [(5.0, 6.0), (10.0, 11.5), (15.0, 17.4), (20.0, 23.3)]
    groups = [[(reading_uncertainty(po, out_acc, instrument="out", quantity="power"),
                reading_uncertainty(pi, in_acc, instrument="in", quantity="power"))] for po, pi in pairs]
    avg = average_efficiency_uncertainty(groups)
    mean = float(np.mean([po / pi for po, pi in pairs]))
    assert avg.value == pytest.approx(mean, rel=1e-15)
    assert avg.u == pytest.approx(mean * math.sqrt((0.001 ** 2 + 0.002 ** 2) / 3.0), rel=1e-9)
    # Offsets alone are independent from level to level: u^2 = (1/16) x sum of the four u^2(eta_l).
    off_out, off_in = spec(0.0, 0.003), spec(0.0, 0.004)
    groups = [[(reading_uncertainty(po, off_out, instrument="out", quantity="power"),
                reading_uncertainty(pi, off_in, instrument="in", quantity="power"))] for po, pi in pairs]
    each = [efficiency_uncertainty(po, pi).u for ((po, pi),) in groups]
    assert average_efficiency_uncertainty(groups).u == pytest.approx(math.sqrt(sum(e * e for e in each)) / 4.0,
                                                                     rel=1e-6)


def test_scatter_column_names():
    # Naming convention of the per-point scatter: the unit suffix stays last.
    assert scatter_column("pin_w") == "pin_sd_w"
    assert scatter_column("iout_a") == "iout_sd_a"
    assert scatter_column("vout_v") == "vout_sd_v"


# ---------------------------------------------------------------- temperatures
def test_a_temperature_rise_combines_two_independent_thermocouples():
    from benchctl.analysis.uncertainty import temperature_reading_uncertainty, temperature_rise_uncertainty

    tc = spec(0.0, 0.5)  # ±0.5 °C, rectangular: u = 0.5/√3 = 0.28868 K per channel (GUM 4.3.7)
    part = temperature_reading_uncertainty(80.0, tc, instrument="T1", channel="rectifier")
    amb = temperature_reading_uncertainty(25.0, tc, instrument="T1", channel="ambient")
    u = temperature_rise_uncertainty(part, amb)
    # ΔT = 55 K; two thermocouples, independent (GUM 5.1.2): u = √2 · 0.28868 = 0.40825 K, U = 0.81650 K
    assert u.value == pytest.approx(55.0)
    assert u.u == pytest.approx(math.sqrt(2.0) * 0.5 / math.sqrt(3.0), rel=1e-12)
    assert u.expanded == pytest.approx(0.81650, abs=1e-5)


def test_one_thermocouple_read_twice_keeps_its_fixed_error():
    from benchctl.analysis.uncertainty import temperature_reading_uncertainty, temperature_rise_uncertainty

    tc = spec(0.0, 0.5)
    a = temperature_reading_uncertainty(90.0, tc, instrument="T1", channel="switch")
    b = temperature_reading_uncertainty(70.0, tc, instrument="T1", channel="switch")
    # the same thermocouple's fixed error cancels in its own difference (GUM 5.2.2 with r = 1): u = 0
    assert temperature_rise_uncertainty(a, b).u == pytest.approx(0.0, abs=1e-12)
    unknown = temperature_reading_uncertainty(90.0, None, instrument="T1", channel="switch")
    assert not unknown.known and "no accuracy" in unknown.note


def test_derated_load_uncertainty_is_the_fixed_error_over_the_slope():
    from benchctl.analysis.uncertainty import derated_load_uncertainty, temperature_reading_uncertainty

    tc = spec(0.0, 0.5)
    t1 = temperature_reading_uncertainty(100.0, tc, instrument="T1", channel="rectifier")
    t2 = temperature_reading_uncertainty(110.0, tc, instrument="T1", channel="rectifier")
    u = derated_load_uncertainty(3.0, 4.0, t1, t2, 105.0)
    # I* = 3 + (105 − 100)·1/10 = 3.5 A. By hand (GUM 5.1.3): ∂I*/∂T1 = −1·(110 − 105)/10² = −0.05 A/K,
    # ∂I*/∂T2 = −1·(105 − 100)/10² = −0.05 A/K; one thermocouple, r = 1 (GUM 5.2.2):
    # u = |−0.05 − 0.05| · 0.28868 = 0.028868 A, i.e. the fixed error over the slope of 10 K/A.
    assert u.value == pytest.approx(3.5)
    assert u.u == pytest.approx(0.1 * 0.5 / math.sqrt(3.0), rel=1e-12)
    # Were the two readings independent, it would be √(0.05² + 0.05²)·0.28868 = 0.020412 A: smaller, and wrong.
    assert u.u > math.hypot(0.05, 0.05) * 0.5 / math.sqrt(3.0)
    with pytest.raises(ValueError, match="must exceed"):
        derated_load_uncertainty(3.0, 4.0, t2, t1, 105.0)


def test_derated_load_names_the_points_that_bracket_the_limit():
    from benchctl.analysis.thermal import derated_load

    d = derated_load([5.0, 1.0, 3.0], [120.0, 60.0, 95.0], 105.0)   # unsorted on purpose
    assert d.found and d.bracket == (2, 0)                           # 3 A (index 2) and 5 A (index 0)
    assert d.load_a == pytest.approx(3.0 + 10.0 * 2.0 / 25.0)        # I1 + (L − T1)(I2 − I1)/(T2 − T1)
