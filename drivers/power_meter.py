"""DC power meter / DMM usable at a converter's input or output.

Readings MEASure[:SCALar]:VOLTage[:DC]?, MEASure[:SCALar]:CURRent[:DC]?, MEASure:POWer?
(SCPI-1999 Vol. 2, MEASure subsystem) and averaging [SENSe:]AVERage:COUNt. Voltage,
current and power of one and the same integration: INITiate[:IMMediate], then
FETCh[:SCALar]:VOLTage|CURRent|POWer? (SCPI-1999 Vol. 1, 3.3: the measurement model's
INITiate and FETCh) — :meth:`PowerMeter.measure_all`.
"""

from __future__ import annotations

import math
from typing import ClassVar

from benchctl.errors import InstrumentConnectionError, InstrumentResponseError, InstrumentTimeout, UsageError
from benchctl.drivers.scpi_driver import ScpiDriver


class _CheckUnreadable(InstrumentResponseError):
    """The error check after INITiate answered something unreadable: the reading is started again."""


class PowerMeter(ScpiDriver):
    """Voltage, current and power readings with a settable averaging count."""

    kind: ClassVar[str] = "power_meter"
    COMMANDS: ClassVar[dict[str, str]] = {
        "measure_voltage": "MEAS:VOLT?",
        "measure_current": "MEAS:CURR?",
        "measure_power": "MEAS:POW?",
        "set_averaging": "AVER:COUN {count:d}",
        "get_averaging": "AVER:COUN?",
        "initiate": "INIT",
        "fetch_voltage": "FETC:VOLT?",
        "fetch_current": "FETC:CURR?",
        "fetch_power": "FETC:POW?",
    }

    def measure_voltage(self) -> float:
        return self.query_float("measure_voltage")

    def measure_current(self) -> float:
        return self.query_float("measure_current")

    def measure_power(self) -> float:
        return self.query_float("measure_power")

    def measure_all(self) -> tuple[float, float, float]:
        """(voltage V, current A, power W) of one integration: INITiate, then FETCh each.

        The instrument lock is held throughout, so no other reading of this meter (the
        interlock watch's) can start an integration in between. The whole exchange is a
        reading, not a setting: on a lost connection, a timeout or an unreadable answer to the
        error check after INITiate it is started again (INITiate, error check, the three
        FETCh), with the driver's usual retries; an unreadable reading is not retried."""
        init = self.command("initiate")
        fetches = [self.command(k) for k in ("fetch_voltage", "fetch_current", "fetch_power")]

        def exchange() -> tuple[float, float, float]:
            self.send(init)
            try:
                self._check_setting(init)  # a meter without INITiate says so here (ScpiError, not retried)
            except InstrumentResponseError as exc:  # the check's answer garbled: start the integration again
                raise _CheckUnreadable(exc.detail, instrument=self.name, command=init) from exc
            values = []
            for text in fetches:
                answer = self.ask(text)
                try:
                    value = float(answer.split(",")[0])
                except ValueError:
                    self.raise_on_errors(text)
                    raise InstrumentResponseError(f"expected a number, got {answer!r}", instrument=self.name,
                                                  command=text) from None
                if not math.isfinite(value):
                    raise InstrumentResponseError(f"expected a finite number, got {answer!r}",
                                                  instrument=self.name, command=text)
                values.append(value)
            return values[0], values[1], values[2]

        with self._lock:
            return self._retrying(init, exchange, retry_on=(InstrumentTimeout, InstrumentConnectionError,
                                                            _CheckUnreadable))

    def set_averaging(self, count: int) -> None:
        if count < 1:
            raise UsageError(f"averaging count must be >= 1, not {count}")
        self.write("set_averaging", count=int(count))

    def averaging(self) -> int:
        return int(self.query_float("get_averaging"))
