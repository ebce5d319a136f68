"""The counting rules of the randomization engine: ties, p-values, Monte Carlo error, null centre.

Owns the one set of rules by which every randomization procedure of
report-kit (outcome tests, test inversion, the balance omnibus test, the
differential-attrition test, Westfall-Young) turns drawn statistics into
p-values:

* :func:`tie_tolerance` - the scale-free tie rule;
* :func:`tail_p_values` - the exact and Monte Carlo p-value rules, the Monte
  Carlo standard error and the rule for undefined draws;
* :func:`null_centre` - the null expectation used by two-sided rules when it
  has no closed form;
* :class:`DrawnStatistics` - upper-tailed statistics on a set of draws (what
  the checks hand back to the engine).

Definitions with sources: ``docs/methods/randomization.md``.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from report_kit.errors import DesignError
from report_kit.validate import METHODS, check_choice

__all__ = ["DEFAULT_RTOL", "DrawnStatistics", "null_centre", "tail_p_values", "tie_tolerance"]

#: Relative tolerance of the tie rule (see :func:`tie_tolerance`).
DEFAULT_RTOL = 1e-12


def tie_tolerance(observed, null, centre=None, rtol: float = DEFAULT_RTOL) -> np.ndarray:
    """Tie tolerance per statistic: ``rtol * max(|t|, max_b |T_b|, |c|)``.

    A drawn statistic ``T_b`` counts as at least as extreme as the observed
    ``t`` when ``T_b >= t - tol`` (after orientation). The tolerance is
    relative to the magnitude of the statistics involved - the observed
    value, every defined drawn value and the null centre ``c`` (when a
    two-sided rule uses one) - so multiplying the data by any positive
    constant multiplies the statistics and the tolerance alike and changes
    no count. It absorbs floating-point noise from summing in different
    orders without merging genuinely different values.

    Parameters
    ----------
    observed : array_like, shape (q,)
    null : array_like, shape (B, q)
        NaN marks an undefined draw (ignored).
    centre : array_like, shape (q,), optional
    rtol : float, default 1e-12

    Returns
    -------
    ndarray, shape (q,)
    """
    observed = np.asarray(observed, dtype=np.float64)
    null = np.asarray(null, dtype=np.float64)
    finite = np.where(np.isfinite(null), np.abs(null), 0.0)
    scale = np.maximum(np.nan_to_num(np.abs(observed)), finite.max(axis=0, initial=0.0))
    if centre is not None:
        scale = np.maximum(scale, np.nan_to_num(np.abs(np.asarray(centre, dtype=np.float64))))
    return rtol * scale


def tail_p_values(observed, null, *, method: str, tolerance, weights=None
                  ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Upper-tail randomization p-values, Monte Carlo standard errors and defined draws, each ``(q,)``.

    ``observed`` and ``null`` are oriented so that larger is more extreme. A
    draw is a *hit* when ``T_b >= t - tol`` (:func:`tie_tolerance`).

    * Undefined draws (NaN: e.g. an arm left empty, a zero variance) are set
      aside for that statistic; ``B`` counts the defined draws.
    * Exact (every assignment enumerated): ``p = sum_b w_b hit_b / sum_b w_b``
      over the defined draws, ``w_b = 1`` unless the assignments are not
      equally likely (``weights``); no standard error (NaN).
    * Monte Carlo (``B`` draws): ``p = (1 + #hits) / (1 + B)``, the observed
      assignment counted as one more draw, which keeps the test valid at
      every ``B`` (Phipson & Smyth 2010); standard error
      ``sqrt(p (1 - p) / B)`` with that ``p`` (the binomial standard error of
      a share of ``B`` draws, never 0).
    * An undefined observed statistic, or no defined draw, gives NaN.

    Raises
    ------
    DesignError
        Exact enumeration in which no defined draw reaches the observed value
        (the observed assignment is not among the enumerated ones).
    """
    check_choice("method", method, METHODS)
    observed = np.asarray(observed, dtype=np.float64)
    null = np.asarray(null, dtype=np.float64)
    tol = np.asarray(tolerance, dtype=np.float64)
    valid = np.isfinite(null)
    defined = valid.sum(axis=0)
    with np.errstate(invalid="ignore"):
        hit = valid & (null >= (observed - tol)[None, :])
    if method == "exact":
        if weights is None:
            mass, total = np.count_nonzero(hit, axis=0).astype(np.float64), defined.astype(np.float64)
        else:
            w = np.asarray(weights, dtype=np.float64)
            mass = np.array([w[hit[:, j]].sum() for j in range(null.shape[1])])
            total = np.array([w[valid[:, j]].sum() for j in range(null.shape[1])])
        with np.errstate(invalid="ignore", divide="ignore"):
            p = mass / total
        if np.any(np.isfinite(observed) & (total > 0) & (mass <= 0)):
            raise DesignError("the exact enumeration does not contain the observed assignment "
                              "(no draw is as extreme as the observed statistic)")
        se = np.full(p.shape, np.nan)
    else:
        p = (1.0 + np.count_nonzero(hit, axis=0)) / (1.0 + defined)
        with np.errstate(invalid="ignore", divide="ignore"):
            se = np.sqrt(p * (1.0 - p) / defined)
    bad = ~np.isfinite(observed) | (defined == 0)
    p[bad], se[bad] = np.nan, np.nan
    return np.minimum(p, 1.0), se, defined


def null_centre(observed: float, values: np.ndarray, weights: np.ndarray | None, method: str) -> float:
    """Null expectation of a statistic from its defined draws ``values`` (1-D).

    Exact: the (weighted) mean over every assignment. Monte Carlo:
    ``(sum_b T_b + t) / (B + 1)``, the mean over the draws *and the observed
    value*, so that a two-sided statistic ``|T - c|`` stays a symmetric
    function of the observed and the drawn assignments and the
    ``(1 + #)/(1 + B)`` p-value stays valid (Phipson & Smyth 2010). NaN
    without defined draws.
    """
    if values.size == 0:
        return float("nan")
    if method == "exact":
        return float(np.average(values, weights=weights))
    if not np.isfinite(observed):
        return float(values.mean())
    return float((values.sum() + observed) / (values.size + 1))


@dataclass(frozen=True, kw_only=True, eq=False)
class DrawnStatistics:
    """Statistics, larger = more extreme, under the observed assignment and every draw.

    What the engine hands back for a statistic registered by another part
    (the balance omnibus, the differential-attrition test).

    Attributes
    ----------
    observed : ndarray, shape (q,)
    null : ndarray, shape (B, q)
        NaN where a draw leaves the statistic undefined.
    method : {"exact", "monte_carlo"}
    weights : ndarray, shape (B,), or None
        Probabilities of enumerated assignments that are not equally likely.
    """

    observed: np.ndarray
    null: np.ndarray
    method: str
    weights: np.ndarray | None = None

    def p_values(self, rtol: float = DEFAULT_RTOL) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Upper-tail ``(p, se, defined)`` by :func:`tail_p_values` with :func:`tie_tolerance`."""
        tol = tie_tolerance(self.observed, self.null, None, rtol)
        return tail_p_values(self.observed, self.null, method=self.method, tolerance=tol, weights=self.weights)

    def defined_rows(self, j: int = 0) -> tuple[np.ndarray, np.ndarray | None]:
        """Column ``j`` over its defined draws, and their weights (``None``: equal)."""
        keep = np.isfinite(self.null[:, j])
        return self.null[keep, j], None if self.weights is None else self.weights[keep]
