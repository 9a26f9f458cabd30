"""Thermal chamber: setpoint, ramp-rate limit, soak criterion, air read-back and its stable flag.

Our own command set: OUTPut[:STATe] runs the chamber, [SOURce:]TEMPerature[:SETPoint] (°C),
[SOURce:]TEMPerature:RAMP (K/min), [SOURce:]TEMPerature:SOAK:BAND (K) and :SOAK:TIME (s)
set the chamber's own stable criterion, [SOURce:]TEMPerature:STABle? answers it and
MEASure:TEMPerature? reads the air. Templates can be overridden per station.
"""

from __future__ import annotations

from typing import ClassVar

from benchctl.drivers.scpi_driver import ScpiDriver
from benchctl.errors import UsageError


class ThermalChamber(ScpiDriver):
    """A chamber whose air is the DUT's ambient."""

    kind: ClassVar[str] = "thermal_chamber"
    COMMANDS: ClassVar[dict[str, str]] = {
        "set_running": "OUTP {state}",
        "get_running": "OUTP?",
        "set_setpoint": "TEMP {value:.4g}",
        "get_setpoint": "TEMP?",
        "set_ramp_rate": "TEMP:RAMP {value:.4g}",
        "get_ramp_rate": "TEMP:RAMP?",
        "set_soak_band": "TEMP:SOAK:BAND {value:.4g}",
        "set_soak_time": "TEMP:SOAK:TIME {value:.6g}",
        "get_stable": "TEMP:STAB?",
        "measure_temperature": "MEAS:TEMP?",
    }

    def set_running(self, on: bool) -> None:
        self.write("set_running", state=self.on_off(on))

    def running(self) -> bool:
        return self.query_bool("get_running")

    def set_setpoint(self, temperature_c: float) -> None:
        self.write("set_setpoint", value=float(temperature_c))

    def setpoint(self) -> float:
        return self.query_float("get_setpoint")

    def set_ramp_rate(self, k_per_min: float) -> None:
        if not k_per_min > 0:
            raise UsageError(f"{self.name}: ramp rate {k_per_min!r} K/min must be > 0")
        self.write("set_ramp_rate", value=float(k_per_min))

    def ramp_rate(self) -> float:
        return self.query_float("get_ramp_rate")

    def set_soak(self, band_k: float, time_s: float) -> None:
        """The chamber's stable criterion: air within ±``band_k`` of the setpoint for ``time_s``."""
        if not (band_k > 0 and time_s >= 0):
            raise UsageError(f"{self.name}: soak band {band_k!r} K must be > 0 and time {time_s!r} s >= 0")
        self.write("set_soak_band", value=float(band_k))
        self.write("set_soak_time", value=float(time_s))

    def is_stable(self) -> bool:
        return self.query_bool("get_stable")

    def measure_temperature(self) -> float:
        """Air temperature, °C."""
        return self.query_float("measure_temperature")
