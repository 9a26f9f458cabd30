"""Drivers as a procedure sees them: every call goes through the interlock.

A procedure never holds a raw driver. Each guarded class exposes the methods of its
instrument kind; setpoints are checked against the station limits before they are sent,
readings after they return, and output switches are reported to the interlock so its
background watch runs whenever energy can flow. Methods not listed here are not
reachable from a procedure, so nothing can bypass the limits by accident.
"""

from __future__ import annotations

from typing import Any

from benchctl.interlock import Interlock


class Guarded:
    """Common part: the raw driver, its role name and the interlock."""

    def __init__(self, driver: Any, interlock: Interlock) -> None:
        self._driver = driver
        self._interlock = interlock
        self.role = driver.name

    @property
    def identity(self) -> Any:
        return self._driver.identity

    @property
    def resource(self) -> str:
        return self._driver.resource

    def _before(self) -> None:
        self._interlock.raise_if_tripped()

    def __repr__(self) -> str:
        return f"<{type(self).__name__} {self.role} at {self.resource}>"


class GuardedSource(Guarded):
    """DC source behind the interlock."""

    def set_voltage(self, voltage_v: float) -> None:
        self._interlock.refuse_above("source_voltage_max_v", voltage_v, self.role, "voltage setpoint (V)")
        self._driver.set_voltage(voltage_v)

    def set_current_limit(self, current_a: float) -> None:
        self._interlock.refuse_above("source_current_max_a", current_a, self.role, "current limit (A)")
        self._driver.set_current_limit(current_a)

    def set_output(self, on: bool) -> None:
        self._before()
        if on:
            self._interlock.output_state_changed(source_on=True)
            self._driver.set_output(True)
        else:
            self._driver.set_output(False)
            self._interlock.output_state_changed(source_on=False)

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
            self._interlock.output_state_changed(load_on=True)
            self._driver.set_input(True)
        else:
            self._driver.set_input(False)
            self._interlock.output_state_changed(load_on=False)

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
    """Power meter / DMM behind the interlock; its limits depend on where it is connected."""

    _LIMITS = {
        "input_meter": ("source_voltage_max_v", "source_current_max_a", None),
        "output_meter": ("dut_output_voltage_max_v", "load_current_max_a", "load_power_max_w"),
    }

    def __init__(self, driver: Any, interlock: Interlock) -> None:
        super().__init__(driver, interlock)
        self._v_limit, self._i_limit, self._p_limit = self._LIMITS.get(self.role, (None, None, None))

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

    def set_averaging(self, count: int) -> None:
        self._before()
        self._driver.set_averaging(count)


GUARDS: dict[str, type[Guarded]] = {
    "dc_source": GuardedSource,
    "electronic_load": GuardedLoad,
    "power_meter": GuardedMeter,
}


def guard(driver: Any, interlock: Interlock) -> Guarded:
    """The guarded wrapper for a driver of any known kind."""
    try:
        cls = GUARDS[driver.kind]
    except KeyError:
        raise TypeError(f"no interlock guard for driver kind {driver.kind!r}") from None
    return cls(driver, interlock)
