"""DC power meter / DMM usable at a converter's input or output.

Readings MEASure[:SCALar]:VOLTage[:DC]?, MEASure[:SCALar]:CURRent[:DC]?, MEASure:POWer?
(SCPI-1999 Vol. 2, MEASure subsystem) and averaging [SENSe:]AVERage:COUNt.
"""

from __future__ import annotations

from typing import ClassVar

from drivers.scpi_driver import ScpiDriver


class PowerMeter(ScpiDriver):
    """Voltage, current and power readings with a settable averaging count."""

    kind: ClassVar[str] = "power_meter"
    COMMANDS: ClassVar[dict[str, str]] = {
        "measure_voltage": "MEAS:VOLT?",
        "measure_current": "MEAS:CURR?",
        "measure_power": "MEAS:POW?",
        "set_averaging": "AVER:COUN {count:d}",
        "get_averaging": "AVER:COUN?",
    }

    def measure_voltage(self) -> float:
        return self.query_float("measure_voltage")

    def measure_current(self) -> float:
        return self.query_float("measure_current")

    def measure_power(self) -> float:
        return self.query_float("measure_power")

    def set_averaging(self, count: int) -> None:
        if count < 1:
            raise ValueError(f"averaging count must be >= 1, not {count}")
        self.write("set_averaging", count=int(count))

    def averaging(self) -> int:
        return int(self.query_float("get_averaging"))
