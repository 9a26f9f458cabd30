"""What a procedure may call on each kind of instrument: one ``Protocol`` per kind.

The drivers in ``drivers/`` and the guarded wrappers a procedure receives
(:mod:`benchctl.guarded`) both have these methods, so ``bench.source`` has a type a
type checker and an editor can use. Quantities are SI: volts, amperes, watts, ohms,
seconds, hertz. A lab's own driver for a kind implements the same methods.
"""

from __future__ import annotations

from typing import Any, Literal, Protocol, runtime_checkable

LoadMode = Literal["CC", "CR", "CV", "CP"]


@runtime_checkable
class Instrument(Protocol):
    """Every instrument as a procedure sees it: where it is and what it said it is.

    Opening, resetting, protecting and closing are the runner's job, not a procedure's.
    """

    @property
    def resource(self) -> str: ...

    @property
    def identity(self) -> Any: ...


@runtime_checkable
class DcSourceLike(Instrument, Protocol):
    """A programmable DC source feeding the DUT input."""

    def set_voltage(self, voltage_v: float) -> None: ...

    def set_current_limit(self, current_a: float) -> None: ...

    def set_output(self, on: bool) -> None: ...

    def output_enabled(self) -> bool: ...

    def measure_voltage(self) -> float: ...

    def measure_current(self) -> float: ...


@runtime_checkable
class ElectronicLoadLike(Instrument, Protocol):
    """An electronic load on the DUT output (constant current or resistance, transients)."""

    def set_mode(self, mode: LoadMode) -> None: ...

    def set_current(self, current_a: float) -> None: ...

    def set_resistance(self, resistance_ohm: float) -> None: ...

    def set_input(self, on: bool) -> None: ...

    def input_enabled(self) -> bool: ...

    def measure_voltage(self) -> float: ...

    def measure_current(self) -> float: ...

    def measure_power(self) -> float: ...

    def set_transient(self, level_a_a: float, level_b_a: float, *, slew_a_per_s: float,
                      mode: Any = "single", frequency_hz: float | None = None) -> None: ...

    def set_transient_enabled(self, on: bool) -> None: ...

    def trigger_step(self) -> None: ...


@runtime_checkable
class PowerMeterLike(Instrument, Protocol):
    """A DC power meter (voltage, current and power of one port)."""

    def measure_voltage(self) -> float: ...

    def measure_current(self) -> float: ...

    def measure_power(self) -> float: ...

    def set_averaging(self, count: int) -> None: ...


@runtime_checkable
class LoopAnalyzerLike(Instrument, Protocol):
    """A frequency-response (loop) analyzer: injection, sweep, fetch of the complex response."""

    def set_sweep(self, start_hz: float, stop_hz: float, points: int, spacing: Any = "log") -> None: ...

    def set_injection(self, amplitude_v: float) -> None: ...

    def measure(self, *, method: Literal["opc", "poll"] = "opc") -> Any: ...


@runtime_checkable
class OscilloscopeLike(Instrument, Protocol):
    """A digitising oscilloscope: channels, timebase, trigger, single capture, waveform fetch."""

    def set_channel_enabled(self, channel: int, on: bool) -> None: ...

    def set_scale(self, channel: int, per_div: float) -> None: ...

    def set_offset(self, channel: int, offset: float) -> None: ...

    def set_timebase(self, scale_s_per_div: float, *, position_s: float = 0.0, points: int | None = None) -> None: ...

    def single(self, timeout_s: float = 10.0) -> None: ...

    def fetch_waveform(self, channel: int) -> Any: ...


@runtime_checkable
class FunctionGeneratorLike(Instrument, Protocol):
    """A function generator coupled into the DUT's input line (``coupling_v_per_v`` V/V)."""

    @property
    def coupling_v_per_v(self) -> float: ...

    def set_function(self, function: str) -> None: ...

    def set_frequency(self, frequency_hz: float) -> None: ...

    def set_amplitude(self, amplitude_vpp: float) -> None: ...

    def set_offset(self, offset_v: float) -> None: ...

    def set_output(self, on: bool) -> None: ...

    def output_enabled(self) -> bool: ...


@runtime_checkable
class SwitchMatrixLike(Instrument, Protocol):
    """A switch matrix / multiplexer connecting the bench to one of several DUTs."""

    def select(self, channel: int) -> None: ...

    def closed_channel(self) -> int: ...

    def open_all(self) -> None: ...
class TemperatureMeterLike(Instrument, Protocol):
    """A multi-channel temperature meter; channels by label ("ambient", "switch" ...) or number, °C."""

    def channels(self) -> tuple[str, ...]: ...

    def measure_temperature(self, channel: str | int) -> float: ...


@runtime_checkable
class ThermalChamberLike(Instrument, Protocol):
    """A thermal chamber whose air is the DUT's ambient: setpoint °C, ramp K/min, soak, stable flag."""

    def set_running(self, on: bool) -> None: ...

    def set_setpoint(self, temperature_c: float) -> None: ...

    def setpoint(self) -> float: ...

    def set_ramp_rate(self, k_per_min: float) -> None: ...

    def set_soak(self, band_k: float, time_s: float) -> None: ...

    def is_stable(self) -> bool: ...

    def measure_temperature(self) -> float: ...


KIND_PROTOCOLS: dict[str, type] = {
    "dc_source": DcSourceLike,
    "electronic_load": ElectronicLoadLike,
    "power_meter": PowerMeterLike,
    "loop_analyzer": LoopAnalyzerLike,
    "oscilloscope": OscilloscopeLike,
    "function_generator": FunctionGeneratorLike,
    "switch_matrix": SwitchMatrixLike,
    "temperature_meter": TemperatureMeterLike,
    "thermal_chamber": ThermalChamberLike,
}
"""The protocol of each instrument kind (the ``kind`` a driver class declares)."""
