"""The SCPI instrument core without sockets: command tree, compound messages,
parameters, error queue, status registers, common commands, audit log, fault hook.

Sources (from memory): IEEE 488.2-1992 §10 (common commands), §11 (status
reporting: ESR bits OPC 1, QYE 4, DDE 8, EXE 16, CME 32, PON 128; STB bits 4 MAV,
5 ESB, 6 MSS), §12 (*OPC/*WAI); SCPI-1999 Vol. 1 §6.2.4 (compound-message path
rule), §9 (STB bit 2 error/event queue), Vol. 2 ch. 21 (error queue and numbers).
"""

from __future__ import annotations

import logging
import threading

import pytest

from benchctl.simulated_instruments.scpi import STANDARD_ERRORS, Identity, Numeric, ScpiExecutionError
from benchctl.simulated_instruments.scpi.demo import DemoSource


def errors(inst: DemoSource) -> list[int]:
    """Read the whole error queue through SYSTem:ERRor? and return the codes."""
    codes = []
    while True:
        response = inst.handle_message(":SYST:ERR?")
        assert response is not None
        code = int(response.split(",", 1)[0])
        if code == 0:
            return codes
        codes.append(code)


@pytest.fixture()
def inst() -> DemoSource:
    source = DemoSource()
    source.handle_message("*CLS")
    return source


def test_brief_example(inst: DemoSource) -> None:
    assert inst.handle_message("VOLT 5;OUTP ON;:MEAS:VOLT?") == "+5.000000000E+00"
    assert errors(inst) == []


def test_standard_error_table_texts() -> None:
    # SCPI-1999 Vol. 2 §21.8 (from memory), the texts as the brief lists them
    expected = {
        -100: "Command error", -101: "Invalid character", -102: "Syntax error", -103: "Invalid separator",
        -104: "Data type error", -108: "Parameter not allowed", -109: "Missing parameter",
        -112: "Program mnemonic too long", -113: "Undefined header", -120: "Numeric data error",
        -131: "Invalid suffix", -138: "Suffix not allowed", -141: "Invalid character data",
        -200: "Execution error", -221: "Settings conflict", -222: "Data out of range",
        -224: "Illegal parameter value", -241: "Hardware missing", -350: "Queue overflow",
        -363: "Input buffer overrun", -410: "Query INTERRUPTED", -420: "Query UNTERMINATED",
        -440: "Query UNTERMINATED after indefinite response", 0: "No error",
    }
    for code, text in expected.items():
        assert STANDARD_ERRORS[code] == text


# ------------------------------------------------------- compound messages
def test_path_rule_second_unit_is_relative_to_previous_path(inst: DemoSource) -> None:
    # SCPI-1999 Vol. 1 §6.2.4 (from memory): after SOUR:VOLT the path is SOUR:, so CURR is SOUR:CURR
    inst.handle_message("SOUR:VOLT 5;CURR 2")
    assert (inst.voltage_v, inst.current_limit_a) == (5.0, 2.0)
    # after VOLT:PROT the path is VOLT:, so LEV is VOLT:LEV
    inst.handle_message("VOLT:PROT 50;LEV 12")
    assert (inst.ovp_v, inst.voltage_v) == (50.0, 12.0)
    assert errors(inst) == []


def test_path_rule_has_no_root_fallback_and_colon_resets(inst: DemoSource) -> None:
    inst.handle_message("OUTP ON")
    assert inst.handle_message("SOUR:VOLT 7;MEAS:VOLT?") is None  # SOUR:MEAS:VOLT? does not exist
    assert errors(inst) == [-113]
    assert inst.handle_message("SOUR:VOLT 7;:MEAS:VOLT?") == "+7.000000000E+00"
    assert inst.handle_message("MEAS:VOLT?;VOLT?") == "+7.000000000E+00;+7.000000000E+00"  # MEAS:VOLT? twice


def test_common_commands_mix_in_and_leave_the_path(inst: DemoSource) -> None:
    # IEEE 488.2-1992 §7.6.2 / SCPI-1999 Vol. 1 §6.2.4 (from memory): common commands do not change the path
    inst.handle_message("VOLT 9")
    assert inst.handle_message("*RST;VOLT 5;*OPC;CURR 3;*OPC?;VOLT?;CURR?") == "1;+5.000000000E+00;+3.000000000E+00"
    assert inst.handle_message("SOUR:VOLT 4;*CLS;CURR 0.5;:CURR?") == "+5.000000000E-01"
    assert errors(inst) == []


def test_an_error_in_one_unit_does_not_stop_the_others(inst: DemoSource) -> None:
    assert inst.handle_message("VOLTA 5;VOLT 6;VOLT?") == "+6.000000000E+00"
    assert errors(inst) == [-113]


def test_empty_messages_and_units_are_ignored(inst: DemoSource) -> None:
    assert inst.handle_message("") is None
    assert inst.handle_message("  \r") is None
    assert inst.handle_message("VOLT 1;;VOLT?;") == "+1.000000000E+00"
    assert errors(inst) == []


# --------------------------------------------------------------- parameters
def test_min_max_def_in_settings_and_queries(inst: DemoSource) -> None:
    # SCPI-1999 Vol. 1 §7.2.1 (from memory): MIN/MAX/DEF as values and as query parameters
    assert inst.handle_message("VOLT? MAX;VOLT? MIN;VOLT? DEF;CURR? DEF") == \
        "+8.000000000E+01;+0.000000000E+00;+0.000000000E+00;+1.000000000E+00"
    inst.handle_message("VOLT MAX")
    assert inst.voltage_v == 80.0
    inst.handle_message("CURR MIN")
    assert inst.current_limit_a == 0.0
    assert inst.handle_message("INIT:SWE? MAX") is None  # setting-only command has no query
    assert errors(inst) == [-113]


def test_query_parameters_reach_the_getter(inst: DemoSource) -> None:
    inst.handle_message("VOLT 12;OUTP ON")
    assert inst.handle_message("MEAS:VOLT? 20") == "+1.200000000E+01"
    assert inst.last_measure_range_v == 20.0
    inst.handle_message("MEAS:VOLT? MAX")
    assert inst.last_measure_range_v == 80.0
    inst.handle_message("MEAS:VOLT?")
    assert inst.last_measure_range_v is None  # optional parameter left out: its default (None)
    assert inst.handle_message("MEAS:VOLT? 100") is None
    assert inst.handle_message("VOLT? 5") is None
    assert inst.handle_message("VOLT? LOTS") is None
    assert errors(inst) == [-222, -108, -141]


def test_every_parameter_error(inst: DemoSource) -> None:
    inst.handle_message("VOLT 10")
    cases = [
        ("VOLT 500", -222), ("VOLT -1", -222), ("VOLT 5 A", -131), ("INIT:SWE 5 V", -138),
        ("VOLT", -109), ("VOLT 1,2", -108), ("VOLT LOTS", -141), ("VOLT 'five'", -104),
        ("FUNC RES", -224), ("OUTP MAYBE", -224), ("DISP:TEXT hello", -104), ("LIST:VOLT 5", -104),
    ]
    for message, code in cases:
        assert inst.handle_message(message) is None
        assert errors(inst) == [code], message
    assert inst.voltage_v == 10.0  # -222 leaves the setting unchanged (SCPI-1999 Vol. 2 §21.8.6)


def test_error_text_carries_detail_after_semicolon(inst: DemoSource) -> None:
    inst.handle_message("VOLT 500")
    assert inst.handle_message("SYST:ERR?") == '-222,"Data out of range;VOLT 500 V exceeds the maximum 80 V"'
    assert inst.handle_message("SYST:ERR:NEXT?") == '0,"No error"'


def test_suffix_multipliers_through_the_instrument(inst: DemoSource) -> None:
    inst.handle_message("VOLT 4800 mV;CURR 100mA")
    assert inst.voltage_v == pytest.approx(4.8) and inst.current_limit_a == pytest.approx(0.1)
    inst.handle_message("CURR 10 UA")
    assert inst.current_limit_a == pytest.approx(1e-5)
    inst.handle_message("VOLT 0.012 KV")
    assert inst.voltage_v == pytest.approx(12.0)
    assert errors(inst) == []


def test_choices_booleans_and_numeric_suffix_nodes(inst: DemoSource) -> None:
    inst.handle_message("FUNC CURRENT")
    assert inst.handle_message("FUNC?") == "CURR"  # short form answered (SCPI-1999 Vol. 1 §7.4)
    inst.handle_message("OUTP2 ON;OUTP1:STAT OFF")
    assert inst.handle_message("OUTP2?;OUTP?;OUTPUT1:STATE?") == "1;0;0"
    assert inst.handle_message("OUTP3 ON") is None
    assert inst.handle_message("OUTP0?") is None
    assert errors(inst) == [-114, -114]  # Header suffix out of range (SCPI-1999 Vol. 2 §21.8.4)


def test_query_only_and_setting_only_headers(inst: DemoSource) -> None:
    assert inst.handle_message("MEAS:VOLT 5") is None
    assert inst.handle_message("INIT:SWE?") is None
    assert inst.handle_message("VOLT:PROTECT 5") is None  # neither short nor long form
    assert errors(inst) == [-113, -113, -113]


def test_text_and_block_parameters(inst: DemoSource) -> None:
    inst.handle_message("DISP:TEXT 'POL buck 12V->1.2V'")
    assert inst.display_text == "POL buck 12V->1.2V"
    data = bytes(range(256))
    inst.handle_message(b"LIST:VOLT #3256" + data)
    assert inst.list_data == data
    assert inst.handle_message("LIST:VOLT?") == ("#3256" + data.decode("latin-1"))
    assert inst.handle_message(b"LIST:VOLT #10;:LIST:VOLT?") == "#10"
    assert inst.handle_message("DISP:TEXT?") == "\"POL buck 12V->1.2V\""
    assert errors(inst) == []


# -------------------------------------------------------------- error queue
def test_error_queue_is_fifo_and_counts(inst: DemoSource) -> None:
    inst.handle_message("VOLTA 1;VOLT 500;FUNC RES")
    assert inst.handle_message("SYST:ERR:COUN?") == "3"
    assert errors(inst) == [-113, -222, -224]
    assert inst.handle_message("SYST:ERR:COUN?") == "0"


def test_overflow_replaces_the_newest_entry() -> None:
    # SCPI-1999 Vol. 2 §21.8.1 (from memory): on overflow the most recent error becomes -350
    inst = DemoSource(error_queue_capacity=4)
    inst.handle_message("VOLTA 1;VOLT 500;FUNC RES;OUTP MAYBE;VOLT 'x';VOLT")
    assert [e.code for e in inst.queued_errors()] == [-113, -222, -224, -350]
    assert inst.handle_message("SYST:ERR:ALL?") == \
        '-113,"Undefined header;VOLTA is not a command of this instrument",' \
        '-222,"Data out of range;VOLT 500 V exceeds the maximum 80 V",' \
        '-224,"Illegal parameter value;FUNC RES: expected one of VOLTage|CURRent",-350,"Queue overflow"'
    assert errors(inst) == []
    inst.handle_message("VOLTA")
    assert errors(inst) == [-113]  # room again after reading


def test_capacity_is_configurable() -> None:
    inst = DemoSource(error_queue_capacity=40)
    inst.handle_message(";".join(["VOLTA"] * 39))
    assert len(inst.queued_errors()) == 39 and inst.queued_errors()[-1].code == -113
    with pytest.raises(ValueError, match="capacity"):
        DemoSource(error_queue_capacity=1)


# ------------------------------------------------------------ status model
def test_power_on_bit_then_esr_reads_and_clears() -> None:
    inst = DemoSource()
    assert inst.handle_message("*ESR?") == "128"  # PON at power-on (IEEE 488.2-1992 §11.5.1.1.9)
    assert inst.handle_message("*ESR?") == "0"    # reading clears (§10.12)


@pytest.mark.parametrize("message,bit", [
    ("VOLTA 5", 32),                   # -1xx command error -> CME
    ("VOLT 500", 16),                  # -2xx execution error -> EXE
    ("*IDN?;*OPC?", 4),                # -4xx query error -> QYE
])
def test_errors_set_their_esr_bit(inst: DemoSource, message: str, bit: int) -> None:
    inst.handle_message("*ESR?")
    inst.handle_message(message)
    assert inst.handle_message("*ESR?") == str(bit)
    assert inst.handle_message("*ESR?") == "0"


def test_device_dependent_errors_set_dde(inst: DemoSource) -> None:
    inst.handle_message("*ESR?")
    inst.queue_error(-350)
    inst.queue_error(-363)
    assert inst.handle_message("*ESR?") == "8"  # -3xx -> DDE (IEEE 488.2-1992 §11.5.1.1.6)
    assert errors(inst) == [-350, -363]


def test_status_byte_bits(inst: DemoSource) -> None:
    # SCPI-1999 Vol. 1 §9.1 / IEEE 488.2-1992 §11.2 (from memory)
    assert inst.handle_message("*STB?") == "0"
    inst.handle_message("VOLTA")
    assert int(inst.handle_message("*STB?")) == 4            # bit 2: error/event queue not empty
    inst.handle_message("*ESE 32")
    assert int(inst.handle_message("*STB?")) == 4 | 32       # bit 5: ESB = ESR & ESE (CME)
    inst.handle_message("*SRE 4")
    assert int(inst.handle_message("*STB?")) == 4 | 32 | 64  # bit 6: MSS = STB & SRE
    assert int(inst.handle_message("*TST?;*STB?").split(";")[1]) & 16 == 16  # bit 4: MAV, a response is queued
    errors(inst)
    inst.handle_message("*ESR?")
    assert inst.handle_message("*STB?") == "0"
    assert inst.handle_message("*ESE?;*SRE?") == "32;4"


def test_sre_cannot_enable_bit_6_and_masks_are_8_bit(inst: DemoSource) -> None:
    inst.handle_message("*SRE 255;*ESE 255")
    assert inst.handle_message("*SRE?;*ESE?") == "191;255"  # IEEE 488.2-1992 §11.3.2.3
    inst.handle_message("*ESE 256")
    assert errors(inst) == [-222]


def test_rst_keeps_error_queue_and_cls_clears_it(inst: DemoSource) -> None:
    inst.handle_message("VOLT 30;OUTP ON;VOLTA")
    inst.handle_message("*RST")  # IEEE 488.2-1992 §10.32: settings reset, status and queue untouched
    assert (inst.voltage_v, inst.outputs[1]) == (0.0, False)
    assert [e.code for e in inst.queued_errors()] == [-113]
    assert inst.handle_message("*ESR?") == "32"
    inst.handle_message("VOLTA")
    inst.handle_message("*CLS")  # §10.3: clears the event register and the error queue
    assert errors(inst) == [] and inst.handle_message("*ESR?") == "0"


def test_opc_sets_esr_bit_0_only_when_pending_work_is_done(inst: DemoSource) -> None:
    # IEEE 488.2-1992 §10.18 / §12.5.2 (from memory)
    inst.handle_message("*ESR?")
    inst.handle_message("INIT:SWE 1000;*OPC")
    assert int(inst.handle_message("*ESR?")) & 1 == 0
    inst.sweep_steps_left = 0  # the sweep finishes
    assert int(inst.handle_message("*ESR?")) & 1 == 1
    inst.handle_message("*OPC")
    assert inst.handle_message("*ESR?") == "1"


def test_opc_query_waits_for_pending_work() -> None:
    sleeps: list[float] = []
    inst = DemoSource(sleep=sleeps.append)
    assert inst.handle_message("INIT:SWE 5;*OPC?") == "1"  # §10.19: "1" once pending operations are done
    assert inst.sweep_steps_left == 0 and len(sleeps) == 5
    assert inst.handle_message("INIT:SWE 3;*WAI;*OPC?") == "1"
    assert inst.sweep_steps_left == 0


def test_opc_query_wait_is_bounded() -> None:
    inst = DemoSource(sleep=lambda s: None, opc_timeout_s=0.01)
    inst.handle_message("*CLS")
    assert inst.handle_message("INIT:SWE 1000;*OPC?") is None
    assert errors(inst) == [-200]
    assert inst.handle_message("*WAI") is None
    assert errors(inst) == [-200]


def test_common_queries_and_their_errors(inst: DemoSource) -> None:
    assert inst.handle_message("*IDN?") == "benchctl-sim,sim demo supply,SN0001,0.1"  # §10.14 four fields
    assert inst.handle_message("*TST?") == "0"  # §10.38: 0 = self-test passed
    assert inst.handle_message("*idn?") == "benchctl-sim,sim demo supply,SN0001,0.1"
    for bad, code in [("*XYZ", -113), ("*RST?", -113), ("*IDN", -113), ("*IDN? 5", -108), ("*ESE", -109)]:
        assert inst.handle_message(bad) is None
        assert errors(inst) == [code], bad


def test_query_after_idn_is_440(inst: DemoSource) -> None:
    # IEEE 488.2-1992 §8.7.11 / §6.5.7.5 (from memory): *IDN? is arbitrary ASCII data, must end the response
    assert inst.handle_message("*IDN?;*OPC?;VOLT 3") == "benchctl-sim,sim demo supply,SN0001,0.1"
    assert inst.voltage_v == 3.0
    assert errors(inst) == [-440]


def test_identity_refuses_separators() -> None:
    with pytest.raises(ValueError, match="maker"):
        Identity(maker="A,B", model="M", serial="S", firmware="F")


# -------------------------------------------------------- handler failures
def test_execution_error_from_a_handler(inst: DemoSource) -> None:
    inst.handle_message("VOLT:PROT 10")
    assert inst.handle_message("VOLT 20;VOLT?") == "+0.000000000E+00"
    assert inst.handle_message("SYST:ERR?") == '-221,"Settings conflict;VOLT 20 V is above the protection level 10 V"'


def test_handler_exception_becomes_200_and_is_logged(inst: DemoSource, caplog: pytest.LogCaptureFixture) -> None:
    def broken(value: float) -> None:
        raise ZeroDivisionError("division by zero")

    inst.add_command("TEST:BROKen", setter=broken, getter=lambda: None, params=[Numeric()])
    with caplog.at_level(logging.ERROR, logger="benchctl.simulated_instruments.scpi"):
        assert inst.handle_message("TEST:BROK 1;:VOLT 2;TEST:BROK?") is None
    assert inst.voltage_v == 2.0
    first = inst.handle_message("SYST:ERR?")
    assert first == '-200,"Execution error;TEST:BROK: ZeroDivisionError: division by zero"'
    assert inst.handle_message(":SYST:ERR?").startswith('-200,"Execution error;TEST:BROK?')
    assert "TEST:BROK" in caplog.text


def test_custom_execution_error_code(inst: DemoSource) -> None:
    def missing() -> float:
        raise ScpiExecutionError(-241, detail="no current probe fitted")

    inst.add_command("MEASure:PROBe", getter=missing)
    assert inst.handle_message("MEAS:PROB?") is None
    assert inst.handle_message("SYST:ERR?") == '-241,"Hardware missing;no current probe fitted"'


# ------------------------------------------------------------ fault hook
def test_fail_next_setting(inst: DemoSource) -> None:
    inst.fail_next_setting(-222, detail="injected fault")
    assert inst.handle_message("*RST;*CLS;VOLT?") == "+0.000000000E+00"  # common commands and queries pass
    inst.handle_message("VOLT 5")
    assert inst.voltage_v == 0.0
    inst.handle_message("VOLT 6")
    assert inst.voltage_v == 6.0  # only the next one fails
    assert inst.handle_message("SYST:ERR?") == '-222,"Data out of range;injected fault"'
    assert errors(inst) == []


# ---------------------------------------------------------------- audit log
def test_audit_log_records_units_and_states(inst: DemoSource) -> None:
    inst.audit.clear()
    inst.handle_message("VOLT 5; OUTP2 ON ;VOLTA;*OPC?")
    assert inst.audit.commands() == ["VOLT 5", "OUTP2 ON", "VOLTA", "*OPC?"]
    states = [(e.text, e.value) for e in inst.audit.states()]
    assert states == [("voltage_v", 5.0), ("output2", True)]
    entries = inst.audit.entries()
    assert [e.seq for e in entries] == sorted(e.seq for e in entries)
    assert all(b.t_s >= a.t_s for a, b in zip(entries, entries[1:]))
    assert {e.source for e in entries if e.kind == "command"} == {"direct"}
    last = entries[-1].seq
    inst.audit.clear()
    assert inst.audit.entries() == ()
    inst.handle_message("VOLT 1")
    assert inst.audit.entries()[0].seq == last + 1  # numbering continues after clear()


def test_audit_log_is_thread_safe(inst: DemoSource) -> None:
    inst.audit.clear()

    def worker(k: int) -> None:
        for i in range(200):
            inst.audit_state(f"w{k}", i)

    threads = [threading.Thread(target=worker, args=(k,)) for k in range(4)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    seqs = [e.seq for e in inst.audit.entries()]
    assert len(seqs) == 800 and len(set(seqs)) == 800 and seqs == sorted(seqs)
    assert [e.value for e in inst.audit.states("w2")] == list(range(200))


def test_simulator_core_never_imports_benchctl() -> None:
    # DESIGN.md, decision 1: the simulator is reached only through sockets, like hardware
    import ast
    import pathlib

    import benchctl.simulated_instruments.scpi as pkg

    for path in pathlib.Path(pkg.__file__).parent.glob("*.py"):
        tree = ast.parse(path.read_text(encoding="utf-8"))
        for node in ast.walk(tree):
            names = [a.name for a in node.names] if isinstance(node, ast.Import) else \
                [node.module or ""] if isinstance(node, ast.ImportFrom) else []
            assert not any(n.split(".")[0] == "benchctl" for n in names), path.name
