"""The driver's policy without sockets: a scripted instrument behind a fake session.

Retries, read-back recovery, reset detection, the bounded off path, the error-queue
rules and the errors chosen by who is at fault, each with a scripted failure; the same
behaviours over real sockets and the simulated bench are in ``test_faults_driver.py``.
"""

from __future__ import annotations

import pickle

import pytest

from benchctl.errors import (
    InstrumentConnectionError,
    InstrumentError,
    InstrumentResponseError,
    InstrumentStateError,
    InstrumentTimeout,
    ScpiError,
    StationFileError,
    UsageError,
)
from benchctl.exit_codes import ExitCode, exit_code_for_error
from benchctl.drivers.dc_source import DcSource
from benchctl.drivers.electronic_load import ElectronicLoad
from benchctl.drivers.loop_analyzer import InjectionProfile, LoopAnalyzer
from benchctl.drivers.oscilloscope import Oscilloscope
from benchctl.drivers.power_meter import PowerMeter
from benchctl.drivers.testing import ScriptedInstrument, scripted_driver

NO_DELAY = {"retry_delay_s": 0}


@pytest.fixture
def inst() -> ScriptedInstrument:
    return ScriptedInstrument(answers={"MEAS:VOLT?": "12.5"})


def _after_open(inst: ScriptedInstrument) -> list[str]:
    return inst.messages[2:]  # *IDN? and *ESR? of open()


def test_a_setting_is_one_message_and_one_check_a_reading_one_message(inst):
    src = scripted_driver(DcSource, inst, options=NO_DELAY)
    src.set_voltage(12.0)
    assert src.measure_voltage() == 12.5
    # *ESR? and SYST:ERR? in one compound message (IEEE 488.2 §7.1 program message units, from memory)
    assert _after_open(inst) == ["VOLT 12", "*ESR?;:SYST:ERR?", "MEAS:VOLT?"]
    assert inst.connects == 1


def test_a_timed_out_query_is_asked_again_on_a_new_session_and_its_late_answer_never_read(inst):
    inst.answers["MEAS:CURR?"] = "0.25"
    src = scripted_driver(DcSource, inst, options=NO_DELAY)
    first = src.session
    inst.fail("MEAS:CURR?", "timeout", applied=True, late_answer=True)
    assert src.measure_current() == 0.25
    assert inst.connects == 2 and src.reconnects == 1 and src.session is not first
    assert first.closed  # dropped: its late "0.25" cannot be read as the answer to a later query
    # after the reconnect the identity and the power-on bit are checked before the query is asked again
    assert _after_open(inst) == ["MEAS:CURR?", "*IDN?", "*ESR?", "MEAS:CURR?"]


def test_retries_are_bounded_by_the_option(inst):
    src = scripted_driver(DcSource, inst, options={"retries": 2, "retry_delay_s": 0})
    inst.fail("MEAS:VOLT?", "drop", times=10)
    with pytest.raises(InstrumentConnectionError, match="gave up after 3 attempts") as info:
        src.measure_voltage()
    assert _after_open(inst).count("MEAS:VOLT?") == 3
    assert info.value.command == "MEAS:VOLT?" and info.value.instrument == "dc_source"


def test_the_error_queue_is_never_asked_twice(inst):
    src = scripted_driver(DcSource, inst, options=NO_DELAY)
    inst.fail("SYST:ERR?", "timeout")
    with pytest.raises(InstrumentTimeout):
        src.query("next_error")  # reading it removes an entry: a retry could lose one
    assert _after_open(inst) == ["SYST:ERR?"] and inst.connects == 1


def test_a_setting_applied_before_its_check_was_lost_is_read_back_not_resent(inst):
    src = scripted_driver(DcSource, inst, options=NO_DELAY)
    inst.fail("*ESR?;:SYST:ERR?", "timeout", applied=True)
    src.set_voltage(12.0)
    assert _after_open(inst).count("VOLT 12") == 1  # the read-back showed it took effect
    assert "VOLT?" in _after_open(inst) and src.voltage_setpoint() == 12.0


def test_a_lost_check_answer_is_said_to_have_taken_any_error_with_it(inst, caplog):
    # *ESR? and SYST:ERR? remove what they report (IEEE 488.2 §11.5.1.2.2; SCPI-1999 Vol. 2 §21.8, from
    # memory): the refused setting's -222 went out in the answer that timed out, and only a warning can say so.
    inst.state["VOLT"] = "12"  # the value already in effect: the read-back matches although VOLT 12 was refused
    inst.refuse["VOLT"] = (-222, "Data out of range")
    src = scripted_driver(DcSource, inst, name="source", options=NO_DELAY)
    inst.fail("*ESR?;:SYST:ERR?", "timeout", applied=True)
    with caplog.at_level("WARNING", logger="benchctl.drivers.scpi_driver"):
        src.set_voltage(12.0)
    assert _after_open(inst).count("VOLT 12") == 1
    assert any("error check after 'VOLT 12' was lost" in r.getMessage() for r in caplog.records)


def test_a_lost_setting_is_not_said_to_have_lost_an_error(inst, caplog):
    inst.state["VOLT"] = "0"
    src = scripted_driver(DcSource, inst, options=NO_DELAY)
    inst.fail("VOLT 12", "drop", applied=True)  # the connection went with the setting, before any check
    with caplog.at_level("WARNING", logger="benchctl.drivers.scpi_driver"):
        src.set_voltage(12.0)
    assert not any("error check" in r.getMessage() for r in caplog.records)


def test_a_setting_lost_with_the_connection_is_sent_again_once(inst):
    inst.state["VOLT"] = "0"  # its setpoint before
    src = scripted_driver(DcSource, inst, options=NO_DELAY)
    inst.fail("VOLT 12", "drop", applied=False)
    src.set_voltage(12.0)
    assert _after_open(inst).count("VOLT 12") == 2 and inst.state["VOLT"] == "12"
    assert src.reconnects == 1


def test_a_setting_without_read_back_is_not_sent_again_blindly(inst):
    load = scripted_driver(ElectronicLoad, inst, options=NO_DELAY)
    inst.fail("CURR:PROT 3", "drop", applied=True)
    with pytest.raises(InstrumentConnectionError, match="not sent again blindly"):
        load.set_current_protection(3.0)
    assert inst.messages.count("CURR:PROT 3") == 1


def test_a_queued_scpi_error_names_instrument_command_and_code(inst):
    # SYSTem:ERRor? answers <code>,"<text>" (SCPI-1999 Vol. 2 §21.8); -222 is "Data out of range"
    inst.refuse["VOLT"] = (-222, "Data out of range")
    src = scripted_driver(DcSource, inst, name="source", options=NO_DELAY)
    with pytest.raises(ScpiError) as info:
        src.set_voltage(500.0)
    err = info.value
    assert (err.code, err.instrument, err.command) == (-222, "source", "VOLT 500")
    assert str(err) == f"instrument source, command 'VOLT 500': {err.detail}"
    assert err.detail.startswith("SCPI error -222 'Data out of range'")
    assert exit_code_for_error(err) == ExitCode.INSTRUMENT


def test_a_reset_is_caught_in_the_check_after_a_setting(inst):
    src = scripted_driver(DcSource, inst, options=NO_DELAY)
    inst.power_cycle()  # PON, bit 7 of the event status register (IEEE 488.2-1992 §11.5.1.1.8, from memory)
    with pytest.raises(InstrumentStateError, match="power-on bit after 'VOLT 5'"):
        src.set_voltage(5.0)


def test_settings_lost_behind_a_reconnect_stop_the_run(inst):
    src = scripted_driver(DcSource, inst, options=NO_DELAY)
    src.set_output(True)
    inst.state["OUTP"] = "OFF"  # switched off behind the driver's back, then the connection drops
    inst.fail("MEAS:VOLT?", "drop")
    with pytest.raises(InstrumentStateError, match="reads 'OFF' but 'OUTP ON' was programmed"):
        src.measure_voltage()


def test_another_instrument_after_a_reconnect_is_refused(inst):
    src = scripted_driver(DcSource, inst, options=NO_DELAY)
    inst.identity = "benchctl-test,scripted,0002,1.0"
    inst.fail("MEAS:VOLT?", "drop")
    with pytest.raises(InstrumentStateError, match="another instrument"):
        src.measure_voltage()


def test_stop_retries_makes_a_failing_query_give_up_at_once(inst):
    src = scripted_driver(DcSource, inst, options={"retries": 5, "retry_delay_s": 0})
    src.stop_retries()
    inst.fail("MEAS:VOLT?", "timeout")
    with pytest.raises(InstrumentTimeout):
        src.measure_voltage()
    assert inst.connects == 1


def test_output_off_over_its_session_then_over_a_connection_of_its_own(inst):
    src = scripted_driver(DcSource, inst, options=NO_DELAY)
    src.set_output(True)
    how = src.output_off_now(deadline_s=1.0)
    assert "over its session" in how and inst.state["OUTP"] == "OFF"
    assert inst.messages[-1] == "OUTP OFF;:OUTP?"  # the OFF and its read-back in one message
    src.set_output(True)
    inst.fail("OUTP OFF;:OUTP?", "timeout")  # the session fails: a short-lived connection carries the OFF
    how = src.output_off_now(deadline_s=1.0)
    assert "separate connection" in how and inst.state["OUTP"] == "OFF"
    assert inst.messages.count("OUTP OFF;:OUTP?") == 3  # never retried on the same path


def test_output_off_that_reads_back_on_is_a_state_error(inst):
    inst.answers["OUTP?"] = "1"  # an output that will not switch off
    src = scripted_driver(DcSource, inst, options=NO_DELAY)
    with pytest.raises(InstrumentStateError, match="not off"):
        src.output_off_now(deadline_s=1.0)


def test_a_timeout_message_states_the_timeout_that_applied(inst):
    inst.fail("*OPC?", "timeout")
    src = scripted_driver(DcSource, inst, timeout_s=0.3, options=NO_DELAY)
    with pytest.raises(InstrumentTimeout, match="within 5 s"):
        src.wait_complete(timeout_s=5.0)
    assert src.session is not None and src.session.timeout_s == 0.3  # restored afterwards


def test_the_visa_session_states_its_own_timeout():
    import pyvisa

    from benchctl.drivers.session import VisaSession

    class Resource:  # stands in for a pyvisa resource: only the timeout is read
        timeout = 5000

    session = VisaSession(Resource(), name="scope", resource_name="TCPIP::192.0.2.1::5025::SOCKET")
    err = session.translate(pyvisa.errors.VisaIOError(pyvisa.constants.StatusCode.error_timeout), "TRAC? 1")
    assert isinstance(err, InstrumentTimeout) and "no answer within 5 s" in str(err)
    assert (err.instrument, err.command) == ("scope", "TRAC? 1")


def test_a_block_that_is_not_one_reports_the_queued_error(inst):
    inst.answers["TRAC? 1"] = "nonsense"
    scope = scripted_driver(Oscilloscope, inst, options=NO_DELAY)
    inst.errors.append((-221, "Settings conflict"))
    with pytest.raises(ScpiError) as info:  # -221 settings conflict (SCPI-1999 standard error list, from memory)
        scope.read_block("TRAC? 1")
    assert info.value.code == -221
    inst.blocks["TRAC? 1"] = b"\x01\n\x02"
    assert scope.read_block("TRAC? 1") == b"\x01\n\x02"


def test_measure_all_is_one_integration_retried_as_a_whole(inst):
    inst.answers.update({"FETC:VOLT?": "5.0", "FETC:CURR?": "2.0", "FETC:POW?": "10.0"})
    meter = scripted_driver(PowerMeter, inst, options=NO_DELAY)
    inst.fail("FETC:CURR?", "timeout")
    assert meter.measure_all() == (5.0, 2.0, 10.0)
    sent = _after_open(inst)
    # INITiate then FETCh of V, I, P (SCPI-1999 Vol. 1 §3.3 measurement model); started again after the failure
    assert sent.count("INIT") == 2 and sent[-3:] == ["FETC:VOLT?", "FETC:CURR?", "FETC:POW?"]


def test_an_unreadable_check_after_initiate_starts_the_reading_again_an_unreadable_reading_does_not(inst):
    inst.answers.update({"FETC:VOLT?": "5.0", "FETC:CURR?": "2.0", "FETC:POW?": "10.0"})
    meter = scripted_driver(PowerMeter, inst, options=NO_DELAY)
    inst.fail("*ESR?;:SYST:ERR?", "garble")
    assert meter.measure_all() == (5.0, 2.0, 10.0)
    assert _after_open(inst).count("INIT") == 2
    inst.fail("FETC:CURR?", "garble")
    with pytest.raises(InstrumentResponseError, match="expected a number") as info:
        meter.measure_all()
    assert info.value.command == "FETC:CURR?" and _after_open(inst).count("INIT") == 3


# -- errors chosen by who is at fault --------------------------------------------------------------


@pytest.mark.parametrize("call", [
    lambda a: a.set_sweep(100.0, 10.0, 50),
    lambda a: a.set_sweep(10.0, 100.0, 1),
    lambda a: a.set_sweep(10.0, 100.0, 50, "cubic"),
    lambda a: a.set_data_format("hex"),
    lambda a: a.wait_sweep(method="guess", timeout_s=1.0),
])
def test_a_bad_argument_to_the_analyzer_is_a_usage_error_and_sends_nothing(inst, call):
    analyzer = scripted_driver(LoopAnalyzer, inst, options=NO_DELAY)
    before = list(inst.messages)
    with pytest.raises(UsageError) as info:
        call(analyzer)
    assert inst.messages == before
    assert exit_code_for_error(info.value) == ExitCode.BAD_INPUT  # bad input, not instrument trouble


def test_a_bad_injection_profile_is_a_usage_error():
    with pytest.raises(UsageError, match="strictly increasing"):
        InjectionProfile((100.0, 10.0), (0.01, 0.02))


@pytest.mark.parametrize("call", [
    lambda s: s.set_scale(1, -0.5),
    lambda s: s.set_scale(9, 0.5),
    lambda s: s.set_coupling(1, "GND"),
    lambda s: s.set_trigger(1, slope="up"),
    lambda s: s.set_data_format("int12"),
])
def test_a_bad_argument_to_the_scope_is_a_usage_error(inst, call):
    scope = scripted_driver(Oscilloscope, inst, options=NO_DELAY)
    before = list(inst.messages)
    with pytest.raises(UsageError):
        call(scope)
    assert inst.messages == before
    with pytest.raises(ValueError):  # also a ValueError, for callers written to that convention
        call(scope)


def test_instrument_errors_build_their_message_from_their_attributes():
    err = ScpiError("SCPI error -113", code=-113, instrument="load", command="LEV 3")
    assert str(err) == "instrument load, command 'LEV 3': SCPI error -113"
    moved = err.located(command="INP ON", detail="SCPI error -113 (while checking)")
    assert isinstance(moved, ScpiError) and moved.code == -113
    assert str(moved) == "instrument load, command 'INP ON': SCPI error -113 (while checking)"
    assert str(err) == "instrument load, command 'LEV 3': SCPI error -113"  # the original is unchanged
    again = pickle.loads(pickle.dumps(moved))
    assert (type(again), again.code, again.detail, again.command) == (ScpiError, -113, moved.detail, "INP ON")
    assert str(InstrumentError("no answer")) == "no answer"


# -- the command table and the options, validated at station load ----------------------------------


def test_check_configuration_finds_every_problem_of_an_entry():
    problems = DcSource.check_configuration(
        {"set_voltage": "VOLT {volts}", "set_current_limit": "CURR {value:d}", "levitate": "LEV"},
        {"retries": 11, "colour": "red"})
    text = "\n".join(problems)
    assert "no command named levitate" in text
    assert "fills no field {volts}" in text
    assert "cannot format the value" in text and "set_current_limit" in text
    assert "options.colour: unknown option" in text and "retries, retry_delay_s" in text
    assert "options.retries = 11 must be a whole number in [0, 10]" in text
    assert len(problems) == 5
    assert DcSource.check_configuration({"set_voltage": "SOUR1:VOLT {value:.4f}"}, {"retries": 3}) == []
    # options of a subclass are merged with the base's
    assert Oscilloscope.check_configuration({}, {"channels": 2, "retries": 0}) == []
    assert LoopAnalyzer.option_defaults()["injection_max_v"] is None


def test_a_driver_built_with_a_bad_option_is_refused(inst):
    with pytest.raises(StationFileError, match="instruments.meter.options.averages: unknown option"):
        PowerMeter("SCRIPTED::meter", name="meter", options={"averages": 4}, connect=inst.connect)
    assert inst.connects == 0


def test_a_station_with_a_bad_option_is_refused_at_load_naming_the_key():
    from benchctl.station import parse_station

    text = """
[station]
name = "t"
[limits]
source_voltage_max_v = 15.0
source_current_max_a = 2.0
dut_output_voltage_max_v = 6.0
load_current_max_a = 3.0
load_power_max_w = 20.0
[instruments.source]
driver = "dc_source"
resource = "TCPIP::192.0.2.10::5025::SOCKET"
options = { retries = 2, termination = "\\r\\n" }
[instruments.source.commands]
set_voltage = "VOLT {voltage}"
"""
    with pytest.raises(StationFileError) as info:  # parse_station opens nothing: no instrument is reached
        parse_station(text)
    problems = "\n".join(info.value.problems)
    # "termination" is not an option (read_termination and write_termination are): named, not ignored
    assert "instruments.source.options.termination: unknown option" in problems
    assert "instruments.source.commands: command override 'set_voltage'" in problems


# IEEE 488.2-1992 §10.19 (from memory): *OPC? answers the NR1 "1"; instruments in practice also
# send "+1" or "1.0", which mean the same and must be accepted; anything else is refused.
@pytest.mark.parametrize("answer", ["1", "+1", "1.0", "+1.000E+00"])
def test_opc_answer_forms_are_accepted(answer: str) -> None:
    inst = ScriptedInstrument(answers={"*OPC?": answer})
    driver = scripted_driver(DcSource, inst, options=NO_DELAY)
    driver.wait_complete()
    assert inst.messages[-1] == "*OPC?"


@pytest.mark.parametrize("answer", ["0", "2", "ON", ""])
def test_opc_answer_that_is_not_one_is_refused(answer: str) -> None:
    inst = ScriptedInstrument(answers={"*OPC?": answer})
    driver = scripted_driver(DcSource, inst, options=NO_DELAY)
    with pytest.raises(InstrumentResponseError, match="expected 1"):
        driver.wait_complete()
