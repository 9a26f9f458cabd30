"""Drivers as a procedure sees them: every call goes through the interlock.

A procedure never holds a raw driver. Each guarded class exposes the methods of its
instrument kind; setpoints are checked against the station limits before they are sent,
readings after they return, and output switches are reported to the interlock so its
background watch runs whenever energy can flow. Methods not listed here are not
reachable from a procedure, so nothing can bypass the limits by accident.
"""

from __future__ import annotations

import math
import time
import weakref
from typing import Any

from benchctl.interlock import Interlock, WatchSource


class Guarded:
    """Common part: the raw driver, its role name and the interlock."""

    #: Watchable quantities: name -> (station limit or None, what it is). The driver's
    #: command key of each is ``measure_<name>``.
    _WATCHABLE: dict[str, tuple[str | None, str]] = {}

    def __init__(self, driver: Any, interlock: Interlock) -> None:
        self._driver = driver
        self._interlock = interlock
        self.role = driver.name

    @property
    def identity(self) -> Any:
        return self._driver.identity

    @property
    def kind(self) -> str:
        """The driver kind (``dc_source``, ``electronic_load`` ...) this guard was chosen by."""
        return str(getattr(self._driver, "kind", ""))

    @property
    def resource(self) -> str:
        return self._driver.resource

    def _before(self) -> None:
        self._interlock.raise_if_tripped()

    def watch_source(self, quantity: str) -> WatchSource:
        """This instrument as a source of the interlock watch for ``quantity`` (``voltage``,
        ``current``): one reading within the watch's deadline, never retried, checked
        against the same station limit as :meth:`measure_voltage` / :meth:`measure_current`."""
        try:
            limit, what = self._WATCHABLE[quantity]
        except KeyError:
            raise ValueError(f"{self.role} cannot be watched for {quantity!r}; it can for "
                             f"{', '.join(self._WATCHABLE) or 'nothing'}") from None
        driver, interlock, role, key = self._driver, self._interlock, self.role, f"measure_{quantity}"

        def read(deadline_s: float) -> float:
            value = driver.query_float_now(key, deadline_s=deadline_s)
            return value if limit is None else interlock.check_reading(limit, value, role, what)

        return WatchSource(role, read, fresh_key=None if limit is None else (role, limit))

    def __repr__(self) -> str:
        return f"<{type(self).__name__} {self.role} at {self.resource}>"


class GuardedSource(Guarded):
    """DC source behind the interlock."""

    _WATCHABLE = {"voltage": ("source_voltage_max_v", "measured voltage (V)"),
                  "current": ("source_current_max_a", "measured current (A)")}

    def set_voltage(self, voltage_v: float) -> None:
        self._interlock.refuse_above("source_voltage_max_v", voltage_v, self.role, "voltage setpoint (V)")
        line = _line(self._interlock)  # with a generator on the line: source ± its excursion stays in limits
        _refuse_line(self._interlock, float(voltage_v), line["excursion_v"], self.role, f"voltage setpoint {voltage_v:g} V")
        self._driver.set_voltage(voltage_v)
        line["source_v"] = float(voltage_v)

    def set_current_limit(self, current_a: float) -> None:
        self._interlock.refuse_above("source_current_max_a", current_a, self.role, "current limit (A)")
        self._driver.set_current_limit(current_a)

    def set_output(self, on: bool) -> None:
        self._before()
        if on:
            self._interlock.output_switched(self.role, True)
            _line(self._interlock)["source_on"] = 1.0
            self._driver.set_output(True)
        else:
            self._driver.set_output(False)
            _line(self._interlock)["source_on"] = 0.0
            self._interlock.output_switched(self.role, False)

    def output_enabled(self) -> bool:
        self._before()
        return self._driver.output_enabled()

    def measure_voltage(self) -> float:
        self._before()
        return self._interlock.check_reading("source_voltage_max_v", self._driver.measure_voltage(), self.role, "measured voltage (V)")

    def measure_current(self) -> float:
        self._before()
        return self._interlock.check_reading("source_current_max_a", self._driver.measure_current(), self.role, "measured current (A)")


class GuardedLoad(Guarded):
    """Electronic load behind the interlock."""

    _WATCHABLE = {"voltage": ("dut_output_voltage_max_v", "measured voltage (V)"),
                  "current": ("load_current_max_a", "measured current (A)")}

    def set_mode(self, mode: str) -> None:
        self._before()
        self._driver.set_mode(mode)

    def set_current(self, current_a: float) -> None:
        lim = self._interlock.limits
        self._interlock.refuse_above("load_current_max_a", current_a, self.role, "current setpoint (A)")
        # Worst case power at the highest output voltage the station allows.
        self._interlock.refuse_above(
            "load_power_max_w", current_a * lim.dut_output_voltage_max_v, self.role,
            f"power at {lim.dut_output_voltage_max_v:g} V for the current setpoint (W)",
        )
        self._driver.set_current(current_a)

    def _refuse_current(self, current_a: float, what: str) -> None:
        lim = self._interlock.limits
        self._interlock.refuse_above("load_current_max_a", current_a, self.role, f"{what} (A)")
        self._interlock.refuse_above(
            "load_power_max_w", current_a * lim.dut_output_voltage_max_v, self.role,
            f"power at {lim.dut_output_voltage_max_v:g} V for the {what} (W)",
        )

    def set_transient(self, level_a_a: float, level_b_a: float, *, slew_a_per_s: float,
                      mode: str = "single", frequency_hz: float | None = None) -> None:
        """Dynamic mode: both levels are checked like a current setpoint before anything is sent."""
        self._refuse_current(level_a_a, "dynamic level A")
        self._refuse_current(level_b_a, "dynamic level B")
        self._driver.set_transient(level_a_a, level_b_a, slew_a_per_s=slew_a_per_s, mode=mode,
                                   frequency_hz=frequency_hz)

    def set_transient_enabled(self, on: bool) -> None:
        self._before()
        self._driver.set_transient_enabled(on)

    def trigger_step(self) -> None:
        self._before()
        self._driver.trigger_step()

    def set_trigger_out(self, on: bool) -> None:
        self._before()
        self._driver.set_trigger_out(on)

    # modulation input and current monitor (small-signal stimulus: the DC setpoint is what
    # the limits above check; a procedure keeps level ± swing inside them)
    def set_modulation(self, on: bool) -> None:
        self._before()
        self._driver.set_modulation(on)

    def set_modulation_gain(self, gain_a_per_v: float) -> None:
        self._before()
        self._driver.set_modulation_gain(gain_a_per_v)

    def modulation_bandwidth_hz(self) -> float:
        self._before()
        return self._driver.modulation_bandwidth_hz()

    def monitor_scale_v_per_a(self) -> float:
        self._before()
        return self._driver.monitor_scale_v_per_a()

    def monitor_bandwidth_hz(self) -> float:
        self._before()
        return self._driver.monitor_bandwidth_hz()

    def set_resistance(self, resistance_ohm: float) -> None:
        lim = self._interlock.limits
        if not resistance_ohm > 0:
            self._interlock.refuse_above("load_current_max_a", float("inf"), self.role, "current at a resistance <= 0 ohm (A)")
        v = lim.dut_output_voltage_max_v
        self._interlock.refuse_above("load_current_max_a", v / resistance_ohm, self.role, f"current at {v:g} V in {resistance_ohm:g} ohm (A)")
        self._interlock.refuse_above("load_power_max_w", v * v / resistance_ohm, self.role, f"power at {v:g} V in {resistance_ohm:g} ohm (W)")
        self._driver.set_resistance(resistance_ohm)

    def set_input(self, on: bool) -> None:
        self._before()
        if on:
            self._interlock.output_switched(self.role, True)
            self._driver.set_input(True)
        else:
            self._driver.set_input(False)
            self._interlock.output_switched(self.role, False)

    def input_enabled(self) -> bool:
        self._before()
        return self._driver.input_enabled()

    def measure_voltage(self) -> float:
        self._before()
        return self._interlock.check_reading("dut_output_voltage_max_v", self._driver.measure_voltage(), self.role, "measured voltage (V)")

    def measure_current(self) -> float:
        self._before()
        return self._interlock.check_reading("load_current_max_a", self._driver.measure_current(), self.role, "measured current (A)")

    def measure_power(self) -> float:
        self._before()
        return self._interlock.check_reading("load_power_max_w", self._driver.measure_power(), self.role, "measured power (W)")


class GuardedMeter(Guarded):
    """Power meter / DMM behind the interlock; its limits depend on where it is connected:
    ``input_meter`` against the source limits, ``output_meter`` against the DUT output's;
    a meter in any other role observes only (its readings are not checked against limits)."""

    _LIMITS = {
        "input_meter": ("source_voltage_max_v", "source_current_max_a", None),
        "output_meter": ("dut_output_voltage_max_v", "load_current_max_a", "load_power_max_w"),
    }

    def __init__(self, driver: Any, interlock: Interlock) -> None:
        super().__init__(driver, interlock)
        self._v_limit, self._i_limit, self._p_limit = self._LIMITS.get(self.role, (None, None, None))
        self._WATCHABLE = {"voltage": (self._v_limit, "measured voltage (V)"),
                           "current": (self._i_limit, "measured current (A)")}

    def _check(self, limit: str | None, value: float, what: str) -> float:
        if limit is None:
            return value
        return self._interlock.check_reading(limit, value, self.role, what)

    def measure_voltage(self) -> float:
        self._before()
        return self._check(self._v_limit, self._driver.measure_voltage(), "measured voltage (V)")

    def measure_current(self) -> float:
        self._before()
        return self._check(self._i_limit, self._driver.measure_current(), "measured current (A)")

    def measure_power(self) -> float:
        self._before()
        return self._check(self._p_limit, self._driver.measure_power(), "measured power (W)")

    @property
    def has_measure_all(self) -> bool:
        """Whether the driver reads V, I and P of one integration (trigger-then-fetch)."""
        return callable(getattr(self._driver, "measure_all", None))

    def measure_all(self) -> tuple[float, float, float]:
        """(V, A, W) of one integration (the driver's trigger-then-fetch), each checked like its own reading."""
        self._before()
        v, i, p = self._driver.measure_all()
        return (self._check(self._v_limit, v, "measured voltage (V)"),
                self._check(self._i_limit, i, "measured current (A)"),
                self._check(self._p_limit, p, "measured power (W)"))

    def set_averaging(self, count: int) -> None:
        self._before()
        self._driver.set_averaging(count)


class GuardedAnalyzer(Guarded):
    """Loop analyzer behind the interlock: the injection amplitude is capped, measurements pass through.

    The injected sine appears almost whole at the DUT output where the loop gain is high,
    so the cap is ``INJECTION_FRACTION`` of the station's ``dut_output_voltage_max_v``
    unless the station gives ``options.injection_max_v`` for the analyzer (common practice:
    an injection of a few per cent of the output is plenty).
    """

    INJECTION_FRACTION = 0.2

    @property
    def max_injection_v(self) -> float:
        """Largest injection amplitude (V peak) this station allows."""
        option = getattr(self._driver, "options", {}).get("injection_max_v")
        if option is not None:
            return float(option)
        return self.INJECTION_FRACTION * self._interlock.limits.dut_output_voltage_max_v

    def _refuse_injection(self, amplitude_v: float, what: str) -> None:
        from benchctl.errors import SetpointRefused

        self._before()
        maximum = self.max_injection_v
        if not (amplitude_v == amplitude_v) or amplitude_v <= 0 or amplitude_v > maximum:
            raise SetpointRefused(
                f"{self.role}: {what} {amplitude_v:g} V is outside (0, {maximum:g}] V "
                f"({self.INJECTION_FRACTION:g} x limits.dut_output_voltage_max_v, or the analyzer's "
                "options.injection_max_v); nothing was sent. Lower the injection parameter of the procedure",
                limit="injection_max_v", value=float(amplitude_v), instrument=self.role,
            )

    def set_injection(self, amplitude_v: float) -> None:
        self._refuse_injection(amplitude_v, "injection amplitude")
        self._driver.set_injection(amplitude_v)

    def set_injection_profile(self, profile: Any) -> None:
        self._refuse_injection(profile.max_amplitude_v, "largest injection amplitude of the profile")
        self._driver.set_injection_profile(profile)

    def set_sweep(self, start_hz: float, stop_hz: float, points: int, spacing: str = "log") -> None:
        self._before()
        self._driver.set_sweep(start_hz, stop_hz, points, spacing)

    def set_bandwidth(self, bandwidth_hz: float) -> None:
        self._before()
        self._driver.set_bandwidth(bandwidth_hz)

    def set_averaging(self, count: int) -> None:
        self._before()
        self._driver.set_averaging(count)

    def set_polarity(self, inverted: bool) -> None:
        self._before()
        self._driver.set_polarity(inverted)

    def set_function(self, function: str) -> None:
        self._before()
        self._driver.set_function(function)

    def set_channel_scale(self, channel: int, factor: float) -> None:
        self._before()
        self._driver.set_channel_scale(channel, factor)

    def set_data_format(self, data_format: str = "real64", byte_order: str = "big") -> None:
        self._before()
        self._driver.set_data_format(data_format, byte_order)

    def sweep_time_s(self) -> float:
        self._before()
        return self._driver.sweep_time_s()

    def measure(self, *, method: str = "opc") -> Any:
        """Start a sweep, wait for it and fetch it (a FrequencyResponse)."""
        self._before()
        result = self._driver.measure(method=method)
        self._before()
        return result

    def fetch(self) -> Any:
        self._before()
        return self._driver.fetch()


class GuardedScope(Guarded):
    """Oscilloscope behind the interlock.

    A scope drives nothing, so there is no setpoint to refuse; every call still stops
    at a trip. Its readings are waveforms (ripple, drain ringing well above the DC
    rails), not DC quantities, so they are not checked against the station's DC limits.
    """

    def __getattr__(self, name: str) -> Any:
        allowed = {
            "set_channel_enabled", "set_scale", "scale", "set_offset", "offset", "screen", "set_coupling",
            "set_bandwidth_limit",
            "bandwidth_limit_hz", "set_timebase", "set_record", "sample_interval_s", "set_trigger", "arm",
            "abort", "wait_acquired", "single", "set_data_format", "preamble", "fetch_waveform",
            "set_fixture_capacitance", "wait_triggered", "set_fixture_probe", "set_fixture_load_capacitance",
            "set_fixture_input_capacitance", "set_fixture_input_connected",     # the hold-up fixture
        }
        if name not in allowed:
            raise AttributeError(f"{type(self).__name__} has no method {name!r}")
        method = getattr(self._driver, name)

        def call(*args: Any, **kwargs: Any) -> Any:
            self._before()
            return method(*args, **kwargs)

        call.__name__ = name
        return call


# ---- line injection and DUT switching (function generator, switch matrix) ----------------
#: What each interlock knows of the DUT input line: the source's voltage setpoint and the
#: generator's largest excursion at the DUT input (V). Keyed on the interlock (one per run).
_LINE: "weakref.WeakKeyDictionary[Interlock, dict[str, float]]" = weakref.WeakKeyDictionary()


def _line(interlock: Interlock) -> dict[str, float]:
    return _LINE.setdefault(interlock, {"source_v": 0.0, "excursion_v": 0.0})


def _refuse_line(interlock: Interlock, source_v: float, excursion_v: float, role: str, what: str) -> None:
    """Refuse a setting that would take the DUT input (source ± generator excursion) above
    ``source_voltage_max_v`` or below 0 V; nothing is sent."""
    from benchctl.errors import SetpointRefused

    interlock.raise_if_tripped()
    maximum = float(interlock.limits.source_voltage_max_v)
    peak, valley = source_v + excursion_v, source_v - excursion_v
    if not (peak == peak) or peak > maximum or (excursion_v > 0.0 and valley < 0.0):
        raise SetpointRefused(
            f"{role}: {what} would put the DUT input at {valley:g} ... {peak:g} V (source {source_v:g} V, "
            f"generator excursion ±{excursion_v:g} V at the DUT), outside 0 ... {maximum:g} V "
            "(limits.source_voltage_max_v); nothing was sent. Lower the amplitude or the line voltage",
            limit="source_voltage_max_v", value=float(peak), instrument=role)


class GuardedGenerator(Guarded):
    """Function generator behind the interlock: its excursion at the DUT input is checked.

    The DUT input sees the source's voltage plus the generator's output times the station's
    coupling (``options.coupling_v_per_v``; the offset too where ``options.passes_dc`` = 1).
    Amplitude, offset and output are refused when source ± excursion would leave 0 V ...
    ``limits.source_voltage_max_v``, and a source setpoint is refused on the same rule while
    the generator is on (:class:`GuardedSource` asks :func:`_refuse_line`).
    """

    def __init__(self, driver: Any, interlock: Interlock) -> None:
        super().__init__(driver, interlock)
        self._amplitude_vpp = 0.0
        self._offset_v = 0.0
        self._on = False

    def _excursion_v(self, amplitude_vpp: float, offset_v: float) -> float:
        k = float(self._driver.coupling_v_per_v)
        dc = abs(offset_v) if self._driver.passes_dc else 0.0
        return k * (amplitude_vpp / 2.0 + dc)

    def _check(self, amplitude_vpp: float, offset_v: float, on: bool, what: str) -> None:
        excursion = self._excursion_v(amplitude_vpp, offset_v) if on else 0.0
        _refuse_line(self._interlock, _line(self._interlock)["source_v"], excursion, self.role, what)

    def _commit(self) -> None:
        _line(self._interlock)["excursion_v"] = (self._excursion_v(self._amplitude_vpp, self._offset_v)
                                                if self._on else 0.0)

    @property
    def coupling_v_per_v(self) -> float:
        """V at the DUT input per V at the generator (the station's declaration)."""
        return float(self._driver.coupling_v_per_v)

    def set_function(self, function: str) -> None:
        self._before()
        self._driver.set_function(function)

    def set_frequency(self, frequency_hz: float) -> None:
        self._before()
        self._driver.set_frequency(frequency_hz)

    def set_amplitude(self, amplitude_vpp: float) -> None:
        self._check(amplitude_vpp, self._offset_v, self._on, f"amplitude {amplitude_vpp:g} Vpp")
        self._driver.set_amplitude(amplitude_vpp)
        self._amplitude_vpp = float(amplitude_vpp)
        self._commit()

    def set_offset(self, offset_v: float) -> None:
        self._check(self._amplitude_vpp, offset_v, self._on, f"offset {offset_v:g} V")
        self._driver.set_offset(offset_v)
        self._offset_v = float(offset_v)
        self._commit()

    def set_output(self, on: bool) -> None:
        if on:
            self._check(self._amplitude_vpp, self._offset_v, True, "output on")
        else:
            self._before()
        self._driver.set_output(on)
        self._on = bool(on)
        self._commit()

    def output_enabled(self) -> bool:
        self._before()
        return bool(self._driver.output_enabled())

    def off_now(self) -> None:
        """Output off without the trip check (a procedure's finally: never leave a sine on the line)."""
        self._driver.output_off_now()
        self._on = False
        self._commit()


class GuardedSwitchMatrix(Guarded):
    """Switch matrix behind the interlock: it never switches while the source's output is on
    (a hot switch welds relays and applies a step to the DUT), as far as this run knows."""

    def select(self, channel: int) -> None:
        from benchctl.errors import SetpointRefused

        self._before()
        if _line(self._interlock).get("source_on", 0.0):
            raise SetpointRefused(f"{self.role}: channel {channel} not selected: the source's output is on. Switch "
                                  "it off (bench.power_down) before changing DUTs", limit="hot_switch",
                                  value=float(channel), instrument=self.role)
        self._driver.select(channel)

    def closed_channel(self) -> int:
        self._before()
        return int(self._driver.closed_channel())

    def open_all(self) -> None:
        self._before()
        self._driver.open_all()
class GuardedTemperatureMeter(Guarded):
    """Temperature meter behind the interlock: every hot-spot reading is checked against
    ``limits.hot_spot_temperature_max_c`` when the station declares it (a reading above it
    trips the run: the source off first, then the load); the ambient channel is not a hot spot."""

    AMBIENT = "ambient"

    def channels(self) -> tuple[str, ...]:
        self._before()
        return tuple(self._driver.channels())

    def measure_temperature(self, channel: str | int) -> float:
        self._before()
        value = float(self._driver.measure_temperature(channel))
        number = self._driver.channel_number(channel)
        label = self._driver.channels()[number - 1]
        if label != self.AMBIENT and self._interlock.limits.hot_spot_temperature_max_c is not None:
            return self._interlock.check_reading("hot_spot_temperature_max_c", value, self.role,
                                                 f"{label} temperature (°C)")
        return value


    def hot_spot_watch_source(self) -> WatchSource:
        """Every hot-spot channel (all but the ambient) as one source of the interlock watch:
        each read within the watch's deadline, never retried, checked against
        ``limits.hot_spot_temperature_max_c``. The channel labels are read here, before the
        watch starts; a procedure's own temperature readings do not stand in for these (it may
        read one part while another heats)."""
        driver, interlock, role = self._driver, self._interlock, self.role
        hot_spots = [(k, label) for k, label in enumerate(driver.channels(), 1) if label != self.AMBIENT]
        if not hot_spots:
            raise ValueError(f"{role} has no hot-spot channel (only {', '.join(driver.channels())})")

        def read(deadline_s: float) -> float:
            deadline_at, hottest = time.monotonic() + deadline_s, -math.inf
            for number, label in hot_spots:
                value = driver.query_float_now("measure_temperature", channel=number,
                                               deadline_s=max(deadline_at - time.monotonic(), 0.0))
                hottest = max(hottest, interlock.check_reading("hot_spot_temperature_max_c", value, role,
                                                               f"{label} temperature (°C)"))
            return hottest

        return WatchSource(role, read)


class GuardedChamber(Guarded):
    """Thermal chamber behind the interlock: a setpoint outside the station's
    ``limits.chamber_temperature_min_c`` … ``chamber_temperature_max_c`` is refused before
    anything is sent, and so is every setpoint when the station declares no such limits; a ramp
    rate above ``limits.chamber_ramp_max_k_per_min`` (when given) is refused too."""

    def _refuse(self, limit: str, value: float, what: str, why: str) -> None:
        from benchctl.errors import SetpointRefused

        raise SetpointRefused(f"{self.role}: {what} {value:g} {why}; nothing was sent", limit=limit,
                              value=float(value), instrument=self.role)

    def set_setpoint(self, temperature_c: float) -> None:
        self._before()
        lim = self._interlock.limits
        lo, hi = lim.chamber_temperature_min_c, lim.chamber_temperature_max_c
        if lo is None or hi is None:
            self._refuse("chamber_temperature_max_c", temperature_c, "°C setpoint",
                         "cannot be checked: declare limits.chamber_temperature_min_c and "
                         "limits.chamber_temperature_max_c (°C) in the station file, within what the DUT and "
                         "the fixture are rated for")
        assert lo is not None and hi is not None
        if not (temperature_c == temperature_c) or temperature_c > hi:
            self._refuse("chamber_temperature_max_c", temperature_c, "°C setpoint",
                         f"is above the station limit limits.chamber_temperature_max_c = {hi:g} °C")
        if temperature_c < lo:
            self._refuse("chamber_temperature_min_c", temperature_c, "°C setpoint",
                         f"is below the station limit limits.chamber_temperature_min_c = {lo:g} °C")
        self._driver.set_setpoint(temperature_c)

    def set_ramp_rate(self, k_per_min: float) -> None:
        self._before()
        top = self._interlock.limits.chamber_ramp_max_k_per_min
        if top is not None and not (k_per_min <= top):
            self._refuse("chamber_ramp_max_k_per_min", k_per_min, "K/min ramp rate",
                         f"is above the station limit limits.chamber_ramp_max_k_per_min = {top:g} K/min")
        self._driver.set_ramp_rate(k_per_min)

    def set_running(self, on: bool) -> None:
        self._before()
        self._driver.set_running(on)

    def running(self) -> bool:
        self._before()
        return bool(self._driver.running())

    def setpoint(self) -> float:
        self._before()
        return float(self._driver.setpoint())

    def set_soak(self, band_k: float, time_s: float) -> None:
        self._before()
        self._driver.set_soak(band_k, time_s)

    def is_stable(self) -> bool:
        self._before()
        return bool(self._driver.is_stable())

    def measure_temperature(self) -> float:
        self._before()
        return float(self._driver.measure_temperature())


GUARDS: dict[str, type[Guarded]] = {
    "dc_source": GuardedSource,
    "electronic_load": GuardedLoad,
    "power_meter": GuardedMeter,
    "loop_analyzer": GuardedAnalyzer,
    "oscilloscope": GuardedScope,
    "function_generator": GuardedGenerator,
    "switch_matrix": GuardedSwitchMatrix,
    "temperature_meter": GuardedTemperatureMeter,
    "thermal_chamber": GuardedChamber,
}


def register_guard(kind: str, cls: type[Guarded]) -> None:
    """Give driver kind ``kind`` its guard (a lab's new kind: a subclass of :class:`Guarded`
    exposing the methods a procedure may call, checking what they set)."""
    if not (isinstance(cls, type) and issubclass(cls, Guarded)):
        raise TypeError(f"register_guard({kind!r}, {cls!r}): the guard must subclass benchctl.guarded.Guarded")
    GUARDS[kind] = cls


def has_guard(kind: str) -> bool:
    return kind in GUARDS


def guard(driver: Any, interlock: Interlock) -> Guarded:
    """The guarded wrapper for a driver, chosen by the driver's kind (whatever its role is called)."""
    try:
        cls = GUARDS[driver.kind]
    except KeyError:
        raise TypeError(f"no interlock guard for driver kind {driver.kind!r} (role {getattr(driver, 'name', '?')}); "
                        f"kinds with a guard: {', '.join(sorted(GUARDS))}. Register one with "
                        "benchctl.guarded.register_guard") from None
    return cls(driver, interlock)
