"""A simulated 4-channel oscilloscope probing the converter model.

The SCPI front end only: channel settings, timebase, trigger, single acquisitions and
waveform transfer. The signals come from :mod:`simulated_instruments.waveforms`.
Command set (our own, on SCPI-1999 subsystem names; ``<n>`` = channel 1-4)::

    INPut<n>[:STATe] ON|OFF               channel on
    INPut<n>:COUPling AC|DC               AC removes the DC level of the signal
    INPut<n>:FILTer[:LPASs][:STATe] ON|OFF    bandwidth limit (first order)
    INPut<n>:FILTer[:LPASs]:FREQuency <Hz>    its cutoff, default 20 MHz
    INPut<n>:UNIT?                        V or A (current probe)
    SENSe<n>:VOLTage:RANGe <full scale>   10 divisions: range = 10 x scale
    SENSe<n>:VOLTage:OFFSet <value>       value at the screen centre
    SENSe:SWEep:TIME <s>                  record duration
    SENSe:SWEep:POINts <n>                record length
    SENSe:SWEep:OFFSet:TIME <s>           time of the first sample from the trigger
    TRIGger:SOURce CH1|CH2|CH3|CH4|EXTernal|IMMediate
    TRIGger:LEVel <value>; TRIGger:SLOPe POSitive|NEGative|EITHer
    TRIGger:HOLDoff <s>                   the signal must have stayed on the other side
                                          of the level this long before an edge counts
    TRIGger:MODE AUTO|NORMal              AUTO triggers by itself after 10 ms model time
    INITiate[:IMMediate]                  arm one acquisition; *OPC? waits for it
    INITiate:DONE?                        1 when the last acquisition is complete
    ABORt
    FORMat[:DATA] INTeger|REAL[,<bits>]   INT,8 / INT,16 (default) / REAL,32
    FORMat:BORDer NORMal|SWAPped          NORMal = most significant byte first
    TRACe:PREamble? <n>                   bits,points,x_inc,x_origin,x_ref,y_inc,y_origin,y_ref,msb_first,unit
    TRACe[:DATA]? <n>                     IEEE 488.2 definite-length block of samples

EXTernal is the electronic load's trigger output (its dynamic-mode steps). The
simulated DUT fixture (not part of a real scope) places probes and adds a known
capacitance at the switch node for the two-capacitor method::

    FIXTure:PROBe<n> VOUT|DRAin|ISWitch|IOUT|GATE|VIN|IIN   (default 1 VOUT, 2 DRAin, 3 ISWitch, 4 IOUT;
                                                      VIN/IIN: the DUT's input voltage and current)
    FIXTure:CAPacitance <F>                           0 to 10 nF, default 0
    FIXTure:LOAD:CAPacitance <F>                      capacitance across the output (a capacitive
                                                      load for start-up tests), 0 to 1 F, default 0

Single shot on a start or a stop: while the model is in a start, stop or lock-out (and
always on VIN/IIN) the trigger searches the model's terminal series from the moment of
INIT up to now, so an edge caused by switching the source on after arming is found.
Pre-trigger samples come from a negative SENSe:SWEep:OFFSet:TIME. A trigger that never
comes leaves INITiate:DONE? at 0; ABORt ends the wait (a driver polls DONE? with its own
deadline rather than blocking in *OPC?).

Scaling of integer samples: value = y_origin + (code − y_reference)·y_increment,
time = x_origin + (i − x_reference)·x_increment (common practice). Noise is seeded;
the front end has a 500 MHz first-order analog bandwidth (the bandwidth limit is a
first-order pole too, both applied as :func:`first_order_low_pass`). Samples beyond the
screen (offset +/- 5 divisions) are held at its edge, as an ADC's end codes hold an
over-range input: INT transfers then carry the extreme codes, REAL transfers the edge value.
"""

from __future__ import annotations

import logging
import math

import numpy as np
from scipy.signal import lfilter, lfilter_zi

from ..scpi import Boolean, Choice, Identity, Numeric, ScpiInstrument
from ..scpi.errors import ScpiExecutionError
from ..waveforms import SERIES_INDEX, SERIES_ONLY, SIGNAL_UNITS, RecordContext, RecordSynth, activity_for, probed_signal

logger = logging.getLogger(__name__)

_PROBE_WORDS = {"VOUT": "vout", "DRA": "drain", "ISW": "switch_current", "IOUT": "output_current", "GATE": "gate",
                "VIN": "vin", "IIN": "input_current"}
_DEFAULT_PROBES = {1: "vout", 2: "drain", 3: "switch_current", 4: "output_current"}


def first_order_low_pass(v: np.ndarray, cutoff_hz: float, dt_s: float) -> np.ndarray:
    """The analog pole 1/(1 + s/(2*pi*cutoff_hz)) applied to samples ``dt_s`` apart, exact for a
    signal that is linear between samples (first-order-hold equivalent of the pole; e.g.
    Franklin, Powell & Workman, Digital Control of Dynamic Systems, 3rd ed., ch. 6, from memory):
    y[n] = a*y[n-1] + b0*x[n] + b1*x[n-1], a = exp(-wc*dt), g = (1 - a)/(wc*dt), b0 = 1 - g,
    b1 = g - a. Starts in the steady state of the first sample."""
    wc_dt = 2 * math.pi * cutoff_hz * dt_s
    a = math.exp(-wc_dt)
    g = -math.expm1(-wc_dt) / wc_dt
    b, den = [1.0 - g, g - a], [1.0, -a]
    y, _ = lfilter(b, den, v, zi=lfilter_zi(b, den) * v[0])
    return y


class _Channel:
    def __init__(self, signal: str) -> None:
        self.signal = signal
        self.on = True
        self.coupling = "DC"
        self.bw_limit = False
        self.bw_freq_hz = 20e6
        self.range_v = 10.0
        self.offset_v = 0.0


class SimulatedOscilloscope(ScpiInstrument):
    """A 4-channel, 500 MHz, 10 GS/s digitizing scope with int8/int16/float32 transfer."""

    CHANNELS = 4
    ANALOG_BANDWIDTH_HZ = 500e6
    MIN_SAMPLE_INTERVAL_S = 1e-10
    MAX_POINTS = 2_000_000
    AUTO_TIMEOUT_S = 10e-3
    NOISE_DIV_RMS = 0.004  # front-end noise, divisions rms
    TRIGGER_SEARCH_POINTS = 400_000
    SERIES_SEARCH_POINTS = 20_000

    def __init__(self, model, *, serial: str = "O4001", seed: int = 0) -> None:
        super().__init__(Identity(maker="benchctl-sim", model="sim oscilloscope", serial=serial, firmware="1.0"),
                         opc_timeout_s=60.0)
        self.model = model
        self.activity = activity_for(model)
        self._rng = np.random.default_rng([seed, 5])
        self._reset_state()
        ch = "<n:1-4>"
        self.add_command(f"INPut{ch}[:STATe]", setter=self._setter("on"), getter=self._getter("on"), params=[Boolean()])
        self.add_command(f"INPut{ch}:COUPling", setter=self._setter("coupling"), getter=self._getter("coupling"),
                         params=[Choice("AC", "DC")])
        self.add_command(f"INPut{ch}:FILTer[:LPASs][:STATe]", setter=self._setter("bw_limit"),
                         getter=self._getter("bw_limit"), params=[Boolean()])
        self.add_command(f"INPut{ch}:FILTer[:LPASs]:FREQuency", setter=self._setter("bw_freq_hz"),
                         getter=self._getter("bw_freq_hz"),
                         params=[Numeric(unit="HZ", minimum=1e3, maximum=self.ANALOG_BANDWIDTH_HZ, default=20e6)])
        self.add_command(f"INPut{ch}:UNIT", getter=lambda n: SIGNAL_UNITS[self._ch[n].signal])
        self.add_command(f"SENSe{ch}:VOLTage:RANGe", setter=self._setter("range_v"), getter=self._getter("range_v"),
                         params=[Numeric(minimum=1e-4, maximum=1e4, default=10.0)])
        self.add_command(f"SENSe{ch}:VOLTage:OFFSet", setter=self._setter("offset_v"), getter=self._getter("offset_v"),
                         params=[Numeric(minimum=-1e4, maximum=1e4, default=0.0)])
        self.add_command("SENSe:SWEep:TIME", setter=self._set_duration, getter=lambda: self.duration_s,
                         params=[Numeric(unit="S", minimum=1e-9, maximum=10.0, default=1e-3)])
        self.add_command("SENSe:SWEep:POINts", setter=self._set_points, getter=lambda: self.points,
                         params=[Numeric(minimum=16, maximum=self.MAX_POINTS, default=10000, integer=True)])
        self.add_command("SENSe:SWEep:OFFSet:TIME", setter=self._set_offset, getter=lambda: self.x_origin_s,
                         params=[Numeric(unit="S", minimum=-10.0, maximum=10.0, default=0.0)])
        self.add_command("SENSe:SWEep:TINTerval", getter=lambda: self.duration_s / self.points)
        self.add_command("TRIGger[:SEQuence]:SOURce", setter=self._set_trig_source, getter=lambda: self.trig_source,
                         params=[Choice("CH1", "CH2", "CH3", "CH4", "EXTernal", "IMMediate")])
        self.add_command("TRIGger[:SEQuence]:LEVel", setter=self._set_attr("trig_level"),
                         getter=lambda: self.trig_level, params=[Numeric(minimum=-1e4, maximum=1e4, default=0.0)])
        self.add_command("TRIGger[:SEQuence]:SLOPe", setter=self._set_attr("trig_slope"),
                         getter=lambda: self.trig_slope, params=[Choice("POSitive", "NEGative", "EITHer")])
        self.add_command("TRIGger[:SEQuence]:HOLDoff", setter=self._set_attr("trig_holdoff_s"),
                         getter=lambda: self.trig_holdoff_s,
                         params=[Numeric(unit="S", minimum=0.0, maximum=1.0, default=0.0)])
        self.add_command("TRIGger[:SEQuence]:MODE", setter=self._set_attr("trig_mode"), getter=lambda: self.trig_mode,
                         params=[Choice("AUTO", "NORMal")])
        self.add_command("INITiate[:IMMediate]", setter=self._initiate)
        self.add_command("INITiate:DONE", getter=lambda: self.pending_done())
        # SCPI-1999 Vol. 2 STATus:OPERation: bit 3 SWEeping, bit 4 MEASuring, bit 5 waiting for TRIGger
        # (from memory): 32 while armed and untriggered, 16 while the post-trigger part is recorded, 0 done.
        self.add_command("STATus:OPERation:CONDition", getter=self._operation_condition)
        self.add_command("ABORt", setter=self._abort)
        self.add_command("FORMat[:DATA]", setter=self._set_format, getter=self._get_format,
                         params=[Choice("INTeger", "REAL"), Numeric(minimum=8, maximum=32, integer=True,
                                                                    optional=True, default=None)])
        self.add_command("FORMat:BORDer", setter=self._set_attr("byte_order"), getter=lambda: self.byte_order,
                         params=[Choice("NORMal", "SWAPped")])
        self.add_command("TRACe:PREamble", getter=self._preamble, params=[Numeric(minimum=1, maximum=4, integer=True)])
        self.add_command("TRACe[:DATA]", getter=self._data, params=[Numeric(minimum=1, maximum=4, integer=True)])
        self.add_command("FIXTure:PROBe<n:1-4>", setter=self._set_probe,
                         getter=lambda n: [k for k, v in _PROBE_WORDS.items() if v == self._ch[n].signal][0],
                         params=[Choice("VOUT", "DRAin", "ISWitch", "IOUT", "GATE", "VIN", "IIN")])
        self.add_command("FIXTure:LOAD:CAPacitance", setter=self._set_load_capacitance,
                         getter=lambda: self.model.output_capacitance_f - self.model.design.stage.c_out_f,
                         params=[Numeric(unit="F", minimum=0.0, maximum=1.0, default=0.0)])
        # the hold-up fixture: a bulk capacitor at the DUT input and a dropout switch in series with it
        self.add_command("FIXTure:INPut:CAPacitance", setter=self._set_input_capacitance,
                         getter=lambda: self.model.input_capacitance_f - self.model.design.start_up.input_capacitance_f,
                         params=[Numeric(unit="F", minimum=0.0, maximum=1.0, default=0.0)])
        self.add_command("FIXTure:INPut[:STATe]", setter=self._set_input_connected,
                         getter=lambda: self.model.input_connected, params=[Boolean()])
        self.add_command("FIXTure:CAPacitance", setter=self._set_attr("fixture_c_f"),
                         getter=lambda: self.fixture_c_f, params=[Numeric(unit="F", minimum=0.0, maximum=10e-9,
                                                                          default=0.0)])

    # ------------------------------------------------------------ state
    def _reset_state(self) -> None:
        self._ch = {n: _Channel(_DEFAULT_PROBES[n]) for n in range(1, self.CHANNELS + 1)}
        self.duration_s = 1e-3
        self.points = 10000
        self.x_origin_s = 0.0
        self.trig_source = "IMM"
        self.trig_level = 0.0
        self.trig_slope = "POS"
        self.trig_holdoff_s = 0.0
        self.trig_mode = "NORM"
        self.data_bits = 16
        self.data_real = False
        self.byte_order = "NORM"
        self.fixture_c_f = 0.0
        self._armed_at: float | None = None
        self._trigger_t: float | None = None
        self._record: dict[int, tuple[np.ndarray, tuple]] | None = None
        self._record_setup: tuple | None = None
        self._op_at_arm = None
        self._memory_s = 0.0
        self._searched: set[tuple[float, float]] = set()

    def on_reset(self) -> None:
        self._reset_state()
        if not self.model.input_connected:      # the hold-up fixture's switch closes at a reset
            self.model.set_input_connected(True)

    def _setter(self, attr: str):
        def set_(value, n: int) -> None:
            setattr(self._ch[n], attr, value)
        return set_

    def _getter(self, attr: str):
        return lambda n: getattr(self._ch[n], attr)

    def _set_attr(self, attr: str):
        def set_(value) -> None:
            setattr(self, attr, value)
        return set_

    def _check_rate(self, duration_s: float, points: int) -> None:
        dt = duration_s / points
        if dt < self.MIN_SAMPLE_INTERVAL_S * (1 - 1e-9):
            raise ScpiExecutionError(-221, "Settings conflict",
                                     f"{points} points in {duration_s:g} s need {1 / dt:.3g} Sa/s, above the "
                                     f"{1 / self.MIN_SAMPLE_INTERVAL_S:.3g} Sa/s maximum; use fewer points or a longer record")

    def _set_duration(self, value: float) -> None:
        self._check_rate(value, self.points)
        self.duration_s = value

    def _set_points(self, value: int) -> None:
        self._check_rate(self.duration_s, int(value))
        self.points = int(value)

    def _set_offset(self, value: float) -> None:
        self.x_origin_s = value

    def _set_trig_source(self, value: str) -> None:
        self.trig_source = "EXT" if value.startswith("EXT") else "IMM" if value.startswith("IMM") else value

    def _set_format(self, kind: str, bits: int | None) -> None:
        if kind == "REAL":
            if bits not in (None, 32):
                raise ScpiExecutionError(-224, "Illegal parameter value", "REAL data is 32 bits; send FORM REAL,32")
            self.data_real, self.data_bits = True, 32
        else:
            if bits not in (None, 8, 16):
                raise ScpiExecutionError(-224, "Illegal parameter value", "INTeger data is 8 or 16 bits")
            self.data_real, self.data_bits = False, 16 if bits is None else int(bits)

    def _get_format(self) -> str:
        return f"{'REAL' if self.data_real else 'INT'},{self.data_bits}"

    def _set_load_capacitance(self, value: float) -> None:
        self.model.set_output_capacitance(value)
        self.audit_state("fixture_load_capacitance_f", value)

    def _set_input_capacitance(self, value: float) -> None:
        self.model.set_input_capacitance(value)
        self.audit_state("fixture_input_capacitance_f", value)

    def _set_input_connected(self, on: bool) -> None:
        self.model.set_input_connected(on)
        self.audit_state("fixture_input_connected", bool(on))

    def _set_probe(self, word: str, n: int) -> None:
        self._ch[n].signal = _PROBE_WORDS[word]
        self._record = None

    # ------------------------------------------------------------ acquisition
    def _initiate(self) -> None:
        self._armed_at = self.model.clock.now_s()
        self._trigger_t = self._armed_at if self.trig_source == "IMM" else None
        self._record = None
        self._op_at_arm = self.model.operating_point()
        self._record_setup = None
        self._searched = set()
        design = self.model.design
        probe = RecordSynth(RecordContext(design, self._op_at_arm, ()))
        self._memory_s = probe.zout.memory_s if probe.zout is not None else 5 * design.bench.settle_tau_s

    def _abort(self) -> None:
        self._armed_at = None
        self._trigger_t = None

    def _operation_condition(self) -> int:
        if self.pending_done():
            return 0
        return 32 if self._trigger_t is None else 16

    def pending_done(self) -> bool:
        if self._armed_at is None:
            return True
        now = self.model.clock.now_s()
        if self._trigger_t is None:
            self._trigger_t = self._find_trigger(self._armed_at, now)
            if self._trigger_t is None and self.trig_mode == "AUTO" and now >= self._armed_at + self.AUTO_TIMEOUT_S:
                self._trigger_t = self._armed_at + self.AUTO_TIMEOUT_S
        if self._trigger_t is None:
            return False
        return now >= self._trigger_t + self.x_origin_s + self.duration_s

    def _context(self, t_from: float, t_to: float) -> RecordContext:
        design = self.model.design
        steps = tuple(self.activity.steps_between(t_from - self._memory_s, t_to))
        op_base = steps[0].op_before if steps else self._op_at_arm
        return RecordContext(design, op_base, steps, self.fixture_c_f)

    def _find_trigger(self, t_arm: float, now: float) -> float | None:
        if self.trig_source == "EXT":
            for st in self.activity.steps_between(t_arm, now):
                if st.trigger_out:
                    return st.t_s
            return None
        n = int(self.trig_source[2])
        signal = self._ch[n].signal
        if signal in SERIES_ONLY or (signal in SERIES_INDEX and self._free_running_since(t_arm, now)):
            return self._find_series_trigger(signal, t_arm, now)
        dt = self.duration_s / self.points
        ts = self.model.design.ts_s
        windows = [(t_arm, t_arm + 3 * ts + self.trig_holdoff_s)]
        for st in self.activity.steps_between(t_arm, now):
            windows.append((st.t_s - self.trig_holdoff_s, st.t_s + st.ramp_s + self.duration_s))
        windows = [w for w in windows if w not in self._searched]
        if not windows:
            return None
        ctx = self._context(t_arm, now + self.duration_s)
        synth = RecordSynth(ctx)
        level = self.trig_level
        if self._ch[n].coupling == "AC":
            level = level + synth.dc_level(signal)
        for a, b in windows:
            step = max(min(dt, ts / 500.0), (b - a) / self.TRIGGER_SEARCH_POINTS)
            t = np.arange(a, b, step)
            if t.size < 2:
                continue
            v = probed_signal(self.model, synth, signal, t)
            hit = self._first_edge(t, v, level, step)
            if hit is not None and hit >= t_arm:
                return hit
            self._searched.add((a, b))
        return None

    def _free_running_since(self, t_arm: float, now: float) -> bool:
        """Whether a start, stop or lock-out is in force at arming or began after it."""
        times = [t_arm] + self.model.event_times_between(t_arm, now)
        return bool(np.any(self.model.free_running_mask(np.array(sorted(times)))))

    def _find_series_trigger(self, signal: str, t_arm: float, now: float) -> float | None:
        """First edge of ``signal`` in the model's series from ``t_arm`` to ``now``, refined once."""
        if now <= t_arm:
            return None
        level = self.trig_level
        if self._ch[int(self.trig_source[2])].coupling == "AC":
            level = level + RecordSynth(RecordContext(self.model.design, self._op_at_arm, ())).dc_level(signal)
        synth = RecordSynth(self._context(t_arm, now))
        a = t_arm - self.trig_holdoff_s
        step = max((now - a) / self.SERIES_SEARCH_POINTS, 1e-9)
        t = np.arange(a, now, step)
        if t.size < 2:
            return None
        v = probed_signal(self.model, synth, signal, t)
        hit = self._first_edge(t, v, level, step)
        if hit is None:
            return None
        fine = max(step / 1000.0, 1e-10)
        lo = max(hit - 2 * step, a)
        tf = np.arange(lo, min(hit + 2 * step, now), fine)
        if tf.size >= 2:
            vf = probed_signal(self.model, synth, signal, tf)
            edges = np.flatnonzero((vf[1:] > level) != (vf[:-1] > level))
            if edges.size:
                k = int(edges[0]) + 1
                a0, b0 = vf[k - 1], vf[k]
                frac = (level - a0) / (b0 - a0) if b0 != a0 else 0.0
                hit = float(tf[k - 1] + frac * fine)
        return hit if hit >= t_arm else None

    def _first_edge(self, t: np.ndarray, v: np.ndarray, level: float, step: float) -> float | None:
        above = v > level
        idx = np.flatnonzero(above[1:] != above[:-1]) + 1
        hold = int(math.ceil(self.trig_holdoff_s / step)) if self.trig_holdoff_s > 0 else 0
        for k in idx:
            rising = bool(above[k])
            if self.trig_slope == "POS" and not rising or self.trig_slope == "NEG" and rising:
                continue
            if hold:
                if k - hold < 0 or np.any(above[k - hold:k] == rising):
                    continue
            a, b = v[k - 1], v[k]
            frac = (level - a) / (b - a) if b != a else 0.0
            return float(t[k - 1] + frac * (t[k] - t[k - 1]))
        return None

    def _acquire(self) -> None:
        if self._armed_at is None or self._trigger_t is None or not self.pending_done():
            raise ScpiExecutionError(-221, "Settings conflict",
                                     "no complete acquisition: send INIT and wait for *OPC? before reading a trace")
        setup = (self.data_real, self.data_bits, self.byte_order)
        if self._record is not None and self._record_setup == setup:
            return
        dt = self.duration_s / self.points
        t_rel = self.x_origin_s + np.arange(self.points) * dt
        t_abs = self._trigger_t + t_rel
        synth = RecordSynth(self._context(float(t_abs[0]), float(t_abs[-1])))
        record = {}
        fs = 1.0 / dt
        for n, ch in self._ch.items():
            if not ch.on:
                continue
            v = probed_signal(self.model, synth, ch.signal, t_abs)
            if ch.coupling == "AC":
                v = v - synth.dc_level(ch.signal)
            bw = min(self.ANALOG_BANDWIDTH_HZ, ch.bw_freq_hz) if ch.bw_limit else self.ANALOG_BANDWIDTH_HZ
            if bw < 0.5 * fs:
                v = first_order_low_pass(v, bw, dt)
            scale = ch.range_v / 10.0
            v = v + self._rng.normal(0.0, self.NOISE_DIV_RMS * scale, v.size)
            record[n] = self._encode(v, ch, dt)
        self._record = record
        self._record_setup = setup

    def _encode(self, v: np.ndarray, ch: _Channel, dt: float) -> tuple[bytes, tuple]:
        scale = ch.range_v / 10.0
        lo, hi = ch.offset_v - 5 * scale, ch.offset_v + 5 * scale
        order = ">" if self.byte_order == "NORM" else "<"
        if self.data_real:
            data = np.clip(v, lo, hi).astype(order + "f4").tobytes()
            y = (1.0, 0.0, 0.0)
        else:
            levels = 1 << self.data_bits
            y_inc = ch.range_v / levels
            top = levels // 2 - 1
            codes = np.clip(np.rint((v - ch.offset_v) / y_inc), -top - 1, top)
            data = codes.astype(order + ("i1" if self.data_bits == 8 else "i2")).tobytes()
            y = (y_inc, ch.offset_v, 0.0)
        pre = (self.data_bits, self.points, dt, self.x_origin_s, 0.0) + y + (1 if order == ">" else 0,
                                                                            SIGNAL_UNITS[ch.signal])
        return data, pre

    def _channel_record(self, n: int) -> tuple[bytes, tuple]:
        if not self._ch[n].on:
            raise ScpiExecutionError(-221, "Settings conflict", f"channel {n} is off; send INP{n} ON and acquire again")
        self._acquire()
        assert self._record is not None
        if n not in self._record:
            raise ScpiExecutionError(-221, "Settings conflict", f"channel {n} was off during the acquisition")
        return self._record[n]

    def _preamble(self, n: int) -> str:
        _, pre = self._channel_record(int(n))
        bits, points, dt, x0, xref, yinc, yorg, yref, msb, unit = pre
        return (f"{bits},{points},{dt:.12e},{x0:.12e},{xref:.1f},{yinc:.12e},{yorg:.12e},{yref:.1f},{msb},{unit}")

    def _data(self, n: int) -> bytes:
        data, _ = self._channel_record(int(n))
        return data
