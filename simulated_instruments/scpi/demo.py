"""A small demonstration DC source built on the core, for examples and the core's tests.

It has no physics: it remembers its settings and "measures" the programmed voltage
while its output is on. Real simulated instruments live in
``simulated_instruments.instruments`` and share the converter model.
"""

from __future__ import annotations

from .errors import ScpiExecutionError
from .instrument import Identity, ScpiInstrument
from .params import Block, Boolean, Choice, Numeric, Text

DEMO_IDENTITY = Identity(maker="benchctl-sim", model="sim demo supply", serial="SN0001", firmware="0.1")


class DemoSource(ScpiInstrument):
    """An 80 V / 10 A two-output demonstration source.

    ``INITiate:SWEep <steps>`` starts a "sweep" that stays pending for ``steps``
    calls of :meth:`pending_done`, so ``*OPC?`` waiting is deterministic.
    """

    def __init__(self, **kwargs: object) -> None:
        super().__init__(DEMO_IDENTITY, **kwargs)  # type: ignore[arg-type]
        self.on_reset()
        self.add_command("[SOURce:]VOLTage[:LEVel][:IMMediate][:AMPLitude]", setter=self._set_voltage,
                         getter=lambda: self.voltage_v,
                         params=[Numeric(unit="V", minimum=0.0, maximum=80.0, default=0.0)])
        self.add_command("[SOURce:]VOLTage:PROTection[:LEVel]", setter=self._set_ovp, getter=lambda: self.ovp_v,
                         params=[Numeric(unit="V", minimum=1.0, maximum=88.0, default=88.0)])
        self.add_command("[SOURce:]CURRent[:LEVel][:IMMediate][:AMPLitude]", setter=self._set_current,
                         getter=lambda: self.current_limit_a,
                         params=[Numeric(unit="A", minimum=0.0, maximum=10.0, default=1.0)])
        self.add_command("[SOURce:]FUNCtion[:MODE]", setter=self._set_mode, getter=lambda: self.mode,
                         params=[Choice("VOLTage", "CURRent")])
        self.add_command("[SOURce:]LIST:VOLTage", setter=self._set_list, getter=lambda: self.list_data,
                         params=[Block()])
        self.add_command("OUTPut<n:1-2>[:STATe]", setter=self._set_output, getter=lambda n: self.outputs[n],
                         params=[Boolean()])
        self.add_command("MEASure[:SCALar]:VOLTage[:DC]", getter=self._measure_voltage,
                         params=[Numeric(unit="V", minimum=0.0, maximum=80.0, optional=True)])
        self.add_command("DISPlay:TEXT[:DATA]", setter=self._set_text, getter=lambda: f'"{self.display_text}"',
                         params=[Text()])
        self.add_command("INITiate:SWEep", setter=self._start_sweep,
                         params=[Numeric(minimum=0, maximum=1000, integer=True)])

    def on_reset(self) -> None:
        self.voltage_v = 0.0
        self.ovp_v = 88.0
        self.current_limit_a = 1.0
        self.mode = "VOLT"
        self.outputs = {1: False, 2: False}
        self.list_data = b""
        self.display_text = ""
        self.sweep_steps_left = 0
        self.last_measure_range_v: float | None = None

    def pending_done(self) -> bool:
        if self.sweep_steps_left > 0:
            self.sweep_steps_left -= 1
            return False
        return True

    def _set_voltage(self, value_v: float) -> None:
        if value_v > self.ovp_v:
            raise ScpiExecutionError(-221, "Settings conflict",
                                     f"VOLT {value_v:g} V is above the protection level {self.ovp_v:g} V")
        self.voltage_v = value_v
        self.audit_state("voltage_v", value_v)

    def _set_ovp(self, value_v: float) -> None:
        self.ovp_v = value_v
        self.audit_state("ovp_v", value_v)

    def _set_current(self, value_a: float) -> None:
        self.current_limit_a = value_a
        self.audit_state("current_limit_a", value_a)

    def _set_mode(self, mode: str) -> None:
        self.mode = mode
        self.audit_state("mode", mode)

    def _set_list(self, data: bytes) -> None:
        self.list_data = data
        self.audit_state("list_bytes", len(data))

    def _set_output(self, on: bool, n: int) -> None:
        self.outputs[n] = on
        self.audit_state(f"output{n}", on)

    def _set_text(self, text: str) -> None:
        self.display_text = text

    def _start_sweep(self, steps: int) -> None:
        self.sweep_steps_left = steps
        self.audit_state("sweep_steps", steps)

    def _measure_voltage(self, range_v: float | None) -> float:
        self.last_measure_range_v = range_v
        return self.voltage_v if self.outputs[1] else 0.0
