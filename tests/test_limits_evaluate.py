"""Evaluation of spec limits on hand-made run data: worst value, margins, filters, verdicts.

Every expected number below is worked by hand from the values in the test (the margin
of a value to a lower bound is value - min, to an upper bound max - value; the worst
value is the one with the smallest margin) - common practice for spec-limit checks.
The data frames have the shapes ``Store.points`` and ``Store.results`` return.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from benchctl.cli import EXIT_FAILED, EXIT_NOT_CHECKED, EXIT_OK
from benchctl.limits import (
    FAIL,
    NOT_CHECKED,
    PASS,
    RunContext,
    RunData,
    check_limits,
    evaluate_limit,
    exit_code_for,
    parse_limits,
)


# ---------------------------------------------------------------- helpers
def points_frame(rows: list[dict]) -> pd.DataFrame:
    """A wide points frame as Store.points returns it (seq, t_utc, tag, settled, settle_time_s, quantities)."""
    frame = pd.DataFrame(rows)
    frame.insert(0, "seq", np.arange(1, len(rows) + 1, dtype="int64"))
    frame.insert(1, "t_utc", pd.to_datetime(1.7e9 + frame["seq"].astype(float), unit="s", utc=True))
    if "tag" not in frame:
        frame.insert(2, "tag", "ascending")
    if "settled" not in frame:
        frame.insert(3, "settled", True)
    frame.insert(4, "settle_time_s", 0.1)
    return frame


def results_frame(rows: list[tuple]) -> pd.DataFrame:
    """A results frame as Store.results returns it; rows are (name, value, unit, scope[, details])."""
    return pd.DataFrame({
        "result_id": pd.Series(range(1, len(rows) + 1), dtype="int64"),
        "name": pd.Series([r[0] for r in rows], dtype="str"),
        "value": pd.Series([np.nan if r[1] is None else r[1] for r in rows], dtype="float64"),
        "unit": pd.Series([r[2] for r in rows], dtype="str"),
        "details": pd.Series([r[4] if len(r) > 4 else None for r in rows], dtype="object"),
        "scope": pd.Series([r[3] for r in rows], dtype="object"),
    })


EMPTY_RESULTS = results_frame([])


def run_data(points=None, results=None, *, parameters=None, status="completed", units=None) -> RunData:
    ctx = RunContext(run_id=7, procedure="efficiency_map", status=status,
                     parameters={"iout_rated_a": 5.0} if parameters is None else parameters)
    return RunData(context=ctx, points=points if points is not None else points_frame([]),
                   results=results if results is not None else EMPTY_RESULTS, units=units or {})


def one_limit(toml_body: str):
    return parse_limits("[[limit]]\n" + toml_body).limits[0]


# Flyback 36-75 V -> 5 V, 5 A rated (demo scenario); per-point efficiency results at 48 V.
FLYBACK_48V_EFF = [  # (seq, iout_set_a, efficiency)
    (1, 0.5, 0.781), (2, 1.25, 0.842), (3, 2.5, 0.871), (4, 3.75, 0.866), (5, 5.0, 0.858),
]


def flyback_efficiency_results(vin: float = 48.0) -> pd.DataFrame:
    return results_frame([
        ("efficiency", eff, "", {"seq": seq, "vin_set_v": vin, "iout_set_a": iout}) for seq, iout, eff in FLYBACK_48V_EFF
    ])


# ---------------------------------------------------------------- min / max / both
def test_min_limit_with_scope_and_load_pct_filter_by_hand():
    spec = one_limit('name = "eff"\nquantity = "efficiency"\nmin = 0.86\n'
                     'where.vin_set_v = 48.0\nwhere.load_pct = { min = 50 }\n')
    out = evaluate_limit(spec, run_data(results=flyback_efficiency_results()))
    # load >= 50 % of 5 A keeps 2.5, 3.75 and 5 A: 0.871, 0.866, 0.858 (hand-picked)
    assert out.n_values == 3
    assert out.source == "result"
    assert out.worst_value == pytest.approx(0.858)
    assert out.worst_scope == {"seq": 5, "vin_set_v": 48.0, "iout_set_a": 5.0}
    assert out.bound == "min" and out.bound_value == 0.86
    assert out.margin == pytest.approx(0.858 - 0.86)            # -0.002
    assert out.margin_rel == pytest.approx((0.858 - 0.86) / 0.86)
    assert out.passed is False and out.status == FAIL
    assert [f.value for f in out.failing] == [pytest.approx(0.858)]
    assert "load_pct >= 50 %" in out.where and "iout_rated_a = 5 A" in out.where


def test_min_limit_passes_when_the_filter_excludes_light_load():
    spec = one_limit('name = "eff"\nquantity = "efficiency"\nmin = 0.85\nwhere.load_pct = { min = 50 }\n')
    out = evaluate_limit(spec, run_data(results=flyback_efficiency_results()))
    assert out.passed is True
    assert out.margin == pytest.approx(0.858 - 0.85)            # 0.008, at 5 A
    assert out.worst_scope["iout_set_a"] == 5.0
    # without the filter the 0.5 A point (0.781) is the worst and fails
    spec_all = one_limit('name = "eff"\nquantity = "efficiency"\nmin = 0.85\n')
    out_all = evaluate_limit(spec_all, run_data(results=flyback_efficiency_results()))
    assert out_all.passed is False
    assert out_all.worst_value == pytest.approx(0.781)
    assert len(out_all.failing) == 2                             # 0.781 and 0.842


def test_load_pct_range_is_inclusive_at_its_ends():
    # 50 % of 5 A is exactly 2.5 A and 75 % is 3.75 A: both ends kept (inclusive range)
    spec = one_limit('name = "eff"\nquantity = "efficiency"\nmin = 0.8\nwhere.load_pct = { min = 50, max = 75 }\n')
    out = evaluate_limit(spec, run_data(results=flyback_efficiency_results()))
    assert out.n_values == 2
    assert out.worst_value == pytest.approx(0.866)


def test_max_limit_margin_is_max_minus_worst():
    results = results_frame([
        ("vout_deviation_pct", 0.42, "%", {"seq": 1}),
        ("vout_deviation_pct", -1.10, "%", {"seq": 2}),
        ("vout_deviation_pct", 1.75, "%", {"seq": 3}),
    ])
    out = evaluate_limit(one_limit('name = "dev"\nquantity = "vout_deviation_pct"\nmax = 1.5\n'), run_data(results=results))
    assert out.worst_value == pytest.approx(1.75)
    assert out.margin == pytest.approx(1.5 - 1.75)                 # -0.25 %
    assert out.margin_rel == pytest.approx(-0.25 / 1.5)
    assert out.unit == "%" and out.bound == "max"
    assert out.passed is False


def test_band_limit_takes_the_nearer_bound():
    # load regulation within +/-1 %: margins 0.7, 0.2 (to -1), 0.5 -> worst -0.8 at the min side
    results = results_frame([
        ("load_regulation_pct", 0.3, "%", {"vin_set_v": 36.0}),
        ("load_regulation_pct", -0.8, "%", {"vin_set_v": 48.0}),
        ("load_regulation_pct", 0.5, "%", {"vin_set_v": 75.0}),
    ])
    spec = one_limit('name = "reg"\nquantity = "load_regulation_pct"\nmin = -1.0\nmax = 1.0\n')
    out = evaluate_limit(spec, run_data(results=results))
    assert out.passed is True
    assert out.worst_value == pytest.approx(-0.8)
    assert out.bound == "min" and out.bound_value == -1.0
    assert out.margin == pytest.approx(0.2)
    assert out.margin_rel == pytest.approx(0.2 / 1.0)
    assert out.worst_scope == {"vin_set_v": 48.0}


def test_value_on_the_bound_passes_with_zero_margin():
    results = results_frame([("efficiency", 0.86, "", {"seq": 1})])
    out = evaluate_limit(one_limit('name = "e"\nquantity = "efficiency"\nmin = 0.86\n'), run_data(results=results))
    assert out.passed is True and out.margin == 0.0


def test_zero_bound_gives_no_relative_margin():
    results = results_frame([("line_regulation_pct", -0.01, "%", {"iout_set_a": 1.0})])
    out = evaluate_limit(one_limit('name = "r"\nquantity = "line_regulation_pct"\nmax = 0\n'), run_data(results=results))
    assert out.margin == pytest.approx(0.01)
    assert out.margin_rel is None


def test_ties_take_the_first_value_in_stored_order():
    results = results_frame([("gain_margin_db", 8.0, "dB", {"vin_set_v": v}) for v in (36.0, 48.0, 75.0)])
    out = evaluate_limit(one_limit('name = "gm"\nquantity = "gain_margin_db"\nmin = 10\n'), run_data(results=results))
    assert out.worst_scope == {"vin_set_v": 36.0}
    assert len(out.failing) == 3


def test_four_point_average_against_level_vi_low_voltage_limit():
    # 5 V, 5 A = 25 W low-voltage supply: limit 0.0834 ln(Po) - 0.0014 Po + 0.609 for 1-49 W
    # [10 CFR 430.32(w) Level VI, from memory]; average of 25/50/75/100 % efficiencies
    # [10 CFR 430 Subpart B Appendix Z].
    po = 25.0
    level_vi = 0.0834 * math.log(po) - 0.0014 * po + 0.609
    point_eff = [0.842, 0.871, 0.866, 0.858]
    average = sum(point_eff) / 4
    results = results_frame([("average_efficiency_4pt", average, "", {"vin_set_v": 48.0})])
    spec = one_limit(f'name = "avg"\nquantity = "average_efficiency_4pt"\nmin = {level_vi!r}\n')
    out = evaluate_limit(spec, run_data(results=results))
    assert out.passed is (average >= level_vi)
    assert out.margin == pytest.approx(average - level_vi)        # 0.85925 - 0.7410 = +0.118


# ---------------------------------------------------------------- filters on points
def flyback_points() -> pd.DataFrame:
    rows = []
    for vin in (36.0, 48.0, 75.0):
        for iout, vout in ((0.0, 5.012), (2.5, 5.001), (5.0, 4.987)):
            rows.append({"vin_set_v": vin, "iout_set_a": iout, "vin_v": vin - 0.02, "vout_v": vout,
                         "pin_w": 5.0 * iout / 0.86 + 0.25, "pout_w": vout * iout})
    rows.append({"vin_set_v": 48.0, "iout_set_a": 5.0, "vin_v": 47.98, "vout_v": 5.200, "pin_w": 29.0,
                 "pout_w": 26.0, "tag": "descending"})
    rows.append({"vin_set_v": 48.0, "iout_set_a": 2.5, "vin_v": 47.98, "vout_v": 4.850, "pin_w": 14.8,
                 "pout_w": 12.0, "settled": False})
    frame = points_frame(rows)
    frame["tag"] = ["ascending"] * 9 + ["descending", "ascending"]
    frame["settled"] = [True] * 10 + [False]
    return frame


def test_point_quantity_with_text_and_bool_filters():
    pts = flyback_points()
    spec = one_limit('name = "vout"\nquantity = "vout_v"\nmin = 4.95\nmax = 5.05\n'
                     'where.tag = "ascending"\nwhere.settled = true\n')
    out = evaluate_limit(spec, run_data(points=pts, units={"vout_v": "V"}))
    # the descending 5.200 V point and the unsettled 4.850 V point are filtered out
    assert out.source == "point" and out.unit == "V"
    assert out.n_values == 9
    assert out.worst_value == pytest.approx(4.987)
    assert out.margin == pytest.approx(4.987 - 4.95)              # nearer the min side (0.037 < 0.038)
    assert out.bound == "min"
    assert out.passed is True
    assert out.worst_scope["seq"] == 3 and out.worst_scope["vin_set_v"] == 36.0
    # without the filters both excluded points fail
    spec_all = one_limit('name = "vout"\nquantity = "vout_v"\nmin = 4.95\nmax = 5.05\n')
    out_all = evaluate_limit(spec_all, run_data(points=pts))
    assert out_all.passed is False
    assert sorted(f.value for f in out_all.failing) == [pytest.approx(4.85), pytest.approx(5.2)]
    assert out_all.margin == pytest.approx(5.05 - 5.2)            # -0.15 (the 4.85 V point: -0.10)
    assert out_all.worst_value == pytest.approx(5.2) and out_all.bound == "max"


def test_point_filter_with_range_and_list():
    pts = flyback_points()
    spec = one_limit('name = "vout"\nquantity = "vout_v"\nmax = 5.01\n'
                     'where.vin_set_v = [36.0, 75.0]\nwhere.iout_set_a = { max = 2.5 }\n')
    out = evaluate_limit(spec, run_data(points=pts))
    # 36 and 75 V, 0 and 2.5 A: 5.012, 5.001, 5.012, 5.001 -> worst 5.012 (first, seq 1)
    assert out.n_values == 4
    assert out.worst_value == pytest.approx(5.012)
    assert out.margin == pytest.approx(5.01 - 5.012)
    assert out.worst_scope["seq"] == 1
    assert out.passed is False and len(out.failing) == 2


def test_result_filter_reaches_point_columns_through_seq():
    # efficiency results carry seq; the filter on the measured vin_v comes from the point
    pts = points_frame([{"vin_set_v": 48.0, "iout_set_a": 2.5, "vin_v": v} for v in (47.9, 48.3, 48.05)])
    res = results_frame([("efficiency", e, "", {"seq": s}) for s, e in ((1, 0.80), (2, 0.90), (3, 0.85))])
    spec = one_limit('name = "e"\nquantity = "efficiency"\nmin = 0.82\nwhere.vin_v = { min = 48.0 }\n')
    out = evaluate_limit(spec, run_data(points=pts, results=res))
    assert out.n_values == 2                      # seq 2 and 3
    assert out.worst_value == pytest.approx(0.85)
    assert out.passed is True


def test_load_pct_on_points():
    pts = flyback_points()
    spec = one_limit('name = "eta"\nquantity = "pin_w"\nmax = 30\nwhere.load_pct = 100\nwhere.tag = "ascending"\n')
    out = evaluate_limit(spec, run_data(points=pts))
    # 100 % of 5 A = 5 A; ascending 5 A points: pin = 5*5/0.86 + 0.25 = 29.3198 W each
    assert out.n_values == 3
    assert out.worst_value == pytest.approx(25.0 / 0.86 + 0.25)
    assert out.margin == pytest.approx(30 - (25.0 / 0.86 + 0.25))


def test_corners_with_extremes_on_line_and_load():
    # phase margin on a 3 x 3 line x load grid; the centre (48 V, 2.5 A) is lowest but not a corner
    pm = {(36.0, 0.5): 62.0, (36.0, 2.5): 58.0, (36.0, 5.0): 51.0,
          (48.0, 0.5): 64.0, (48.0, 2.5): 40.0, (48.0, 5.0): 55.0,
          (75.0, 0.5): 70.0, (75.0, 2.5): 66.0, (75.0, 5.0): 47.5}
    res = results_frame([("phase_margin_deg", v, "deg", {"vin_set_v": k[0], "iout_set_a": k[1]}) for k, v in pm.items()])
    spec = one_limit('name = "pm"\nquantity = "phase_margin_deg"\nmin = 45\n'
                     'where.vin_set_v = { at = "extremes" }\nwhere.iout_set_a = { at = "extremes" }\n')
    out = evaluate_limit(spec, run_data(results=res))
    assert out.n_values == 4                         # (36,0.5) (36,5) (75,0.5) (75,5)
    assert out.worst_value == 47.5
    assert out.worst_scope == {"vin_set_v": 75.0, "iout_set_a": 5.0}
    assert out.margin == pytest.approx(2.5)
    assert out.passed is True
    spec_min = one_limit('name = "pm"\nquantity = "phase_margin_deg"\nmin = 45\nwhere.vin_set_v = { at = "min" }\n')
    out_min = evaluate_limit(spec_min, run_data(results=res))
    assert out_min.n_values == 3 and out_min.worst_value == 51.0
    every = evaluate_limit(one_limit('name = "pm"\nquantity = "phase_margin_deg"\nmin = 45\n'), run_data(results=res))
    assert every.passed is False and every.worst_value == 40.0


# ---------------------------------------------------------------- not checked
def test_unknown_quantity_is_not_checked_with_reason():
    out = evaluate_limit(one_limit('name = "pm"\nquantity = "phase_margin_deg"\nmin = 45\n'),
                         run_data(points=flyback_points(), results=flyback_efficiency_results()))
    assert out.passed is None and out.status == NOT_CHECKED
    assert out.n_values == 0 and out.worst_value is None and out.margin is None
    assert "phase_margin_deg" in out.reason and "efficiency" in out.reason and "vout_v" in out.reason


def test_filter_that_matches_nothing_lists_the_values_present():
    spec = one_limit('name = "e"\nquantity = "efficiency"\nmin = 0.8\nwhere.vin_set_v = 60.0\n')
    out = evaluate_limit(spec, run_data(results=flyback_efficiency_results()))
    assert out.passed is None
    assert "vin_set_v = 60 V" in out.reason and "48" in out.reason


def test_load_pct_without_rated_current_is_not_checked():
    spec = one_limit('name = "e"\nquantity = "efficiency"\nmin = 0.8\nwhere.load_pct = { min = 50 }\n')
    out = evaluate_limit(spec, run_data(results=flyback_efficiency_results(), parameters={"vin_v": [48.0]}))
    assert out.passed is None
    assert "iout_rated_a" in out.reason and "iout_set_a" in out.reason


def test_unit_mismatch_is_not_checked():
    res = results_frame([("crossover_hz", 3.1e3, "Hz", {"vin_set_v": 48.0})])
    out = evaluate_limit(one_limit('name = "fc"\nquantity = "crossover_hz"\nmax = 30\nunit = "kHz"\n'),
                         run_data(results=res))
    assert out.passed is None and "'Hz'" in out.reason and "'kHz'" in out.reason
    ok = evaluate_limit(one_limit('name = "fc"\nquantity = "crossover_hz"\nmax = 30e3\nunit = "Hz"\n'),
                        run_data(results=res))
    assert ok.passed is True and ok.margin == pytest.approx(30e3 - 3.1e3)


# ---------------------------------------------------------------- absent values (NaN)
def test_absent_result_fails_by_default_and_gives_its_reason():
    res = results_frame([
        ("phase_margin_deg", 61.0, "deg", {"vin_set_v": 36.0}),
        ("phase_margin_deg", None, "deg", {"vin_set_v": 75.0}, {"reason": "no gain crossover in the sweep"}),
    ])
    out = evaluate_limit(one_limit('name = "pm"\nquantity = "phase_margin_deg"\nmin = 45\n'), run_data(results=res))
    assert out.passed is False
    assert out.n_values == 1 and out.n_missing == 1
    assert out.worst_value == 61.0 and out.margin == pytest.approx(16.0)
    assert "no gain crossover" in out.reason
    assert out.failing[0].value is None and out.failing[0].scope == {"vin_set_v": 75.0}
    ignored = evaluate_limit(one_limit('name = "pm"\nquantity = "phase_margin_deg"\nmin = 45\nmissing = "ignore"\n'),
                             run_data(results=res))
    assert ignored.passed is True and ignored.n_missing == 1


def test_all_results_absent_fail_or_are_not_checked():
    res = results_frame([("average_efficiency_4pt", None, "", {"vin_set_v": 48.0}, {"reason": "no 25 % point"})])
    failing = evaluate_limit(one_limit('name = "a"\nquantity = "average_efficiency_4pt"\nmin = 0.8\n'),
                             run_data(results=res))
    assert failing.passed is False and failing.worst_value is None and "no 25 % point" in failing.reason
    ignored = evaluate_limit(one_limit('name = "a"\nquantity = "average_efficiency_4pt"\nmin = 0.8\nmissing = "ignore"\n'),
                             run_data(results=res))
    assert ignored.passed is None and ignored.n_missing == 1


def test_point_columns_not_measured_are_skipped_by_default():
    pts = points_frame([{"vin_set_v": 48.0, "vout_v": 5.0, "ripple_pkpk_v": np.nan},
                        {"vin_set_v": 48.0, "vout_v": 5.0, "ripple_pkpk_v": 0.031},
                        {"vin_set_v": 48.0, "vout_v": 5.0, "ripple_pkpk_v": 0.044}])
    out = evaluate_limit(one_limit('name = "rip"\nquantity = "ripple_pkpk_v"\nmax = 0.05\n'), run_data(points=pts))
    assert out.passed is True and out.n_values == 2 and out.n_missing == 1
    assert out.margin == pytest.approx(0.05 - 0.044)
    strict = evaluate_limit(one_limit('name = "rip"\nquantity = "ripple_pkpk_v"\nmax = 0.05\nmissing = "fail"\n'),
                            run_data(points=pts))
    assert strict.passed is False
    pts_nan = points_frame([{"vin_set_v": 48.0, "ripple_pkpk_v": np.nan}])
    none = evaluate_limit(one_limit('name = "rip"\nquantity = "ripple_pkpk_v"\nmax = 0.05\n'), run_data(points=pts_nan))
    assert none.passed is None


def test_source_point_forces_the_point_column():
    pts = points_frame([{"efficiency": 0.70}])
    res = results_frame([("efficiency", 0.90, "", {"seq": 1})])
    by_default = evaluate_limit(one_limit('name = "e"\nquantity = "efficiency"\nmin = 0.8\n'), run_data(pts, res))
    forced = evaluate_limit(one_limit('name = "e"\nquantity = "efficiency"\nmin = 0.8\nsource = "point"\n'),
                            run_data(pts, res))
    assert by_default.source == "result" and by_default.passed is True
    assert forced.source == "point" and forced.passed is False


# ---------------------------------------------------------------- report and exit code
LIMITS_TEXT = """
[spec]
name = "FB-48S05"
[[limit]]
name = "efficiency at half load and above"
quantity = "efficiency"
min = 0.85
where.load_pct = { min = 50 }
[[limit]]
name = "efficiency at light load"
quantity = "efficiency"
min = 0.80
where.iout_set_a = 0.5
[[limit]]
name = "phase margin"
quantity = "phase_margin_deg"
min = 45
procedure = "loop_gain"
[[limit]]
name = "light-load efficiency target"
quantity = "efficiency"
min = 0.80
where.iout_set_a = 0.5
required = false
"""


def test_report_counts_skips_other_procedures_and_sets_exit_code():
    limits = parse_limits(LIMITS_TEXT)
    report = check_limits(limits, run_data(results=flyback_efficiency_results()))
    assert [o.limit.name for o in report.outcomes] == [
        "efficiency at half load and above", "efficiency at light load", "light-load efficiency target"]
    assert report.not_applicable == ("phase margin",)
    assert [o.status for o in report.outcomes] == [PASS, FAIL, FAIL]   # 0.781 < 0.80 at 0.5 A
    assert report.exit_code == EXIT_FAILED and report.passed is False
    assert report.count(FAIL) == 2


def _outcome(status: str, required: bool = True):
    spec = one_limit(f'name = "x"\nquantity = "q"\nmin = 0\nrequired = {"true" if required else "false"}\n')
    value = {PASS: 1.0, FAIL: -1.0}.get(status)
    res = results_frame([("q", value, "", {})]) if value is not None else EMPTY_RESULTS
    out = evaluate_limit(spec, run_data(results=res))
    assert out.status == status
    return out


@pytest.mark.parametrize(
    ("statuses", "run_status", "expected"),
    [
        ([(PASS, True)], "completed", EXIT_OK),
        ([(PASS, True), (FAIL, True)], "completed", EXIT_FAILED),
        ([(FAIL, True), (NOT_CHECKED, True)], "completed", EXIT_FAILED),      # a failure outranks
        ([(PASS, True), (NOT_CHECKED, True)], "completed", EXIT_NOT_CHECKED),
        ([(PASS, True)], "interrupted", EXIT_NOT_CHECKED),
        ([(FAIL, True)], "tripped", EXIT_FAILED),
        ([(PASS, True), (FAIL, False), (NOT_CHECKED, False)], "completed", EXIT_OK),  # advisory never counts
        ([], "completed", EXIT_NOT_CHECKED),                                   # nothing applied
        ([(PASS, False)], "completed", EXIT_OK),                               # only advisory limits
    ],
)
def test_exit_code_rule(statuses, run_status, expected):
    outcomes = [_outcome(s, r) for s, r in statuses]
    assert exit_code_for(outcomes, run_status) == expected


# ---------------------------------------------------------------- property: reference computation
@settings(max_examples=60, deadline=None)
@given(
    values=st.lists(st.floats(-1e3, 1e3, allow_nan=False), min_size=1, max_size=12),
    lo=st.one_of(st.none(), st.floats(-1e3, 1e3, allow_nan=False)),
    width=st.floats(0, 500, allow_nan=False),
    use_max=st.booleans(),
)
def test_margin_and_verdict_match_a_direct_numpy_computation(values, lo, width, use_max):
    hi = (lo if lo is not None else 0.0) + width if use_max or lo is None else None
    body = 'name = "q"\nquantity = "q"\n' + (f"min = {lo!r}\n" if lo is not None else "") + (
        f"max = {hi!r}\n" if hi is not None else "")
    res = results_frame([("q", v, "", {"seq": k + 1}) for k, v in enumerate(values)])
    out = evaluate_limit(one_limit(body), run_data(results=res))
    v = np.asarray(values)
    margins = np.minimum(v - lo if lo is not None else np.inf, hi - v if hi is not None else np.inf)
    k = int(np.argmin(margins))   # numpy.argmin: first occurrence of the minimum
    assert out.margin == pytest.approx(margins[k])
    assert out.worst_value == values[k]
    assert out.passed is bool(np.all(margins >= 0))
    assert len(out.failing) == int(np.sum(margins < 0))
