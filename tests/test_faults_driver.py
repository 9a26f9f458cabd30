"""The SCPI driver under injected faults: bounded retries, no blind re-send, resets caught; and fault specs."""

from __future__ import annotations

import logging

import pytest

from benchctl.errors import InstrumentConnectionError, InstrumentStateError, InstrumentTimeout, StationFileError

LOST = (InstrumentConnectionError, InstrumentTimeout)  # a reset connection can also show as a timeout
from benchctl.drivers.dc_source import DcSource
from benchctl.drivers.electronic_load import ElectronicLoad
from benchctl.simulated_instruments.faults import (FaultSpec, FaultSpecError, apply_fault_specs, parse_fault_spec,
                                          random_after)
from benchctl.simulated_instruments.scpi import Identity


@pytest.fixture
def bench(simulated_bench):
    return simulated_bench("flyback-48v-5v", time_scale=50.0)


def _source(bench, timeout_s=0.3, **options):
    # 0.3 s makes the injected silences short; a test that counts messages on the happy path passes a
    # generous timeout so a loaded machine cannot turn one slow answer into a retry.
    return DcSource(bench.resources["source"], name="source", timeout_s=timeout_s, options=options).open()


def test_happy_path_costs_no_extra_round_trip(bench):
    src = _source(bench, timeout_s=10.0)
    plan = apply_fault_specs(bench, ["garble@source:manual"])  # manual: never fires, only counts
    try:
        src.set_voltage(12.0)
        src.measure_voltage()
    finally:
        plan.clear()
        src.close()
    # A setting is one message plus one check (*ESR? and SYST:ERR? share it); a reading is one message.
    assert plan.messages("source") == ["VOLT 12", "*ESR?;:SYST:ERR?", "MEAS:VOLT?"]


def test_setting_applied_before_the_drop_is_confirmed_not_resent(bench, caplog):
    src = _source(bench)
    plan = apply_fault_specs(bench, ["drop@source:on=VOLT 12,for=0"])
    try:
        with caplog.at_level(logging.WARNING, logger="benchctl.drivers.scpi_driver"):
            src.set_voltage(12.0)
        assert src.voltage_setpoint() == pytest.approx(12.0)
    finally:
        plan.clear()
        src.close()
    assert plan.fired
    assert bench.instruments["source"].audit.commands().count("VOLT 12") == 1  # never re-sent blindly
    assert "took effect; not sent again" in caplog.text and src.reconnects >= 1


def test_setting_lost_with_the_connection_is_resent_once(bench):
    src = _source(bench)
    plan = apply_fault_specs(bench, ["drop@source:on=CURR?,for=0"])
    try:
        src.current_limit()  # its answer is lost: the query is retried on a new connection
        src.set_voltage(12.0)
        assert src.voltage_setpoint() == pytest.approx(12.0)
    finally:
        plan.clear()
        src.close()
    assert plan.fired and src.reconnects >= 1
    assert bench.instruments["source"].audit.commands().count("VOLT 12") == 1


def test_reset_seen_after_reconnect_raises_state_error(bench):
    src = _source(bench)
    plan = apply_fault_specs(bench, [])
    try:
        src.set_voltage(20.0)
        plan.fire("reset@source:manual")  # settings lost, PON set (IEEE 488.2 §11.5.1.1.8, from memory)
        plan.fire("drop@source:manual,for=0")
        with pytest.raises(InstrumentStateError, match="power-on"):
            src.measure_voltage()
    finally:
        plan.clear()
        src.close()


def test_reset_seen_in_the_check_after_a_setting(bench):
    src = _source(bench)
    plan = apply_fault_specs(bench, [])
    try:
        plan.fire("reset@source:manual")
        with pytest.raises(InstrumentStateError, match="power-on bit after 'VOLT 5'"):
            src.set_voltage(5.0)
    finally:
        plan.clear()
        src.close()


def test_output_believed_on_but_off_after_reconnect_raises(bench):
    src = _source(bench)
    plan = apply_fault_specs(bench, [])
    try:
        src.set_current_limit(0.5)
        src.set_voltage(40.0)
        src.set_output(True)
        bench.instruments["source"].handle_message("OUTP OFF")  # switched off behind the driver's back
        plan.fire("drop@source:manual,for=0")
        with pytest.raises(InstrumentStateError, match="OUTP\\?.*reads '0' but 'OUTP ON' was programmed"):
            src.measure_voltage()
    finally:
        plan.clear()
        src.close()


def test_other_instrument_after_reconnect_raises(bench):
    src = _source(bench)
    plan = apply_fault_specs(bench, [])
    inst = bench.instruments["source"]
    original = inst.identity
    try:
        inst.identity = Identity("benchctl-sim", "sim dc source", "OTHER", "1.0")
        plan.fire("drop@source:manual,for=0")
        with pytest.raises(InstrumentStateError, match="another instrument"):
            src.measure_voltage()
    finally:
        inst.identity = original
        plan.clear()
        src.close()


def test_retries_are_bounded_and_logged(bench, caplog):
    src = _source(bench, retries=1, retry_delay_s=0.0)
    plan = apply_fault_specs(bench, ["drop@source:manual"])  # permanent: every reconnect is reset
    try:
        plan.fire(plan.specs[0])
        with caplog.at_level(logging.WARNING, logger="benchctl.drivers.scpi_driver"):
            with pytest.raises(LOST, match="gave up after 2 attempts"):
                src.measure_voltage()
    finally:
        plan.clear()
        src.close()
    assert "attempt 1 of 2" in caplog.text


def test_setting_without_read_back_is_not_resent(bench):
    load = ElectronicLoad(bench.resources["load"], name="load", timeout_s=0.3).open()
    plan = apply_fault_specs(bench, ["drop@load:on=CURR:PROT,for=0"])
    try:
        with pytest.raises(LOST, match="not sent again blindly"):
            load.set_current_protection(3.0)
    finally:
        plan.clear()
        load.close()
    assert bench.instruments["load"].audit.commands().count("CURR:PROT 3") == 1


@pytest.mark.parametrize("options", [{"retries": -1}, {"retries": 1.5}, {"retries": "2"}, {"retry_delay_s": -1}])
def test_bad_retry_options_are_station_errors(bench, options):
    with pytest.raises(StationFileError, match="options"):
        DcSource(bench.resources["source"], name="source", options=options)


# --- fault specs ---------------------------------------------------------------------------

def test_parse_fault_specs():
    spec = parse_fault_spec("drop@source:after=40,for=0")
    assert (spec.kind, spec.role, spec.after_messages, spec.duration_s) == ("drop", "source", 40, 0.0)
    spec = parse_fault_spec("feedback_open:at=3.5")
    assert spec.kind == "feedback_open" and spec.role is None and spec.at_model_s == 3.5
    spec = parse_fault_spec("scpi_error@load:after=12,code=-222")
    assert spec.code == -222 and spec.after_messages == 12
    spec = parse_fault_spec("input_sag@load:on=OUTP ON,level=20")
    assert spec.on_prefix == "OUTP ON" and spec.level_v == 20.0
    seeded = parse_fault_spec("garble@output_meter:random=7,max=50")
    assert seeded.after_messages == random_after(7, 50) == parse_fault_spec("garble@output_meter:random=7,max=50").after_messages
    assert 1 <= seeded.after_messages <= 50
    for text in ("drop@source:after=40,for=0", "reset@load:manual", "scpi_error@load:after=3,code=-222",
                 "overheat:at=2"):
        assert parse_fault_spec(parse_fault_spec(text).text()) == parse_fault_spec(text)


@pytest.mark.parametrize("text, needle", [
    ("", "empty"),
    ("melt@source", "unknown fault kind"),
    ("drop", "acts on an instrument"),
    ("drop@source:when=3", "unknown key"),
    ("drop@source:after=soon", "not a whole number"),
    ("drop@source:after=0", ">= 1"),
    ("drop@source:after=3,at=1", "at most one"),
    ("reset@load:code=-222", "only goes with scpi_error"),
    ("drop@source:after=3,random=1", "not both"),
    ("feedback_open:after=3", "count the messages of an instrument"),
])
def test_bad_fault_specs_say_what_is_wrong(text, needle):
    with pytest.raises(FaultSpecError, match=needle):
        parse_fault_spec(text)


def test_a_typo_arms_nothing(bench):
    with pytest.raises(FaultSpecError, match="no role 'sauce'"):
        apply_fault_specs(bench, ["drop@source:after=3", "drop@sauce:after=3"])
    assert "process_message" not in bench.instruments["source"].__dict__
