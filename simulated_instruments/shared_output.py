"""Several electronic loads on one converter output.

The converter model has one load setting. ``SharedOutput(model)`` stands between the
model and N simulated loads in parallel on its output terminals: each load gets a
:class:`LoadPort` that looks like the model to it. A port's ``set_load`` records that
load's own setting and programs the model with their sum; its readings give that load
its own share of the output current (and power), the output voltage being common.

How the settings add (parallel loads on one node, Kirchhoff's current law):

* every enabled load in CC: the model draws the sum of their currents (CC);
* every enabled load in CR: the model sees their parallel resistance, 1/Σ(1/R) (CR);
* CC and CR mixed: each CR load counts as the current it draws at the present output
  voltage, V/R, and the model draws the sum (CC) - exact while the voltage holds;
* none enabled: the model's load is off.

A load's share of the output current is its own current over the sum (its setpoint in
CC, V/R in CR), so the shares add up to the model's output current at every moment.
The simulated scope sees the load steps of the first load only (the load activity is
published per model, and each port publishes to its own).
"""

from __future__ import annotations

import threading
from dataclasses import dataclass, replace
from typing import Any


@dataclass(frozen=True)
class _Setting:
    mode: str  # "CC" (A) or "CR" (ohm)
    setting: float
    enabled: bool


class SharedOutput:
    """The converter output shared by several loads (see the module docstring)."""

    def __init__(self, model: Any) -> None:
        self.model = model
        self._lock = threading.RLock()
        self._settings: dict[str, _Setting] = {}

    def port(self, name: str) -> "LoadPort":
        """A model view for the load ``name`` (its setting starts off)."""
        with self._lock:
            self._settings[name] = _Setting("CC", 0.0, False)
        return LoadPort(self, name)

    # -- the sum of the settings ----------------------------------------------------
    def _current_a(self, s: _Setting, vout_v: float) -> float:
        if not s.enabled:
            return 0.0
        if s.mode == "CC":
            return max(0.0, s.setting)
        return max(0.0, vout_v) / s.setting if s.setting > 0 else 0.0

    def set_load(self, name: str, mode: str, setting: float, enabled: bool, slew_a_per_s: float | None) -> None:
        with self._lock:
            self._settings[name] = _Setting(mode, float(setting), bool(enabled))
            on = [s for s in self._settings.values() if s.enabled]
            if not on:
                self.model.set_load(mode, setting, False, slew_a_per_s=slew_a_per_s)
            elif all(s.mode == "CR" for s in on):
                conductance_s = sum(1.0 / s.setting for s in on)
                self.model.set_load("CR", 1.0 / conductance_s, True, slew_a_per_s=slew_a_per_s)
            else:
                vout_v = self.model.terminals().output_v
                total_a = sum(self._current_a(s, vout_v) for s in on)
                self.model.set_load("CC", total_a, True, slew_a_per_s=slew_a_per_s)

    def share(self, name: str, vout_v: float) -> float:
        """The fraction of the output current load ``name`` draws (0 … 1)."""
        with self._lock:
            currents = {n: self._current_a(s, vout_v) for n, s in self._settings.items()}
        total = sum(currents.values())
        if total <= 0.0:
            on = [n for n, s in self._settings.items() if s.enabled]
            return 1.0 / len(on) if name in on else 0.0
        return currents.get(name, 0.0) / total


class LoadPort:
    """The model as one of several parallel loads sees it: its own share of the current."""

    def __init__(self, shared: SharedOutput, name: str) -> None:
        self._shared = shared
        self.name = name

    def set_load(self, mode: str, setting: float, enabled: bool, *, slew_a_per_s: float | None = None) -> None:
        self._shared.set_load(self.name, mode, setting, enabled, slew_a_per_s)

    def terminals(self) -> Any:
        t = self._shared.model.terminals()
        k = self._shared.share(self.name, t.output_v)
        return replace(t, output_a=t.output_a * k, load_a=t.load_a * k)

    def mean_terminals(self, t0_s: float, t1_s: float) -> Any:
        m = self._shared.model.mean_terminals(t0_s, t1_s)
        k = self._shared.share(self.name, m.output_v)
        return replace(m, output_a=m.output_a * k, load_a=m.load_a * k, output_w=m.output_w * k,
                       load_w=m.load_w * k)

    def __getattr__(self, name: str) -> Any:  # clock, operating_point, steady_state ... of the model
        return getattr(self._shared.model, name)
