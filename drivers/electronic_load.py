"""Electronic load over SCPI-1999 command forms.

Mode selection [SOURce:]FUNCtion[:MODE] CURRent|RESistance, levels
[SOURce:]CURRent[:LEVel][:IMMediate][:AMPLitude] and [SOURce:]RESistance..., input switch
INPut[:STATe], readings MEASure[:SCALar]:VOLTage|CURRent|POWer[:DC]?.
"""

from __future__ import annotations

from typing import ClassVar, Literal

from drivers.scpi_driver import ScpiDriver

LoadMode = Literal["CC", "CR"]

_MODE_WORDS = {"CC": "CURR", "CR": "RES"}
_MODE_FROM_ANSWER = {"CURR": "CC", "CURRENT": "CC", "RES": "CR", "RESISTANCE": "CR"}


class ElectronicLoad(ScpiDriver):
    """An electronic load in constant-current (CC) or constant-resistance (CR) mode."""

    kind: ClassVar[str] = "electronic_load"
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
    }

    def set_mode(self, mode: LoadMode) -> None:
        if mode not in _MODE_WORDS:
            raise ValueError(f"load mode must be 'CC' or 'CR', not {mode!r}")
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

    def safe_state(self) -> None:
        self.set_input(False)
