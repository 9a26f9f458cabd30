"""A second, unregulated output of a flyback: a coupled secondary winding and its rectifier.

Physics (first-order multiple-output flyback; K. Billings and T. Morey, *Switching Power
Supply Handbook*, 3rd ed., McGraw-Hill 2011, on multiple-output flybacks and their
cross-regulation, from memory; the commutation drop is common practice): during the
flyback interval every secondary sees the same magnetizing voltage per turn, so with the
main output held by the loop the second follows it by the turns ratio N = N2/N1, less its
own drops. Over the conduction interval δ·Ts (δ = 1 − D in CCM, D2 in DCM) an output k
delivering I_k carries I_k/δ on average, and each cycle its leakage inductance L_k must
take the current up from zero, which costs L_k·ΔI_k volt-seconds (ΔI_k = I_k/δ for the CCM
flat top, 2·I_k/δ for the DCM triangle, so κ = 1 or 2)::

    V_m = V1 + Vf1 + r1·I1/δ + κ·L1·fsw·I1/δ²            (winding 1's voltage, referred to it)
    V2  = N·V_m − Vf2 − r2·I2/δ − κ·L2·fsw·I2/δ²

with V1, I1 at the main's sense point (its stage current: load and divider), r_k the
winding plus rectifier resistance and L_k the leakage of winding k referred to itself.
Cross-regulation follows: V2 rises with the main's load (its drops lift V_m), falls with
its own, and moves with the line and the load split through δ. The main stays regulated;
it sees the second output only as N·I2 more current from the stage
(``ConverterModel.set_auxiliary_stage_current``), so its duty, losses and input power
include it.

Dynamics: the second output follows the main's terminals quasi-statically (its own
capacitor's response to a step of its load is not modelled) and its load's current is in
force at once. While the converter does not switch it follows the main by the turns
ratio alone (both capacitors discharge together). Peak charging by the leakage spike at
a very light second load is not modelled.
"""

from __future__ import annotations

import threading
from dataclasses import dataclass, replace
from typing import Any

from .errors import SettingError


@dataclass(frozen=True)
class SecondWinding:
    """The second output: turns N2/N1, its rectifier, winding resistance and leakage; ratings."""

    name: str
    turns_ratio: float          # N2/N1 (second secondary over the main secondary)
    vout_nom_v: float
    iout_rated_a: float
    iout_min_a: float
    rect_vf_v: float
    rect_r_ohm: float
    winding_r_ohm: float
    leakage_h: float            # leakage of winding 2, referred to winding 2
    main_leakage_h: float       # leakage of the main secondary, referred to it

    def __post_init__(self) -> None:
        if not (self.turns_ratio > 0 and self.iout_rated_a > 0 and 0 <= self.iout_min_a < self.iout_rated_a):
            raise SettingError(f"second output {self.name!r}: need turns_ratio > 0 and 0 <= iout_min_a < iout_rated_a")


def conduction_fraction(op: Any) -> tuple[float, float]:
    """(δ, κ) of an operating point: the secondary conduction interval over Ts and the
    leakage factor (1 CCM, 2 DCM); (0, 1) when the stage does not switch."""
    sp = getattr(op, "stage", None)
    if sp is None or not getattr(op, "running", False) or sp.d2 <= 0.0:
        return 0.0, 1.0
    return float(sp.d2), 1.0 if sp.mode == "CCM" else 2.0


def second_voltage_line(design: Any, winding: SecondWinding, op: Any, v1_sense_v: float,
                        i1_stage_a: float) -> tuple[float, float]:
    """(A, B) of V2 = A − B·I2 at operating point ``op`` with the main at ``v1_sense_v`` delivering
    ``i1_stage_a`` from the stage (see the module docstring); (N·V1, 0) when not switching."""
    delta, kappa = conduction_fraction(op)
    n = winding.turns_ratio
    if delta <= 0.0:
        return n * max(v1_sense_v, 0.0), 0.0
    ls, fs = design.losses, design.fsw_hz
    r1 = ls.r_secondary_ohm + ls.rect_r_ohm
    vm = (v1_sense_v + ls.rect_vf_v + r1 * i1_stage_a / delta
          + kappa * winding.main_leakage_h * fs * i1_stage_a / (delta * delta))
    a = n * vm - winding.rect_vf_v
    b = (winding.winding_r_ohm + winding.rect_r_ohm) / delta + kappa * winding.leakage_h * fs / (delta * delta)
    return a, b


@dataclass(frozen=True)
class _Load:
    mode: str   # "CC" (A) or "CR" (ohm)
    setting: float
    enabled: bool


class SecondOutput:
    """The second output of ``model`` (its design's :class:`SecondWinding`); see the module docstring.

    :meth:`port` is the model as the second output's load and meter see it.
    """

    def __init__(self, model: Any, winding: SecondWinding) -> None:
        self.model = model
        self.winding = winding
        self._lock = threading.RLock()
        self._load = _Load("CC", 0.0, False)

    def port(self) -> "SecondOutputPort":
        return SecondOutputPort(self)

    # -- the load -------------------------------------------------------------------
    def set_load(self, mode: str, setting: float, enabled: bool, slew_a_per_s: float | None = None) -> None:
        if mode not in ("CC", "CR"):
            raise SettingError(f"second output load mode {mode!r}: use 'CC' (A) or 'CR' (ohm)")
        if mode == "CR" and not setting > 0:
            raise SettingError(f"second output CR setting {setting!r} ohm must be > 0")
        with self._lock:
            self._load = _Load(mode, max(float(setting), 0.0), bool(enabled))
            for _ in range(4):      # CR: I2 depends on V2, which moves a little with the stage's duty
                i2 = self.steady_state()[1]
                self.model.set_auxiliary_stage_current(self.winding.turns_ratio * i2)

    def _current(self, a: float, b: float) -> float:
        load = self._load
        if not load.enabled:
            return 0.0
        if load.mode == "CC":
            return load.setting
        return max(a, 0.0) / (load.setting + b)

    # -- truth ----------------------------------------------------------------------
    def _solve(self, op: Any, v1_term_v: float, i1_term_a: float) -> tuple[float, float]:
        design = self.model.design
        r_st = design.bench.sense_to_terminal_r_ohm
        v1_sense = v1_term_v + i1_term_a * r_st
        i1_stage = i1_term_a + v1_sense / design.losses.sense_divider_ohm
        a, b = second_voltage_line(design, self.winding, op, v1_sense, i1_stage)
        with self._lock:
            i2 = self._current(a, b)
        return max(a - b * i2, 0.0), i2

    def steady_state(self) -> tuple[float, float]:
        """(V2, I2) in the steady state of the present settings, V and A (the truth for tests)."""
        op = self.model.operating_point()
        return self._solve(op, op.vout_v, op.iout_a)

    def at(self, v1_term_v: float, i1_term_a: float) -> tuple[float, float]:
        """(V2, I2) with the main's terminals at ``v1_term_v``, ``i1_term_a`` and the present duty."""
        return self._solve(self.model.operating_point(), v1_term_v, i1_term_a)


class SecondOutputPort:
    """The converter model as the second output's load and meter see it: its voltage and current."""

    def __init__(self, second: SecondOutput) -> None:
        self._second = second
        self._model = second.model

    def set_load(self, mode: str, setting: float, enabled: bool, *, slew_a_per_s: float | None = None) -> None:
        self._second.set_load(mode, setting, enabled, slew_a_per_s)

    def terminals(self) -> Any:
        t = self._model.terminals()
        v2, i2 = self._second.at(t.output_v, t.output_a)
        return replace(t, output_v=v2, output_a=i2, load_a=i2)

    def mean_terminals(self, t0_s: float, t1_s: float) -> Any:
        m = self._model.mean_terminals(t0_s, t1_s)
        v2, i2 = self._second.at(m.output_v, m.output_a)
        return replace(m, output_v=v2, output_a=i2, load_a=i2, output_w=v2 * i2, load_w=v2 * i2)

    def __getattr__(self, name: str) -> Any:  # clock, operating_point ... of the model
        return getattr(self._model, name)
