"""A simulated function generator whose output is coupled into the DUT's input line.

The fixture between the generator and the DUT is an injection transformer in series with
the DC source's lead (secondary in the line, primary on the generator): it passes the
generator's AC output with a gain ``coupling_v_per_v`` (V at the DUT input per V at the
generator) and blocks DC, so the offset never reaches the DUT. The converter model adds the
coupled sine to its input voltage (``ConverterModel.set_line_injection``) and answers it
through its line-to-output transfer. Amplitudes are peak-to-peak at the generator's output
(common practice for generators); the DUT sees ``coupling_v_per_v × Vpp / 2`` peak.

Command set (our own, on SCPI-1999 SOURce/OUTPut names)::

    [SOURce:]FUNCtion[:SHAPe] SINusoid|DC
    [SOURce:]FREQuency[:CW] <Hz>                 1 mHz ... 10 MHz
    [SOURce:]VOLTage[:LEVel][:IMMediate][:AMPLitude] <Vpp>   0 ... 20 Vpp
    [SOURce:]VOLTage:OFFSet <V>                  -10 ... 10 V (blocked by the transformer)
    OUTPut[:STATe] ON|OFF
    FIXTure:COUPling:GAIN?                       the injection transformer's V/V (the fixture)
"""

from __future__ import annotations

from ..scpi import Boolean, Choice, Identity, Numeric, ScpiInstrument


class SimulatedFunctionGenerator(ScpiInstrument):
    """A one-channel sine/DC generator, 10 MHz, 20 Vpp, through an injection transformer."""

    FREQUENCY_MAX_HZ = 10e6
    AMPLITUDE_MAX_VPP = 20.0
    OFFSET_MAX_V = 10.0

    def __init__(self, model, *, serial: str = "G1001", coupling_v_per_v: float = 1.0) -> None:
        super().__init__(Identity(maker="benchctl-sim", model="sim line injector", serial=serial, firmware="1.0"))
        if not coupling_v_per_v > 0.0:
            raise ValueError(f"coupling_v_per_v={coupling_v_per_v!r} must be > 0 V/V (the injection transformer's gain)")
        self.model = model
        self.coupling_v_per_v = float(coupling_v_per_v)
        self._reset_state()
        self.add_command("[SOURce:]FUNCtion[:SHAPe]", setter=self._set("function"), getter=lambda: self.function,
                         params=[Choice("SINusoid", "DC")])
        self.add_command("[SOURce:]FREQuency[:CW]", setter=self._set("frequency_hz"), getter=lambda: self.frequency_hz,
                         params=[Numeric(unit="HZ", minimum=1e-3, maximum=self.FREQUENCY_MAX_HZ, default=1e3)])
        self.add_command("[SOURce:]VOLTage[:LEVel][:IMMediate][:AMPLitude]", setter=self._set("amplitude_vpp"),
                         getter=lambda: self.amplitude_vpp,
                         params=[Numeric(unit="V", minimum=0.0, maximum=self.AMPLITUDE_MAX_VPP, default=0.1)])
        self.add_command("[SOURce:]VOLTage:OFFSet", setter=self._set("offset_v"), getter=lambda: self.offset_v,
                         params=[Numeric(unit="V", minimum=-self.OFFSET_MAX_V, maximum=self.OFFSET_MAX_V, default=0.0)])
        self.add_command("OUTPut[:STATe]", setter=self._set_output, getter=lambda: self.output_on, params=[Boolean()])
        self.add_command("FIXTure:COUPling:GAIN", getter=lambda: self.coupling_v_per_v)

    def _reset_state(self) -> None:
        self.function = "SIN"
        self.frequency_hz = 1e3
        self.amplitude_vpp = 0.1
        self.offset_v = 0.0
        self.output_on = False
        self._apply()

    def on_reset(self) -> None:
        was_on = self.output_on
        self._reset_state()
        if was_on:
            self.audit_state("output", False)

    def _set(self, attr: str):
        def set_(value) -> None:
            setattr(self, attr, value)
            self._apply()
        return set_

    def _set_output(self, on: bool) -> None:
        changed = bool(on) != self.output_on
        self.output_on = bool(on)
        self._apply()
        if changed:
            self.audit_state("output", self.output_on)

    def _apply(self) -> None:
        sine = self.output_on and self.function.startswith("SIN") and self.amplitude_vpp > 0.0
        amplitude_v = self.coupling_v_per_v * self.amplitude_vpp / 2.0
        self.model.set_line_injection(amplitude_v if sine else 0.0, self.frequency_hz, sine)
