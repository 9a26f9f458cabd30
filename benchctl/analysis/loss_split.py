"""Where the losses go: P_loss = a + b·I + c·I² fitted against the load at one line voltage.

The three parts are the fixed loss (controller, gate drive, core at fixed flux, bleed),
the part linear in the load current (diode knee voltage, switching overlap) and the part
quadratic in it (conduction through resistances) — common practice in power-supply
loss budgets.  Weighted linear least squares on the design matrix [1, I, I²]
(weights 1/u² when the points' standard uncertainties are given); the parameters'
covariance is (XᵀWX)⁻¹, scaled by the reduced chi-square when no uncertainties are
given (the convention of numpy.polyfit(cov=True) and scipy.optimize.curve_fit with
absolute_sigma=False; with uncertainties it is absolute, GUM 4.2 / JCGM 100 §C.3).
A predicted efficiency between points carries the propagated standard uncertainty
u_P² = gᵀ·Σ·g with g = [1, I, I²] and dη/dP_loss = −P_out/(P_out + P_loss)² (GUM 5.1.2).
Units: A, W.
"""

from __future__ import annotations

import logging
import math
from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike, NDArray

from benchctl.errors import AnalysisInputError

logger = logging.getLogger(__name__)


@dataclass(frozen=True)
class LossSplit:
    """Fitted loss parts at one line voltage.

    fixed_w (a), linear_w_per_a (b), quadratic_w_per_a2 (c) and their standard
    uncertainties; covariance (3 × 3, same order); residual_rms_w of the fit;
    dof = points − 3; weighted: whether point uncertainties were used.
    """

    vin_v: float
    fixed_w: float
    linear_w_per_a: float
    quadratic_w_per_a2: float
    u_fixed_w: float
    u_linear_w_per_a: float
    u_quadratic_w_per_a2: float
    covariance: tuple[tuple[float, ...], ...]
    residual_rms_w: float
    dof: int
    weighted: bool

    @property
    def coefficients(self) -> NDArray[np.float64]:
        """(a, b, c) as an array."""
        return np.array([self.fixed_w, self.linear_w_per_a, self.quadratic_w_per_a2])

    def parts_w(self, iout_a: ArrayLike) -> dict[str, NDArray[np.float64]]:
        """The three parts (W) at ``iout_a`` (A): ``fixed_w``, ``linear_w``, ``quadratic_w``, ``total_w``."""
        i = np.asarray(iout_a, dtype=float)
        fixed = np.full_like(i, self.fixed_w)
        lin = self.linear_w_per_a * i
        quad = self.quadratic_w_per_a2 * i * i
        return {"fixed_w": fixed, "linear_w": lin, "quadratic_w": quad, "total_w": fixed + lin + quad}

    def loss_w(self, iout_a: ArrayLike) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
        """(predicted loss W, its standard uncertainty W) at ``iout_a``."""
        i = np.atleast_1d(np.asarray(iout_a, dtype=float))
        g = np.vstack([np.ones_like(i), i, i * i])
        cov = np.asarray(self.covariance, dtype=float)
        p = self.coefficients @ g
        u = np.sqrt(np.maximum(np.einsum("in,ij,jn->n", g, cov, g), 0.0))
        return p, u


def fit_loss_split(iout_a: ArrayLike, ploss_w: ArrayLike, *, u_ploss_w: ArrayLike | None = None,
                   vin_v: float = math.nan, birge: bool = False) -> LossSplit:
    """Fit P_loss = a + b·I + c·I² (module docstring).  Needs four points or more.

    ``birge``: with point uncertainties, scale the covariance by the reduced chi-square when
    it exceeds 1 (the Birge ratio, common practice), so a model error larger than the
    readings' scatter widens the parameters' uncertainty instead of hiding.
    """
    i = np.asarray(iout_a, dtype=float).ravel()
    p = np.asarray(ploss_w, dtype=float).ravel()
    if i.size != p.size:
        raise AnalysisInputError(f"fit_loss_split: {i.size} currents but {p.size} losses; pass one loss per point")
    if i.size < 4:
        raise AnalysisInputError(f"fit_loss_split: {i.size} points; at least 4 are needed to fit three parts "
                                 "with an uncertainty (measure more load points at this line voltage)")
    if not (np.all(np.isfinite(i)) and np.all(np.isfinite(p))):
        raise AnalysisInputError("fit_loss_split: currents and losses must be finite; drop the failed points")
    if np.unique(np.round(i, 12)).size < 3:
        raise AnalysisInputError("fit_loss_split: at least 3 distinct load currents are needed")
    x = np.vstack([np.ones_like(i), i, i * i]).T
    weighted = u_ploss_w is not None
    if weighted:
        u = np.asarray(u_ploss_w, dtype=float).ravel()
        if u.size != p.size or not np.all(np.isfinite(u) & (u > 0)):
            raise AnalysisInputError("fit_loss_split: u_ploss_w must hold one positive finite uncertainty per point")
        w = 1.0 / u
    else:
        w = np.ones_like(p)
    xw = x * w[:, None]
    coef, *_ = np.linalg.lstsq(xw, p * w, rcond=None)
    resid = p - x @ coef
    dof = i.size - 3
    cov = np.linalg.inv(xw.T @ xw)
    if not weighted:
        cov = cov * float(np.sum(resid ** 2) / dof) if dof > 0 else cov * math.nan
    elif birge and dof > 0:
        cov = cov * max(1.0, float(np.sum((resid * w) ** 2) / dof))
    rms = float(np.sqrt(np.mean(resid ** 2)))
    sd = np.sqrt(np.maximum(np.diag(cov), 0.0))
    return LossSplit(float(vin_v), float(coef[0]), float(coef[1]), float(coef[2]), float(sd[0]), float(sd[1]),
                     float(sd[2]), tuple(tuple(float(c) for c in row) for row in cov), rms, dof, weighted)


@dataclass(frozen=True)
class EfficiencyPrediction:
    """Efficiency predicted from a loss split at ``iout_a`` (A), with its standard uncertainty."""

    iout_a: float
    pout_w: float
    ploss_w: float
    u_ploss_w: float
    efficiency: float
    u_efficiency: float


def predict_efficiency(split: LossSplit, vout_v: float, iout_a: float) -> EfficiencyPrediction:
    """η = P_out/(P_out + P_loss(I)) at ``iout_a`` with ``vout_v`` (V) and its propagated uncertainty."""
    pout = float(vout_v) * float(iout_a)
    p, u = split.loss_w(iout_a)
    pl, ul = float(p[0]), float(u[0])
    pin = pout + pl
    if not pin > 0:
        raise AnalysisInputError(f"predict_efficiency: input power {pin:.4g} W is not positive at {iout_a} A")
    eta = pout / pin
    return EfficiencyPrediction(float(iout_a), pout, pl, ul, eta, pout / (pin * pin) * ul)
