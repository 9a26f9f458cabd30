"""Digitizing oscilloscope over SCPI: channels, timebase, trigger, single acquisition and
binary waveform transfer.

Command forms of our own on SCPI-1999 subsystem names (INPut, SENSe, TRIGger, INITiate,
ABORt, FORMat, TRACe), every one overridable per station in ``[instruments.scope.commands]``.
Vertical: ``scale`` is units per division over 10 divisions (full-scale range = 10·scale).
Horizontal: ``scale`` is seconds per division over 10 divisions; ``position_s`` is the
time of the screen centre after the trigger.

Waveform transfer: the preamble (``TRACe:PREamble?``: bits, points, x_increment,
x_origin, x_reference, y_increment, y_origin, y_reference, msb_first, unit) and the
samples as an IEEE 488.2 definite-length block (IEEE 488.2-1992 §8.7.9), read by the
session layer's one block reader (:meth:`drivers.session.VisaSession.read_block`: header,
then exactly the byte count; on a pyvisa-py raw socket its fast path, preamble and block
in one round trip). Scaling with the preamble formula of
:func:`drivers.ieee488_block.scale_waveform`. A bad argument (channel, scale, mode)
raises :class:`benchctl.errors.UsageError` before anything is sent.
"""

from __future__ import annotations

import logging
import sys
import time
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any, ClassVar, Literal

import numpy as np
from numpy.typing import NDArray

from benchctl.errors import BenchctlError, InstrumentResponseError, InstrumentStateError, InstrumentTimeout, UsageError
from benchctl.drivers.ieee488_block import decode_samples, scale_waveform
from benchctl.drivers.scpi_driver import OptionSpec, ScpiDriver, choice_option

logger = logging.getLogger(__name__)

Coupling = Literal["AC", "DC"]
Slope = Literal["rising", "falling", "either"]
TriggerMode = Literal["normal", "auto"]
DataFormat = Literal["int8", "int16", "float32"]

_SLOPES = {"rising": "POS", "falling": "NEG", "either": "EITH"}
_FORMATS = {"int8": "INT,8", "int16": "INT,16", "float32": "REAL,32"}
_DTYPE_FOR_BITS = {(8, False): "int8", (16, False): "int16", (32, True): "float32"}
DIVISIONS = 10


@dataclass(frozen=True)
class WaveformPreamble:
    """Scaling of one transferred trace (seconds; volts or amperes per code)."""

    bits: int
    points: int
    x_increment_s: float
    x_origin_s: float
    x_reference: float
    y_increment: float
    y_origin: float
    y_reference: float
    msb_first: bool
    unit: str

    @property
    def dtype(self) -> str:
        try:
            return _DTYPE_FOR_BITS[(self.bits, self.bits == 32)]
        except KeyError:
            raise InstrumentResponseError(f"preamble names {self.bits}-bit samples, which this driver cannot decode") from None


@dataclass(frozen=True, eq=False)
class ScopeWaveform:
    """One channel's record: times from the trigger (s) and values (``unit``: V or A).

    ``clipped_samples`` counts samples at the limits of the screen (the ends of the ADC
    range, or for float transfers the screen edges read back from the scope); non-zero
    means the vertical scale or offset cut the signal. ``clipped_high_samples`` /
    ``clipped_low_samples`` split it by edge; ``screen_low`` / ``screen_high`` are the
    values at the bottom and top of the screen (None when unknown).
    """

    channel: int
    t_s: NDArray[np.float64]
    values: NDArray[np.float64]
    unit: str
    sample_interval_s: float
    clipped_samples: int
    preamble: WaveformPreamble
    clipped_high_samples: int = 0
    clipped_low_samples: int = 0
    screen_low: float | None = None
    screen_high: float | None = None

    @property
    def clipped(self) -> bool:
        """True when any sample sits at a screen limit."""
        return self.clipped_samples > 0


class Oscilloscope(ScpiDriver):
    """A digitizing oscilloscope with ``channels`` inputs (4 by default; station option ``channels``)."""

    kind: ClassVar[str] = "oscilloscope"
    COMMANDS: ClassVar[dict[str, str]] = {
        "set_channel_on": "INP{channel}:STAT {state}",
        "set_coupling": "INP{channel}:COUP {coupling}",
        "set_bw_limit": "INP{channel}:FILT {state}",
        "set_bw_limit_freq": "INP{channel}:FILT:FREQ {value:.6g}",
        "get_bw_limit": "INP{channel}:FILT?",
        "get_bw_limit_freq": "INP{channel}:FILT:FREQ?",
        "set_range": "SENS{channel}:VOLT:RANG {value:.6g}",
        "get_range": "SENS{channel}:VOLT:RANG?",
        "set_offset": "SENS{channel}:VOLT:OFFS {value:.6g}",
        "get_offset": "SENS{channel}:VOLT:OFFS?",
        "set_record_time": "SENS:SWE:TIME {value:.9g}",
        "set_points": "SENS:SWE:POIN {value:d}",
        "set_time_offset": "SENS:SWE:OFFS:TIME {value:.9g}",
        "get_sample_interval": "SENS:SWE:TINT?",
        "set_trigger_source": "TRIG:SOUR {source}",
        "set_trigger_level": "TRIG:LEV {value:.6g}",
        "set_trigger_slope": "TRIG:SLOP {slope}",
        "set_trigger_holdoff": "TRIG:HOLD {value:.6g}",
        "set_trigger_mode": "TRIG:MODE {mode}",
        "arm": "INIT",
        "abort": "ABOR",
        "set_format": "FORM {format}",
        "set_byte_order": "FORM:BORD {order}",
        "get_preamble": "TRAC:PRE? {channel}",
        "get_data": "TRAC? {channel}",
        "set_fixture_capacitance": "FIXT:CAP {value:.6g}",
        "get_done": "INIT:DONE?",
        "get_operation_condition": "STAT:OPER:COND?",
        "set_fixture_probe": "FIXT:PROB{channel} {word}",
        "set_fixture_load_capacitance": "FIXT:LOAD:CAP {value:.6g}",
        "set_fixture_input_capacitance": "FIXT:INP:CAP {value:.6g}",
        "set_fixture_input_connected": "FIXT:INP {state}",
    }
    #: Probe words of the simulated DUT fixture, by signal name.
    FIXTURE_PROBES: ClassVar[dict[str, str]] = {
        "vout": "VOUT", "drain": "DRA", "switch_current": "ISW", "output_current": "IOUT", "gate": "GATE",
        "vin": "VIN", "input_current": "IIN"}

    OPTIONS: ClassVar[dict[str, OptionSpec]] = {
        "channels": OptionSpec(4, 1, 64, whole=True, help="number of input channels"),
        # how a capture is awaited; left out: *OPC? for wait_acquired/single, the done query for wait_triggered
        "capture_wait": choice_option(None, ("done_query", "operation_register", "opc_query"),
                                      help="how the end of a capture is awaited"),
        # STATus:OPERation bits that mean "still capturing": 4 MEASuring and 5 waiting for TRIGger
        # (SCPI-1999 Vol. 2 §9.7.1, from memory); a scope that uses other bits names them here
        "capture_busy_mask": OptionSpec(48, 1, 65535, whole=True,
                                        help="STAT:OPER:COND? bits set while a capture runs (capture_wait = "
                                             "operation_register)"),
        "capture_poll_s": OptionSpec(0.005, 0.0005, 10, help="polling period of a capture wait, s"),
    }

    def __init__(self, resource: str, **kwargs: Any) -> None:
        super().__init__(resource, **kwargs)
        self.channels = int(self.option("channels"))
        self.capture_wait: str | None = self.option("capture_wait")
        self.capture_busy_mask = int(self.option("capture_busy_mask"))
        self.capture_poll_s = float(self.option("capture_poll_s"))
        self._acquired = False

    # -- helpers -------------------------------------------------------------------

    def _channel(self, channel: int) -> int:
        if not (isinstance(channel, int) and 1 <= channel <= self.channels):
            raise UsageError(f"channel must be 1..{self.channels}, got {channel!r}")
        return channel

    # -- vertical ------------------------------------------------------------------

    def set_channel_enabled(self, channel: int, on: bool) -> None:
        self.write("set_channel_on", channel=self._channel(channel), state=self.on_off(on))

    def set_scale(self, channel: int, per_div: float) -> None:
        """Vertical scale in V/div (A/div on a current probe); full scale is 10 divisions."""
        if not per_div > 0:
            raise UsageError(f"vertical scale must be positive, got {per_div!r}")
        self.write("set_range", channel=self._channel(channel), value=per_div * DIVISIONS)

    def scale(self, channel: int) -> float:
        return self.query_float("get_range", channel=self._channel(channel)) / DIVISIONS

    def set_offset(self, channel: int, offset: float) -> None:
        """Value at the centre of the screen (V or A)."""
        self.write("set_offset", channel=self._channel(channel), value=offset)

    def offset(self, channel: int) -> float:
        """Value at the centre of the screen (V or A), read back."""
        return self.query_float("get_offset", channel=self._channel(channel))

    def screen(self, channel: int) -> tuple[float, float]:
        """(bottom, top) of the screen in the channel's unit: offset -/+ 5 divisions, read back."""
        centre, per_div = self.offset(channel), self.scale(channel)
        return centre - per_div * DIVISIONS / 2, centre + per_div * DIVISIONS / 2

    def set_coupling(self, channel: int, coupling: Coupling) -> None:
        if coupling not in ("AC", "DC"):
            raise UsageError(f"coupling must be 'AC' or 'DC', not {coupling!r}")
        self.write("set_coupling", channel=self._channel(channel), coupling=coupling)

    def set_bandwidth_limit(self, channel: int, limit_hz: float | None) -> None:
        """Bandwidth limit in Hz (20e6 is the usual ripple setting), or None for full bandwidth."""
        ch = self._channel(channel)
        if limit_hz is None:
            self.write("set_bw_limit", channel=ch, state="OFF")
            return
        if not limit_hz > 0:
            raise UsageError(f"bandwidth limit must be positive Hz or None, got {limit_hz!r}")
        self.write("set_bw_limit_freq", channel=ch, value=limit_hz)
        self.write("set_bw_limit", channel=ch, state="ON")

    def bandwidth_limit_hz(self, channel: int) -> float | None:
        """The bandwidth limit in force (Hz), None when the channel runs at full bandwidth."""
        ch = self._channel(channel)
        if not self.query_bool("get_bw_limit", channel=ch):
            return None
        return self.query_float("get_bw_limit_freq", channel=ch)

    # -- horizontal ----------------------------------------------------------------

    def set_timebase(self, scale_s_per_div: float, *, position_s: float = 0.0, points: int | None = None) -> None:
        """Horizontal scale (s/div, 10 divisions), screen centre ``position_s`` after the trigger, record length."""
        if not scale_s_per_div > 0:
            raise UsageError(f"timebase scale must be positive seconds, got {scale_s_per_div!r}")
        if points is not None:
            self.write("set_points", value=int(points))
        self.write("set_record_time", value=scale_s_per_div * DIVISIONS)
        self.write("set_time_offset", value=position_s - scale_s_per_div * DIVISIONS / 2)

    def set_record(self, duration_s: float, points: int, *, pre_trigger_s: float = 0.0) -> None:
        """The same as :meth:`set_timebase`, given as a record: ``duration_s`` long,
        ``points`` samples, starting ``pre_trigger_s`` before the trigger."""
        self.set_timebase(duration_s / DIVISIONS, position_s=duration_s / 2 - pre_trigger_s, points=points)

    def sample_interval_s(self) -> float:
        return self.query_float("get_sample_interval")

    # -- trigger and acquisition ----------------------------------------------------

    def set_trigger(self, source: int | Literal["external", "immediate"], *, level: float = 0.0,
                    slope: Slope = "rising", mode: TriggerMode = "normal", holdoff_s: float = 0.0) -> None:
        """Edge trigger on a channel (level in its unit) or on the external input, or free-running."""
        if source == "external":
            word = "EXT"
        elif source == "immediate":
            word = "IMM"
        else:
            word = f"CH{self._channel(source)}"
        if slope not in _SLOPES:
            raise UsageError(f"slope must be one of {', '.join(_SLOPES)}, not {slope!r}")
        if mode not in ("normal", "auto"):
            raise UsageError(f"trigger mode must be 'normal' or 'auto', not {mode!r}")
        self.write("set_trigger_source", source=word)
        self.write("set_trigger_level", value=level)
        self.write("set_trigger_slope", slope=_SLOPES[slope])
        self.write("set_trigger_holdoff", value=holdoff_s)
        self.write("set_trigger_mode", mode="AUTO" if mode == "auto" else "NORM")

    def arm(self) -> None:
        """Start one acquisition (it completes on the next trigger)."""
        self._acquired = False
        self.write("arm")

    def abort(self) -> None:
        self.write("abort")

    def stop_activity(self) -> None:
        """At a run's shutdown: abort a pending acquisition (one message, not retried, no error check)."""
        self.send_at_shutdown(self.command("abort"))

    def wait_acquired(self, timeout_s: float = 10.0) -> None:
        """Block until the armed acquisition is complete: ``*OPC?`` (the default, ``capture_wait``
        left out or ``opc_query``), or polling as ``capture_wait`` says (then a capture that does
        not end within ``timeout_s`` is aborted, as in :meth:`wait_triggered`)."""
        if self.capture_wait in (None, "opc_query"):
            self.wait_complete(timeout_s)
            self._acquired = True
            return
        self.wait_triggered(timeout_s, poll_s=self.capture_poll_s)

    def single(self, timeout_s: float = 10.0) -> None:
        """Arm one acquisition and wait for it (for a trigger that comes by itself)."""
        with self._lock:
            self.arm()
            self.wait_acquired(timeout_s)

    def wait_triggered(self, timeout_s: float, *, poll_s: float = 0.005,
                       clock: Callable[[], float] = time.monotonic,
                       sleep: Callable[[float], None] = time.sleep) -> None:
        """Wait for a single-shot acquisition armed with :meth:`arm` to trigger and complete.

        Polls ``INIT:DONE?`` (``capture_wait`` left out or ``done_query``) or ``STAT:OPER:COND?``
        until none of ``capture_busy_mask``'s bits is set (``operation_register``) every ``poll_s``
        (the instrument stays free to answer anything else) until ``timeout_s`` (s, from
        ``clock``) has passed; then aborts the acquisition and raises :class:`InstrumentTimeout`,
        so a trigger that never comes ends cleanly. ``capture_wait = "opc_query"`` waits with
        ``*OPC?`` within ``timeout_s`` instead (and aborts on its timeout too). A poll that gets no
        answer says so with both timeouts: the exchange's and the wait's.
        """
        if not timeout_s > 0:
            raise UsageError(f"timeout_s must be positive seconds, got {timeout_s!r}")
        if self.capture_wait == "opc_query":
            try:
                self.wait_complete(timeout_s)
            except InstrumentTimeout:
                self._abort_after_timeout()
                raise
            self._acquired = True
            return
        by_register = self.capture_wait == "operation_register"
        key = "get_operation_condition" if by_register else "get_done"
        deadline = clock() + timeout_s
        while True:
            try:
                done = (not int(self.query_float(key)) & self.capture_busy_mask) if by_register \
                    else self.query_bool(key)
            except InstrumentTimeout as exc:
                raise exc.located(detail=f"{exc.detail} (the instrument's timeout_s of {self.timeout_s:g} s for one "
                                         f"exchange, while waiting up to {timeout_s:g} s for the capture)") from exc
            if done:
                self._acquired = True
                return
            if clock() >= deadline:
                break
            sleep(poll_s)
        self._abort_after_timeout()
        raise InstrumentTimeout(
                f"no trigger within {timeout_s:g} s: the single-shot acquisition was aborted; check the "
                "trigger source, level and slope against the signal, or give a longer timeout",
                instrument=self.name, command=self.command(key))

    def _abort_after_timeout(self) -> None:
        try:
            self.abort()
        except BenchctlError as exc:  # the timeout is the news; a failed abort only adds to it
            logger.warning("%s: abort after the trigger timeout failed: %s", self.name, exc)

    # -- transfer ------------------------------------------------------------------

    def set_data_format(self, fmt: DataFormat = "int16") -> None:
        """Sample format of transfers, in this computer's byte order (no byte swapping on decode)."""
        if fmt not in _FORMATS:
            raise UsageError(f"data format must be one of {', '.join(_FORMATS)}, not {fmt!r}")
        self.write("set_format", format=_FORMATS[fmt])
        self.write("set_byte_order", order="NORM" if sys.byteorder == "big" else "SWAP")

    def preamble(self, channel: int) -> WaveformPreamble:
        """Scaling of the last acquisition of ``channel``."""
        ch = self._channel(channel)
        return self._parse_preamble(self.query("get_preamble", channel=ch), self.command("get_preamble", channel=ch))

    def _parse_preamble(self, text: str, command: str) -> WaveformPreamble:
        fields = [f.strip() for f in text.strip().split(",")]
        try:
            if len(fields) != 10:
                raise ValueError(f"{len(fields)} fields")
            return WaveformPreamble(
                bits=int(fields[0]), points=int(fields[1]), x_increment_s=float(fields[2]),
                x_origin_s=float(fields[3]), x_reference=float(fields[4]), y_increment=float(fields[5]),
                y_origin=float(fields[6]), y_reference=float(fields[7]), msb_first=fields[8] == "1",
                unit=fields[9].strip('"'),
            )
        except ValueError as exc:
            self.raise_on_errors(command)
            raise InstrumentResponseError(
                f"preamble {text[:120]!r} is not bits,points,x_inc,x_origin,x_ref,y_inc,y_origin,y_ref,msb,unit ({exc})",
                instrument=self.name, command=command,
            ) from None

    def _fetch_combined(self, ch: int) -> tuple[WaveformPreamble, bytes] | None:
        """Preamble and block in one message (``<preamble query>;:<data query>``), one round trip
        instead of two where the session can (its fast path); None where it cannot, or where the
        instrument's dialect says it takes no compound messages (``error_check`` other than compound)."""
        if self.error_check != "compound":
            return None
        pre_q, data_q = self.command("get_preamble", channel=ch), self.command("get_data", channel=ch)
        both = self.query_text_and_block(f"{pre_q};:{data_q.lstrip(':')}")
        if both is None:
            return None
        text, payload = both
        return self._parse_preamble(text, pre_q), payload

    def fetch_waveform(self, channel: int) -> ScopeWaveform:
        """The last acquisition of ``channel`` in seconds and volts (or amperes)."""
        ch = self._channel(channel)
        if not self._acquired:
            raise InstrumentStateError(
                "no completed acquisition to read; call single(), or arm() and wait_acquired(), first",
                instrument=self.name, command=self.command("get_data", channel=ch))
        with self._lock:
            both = self._fetch_combined(ch)
            if both is not None:
                pre, payload = both
            else:
                pre = self.preamble(ch)
                payload = self.read_block(self.command("get_data", channel=ch))
        codes = decode_samples(payload, pre.dtype, byte_order="big" if pre.msb_first else "little")
        if codes.size != pre.points:
            raise InstrumentResponseError(
                f"block holds {codes.size} samples but the preamble says {pre.points}",
                instrument=self.name, command=self.command("get_data", channel=ch))
        scaled = scale_waveform(codes, pre.x_increment_s, pre.x_origin_s, pre.x_reference, pre.y_increment,
                                pre.y_origin, pre.y_reference, unit=pre.unit)
        t_s, values = scaled.t_s, scaled.values
        if pre.dtype == "float32":
            # float samples carry no ADC code: the screen edges read back tell where the trace was cut
            low, high = self.screen(ch)
            tol = 1e-6 * (high - low)
            n_high = int(np.count_nonzero(values >= high - tol))
            n_low = int(np.count_nonzero(values <= low + tol))
        else:
            info = np.iinfo(pre.dtype)
            n_high = int(np.count_nonzero(codes == info.max))
            n_low = int(np.count_nonzero(codes == info.min))
            low = pre.y_origin + (info.min - pre.y_reference) * pre.y_increment
            high = pre.y_origin + (info.max - pre.y_reference) * pre.y_increment
        return ScopeWaveform(ch, t_s, values, pre.unit, pre.x_increment_s, n_high + n_low, pre,
                             clipped_high_samples=n_high, clipped_low_samples=n_low,
                             screen_low=float(low), screen_high=float(high))

    # -- simulated fixture -------------------------------------------------------------

    def set_fixture_capacitance(self, capacitance_f: float) -> None:
        """Add a known capacitance at the switch node (two-capacitor method).

        On the simulated bench this is a command of the simulated DUT fixture; a real
        station with a relay-switched capacitor overrides ``set_fixture_capacitance``
        with the command that switches it.
        """
        if not capacitance_f >= 0:
            raise UsageError(f"capacitance must be >= 0 F, got {capacitance_f!r}")
        self.write("set_fixture_capacitance", value=capacitance_f)

    def set_fixture_probe(self, channel: int, signal: str) -> None:
        """Place channel ``channel``'s probe of the simulated DUT fixture on ``signal``
        (one of ``FIXTURE_PROBES``: vout, drain, switch_current, output_current, gate, vin,
        input_current); on a real station the probes are placed by hand and this is not called."""
        if signal not in self.FIXTURE_PROBES:
            raise UsageError(f"signal must be one of {', '.join(self.FIXTURE_PROBES)}, not {signal!r}")
        self.write("set_fixture_probe", channel=self._channel(channel), word=self.FIXTURE_PROBES[signal])

    def set_fixture_load_capacitance(self, capacitance_f: float) -> None:
        """Switch a capacitance across the DUT output (a capacitive load for start-up tests), F.

        On the simulated bench a command of the simulated fixture; a real station with a
        relay-switched capacitor bank overrides ``set_fixture_load_capacitance``.
        """
        if not capacitance_f >= 0:
            raise UsageError(f"capacitance must be >= 0 F, got {capacitance_f!r}")
        self.write("set_fixture_load_capacitance", value=capacitance_f)

    def set_fixture_input_capacitance(self, capacitance_f: float) -> None:
        """Switch a bulk (hold-up) capacitor across the DUT input, F.

        On the simulated bench a command of the simulated fixture; a real station with a
        relay-switched capacitor overrides ``set_fixture_input_capacitance``.
        """
        if not capacitance_f >= 0:
            raise UsageError(f"capacitance must be >= 0 F, got {capacitance_f!r}")
        self.write("set_fixture_input_capacitance", value=capacitance_f)

    def set_fixture_input_connected(self, connected: bool) -> None:
        """Close (True) or open the series switch between the source and the DUT input: opening it
        while the DUT runs drops the input out with nothing sinking current from the DUT's bulk
        capacitance (a hold-up test). A real station overrides it with its relay or MOSFET switch."""
        self.write("set_fixture_input_connected", state="ON" if connected else "OFF")

    def safe_state(self) -> None:
        """A scope drives nothing; abort a pending acquisition."""
        try:
            self.abort()
        except Exception as exc:  # safe_state must not mask the reason it was called
            logger.debug("%s: abort failed: %s", self.name, exc)
