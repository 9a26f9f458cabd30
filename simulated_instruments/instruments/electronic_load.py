"""A simulated electronic load drawing the converter model's output.

Constant-current (CC) and constant-resistance (CR) modes, input switch, its own
over-current and over-power protection (trip: input off until switched on again), and
measured voltage, current and power at its terminals with noise.
"""

from __future__ import annotations

from ..scpi import Boolean, Choice, Identity, Numeric, ScpiInstrument
from .noise import MeterNoise, NoiseSpec


class SimulatedElectronicLoad(ScpiInstrument):
    """A 150 V / 30 A / 300 W electronic load."""

    CURRENT_MAX_A = 30.0
    POWER_MAX_W = 300.0
    RESISTANCE_RANGE_OHM = (0.02, 10000.0)
    VOLTAGE_NOISE = NoiseSpec(gain_ppm=50.0, offset=2e-4)
    CURRENT_NOISE = NoiseSpec(gain_ppm=200.0, offset=5e-4)

    def __init__(self, model, *, serial: str = "L2001", seed: int = 0) -> None:
        super().__init__(Identity(maker="benchctl-sim", model="ELD-150-30", serial=serial, firmware="1.0"))
        self.model = model
        self._noise = MeterNoise([seed, 2])
        self._reset_state()
        self.add_command("[SOURce:]FUNCtion[:MODE]", setter=self._set_mode, getter=lambda: self.mode,
                         params=[Choice("CURRent", "RESistance")])
        self.add_command("[SOURce:]CURRent[:LEVel][:IMMediate][:AMPLitude]", setter=self._set_current,
                         getter=lambda: self.current_a,
                         params=[Numeric(unit="A", minimum=0.0, maximum=self.CURRENT_MAX_A, default=0.0)])
        lo, hi = self.RESISTANCE_RANGE_OHM
        self.add_command("[SOURce:]RESistance[:LEVel][:IMMediate][:AMPLitude]", setter=self._set_resistance,
                         getter=lambda: self.resistance_ohm,
                         params=[Numeric(unit="OHM", minimum=lo, maximum=hi, default=hi)])
        self.add_command("[SOURce:]CURRent:PROTection[:LEVel]", setter=self._set_ocp, getter=lambda: self.ocp_a,
                         params=[Numeric(unit="A", minimum=0.0, maximum=self.CURRENT_MAX_A * 1.1, default=self.CURRENT_MAX_A * 1.1)])
        self.add_command("[SOURce:]POWer:PROTection[:LEVel]", setter=self._set_opp, getter=lambda: self.opp_w,
                         params=[Numeric(unit="W", minimum=0.0, maximum=self.POWER_MAX_W * 1.1, default=self.POWER_MAX_W * 1.1)])
        self.add_command("INPut:PROTection:TRIPped", getter=lambda: self.protection_tripped)
        self.add_command("INPut[:STATe]", setter=self._set_input, getter=lambda: self.input_on, params=[Boolean()])
        self.add_command("MEASure[:SCALar]:VOLTage[:DC]", getter=self._measure_voltage)
        self.add_command("MEASure[:SCALar]:CURRent[:DC]", getter=self._measure_current)
        self.add_command("MEASure[:SCALar]:POWer[:DC]", getter=self._measure_power)

    def _reset_state(self) -> None:
        self.mode = "CURR"
        self.current_a = 0.0
        self.resistance_ohm = self.RESISTANCE_RANGE_OHM[1]
        self.ocp_a = self.CURRENT_MAX_A * 1.1
        self.opp_w = self.POWER_MAX_W * 1.1
        self.input_on = False
        self.protection_tripped = False
        self._apply()

    def on_reset(self) -> None:
        was_on = self.input_on
        self._reset_state()
        if was_on:
            self.audit_state("input", False)

    def _apply(self) -> None:
        if self.mode == "CURR":
            self.model.set_load("CC", self.current_a, self.input_on)
        else:
            self.model.set_load("CR", self.resistance_ohm, self.input_on)

    def _check_protection(self) -> None:
        if not self.input_on:
            return
        t = self.model.terminals()
        if t.output_a > self.ocp_a or t.output_v * t.output_a > self.opp_w:
            self.input_on = False
            self.protection_tripped = True
            self._apply()
            self.audit_state("input", False)
            self.audit_state("protection_tripped", True)

    def _set_mode(self, mode: str) -> None:
        self.mode = mode  # the core hands over the short form: CURR or RES
        self._apply()

    def _set_current(self, value: float) -> None:
        self.current_a = value
        self._apply()
        self._check_protection()

    def _set_resistance(self, value: float) -> None:
        self.resistance_ohm = value
        self._apply()
        self._check_protection()

    def _set_ocp(self, value: float) -> None:
        self.ocp_a = value

    def _set_opp(self, value: float) -> None:
        self.opp_w = value

    def _set_input(self, on: bool) -> None:
        changed = bool(on) != self.input_on
        self.input_on = bool(on)
        if on:
            self.protection_tripped = False
        self._apply()
        if changed:
            self.audit_state("input", self.input_on)

    def _measure_voltage(self) -> float:
        self._check_protection()
        return self._noise.add(self.model.terminals().output_v, self.VOLTAGE_NOISE)

    def _measure_current(self) -> float:
        self._check_protection()
        return self._noise.add(self.model.terminals().output_a, self.CURRENT_NOISE)

    def _measure_power(self) -> float:
        self._check_protection()
        t = self.model.terminals()
        return self._noise.add(t.output_v * t.output_a, NoiseSpec(gain_ppm=300.0, offset=1e-3))
