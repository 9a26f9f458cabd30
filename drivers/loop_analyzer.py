"""Frequency-response (loop) analyzer over SCPI: sweep set-up, injection, wait, fetch.

Command forms on SCPI-1999 subsystem names (Vol. 2: SENSe, SOURce, INITiate, ABORt,
STATus, FORMat, TRACe; the dialect is the table below, overridable per station like
every driver's)::

    SENS:FREQ:STAR / :STOP, SENS:SWE:POIN, SENS:SWE:SPAC LOG|LIN, SENS:SWE:TIME?,
    SENS:BAND, SENS:AVER:COUN, SENS:LOOP:POL NORM|INV,
    SOUR:VOLT <V peak>, SOUR:VOLT:PROF ON|OFF, SOUR:VOLT:PROF:DATA "<f1>,<A1>,...",
    INIT, ABOR, STAT:OPER:COND? (bit 4 measuring), FORM REAL,64|ASC, FORM:BORD NORM|SWAP,
    TRAC? FREQ|RESP (re, im interleaved), TRAC:POIN?,
    SENS:FUNC LOOP|RAT (loop injection, or the ratio ch2/ch1 of an external stimulus),
    INP<n>:SCAL <unit/V> (channel n's probe or monitor factor)

Waiting: ``*OPC?`` (IEEE 488.2-1992 §10.18) or polling the operation condition register,
with a timeout of ``sweep_timeout_factor`` × the instrument's own sweep-time estimate
(``SENS:SWE:TIME?``) plus the station's ``timeout_s`` — so a long sweep does not trip the
ordinary I/O timeout and a hung one is still caught.

Binary transfer: ``FORM REAL,64`` data are read as an IEEE 488.2 definite-length block
(§8.7.9) by the session layer's one block reader (:meth:`ScpiDriver.read_block`: header,
then exactly the byte count, never through the newline read-termination path, because
float64 payloads contain 0x0A bytes). ``NORMal`` byte order is big-endian, ``SWAPped``
little. A bad argument raises :class:`benchctl.errors.UsageError` before anything is sent.
"""

from __future__ import annotations

import logging
import math
import time
from dataclasses import dataclass
from typing import Any, Callable, ClassVar, Literal, Sequence

import numpy as np
from numpy.typing import NDArray

from benchctl.errors import InstrumentResponseError, InstrumentStateError, InstrumentTimeout, UsageError
from benchctl.drivers.ieee488_block import decode_samples
from benchctl.drivers.scpi_driver import OptionSpec, ScpiDriver

logger = logging.getLogger(__name__)

Spacing = Literal["log", "linear"]
DataFormat = Literal["real64", "ascii"]
OPERATION_MEASURING_BIT = 16
"""Bit 4 ("measuring") of the SCPI operation status register (SCPI-1999 Vol. 1 §9, from memory)."""


@dataclass(frozen=True)
class InjectionProfile:
    """Injection amplitude against frequency: breakpoints ``freq_hz`` (Hz, increasing) and
    ``amplitude_v`` (V peak), interpolated log-log between them and flat outside.

    Larger amplitude where the loop gain is high keeps v_x = A/|1 + T| above the noise
    without overdriving the loop near and above crossover (common practice).
    """

    freq_hz: tuple[float, ...]
    amplitude_v: tuple[float, ...]

    def __post_init__(self) -> None:
        f = tuple(float(x) for x in self.freq_hz)
        a = tuple(float(x) for x in self.amplitude_v)
        if not f or len(f) != len(a):
            raise UsageError(
                f"injection profile: give as many amplitudes as frequencies (got {len(f)} and {len(a)})")
        if any(not (math.isfinite(x) and x > 0) for x in f + a):
            raise UsageError("injection profile: frequencies and amplitudes must be finite and > 0")
        if any(y <= x for x, y in zip(f, f[1:])):
            raise UsageError(f"injection profile: frequencies {f} must be strictly increasing")
        object.__setattr__(self, "freq_hz", f)
        object.__setattr__(self, "amplitude_v", a)

    @property
    def max_amplitude_v(self) -> float:
        return max(self.amplitude_v)

    def scaled(self, factor: float) -> "InjectionProfile":
        """The same shape with every amplitude multiplied by ``factor``."""
        return InjectionProfile(self.freq_hz, tuple(a * factor for a in self.amplitude_v))

    def amplitude_at(self, freq_hz: Sequence[float] | NDArray[np.float64]) -> NDArray[np.float64]:
        """Amplitude (V peak) at ``freq_hz``."""
        f = np.asarray(freq_hz, dtype=float)
        if len(self.freq_hz) == 1:
            return np.full(f.shape, self.amplitude_v[0])
        return 10.0 ** np.interp(np.log10(f), np.log10(self.freq_hz), np.log10(self.amplitude_v))

    def scpi_text(self) -> str:
        return ",".join(f"{f:.9g},{a:.9g}" for f, a in zip(self.freq_hz, self.amplitude_v))


@dataclass(frozen=True, eq=False)
class FrequencyResponse:
    """A fetched sweep: ``freq_hz`` (Hz) and the complex ``response`` as the analyzer
    reported it; ``polarity`` "normal" means the data are T, "inverted" means −T."""

    freq_hz: NDArray[np.float64]
    response: NDArray[np.complex128]
    polarity: str

    @property
    def gain_db(self) -> NDArray[np.float64]:
        return 20.0 * np.log10(np.abs(self.response))

    @property
    def phase_deg(self) -> NDArray[np.float64]:
        """Phase in degrees, wrapped to (−180, 180]."""
        return np.rad2deg(np.angle(self.response))


class LoopAnalyzer(ScpiDriver):
    """A frequency-response analyzer measuring a converter's loop gain by injection."""

    kind: ClassVar[str] = "loop_analyzer"
    COMMANDS: ClassVar[dict[str, str]] = {
        "set_start": "SENS:FREQ:STAR {value:.9g}",
        "set_stop": "SENS:FREQ:STOP {value:.9g}",
        "set_points": "SENS:SWE:POIN {value:d}",
        "set_spacing": "SENS:SWE:SPAC {spacing}",
        "sweep_time": "SENS:SWE:TIME?",
        "set_bandwidth": "SENS:BAND {value:.9g}",
        "set_averaging": "SENS:AVER:COUN {value:d}",
        "set_polarity": "SENS:LOOP:POL {polarity}",
        "set_injection": "SOUR:VOLT {value:.9g}",
        "set_profile_state": "SOUR:VOLT:PROF {state}",
        "set_profile_data": 'SOUR:VOLT:PROF:DATA "{points}"',
        "start_sweep": "INIT",
        "abort_sweep": "ABOR",
        "operation_condition": "STAT:OPER:COND?",
        "set_format": "FORM {format}",
        "set_byte_order": "FORM:BORD {order}",
        "trace_points": "TRAC:POIN?",
        "fetch_frequency": "TRAC? FREQ",
        "fetch_response": "TRAC? RESP",
        "set_function": "SENS:FUNC {function}",
        "get_function": "SENS:FUNC?",
        "set_channel_scale": "INP{channel:d}:SCAL {value:.9g}",
        "get_channel_scale": "INP{channel:d}:SCAL?",
    }
    #: Words the command table sends for the settings (override with the templates).
    SPACING_WORDS: ClassVar[dict[str, str]] = {"log": "LOG", "linear": "LIN"}
    FORMAT_WORDS: ClassVar[dict[str, str]] = {"real64": "REAL,64", "ascii": "ASC"}
    BYTE_ORDER_WORDS: ClassVar[dict[str, str]] = {"big": "NORM", "little": "SWAP"}
    POLARITY_WORDS: ClassVar[dict[bool, str]] = {False: "NORM", True: "INV"}
    FUNCTION_WORDS: ClassVar[dict[str, str]] = {"loop": "LOOP", "ratio": "RAT"}

    #: Injectable time for the polling wait (deterministic tests).
    clock: Callable[[], float] = staticmethod(time.monotonic)
    sleep: Callable[[float], None] = staticmethod(time.sleep)

    OPTIONS: ClassVar[dict[str, OptionSpec]] = {
        "sweep_timeout_factor": OptionSpec(1.5, 1.0, 100.0, help="wait for a sweep: factor x its estimated time"),
        "poll_interval_s": OptionSpec(0.02, 0.001, 10.0, help="status polling period of a sweep wait, s"),
        "injection_max_v": OptionSpec(None, 1e-6, 100.0, help="largest injection amplitude allowed, V peak; "
                                                             "without it a fifth of dut_output_voltage_max_v"),
    }

    def __init__(self, resource: str, **kwargs: Any) -> None:
        super().__init__(resource, **kwargs)
        self.sweep_timeout_factor = float(self.option("sweep_timeout_factor"))
        self.poll_interval_s = float(self.option("poll_interval_s"))
        self.data_format: DataFormat = "real64"
        self.byte_order: Literal["big", "little"] = "big"
        self.inverted = False
        self._format_sent: tuple[str, str] | None = None

    # -- settings --------------------------------------------------------------------

    def set_sweep(self, start_hz: float, stop_hz: float, points: int, spacing: Spacing = "log") -> None:
        """Sweep from ``start_hz`` to ``stop_hz`` (Hz) in ``points`` points, log or linear spaced."""
        if not (0 < start_hz < stop_hz):
            raise UsageError(f"sweep start {start_hz:g} Hz must be > 0 and below stop {stop_hz:g} Hz")
        if int(points) < 2:
            raise UsageError(f"a sweep needs at least 2 points, not {points}")
        if spacing not in self.SPACING_WORDS:
            raise UsageError(f"spacing {spacing!r} must be 'log' or 'linear'")
        self.write("set_start", value=float(start_hz))
        self.write("set_stop", value=float(stop_hz))
        self.write("set_points", value=int(points))
        self.write("set_spacing", spacing=self.SPACING_WORDS[spacing])

    def set_bandwidth(self, bandwidth_hz: float) -> None:
        """Measurement (detector) bandwidth, Hz: narrower is quieter and slower."""
        self.write("set_bandwidth", value=float(bandwidth_hz))

    def set_averaging(self, count: int) -> None:
        """Number of integrations averaged at each point."""
        self.write("set_averaging", value=int(count))

    def set_polarity(self, inverted: bool) -> None:
        """Report T (``inverted=False``) or −T (``inverted=True``)."""
        self.write("set_polarity", polarity=self.POLARITY_WORDS[bool(inverted)])
        self.inverted = bool(inverted)

    def set_injection(self, amplitude_v: float) -> None:
        """Fixed injection amplitude, V peak (the profile is switched off)."""
        self.write("set_injection", value=float(amplitude_v))
        self.write("set_profile_state", state="OFF")

    def set_injection_profile(self, profile: InjectionProfile) -> None:
        """Injection amplitude varying with frequency (see :class:`InjectionProfile`)."""
        self.write("set_profile_data", points=profile.scpi_text())
        self.write("set_profile_state", state="ON")

    def set_function(self, function: Literal["loop", "ratio"]) -> None:
        """``loop``: inject into the feedback loop and report T; ``ratio``: drive an external
        stimulus (a load's modulation input) and report ch2/ch1 with the channel scales."""
        if function not in self.FUNCTION_WORDS:
            raise UsageError(f"analyzer function {function!r} must be 'loop' or 'ratio'")
        self.write("set_function", function=self.FUNCTION_WORDS[function])

    def set_channel_scale(self, channel: int, factor: float) -> None:
        """Factor of input ``channel`` (1 or 2), units per volt at the input (e.g. A/V of a monitor)."""
        if int(channel) not in (1, 2):
            raise UsageError(f"the analyzer has inputs 1 and 2, not {channel!r}")
        if not (math.isfinite(factor) and factor != 0):
            raise UsageError(f"channel scale must be a finite non-zero factor, got {factor!r}")
        self.write("set_channel_scale", channel=int(channel), value=float(factor))

    def channel_scale(self, channel: int) -> float:
        if int(channel) not in (1, 2):
            raise UsageError(f"the analyzer has inputs 1 and 2, not {channel!r}")
        return self.query_float("get_channel_scale", channel=int(channel))

    def set_data_format(self, data_format: DataFormat = "real64", byte_order: Literal["big", "little"] = "big") -> None:
        """How traces travel: ``real64`` (binary block) or ``ascii``; byte order of the block."""
        if data_format not in self.FORMAT_WORDS or byte_order not in self.BYTE_ORDER_WORDS:
            raise UsageError(f"data format {data_format!r}/{byte_order!r}: use real64|ascii and big|little")
        self.data_format, self.byte_order = data_format, byte_order

    def _send_format(self) -> None:
        wanted = (self.data_format, self.byte_order)
        if self._format_sent == wanted:
            return
        self.write("set_format", format=self.FORMAT_WORDS[self.data_format])
        if self.data_format == "real64":
            self.write("set_byte_order", order=self.BYTE_ORDER_WORDS[self.byte_order])
        self._format_sent = wanted

    def reset(self) -> None:
        super().reset()
        self._format_sent = None
        self.inverted = False

    # -- sweep -----------------------------------------------------------------------

    def sweep_time_s(self) -> float:
        """The instrument's estimate of one sweep with the present settings, s."""
        return self.query_float("sweep_time")

    def sweep_timeout_s(self) -> float:
        """Timeout of a wait for the sweep: factor × sweep time + the station timeout, s."""
        return self.sweep_timeout_factor * self.sweep_time_s() + self.timeout_s

    def start_sweep(self) -> None:
        self.write("start_sweep")

    def abort_sweep(self) -> None:
        self.write("abort_sweep")

    def stop_activity(self) -> None:
        """At a run's shutdown: abort any sweep, so the injection stops (one message, not retried,
        no error check: it must not delay the shutdown of a hung instrument)."""
        self.send_at_shutdown(self.command("abort_sweep"))

    def sweep_running(self) -> bool:
        answer = self.query_float("operation_condition")
        return bool(int(answer) & OPERATION_MEASURING_BIT)

    def wait_sweep(self, *, method: Literal["opc", "poll"] = "opc", timeout_s: float | None = None) -> None:
        """Block until the sweep is done (``*OPC?`` or status polling); timeout scaled to the sweep."""
        limit = self.sweep_timeout_s() if timeout_s is None else float(timeout_s)
        if method == "opc":
            self.wait_complete(timeout_s=limit)
            return
        if method != "poll":
            raise UsageError(f"wait method {method!r} must be 'opc' or 'poll'")
        deadline = self.clock() + limit
        while self.sweep_running():
            if self.clock() > deadline:
                raise InstrumentTimeout(
                    f"sweep still running after {limit:g} s; check the sweep settings (points, bandwidth, "
                    "averaging) or raise options.sweep_timeout_factor in the station file",
                    instrument=self.name, command=self.commands["operation_condition"])
            self.sleep(self.poll_interval_s)

    def measure(self, *, method: Literal["opc", "poll"] = "opc") -> FrequencyResponse:
        """Start a sweep, wait for it, fetch it."""
        self._send_format()
        self.start_sweep()
        self.wait_sweep(method=method)
        return self.fetch()

    # -- data ------------------------------------------------------------------------

    def fetch(self) -> FrequencyResponse:
        """Frequency and complex response of the last completed sweep."""
        self._send_format()
        n = int(self.query_float("trace_points"))
        if n <= 0:
            raise InstrumentStateError("no completed sweep to fetch; start one and wait for it first",
                                       instrument=self.name, command=self.commands["trace_points"])
        freq = self._fetch_values("fetch_frequency", n)
        pairs = self._fetch_values("fetch_response", 2 * n)
        response = pairs[0::2] + 1j * pairs[1::2]
        return FrequencyResponse(freq_hz=freq, response=response.astype(np.complex128),
                                 polarity="inverted" if self.inverted else "normal")

    def _fetch_values(self, key: str, expected: int) -> NDArray[np.float64]:
        text = self.command(key)
        if self.data_format == "real64":
            payload = self.read_block(text)
            values = decode_samples(payload, "float64", byte_order=self.byte_order).astype(np.float64)
        else:
            answer = self.ask(text)
            try:
                values = np.array([float(v) for v in answer.split(",")], dtype=np.float64)
            except ValueError:
                self.raise_on_errors(text)
                raise InstrumentResponseError(f"expected comma-separated numbers, got {answer[:80]!r}...",
                                              instrument=self.name, command=text) from None
        if values.size != expected:
            raise InstrumentResponseError(
                f"expected {expected} values, got {values.size}; the trace changed while it was read - "
                "fetch again after the sweep completes", instrument=self.name, command=text)
        return values
