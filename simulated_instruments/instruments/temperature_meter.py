"""A simulated multi-channel temperature meter (thermocouples on the DUT and in its air).

Channel 1 is the ambient (a thermocouple in the air beside the DUT: the chamber air, or
the design's ambient without a chamber); channels 2 … are the DUT's hot spots, one per
part the converter model gives a thermal node (flyback: switch, rectifier, transformer;
buck: switch, sync_rectifier, inductor; :mod:`..converter.component_thermal`).  Each
reading takes its aperture (wall time, default 20 ms; ``[SENSe:]APERture``) and answers the
mean of the true temperature over it (Simpson's rule on the start, middle and end; the
temperatures move over tens of seconds) plus the meter's error, inside its documented
accuracy ``TEMPERATURE_ACCURACY``: ±0.5 °C per channel, the tolerance of a class-1 type-T
thermocouple with its reference junction compensated (common practice; IEC 60584-1 class 1,
from memory).  Each channel has its own fixed error (its thermocouple) and noise.

Commands (our own)::

    MEASure:TEMPerature<n>?        channel n, °C (n = 1 … ROUTe:CHANnel:COUNt?)
    ROUTe:CHANnel:COUNt?           number of channels
    ROUTe:CHANnel<n>:LABel?        what channel n is fixed to (AMBIENT, SWITCH, ...)
    [SENSe:]APERture[:TIME] <s>    reading time, 10 µs … 10 s (wall time)
"""

from __future__ import annotations

import time
from collections.abc import Callable

from ..scpi import Identity, Numeric, ScpiInstrument
from ..scpi.errors import ScpiExecutionError
from .accuracy import InstrumentErrors, QuantityAccuracy, single
from .aperture import APERTURE_RANGE_S, DEFAULT_APERTURE_S, Aperture

#: ±0.5 °C, one range up to 400 °C (a °C reading has no meaningful "% of reading" term).
ACCURACY_K = 0.5
AMBIENT = "ambient"


class SimulatedTemperatureMeter(ScpiInstrument):
    """Thermocouple meter: the ambient plus the DUT's hot spots."""

    def __init__(self, model, *, serial: str = "T1001", seed: int = 0, aperture_s: float = DEFAULT_APERTURE_S,
                 sleep: Callable[[float], None] = time.sleep) -> None:
        super().__init__(Identity(maker="benchctl-sim", model="sim temperature meter", serial=serial,
                                  firmware="1.0"), sleep=sleep)
        self.model = model
        self.labels: tuple[str, ...] = (AMBIENT, *model.component_names)
        #: what the station file states (one specification for every channel)
        self.ACCURACY: dict[str, QuantityAccuracy] = {"temperature": single("C", 400.0, 0.0, ACCURACY_K)}
        self.TEMPERATURE_ACCURACY: dict[str, QuantityAccuracy] = {
            f"temperature{k}": single("C", 400.0, 0.0, ACCURACY_K) for k in range(1, len(self.labels) + 1)}
        self.errors = InstrumentErrors(self.TEMPERATURE_ACCURACY, [seed, 7])
        self.aperture = Aperture(model.clock, aperture_s, sleep)
        count = len(self.labels)
        lo, hi = APERTURE_RANGE_S
        self.add_command("[SENSe:]APERture[:TIME]", setter=self.aperture.set, getter=lambda: self.aperture.seconds,
                         params=[Numeric(unit="S", minimum=lo, maximum=hi, default=self.aperture.default_s)])
        self.add_command("MEASure:TEMPerature<n>", getter=self._measure)
        self.add_command("ROUTe:CHANnel:COUNt", getter=lambda: count)
        self.add_command("ROUTe:CHANnel<n>:LABel", getter=self._label)

    def on_reset(self) -> None:
        self.aperture.reset()

    def _channel(self, n: int) -> str:
        if not 1 <= n <= len(self.labels):
            raise ScpiExecutionError(-114, "Header suffix out of range",
                                     f"channel {n}; this meter has channels 1-{len(self.labels)}")
        return self.labels[n - 1]

    def _label(self, n: int = 1) -> str:
        return self._channel(n).upper()

    def true_temperature_c(self, label: str, t_s: float | None = None) -> float:
        """The true temperature of channel ``label`` at model time ``t_s`` (default now); for tests."""
        if label == AMBIENT:
            return float(self.model.ambient_c if t_s is None else self.model._ambient_at(t_s))
        return float(self.model.component_temperatures_c(t_s)[label])

    def _measure(self, n: int = 1) -> float:
        label = self._channel(n)
        interval = self.aperture.integrate()
        t0, t1 = interval.t0_s, interval.t1_s
        samples = [self.true_temperature_c(label, t) for t in (t0, 0.5 * (t0 + t1), t1)]
        true = (samples[0] + 4.0 * samples[1] + samples[2]) / 6.0
        return self.errors.read(f"temperature{n}", true)
