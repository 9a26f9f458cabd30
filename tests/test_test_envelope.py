"""Test envelopes: refused without or beyond [limits.absolute], told and stored, enforced instead of [limits]."""

from __future__ import annotations

import re
import textwrap

import pytest

from benchctl.procedure import load_procedure
from benchctl.runner import execute
from benchctl.station import load_station

# A procedure that loads the DUT at a given CC level inside an envelope of a given load current.
_PROC = '''
from benchctl.procedure import Parameter

NAME = "envelope_probe"
DESCRIPTION = "load the DUT at iout_a inside an envelope of envelope_a"
ROLES = ("source", "load", "output_meter")
PARAMETERS = [Parameter("iout_a", "A", 1.0, minimum=0.0, maximum=100.0, help="load"),
              Parameter("envelope_a", "A", 8.0, minimum=0.0, maximum=100.0, help="envelope load current")]


def test_envelope(p):
    return {"load_current_max_a": p.envelope_a, "load_power_max_w": 6.0 * p.envelope_a}


def plan(p):
    return [{"iout_set_a": p.iout_a}]


def run(bench, p):
    bench.power_up(48.0, 1.0, startup_delay_s=0.05)
    bench.wait(0.05)
    bench.load.set_current(p.iout_a)
    bench.wait(0.05)
    bench.record({"iout_set_a": p.iout_a, "iout_a": bench.output_meter.measure_current()})
    bench.power_down()
'''


@pytest.fixture
def probe_proc(tmp_path):
    path = tmp_path / "envelope_probe.py"
    path.write_text(_PROC)
    return load_procedure(str(path))


@pytest.fixture
def bench(simulated_bench):
    return simulated_bench("flyback-48v-5v", time_scale=20.0)


def _station_without_absolute(bench, tmp_path):
    text = bench.station_toml()
    # drop the [limits.absolute] table (up to the next table header)
    stripped = re.sub(r"\n\[limits\.absolute\]\n(?:[^\[\n][^\n]*\n|\n)*", "\n", text)
    assert "[limits.absolute]" not in stripped and "[limits]" in stripped
    path = tmp_path / "no-absolute.toml"
    path.write_text(stripped)
    return load_station(path)


def test_refused_without_absolute_limits(bench, tmp_path, probe_proc, benchctl_store):
    from benchctl.errors import StationFileError

    station = _station_without_absolute(bench, tmp_path)
    with pytest.raises(StationFileError, match=r"limits\.absolute"):
        execute(probe_proc, probe_proc.resolve_parameters(values={}), station, benchctl_store)
    # nothing was opened: the source never switched on
    assert not bench.instruments["source"].output_on


def test_refused_beyond_absolute_limits(bench, station_for, probe_proc, benchctl_store):
    from benchctl.errors import UsageError

    station = station_for(bench)
    too_much = station.absolute_limits.load_current_max_a + 1.0
    with pytest.raises(UsageError, match="absolute"):
        execute(probe_proc, probe_proc.resolve_parameters(values={"envelope_a": too_much}), station, benchctl_store)
    assert not bench.instruments["source"].output_on


def test_caution_told_and_event_stored_and_the_envelope_enforced(bench, station_for, probe_proc, benchctl_store,
                                                                caplog):
    station = station_for(bench)
    operating = station.limits.load_current_max_a            # 5.5 A on this station
    level = operating + 1.0                                  # above the operating limit, inside the envelope
    out = execute(probe_proc, probe_proc.resolve_parameters(values={"iout_a": level, "envelope_a": 8.0}), station,
                  benchctl_store)
    assert out.status == "completed", out.message
    assert benchctl_store.points(out.run_id)["iout_set_a"].iloc[-1] == level
    events = benchctl_store.events(out.run_id)
    env = events[events["kind"] == "test_envelope"]
    assert len(env) == 1
    message = env["message"].iloc[0]
    assert message.startswith("CAUTION") and f"load_current_max_a {operating:g} -> 8" in message
    assert "CAUTION" in caplog.text                          # told on the console before anything opened


def test_interlock_trips_at_the_envelope_not_the_operating_limit(bench, station_for, probe_proc, benchctl_store):
    station = station_for(bench)
    # 8.5 A is beyond the 8 A envelope (and the 5.5 A operating limit): refused by the interlock at the envelope
    out = execute(probe_proc, probe_proc.resolve_parameters(values={"iout_a": 8.5, "envelope_a": 8.0}), station,
                  benchctl_store)
    assert out.status != "completed"
    assert "load_current_max_a" in out.message and "8" in out.message
    assert not bench.instruments["source"].output_on
    # without the envelope the operating limit holds: 6.5 A is refused
    out = execute(probe_proc, probe_proc.resolve_parameters(values={"iout_a": 6.5, "envelope_a": 0.0}), station,
                  benchctl_store)
    assert out.status != "completed"
    assert "load_current_max_a" in out.message and "5.5" in out.message
