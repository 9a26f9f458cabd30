"""Setpoint verification and the slow-drift criterion, and how a point carries both into the store."""

from __future__ import annotations

import math

import numpy as np
import pytest

from benchctl.bench import Bench
from benchctl.interlock import Interlock
from benchctl.readings import Readings
from benchctl.settle import SettleResult
from benchctl.stability import regression_change, wait_stable
from benchctl.station import StationLimits
from benchctl.verification import setpoint_tolerance, verify_setpoints


def test_tolerance_is_percent_of_setting_plus_offset():
    assert setpoint_tolerance(2.0, 0.005, 0.001) == pytest.approx(0.011)
    assert setpoint_tolerance(-2.0, 0.005, 0.001) == pytest.approx(0.011)
    with pytest.raises(ValueError):
        setpoint_tolerance(1.0, -0.1, 0.0)


def test_verification_names_every_failed_check():
    v = verify_setpoints({"iout_a": (0.5, 0.42, 0.0035), "vsrc_v": (48.0, 48.01, 0.25)})
    assert not v.verified
    assert "iout_a measured 0.42, setpoint 0.5" in v.reason and "vsrc_v" not in v.reason
    assert v.as_dict()["iout_a"] == {"setpoint": 0.5, "measured": 0.42, "tol": 0.0035}
    assert verify_setpoints({"iout_a": (0.5, 0.5021, 0.0035)}).verified
    assert not verify_setpoints({"iout_a": (0.5, math.nan, 0.0035)}).verified


def test_regression_change_matches_scipy_linregress():
    # Reference: scipy.stats.linregress (ordinary least-squares slope).
    from scipy.stats import linregress

    rng = np.random.default_rng(1)
    t = np.linspace(0.0, 30.0, 61)
    x = 20.0 + 0.01 * t + rng.normal(0.0, 0.02, t.size)
    assert regression_change(t, x) == pytest.approx(abs(linregress(t, x).slope) * 30.0, rel=1e-9)


class Clock:
    def __init__(self):
        self.t = 0.0

    def __call__(self):
        return self.t

    def sleep(self, dt):
        self.t += dt


def test_thermal_creep_is_waited_out_and_a_steady_ramp_is_not():
    # Losses creeping as parts warm: P(t) = 20 W + 0.2 W·(1 − e^(−t/60 s)), read once a second.
    clock = Clock()
    creep = lambda: 20.0 + 0.2 * (1.0 - math.exp(-clock.t / 60.0))  # noqa: E731
    r = wait_stable(creep, window_s=30.0, max_change_rel=5e-4, interval_s=1.0, timeout_s=1000.0,
                    clock=clock, sleep=clock.sleep)
    assert r.stable and r.change <= r.limit == pytest.approx(5e-4 * r.mean)
    # When it says stable, the change still to come is small: 0.2·e^(−t/60) against the limit per window.
    remaining = 0.2 * math.exp(-clock.t / 60.0)
    assert remaining * (1.0 - math.exp(-30.0 / 60.0)) <= r.limit * 1.2
    clock2 = Clock()
    ramp = lambda: 20.0 + 0.001 * clock2.t  # noqa: E731 - 1 mW/s forever: 30 mW per window > 10 mW
    r2 = wait_stable(ramp, window_s=30.0, max_change_rel=5e-4, interval_s=1.0, timeout_s=200.0,
                     clock=clock2, sleep=clock2.sleep)
    assert not r2.stable and "still drifting" in r2.reason and r2.change == pytest.approx(0.03, rel=0.05)


def _bench(recorded):
    limits = StationLimits(80.0, 3.0, 6.0, 6.0, 35.0)

    def recorder(values, units, *, tag, settled, settle_time_s, settle_info=None):
        recorded.append({"values": values, "units": units, "settled": settled, "settle_info": settle_info})
        return len(recorded)

    return Bench(instruments={}, interlock=Interlock(limits), recorder=recorder)


def test_record_stores_means_sds_and_an_unverified_point_as_not_settled():
    recorded = []
    bench = _bench(recorded)
    readings = Readings({"pin_w": (3.0, 3.2), "iout_a": (0.42, 0.42)}, {"pin_w": (0, 1), "iout_a": (0, 1)}, 0, 1)
    settle = SettleResult(True, 0.1, 0.1, 3.1, 1e-3, 10, method="exponential_fit", quantity="pin_w")
    check = bench.verify({"iout_a": (0.5, readings.mean("iout_a"), bench.setpoint_tolerance(0.5, 0.005, 0.001))})
    bench.record({"iout_set_a": 0.5}, readings=readings, settle=settle.with_verification(
        check.verified, check.as_dict(), check.reason))
    rec = recorded[0]
    assert rec["values"]["pin_w"] == pytest.approx(3.1) and rec["values"]["pin_sd_w"] == pytest.approx(math.sqrt(0.02))
    assert rec["values"]["n_readings"] == 2.0 and rec["units"]["pin_sd_w"] == "W"
    assert rec["settled"] is False  # settled but not verified
    info = rec["settle_info"]
    assert info["verified"] is False and "iout_a measured 0.42" in info["reason"]
    assert info["verification"]["iout_a"]["setpoint"] == 0.5


def test_disabled_settling_is_not_settled():
    recorded = []
    bench = _bench(recorded)
    bench.settle_enabled = False
    r = bench.settle(lambda: 1.5, rel_tol=1e-3, abs_tol=1e-3, window=4, window_s=0.0, interval_s=0.0, timeout_s=1.0)
    assert not r.settled and r.method == "disabled" and "disabled" in r.reason


STATION = """
[station]
name = "t"
{extra}
[limits]
source_voltage_max_v = 50.0
source_current_max_a = 2.0
dut_output_voltage_max_v = 6.0
load_current_max_a = 5.0
load_power_max_w = 30.0
[instruments.source]
driver = "dc_source"
resource = "TCPIP::127.0.0.1::5025::SOCKET"
"""


def test_station_gives_the_dut_time_constant_or_is_refused_with_the_key():
    from benchctl.errors import StationFileError
    from benchctl.station import parse_station

    assert parse_station(STATION.format(extra="")).dut_time_constant_s is None
    assert parse_station(STATION.format(extra="dut_time_constant_s = 0.02")).dut_time_constant_s == 0.02
    for bad in ("-1", "0", '"fast"', "1e9"):
        with pytest.raises(StationFileError, match="station.dut_time_constant_s"):
            parse_station(STATION.format(extra=f"dut_time_constant_s = {bad}"))
