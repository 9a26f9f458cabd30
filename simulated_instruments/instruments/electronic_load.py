"""A simulated electronic load drawing the converter model's output.

Constant-current (CC) and constant-resistance (CR) modes, input switch, its own
over-current and over-power protection (trip: input off until switched on again), and
measured voltage, current and power at its terminals.

A new static level is not drawn at once: the current moves to it at the static slew
rate, ``[SOURce:]CURRent:SLEW[:BOTH] <A/s>`` (100 A/s … 2.5e9 A/s, default
``STATIC_SLEW_A_PER_S`` = 1000 A/s = 1 A/ms: the slow setting used for static steps so a
step neither trips the DUT nor rings its loop; 0 → 5 A takes 5 ms).  It applies in CC and
CR mode; dynamic-mode edges use their own slew (below).

Read-back: each MEASure query integrates over the aperture (``[SENSe:]APERture[:TIME]``,
default 20 ms; see ``aperture``) and answers the mean plus the load's own error, always
inside its documented accuracy ``ACCURACY``:

    voltage  15 V: ±(0.02 % + 1.5 mV)   150 V: ±(0.02 % + 15 mV)
    current  3 A: ±(0.04 % + 0.3 mA)    30 A: ±(0.04 % + 3 mA)
    power    30 W: ±(0.1 % + 6 mW)      300 W: ±(0.1 % + 60 mW)

Dynamic (transient) mode of the CC function, commands of our own under SCPI-1999 names::

    [SOURce:]CURRent:TRANsient[:STATe] ON|OFF     dynamic mode on (the static level is kept)
    [SOURce:]CURRent:TRANsient:ALEVel <A>          level A (the level it starts on)
    [SOURce:]CURRent:TRANsient:BLEVel <A>          level B
    [SOURce:]CURRent:TRANsient:SLEW <A/s>          slew rate of every edge
    [SOURce:]CURRent:TRANsient:MODE CONTinuous|SINGle
    [SOURce:]CURRent:TRANsient:FREQuency <Hz>      repetition rate (CONTinuous, 50 % duty)
    [SOURce:]CURRent:TRANsient:LEVel?              the level drawn now (SINGle) or the mean
    TRIGger[:IMMediate]                            SINGle: step to the other level once
    OUTPut:TRIGger[:STATe] ON|OFF                  pulse the trigger output at each step

Current modulation input and current monitor (commands of our own under SCPI-1999 names)::

    [SOURce:]CURRent:MODulation[:STATe] ON|OFF     the analog modulation input adds to the CC level
    [SOURce:]CURRent:MODulation:GAIN <A/V>         its transconductance, 0.01 ... 10 A/V (default 1)
    [SOURce:]CURRent:MODulation:BANDwidth?         the modulator's own -3 dB bandwidth, Hz (read only)
    CURRent:MONitor:SCALe?                         the current monitor output, V/A (read only)
    CURRent:MONitor:BANDwidth?                     its -3 dB bandwidth, Hz (read only)

A voltage v at the modulation input (the loop analyzer's source, wired to it) makes the
load draw an extra current g·v/(1 + jf/f_mod) around its CC level (a single-pole
transconductance stage, ``MODULATION_BANDWIDTH_HZ``); the current monitor gives
r_mon·i/(1 + jf/f_mon) of the current actually drawn (``MONITOR_SCALE_V_PER_A``,
``MONITOR_BANDWIDTH_HZ``).  With the input off, in CR mode or with the modulation off
the input draws nothing from the modulation.  The small-signal current is zero-mean: the
DC operating point (and every DC reading) is unchanged by it.

Each step is published, with the model's steady states before and after it, to the
load activity the simulated scope reads (``simulated_instruments.waveforms.activity_for``),
so the scope sees the very step the load makes; the trigger output is the scope's
EXTernal trigger source.
"""

from __future__ import annotations

import time
from collections.abc import Callable

import numpy as np
from numpy.typing import ArrayLike, NDArray

from ..scpi import Boolean, Choice, Identity, Numeric, ScpiInstrument
from ..scpi.errors import ScpiExecutionError
from ..waveforms import LoadStep, PulseTrain, activity_for
from .accuracy import InstrumentErrors, QuantityAccuracy, ranged
from .aperture import APERTURE_RANGE_S, DEFAULT_APERTURE_S, Aperture


class SimulatedElectronicLoad(ScpiInstrument):
    """A 150 V / 30 A / 300 W electronic load."""

    CURRENT_MAX_A = 30.0
    POWER_MAX_W = 300.0
    RESISTANCE_RANGE_OHM = (0.02, 10000.0)
    SLEW_RANGE_A_PER_S = (1e2, 2.5e9)
    TRANSIENT_FREQ_RANGE_HZ = (0.1, 50e3)
    STATIC_SLEW_A_PER_S = 1e3
    MODULATION_GAIN_RANGE_A_PER_V = (0.01, 10.0)
    MODULATION_BANDWIDTH_HZ = 30e3
    MONITOR_SCALE_V_PER_A = 0.1
    MONITOR_BANDWIDTH_HZ = 1e6
    ACCURACY: dict[str, QuantityAccuracy] = {
        "voltage": ranged("V", (15.0, 0.02, 1.5e-3), (150.0, 0.02, 15e-3)),
        "current": ranged("A", (3.0, 0.04, 0.3e-3), (30.0, 0.04, 3e-3)),
        "power": ranged("W", (30.0, 0.1, 6e-3), (300.0, 0.1, 60e-3)),
    }

    def __init__(self, model, *, serial: str = "L2001", seed: int = 0, aperture_s: float = DEFAULT_APERTURE_S,
                 sleep: Callable[[float], None] = time.sleep) -> None:
        super().__init__(Identity(maker="benchctl-sim", model="sim electronic load", serial=serial, firmware="1.0"))
        self.model = model
        self.activity = activity_for(model)
        self.errors = InstrumentErrors(self.ACCURACY, [seed, 2])
        self.aperture = Aperture(model.clock, aperture_s, sleep)
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
        lo_a, hi_a = APERTURE_RANGE_S
        self.add_command("[SENSe:]APERture[:TIME]", setter=self.aperture.set, getter=lambda: self.aperture.seconds,
                         params=[Numeric(unit="S", minimum=lo_a, maximum=hi_a, default=self.aperture.default_s)])
        amps = Numeric(unit="A", minimum=0.0, maximum=self.CURRENT_MAX_A, default=0.0)
        self.add_command("[SOURce:]CURRent:TRANsient[:STATe]", setter=self._set_transient_state,
                         getter=lambda: self.transient_on, params=[Boolean()])
        self.add_command("[SOURce:]CURRent:TRANsient:ALEVel", setter=self._transient_setter("level_a_a"),
                         getter=lambda: self.level_a_a, params=[amps])
        self.add_command("[SOURce:]CURRent:TRANsient:BLEVel", setter=self._transient_setter("level_b_a"),
                         getter=lambda: self.level_b_a, params=[amps])
        lo_s, hi_s = self.SLEW_RANGE_A_PER_S
        self.add_command("[SOURce:]CURRent:SLEW[:BOTH]", setter=self._set_static_slew,
                         getter=lambda: self.static_slew_a_per_s,
                         params=[Numeric(minimum=lo_s, maximum=hi_s, default=self.STATIC_SLEW_A_PER_S)])
        self.add_command("[SOURce:]CURRent:TRANsient:SLEW", setter=self._transient_setter("slew_a_per_s"),
                         getter=lambda: self.slew_a_per_s, params=[Numeric(minimum=lo_s, maximum=hi_s, default=hi_s)])
        self.add_command("[SOURce:]CURRent:TRANsient:MODE", setter=self._transient_setter("transient_mode"),
                         getter=lambda: self.transient_mode, params=[Choice("CONTinuous", "SINGle")])
        lo_f, hi_f = self.TRANSIENT_FREQ_RANGE_HZ
        self.add_command("[SOURce:]CURRent:TRANsient:FREQuency", setter=self._transient_setter("transient_freq_hz"),
                         getter=lambda: self.transient_freq_hz,
                         params=[Numeric(unit="HZ", minimum=lo_f, maximum=hi_f, default=100.0)])
        self.add_command("[SOURce:]CURRent:TRANsient:LEVel", getter=self._present_level)
        self.add_command("TRIGger[:IMMediate]", setter=self._trigger)
        self.add_command("OUTPut:TRIGger[:STATe]", setter=self._set_trigger_out, getter=lambda: self.trigger_out,
                         params=[Boolean()])
        g_lo, g_hi = self.MODULATION_GAIN_RANGE_A_PER_V
        self.add_command("[SOURce:]CURRent:MODulation[:STATe]", setter=self._set_modulation,
                         getter=lambda: self.modulation_on, params=[Boolean()])
        self.add_command("[SOURce:]CURRent:MODulation:GAIN", setter=self._set_modulation_gain,
                         getter=lambda: self.modulation_gain_a_per_v,
                         params=[Numeric(minimum=g_lo, maximum=g_hi, default=1.0)])
        self.add_command("[SOURce:]CURRent:MODulation:BANDwidth", getter=lambda: self.MODULATION_BANDWIDTH_HZ)
        self.add_command("CURRent:MONitor:SCALe", getter=lambda: self.MONITOR_SCALE_V_PER_A)
        self.add_command("CURRent:MONitor:BANDwidth", getter=lambda: self.MONITOR_BANDWIDTH_HZ)

    def _reset_state(self) -> None:
        self.mode = "CURR"
        self.current_a = 0.0
        self.resistance_ohm = self.RESISTANCE_RANGE_OHM[1]
        self.ocp_a = self.CURRENT_MAX_A * 1.1
        self.opp_w = self.POWER_MAX_W * 1.1
        self.input_on = False
        self.protection_tripped = False
        self.transient_on = False
        self.level_a_a = 0.0
        self.level_b_a = 0.0
        self.slew_a_per_s = self.SLEW_RANGE_A_PER_S[1]
        self.static_slew_a_per_s = self.STATIC_SLEW_A_PER_S
        self.transient_mode = "SING"
        self.transient_freq_hz = 100.0
        self.trigger_out = True
        self.modulation_on = False
        self.modulation_gain_a_per_v = 1.0
        self._at_b = False
        self.activity.set_train(None)
        self._apply()

    def on_reset(self) -> None:
        was_on = self.input_on
        self.aperture.reset()
        self._reset_state()
        if was_on:
            self.audit_state("input", False)

    def _dynamic(self) -> bool:
        return self.transient_on and self.mode == "CURR"

    def _present_level(self) -> float:
        if not self._dynamic():
            return self.current_a
        if self.transient_mode == "CONT":
            return 0.5 * (self.level_a_a + self.level_b_a)
        return self.level_b_a if self._at_b else self.level_a_a

    def _apply(self) -> None:
        slew = self.slew_a_per_s if self._dynamic() else self.static_slew_a_per_s
        if self.mode == "CURR":
            self.model.set_load("CC", self._present_level(), self.input_on, slew_a_per_s=slew)
        else:
            self.model.set_load("CR", self.resistance_ohm, self.input_on, slew_a_per_s=slew)

    def _set_static_slew(self, value: float) -> None:
        self.static_slew_a_per_s = float(value)

    def _check_protection(self) -> None:
        if not self.input_on:
            return
        t = self.model.terminals()
        if t.output_a > self.ocp_a or t.output_v * t.output_a > self.opp_w:
            self.input_on = False
            self.protection_tripped = True
            self._apply()
            self._update_train()
            self.audit_state("input", False)
            self.audit_state("protection_tripped", True)

    def _set_mode(self, mode: str) -> None:
        self.mode = mode  # the core hands over the short form: CURR or RES
        self._apply()
        self._update_train()

    # ---- dynamic mode
    def _transient_setter(self, attr: str):
        def set_(value) -> None:
            setattr(self, attr, value)
            self._at_b = False
            self._apply()
            self._update_train()
            self._check_protection()
        return set_

    def _set_transient_state(self, on: bool) -> None:
        self.transient_on = bool(on)
        self._at_b = False
        self._apply()
        self._update_train()
        self._check_protection()

    def _update_train(self) -> None:
        """Publish (or withdraw) the continuous pulse train to the shared load activity."""
        if self._dynamic() and self.transient_mode == "CONT" and self.input_on:
            vin = self.model.operating_point().vin_v
            op_lo = self.model.steady_state(vin, "CC", self.level_a_a, was_running=True)
            op_hi = self.model.steady_state(vin, "CC", self.level_b_a, was_running=True)
            self.activity.set_train(PulseTrain(self.model.clock.now_s(), self.level_a_a, self.level_b_a,
                                               self.transient_freq_hz, self.slew_a_per_s, op_lo, op_hi))
        else:
            self.activity.set_train(None)

    def _trigger(self) -> None:
        if not (self._dynamic() and self.transient_mode == "SING"):
            raise ScpiExecutionError(-221, "Settings conflict",
                                     "TRIG needs CURR:TRAN ON in MODE SINGle with FUNC CURR")
        if not self.input_on:
            raise ScpiExecutionError(-221, "Settings conflict", "the input is off; send INP ON before TRIG")
        before_a = self._present_level()
        op_before = self.model.operating_point()
        self._at_b = not self._at_b
        t_step = self.model.clock.now_s()       # the step's moment: before the model works out its transient
        self._apply()
        op_after = self.model.operating_point()
        self.activity.add_step(LoadStep(t_step, before_a, self._present_level(),
                                        self.slew_a_per_s, op_before, op_after, self.trigger_out))
        self._check_protection()

    # ---- modulation input and current monitor
    def _set_modulation(self, on: bool) -> None:
        changed = bool(on) != self.modulation_on
        self.modulation_on = bool(on)
        if changed:
            self.audit_state("modulation", self.modulation_on)

    def _set_modulation_gain(self, value: float) -> None:
        self.modulation_gain_a_per_v = float(value)

    def modulation_current(self, freq_hz: ArrayLike) -> NDArray[np.complex128]:
        """Current drawn per volt at the modulation input at ``freq_hz`` (A/V, complex): the
        transconductance with the modulator's single pole; 0 when it draws nothing from it."""
        f = np.asarray(freq_hz, dtype=float)
        if not (self.modulation_on and self.input_on and self.mode == "CURR" and not self.protection_tripped):
            return np.zeros(f.shape, dtype=np.complex128)
        return self.modulation_gain_a_per_v / (1.0 + 1j * f / self.MODULATION_BANDWIDTH_HZ)

    def monitor_response(self, freq_hz: ArrayLike) -> NDArray[np.complex128]:
        """Current monitor output per ampere drawn at ``freq_hz`` (V/A, complex, its single pole)."""
        f = np.asarray(freq_hz, dtype=float)
        return self.MONITOR_SCALE_V_PER_A / (1.0 + 1j * f / self.MONITOR_BANDWIDTH_HZ)

    def _set_trigger_out(self, on: bool) -> None:
        self.trigger_out = bool(on)

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
        self._update_train()
        if changed:
            self.audit_state("input", self.input_on)

    def _read(self, quantity: str) -> float:
        self._check_protection()
        interval = self.aperture.integrate()
        self._check_protection()
        m = self.model.mean_terminals(interval.t0_s, interval.t1_s)
        true = {"voltage": m.output_v, "current": m.output_a, "power": m.output_w}[quantity]
        return self.errors.read(quantity, true)

    def _measure_voltage(self) -> float:
        return self._read("voltage")

    def _measure_current(self) -> float:
        return self._read("current")

    def _measure_power(self) -> float:
        return self._read("power")
