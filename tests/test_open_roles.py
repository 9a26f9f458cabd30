"""Open roles: a station names any role and gives its kind; procedures declare roles by kind.

* Station files: a role of any name, its kind from ``kind`` or its driver; a classic name
  implies its kind; every mistake is reported with its key before anything is opened.
* Procedures: ``ROLES`` of names and ``Role(name, kind, optional=...)``.
* Two electronic loads on one converter output of the simulated bench: the model draws
  the sum of their currents (Kirchhoff's current law at the output node), each load reads
  its own share; a run through a procedure with a second load ends with every source off
  before every load (audit logs), and the interlock watch covers the second load.
"""

from __future__ import annotations

import textwrap
import time

import pytest

from benchctl.errors import ProcedureError, StationFileError
from benchctl.interlock import Interlock
from benchctl.procedure import Role, declared_roles, load_procedure
from benchctl.runner import execute
from benchctl.station import StationLimits, parse_station
from benchctl.simulated_instruments.bench import SimulatedBench
from benchctl.simulated_instruments.faults import apply_fault_specs

HEAD = """
[station]
name = "open-roles"
[limits]
source_voltage_max_v = 60.0
source_current_max_a = 3.0
dut_output_voltage_max_v = 6.0
load_current_max_a = 6.0
load_power_max_w = 35.0
"""


def _inst(role: str, driver: str, port: int, extra: str = "") -> str:
    return f'\n[instruments.{role}]\ndriver = "{driver}"\nresource = "TCPIP::127.0.0.1::{port}::SOCKET"\n{extra}'


def _problems(text: str) -> list[str]:
    with pytest.raises(StationFileError) as info:
        parse_station(text)
    return list(info.value.problems) if getattr(info.value, "problems", None) else [str(info.value)]


# -- station files ---------------------------------------------------------------------


def test_any_role_name_with_its_kind_from_the_driver_or_the_kind_key():
    station = parse_station(HEAD + _inst("source", "dc_source", 5025) + _inst("load", "electronic_load", 5026)
                            + _inst("load2", "electronic_load", 5027)
                            + _inst("meter3", "power_meter", 5028, 'kind = "power_meter"\n'))
    assert station.kind_of("load2") == "electronic_load"  # from its driver
    assert station.kind_of("meter3") == "power_meter"  # from its kind key
    assert station.roles_of_kind("electronic_load") == ["load", "load2"]  # in the file's order
    station.require_roles(("source", Role("load2", "electronic_load"), Role("t", "power_meter", optional=True)))
    with pytest.raises(StationFileError, match="load2 is a electronic_load, but a power_meter is needed"):
        station.require_roles((Role("load2", "power_meter"),))
    with pytest.raises(StationFileError, match=r"no instrument for role\(s\) load3 \(electronic_load\)"):
        station.require_roles((Role("load3", "electronic_load"),), needed_by="procedure two_loads")


def test_role_mistakes_are_reported_with_their_keys():
    problems = "\n".join(_problems(
        HEAD + _inst("source", "dc_source", 5025, 'kind = "electronic_load"\n')  # a classic name implies its kind
        + _inst("temp_logger", "power_meter", 5026, 'kind = "dc_source"\n')  # kind key against the driver's kind
        + _inst("heater", "dc_source", 5027, 'kind = "kettle"\n')  # no such kind
        + _inst("load", "dc_source", 5028)))  # the classic role's implied kind against the driver
    assert "instruments.source.kind: role 'source' is a dc_source by its name" in problems
    assert "instruments.temp_logger.driver: 'power_meter' drives a power_meter, but instruments.temp_logger.kind " \
           "says 'dc_source'" in problems
    assert "instruments.heater.kind: 'kettle' is not a known kind" in problems
    assert "instruments.load.driver: 'dc_source' drives a dc_source, but role 'load' needs a electronic_load" \
        in problems


# -- procedure declarations -------------------------------------------------------------


def test_role_declarations():
    roles = declared_roles(("source", Role("load2", "electronic_load"), Role("t", "power_meter", optional=True)))
    assert roles == ("source", "load2", "t")  # a Role is its name
    assert [r.kind for r in roles] == ["dc_source", "electronic_load", "power_meter"]  # "source" implies its kind
    assert [r.optional for r in roles] == [False, False, True]
    with pytest.raises(ProcedureError, match="is a dc_source by its name"):
        Role("source", "electronic_load")
    with pytest.raises(ProcedureError, match="declared twice"):
        declared_roles(("load", Role("load")))
    with pytest.raises(ProcedureError, match="neither a role name nor Role"):
        declared_roles(("load", 3))


# -- the interlock with several outputs (no instruments: drivers that log) ---------------------


class _Output:
    def __init__(self, name: str, log: list[str], volts: float = 0.1) -> None:
        self.name, self.log, self.volts, self.is_open = name, log, volts, True

    def stop_retries(self) -> None:
        pass

    def output_off_now(self, *, deadline_s: float) -> str:
        self.log.append(f"{self.name} off")
        return "read back OFF"

    def query_float_now(self, key: str, *, deadline_s: float) -> float:
        self.log.append(f"{self.name} {key}")
        return self.volts


def test_shutdown_of_several_sources_and_loads_keeps_the_order():
    log: list[str] = []
    limits = StationLimits(60.0, 3.0, 6.0, 6.0, 35.0)
    interlock = Interlock(limits)
    interlock.attach_outputs({"source": _Output("source", log), "source2": _Output("source2", log)},
                             {"load": _Output("load", log), "load2": _Output("load2", log)})
    interlock.output_switched("load2", True)
    assert interlock.any_output_on
    steps = interlock.shutdown()
    # Every source off first, each load's output read back below a tenth of the DUT output limit, then the loads.
    offs = [entry for entry in log if entry.endswith(" off")]
    assert offs == ["source off", "source2 off", "load off", "load2 off"]
    assert log.index("source2 off") < log.index("load measure_voltage") < log.index("load off")
    assert log.index("load2 measure_voltage") < log.index("load off")  # both drained before either goes off
    assert any(s.startswith("output discharge at load2:") for s in steps), steps
    assert not interlock.any_output_on
    assert interlock.shutdown_budget_s == 4 * interlock.shutdown_deadline_s + Interlock.DISCHARGE_MAX_S


# -- two loads on the simulated bench --------------------------------------------------

PROCEDURE = '''
"""Two loads on one output (test procedure)."""
from benchctl.procedure import Parameter, Role

NAME = "two_loads"
ROLES = ("source", "load", Role("load2", "electronic_load"), Role("temp_logger", "power_meter", optional=True))
PARAMETERS = [Parameter("iout_a", "A", 0.4, minimum=0.0, maximum=5.0),
              Parameter("iout2_a", "A", 0.3, minimum=0.0, maximum=5.0),
              Parameter("hold_s", "s", 0.0, minimum=0.0, maximum=60.0)]


def plan(p):
    return [{"iout_a": p.iout_a, "iout2_a": p.iout2_a}]


def run(bench, p):
    load2 = bench.role("load2")
    load2.set_mode("CC")
    load2.set_current(p.iout2_a)
    bench.power_up(48.0, p.iout_a)
    load2.set_input(True)
    bench.wait(0.1)
    for _ in bench.sweep(plan(p)):
        bench.record({"iout_load_a": bench.load.measure_current(), "iout_load2_a": load2.measure_current(),
                      "loads_n": float(len(bench.roles_of_kind("electronic_load"))),
                      "temp_logger_n": float(bench.has_role("temp_logger"))})
    bench.wait(p.hold_s)
    bench.power_down()
'''


@pytest.fixture
def two_load_bench():
    bench = SimulatedBench("flyback-48v-5v", time_scale=50.0, extra_loads=1, reading_time_s=0.002).start()
    yield bench
    bench.stop()


@pytest.fixture
def two_loads(tmp_path):
    path = tmp_path / "two_loads.py"
    path.write_text(textwrap.dedent(PROCEDURE), encoding="utf-8")
    return load_procedure(str(path))


def _commands(bench, role: str, text: str) -> list:
    return [e for e in bench.instruments[role].audit.entries() if e.kind == "command" and e.text == text]


def test_the_model_draws_the_sum_of_both_loads_and_the_run_ends_source_first(two_load_bench, two_loads,
                                                                             benchctl_store):
    bench = two_load_bench
    station = parse_station(bench.station_toml())
    assert "load2" in station.instruments and station.kind_of("load2") == "electronic_load"
    params = two_loads.resolve_parameters(values={"iout_a": 0.4, "iout2_a": 0.3})
    outcome = execute(two_loads, params, station, benchctl_store)
    assert outcome.status == "completed", outcome.message
    point = benchctl_store.points(outcome.run_id).iloc[0]
    # Each load reads its own current: within its documented accuracy, ±(0.04 % + 0.3 mA) on the
    # 3 A range (the simulated load's ACCURACY table), plus 2 mA for settling - generous.
    assert point["iout_load_a"] == pytest.approx(0.4, abs=2.5e-3)
    assert point["iout_load2_a"] == pytest.approx(0.3, abs=2.5e-3)
    assert point["loads_n"] == 2.0 and point["temp_logger_n"] == 0.0  # the optional role is absent
    # Every source and load got its protection and its OFF before anything was switched on.
    for role in ("load", "load2"):
        assert _commands(bench, role, "INP OFF"), role
    # The end: source OFF first, then each load, the output discharged in between (audit clocks).
    src_off = bench.instruments["source"].audit.states("output")[-1]
    assert src_off.value is False
    for role in ("load", "load2"):
        last = bench.instruments[role].audit.states("input")[-1]
        assert last.value is False and last.t_s >= src_off.t_s, role
    assert [s.split(" off")[0] for s in outcome.shutdown_steps if " off confirmed" in s] == ["source", "load", "load2"]


def test_model_sums_the_loads_kirchhoff(two_load_bench):
    """Kirchhoff's current law at the output node: the DUT's output current is the sum of the
    currents of the loads in parallel on it; CR loads in parallel are 1/(1/R1 + 1/R2)."""
    from benchctl.drivers.dc_source import DcSource
    from benchctl.drivers.electronic_load import ElectronicLoad

    bench = two_load_bench
    source = DcSource(bench.resources["source"], name="source").open()
    loads = [ElectronicLoad(bench.resources[r], name=r).open() for r in ("load", "load2")]
    try:
        source.set_current_limit(2.0)
        source.set_voltage(48.0)
        for load, amps in zip(loads, (0.7, 0.2)):
            load.set_mode("CC")
            load.set_current(amps)
        source.set_output(True)
        for load in loads:
            load.set_input(True)
        assert bench.model.operating_point().iout_a == pytest.approx(0.9, rel=1e-9)
        loads[1].set_input(False)
        assert bench.model.operating_point().iout_a == pytest.approx(0.7, rel=1e-9)
        for load, ohms in zip(loads, (10.0, 40.0)):
            load.set_mode("CR")
            load.set_resistance(ohms)
            load.set_input(True)
        op = bench.model.operating_point()
        assert op.iout_a == pytest.approx(op.vout_v / 8.0, rel=1e-6)  # 10 ohm || 40 ohm = 8 ohm
    finally:
        for d in (source, *loads):
            d.output_off_now(deadline_s=1.0)
            d.close()


def test_the_watch_covers_the_second_load(two_load_bench, two_loads, benchctl_store):
    """The second load falls silent while the procedure holds its point: the watch trips the run
    on that load (an instrument that switches energy must answer), the source goes off first."""
    bench = two_load_bench
    station = parse_station(bench.station_toml(watch_period_s=0.05))
    params = two_loads.resolve_parameters(values={"hold_s": 20.0})
    plan = apply_fault_specs(bench, ["unresponsive@load2:on=INP ON"])
    try:
        started = time.monotonic()
        outcome = execute(two_loads, params, station, benchctl_store)
    finally:
        plan.clear()
    assert outcome.status == "tripped", outcome.message
    assert outcome.trip.instrument == "load2", outcome.trip
    assert time.monotonic() - started < 20.0  # the trip cut the hold short
    steps = outcome.shutdown_steps
    assert steps[0].startswith("source off confirmed"), steps
    assert any(s.startswith("load off confirmed") for s in steps), steps
    assert any(s.startswith("load2 off") for s in steps), steps  # tried, whatever the silent load answered
    src_off = bench.instruments["source"].audit.states("output")[-1]
    load_off = bench.instruments["load"].audit.states("input")[-1]
    assert src_off.value is False and load_off.value is False and src_off.t_s <= load_off.t_s


def test_a_required_role_missing_stops_the_run_before_anything_is_opened(simulated_bench, two_loads,
                                                                        benchctl_store):
    bench = simulated_bench("flyback-48v-5v")  # no second load
    station = parse_station(bench.station_toml())
    with pytest.raises(StationFileError, match=r"load2 \(electronic_load\) needed by procedure two_loads"):
        execute(two_loads, two_loads.resolve_parameters(), station, benchctl_store)
    assert not _commands(bench, "source", "*IDN?")  # nothing was opened


def test_a_listing_reads_role_declarations_without_running_the_file(two_loads):
    from benchctl.procedure_summary import read_summary

    summary = read_summary(two_loads.path)
    assert summary.roles == two_loads.roles == ("source", "load", "load2", "temp_logger")
    assert [(r.kind, r.optional) for r in summary.roles] == [(r.kind, r.optional) for r in two_loads.roles]


def test_the_readme_station_with_open_roles_is_valid():
    import re
    from pathlib import Path

    text = (Path(__file__).resolve().parents[1] / "README.md").read_text(encoding="utf-8")
    block = next(b for b in re.findall(r"```toml\n(.*?)```", text, flags=re.S) if "[instruments.load2]" in b)
    station = parse_station(block)
    assert station.roles_of_kind("electronic_load") == ["load", "load2"]
    assert station.kind_of("aux_meter") == "power_meter" and station.calibration_overdue == "refuse"
    assert station.instruments["source"].calibration_certificate == "LAB-CAL-2026-118"
