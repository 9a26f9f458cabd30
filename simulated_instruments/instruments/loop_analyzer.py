"""A simulated frequency-response (loop) analyzer injecting into the converter's feedback path.

What it measures
    The analyzer injects a sine of peak amplitude A in series with the feedback path at
    the output sense point (voltage injection, R. D. Middlebrook, "Measurement of loop
    gain in feedback systems," Int. J. Electronics 38(4):485-512, 1975). With T the loop
    gain of the converter at its present operating point (``model.loop_gain``) the two
    channels see, at each frequency, the phasors

        v_x = A / (1 + T')        (going into the divider, the error amplifier)
        v_y = -T'·A / (1 + T')    (coming back from the power stage)

    and the analyzer reports T_meas = -v_y/v_x (= T' without noise), or +v_y/v_x = -T'
    with the polarity set to INVerted (an analyzer wired across the inverting error
    amplifier; the procedure states which in the stored data).

Large injection: describing-function compression
    The perturbation reaches the PWM modulator as a duty-cycle swing
    d = |H·Gc(j2πf)/Vm|·|v_x| (``control_chain``). The duty cycle cannot leave
    [0, D_max], so a swing larger than the headroom δ = min(D, D_max − D) is clipped.
    The loop then passes the fundamental with the describing function of an ideal
    saturation (A. Gelb and W. E. Vander Velde, *Multiple-Input Describing Functions and
    Nonlinear System Design*, McGraw-Hill 1968, ch. 2 — formula from memory)::

        N(a) = 1                                          for a <= δ
        N(a) = (2/π)·[asin(δ/a) + (δ/a)·sqrt(1 − (δ/a)²)]  for a > δ

    and T' = N·T. Because a itself depends on T' (through v_x), N is found by a damped
    fixed-point iteration per frequency. Compression shows first above crossover, where
    the compensator's high-frequency gain is large, and lowers |T|: a too-large injection
    under-reads the gain there and moves the phase crossover and the gain margin.

Measurement noise
    Each channel's phasor estimate carries complex Gaussian noise of rms σ (σ/√2 on
    each of the real and imaginary parts), σ = ``NOISE_DENSITY_V_PER_RTHZ``·√(1/t_point):
    an output-referred noise floor (switching residue, reference and amplifier noise)
    seen through the detector's noise bandwidth 1/t_point. The relative error of T is
    then about σ/|v_y| + σ/|v_x|, i.e. the SNR grows with the injection amplitude and
    with |1 + T|/|T| resp. |1 + T|: it is worst where the loop gain is high (v_x small)
    and where it is very low (v_y small). Halving A doubles the scatter. The noise is
    seeded (``seed``), so a bench is repeatable.

Ratio function: output impedance through the load's modulation input
    ``[SENSe:]FUNCtion RATio`` (``LOOP`` is the default above) measures H = (s2·ch2)/(s1·ch1)
    with the source driving an external stimulus instead of the loop: here the modulation
    input of the electronic load wired to it (``connect_modulated_load``), ch1 on the load's
    current monitor and ch2 on the output voltage at the DUT's output terminals; s1, s2
    are the channel scales ``INPut<n>:SCALe`` (units per volt at the input, default 1;
    1/r_mon makes ch1 read amperes).  A source amplitude A makes the load draw
    i = A·g/(1 + jf/f_mod) (its modulator), the output answers v = −Z_t·i, Z_t the
    closed-loop output impedance at the terminals (``model.terminal_output_impedance``),
    and ch1 sees r_mon·i/(1 + jf/f_mon) (the monitor's own pole).  So H = −Z_t·(1 + jf/f_mon)
    ·s2/(s1·r_mon): the modulator's bandwidth divides out (it only lowers the signal, so
    the noise grows above f_mod), the monitor's pole does not (the procedure removes it).
    Each channel carries the same noise as in the loop function; with no current drawn
    (modulation off, load off) ch1 holds noise only and the ratio is meaningless.

Sweep timing
    Each point integrates for t_point = averaging·max(MIN_PERIODS_PER_POINT/f, 1/RBW)
    model seconds (RBW = the measurement bandwidth). ``INITiate`` takes the response of
    the operating point at that moment and the data become available when model time
    has advanced by the sum of t_point; ``*OPC?`` and ``STATus:OPERation:CONDition?``
    (bit 4 "measuring", SCPI-1999 Vol. 1 §9, from memory) follow that.

Command set (SCPI-1999 subsystem names; the instrument's own dialect)::

    [SENSe:]FREQuency:STARt <Hz> | :STOP <Hz>       [SENSe:]SWEep:POINts <n>
    [SENSe:]SWEep:SPACing LOGarithmic|LINear         [SENSe:]SWEep:TIME?   (model s)
    [SENSe:]BANDwidth[:RESolution] <Hz>              [SENSe:]AVERage:COUNt <n>
    [SENSe:]LOOP:POLarity NORMal|INVerted
    [SENSe:]FUNCtion LOOP|RATio                      INPut<n>:SCALe <unit/V>   (n = 1, 2)
    SOURce:VOLTage[:LEVel][:IMMediate][:AMPLitude] <V peak>
    SOURce:VOLTage:PROFile[:STATe] ON|OFF            SOURce:VOLTage:PROFile:DATA "<f1>,<A1>,<f2>,<A2>..."
    INITiate[:IMMediate]    ABORt    STATus:OPERation:CONDition?
    FORMat[:DATA] REAL[,64]|ASCii                    FORMat:BORDer NORMal|SWAPped
    TRACe[:DATA]? FREQuency|RESPonse                 TRACe:POINts?

``TRACe:DATA? RESPonse`` returns re, im interleaved. REAL,64 data are an IEEE 488.2
definite-length block of float64, big-endian for ``NORMal`` byte order and little-endian
for ``SWAPped`` (SCPI-1999 Vol. 2 FORMat subsystem, from memory).
"""

from __future__ import annotations

import logging
import math

import numpy as np
from numpy.typing import NDArray

from ..converter import ConverterModelError, control_chain
from ..scpi import Boolean, Choice, Identity, Numeric, ScpiExecutionError, ScpiInstrument, Text

logger = logging.getLogger(__name__)

OPERATION_MEASURING = 16
"""Bit 4 of the operation status condition register: a sweep is running."""


def saturation_describing_function(amplitude: NDArray[np.float64], limit: float) -> NDArray[np.float64]:
    """Describing function of an ideal unit-slope saturation at ±``limit`` for sine ``amplitude``.

    Gelb & Vander Velde 1968, ch. 2 (from memory); 1 where amplitude <= limit.
    """
    a = np.asarray(amplitude, dtype=float)
    r = np.where(a > limit, limit / np.maximum(a, 1e-300), 1.0)
    out = (2.0 / math.pi) * (np.arcsin(r) + r * np.sqrt(np.clip(1.0 - r * r, 0.0, None)))
    return np.where(a > limit, out, 1.0)


def _parse_profile(text: str) -> tuple[tuple[float, ...], tuple[float, ...]]:
    try:
        values = [float(v) for v in text.replace(";", ",").split(",") if v.strip()]
    except ValueError:
        raise ScpiExecutionError(-224, None, f"profile {text!r}: give numbers f1,A1,f2,A2,...") from None
    if len(values) < 2 or len(values) % 2:
        raise ScpiExecutionError(-224, None, "profile needs pairs of frequency (Hz) and amplitude (V)")
    freqs, amps = tuple(values[0::2]), tuple(values[1::2])
    if any(not (math.isfinite(f) and f > 0) for f in freqs) or any(b <= a for a, b in zip(freqs, freqs[1:])):
        raise ScpiExecutionError(-224, None, "profile frequencies must be > 0 Hz and strictly increasing")
    lo, hi = SimulatedLoopAnalyzer.INJECTION_RANGE_V
    if any(not (lo <= a <= hi) for a in amps):
        raise ScpiExecutionError(-222, None, f"profile amplitudes must lie in {lo:g}..{hi:g} V")
    return freqs, amps


def profile_amplitude_v(freq_hz: NDArray[np.float64], freqs: tuple[float, ...],
                        amps: tuple[float, ...]) -> NDArray[np.float64]:
    """Injection amplitude at ``freq_hz``: log-log interpolation of the breakpoints, flat outside."""
    f = np.asarray(freq_hz, dtype=float)
    if len(freqs) == 1:
        return np.full(f.shape, amps[0])
    return 10.0 ** np.interp(np.log10(f), np.log10(freqs), np.log10(amps))


class SimulatedLoopAnalyzer(ScpiInstrument):
    """A 0.1 Hz - 10 MHz loop analyzer with a 1 mV - 5 V injection source."""

    FREQ_RANGE_HZ = (0.1, 10e6)
    POINTS_MAX = 10001
    BANDWIDTH_RANGE_HZ = (0.1, 10e3)
    AVERAGE_MAX = 1024
    INJECTION_RANGE_V = (1e-5, 5.0)
    NOISE_DENSITY_V_PER_RTHZ = 5e-6
    MIN_PERIODS_PER_POINT = 5.0

    def __init__(self, model, *, serial: str = "A4001", seed: int = 0, opc_timeout_s: float = 3600.0) -> None:
        super().__init__(Identity(maker="benchctl-sim", model="sim loop analyzer", serial=serial, firmware="1.0"),
                         opc_timeout_s=opc_timeout_s)
        self.model = model
        self._rng = np.random.default_rng([seed, 5])
        self.modulated_load = None
        self._reset_state()
        f_lo, f_hi = self.FREQ_RANGE_HZ
        a_lo, a_hi = self.INJECTION_RANGE_V
        self.add_command("[SENSe:]FREQuency:STARt", setter=self._setter("start_hz"), getter=lambda: self.start_hz,
                         params=[Numeric(unit="HZ", minimum=f_lo, maximum=f_hi, default=10.0)])
        self.add_command("[SENSe:]FREQuency:STOP", setter=self._setter("stop_hz"), getter=lambda: self.stop_hz,
                         params=[Numeric(unit="HZ", minimum=f_lo, maximum=f_hi, default=100e3)])
        self.add_command("[SENSe:]SWEep:POINts", setter=self._setter("points", int), getter=lambda: self.points,
                         params=[Numeric(minimum=2, maximum=self.POINTS_MAX, default=101, integer=True)])
        self.add_command("[SENSe:]SWEep:SPACing", setter=self._setter("spacing"), getter=lambda: self.spacing,
                         params=[Choice("LOGarithmic", "LINear")])
        self.add_command("[SENSe:]SWEep:TIME", getter=lambda: float(self.sweep_time_s()))
        b_lo, b_hi = self.BANDWIDTH_RANGE_HZ
        self.add_command("[SENSe:]BANDwidth[:RESolution]", setter=self._setter("bandwidth_hz"),
                         getter=lambda: self.bandwidth_hz,
                         params=[Numeric(unit="HZ", minimum=b_lo, maximum=b_hi, default=10.0)])
        self.add_command("[SENSe:]AVERage:COUNt", setter=self._setter("averaging", int), getter=lambda: self.averaging,
                         params=[Numeric(minimum=1, maximum=self.AVERAGE_MAX, default=1, integer=True)])
        self.add_command("[SENSe:]LOOP:POLarity", setter=self._setter("polarity"), getter=lambda: self.polarity,
                         params=[Choice("NORMal", "INVerted")])
        self.add_command("SOURce:VOLTage[:LEVel][:IMMediate][:AMPLitude]", setter=self._setter("injection_v"),
                         getter=lambda: self.injection_v,
                         params=[Numeric(unit="V", minimum=a_lo, maximum=a_hi, default=0.01)])
        self.add_command("SOURce:VOLTage:PROFile[:STATe]", setter=self._setter("profile_on", bool),
                         getter=lambda: self.profile_on, params=[Boolean()])
        self.add_command("SOURce:VOLTage:PROFile:DATA", setter=self._set_profile, getter=self._get_profile,
                         params=[Text()])
        self.add_command("[SENSe:]FUNCtion", setter=self._setter("function"), getter=lambda: self.function,
                         params=[Choice("LOOP", "RATio")])
        self.add_command("INPut<n>:SCALe", setter=self._set_scale, getter=self._get_scale,
                         params=[Numeric(minimum=-1e6, maximum=1e6, default=1.0)])
        self.add_command("INITiate[:IMMediate]", setter=self._initiate)
        self.add_command("ABORt", setter=self._abort)
        self.add_command("STATus:OPERation:CONDition",
                         getter=lambda: 0 if self.pending_done() else OPERATION_MEASURING)
        self.add_command("FORMat[:DATA]", setter=self._set_format, getter=self._get_format,
                         params=[Choice("REAL", "ASCii"), Numeric(minimum=0, maximum=64, integer=True, optional=True)])
        self.add_command("FORMat:BORDer", setter=self._setter("byte_order"), getter=lambda: self.byte_order,
                         params=[Choice("NORMal", "SWAPped")])
        self.add_command("TRACe[:DATA]", getter=self._trace, params=[Choice("FREQuency", "RESPonse")])
        self.add_command("TRACe:POINts", getter=lambda: 0 if self._data is None or not self.pending_done()
                         else int(self._data[0].size))

    # ------------------------------------------------------------------ state
    def _reset_state(self) -> None:
        self.start_hz = 10.0
        self.stop_hz = 100e3
        self.points = 101
        self.spacing = "LOG"
        self.bandwidth_hz = 10.0
        self.averaging = 1
        self.polarity = "NORM"
        self.injection_v = 0.01
        self.profile_on = False
        self.profile: tuple[tuple[float, ...], tuple[float, ...]] = ((1.0,), (0.01,))
        self.data_format = "ASC"
        self.byte_order = "NORM"
        self._data: tuple[NDArray[np.float64], NDArray[np.complex128]] | None = None
        self._sweep_end_s: float | None = None
        self.function = "LOOP"
        self.channel_scale = {1: 1.0, 2: 1.0}

    def connect_modulated_load(self, load) -> None:
        """Wire the source to ``load``'s modulation input and ch1 to its current monitor (RATio)."""
        self.modulated_load = load

    def _set_scale(self, value: float, n: int = 1) -> None:
        if n not in (1, 2):
            raise ScpiExecutionError(-114, None, f"INPut{n}: the analyzer has inputs 1 and 2")
        if value == 0.0:
            raise ScpiExecutionError(-222, None, "a channel scale of 0 makes no measurement; give a factor != 0")
        self.channel_scale[n] = float(value)

    def _get_scale(self, n: int = 1) -> float:
        if n not in (1, 2):
            raise ScpiExecutionError(-114, None, f"INPut{n}: the analyzer has inputs 1 and 2")
        return self.channel_scale[n]

    def on_reset(self) -> None:
        self._reset_state()

    def pending_done(self) -> bool:
        end = self._sweep_end_s
        return end is None or self.model.clock.now_s() >= end

    def _setter(self, name: str, convert=lambda v: v):
        def set_value(value) -> None:
            setattr(self, name, convert(value))
        return set_value

    def _set_profile(self, text: str) -> None:
        self.profile = _parse_profile(text)

    def _get_profile(self) -> str:
        return '"' + ",".join(f"{f:g},{a:g}" for f, a in zip(*self.profile)) + '"'

    def _set_format(self, kind: str, length: int | None) -> None:
        if kind == "REAL" and length not in (None, 64):
            raise ScpiExecutionError(-224, None, f"REAL,{length}: only REAL,64 is supported")
        self.data_format = kind

    def _get_format(self) -> str:
        return "REAL,64" if self.data_format == "REAL" else "ASC,0"

    # ------------------------------------------------------------------ sweep
    def frequencies_hz(self) -> NDArray[np.float64]:
        """The sweep's frequency points (log: numpy.geomspace; linear: numpy.linspace)."""
        if self.spacing == "LOG":
            return np.geomspace(self.start_hz, self.stop_hz, self.points)
        return np.linspace(self.start_hz, self.stop_hz, self.points)

    def point_times_s(self, freq_hz: NDArray[np.float64]) -> NDArray[np.float64]:
        """Integration time of each point, model seconds (see module docstring)."""
        return self.averaging * np.maximum(self.MIN_PERIODS_PER_POINT / freq_hz, 1.0 / self.bandwidth_hz)

    def sweep_time_s(self) -> float:
        """Duration of a sweep with the present settings, model seconds."""
        if self.start_hz >= self.stop_hz:
            return 0.0
        return float(np.sum(self.point_times_s(self.frequencies_hz())))

    def injection_at(self, freq_hz: NDArray[np.float64]) -> NDArray[np.float64]:
        """Injection amplitude (V peak) at each frequency: fixed, or the profile."""
        if self.profile_on:
            return profile_amplitude_v(freq_hz, *self.profile)
        return np.full(np.shape(freq_hz), self.injection_v)

    def compressed_loop(self, freq_hz: NDArray[np.float64], amplitude_v: NDArray[np.float64]
                        ) -> tuple[NDArray[np.complex128], NDArray[np.float64]]:
        """(T' = N·T, N) at the present operating point for injection ``amplitude_v`` (V peak)."""
        t = self.model.loop_gain(freq_hz)
        op = self.model.operating_point()
        headroom = max(min(op.duty, self.model.design.stage.max_duty - op.duty), 1e-6)
        chain = np.abs(control_chain(self.model.design).response(freq_hz))
        n = np.ones(freq_hz.shape)
        for _ in range(60):
            swing = chain * amplitude_v / np.abs(1.0 + n * t)
            n = 0.5 * n + 0.5 * saturation_describing_function(swing, headroom)
        return n * t, n

    def _ratio_channels(self, f: NDArray[np.float64], amp: NDArray[np.float64]
                        ) -> tuple[NDArray[np.complex128], NDArray[np.complex128]]:
        """(ch1, ch2) phasors of the RATio function without noise, V at the inputs."""
        load = self.modulated_load
        if load is None:
            current = np.zeros(f.shape, dtype=np.complex128)
            monitor = np.zeros(f.shape, dtype=np.complex128)
        else:
            current = amp * load.modulation_current(f)
            monitor = load.monitor_response(f)
        try:
            z = self.model.terminal_output_impedance(f) if np.any(current != 0) else np.zeros(f.shape)
        except ConverterModelError as exc:
            raise ScpiExecutionError(-200, None, f"no output impedance to measure: {exc}") from None
        return current * monitor, -z * current

    def _initiate(self) -> None:
        if self.start_hz >= self.stop_hz:
            raise ScpiExecutionError(-221, None, f"start {self.start_hz:g} Hz is not below stop {self.stop_hz:g} Hz")
        f = self.frequencies_hz()
        amp = self.injection_at(f)
        if self.function == "RAT":
            self._initiate_ratio(f, amp)
            return
        try:
            t_eff, _ = self.compressed_loop(f, amp)
        except ConverterModelError as exc:
            self._data, self._sweep_end_s = None, None
            raise ScpiExecutionError(-200, None, f"no loop to measure: {exc}") from None
        t_pt = self.point_times_s(f)
        sigma = self.NOISE_DENSITY_V_PER_RTHZ / np.sqrt(t_pt)
        v_x = amp / (1.0 + t_eff)
        v_y = -t_eff * amp / (1.0 + t_eff)
        noise = self._rng.standard_normal((4, f.size)) * (sigma / math.sqrt(2.0))
        v_x = v_x + noise[0] + 1j * noise[1]
        v_y = v_y + noise[2] + 1j * noise[3]
        measured = -v_y / v_x
        if self.polarity == "INV":
            measured = -measured
        self._data = (f, measured.astype(np.complex128))
        self._sweep_end_s = self.model.clock.now_s() + float(np.sum(t_pt))
        logger.debug("loop analyzer: sweep of %d points, %.3g model s", f.size, float(np.sum(t_pt)))

    def _abort(self) -> None:
        self._data, self._sweep_end_s = None, None

    def _initiate_ratio(self, f: NDArray[np.float64], amp: NDArray[np.float64]) -> None:
        try:
            ch1, ch2 = self._ratio_channels(f, amp)
        except ScpiExecutionError:
            self._data, self._sweep_end_s = None, None
            raise
        t_pt = self.point_times_s(f)
        sigma = self.NOISE_DENSITY_V_PER_RTHZ / np.sqrt(t_pt)
        noise = self._rng.standard_normal((4, f.size)) * (sigma / math.sqrt(2.0))
        ch1 = ch1 + noise[0] + 1j * noise[1]
        ch2 = ch2 + noise[2] + 1j * noise[3]
        measured = (self.channel_scale[2] * ch2) / (self.channel_scale[1] * ch1)
        self._data = (f, measured.astype(np.complex128))
        self._sweep_end_s = self.model.clock.now_s() + float(np.sum(t_pt))

    def _trace(self, which: str) -> object:
        if self._data is None:
            raise ScpiExecutionError(-221, None, "no sweep data; send INIT and wait for *OPC? first")
        if not self.pending_done():
            raise ScpiExecutionError(-221, None, "sweep still running; wait for *OPC? before reading the trace")
        f, h = self._data
        values = f if which == "FREQ" else np.column_stack([h.real, h.imag]).ravel()
        if self.data_format == "ASC":
            return [float(v) for v in values]
        dtype = ">f8" if self.byte_order == "NORM" else "<f8"
        return np.asarray(values, dtype=dtype).tobytes()
