"""Noncompliance: the ITT on the outcome and on take-up, and the CACE.

Owns :func:`estimate_noncompliance` (Wald ratio with a delta-method standard
error; Angrist, Imbens & Rubin 1996), its result :class:`Noncompliance` and
the weak-first-stage threshold. Built on :mod:`report_kit.estimation.core`;
also importable from :mod:`report_kit.estimation.neyman`, which keeps the take-up
rates of the ``compliance`` section. Formulas: ``docs/methods/estimation.md``.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from report_kit.estimation.core import (
    Estimate,
    _binary,
    _interval,
    _json_value,
    _primary_rule,
    _sample,
    _to_estimate,
    _unadjusted,
    _validate,
    _warn,
)

__all__ = ["Noncompliance", "estimate_noncompliance"]


#: First-stage strength below which a warning is issued (F = t^2 < 10;
#: common practice, after Staiger & Stock 1997).
WEAK_FIRST_STAGE_F = 10.0


@dataclass(frozen=True, kw_only=True)
class Noncompliance:
    """ITT on the outcome, ITT on take-up, and the CACE (Wald ratio).

    ``rate_treated``/``rate_control`` are the shares of units that received
    treatment in each assigned arm, over the units used for the CACE.
    """

    itt: Estimate
    itt_takeup: Estimate
    cace: Estimate
    rate_treated: float | None
    rate_control: float | None

    def to_dict(self) -> dict:
        return {
            "itt": self.itt.to_dict(),
            "itt_takeup": self.itt_takeup.to_dict(),
            "cace": self.cace.to_dict(),
            "rate_treated": _json_value(self.rate_treated),
            "rate_control": _json_value(self.rate_control),
        }


# ---------------------------------------------------------------------------
# Public: noncompliance
# ---------------------------------------------------------------------------


def estimate_noncompliance(y, z, d, *, mechanism: str, block=None, cluster=None,
                           alpha: float = 0.05) -> Noncompliance:
    """ITT on the outcome and on take-up, and the CACE (Angrist, Imbens & Rubin 1996).

    ``CACE = ITT_y / ITT_d`` (Wald ratio) with the design's primary unadjusted
    estimator for both ITTs (difference in means; CR2 for cluster designs).
    Delta-method variance: the ITTs are linear in the outcome, so
    ``Var(ITT_y - c ITT_d)`` is the design variance of ``u = y - c d`` at
    ``c = CACE``, and ``SE(CACE) = SE_design(u) / |ITT_d|``. For complete
    randomization this equals the 2SLS sandwich variance with HC2 leverages
    taken from the instruments. df: those of the design rule applied to ``u``.

    Units with a missing outcome or missing take-up are dropped (both ITTs use
    the same units). A zero take-up difference leaves the CACE undefined
    (warning); a first stage with ``(ITT_d / SE)^2 < 10`` warns as weak
    (common practice).
    """
    y, design = _validate(y, z, mechanism, block, cluster, alpha)
    d = _binary(d, "d", allow_missing=True, n=design.n)
    keep = ~np.isnan(d)
    rule = _primary_rule(mechanism)
    s_y = _sample(design, y, keep)
    s_d = _sample(design, d, ~np.isnan(y))
    n_missing = design.n - s_y.y.size
    fit_y, fit_d = _unadjusted(s_y, rule), _unadjusted(s_d, rule, warn_zero=False)
    itt = _to_estimate(fit_y, design.alpha, estimand="ITT", estimator="unadjusted",
                       n_missing=n_missing)
    takeup = _to_estimate(fit_d, design.alpha, estimand="ITT", estimator="unadjusted",
                          n_missing=n_missing)
    cace = _cace(design, y, d, keep, fit_y, takeup, n_missing)
    used_d, used_z = s_d.y, s_d.z
    rate_t = float(used_d[used_z].mean()) if used_z.any() else None
    rate_c = float(used_d[~used_z].mean()) if (~used_z).any() else None
    return Noncompliance(itt=itt, itt_takeup=takeup, cace=cace,
                         rate_treated=rate_t, rate_control=rate_c)


def _cace(design, y, d, keep, fit_y, takeup: Estimate, n_missing) -> Estimate:
    undefined = Estimate(estimand="CACE", estimator="unadjusted", estimate=None,
                         std_error=None, ci_low=None, ci_high=None, df=None,
                         n_treated=fit_y.n_treated, n_control=fit_y.n_control,
                         method="wald_delta", n_missing=n_missing, variance_rule="delta")
    if fit_y.estimate is None or takeup.estimate is None:
        return undefined
    if abs(takeup.estimate) <= 1e-12:
        _warn("assignment does not change take-up (ITT on take-up is 0); the CACE is undefined")
        return undefined
    if takeup.std_error is not None and takeup.std_error > 0:
        f_stat = (takeup.estimate / takeup.std_error) ** 2
        if f_stat < WEAK_FIRST_STAGE_F:
            _warn(f"weak first stage: (ITT on take-up / SE)^2 = {f_stat:.2f} < "
                  f"{WEAK_FIRST_STAGE_F:g}; the CACE interval may be unreliable")
    ratio = fit_y.estimate / takeup.estimate
    fit_u = _unadjusted(_sample(design, y - ratio * d, keep), _primary_rule(design.mechanism))
    se = None if fit_u.variance is None else math.sqrt(fit_u.variance) / abs(takeup.estimate)
    df = fit_u.df
    low, high = _interval(ratio, se, df, design.alpha)
    return Estimate(estimand="CACE", estimator="unadjusted", estimate=float(ratio),
                    std_error=se, ci_low=low, ci_high=high, df=df,
                    n_treated=fit_y.n_treated, n_control=fit_y.n_control,
                    method="wald_delta", n_missing=n_missing, variance_rule="delta")
