"""Switch matrix / multiplexer that connects the bench to one of several DUTs (or probe points).

Commands on SCPI-1999 Vol. 2 ROUTe names: ``ROUTe:CLOSe <n>``, ``ROUTe:CLOSe?``, ``ROUTe:OPEN:ALL``
(a single channel number rather than a channel list; override the templates per station for an
instrument that takes ``(@n)``). :meth:`SwitchMatrix.select` opens every relay, closes the one
channel and reads it back (break before make, verified).
"""

from __future__ import annotations

from typing import ClassVar

from benchctl.drivers.command_table import OptionSpec
from benchctl.drivers.scpi_driver import ScpiDriver
from benchctl.errors import InstrumentStateError, UsageError


class SwitchMatrix(ScpiDriver):
    """Channels 1 ... ``options.channels``; one closed at a time."""

    kind: ClassVar[str] = "switch_matrix"
    COMMANDS: ClassVar[dict[str, str]] = {
        "close": "ROUT:CLOS {channel:d}",
        "closed": "ROUT:CLOS?",
        "open_all": "ROUT:OPEN:ALL",
    }
    OPTIONS: ClassVar[dict[str, OptionSpec]] = {
        "channels": OptionSpec(16, 1, 1024, whole=True, help="how many channels the matrix has"),
    }

    @property
    def channels(self) -> int:
        return int(self.option("channels"))

    def open_all(self) -> None:
        self.write("open_all")

    def closed_channel(self) -> int:
        """The closed channel, 0 when every relay is open."""
        return int(round(self.query_float("closed")))

    def select(self, channel: int) -> None:
        """Open every relay, close ``channel`` and check the read-back."""
        if not (isinstance(channel, int) and 1 <= channel <= self.channels):
            raise UsageError(f"channel {channel!r} is not 1 ... {self.channels} (options.channels of {self.name})")
        self.open_all()
        self.write("close", channel=channel)
        got = self.closed_channel()
        if got != channel:
            raise InstrumentStateError(f"channel {channel} was closed but the matrix reads back {got}; check its "
                                       "wiring and relays before measuring", instrument=self.name,
                                       command=self.command("close", channel=channel))
