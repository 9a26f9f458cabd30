"""Four-point average active-mode efficiency and the external-power-supply limit formula.

The average is the arithmetic mean of the efficiencies at 25, 50, 75 and 100 % of the
nameplate output current (10 CFR 430 Subpart B Appendix Z; (EU) 2019/1782 Annex II).
The limit is the US DOE Level VI formula of 10 CFR 430.32(w), the same formulas being
used by (EU) 2019/1782 up to 250 W (from memory). Above 250 W nameplate output the
Level VI table has one more row, 0.875 average efficiency and 0.500 W at no load for both
supply classes (10 CFR 430.32(w)(1)(ii), from memory); (EU) 2019/1782 stops at 250 W, so
such a limit is the US one alone. Those rules are written for AC-DC external power
supplies: applied to a DC-DC converter the comparison is an INDICATIVE check of how good
the efficiency is, never a compliance test.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Literal

import numpy as np
from numpy.typing import ArrayLike

SupplyClass = Literal["basic-voltage", "low-voltage"]

LOAD_FRACTIONS = (0.25, 0.50, 0.75, 1.00)


def supply_class(vout_nom_v: float, iout_rated_a: float) -> SupplyClass:
    """Level VI class: low-voltage when the nameplate output is < 6 V and ≥ 550 mA."""
    return "low-voltage" if vout_nom_v < 6.0 and iout_rated_a >= 0.550 else "basic-voltage"


def level_vi_average_efficiency_limit(pout_rated_w: float, cls: SupplyClass) -> float:
    """Minimum average active-mode efficiency (0..1) for nameplate output power Po in W.

    10 CFR 430.32(w)(1)(ii) Table, single-voltage external supplies (from memory):
    basic-voltage: Po ≤ 1 W: 0.5·Po + 0.160; 1 < Po ≤ 49 W: 0.071·ln Po − 0.0014·Po + 0.67;
    49 < Po ≤ 250 W: 0.880. Low-voltage: 0.517·Po + 0.087; 0.0834·ln Po − 0.0014·Po + 0.609;
    0.870. Po > 250 W: 0.875 for both classes (US rule only; (EU) 2019/1782 ends at 250 W).
    """
    po = float(pout_rated_w)
    if not (po > 0 and math.isfinite(po)):
        raise ValueError(f"nameplate output power must be a positive number of watts, not {pout_rated_w!r}")
    if cls not in ("basic-voltage", "low-voltage"):
        raise ValueError(f"supply class must be 'basic-voltage' or 'low-voltage', not {cls!r}")
    if po > 250.0:
        return 0.875
    if cls == "basic-voltage":
        if po <= 1.0:
            return 0.5 * po + 0.160
        if po <= 49.0:
            return 0.071 * math.log(po) - 0.0014 * po + 0.67
        return 0.880
    if cls == "low-voltage":
        if po <= 1.0:
            return 0.517 * po + 0.087
        if po <= 49.0:
            return 0.0834 * math.log(po) - 0.0014 * po + 0.609
        return 0.870
    raise ValueError(f"supply class must be 'basic-voltage' or 'low-voltage', not {cls!r}")


def no_load_power_limit_w(pout_rated_w: float) -> float:
    """Level VI no-load input power limit: 0.100 W up to 49 W, 0.210 W for 49–250 W, 0.500 W
    above 250 W (10 CFR 430.32(w)(1)(ii), from memory; the EU rule ends at 250 W)."""
    po = float(pout_rated_w)
    if not (po > 0 and math.isfinite(po)):
        raise ValueError(f"nameplate output power must be a positive number of watts, not {pout_rated_w!r}")
    if po <= 49.0:
        return 0.100
    return 0.210 if po <= 250.0 else 0.500


@dataclass(frozen=True)
class AverageEfficiency:
    """Four-point average efficiency at one line voltage, with the indicative limit.

    ``found`` is False (and ``reason`` says why) when the sweep lacks one of the four
    load points; the numeric fields are then NaN.
    """

    found: bool
    reason: str
    vin_v: float
    average_efficiency: float
    point_efficiencies: tuple[float, ...]
    limit_efficiency: float
    supply_class: SupplyClass
    pout_rated_w: float
    meets_indicative_limit: bool
    note: str = "indicative check only: the Level VI limit is written for AC-DC external power supplies"


def four_point_average(
    vin_v: float,
    iout_a: ArrayLike,
    eff: ArrayLike,
    *,
    iout_rated_a: float,
    vout_nom_v: float,
    rel_tol: float = 0.02,
) -> AverageEfficiency:
    """Average the efficiencies measured at 25/50/75/100 % of ``iout_rated_a`` (one line voltage).

    A measured load counts for a fraction when it is within ``rel_tol`` of the rated current
    times the fraction; repeated points at one load are averaged.
    """
    iout = np.asarray(iout_a, dtype=float)
    e = np.asarray(eff, dtype=float)
    pout_rated_w = vout_nom_v * iout_rated_a
    cls = supply_class(vout_nom_v, iout_rated_a)
    limit = level_vi_average_efficiency_limit(pout_rated_w, cls)
    values = []
    for frac in LOAD_FRACTIONS:
        target = frac * iout_rated_a
        sel = np.abs(iout - target) <= rel_tol * iout_rated_a
        sel &= np.isfinite(e)
        if not sel.any():
            return AverageEfficiency(
                found=False,
                reason=f"no load point within {rel_tol:.0%} of {frac:.0%} of rated ({target:g} A)",
                vin_v=float(vin_v), average_efficiency=math.nan, point_efficiencies=(),
                limit_efficiency=limit, supply_class=cls, pout_rated_w=pout_rated_w,
                meets_indicative_limit=False,
            )
        values.append(float(np.mean(e[sel])))
    avg = float(np.mean(values))
    note = AverageEfficiency.note
    if pout_rated_w > 250.0:
        note += "; above 250 W the limit is the US Level VI row alone ((EU) 2019/1782 ends at 250 W)"
    return AverageEfficiency(
        found=True, reason="", vin_v=float(vin_v), average_efficiency=avg,
        point_efficiencies=tuple(values), limit_efficiency=limit, supply_class=cls,
        pout_rated_w=pout_rated_w, meets_indicative_limit=avg >= limit, note=note,
    )
