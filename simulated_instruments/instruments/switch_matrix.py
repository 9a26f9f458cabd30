"""A simulated relay multiplexer that connects the bench to one of several DUTs.

Each channel routes the source, the load, the meters and the probes to one DUT at once (a
fixture of ganged relays); closing a channel opens the one closed before it first
(break before make). The DUTs sit behind a :class:`..dut_selector.DutSelector`, which every
other instrument holds as its model: closing channel n points it at DUT n, and a DUT that
is not connected is unpowered.

Command set (our own, on SCPI-1999 ROUTe names)::

    ROUTe:CLOSe <n>        connect DUT n (1 ... channels), opening any other first
    ROUTe:CLOSe?           the closed channel, 0 when all are open
    ROUTe:OPEN:ALL         open every relay
    ROUTe:CHANnels?        how many channels the matrix has

Every change is in the audit log as state ``channel`` (0 = all open); a change made while
the source's output was on (a hot switch, which welds relays and stresses the DUT) is also
logged as state ``hot_switch`` with the channel, so tests can prove it never happens.
"""

from __future__ import annotations

from ..scpi import Identity, Numeric, ScpiInstrument


class SimulatedSwitchMatrix(ScpiInstrument):
    """An N-channel DUT multiplexer (ganged relays per channel)."""

    def __init__(self, selector, *, serial: str = "X1001", initial_channel: int = 0) -> None:
        super().__init__(Identity(maker="benchctl-sim", model="sim dut multiplexer", serial=serial, firmware="1.0"))
        self.selector = selector
        self.channels = selector.count
        self.add_command("ROUTe:CLOSe", setter=self._close, getter=lambda: self.selector.selected,
                         params=[Numeric(minimum=1, maximum=self.channels, integer=True)])
        self.add_command("ROUTe:OPEN:ALL", setter=self._open_all)
        self.add_command("ROUTe:CHANnels", getter=lambda: self.channels)
        if initial_channel:
            self.selector.select(int(initial_channel))

    def on_reset(self) -> None:
        self._open_all()

    def _change(self, channel: int) -> None:
        if channel == self.selector.selected:
            return
        if self.selector.source_enabled:
            self.audit_state("hot_switch", channel)
        self.selector.select(channel)
        self.audit_state("channel", channel)

    def _close(self, channel: int) -> None:
        self._change(0)          # break before make
        self._change(int(channel))

    def _open_all(self) -> None:
        self._change(0)
