"""A simulated DC power meter / DMM at the converter's input or output terminals.

Reads voltage, current and power at the DUT terminals it is wired to (``side`` =
"input" or "output") with a noise of its own; ``[SENSe:]AVERage:COUNt`` averages N
readings, dividing the noise by √N.
"""

from __future__ import annotations

from typing import Literal

from ..scpi import Identity, Numeric, ScpiInstrument
from .noise import MeterNoise, NoiseSpec


class SimulatedPowerMeter(ScpiInstrument):
    """A precision DC power meter."""

    VOLTAGE_NOISE = NoiseSpec(gain_ppm=20.0, offset=5e-5)
    CURRENT_NOISE = NoiseSpec(gain_ppm=50.0, offset=2e-5)
    POWER_NOISE = NoiseSpec(gain_ppm=80.0, offset=2e-5)

    def __init__(self, model, side: Literal["input", "output"], *, serial: str = "M3001", seed: int = 0) -> None:
        if side not in ("input", "output"):
            raise ValueError(f"side must be 'input' or 'output', not {side!r}")
        super().__init__(Identity(maker="benchctl-sim", model="PWM-600", serial=serial, firmware="1.0"))
        self.model = model
        self.side = side
        self._noise = MeterNoise([seed, 3 if side == "input" else 4])
        self.averaging = 1
        self.add_command("[SENSe:]AVERage:COUNt", setter=self._set_averaging, getter=lambda: self.averaging,
                         params=[Numeric(minimum=1, maximum=1024, default=1, integer=True)])
        self.add_command("MEASure[:SCALar]:VOLTage[:DC]", getter=lambda: self._read()[0])
        self.add_command("MEASure[:SCALar]:CURRent[:DC]", getter=lambda: self._read()[1])
        self.add_command("MEASure[:SCALar]:POWer[:DC]", getter=lambda: self._read()[2])

    def on_reset(self) -> None:
        self.averaging = 1

    def _set_averaging(self, count: float) -> None:
        self.averaging = int(count)

    def _read(self) -> tuple[float, float, float]:
        t = self.model.terminals()
        if self.side == "input":
            v, i = t.input_v, t.input_a
        else:
            v, i = t.output_v, t.output_a
        n = self.averaging
        return (
            self._noise.add(v, self.VOLTAGE_NOISE, n),
            self._noise.add(i, self.CURRENT_NOISE, n),
            self._noise.add(v * i, self.POWER_NOISE, n),
        )
