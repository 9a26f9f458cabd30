"""Efficiency, regulation and the four-point average against published definitions."""

import math

import numpy as np
import pytest

from benchctl.analysis.average_efficiency import (
    four_point_average,
    level_vi_average_efficiency_limit,
    no_load_power_limit_w,
    supply_class,
)
from benchctl.analysis.efficiency import efficiency, loss_w, peak_efficiency
from benchctl.analysis.regulation import (
    line_regulation_by_load,
    line_regulation_pct,
    load_regulation_by_line,
    load_regulation_pct,
    output_deviation_pct,
)


def test_efficiency_is_pout_over_pin():
    # η = Σ Vo·Io / Pin (common practice definition)
    assert efficiency([20.0], [25.0])[0] == pytest.approx(0.8)
    assert loss_w([20.0], [25.0])[0] == pytest.approx(5.0)
    assert math.isnan(efficiency([1.0], [0.0])[0])


def test_peak_efficiency_location():
    peak = peak_efficiency([48, 48, 48], [1, 2, 3], [0.8, 0.9, 0.85])
    assert peak is not None and peak.iout_a == 2 and peak.efficiency == 0.9
    assert peak_efficiency([], [], []) is None


def test_load_regulation_conventions_reference_values():
    # definitions: common practice / IEC-61204 style (from memory):
    # 12.06 V no load, 11.94 V full load -> 1.005 % textbook (÷ V_FL), 1.000 % rated (÷ 12 V)
    assert load_regulation_pct(12.06, 11.94, "textbook") == pytest.approx(1.005, abs=5e-4)
    assert load_regulation_pct(12.06, 11.94, "rated", 12.0) == pytest.approx(1.000, abs=5e-4)
    with pytest.raises(ValueError):
        load_regulation_pct(12.06, 11.94, "rated")


def test_line_regulation_definition():
    # (Vo at Vin,max − Vo at Vin,min) / Vo,nom × 100 (common practice)
    assert line_regulation_pct(4.998, 5.003, 5.0) == pytest.approx(0.1)


def test_regulation_grouping_merges_passes():
    vin = [36, 36, 75, 75, 36]
    iout = [1, 5, 1, 5, 1]
    vout = [5.010, 4.990, 5.012, 4.992, 5.012]
    lines = {r.iout_a: r for r in line_regulation_by_load(vin, iout, vout, 5.0)}
    # load 1 A: mean at 36 V of 5.010 and 5.012 = 5.011; at 75 V 5.012 -> 0.02 %
    assert lines[1.0].line_regulation_pct == pytest.approx((5.012 - 5.011) / 5.0 * 100)
    loads = {r.vin_v: r for r in load_regulation_by_line(vin, iout, vout, convention="textbook")}
    assert loads[75.0].load_regulation_pct == pytest.approx((5.012 - 4.992) / 4.992 * 100)
    assert output_deviation_pct([5.05], 5.0)[0] == pytest.approx(1.0)


def test_level_vi_limits_worked_values():
    # [calc] from the CFR-430.32W formulas (from memory):
    # basic 10 W -> 0.8195; 24 W -> 0.8620; 60 W -> 0.880; low-voltage 5 W -> 0.7362.
    # Re-derived here from the formula as well as compared with the tabulated values.
    assert level_vi_average_efficiency_limit(10, "basic-voltage") == pytest.approx(
        0.071 * math.log(10) - 0.0014 * 10 + 0.67)
    assert level_vi_average_efficiency_limit(10, "basic-voltage") == pytest.approx(0.8195, abs=1e-4)
    assert level_vi_average_efficiency_limit(24, "basic-voltage") == pytest.approx(0.8620, abs=1e-4)
    assert level_vi_average_efficiency_limit(60, "basic-voltage") == pytest.approx(0.880)
    assert level_vi_average_efficiency_limit(5, "low-voltage") == pytest.approx(0.7362, abs=1e-4)
    assert level_vi_average_efficiency_limit(0.5, "basic-voltage") == pytest.approx(0.41)
    assert no_load_power_limit_w(25) == 0.100 and no_load_power_limit_w(60) == 0.210


def test_supply_class_boundary():
    # Level VI: low-voltage when nameplate output < 6 V and >= 550 mA (from memory)
    assert supply_class(5.0, 5.0) == "low-voltage"
    assert supply_class(5.0, 0.5) == "basic-voltage"
    assert supply_class(12.0, 2.0) == "basic-voltage"


def test_four_point_average_and_missing_point():
    iout = np.array([0.5, 1.25, 2.5, 3.75, 5.0])
    eff = np.array([0.70, 0.84, 0.88, 0.87, 0.85])
    r = four_point_average(48.0, iout, eff, iout_rated_a=5.0, vout_nom_v=5.0)
    # mean of the 25/50/75/100 % efficiencies (10 CFR 430 App. Z, from memory)
    assert r.found and r.average_efficiency == pytest.approx((0.84 + 0.88 + 0.87 + 0.85) / 4)
    assert r.supply_class == "low-voltage"
    assert r.limit_efficiency == pytest.approx(0.0834 * math.log(25) - 0.0014 * 25 + 0.609)
    assert r.meets_indicative_limit
    missing = four_point_average(48.0, iout[:3], eff[:3], iout_rated_a=5.0, vout_nom_v=5.0)
    assert not missing.found and "75%" in missing.reason and math.isnan(missing.average_efficiency)


def test_level_vi_above_250_w_has_its_own_row():
    # 10 CFR 430.32(w)(1)(ii), Level VI single-voltage table, Po > 250 W (from memory): average
    # efficiency >= 0.875 and no-load input <= 0.500 W for both classes; (EU) 2019/1782 ends at 250 W
    assert level_vi_average_efficiency_limit(250.0, "basic-voltage") == pytest.approx(0.880)
    assert level_vi_average_efficiency_limit(250.0, "low-voltage") == pytest.approx(0.870)
    assert level_vi_average_efficiency_limit(250.1, "basic-voltage") == pytest.approx(0.875)
    assert level_vi_average_efficiency_limit(600.0, "low-voltage") == pytest.approx(0.875)
    assert no_load_power_limit_w(250.0) == 0.210 and no_load_power_limit_w(300.0) == 0.500
    r = four_point_average(48.0, [2.5, 5.0, 7.5, 10.0], [0.90, 0.91, 0.90, 0.89], iout_rated_a=10.0, vout_nom_v=48.0)
    assert r.pout_rated_w == 480.0 and r.limit_efficiency == pytest.approx(0.875) and r.meets_indicative_limit
    assert "250 W" in r.note and "US" in r.note
    for bad in (0.0, -5.0, float("nan"), float("inf")):
        with pytest.raises(ValueError, match="positive"):
            level_vi_average_efficiency_limit(bad, "basic-voltage")
        with pytest.raises(ValueError, match="positive"):
            no_load_power_limit_w(bad)
    with pytest.raises(ValueError, match="supply class"):
        level_vi_average_efficiency_limit(500.0, "high-voltage")  # type: ignore[arg-type]
