"""Several DUTs on one simulated station: the model the instruments hold, pointed at one DUT.

``DutSelector([model1, model2, ...])`` stands where one ``ConverterModel`` would: every
simulated instrument calls it as the model. It remembers what the source, the load and the
line injector last programmed, and the switch matrix (``instruments.switch_matrix``) points
it at one DUT with :meth:`select`: the DUT left behind is disconnected (source off, load
off, no injection: it is unpowered and its capacitors discharge through its own bleed and
the load), the DUT connected gets the remembered settings, exactly as relays that move every
lead at once would do. With every channel open the instruments see an unconnected model
(nothing powered, readings of zero). Everything else (readings, the clock, the truth
functions) is the selected DUT's.
"""

from __future__ import annotations

import threading
from typing import Any


class DutSelector:
    """The model of the selected DUT, as every instrument of the station sees it."""

    def __init__(self, models: list[Any], open_model: Any) -> None:
        if not models:
            raise ValueError("DutSelector needs at least one DUT model")
        self.models = list(models)
        self._open = open_model
        self._lock = threading.RLock()
        self._selected = 0
        self._source: tuple[float, float, bool] = (0.0, 0.0, False)
        self._load: tuple[str, float, bool, float | None] = ("CC", 0.0, False, None)
        self._injection: tuple[float, float, bool] = (0.0, 1.0, False)
        self._output_c_f = 0.0

    @property
    def count(self) -> int:
        return len(self.models)

    @property
    def selected(self) -> int:
        """The connected DUT, 1 ... count; 0 while every channel is open."""
        return self._selected

    @property
    def source_enabled(self) -> bool:
        """Whether the source's output is on (what a hot switch would carry)."""
        with self._lock:
            return self._source[2] and self._source[0] > 0.0

    @property
    def target(self) -> Any:
        """The model the instruments reach now (the selected DUT, or the unconnected one)."""
        return self.models[self._selected - 1] if self._selected else self._open

    def select(self, channel: int) -> None:
        """Connect DUT ``channel`` (1 ... count), or none (0); see the module docstring."""
        if not 0 <= channel <= self.count:
            raise ValueError(f"channel {channel} is not 0 ... {self.count}")
        with self._lock:
            if channel == self._selected:
                return
            if self._selected:
                old = self.target
                old.set_line_injection(0.0, 1.0, False)
                v, limit, _ = self._source
                old.set_source(v, limit if limit > 0 else 1.0, False)
                mode, setting, _, slew = self._load
                old.set_load(mode, setting, False, slew_a_per_s=slew)
                old.set_output_capacitance(0.0)
            self._selected = channel
            if channel:
                new = self.target
                new.set_output_capacitance(self._output_c_f)
                mode, setting, enabled, slew = self._load
                new.set_load(mode, setting, enabled, slew_a_per_s=slew)
                v, limit, on = self._source
                if limit > 0:
                    new.set_source(v, limit, on)
                new.set_line_injection(*self._injection)

    # -- the settings the instruments make ------------------------------------------
    def set_source(self, voltage_v: float, current_limit_a: float, enabled: bool) -> None:
        with self._lock:
            self._source = (float(voltage_v), float(current_limit_a), bool(enabled))
            if self._selected:
                self.target.set_source(voltage_v, current_limit_a, enabled)

    def set_load(self, mode: str, setting: float, enabled: bool, *, slew_a_per_s: float | None = None) -> None:
        with self._lock:
            self._load = (mode, float(setting), bool(enabled), slew_a_per_s if slew_a_per_s is not None
                          else self._load[3])
            if self._selected:
                self.target.set_load(mode, setting, enabled, slew_a_per_s=slew_a_per_s)

    def set_line_injection(self, amplitude_v: float, frequency_hz: float, enabled: bool) -> None:
        with self._lock:
            self._injection = (float(amplitude_v), float(frequency_hz), bool(enabled))
            if self._selected:
                self.target.set_line_injection(amplitude_v, frequency_hz, enabled)

    def set_output_capacitance(self, capacitance_f: float) -> None:
        with self._lock:
            self._output_c_f = float(capacitance_f)
            if self._selected:
                self.target.set_output_capacitance(capacitance_f)

    def __getattr__(self, name: str) -> Any:   # readings, clock, design, truth of the selected DUT
        if name.startswith("_") or name in ("models",):
            raise AttributeError(name)
        return getattr(self.target, name)
