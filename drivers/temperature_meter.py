"""Multi-channel temperature meter (thermocouples on the ambient and the DUT's hot spots).

Our own command set (no SCPI-1999 subsystem covers a channel-labelled thermocouple scanner
this way): MEASure:TEMPerature<n>? reads channel n in °C, ROUTe:CHANnel:COUNt? and
ROUTe:CHANnel<n>:LABel? say what each channel is fixed to. A procedure names channels by
label ("ambient", "switch", "rectifier" ...), so it works whichever input a thermocouple
is wired to; a station with another meter overrides the templates
(``[instruments.temp_meter.commands] measure_temperature = "MEAS:TEMP? (@{channel:d})"``).
"""

from __future__ import annotations

from typing import ClassVar

from benchctl.drivers.scpi_driver import ScpiDriver
from benchctl.errors import UsageError


class TemperatureMeter(ScpiDriver):
    """Temperatures by channel label, °C."""

    kind: ClassVar[str] = "temperature_meter"
    COMMANDS: ClassVar[dict[str, str]] = {
        "measure_temperature": "MEAS:TEMP{channel:d}?",
        "channel_count": "ROUT:CHAN:COUN?",
        "channel_label": "ROUT:CHAN{channel:d}:LAB?",
    }

    _labels: tuple[str, ...] | None = None

    def channels(self) -> tuple[str, ...]:
        """The channel labels in channel order (lower case), read once from the meter."""
        if self._labels is None:
            count = int(self.query_float("channel_count"))
            self._labels = tuple(self.query("channel_label", channel=k).strip().strip('"').lower()
                                 for k in range(1, count + 1))
        return self._labels

    def channel_number(self, channel: str | int) -> int:
        """Channel number (1 …) of a label or a number."""
        labels = self.channels()
        if isinstance(channel, int) and not isinstance(channel, bool):
            if 1 <= channel <= len(labels):
                return channel
        elif isinstance(channel, str) and channel.lower() in labels:
            return labels.index(channel.lower()) + 1
        raise UsageError(f"{self.name}: no channel {channel!r}; channels: "
                         f"{', '.join(f'{k + 1} {name}' for k, name in enumerate(labels))}")

    def measure_temperature(self, channel: str | int) -> float:
        """Temperature of ``channel`` (label or number), °C."""
        return self.query_float("measure_temperature", channel=self.channel_number(channel))
