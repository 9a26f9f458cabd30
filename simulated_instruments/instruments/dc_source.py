"""A simulated programmable DC source feeding the converter model's input.

Voltage setpoint, current limit, over-voltage protection (OVP), output switch, and
measured output voltage and current at the source terminals. When the programmed
voltage or the measured terminal voltage exceeds the OVP level while the output is on,
the protection trips: the output turns off and stays off until cleared.

Read-back: each MEASure query integrates over the aperture (``[SENSe:]APERture[:TIME]``,
default 20 ms; see ``aperture``) and answers the mean plus the source's own error,
always inside its documented accuracy ``ACCURACY``:

    voltage  100 V: ±(0.03 % + 10 mV)
    current  1 A: ±(0.05 % + 0.5 mA)   10 A: ±(0.05 % + 2 mA)
"""

from __future__ import annotations

import time
from collections.abc import Callable

from ..scpi import Boolean, Identity, Numeric, ScpiInstrument
from .accuracy import InstrumentErrors, QuantityAccuracy, ranged, single
from .aperture import APERTURE_RANGE_S, DEFAULT_APERTURE_S, Aperture


class SimulatedDcSource(ScpiInstrument):
    """A 100 V / 10 A DC source."""

    VOLTAGE_MAX_V = 100.0
    CURRENT_MAX_A = 10.0
    OVP_MAX_V = 110.0
    ACCURACY: dict[str, QuantityAccuracy] = {
        "voltage": single("V", 100.0, 0.03, 10e-3),
        "current": ranged("A", (1.0, 0.05, 0.5e-3), (10.0, 0.05, 2e-3)),
    }

    def __init__(self, model, *, serial: str = "S1001", seed: int = 0, aperture_s: float = DEFAULT_APERTURE_S,
                 sleep: Callable[[float], None] = time.sleep) -> None:
        super().__init__(Identity(maker="benchctl-sim", model="sim dc source", serial=serial, firmware="1.0"))
        self.model = model
        self.errors = InstrumentErrors(self.ACCURACY, [seed, 1])
        self.aperture = Aperture(model.clock, aperture_s, sleep)
        self._reset_state()
        self.add_command("[SOURce:]VOLTage[:LEVel][:IMMediate][:AMPLitude]", setter=self._set_voltage,
                         getter=lambda: self.voltage_v,
                         params=[Numeric(unit="V", minimum=0.0, maximum=self.VOLTAGE_MAX_V, default=0.0)])
        self.add_command("[SOURce:]CURRent[:LEVel][:IMMediate][:AMPLitude]", setter=self._set_current,
                         getter=lambda: self.current_limit_a,
                         params=[Numeric(unit="A", minimum=0.0, maximum=self.CURRENT_MAX_A, default=1.0)])
        self.add_command("[SOURce:]VOLTage:PROTection[:LEVel]", setter=self._set_ovp, getter=lambda: self.ovp_v,
                         params=[Numeric(unit="V", minimum=0.0, maximum=self.OVP_MAX_V, default=self.OVP_MAX_V)])
        self.add_command("[SOURce:]VOLTage:PROTection:TRIPped", getter=lambda: self.ovp_tripped)
        self.add_command("OUTPut:PROTection:CLEar", setter=self._clear_protection)
        self.add_command("OUTPut[:STATe]", setter=self._set_output, getter=lambda: self.output_on, params=[Boolean()])
        self.add_command("MEASure[:SCALar]:VOLTage[:DC]", getter=self._measure_voltage)
        self.add_command("MEASure[:SCALar]:CURRent[:DC]", getter=self._measure_current)
        lo, hi = APERTURE_RANGE_S
        self.add_command("[SENSe:]APERture[:TIME]", setter=self.aperture.set, getter=lambda: self.aperture.seconds,
                         params=[Numeric(unit="S", minimum=lo, maximum=hi, default=self.aperture.default_s)])

    def _reset_state(self) -> None:
        self.voltage_v = 0.0
        self.current_limit_a = 1.0
        self.ovp_v = self.OVP_MAX_V
        self.output_on = False
        self.ovp_tripped = False
        self._apply()

    def on_reset(self) -> None:
        was_on = self.output_on
        self.aperture.reset()
        self._reset_state()
        if was_on:
            self.audit_state("output", False)

    def _apply(self) -> None:
        self.model.set_source(self.voltage_v, self.current_limit_a, self.output_on)

    def _check_ovp(self) -> None:
        if not self.output_on:
            return
        if self.voltage_v > self.ovp_v or self.model.terminals().source_v > self.ovp_v:
            self.output_on = False
            self.ovp_tripped = True
            self._apply()
            self.audit_state("output", False)
            self.audit_state("ovp_tripped", True)

    def _set_voltage(self, value: float) -> None:
        self.voltage_v = value
        self._apply()
        self._check_ovp()

    def _set_current(self, value: float) -> None:
        self.current_limit_a = value
        self._apply()

    def _set_ovp(self, value: float) -> None:
        self.ovp_v = value
        self._check_ovp()

    def _clear_protection(self) -> None:
        self.ovp_tripped = False

    def _set_output(self, on: bool) -> None:
        if on and self.ovp_tripped:
            from ..scpi import ScpiExecutionError

            raise ScpiExecutionError(-221, "Settings conflict", "OVP tripped; send OUTP:PROT:CLE first")
        changed = bool(on) != self.output_on
        self.output_on = bool(on)
        self._apply()
        if changed:
            self.audit_state("output", self.output_on)
        self._check_ovp()

    def _read(self, quantity: str) -> float:
        interval = self.aperture.integrate()
        self._check_ovp()
        m = self.model.mean_terminals(interval.t0_s, interval.t1_s)
        return self.errors.read(quantity, m.source_v if quantity == "voltage" else m.source_a)

    def _measure_voltage(self) -> float:
        self._check_ovp()
        return self._read("voltage")

    def _measure_current(self) -> float:
        self._check_ovp()
        return self._read("current")
