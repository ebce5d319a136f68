"""Effects within pre-specified subgroups and the contrasts between them.

Owns :func:`estimate_subgroups`, its results :class:`SubgroupResult` and
:class:`SubgroupDifference`, and the covariance of two estimates that share
clusters. Built on :mod:`report_kit.estimation.core`; also importable from
:mod:`report_kit.estimation.neyman`, whose ``study_subgroup_differences`` assembles the
report table. Formulas: ``docs/methods/estimation.md``.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import pandas as pd

from report_kit.estimation.core import (
    CLUSTERED,
    Estimate,
    _Fit,
    _interval,
    _primary_rule,
    _sample,
    _satterthwaite,
    _to_estimate,
    _unadjusted,
    _validate,
)
from report_kit.errors import DataError
from report_kit.validate import Record

__all__ = ["SubgroupDifference", "SubgroupResult", "estimate_subgroups"]


@dataclass(frozen=True, kw_only=True)
class SubgroupDifference(Record):
    """Effect in subgroup ``level`` minus the effect in subgroup ``reference``."""

    level: str
    reference: str
    estimate: float | None
    std_error: float | None
    ci_low: float | None
    ci_high: float | None
    df: float | None


@dataclass(frozen=True, kw_only=True)
class SubgroupResult(Record):
    """Effects within each level of a pre-specified subgroup variable.

    ``levels`` are sorted; ``estimates[i]`` belongs to ``levels[i]``;
    ``differences`` compare every other level with ``levels[0]``.
    ``n_missing_group`` counts units without a subgroup label (left out).
    In ``results.json`` each estimate is stored with its ``subgroup`` first
    (:attr:`rows`).
    """

    record_keys = ("levels", "rows", "differences", "n_missing_group")
    record_renamed = {"rows": "estimates"}

    levels: tuple[str, ...]
    estimates: tuple[Estimate, ...]
    differences: tuple[SubgroupDifference, ...]
    n_missing_group: int = 0

    @property
    def rows(self) -> tuple[dict, ...]:
        """Each estimate's dict with the ``subgroup`` (its level) first."""
        return tuple({"subgroup": level, **est.to_dict()} for level, est in zip(self.levels, self.estimates))


# ---------------------------------------------------------------------------
# Public: subgroups
# ---------------------------------------------------------------------------


def estimate_subgroups(y, z, g, *, mechanism: str, block=None, cluster=None,
                       alpha: float = 0.05) -> SubgroupResult:
    """Effect within each level of a pre-specified subgroup variable.

    Each level gets the design's primary unadjusted estimate computed on its own
    units (Neyman / blocked / paired; CR2 for cluster designs). The difference
    between level l and the first level (sorted) has variance
    ``V_l + V_0 - 2 C``, where ``C = 0`` unless clusters (or cluster blocks)
    hold units of both levels, in which case ``C = sum_g c_g^(l) c_g^(0)`` over
    the shared clusters (the cross term of the CR2 sandwich). df:
    Welch–Satterthwaite combination ``(V_l + V_0)^2 / (V_l^2/df_l + V_0^2/df_0)``.
    Units with a missing label (None/NaN) are left out and counted.
    """
    y, design = _validate(y, z, mechanism, block, cluster, alpha)
    codes, labels = _group_codes(g, design.n)
    rule = _primary_rule(mechanism)
    samples = [_sample(design, y, codes == k) for k in range(len(labels))]
    fits = [_unadjusted(s, rule) for s in samples]
    estimates = tuple(
        _to_estimate(fit, design.alpha, estimand="subgroup ATE", estimator="unadjusted",
                     n_missing=s.n_missing)
        for s, fit in zip(samples, fits)
    )
    shared = mechanism in CLUSTERED
    differences = tuple(
        _difference(fits[k], fits[0], labels[k], labels[0], design.alpha, shared)
        for k in range(1, len(labels))
    )
    return SubgroupResult(levels=tuple(labels), estimates=estimates, differences=differences,
                          n_missing_group=int(np.sum(codes < 0)))


def _group_codes(g, n: int) -> tuple[np.ndarray, list[str]]:
    series = pd.Series(np.asarray(g, dtype=object))
    if series.size != n:
        raise ValueError(f"`g` must have one label per unit ({n}); got {series.size}")
    try:
        codes, uniques = pd.factorize(series, sort=True)
    except TypeError:
        codes, uniques = pd.factorize(series, sort=False)
    if len(uniques) == 0:
        raise DataError("`g` has no non-missing labels; a subgroup analysis needs at least one")
    return codes, [_level_label(v) for v in uniques]


def _level_label(value) -> str:
    if isinstance(value, (float, np.floating)) and float(value).is_integer():
        return str(int(value))
    return str(value)


def _difference(fit: _Fit, ref: _Fit, level: str, reference: str, alpha: float,
                shared: bool) -> SubgroupDifference:
    if fit.estimate is None or ref.estimate is None:
        return SubgroupDifference(level=level, reference=reference, estimate=None,
                                  std_error=None, ci_low=None, ci_high=None, df=None)
    est = fit.estimate - ref.estimate
    se = df = None
    if fit.se_ok and ref.se_ok:
        cov = _shared_covariance(fit, ref) if shared else 0.0
        variance = max(fit.variance + ref.variance - 2.0 * cov, 0.0)
        se = math.sqrt(variance)
        df = _satterthwaite(((fit.variance, fit.df or 0.0), (ref.variance, ref.df or 0.0)))
    low, high = _interval(est, se, df, alpha)
    return SubgroupDifference(level=level, reference=reference, estimate=est, std_error=se,
                              ci_low=low, ci_high=high, df=df)


def _shared_covariance(a: _Fit, b: _Fit) -> float:
    common, ia, ib = np.intersect1d(a.keys, b.keys, assume_unique=True, return_indices=True)
    return float(np.dot(a.contrib[ia], b.contrib[ib])) if common.size else 0.0
