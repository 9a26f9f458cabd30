"""Dialects chosen by station options, against a scripted instrument (no sockets).

What is asked after a setting (error_check), how the end of an operation is awaited
(completion), how a scope capture is awaited (capture_wait), and the device clear and
resynchronisation after a timeout, so a late answer is never read as the next one.
Status bits: IEEE 488.2-1992 §11.2 (status byte: bit 5 ESB) and §11.5.1 (event status:
bit 0 OPC, 2 QYE, 3 DDE, 4 EXE, 5 CME, 7 PON); SCPI-1999 Vol. 1 §9 (status byte bit 2,
error/event queue not empty); all from memory.
"""

from __future__ import annotations

import logging

import pytest

from benchctl.drivers.dc_source import DcSource
from benchctl.drivers.oscilloscope import Oscilloscope
from benchctl.drivers.testing import ScriptedInstrument, scripted_driver
from benchctl.errors import InstrumentStateError, InstrumentTimeout, ScpiError, StationFileError

NO_DELAY = {"retry_delay_s": 0}


def _after_open(inst: ScriptedInstrument, n: int = 2) -> list[str]:
    return inst.messages[n:]


# -- error_check ----------------------------------------------------------------------------------


def test_compound_is_the_default_and_one_message():
    inst = ScriptedInstrument()
    src = scripted_driver(DcSource, inst, options=NO_DELAY)
    src.set_voltage(12.0)
    assert _after_open(inst) == ["VOLT 12", "*ESR?;:SYST:ERR?"]
    assert src.dialect_cautions() == []


def test_separate_asks_the_event_register_and_the_error_queue_as_two_messages():
    inst = ScriptedInstrument()
    src = scripted_driver(DcSource, inst, options={**NO_DELAY, "error_check": "separate"})
    src.set_voltage(12.0)
    assert _after_open(inst) == ["VOLT 12", "*ESR?", "SYST:ERR?"]
    inst.refuse["VOLT"] = (-222, "Data out of range")  # SCPI-1999 Vol. 2 §21.8.10 (from memory)
    with pytest.raises(ScpiError) as info:
        src.set_voltage(99.0)
    assert info.value.code == -222
    assert not any(";" in m for m in inst.messages)  # never a compound message


def test_separate_sees_a_reset_by_the_power_on_bit():
    inst = ScriptedInstrument()
    src = scripted_driver(DcSource, inst, options={**NO_DELAY, "error_check": "separate"})
    inst.power_cycle()
    with pytest.raises(InstrumentStateError, match="power-on"):
        src.set_voltage(5.0)


def test_status_byte_asks_stb_only_and_enables_the_events_it_needs_at_open():
    inst = ScriptedInstrument()
    src = scripted_driver(DcSource, inst, options={**NO_DELAY, "error_check": "status_byte"})
    # *ESE 188 = PON 128 + CME 32 + EXE 16 + DDE 8 + QYE 4, so ESB summarises them
    assert inst.messages == ["*IDN?", "*ESR?", "*ESE 188"] and inst.ese == 188
    src.set_voltage(12.0)
    assert _after_open(inst, 3) == ["VOLT 12", "*STB?"]


def test_status_byte_bit_2_reads_the_error_queue():
    inst = ScriptedInstrument()
    src = scripted_driver(DcSource, inst, options={**NO_DELAY, "error_check": "status_byte"})
    inst.refuse["VOLT"] = (-222, "Data out of range")
    with pytest.raises(ScpiError) as info:
        src.set_voltage(99.0)
    assert info.value.code == -222
    assert _after_open(inst, 3)[:3] == ["VOLT 99", "*STB?", "SYST:ERR?"]


def test_status_byte_reset_checks_the_status_byte_not_the_queue():
    # An IEEE 488.2 instrument without SYST:ERR? (no SCPI error queue): a reset's check must not ask it.
    inst = ScriptedInstrument()
    src = scripted_driver(DcSource, inst, options={**NO_DELAY, "error_check": "status_byte"})
    src.reset()
    sent = _after_open(inst, 3)
    assert "SYST:ERR?" not in sent and sent[-1] == "*STB?", sent


def test_status_byte_esb_names_the_event_class_and_the_power_on():
    inst = ScriptedInstrument(answers={"SYST:ERR?": '0,"No error"'})
    src = scripted_driver(DcSource, inst, options={**NO_DELAY, "error_check": "status_byte"})
    inst.esr |= 16  # EXE, execution error, with no SCPI queue entry: the class -200 is reported
    with pytest.raises(ScpiError) as info:
        src.set_voltage(1.0)
    assert info.value.code == -200 and "execution error" in str(info.value)
    inst.esr |= 128
    with pytest.raises(InstrumentStateError, match="power-on"):
        src.set_voltage(2.0)


def test_none_checks_nothing_and_says_so_once_at_open(caplog):
    inst = ScriptedInstrument()
    with caplog.at_level(logging.WARNING, logger="benchctl.drivers.scpi_driver"):
        src = scripted_driver(DcSource, inst, options={**NO_DELAY, "error_check": "none"})
        src.set_voltage(12.0)
        src.check_power_on()  # nothing to read in this dialect
    assert inst.messages == ["*IDN?", "VOLT 12"]
    cautions = src.dialect_cautions()
    assert len(cautions) == 1 and "go" in cautions[0] and "unseen" in cautions[0]
    assert sum("unseen" in r.getMessage() for r in caplog.records) == 1


def test_off_path_sends_two_messages_without_compound_messages():
    inst = ScriptedInstrument()
    src = scripted_driver(DcSource, inst, options={**NO_DELAY, "error_check": "separate"})
    src.output_off_now(deadline_s=1.0)
    assert _after_open(inst) == ["OUTP OFF", "OUTP?"]


def test_an_unknown_dialect_is_a_station_file_error_listing_the_choices():
    with pytest.raises(StationFileError, match='"compound", "separate", "status_byte", "none"'):
        DcSource("SCRIPTED::x", name="source", options={"error_check": "sometimes"})


# -- completion -------------------------------------------------------------------------------------


def test_esr_poll_sends_opc_and_polls_the_event_register_for_bit_0():
    answers = iter(["0", "0", "1"])
    inst = ScriptedInstrument()
    src = scripted_driver(DcSource, inst, options={**NO_DELAY, "completion": "esr_poll", "completion_poll_s": 0.001})
    inst.answers["*ESR?"] = lambda unit: next(answers)
    src.wait_complete(timeout_s=5.0)
    assert _after_open(inst) == ["*OPC", "*ESR?", "*ESR?", "*ESR?"]
    assert "*OPC?" not in inst.messages


def test_esr_poll_stops_at_a_power_on_and_at_its_deadline():
    inst = ScriptedInstrument(answers={"*ESR?": "128"})
    src = scripted_driver(DcSource, inst, options={**NO_DELAY, "completion": "esr_poll", "completion_poll_s": 0.001})
    with pytest.raises(InstrumentStateError, match="power-on"):
        src.wait_complete(timeout_s=1.0)
    inst.answers["*ESR?"] = "0"
    with pytest.raises(InstrumentTimeout, match="not complete within 0.05 s"):
        src.wait_complete(timeout_s=0.05)


def test_fixed_wait_sends_nothing_and_is_a_caution():
    inst = ScriptedInstrument()
    src = scripted_driver(DcSource, inst, options={**NO_DELAY, "completion": "fixed_wait", "completion_wait_s": 0.001})
    src.wait_complete()
    assert _after_open(inst) == []
    assert any("fixed_wait" in c for c in src.dialect_cautions())


# -- capture_wait -----------------------------------------------------------------------------------


def test_capture_by_the_operation_register_polls_until_the_busy_bits_clear():
    states = iter(["32", "16", "0"])  # waiting for trigger, measuring, done
    inst = ScriptedInstrument()
    scope = scripted_driver(Oscilloscope, inst, options={**NO_DELAY, "capture_wait": "operation_register",
                                                         "capture_poll_s": 0.001})
    inst.answers["STAT:OPER:COND?"] = lambda unit: next(states)
    scope.arm()
    scope.wait_acquired(5.0)
    assert [m for m in _after_open(inst) if m.startswith("STAT")] == ["STAT:OPER:COND?"] * 3
    assert "*OPC?" not in inst.messages and "INIT:DONE?" not in inst.messages


def test_capture_by_the_done_query_and_by_opc():
    inst = ScriptedInstrument(answers={"INIT:DONE?": "1"})
    scope = scripted_driver(Oscilloscope, inst, options={**NO_DELAY, "capture_wait": "done_query"})
    scope.single(5.0)
    assert "INIT:DONE?" in inst.messages and "*OPC?" not in inst.messages
    inst2 = ScriptedInstrument()
    scope2 = scripted_driver(Oscilloscope, inst2, options={**NO_DELAY, "capture_wait": "opc_query"})
    scope2.arm()
    scope2.wait_triggered(5.0)
    assert "*OPC?" in inst2.messages and "INIT:DONE?" not in inst2.messages


def test_capture_wait_left_out_keeps_opc_for_single_and_the_done_query_for_wait_triggered():
    inst = ScriptedInstrument(answers={"INIT:DONE?": "1"})
    scope = scripted_driver(Oscilloscope, inst, options=NO_DELAY)
    scope.single(5.0)
    assert "*OPC?" in inst.messages and "INIT:DONE?" not in inst.messages
    scope.arm()
    scope.wait_triggered(5.0)
    assert "INIT:DONE?" in inst.messages


# -- after a timeout: device clear, resynchronisation -----------------------------------------------


def test_a_late_answer_after_the_device_clear_is_not_read_as_the_next_answer():
    inst = ScriptedInstrument(answers={"MEAS:VOLT?": "12.5"})
    src = scripted_driver(DcSource, inst, options=NO_DELAY)
    inst.fail("*OPC?", "timeout", applied=True, late_answer="after_clear")
    with pytest.raises(InstrumentTimeout):
        src.wait_complete(timeout_s=5.0)
    assert inst.clears == 1
    # without the resync the late "1" of *OPC? would be read as the voltage
    assert src.measure_voltage() == 12.5
    assert _after_open(inst) == ["*OPC?", "*IDN?", "MEAS:VOLT?"]
    assert src.reconnects == 0  # the same session, back in step


def test_a_late_answer_before_the_device_clear_is_discarded_by_it():
    inst = ScriptedInstrument(answers={"MEAS:VOLT?": "12.5"})
    src = scripted_driver(DcSource, inst, options=NO_DELAY)
    inst.fail("*OPC?", "timeout", applied=True, late_answer=True)
    with pytest.raises(InstrumentTimeout):
        src.wait_complete(timeout_s=5.0)
    assert src.measure_voltage() == 12.5 and inst.clears == 1


def test_a_resync_that_fails_drops_the_session_and_the_retry_reconnects():
    inst = ScriptedInstrument(answers={"MEAS:VOLT?": "12.5"})
    src = scripted_driver(DcSource, inst, options=NO_DELAY)
    inst.fail("*OPC?", "timeout")
    with pytest.raises(InstrumentTimeout):
        src.wait_complete(timeout_s=5.0)
    inst.fail("*IDN?", "timeout")  # the marker gets no answer either
    assert src.measure_voltage() == 12.5  # a read-only query: retried over a new connection
    assert src.reconnects == 1


# -- over a real socket, against the simulated bench ----------------------------------------------


@pytest.fixture
def bench(simulated_bench):
    return simulated_bench("flyback-48v-5v", time_scale=50.0)


@pytest.mark.parametrize("error_check, check", [
    ("separate", ["*ESR?", "SYST:ERR?"]),
    ("status_byte", ["*STB?"]),
])
def test_dialects_against_the_simulated_source(bench, error_check, check):
    from benchctl.simulated_instruments.faults import apply_fault_specs

    src = DcSource(bench.resources["source"], name="source", timeout_s=10.0,
                   options={"error_check": error_check, "completion": "esr_poll"}).open()
    plan = apply_fault_specs(bench, ["garble@source:manual"])  # manual: never fires, only counts
    try:
        src.set_voltage(12.0)
        src.wait_complete(timeout_s=10.0)
        # the simulator's truth: the setpoint it holds (exact: the value is sent with 6 digits)
        assert src.voltage_setpoint() == pytest.approx(12.0, abs=1e-9)
        with pytest.raises(ScpiError):
            src.set_voltage(1e6)  # far above any source's range: the simulator refuses it
    finally:
        plan.clear()
        src.close()
    sent = plan.messages("source")
    # open's last message (*ESE, no answer awaited) may reach the server after the plan began counting
    sent = sent[sent.index("VOLT 12"):]
    assert sent[:1 + len(check)] == ["VOLT 12", *check]
    assert "*OPC" in sent and "*OPC?" not in sent and not any(";" in m for m in sent)


def test_a_late_answer_over_a_real_socket_is_read_away_after_the_timeout(bench):
    import time

    from benchctl.simulated_instruments.faults import apply_fault_specs

    src = DcSource(bench.resources["source"], name="source", timeout_s=3.0, options={"retries": 0}).open()
    plan = apply_fault_specs(bench, ["unresponsive@source:manual,for=0.6"])
    try:
        src.set_voltage(12.0)
        plan.fire("unresponsive@source:manual,for=0.6")  # bytes wait unread for 0.6 s, then are answered
        with pytest.raises(InstrumentTimeout, match="within 0.3 s"):
            src.wait_complete(timeout_s=0.3)
        time.sleep(0.8)  # the late "1" of *OPC? is on the socket now (not a timing assertion)
        # without the resync this would read the late "1"; the simulator holds the 12 V programmed
        assert src.voltage_setpoint() == pytest.approx(12.0, abs=1e-9)
        assert src.reconnects == 0
    finally:
        plan.clear()
        src.close()


def test_a_run_with_an_unchecked_dialect_stores_and_tells_the_caution(bench, tmp_path, benchctl_store):
    """error_check = none on one instrument: the run's events and console say its errors go unseen."""
    from benchctl.procedure import load_procedure
    from benchctl.runner import execute
    from benchctl.station import load_station

    path = bench.write_station(tmp_path / "station.toml")
    text = path.read_text().replace('driver = "power_meter"\n', 'driver = "power_meter"\noptions = { error_check = "none" }\n', 1)
    path.write_text(text)
    told: list[str] = []
    proc = load_procedure("efficiency_map")
    params = proc.resolve_parameters(values={"vin_v": [48.0], "load_pct": [50.0]})
    out = execute(proc, params, load_station(path), benchctl_store, notify=told.append)
    assert out.status == "completed", out.message
    events = benchctl_store.events(out.run_id)
    cautions = events[events["kind"] == "caution"]
    assert len(cautions) == 1 and "input_meter" in cautions.iloc[0]["message"]
    assert "unseen" in cautions.iloc[0]["message"]
    assert any("unseen" in t for t in told)
    # the run still measured and recorded its point through the unchecked meter
    pts = benchctl_store.points(out.run_id)
    assert len(pts) == 1


def test_capture_by_the_operation_register_against_the_simulated_scope(bench):
    """capture_wait = operation_register on the simulated scope: a capture that triggers completes (its
    STAT:OPER:COND? went through 'measuring' to 0), one whose trigger never comes times out after the
    wait asked for, and the scope answers at once afterwards."""
    from benchctl.drivers.oscilloscope import Oscilloscope

    scope = Oscilloscope(bench.resources["scope"], name="scope", timeout_s=5.0,
                         options={"capture_wait": "operation_register"}).open()
    try:
        scope.set_record(0.002, 2000)
        scope.set_trigger("immediate")
        scope.arm()
        scope.wait_triggered(10.0)
        wf = scope.fetch_waveform(1)
        assert wf.values.size == 2000
        polls = [e for e in bench.instruments["scope"].audit.entries()
                 if e.kind == "command" and e.text.startswith("STAT:OPER:COND")]
        assert polls, "the wait did not poll the operation register"
        scope.set_trigger(1, level=1e3, slope="rising")  # 1 kV on a 5 V output: never
        scope.arm()
        with pytest.raises(InstrumentTimeout, match="0.5 s"):
            scope.wait_triggered(0.5)
        assert scope.identify().model  # usable again: the capture was aborted
    finally:
        scope.close()
