"""Property: no setpoint beyond a station limit ever reaches an instrument.

Random station limits, random efficiency-map parameters and random sequences of calls
through the guarded drivers run against one simulated bench; afterwards every
VOLT / CURR / RES setpoint the source and load received (their own audit logs) is
parsed and compared with the limits. The interlock's contract (interlock.py): a setpoint
outside the limits is refused before anything is sent.
"""

from __future__ import annotations

import re

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from benchctl.errors import BenchctlError
from benchctl.guarded import guard
from benchctl.interlock import Interlock
from benchctl.procedure import load_procedure
from benchctl.runner import execute
from benchctl.station import parse_station
from benchctl.simulated_instruments.bench import SimulatedBench

SETPOINT = re.compile(r"^(VOLT|CURR|RES|VOLT:PROT|CURR:PROT|POW:PROT)\s+([-+0-9.eE]+)$", re.IGNORECASE)
REL = 1e-5  # setpoints are sent with 6 significant digits ({value:.6g})

limits_strategy = st.fixed_dictionaries({
    "source_voltage_max_v": st.floats(20.0, 80.0),
    "source_current_max_a": st.floats(0.3, 3.0),
    "dut_output_voltage_max_v": st.floats(5.5, 8.0),
    "load_current_max_a": st.floats(0.5, 6.0),
    "load_power_max_w": st.floats(3.0, 40.0),
})


@pytest.fixture(scope="module")
def bench():
    with SimulatedBench("flyback-48v-5v", time_scale=50.0) as b:
        yield b


@pytest.fixture(scope="module")
def store(tmp_path_factory):
    from benchctl.store import Store

    with Store.open(str(tmp_path_factory.mktemp("prop") / "prop.db")) as s:
        yield s


def _station(bench, limits):
    text = bench.station_toml(watch_period_s=0.05)
    for key, value in limits.items():
        text = re.sub(rf"^{key} = .*$", f"{key} = {value!r}", text, flags=re.MULTILINE)
    hazardous = max(limits["source_voltage_max_v"], limits["dut_output_voltage_max_v"]) > 60.0
    text = re.sub(r"^hazardous_voltage_acknowledged = .*$",
                  f"hazardous_voltage_acknowledged = {'true' if hazardous else 'false'}", text, flags=re.MULTILINE)
    return parse_station(text)


def _setpoints(bench, role):
    out = []
    for text in bench.instruments[role].audit.commands():
        m = SETPOINT.match(text.strip())
        if m:
            out.append((m.group(1).upper(), float(m.group(2))))
    return out


def _assert_within(bench, lim):
    v_out = lim["dut_output_voltage_max_v"]
    for header, value in _setpoints(bench, "source"):
        assert value >= 0
        if header in ("VOLT", "VOLT:PROT"):
            assert value <= lim["source_voltage_max_v"] * (1 + REL), (header, value, lim)
        elif header == "CURR":
            assert value <= lim["source_current_max_a"] * (1 + REL), (header, value, lim)
    for header, value in _setpoints(bench, "load"):
        if header in ("CURR", "CURR:PROT"):
            assert value <= lim["load_current_max_a"] * (1 + REL), (header, value, lim)
        if header == "CURR":  # worst-case power at the highest output voltage allowed
            assert value * v_out <= lim["load_power_max_w"] * (1 + 2 * REL), (header, value, lim)
        if header == "POW:PROT":
            assert value <= lim["load_power_max_w"] * (1 + REL)
        if header == "RES":
            assert value > 0 and v_out / value <= lim["load_current_max_a"] * (1 + 2 * REL)
            assert v_out * v_out / value <= lim["load_power_max_w"] * (1 + 2 * REL)


def _clear_audits(bench):
    for inst in bench.instruments.values():
        inst.audit.clear()


@settings(max_examples=25, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(
    lim=limits_strategy,
    vin=st.lists(st.floats(30.0, 95.0), min_size=1, max_size=2),
    load_pct=st.lists(st.floats(0.0, 150.0), min_size=1, max_size=3),
    rated=st.floats(0.5, 6.0),
    source_limit=st.one_of(st.none(), st.floats(0.1, 4.0)),
)
def test_efficiency_map_never_sends_a_setpoint_beyond_the_limits(bench, store, lim, vin, load_pct, rated,
                                                                  source_limit):
    emap = load_procedure("efficiency_map")
    station = _station(bench, lim)
    params = emap.resolve_parameters(values={
        "vin_v": vin, "load_pct": load_pct, "iout_rated_a": rated, "vout_nom_v": 5.0,
        "source_current_limit_a": source_limit, "settle_timeout_s": 0.2,
    })
    _clear_audits(bench)
    outcome = execute(emap, params, station, store, settle_enabled=False)
    assert outcome.status in ("completed", "failed", "tripped"), outcome.message
    assert _setpoints(bench, "source") and _setpoints(bench, "load")  # protection is always programmed: not vacuous
    _assert_within(bench, lim)
    assert bench.instruments["source"].output_on is False and bench.instruments["load"].input_on is False


OPS = ("set_voltage", "set_current_limit", "set_output", "load_current", "load_resistance", "set_input",
       "read_out", "read_in")


@settings(max_examples=25, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(lim=limits_strategy,
       calls=st.lists(st.tuples(st.sampled_from(OPS), st.one_of(st.floats(-5.0, 120.0), st.just(float("nan")))), min_size=1, max_size=12))
def test_random_guarded_calls_never_send_a_setpoint_beyond_the_limits(bench, lim, calls):
    from benchctl.drivers.dc_source import DcSource
    from benchctl.drivers.electronic_load import ElectronicLoad
    from benchctl.drivers.power_meter import PowerMeter
    from benchctl.station import StationLimits

    _clear_audits(bench)
    interlock = Interlock(StationLimits(**lim), watch_period_s=0.05)
    src = DcSource(bench.resources["source"], name="source").open()
    load = ElectronicLoad(bench.resources["load"], name="load").open()
    meter = PowerMeter(bench.resources["output_meter"], name="output_meter").open()
    interlock.attach_outputs(src, load)
    gs, gl, gm = guard(src, interlock), guard(load, interlock), guard(meter, interlock)
    try:
        src.reset()
        load.reset()
        for op, x in calls:
            try:
                if op == "set_voltage":
                    gs.set_voltage(x)
                elif op == "set_current_limit":
                    gs.set_current_limit(x / 30.0)
                elif op == "set_output":
                    gs.set_output(x > 50)
                elif op == "load_current":
                    gl.set_current(x / 15.0)
                elif op == "load_resistance":
                    gl.set_resistance(x / 10.0)
                elif op == "set_input":
                    gl.set_input(x > 50)
                elif op == "read_out":
                    gm.measure_voltage()
                else:
                    gs.measure_current()
            except BenchctlError:
                pass  # refusals, trips and instrument range errors are all allowed; what was sent is checked
    finally:
        interlock.shutdown()
        for d in (src, load, meter):
            d.close()
    _assert_within(bench, lim)
