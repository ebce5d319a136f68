"""Large-sample intervals for the difference in means under rerandomization (Li, Ding & Rubin 2018).

Owns :func:`rerandomized_interval` (one outcome) and :func:`study_rerandomized_intervals`
(every outcome of a rerandomized complete design). Under Mahalanobis
rerandomization the difference in means is no longer asymptotically normal:
its law is a normal plus a truncated-normal piece, narrower than the Neyman
interval assumes. Definitions in ``docs/methods/rerandomization.md``.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import special, stats

from report_kit.validate import Record, open_unit_interval

__all__ = ["RerandomizedInterval", "truncated_normal_component", "rerandomized_interval",
           "study_rerandomized_intervals"]

#: Draws of the truncated component (fixed seed: the interval is deterministic).
COMPONENT_DRAWS = 200_000
COMPONENT_SEED = 20180911
_NODES = 2000


@dataclass(frozen=True, kw_only=True)
class RerandomizedInterval(Record):
    """Difference in means with its Li-Ding-Rubin interval; fields of ``rerandomization_intervals``."""

    outcome: str
    estimate: float
    std_error: float
    r_squared: float
    level: float
    ci_low: float
    ci_high: float
    neyman_ci_low: float
    neyman_ci_high: float
    method: str = "li_ding_rubin_2018"


def truncated_normal_component(k: int, a: float, *, draws: int = COMPONENT_DRAWS,
                               seed: int = COMPONENT_SEED) -> np.ndarray:
    """Draws of ``L_{K,a} = D_1 | D'D <= a`` with ``D ~ N(0, I_K)`` (Morgan & Rubin 2012).

    ``D = R U`` with ``R^2`` a chi-squared(K) variable truncated to ``[0, a]``
    (inverse CDF of a uniform on ``[0, P(chi2_K <= a)]``) and ``U`` uniform on
    the sphere, independent; ``L = R U_1``. ``Var L = P(chi2_{K+2} <= a) /
    P(chi2_K <= a)``.
    """
    if not isinstance(k, int) or k < 1 or not a > 0:
        raise ValueError(f"`k` must be a positive integer and `a` positive; got {k!r}, {a!r}")
    rng = np.random.default_rng(seed)
    top = stats.chi2.cdf(a, k)
    r2 = stats.chi2.ppf(rng.random(draws) * top, k)
    g = rng.standard_normal((draws, k))
    u1 = g[:, 0] / np.linalg.norm(g, axis=1)
    return np.sqrt(r2) * u1


def _quantile(scale_normal: float, scale_trunc: float, component: np.ndarray, prob: float) -> float:
    """``q`` with ``P(scale_normal * eps + scale_trunc * L <= q) = prob`` (``eps ~ N(0, 1)``), by bisection.

    ``L`` is represented by 2,000 of its sample quantiles (mid-points of equal
    probability slices), so each step costs 2,000 normal CDF values.
    """
    piece = scale_trunc * np.quantile(component, (np.arange(_NODES) + 0.5) / _NODES)
    if scale_normal <= 0:
        return float(np.quantile(piece, prob))
    lo, hi = -10.0 * (scale_normal + scale_trunc) - 1.0, 10.0 * (scale_normal + scale_trunc) + 1.0
    for _ in range(80):
        mid = 0.5 * (lo + hi)
        if special.ndtr((mid - piece) / scale_normal).mean() < prob:
            lo = mid
        else:
            hi = mid
    return 0.5 * (lo + hi)


def rerandomized_interval(y, z, x, max_distance: float, *, level: float = 0.95, outcome: str = "y",
                          component: np.ndarray | None = None) -> RerandomizedInterval:
    """Conservative large-sample interval for the ATE under Mahalanobis rerandomization.

    Li, Ding & Rubin (2018): with ``V = s1^2 / n1 + s0^2 / n0`` (Neyman),
    ``V_tx = s_{1,xy} / n1 + s_{0,xy} / n0`` (within-arm covariances of the
    covariates with the outcome), ``V_xx = S_{1,x} / n1 + S_{0,x} / n0``
    (within-arm covariances of the covariates: ``R^2 <= 1`` in every sample;
    it estimates the design value ``S_x (1 / n1 + 1 / n0)``) and
    ``R^2 = V_tx' V_xx^{-1} V_tx / V``, the difference in
    means ``tau_hat`` satisfies ``tau_hat - tau ~ sqrt(V (1 - R^2)) eps +
    sqrt(V R^2) L_{K,a}`` asymptotically (``eps ~ N(0, 1)``, ``L`` from
    :func:`truncated_normal_component`). The interval is ``tau_hat -+ q``
    with ``q`` the ``(1 + level) / 2`` quantile of that law (it is symmetric);
    conservative like the Neyman interval, whose bounds are also returned.

    Parameters
    ----------
    y : array_like, shape (n,)   (no missing values)
    z : array_like of 0/1, shape (n,)
    x : array_like, shape (n,) or (n, K)
        The rerandomization covariates.
    max_distance : float
        ``a`` of the acceptance rule ``M <= a``.
    """
    y = np.asarray(y, dtype=np.float64)
    z = np.asarray(z).astype(bool)
    x = np.asarray(x, dtype=np.float64)
    x = x[:, None] if x.ndim == 1 else x
    if y.ndim != 1 or z.shape != y.shape or x.shape[0] != y.size or not np.all(np.isfinite(y)):
        raise ValueError("`y`, `z` and `x` must describe the same units, with finite outcomes")
    level = open_unit_interval("level", level)
    n1, n0 = int(z.sum()), int((~z).sum())
    if min(n1, n0) < 2:
        raise ValueError("each arm needs at least two units")
    k = x.shape[1]
    estimate = float(y[z].mean() - y[~z].mean())
    v = float(y[z].var(ddof=1) / n1 + y[~z].var(ddof=1) / n0)
    v_tx = _arm_cov(x[z], y[z]) / n1 + _arm_cov(x[~z], y[~z]) / n0
    v_xx = _arm_cov(x[z], x[z]) / n1 + _arm_cov(x[~z], x[~z]) / n0
    r2 = float(np.clip(v_tx @ np.linalg.solve(v_xx, v_tx) / v, 0.0, 1.0)) if v > 0 else 0.0
    comp = truncated_normal_component(k, float(max_distance)) if component is None else component
    q = _quantile(math.sqrt(v * (1.0 - r2)), math.sqrt(v * r2), comp, (1.0 + level) / 2.0)
    zq = stats.norm.ppf((1.0 + level) / 2.0) * math.sqrt(v)
    return RerandomizedInterval(outcome=outcome, estimate=estimate, std_error=math.sqrt(v), r_squared=r2,
                                level=float(level), ci_low=estimate - q, ci_high=estimate + q,
                                neyman_ci_low=estimate - zq, neyman_ci_high=estimate + zq)


def _arm_cov(x: np.ndarray, y: np.ndarray) -> np.ndarray:
    """Sample covariance (divisor ``m - 1``) of the columns of ``x`` with ``y`` (a vector or columns)."""
    return ((x - x.mean(axis=0)).T @ (y - y.mean(axis=0))) / (y.shape[0] - 1)


def study_rerandomized_intervals(study) -> list[dict]:
    """``rerandomization_intervals`` of ``results.json``: complete rerandomized designs, complete outcomes.

    Outcomes with missing values are left out (the theory assumes every unit's
    outcome is observed); other mechanisms give an empty list.
    """
    spec = study.spec
    rer = spec.design.rerandomization
    if rer is None or spec.design.mechanism != "complete":
        return []
    x = np.column_stack([study.frame[c].to_numpy(dtype=float) for c in rer.covariates])
    comp = truncated_normal_component(x.shape[1], rer.max_distance)
    out = []
    for o in spec.outcomes:
        y = study.outcome(o.column)
        if np.isnan(y).any():
            continue
        out.append(rerandomized_interval(y, study.z, x, rer.max_distance, level=1.0 - spec.analysis.alpha,
                                         outcome=o.column, component=comp).to_dict())
    return out
