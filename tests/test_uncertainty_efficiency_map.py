"""efficiency_map's analyse(): every figure carries its GUM uncertainty and the flags of its points.

The points are made by hand (the shape ``Store.points`` returns); expected uncertainties are
worked by hand with JCGM 100:2008 (the GUM) clauses named beside them.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest

from benchctl.analysis.uncertainty import AccuracyTerm, InstrumentAccuracy, QuantityAccuracy
from benchctl.procedure import load_procedure


def q(pct: float, offset: float) -> QuantityAccuracy:
    return QuantityAccuracy((AccuracyTerm(pct, offset),))


# Input meter +/-(0.1 % + 2 mW) on power, output meter +/-(0.05 % + 1 mW) on power and
# +/-(0.02 % + 1 mV) on voltage; rectangular (GUM 4.3.7).
ACCURACY = {
    "input_meter": InstrumentAccuracy("TCPIP::127.0.0.1::6001::SOCKET", {"power": q(0.1, 0.002),
                                                                         "voltage": q(0.05, 0.005)}),
    "output_meter": InstrumentAccuracy("TCPIP::127.0.0.1::6002::SOCKET", {"power": q(0.05, 0.001),
                                                                          "voltage": q(0.02, 0.001)}),
}


@pytest.fixture(scope="module")
def proc():
    return load_procedure("efficiency_map")


def _points(unsettled_at=None, unverified_at=None) -> pd.DataFrame:
    rows = []
    for vin in (36.0, 75.0):
        for iout in (0.0, 1.25, 2.5, 3.75, 5.0):
            vout = 5.0 + 0.01 * (5.0 - iout) / 5.0 + (0.002 if vin == 75.0 else 0.0)
            pout = vout * iout
            pin = 0.2 + pout / 0.9 if iout > 0 else 0.2
            rows.append({"vin_set_v": vin, "iout_set_a": iout, "vin_v": vin, "iin_a": pin / vin, "pin_w": pin,
                         "vout_v": vout, "iout_a": iout, "pout_w": pout,
                         "pin_sd_w": 0.02, "pout_sd_w": 0.008, "vout_sd_v": 0.0, "n_readings": 16.0})
    frame = pd.DataFrame(rows)
    frame.insert(0, "seq", np.arange(1, len(rows) + 1))
    frame.insert(1, "tag", "ascending")
    settled = [True] * len(rows)
    infos = [{"method": "exponential_fit", "verified": True, "reason": ""} for _ in rows]
    reasons = [""] * len(rows)
    for at, verified, why in ((unsettled_at, True, "no convergence within 5 s"),
                              (unverified_at, False, "load current 0.23 A against 0.5 A set")):
        if at is None:
            continue
        k = int(frame.index[(frame["vin_set_v"] == at[0]) & (frame["iout_set_a"] == at[1])][0])
        settled[k] = False
        infos[k] = {"method": "exponential_fit", "verified": verified, "reason": why}
        reasons[k] = why
    frame["settled"] = settled
    frame["settle_info"] = pd.Series(infos, dtype="object")
    frame["settle_reason"] = reasons
    return frame


def _params(proc, **values):
    return proc.resolve_parameters(values={"vin_v": [36.0, 75.0], "iout_rated_a": 5.0, "vout_nom_v": 5.0,
                                           "load_pct": [0.0, 25.0, 50.0, 75.0, 100.0], **values})


def _pick(results, name, **scope):
    for r in results:
        if r.name == name and all(r.scope.get(k) == v for k, v in scope.items()):
            return r
    raise AssertionError(f"no {name} at {scope}")


def test_efficiency_and_loss_carry_their_gum_uncertainty(proc):
    points = _points()
    results = proc.module.analyse(points, _params(proc), accuracy=ACCURACY)
    r = _pick(results, "efficiency", vin_set_v=36.0, iout_set_a=5.0)
    row = points[(points["vin_set_v"] == 36.0) & (points["iout_set_a"] == 5.0)].iloc[0]
    pout, pin = row["pout_w"], row["pin_w"]
    # GUM 4.3.7 + 4.2.3 + 5.1.2: u^2(Pin) = (0.001 Pin + 0.002)^2/3 + (0.02/4)^2,
    # u^2(Pout) = (0.0005 Pout + 0.001)^2/3 + (0.008/4)^2; GUM 5.1.6: quotient of independent meters.
    u_pin2 = (0.001 * pin + 0.002) ** 2 / 3 + 0.005 ** 2
    u_pout2 = (0.0005 * pout + 0.001) ** 2 / 3 + 0.002 ** 2
    eta = pout / pin
    expected = eta * math.sqrt(u_pout2 / pout ** 2 + u_pin2 / pin ** 2)
    assert r.value == pytest.approx(eta)
    assert r.uncertainty == pytest.approx(expected, rel=1e-9)
    assert r.expanded_uncertainty == pytest.approx(2 * expected, rel=1e-9)  # GUM 6.2.1, k = 2
    assert "JCGM 100:2008" in r.details["uncertainty_method"]
    loss = _pick(results, "loss_w", vin_set_v=36.0, iout_set_a=5.0)
    assert loss.uncertainty == pytest.approx(math.sqrt(u_pin2 + u_pout2), rel=1e-9)
    # The no-load input power: the mean of one reading per line, u = u(Pin).
    nl = _pick(results, "no_load_input_power_w", vin_set_v=36.0)
    assert nl.uncertainty == pytest.approx(math.sqrt((0.001 * 0.2 + 0.002) ** 2 / 3 + 0.005 ** 2), rel=1e-9)


def test_regulation_and_average_carry_uncertainty(proc):
    results = proc.module.analyse(_points(), _params(proc), accuracy=ACCURACY)
    line = _pick(results, "line_regulation_pct", iout_set_a=5.0)
    # Vo = 5.000 V at 36 V and 5.002 V at 75 V on one meter (+/-(0.02 % + 1 mV)): the gain parts
    # 0.0002 x Vo/sqrt(3) are shared (GUM 5.2.2), the offsets 0.001/sqrt(3) independent; c = -/+ 20 %/V.
    g1, g2 = 0.0002 * 5.000, 0.0002 * 5.002
    var = 400.0 * ((g1 + 0.001) ** 2 + (g2 + 0.001) ** 2 - 2 * g1 * g2) / 3.0
    assert line.value == pytest.approx(0.04, abs=1e-9)
    assert line.uncertainty == pytest.approx(math.sqrt(var), rel=1e-9)
    load = _pick(results, "load_regulation_pct", vin_set_v=36.0)
    assert load.uncertainty > 0 and load.expanded_uncertainty == pytest.approx(2 * load.uncertainty)
    avg = _pick(results, "average_efficiency_4pt", vin_set_v=36.0)
    per_point = [_pick(results, "efficiency", vin_set_v=36.0, iout_set_a=i).uncertainty for i in (1.25, 2.5, 3.75, 5.0)]
    # The four efficiencies share both meters' gain errors, so the average's u lies between the
    # independent value sqrt(sum u^2)/4 and the fully correlated mean of the u (GUM 5.2.2).
    assert math.sqrt(sum(u * u for u in per_point)) / 4 < avg.uncertainty < np.mean(per_point)


def test_without_accuracy_there_is_no_uncertainty_and_the_reason_is_said(proc):
    results = proc.module.analyse(_points(), _params(proc))
    r = _pick(results, "efficiency", vin_set_v=36.0, iout_set_a=5.0)
    assert r.uncertainty is None and r.expanded_uncertainty is None
    assert "no accuracy" in r.details["uncertainty_note"]


def test_unsettled_and_unverified_points_flag_every_figure_they_feed(proc):
    points = _points(unsettled_at=(36.0, 2.5), unverified_at=(75.0, 5.0))
    results = proc.module.analyse(points, _params(proc), accuracy=ACCURACY)
    bad = _pick(results, "efficiency", vin_set_v=36.0, iout_set_a=2.5)
    assert bad.details["flags"] == ["unsettled"] and "no convergence" in bad.details["flag_reasons"]
    good = _pick(results, "efficiency", vin_set_v=36.0, iout_set_a=3.75)
    assert "flags" not in good.details
    unver = _pick(results, "loss_w", vin_set_v=75.0, iout_set_a=5.0)
    assert unver.details["flags"] == ["unverified"] and "0.23 A" in unver.details["flag_reasons"]
    # Aggregates inherit the flags of the points they use, with where.
    line = _pick(results, "line_regulation_pct", iout_set_a=5.0)
    assert line.details["flags"] == ["unverified"] and line.details["flag_reasons"].startswith("75 V, 5 A")
    assert _pick(results, "average_efficiency_4pt", vin_set_v=36.0).details["flags"] == ["unsettled"]
    assert _pick(results, "load_regulation_pct", vin_set_v=36.0).details.get("flags") is None  # 0 and 5 A only
    assert set(_pick(results, "max_abs_vout_deviation_pct").details["flags"]) == {"unsettled", "unverified"}
