"""Programmable DC source (bench power supply) over SCPI-1999 standard commands.

Command forms from SCPI-1999 Vol. 2: [SOURce:]VOLTage[:LEVel][:IMMediate][:AMPLitude],
[SOURce:]CURRent..., [SOURce:]VOLTage:PROTection[:LEVel], OUTPut[:STATe],
MEASure[:SCALar]:VOLTage[:DC]? and MEASure[:SCALar]:CURRent[:DC]?.
"""

from __future__ import annotations

from typing import ClassVar

from benchctl.drivers.scpi_driver import ScpiDriver


class DcSource(ScpiDriver):
    """A DC source: voltage setpoint, current limit, over-voltage protection, output."""

    kind: ClassVar[str] = "dc_source"
    OUTPUT_SWITCH: ClassVar[tuple[str, str] | None] = ("set_output", "get_output")
    COMMANDS: ClassVar[dict[str, str]] = {
        "set_voltage": "VOLT {value:.6g}",
        "get_voltage": "VOLT?",
        "set_current_limit": "CURR {value:.6g}",
        "get_current_limit": "CURR?",
        "set_ovp": "VOLT:PROT {value:.6g}",
        "get_ovp": "VOLT:PROT?",
        "set_output": "OUTP {state}",
        "get_output": "OUTP?",
        "measure_voltage": "MEAS:VOLT?",
        "measure_current": "MEAS:CURR?",
        "protection_tripped": "VOLT:PROT:TRIP?",
        "clear_protection": "OUTP:PROT:CLE",
    }

    def set_voltage(self, voltage_v: float) -> None:
        self.write("set_voltage", value=voltage_v)

    def voltage_setpoint(self) -> float:
        return self.query_float("get_voltage")

    def set_current_limit(self, current_a: float) -> None:
        self.write("set_current_limit", value=current_a)

    def current_limit(self) -> float:
        return self.query_float("get_current_limit")

    def set_ovp(self, voltage_v: float) -> None:
        """Program the source's own over-voltage protection (its hardware second layer)."""
        self.write("set_ovp", value=voltage_v)

    def ovp(self) -> float:
        return self.query_float("get_ovp")

    def ovp_tripped(self) -> bool:
        return self.query_bool("protection_tripped")

    def set_output(self, on: bool) -> None:
        self.write("set_output", state=self.on_off(on))

    def output_enabled(self) -> bool:
        return self.query_bool("get_output")

    def measure_voltage(self) -> float:
        return self.query_float("measure_voltage")

    def measure_current(self) -> float:
        return self.query_float("measure_current")
