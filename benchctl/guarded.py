"""Drivers as a procedure sees them: every call goes through the interlock.

A procedure never holds a raw driver. Each guarded class exposes the methods of its
instrument kind; setpoints are checked against the station limits before they are sent,
readings after they return, and output switches are reported to the interlock so its
background watch runs whenever energy can flow. Methods not listed here are not
reachable from a procedure, so nothing can bypass the limits by accident.
"""

from __future__ import annotations

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
        self._driver.set_voltage(voltage_v)

    def set_current_limit(self, current_a: float) -> None:
        self._interlock.refuse_above("source_current_max_a", current_a, self.role, "current limit (A)")
        self._driver.set_current_limit(current_a)

    def set_output(self, on: bool) -> None:
        self._before()
        if on:
            self._interlock.output_switched(self.role, True)
            self._driver.set_output(True)
        else:
            self._driver.set_output(False)
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


GUARDS: dict[str, type[Guarded]] = {
    "dc_source": GuardedSource,
    "electronic_load": GuardedLoad,
    "power_meter": GuardedMeter,
    "loop_analyzer": GuardedAnalyzer,
    "oscilloscope": GuardedScope,
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
