"""Every driver end to end through pyvisa-py sockets against the simulated bench."""

import socket

import pytest

from benchctl.errors import InstrumentConnectionError, InstrumentResponseError, InstrumentTimeout, ScpiError
from benchctl.drivers.dc_source import DcSource
from benchctl.drivers.electronic_load import ElectronicLoad
from benchctl.drivers.power_meter import PowerMeter


@pytest.fixture
def bench(simulated_bench):
    return simulated_bench("flyback-48v-5v", time_scale=50.0)


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def test_source_identify_set_measure(bench):
    with DcSource(bench.resources["source"], name="source") as src:
        # *IDN? has four comma-separated fields (IEEE 488.2-1992 §10.14, from memory)
        assert src.identity.maker == "benchctl-sim" and src.identity.model == "sim dc source"
        src.reset()
        assert src.output_enabled() is False
        src.set_ovp(80.0)
        assert src.ovp() == pytest.approx(80.0)
        src.set_current_limit(1.5)
        assert src.current_limit() == pytest.approx(1.5)
        src.set_voltage(48.0)
        assert src.voltage_setpoint() == pytest.approx(48.0)
        src.set_output(True)
        assert src.output_enabled() is True
        import time
        deadline = time.monotonic() + 2.0  # the output rises with the model's time constant
        while abs(src.measure_voltage() - 48.0) > 0.05 and time.monotonic() < deadline:
            time.sleep(0.01)
        assert src.measure_voltage() == pytest.approx(48.0, abs=0.05)
        src.set_output(False)
    # audit log: the output went on then off (state changes recorded by the instrument)
    assert [e.value for e in bench.instruments["source"].audit.states("output")] == [True, False]


def test_source_out_of_range_names_instrument_command_and_scpi_error(bench):
    with DcSource(bench.resources["source"], name="source") as src:
        with pytest.raises(ScpiError) as info:
            src.set_voltage(500.0)
        # -222 Data out of range (SCPI-1999 Vol. 2 §21.8.9 error list, from memory)
        assert info.value.code == -222
        assert "source" in str(info.value) and "VOLT 500" in str(info.value)
        assert src.voltage_setpoint() == 0.0  # the setting was not changed


def test_source_ovp_trips_output(bench):
    with DcSource(bench.resources["source"], name="source") as src:
        src.reset()
        src.set_ovp(30.0)
        src.set_voltage(36.0)
        src.set_output(True)
        assert src.output_enabled() is False and src.ovp_tripped() is True


def test_load_modes_and_readings(bench):
    with DcSource(bench.resources["source"]) as src, ElectronicLoad(bench.resources["load"], name="load") as load, \
            PowerMeter(bench.resources["output_meter"], name="output_meter") as meter:
        src.reset()
        load.reset()
        src.set_current_limit(1.5)
        src.set_voltage(48.0)
        src.set_output(True)
        load.set_mode("CC")
        assert load.mode() == "CC"
        load.set_current(2.0)
        load.set_input(True)
        assert load.input_enabled()
        meter.set_averaging(4)
        assert meter.averaging() == 4
        import time
        time.sleep(0.2)
        assert load.measure_current() == pytest.approx(2.0, abs=0.01)
        assert meter.measure_voltage() == pytest.approx(5.0, rel=0.01)
        # P = V·I (definition) within meter noise
        assert meter.measure_power() == pytest.approx(meter.measure_voltage() * meter.measure_current(), rel=2e-3)
        load.set_mode("CR")
        load.set_resistance(5.0)
        assert load.mode() == "CR" and load.resistance_setpoint() == pytest.approx(5.0)
        time.sleep(0.2)
        # Ohm's law at the load: I = V/R
        assert load.measure_current() == pytest.approx(load.measure_voltage() / 5.0, rel=5e-3)
        load.set_input(False)
        src.set_output(False)
        with pytest.raises(ValueError):
            load.set_mode("CP")


def test_unreachable_resource_is_a_connection_error():
    port = _free_port()
    drv = PowerMeter(f"TCPIP::127.0.0.1::{port}::SOCKET", name="output_meter", timeout_s=0.5)
    with pytest.raises(InstrumentConnectionError, match="output_meter"):
        drv.open()
    assert not drv.is_open
    drv.close()
    drv.close()  # safe twice


def test_unresponsive_instrument_times_out(bench):
    meter = PowerMeter(bench.resources["input_meter"], name="input_meter", timeout_s=0.3).open()
    try:
        bench.servers["input_meter"].set_fault("unresponsive")
        with pytest.raises(InstrumentTimeout, match="input_meter"):
            meter.measure_voltage()
    finally:
        bench.servers["input_meter"].set_fault("none")
        meter.close()


def test_garbled_reply_is_a_response_error(bench):
    with PowerMeter(bench.resources["input_meter"], name="input_meter") as meter:
        bench.servers["input_meter"].set_fault("garble")
        with pytest.raises(InstrumentResponseError, match="expected a number"):
            meter.measure_voltage()


def test_dialect_override_is_used(bench):
    # A station can replace a command string without code: long-form SCPI here.
    with DcSource(bench.resources["source"], commands={"set_voltage": "SOURce:VOLTage:LEVel:IMMediate:AMPLitude {value:.3f}"}) as src:
        src.set_voltage(12.5)
        assert src.voltage_setpoint() == pytest.approx(12.5)
    log = bench.instruments["source"].audit.commands()
    assert any("SOURce:VOLTage:LEVel:IMMediate:AMPLitude 12.500" in str(c) for c in log)


@pytest.mark.hardware
def test_hardware_station_identifies(hardware_station):
    """Runs only with --station FILE / BENCHCTL_STATION: every instrument answers *IDN?."""
    for cfg in hardware_station.instruments.values():
        with cfg.create() as drv:
            assert drv.identity.maker
