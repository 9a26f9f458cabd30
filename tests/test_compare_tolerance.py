"""Comparison tolerances: one per quantity, applied to every delta and shown as applied; the
difference plot draws that band; two revisions compared on their units' means."""

from __future__ import annotations

import pandas as pd
import pytest

from benchctl.compare import compare_points, compare_revisions, quantity_tolerance
from benchctl.report.compare_plots import difference_figure
from benchctl.store import RunStart, Store


def _frames():
    a = pd.DataFrame({"seq": [1, 2], "vin_set_v": [48.0, 48.0], "iout_set_a": [1.0, 4.0],
                      "drain_peak_v": [0.200, 0.500]})
    b = a.assign(drain_peak_v=[0.2044, 0.5091])
    return a, b


def test_a_larger_change_is_never_let_through_while_a_smaller_one_is_flagged():
    a, b = _frames()
    cmp = compare_points(a, b)
    d_small, d_large = sorted((d for d in cmp.deltas if d.quantity == "drain_peak_v"), key=lambda d: abs(d.delta))
    assert d_small.delta == pytest.approx(0.0044) and d_large.delta == pytest.approx(0.0091)
    # one tolerance for the quantity: 2 % of the median |A| (0.35 V) = 7 mV, on both deltas
    tol = cmp.tolerances["drain_peak_v"]
    assert tol.value == pytest.approx(0.02 * 0.35) and tol.source == "relative"
    assert d_small.tolerance == d_large.tolerance == tol.value
    assert (d_small.flagged, d_large.flagged) == (False, True)
    assert "2 % of the median |A|" in tol.rule
    frame = cmp.frame()
    assert set(frame["tolerance_rule"]) == {tol.rule}


def test_given_and_default_tolerances_win_and_say_so():
    assert quantity_tolerance("efficiency", [0.86], {}).rule == "±0.005 (default for efficiency)"
    t = quantity_tolerance("efficiency", [0.86], {"efficiency": 0.003})
    assert (t.value, t.source) == (0.003, "given")
    # the floor of a volt quantity (1 mV) holds near zero
    assert quantity_tolerance("ripple_pk_pk_v", [0.001, 0.002], {}).value == pytest.approx(1e-3)


def test_the_difference_plot_draws_the_tolerance_that_flagged():
    a, b = _frames()
    cmp = compare_points(a, b)
    fig = difference_figure("drain_peak_v", cmp.deltas, cmp.tolerances["drain_peak_v"], title="t")
    ax = fig.axes[0]
    band = [p for p in ax.patches]
    assert band, "the tolerance band is drawn"
    ys = band[0].get_path().vertices[:, 1]
    y0, y1 = band[0].get_transform().transform([[0, ys.min()], [0, ys.max()]])[:, 1]
    inv = ax.transData.inverted()
    lo = inv.transform([[0, y0]])[0, 1]
    hi = inv.transform([[0, y1]])[0, 1]
    assert (lo, hi) == pytest.approx((-0.007, 0.007), abs=1e-9)


def _run(store, revision, serial, eff):
    run_id = store.begin_run(RunStart(procedure="efficiency_map", procedure_sha256="a" * 64, station_name="b1",
                                      dut_part="FB", dut_revision=revision, dut_serial=serial))
    for iout in (1.0, 2.5, 5.0):
        pout = 5.0 * iout
        store.record_point(run_id, {"vin_set_v": 48.0, "iout_set_a": iout, "pin_w": pout / eff, "pout_w": pout})
    store.end_run(run_id, "completed")


def test_two_revisions_compared_on_the_means_of_their_units(tmp_path):
    with Store.open(str(tmp_path / "r.db")) as store:
        for serial, eff in (("A1", 0.85), ("A2", 0.86)):
            _run(store, "A", serial, eff)
        for serial, eff in (("B1", 0.865), ("B2", 0.875), ("B3", 0.870)):
            _run(store, "B", serial, eff)
        rc = compare_revisions(store, "FB", "A", "B")
    assert rc.units_a == ("A1", "A2") and rc.units_b == ("B1", "B2", "B3")
    cmp = rc.by_procedure["efficiency_map"]
    assert cmp.matched_points == 3
    eff = [d for d in cmp.deltas if d.quantity == "efficiency"]
    # efficiency of the mean powers: Pout / mean(Pin) per revision (η = Pout/Pin, definition)
    for d in eff:
        pout = 5.0 * d.where["iout_set_a"]
        mean_pin_a = (pout / 0.85 + pout / 0.86) / 2
        mean_pin_b = (pout / 0.865 + pout / 0.875 + pout / 0.870) / 3
        assert d.delta == pytest.approx(pout / mean_pin_b - pout / mean_pin_a, rel=1e-9)
        assert d.flagged  # about +1.5 %-points, beyond the default 0.5
