"""Decision rules and data quality in limits: guarded acceptance at, inside and outside U of a
bound, suspect values from unsettled or flagged data, quantities that do not exist.

Rules: ILAC-G8:09/2019 4.2.1 (simple acceptance), 4.2.2/4.2.3 (guarded acceptance with a
guard band w = U; the clause numbers from memory). The numbers are exact binary fractions
(27/32, 1/256 ...) so that "exactly at U" is exact in floating point; every margin is worked
by hand in the comments (value - min for a lower bound, max - value for an upper one).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from benchctl.cli import EXIT_FAILED, EXIT_NOT_CHECKED, EXIT_OK
from benchctl.errors import LimitsFileError
from benchctl.junit import junit_element
from benchctl.limits import (
    BORDERLINE,
    FAIL,
    NOT_CHECKED,
    PASS,
    SUSPECT,
    RunContext,
    RunData,
    check_limits,
    evaluate_limit,
    parse_limits,
)

MIN = 27 / 32          # 0.84375, an efficiency limit
U = 1 / 256            # 0.00390625, the expanded uncertainty (k = 2) of every value below


def results(rows: list[dict]) -> pd.DataFrame:
    """A results frame as Store.results returns it (with the uncertainty columns of schema 3)."""
    return pd.DataFrame({
        "result_id": pd.Series(range(1, len(rows) + 1), dtype="int64"),
        "name": pd.Series([r.get("name", "efficiency") for r in rows], dtype="str"),
        "value": pd.Series([np.nan if r["value"] is None else r["value"] for r in rows], dtype="float64"),
        "unit": pd.Series([r.get("unit", "") for r in rows], dtype="str"),
        "details": pd.Series([r.get("details") for r in rows], dtype="object"),
        "scope": pd.Series([r.get("scope", {"seq": k + 1}) for k, r in enumerate(rows)], dtype="object"),
        "uncertainty": pd.Series([np.nan if r.get("U") is None else r["U"] / 2 for r in rows], dtype="float64"),
        "expanded_uncertainty": pd.Series([np.nan if r.get("U") is None else r["U"] for r in rows],
                                          dtype="float64"),
    })


def points(n: int, unsettled: dict[int, dict] | None = None) -> pd.DataFrame:
    """n settled points (seq 1..n); ``unsettled`` maps seq -> settle_info of a point that did not settle."""
    unsettled = unsettled or {}
    return pd.DataFrame({
        "seq": np.arange(1, n + 1),
        "tag": ["ascending"] * n,
        "settled": [k not in unsettled for k in range(1, n + 1)],
        "settle_info": pd.Series([unsettled.get(k, {"verified": True, "reason": ""}) for k in range(1, n + 1)],
                                 dtype="object"),
        "settle_reason": [unsettled.get(k, {}).get("reason", "") for k in range(1, n + 1)],
        "vin_set_v": [48.0] * n,
        "iout_set_a": [2.5] * n,
    })


def data(res: pd.DataFrame, pts: pd.DataFrame | None = None, procedure: str = "efficiency_map") -> RunData:
    ctx = RunContext(run_id=3, procedure=procedure, status="completed", parameters={"iout_rated_a": 5.0})
    return RunData(context=ctx, points=pts if pts is not None else points(len(res)), results=res)


def limit(decision: str | None, *, lo: float | None = MIN, hi: float | None = None, quantity: str = "efficiency"):
    body = f'name = "l"\nquantity = "{quantity}"\n'
    body += f"min = {lo!r}\n" if lo is not None else ""
    body += f"max = {hi!r}\n" if hi is not None else ""
    body += f'decision = "{decision}"\n' if decision else ""
    return parse_limits("[[limit]]\n" + body).limits[0]


@pytest.mark.parametrize("value, guarded, simple", [
    (MIN + 2 * U, PASS, PASS),        # margin 2U >= U: the whole interval inside
    (MIN + U, PASS, PASS),            # margin exactly U: the interval touches the bound from inside (inclusive)
    (MIN + U / 2, BORDERLINE, PASS),  # inside, but within U: not proven inside
    (MIN, BORDERLINE, PASS),          # on the bound
    (MIN - U / 2, BORDERLINE, FAIL),  # outside, but within U: not proven outside
    (MIN - U, BORDERLINE, FAIL),      # margin exactly -U: the interval still reaches the bound
    (MIN - 2 * U, FAIL, FAIL),        # margin -2U < -U: the whole interval outside
])
def test_guarded_acceptance_at_inside_and_outside_u(value, guarded, simple):
    res = results([{"value": value, "U": U}])
    g = evaluate_limit(limit("guarded"), data(res))
    s = evaluate_limit(limit(None), data(res))
    assert g.status == guarded, g.reason
    assert s.status == simple, s.reason  # ILAC-G8 4.2.1: simple acceptance looks at the value alone
    assert g.uncertainty == U
    assert g.passed is {PASS: True, FAIL: False, BORDERLINE: None}[guarded]


def test_guarded_upper_bound_mirrors_the_lower():
    # max = 27/32: the margin is max - value; value = max - U is exactly U inside.
    assert evaluate_limit(limit("guarded", lo=None, hi=MIN), data(results([{"value": MIN - U, "U": U}]))).status == PASS
    assert evaluate_limit(limit("guarded", lo=None, hi=MIN),
                          data(results([{"value": MIN + U / 4, "U": U}]))).status == BORDERLINE


def test_borderline_reason_and_exit_code_and_junit():
    res = results([{"value": MIN + 2 * U, "U": U}, {"value": MIN + U / 2, "U": U}])
    lim = parse_limits(f'[[limit]]\nname = "eff"\nquantity = "efficiency"\nmin = {MIN!r}\ndecision = "guarded"\n')
    report = check_limits(lim, data(res))
    (o,) = report.outcomes
    assert o.status == BORDERLINE and "ILAC-G8:09/2019 4.2.3" in o.reason
    assert [d.status for d in o.doubtful] == [BORDERLINE] and o.doubtful[0].scope == {"seq": 2}
    # Not proven inside (0 would claim conformance) nor outside (1 would claim a violation): 4.
    assert report.exit_code == EXIT_NOT_CHECKED and "NOT DECIDED" in report.summary and "1 borderline" in report.summary
    case = junit_element(report).find("testsuite/testcase")
    assert case.find("error").get("type") == "limit_borderline" and case.find("failure") is None


def test_a_failure_outranks_a_borderline():
    res = results([{"value": MIN + U / 2, "U": U}, {"value": MIN - 3 * U, "U": U}])
    o = evaluate_limit(limit("guarded"), data(res))
    assert o.status == FAIL and o.worst_value == MIN - 3 * U
    assert o.margin == pytest.approx(-3 * U) and "outside the limit by more than their U" in o.reason


def test_guarded_without_uncertainty_is_not_checked_with_the_reason():
    o = evaluate_limit(limit("guarded"), data(results([{"value": MIN + 0.1, "U": None}])))
    assert o.status == NOT_CHECKED and "no stored uncertainty" in o.reason and "station file" in o.reason
    # The simple rule does not need one.
    assert evaluate_limit(limit("simple"), data(results([{"value": MIN + 0.1, "U": None}]))).status == PASS


def test_decision_key_is_validated():
    with pytest.raises(LimitsFileError, match=r"limit\[1\]\.decision: 'strict' must be one of 'simple', 'guarded'"):
        parse_limits('[[limit]]\nname = "x"\nquantity = "efficiency"\nmin = 0.8\ndecision = "strict"\n')


# ---------------------------------------------------------------- data quality
def test_a_value_from_an_unsettled_point_is_suspect_not_pass():
    pts = points(3, unsettled={2: {"verified": True, "reason": "no convergence within 5 s"}})
    res = results([{"value": 0.9}, {"value": 0.9}, {"value": 0.9}])
    o = evaluate_limit(limit(None), data(res, pts))
    assert o.status == SUSPECT and o.passed is None
    assert "unsettled" in o.reason and "no convergence" in o.reason
    assert [d.scope["seq"] for d in o.doubtful] == [2]
    report = check_limits(parse_limits('[[limit]]\nname = "e"\nquantity = "efficiency"\nmin = 0.8\n'), data(res, pts))
    assert report.exit_code == EXIT_NOT_CHECKED
    assert junit_element(report).find("testsuite/testcase/error").get("type") == "limit_suspect"


def test_an_unverified_point_column_is_suspect():
    pts = points(2, unsettled={1: {"verified": False, "reason": "load current 0.23 A against 0.5 A set"}})
    pts["iout_a"] = [0.23, 2.5]
    o = evaluate_limit(limit(None, lo=0.0, hi=6.0, quantity="iout_a"), data(results([]), pts))
    assert o.status == SUSPECT and "unverified" in o.reason and "0.23 A" in o.reason


def test_a_flagged_value_outside_still_fails():
    pts = points(1, unsettled={1: {"verified": True, "reason": "timeout"}})
    o = evaluate_limit(limit(None), data(results([{"value": 0.5}]), pts))
    assert o.status == FAIL and o.passed is False


def test_bounds_a_lower_bound_above_the_max_is_a_definite_fail():
    clipped = {"flags": ["clipped", "lower_bound"], "flag_reasons": "trace at the top of the screen"}
    lim = limit(None, lo=None, hi=150.0, quantity="drain_peak_v")
    # True value >= 160 V > 150 V: fail, whatever the clipping hid.
    above = results([{"name": "drain_peak_v", "value": 160.0, "unit": "V", "details": clipped}])
    assert evaluate_limit(lim, data(above)).status == FAIL
    # True value >= 140 V: may be above 150 V: suspect, never pass.
    below = results([{"name": "drain_peak_v", "value": 140.0, "unit": "V", "details": clipped}])
    o = evaluate_limit(lim, data(below))
    assert o.status == SUSPECT and "only a bound" in o.reason


def test_bounds_a_lower_bound_over_a_min_proves_the_pass_unless_something_else_is_flagged():
    # True value >= 12 ms against a minimum of 10 ms and no maximum: it passes, whatever the record hid.
    bound = {"flags": ["lower_bound"], "flag_reasons": "the record ended with the output in band"}
    lim = limit(None, lo=0.010, hi=None, quantity="hold_up_s")
    ok = evaluate_limit(lim, data(results([{"name": "hold_up_s", "value": 0.012, "unit": "s", "details": bound}])))
    assert ok.status == PASS
    short = evaluate_limit(lim, data(results([{"name": "hold_up_s", "value": 0.008, "unit": "s", "details": bound}])))
    assert short.status == SUSPECT          # >= 8 ms may still be >= 10 ms: not decided
    both = limit(None, lo=0.010, hi=0.050, quantity="hold_up_s")
    assert evaluate_limit(both, data(results([{"name": "hold_up_s", "value": 0.012, "unit": "s",
                                               "details": bound}]))).status == SUSPECT   # may exceed the max
    unsettled = {"flags": ["unsettled", "lower_bound"], "flag_reasons": "timeout"}
    assert evaluate_limit(lim, data(results([{"name": "hold_up_s", "value": 0.012, "unit": "s",
                                              "details": unsettled}]))).status == SUSPECT


def test_a_gain_margin_that_does_not_exist_is_unbounded_and_meets_a_minimum():
    not_exist = {"found": False, "reason": "no phase crossover of -180 deg in the measured band",
                 "flags": ["not_exist"], "flag_reasons": "no phase crossover", "unbounded": "above"}
    res = results([
        {"name": "gain_margin_db", "value": 18.0, "unit": "dB", "scope": {"vin_set_v": 36.0, "iout_set_a": 1.0}},
        {"name": "gain_margin_db", "value": None, "unit": "dB", "details": not_exist,
         "scope": {"vin_set_v": 75.0, "iout_set_a": 1.0}},
    ])
    lim = parse_limits('[[limit]]\nname = "gm"\nquantity = "gain_margin_db"\nmin = 10.0\n')
    report = check_limits(lim, data(res, points(0), procedure="loop_gain"))
    (o,) = report.outcomes
    assert o.status == PASS and report.exit_code == EXIT_OK, o.reason
    assert o.worst_value == 18.0 and o.n_not_exist == 1 and "unbounded" in o.reason
    # Not measured is different: a gain margin stored without a value and without the flag fails the limit.
    res2 = results([{"name": "gain_margin_db", "value": None, "unit": "dB", "details": {"reason": "sweep failed"},
                     "scope": {"vin_set_v": 75.0, "iout_set_a": 1.0}}])
    assert check_limits(lim, data(res2, points(0), procedure="loop_gain")).exit_code == EXIT_FAILED
    # Unbounded above fails a maximum.
    lim_max = parse_limits('[[limit]]\nname = "gm"\nquantity = "gain_margin_db"\nmax = 40.0\n')
    assert check_limits(lim_max, data(res, points(0), procedure="loop_gain")).outcomes[0].status == FAIL


def test_not_exist_without_a_direction_is_left_out_and_counted():
    flagged = {"flags": ["not_exist"], "flag_reasons": "no such crossing"}
    res = results([{"value": 0.9}, {"value": None, "details": flagged}])
    o = evaluate_limit(limit(None), data(res))
    assert o.status == PASS and o.n_not_exist == 1 and "do not exist" in o.reason
    only = evaluate_limit(limit(None), data(results([{"value": None, "details": flagged}])))
    assert only.status == NOT_CHECKED and "does not exist" in only.reason
