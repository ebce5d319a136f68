"""Arm means and the effect in standard-deviation units.

Owns the figures a funder reads beside an effect: the mean outcome of each arm
compared, the effect divided by a standard deviation (Cohen's d, Hedges' g or
Glass's delta; the method names the denominator), and the number of blocks an
estimate had to leave out. Pure numpy/scipy; formulas and sources in
``docs/methods/estimation.md``.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import special

from report_kit.estimation.core import BLOCKED
from report_kit.validate import Record, finite_or_none

__all__ = ["FUNDER_KEYS", "STD_EFFECT_METHODS", "StandardizedEffect", "hedges_correction", "standardized_effect",
           "blocks_left_out", "with_arm_summaries"]

#: Added to every ``estimates`` row (null on CACE rows): the arm means, the effect in SD
#: units and the blocks the estimate left out (null for designs without blocks).
FUNDER_KEYS = ("mean_treated", "mean_control", "std_effect", "std_effect_method", "blocks_left_out")

#: The denominators on offer; ``hedges_g`` is the report's default (common practice in
#: education funding).
STD_EFFECT_METHODS = ("hedges_g", "cohen_d", "glass_delta")


@dataclass(frozen=True, kw_only=True)
class StandardizedEffect(Record):
    """Arm means and the effect in SD units (field names as in ``results.json``)."""

    mean_treated: float | None
    mean_control: float | None
    std_effect: float | None
    std_effect_method: str
    std_denominator: float | None


def hedges_correction(df: float) -> float:
    """Hedges' (1981) small-sample factor ``J(m) = Gamma(m/2) / (sqrt(m/2) Gamma((m-1)/2))``.

    ``m = n1 + n0 - 2`` are the degrees of freedom of the pooled variance; ``J``
    makes ``g = J d`` unbiased for the population standardized difference under
    normal outcomes with equal variances. ``J(m) ~ 1 - 3 / (4m - 1)``
    (Hedges 1981, eq. 6e). Computed with log-gamma so large ``m`` does not overflow.
    """
    if isinstance(df, bool) or not isinstance(df, (int, float, np.integer, np.floating)) or not df > 1:
        raise ValueError(f"`df` must be a number > 1; got {df!r}")
    m = float(df)
    return math.exp(special.gammaln(m / 2) - special.gammaln((m - 1) / 2)) / math.sqrt(m / 2)


def _arms(y, z) -> tuple[np.ndarray, np.ndarray]:
    y = np.asarray(y, dtype=float)
    z = np.asarray(z)
    if y.ndim != 1 or z.shape != y.shape:
        raise ValueError(f"`y` and `z` must be 1-D arrays of the same length; got shapes {y.shape} and {z.shape}")
    if not np.isin(z, (0, 1)).all():
        raise ValueError("`z` must hold only 0 (control) and 1 (treated)")
    keep = ~np.isnan(y)
    return y[keep & (z == 1)], y[keep & (z == 0)]


def _denominator(method: str, y1: np.ndarray, y0: np.ndarray) -> float | None:
    n1, n0 = y1.size, y0.size
    if method == "glass_delta":
        return float(np.std(y0, ddof=1)) if n0 > 1 else None
    if n1 + n0 < 3 or n1 == 0 or n0 == 0:
        return None
    ss = float(np.sum((y1 - y1.mean()) ** 2) + np.sum((y0 - y0.mean()) ** 2))
    return math.sqrt(ss / (n1 + n0 - 2))


def standardized_effect(estimate, y, z, *, method: str = "hedges_g") -> StandardizedEffect:
    """The arm means and ``estimate`` expressed in standard deviations of the outcome.

    Parameters
    ----------
    estimate : float or None
        The effect to standardize (the design-based estimate of the row; for a
        simple difference in means it is ``mean_treated - mean_control``).
    y : array_like, shape (n,)
        Outcome; NaN marks a missing value (left out, as in the estimate).
    z : array_like, shape (n,)
        Assignment, 0/1.
    method : {"hedges_g", "cohen_d", "glass_delta"}
        ``cohen_d``: ``estimate / s_p`` with the pooled SD
        ``s_p = sqrt(((n1-1) s1^2 + (n0-1) s0^2) / (n1 + n0 - 2))`` (Cohen 1988).
        ``hedges_g``: ``J(n1 + n0 - 2) * estimate / s_p`` with Hedges' (1981)
        small-sample factor (:func:`hedges_correction`).
        ``glass_delta``: ``estimate / s0``, the control arm's SD (Glass 1976).

    Returns
    -------
    StandardizedEffect
        ``std_effect`` is None when the estimate or the denominator is
        undefined or the denominator is zero.
    """
    if method not in STD_EFFECT_METHODS:
        raise ValueError(f"`method` must be one of {set(STD_EFFECT_METHODS)}; got {method!r}")
    y1, y0 = _arms(y, z)
    sd = _denominator(method, y1, y0)
    value = finite_or_none(estimate)
    effect = None
    df = y1.size + y0.size - 2
    if value is not None and sd is not None and sd > 0 and (method != "hedges_g" or df > 1):
        effect = value / sd
        if method == "hedges_g":   # Hedges' factor J(df) needs df > 1
            effect *= hedges_correction(df)
    return StandardizedEffect(
        mean_treated=float(y1.mean()) if y1.size else None,
        mean_control=float(y0.mean()) if y0.size else None,
        std_effect=finite_or_none(effect), std_effect_method=method,
        std_denominator=finite_or_none(sd))


def blocks_left_out(y, z, block) -> int:
    """Blocks with no treated or no control unit among the units with an observed outcome.

    Such a block cannot contribute a within-block difference, so a block-weighted
    estimate covers the remaining blocks only.
    """
    y = np.asarray(y, dtype=float)
    z = np.asarray(z)
    block = np.asarray(block, dtype=object)
    if not (y.shape == z.shape == block.shape):
        raise ValueError("`y`, `z` and `block` must have the same length")
    keep = ~np.isnan(y)
    left = 0
    for label in dict.fromkeys(block.tolist()):
        arm = z[keep & (block == label)]
        left += int(arm.all() or not arm.any())
    return left


def _subgroup_mask(frame, subgroup: str | None) -> np.ndarray:
    """Units of the subgroup ``"col=value"`` (as the estimates list writes it); all units for None."""
    if subgroup is None:
        return np.ones(len(frame), dtype=bool)
    column, _, level = subgroup.partition("=")
    return np.array([f"{v}" == level for v in frame[column].tolist()], dtype=bool)


def with_arm_summaries(study, rows: list[dict]) -> list[dict]:
    """The ``estimates`` rows with :data:`FUNDER_KEYS` added (a new list; rows are copied).

    For every row except CACE: the arm means of the row's outcome (the take-up
    column for the take-up row) over the units of its subgroup, the row's
    estimate in SD units by ``analysis.std_effect`` (:func:`standardized_effect`)
    and, for designs with blocks, :func:`blocks_left_out` over the same units.
    """
    spec = study.spec
    z = study.z
    block = study.block if spec.design.mechanism in BLOCKED else None
    out = []
    for row in rows:
        row = {**row, **dict.fromkeys(FUNDER_KEYS)}
        if row["estimand"] != "CACE":
            y = study.frame[row["outcome"]].to_numpy(dtype=float)
            zs, bs = z, block
            if row["subgroup"] is not None:   # all units otherwise: no copies
                mask = _subgroup_mask(study.frame, row["subgroup"])
                y, zs, bs = y[mask], z[mask], None if block is None else block[mask]
            std = standardized_effect(row["estimate"], y, zs, method=spec.analysis.std_effect)
            row.update(mean_treated=std.mean_treated, mean_control=std.mean_control, std_effect=std.std_effect,
                       std_effect_method=std.std_effect_method,
                       blocks_left_out=None if bs is None else blocks_left_out(y, zs, bs))
        out.append(row)
    return out
