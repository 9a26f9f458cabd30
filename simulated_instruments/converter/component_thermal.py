"""Hot-spot temperatures of the DUT's parts: one first-order thermal node per part.

Each part k has its own node, C_k·dT_k/dt = P_k − (T_k − T_amb)/R_k (part to ambient; the
usual first-order network of a part on a board, common practice), so it settles with its
own τ_k = R_k·C_k after its loss P_k changes.  P_k is the part's share of the loss
breakdown of :mod:`.losses`, computed from the same cycle waveforms and coefficients:

* flyback — ``switch``: I_sw,rms²·R_ds(on) + the switching loss (overlap and C_oss);
  ``rectifier``: V_F·I_avg + r_D·I_rms²; ``transformer``: the core loss + the primary and
  secondary winding losses;
* buck — ``switch`` (high side): I_rms²·R_ds(on) + the switching loss; ``sync_rectifier``
  (low side): I_rms²·R_ds(on) + the body-diode loss in the dead times; ``inductor``: the
  core loss + I_L,rms²·DCR.

What is left (controller and gate drive, bleed and sense resistors, snubber and clamp,
capacitor ESR, terminal copper) heats the board, which no node here stands for.  The
coefficients come from the design at the lumped temperature of :mod:`.thermal` (the one
that drives the tempco of the on-resistances and windings), so the shares include the
drift.  The ambient is the model's (the chamber air when a chamber is attached).

Integration: steps of at most min τ_k/100, each exact for the loss and ambient held at its
start: T ← T_eq + (T − T_eq)·e^(−h/τ), T_eq = T_amb + R·P.
"""

from __future__ import annotations

import bisect
import math
import threading
from collections.abc import Callable, Mapping
from dataclasses import dataclass

from .design import ConverterDesign
from .operating_point import OperatingPoint

#: Past (time, temperatures) points kept for readings at a moment in the recent past.
HISTORY = 4096


@dataclass(frozen=True)
class ComponentNode:
    """One part's thermal node: R_th part to ambient (K/W), C_th (J/K); τ = R·C (model s)."""

    name: str
    r_th_k_per_w: float
    c_th_j_per_k: float

    @property
    def tau_s(self) -> float:
        return self.r_th_k_per_w * self.c_th_j_per_k


#: The parts of each demo design.  Values chosen for the demo boards (a TO-220-size switch and
#: Schottky on copper, a ferrite transformer; a PowerPAK-size pair and a moulded inductor),
#: order of magnitude of such parts on a board in still air (common practice), so that the
#: hot spots rise by tens of kelvin at full load within minutes.
COMPONENT_NETWORKS: dict[str, tuple[ComponentNode, ...]] = {
    "flyback-48v-5v": (ComponentNode("switch", 40.0, 1.5),        # τ 60 s
                       ComponentNode("rectifier", 25.0, 3.2),     # τ 80 s
                       ComponentNode("transformer", 35.0, 8.0)),  # τ 280 s
    "buck-12v-1v2": (ComponentNode("switch", 40.0, 1.0),           # τ 40 s
                     ComponentNode("sync_rectifier", 35.0, 1.4),   # τ 49 s
                     ComponentNode("inductor", 30.0, 4.0)),        # τ 120 s
}


def network_for(design: ConverterDesign) -> tuple[ComponentNode, ...]:
    """The parts of ``design`` (its name, else by topology: the flyback's or the buck's)."""
    if design.name in COMPONENT_NETWORKS:
        return COMPONENT_NETWORKS[design.name]
    return COMPONENT_NETWORKS["flyback-48v-5v" if design.topology == "flyback" else "buck-12v-1v2"]


def component_losses(design: ConverterDesign, op: OperatingPoint) -> dict[str, float]:
    """Each part's loss (W) at ``op`` with ``design``'s coefficients (module docstring)."""
    names = [n.name for n in network_for(design)]
    sp = op.stage
    if sp is None or not op.running:
        return {name: 0.0 for name in names}
    ls, lb = design.losses, op.losses
    if design.topology == "flyback":
        parts = (sp.sw_rms_a ** 2 * ls.r_switch_ohm + lb.switching_w,
                 lb.rectifier_w,
                 lb.magnetic_w + sp.sw_rms_a ** 2 * ls.r_primary_ohm + sp.rect_rms_a ** 2 * ls.r_secondary_ohm)
    else:
        parts = (sp.sw_rms_a ** 2 * ls.r_switch_ohm + lb.switching_w,
                 sp.rect_rms_a ** 2 * ls.r_sync_ohm + lb.rectifier_w,
                 lb.magnetic_w + sp.l_rms_a ** 2 * ls.r_primary_ohm)
    return {name: float(max(p, 0.0)) for name, p in zip(names, parts)}


class ComponentTemperatures:
    """The parts' temperatures over model time; each starts at the ambient at ``t0_s``."""

    def __init__(self, nodes: tuple[ComponentNode, ...], t0_s: float, ambient: Callable[[float], float]) -> None:
        self.nodes = nodes
        self.ambient = ambient
        self._lock = threading.Lock()
        a0 = float(ambient(t0_s))
        self._t: list[float] = [float(t0_s)]
        self._temps: list[tuple[float, ...]] = [tuple(a0 for _ in nodes)]
        self._step_s = min(n.tau_s for n in nodes) / 100.0

    @property
    def names(self) -> tuple[str, ...]:
        return tuple(n.name for n in self.nodes)

    @property
    def latest_s(self) -> float:
        with self._lock:
            return self._t[-1]

    def advance(self, t_s: float, losses_w: Callable[[float], Mapping[str, float]]) -> None:
        """Integrate up to ``t_s`` with ``losses_w(t)`` (W per part, held over each step)."""
        with self._lock:
            t, temps = self._t[-1], list(self._temps[-1])
            while t < t_s:
                h = min(t_s - t, self._step_s)
                amb = float(self.ambient(t))
                p = losses_w(t)
                for k, node in enumerate(self.nodes):
                    t_eq = amb + node.r_th_k_per_w * max(float(p.get(node.name, 0.0)), 0.0)
                    temps[k] = t_eq + (temps[k] - t_eq) * math.exp(-h / node.tau_s)
                t = t + h if t_s - t > h else t_s
                self._t.append(t)
                self._temps.append(tuple(temps))
            if len(self._t) > HISTORY:
                del self._t[:-HISTORY], self._temps[:-HISTORY]

    def temperatures_at(self, t_s: float) -> dict[str, float]:
        """Each part's temperature at ``t_s`` (°C): interpolated in the past, held beyond what is known."""
        with self._lock:
            i = bisect.bisect_right(self._t, t_s)
            if i >= len(self._t):
                row = self._temps[-1]
            elif i == 0:
                row = self._temps[0]
            else:
                t0, t1 = self._t[i - 1], self._t[i]
                w = (t_s - t0) / (t1 - t0) if t1 > t0 else 1.0
                row = tuple(a + w * (b - a) for a, b in zip(self._temps[i - 1], self._temps[i]))
            return {n.name: float(x) for n, x in zip(self.nodes, row)}
