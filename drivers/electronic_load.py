"""Electronic load over SCPI-1999 command forms.

Mode selection [SOURce:]FUNCtion[:MODE] CURRent|RESistance, levels
[SOURce:]CURRent[:LEVel][:IMMediate][:AMPLitude] and [SOURce:]RESistance..., input switch
INPut[:STATe], readings MEASure[:SCALar]:VOLTage|CURRent|POWer[:DC]?.

Dynamic mode (commands of our own under SCPI-1999 names): two current levels A and B,
one slew rate for both edges, either a continuous square wave at a repetition rate or
single steps, one per trigger (TRIGger[:IMMediate]), with a trigger output pulsed at
each step for the scope.

Modulation input and current monitor (commands of our own): CURR:MOD ON|OFF, CURR:MOD:GAIN
<A/V> (the analog input's transconductance), CURR:MOD:BAND? (its bandwidth, Hz),
CURR:MON:SCAL? (the monitor output, V/A) and CURR:MON:BAND? (its bandwidth, Hz).
"""

from __future__ import annotations

import math
from typing import ClassVar, Literal

from benchctl.errors import UsageError
from benchctl.drivers.scpi_driver import ScpiDriver

LoadMode = Literal["CC", "CR"]
TransientMode = Literal["single", "continuous"]

_MODE_WORDS = {"CC": "CURR", "CR": "RES"}
_MODE_FROM_ANSWER = {"CURR": "CC", "CURRENT": "CC", "RES": "CR", "RESISTANCE": "CR"}


class ElectronicLoad(ScpiDriver):
    """An electronic load in constant-current (CC) or constant-resistance (CR) mode."""

    kind: ClassVar[str] = "electronic_load"
    OUTPUT_SWITCH: ClassVar[tuple[str, str] | None] = ("set_input", "get_input")
    COMMANDS: ClassVar[dict[str, str]] = {
        "set_mode": "FUNC {mode}",
        "get_mode": "FUNC?",
        "set_current": "CURR {value:.6g}",
        "get_current": "CURR?",
        "set_resistance": "RES {value:.6g}",
        "get_resistance": "RES?",
        "set_current_protection": "CURR:PROT {value:.6g}",
        "set_power_protection": "POW:PROT {value:.6g}",
        "set_input": "INP {state}",
        "get_input": "INP?",
        "measure_voltage": "MEAS:VOLT?",
        "measure_current": "MEAS:CURR?",
        "measure_power": "MEAS:POW?",
        "set_transient_a": "CURR:TRAN:ALEV {value:.6g}",
        "set_transient_b": "CURR:TRAN:BLEV {value:.6g}",
        "set_transient_slew": "CURR:TRAN:SLEW {value:.6g}",
        "set_transient_mode": "CURR:TRAN:MODE {mode}",
        "set_transient_frequency": "CURR:TRAN:FREQ {value:.6g}",
        "set_transient_state": "CURR:TRAN {state}",
        "get_transient_state": "CURR:TRAN?",
        "get_transient_level": "CURR:TRAN:LEV?",
        "trigger_step": "TRIG",
        "set_trigger_out": "OUTP:TRIG {state}",
        "set_modulation": "CURR:MOD {state}",
        "get_modulation": "CURR:MOD?",
        "set_modulation_gain": "CURR:MOD:GAIN {value:.6g}",
        "get_modulation_gain": "CURR:MOD:GAIN?",
        "modulation_bandwidth": "CURR:MOD:BAND?",
        "monitor_scale": "CURR:MON:SCAL?",
        "monitor_bandwidth": "CURR:MON:BAND?",
    }

    def set_mode(self, mode: LoadMode) -> None:
        if mode not in _MODE_WORDS:
            raise UsageError(f"load mode must be 'CC' or 'CR', not {mode!r}")
        self.write("set_mode", mode=_MODE_WORDS[mode])

    def mode(self) -> LoadMode:
        answer = self.query("get_mode").upper()
        try:
            return _MODE_FROM_ANSWER[answer]  # type: ignore[return-value]
        except KeyError:
            from benchctl.errors import InstrumentResponseError

            raise InstrumentResponseError(
                f"unknown load mode {answer!r}", instrument=self.name, command=self.commands["get_mode"]
            ) from None

    def set_current(self, current_a: float) -> None:
        self.write("set_current", value=current_a)

    def current_setpoint(self) -> float:
        return self.query_float("get_current")

    def set_resistance(self, resistance_ohm: float) -> None:
        self.write("set_resistance", value=resistance_ohm)

    def resistance_setpoint(self) -> float:
        return self.query_float("get_resistance")

    def set_current_protection(self, current_a: float) -> None:
        """Program the load's own over-current protection."""
        self.write("set_current_protection", value=current_a)

    def set_power_protection(self, power_w: float) -> None:
        """Program the load's own over-power protection."""
        self.write("set_power_protection", value=power_w)

    def set_input(self, on: bool) -> None:
        self.write("set_input", state=self.on_off(on))

    def input_enabled(self) -> bool:
        return self.query_bool("get_input")

    def measure_voltage(self) -> float:
        return self.query_float("measure_voltage")

    def measure_current(self) -> float:
        return self.query_float("measure_current")

    def measure_power(self) -> float:
        return self.query_float("measure_power")

    # -- dynamic mode ----------------------------------------------------------------

    def set_transient(self, level_a_a: float, level_b_a: float, *, slew_a_per_s: float,
                      mode: TransientMode = "single", frequency_hz: float | None = None) -> None:
        """Program the dynamic mode: levels A (start) and B in A, edge slew in A/s,
        ``single`` (one step per :meth:`trigger_step`) or ``continuous`` at ``frequency_hz``."""
        if mode not in ("single", "continuous"):
            raise UsageError(f"transient mode must be 'single' or 'continuous', not {mode!r}")
        if not (math.isfinite(slew_a_per_s) and slew_a_per_s > 0):
            raise UsageError(f"slew_a_per_s must be a positive number of A/s, got {slew_a_per_s!r}")
        if mode == "continuous" and not (frequency_hz is not None and frequency_hz > 0):
            raise UsageError("continuous mode needs a positive frequency_hz")
        self.write("set_transient_a", value=level_a_a)
        self.write("set_transient_b", value=level_b_a)
        self.write("set_transient_slew", value=slew_a_per_s)
        self.write("set_transient_mode", mode="SING" if mode == "single" else "CONT")
        if frequency_hz is not None:
            self.write("set_transient_frequency", value=frequency_hz)

    def set_transient_enabled(self, on: bool) -> None:
        """Dynamic mode on (draws level A, or the square wave) or off (back to the static setpoint)."""
        self.write("set_transient_state", state=self.on_off(on))

    def transient_enabled(self) -> bool:
        return self.query_bool("get_transient_state")

    def transient_level(self) -> float:
        """The level drawn now in single mode (A), or the mean of the square wave."""
        return self.query_float("get_transient_level")

    def trigger_step(self) -> None:
        """Single mode: step once to the other level (A→B, then B→A), pulsing the trigger output."""
        self.write("trigger_step")

    def set_trigger_out(self, on: bool) -> None:
        self.write("set_trigger_out", state=self.on_off(on))

    # -- modulation input and current monitor -------------------------------------------

    def set_modulation(self, on: bool) -> None:
        """Analog current modulation input on (adds g·v to the CC level) or off."""
        self.write("set_modulation", state=self.on_off(on))

    def modulation_enabled(self) -> bool:
        return self.query_bool("get_modulation")

    def set_modulation_gain(self, gain_a_per_v: float) -> None:
        """Transconductance of the modulation input, A/V (> 0)."""
        if not (math.isfinite(gain_a_per_v) and gain_a_per_v > 0):
            raise UsageError(f"modulation gain must be a positive number of A/V, got {gain_a_per_v!r}")
        self.write("set_modulation_gain", value=gain_a_per_v)

    def modulation_gain(self) -> float:
        return self.query_float("get_modulation_gain")

    def modulation_bandwidth_hz(self) -> float:
        """The modulator's -3 dB bandwidth, Hz."""
        return self.query_float("modulation_bandwidth")

    def monitor_scale_v_per_a(self) -> float:
        """Current monitor output, V per A drawn."""
        return self.query_float("monitor_scale")

    def monitor_bandwidth_hz(self) -> float:
        """The current monitor's -3 dB bandwidth, Hz."""
        return self.query_float("monitor_bandwidth")
