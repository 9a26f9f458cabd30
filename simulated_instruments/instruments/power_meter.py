"""A simulated DC power meter at the converter's input or output terminals.

Reads voltage, current and power at the DUT terminals it is wired to (``side`` =
"input" or "output").  Every reading integrates over its aperture (default 20 ms, one
50 Hz line cycle; see ``aperture``) and answers the mean plus the meter's own error,
always inside the documented accuracy ``ACCURACY`` (see ``accuracy``):

    voltage  10 V: ±(0.01 % + 0.5 mV)    100 V: ±(0.01 % + 5 mV)    600 V: ±(0.01 % + 30 mV)
    current  10 mA: ±(0.02 % + 1 µA)     100 mA: ±(0.02 % + 10 µA)  1 A: ±(0.02 % + 0.1 mA)
             10 A: ±(0.02 % + 1 mA)      30 A: ±(0.02 % + 3 mA)
    power    0.1 W: ±(0.02 % + 5 µW)     1 W: ±(0.02 % + 0.05 mW)   10 W: ±(0.02 % + 0.5 mW)
             100 W: ±(0.02 % + 5 mW)     1000 W: ±(0.03 % + 50 mW)  18 kW: ±(0.03 % + 0.9 W)
    (auto-ranging: the smallest range that holds the reading)

Commands (SCPI-1999 measurement model; our own instrument)::

    MEASure[:SCALar]:VOLTage|CURRent|POWer[:DC]?   one integration of its own, then its answer
    INITiate[:IMMediate]                           start one integration of V, I and P together
    FETCh[:SCALar]:VOLTage|CURRent|POWer[:DC]?     the last integration's answer (waits for it)
    READ[:SCALar]:VOLTage|CURRent|POWer[:DC]?      INITiate then FETCh
    [SENSe:]APERture[:TIME] <s>                    integration time, 10 µs … 10 s (wall time)
    [SENSe:]AVERage:COUNt <n>                      N apertures per reading, noise / √N

``*OPC?`` waits for an integration started by INITiate.  To read V, I and P of one
interval send ``INIT`` then ``FETC:VOLT?;CURR?;POW?``; three MEASure queries take three
intervals one after another.
"""

from __future__ import annotations

import time
from collections.abc import Callable
from typing import Literal

from ..scpi import Identity, Numeric, ScpiInstrument
from ..scpi.errors import ScpiExecutionError
from .accuracy import InstrumentErrors, QuantityAccuracy, ranged
from .aperture import APERTURE_RANGE_S, DEFAULT_APERTURE_S, Aperture, Interval

_QUANTITIES = ("voltage", "current", "power")


class SimulatedPowerMeter(ScpiInstrument):
    """A precision DC power meter."""

    ACCURACY: dict[str, QuantityAccuracy] = {
        "voltage": ranged("V", (10.0, 0.01, 0.5e-3), (100.0, 0.01, 5e-3), (600.0, 0.01, 30e-3)),
        "current": ranged("A", (0.01, 0.02, 1e-6), (0.1, 0.02, 10e-6), (1.0, 0.02, 0.1e-3), (10.0, 0.02, 1e-3),
                          (30.0, 0.02, 3e-3)),
        "power": ranged("W", (0.1, 0.02, 5e-6), (1.0, 0.02, 0.05e-3), (10.0, 0.02, 0.5e-3), (100.0, 0.02, 5e-3),
                        (1000.0, 0.03, 50e-3), (18000.0, 0.03, 0.9)),
    }

    def __init__(self, model, side: Literal["input", "output"], *, serial: str = "M3001", seed: int = 0,
                 aperture_s: float = DEFAULT_APERTURE_S, sleep: Callable[[float], None] = time.sleep) -> None:
        if side not in ("input", "output"):
            raise ValueError(f"side must be 'input' or 'output', not {side!r}")
        super().__init__(Identity(maker="benchctl-sim", model="sim power meter", serial=serial, firmware="1.0"), sleep=sleep)
        self.model = model
        self.side = side
        self.errors = InstrumentErrors(self.ACCURACY, [seed, 3 if side == "input" else 4])
        self.aperture = Aperture(model.clock, aperture_s, sleep)
        self.averaging = 1
        self._pending: Interval | None = None
        self._fetched: tuple[float, float, float] | None = None
        lo, hi = APERTURE_RANGE_S
        self.add_command("[SENSe:]AVERage:COUNt", setter=self._set_averaging, getter=lambda: self.averaging,
                         params=[Numeric(minimum=1, maximum=1024, default=1, integer=True)])
        self.add_command("[SENSe:]APERture[:TIME]", setter=self.aperture.set, getter=lambda: self.aperture.seconds,
                         params=[Numeric(unit="S", minimum=lo, maximum=hi, default=self.aperture.default_s)])
        for k, word in enumerate(("VOLTage", "CURRent", "POWer")):
            self.add_command(f"MEASure[:SCALar]:{word}[:DC]", getter=self._measure_getter(k))
            self.add_command(f"READ[:SCALar]:{word}[:DC]", getter=self._measure_getter(k))
            self.add_command(f"FETCh[:SCALar]:{word}[:DC]", getter=self._fetch_getter(k))
        self.add_command("INITiate[:IMMediate]", setter=self._initiate)

    def on_reset(self) -> None:
        self.averaging = 1
        self.aperture.reset()
        self._pending = None
        self._fetched = None

    def pending_done(self) -> bool:
        pending = self._pending
        return pending is None or self.aperture.done(pending)

    def _set_averaging(self, count: float) -> None:
        self.averaging = int(count)

    def _initiate(self) -> None:
        self._pending = self.aperture.start(self.averaging)
        self._fetched = None

    def _measure_getter(self, k: int):
        def measure() -> float:
            self._initiate()
            return self._fetch()[k]
        return measure

    def _fetch_getter(self, k: int):
        def fetch() -> float:
            return self._fetch()[k]
        return fetch

    def _fetch(self) -> tuple[float, float, float]:
        if self._fetched is not None:
            return self._fetched
        if self._pending is None:
            raise ScpiExecutionError(-230, "Data corrupt or stale", "no integration to fetch; send INIT first")
        interval = self.aperture.wait(self._pending)
        m = self.model.mean_terminals(interval.t0_s, interval.t1_s)
        if self.side == "input":
            true = (m.input_v, m.input_a, m.input_w)
        else:
            true = (m.output_v, m.output_a, m.output_w)
        n = self.averaging
        self._fetched = tuple(self.errors.read(q, x, n) for q, x in zip(_QUANTITIES, true))  # type: ignore[assignment]
        return self._fetched  # type: ignore[return-value]
