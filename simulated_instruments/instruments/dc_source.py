"""A simulated programmable DC source feeding the converter model's input.

Voltage setpoint, current limit, over-voltage protection (OVP), output switch, and
measured output voltage and current (at the source terminals, with noise). When the
programmed voltage or the measured terminal voltage exceeds the OVP level while the
output is on, the protection trips: the output turns off and stays off until cleared.
"""

from __future__ import annotations

from ..scpi import Boolean, Identity, Numeric, ScpiInstrument
from .noise import MeterNoise, NoiseSpec


class SimulatedDcSource(ScpiInstrument):
    """A 100 V / 10 A DC source."""

    VOLTAGE_MAX_V = 100.0
    CURRENT_MAX_A = 10.0
    OVP_MAX_V = 110.0
    VOLTAGE_NOISE = NoiseSpec(gain_ppm=50.0, offset=1e-3)
    CURRENT_NOISE = NoiseSpec(gain_ppm=200.0, offset=2e-4)

    def __init__(self, model, *, serial: str = "S1001", seed: int = 0) -> None:
        super().__init__(Identity(maker="benchctl-sim", model="DCS-100-10", serial=serial, firmware="1.0"))
        self.model = model
        self._noise = MeterNoise([seed, 1])
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

    def _reset_state(self) -> None:
        self.voltage_v = 0.0
        self.current_limit_a = 1.0
        self.ovp_v = self.OVP_MAX_V
        self.output_on = False
        self.ovp_tripped = False
        self._apply()

    def on_reset(self) -> None:
        was_on = self.output_on
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

    def _measure_voltage(self) -> float:
        self._check_ovp()
        return self._noise.add(self.model.terminals().source_v, self.VOLTAGE_NOISE)

    def _measure_current(self) -> float:
        self._check_ovp()
        return self._noise.add(self.model.terminals().source_a, self.CURRENT_NOISE)
