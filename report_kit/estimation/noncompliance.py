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
from scipy import stats

from report_kit.estimation.core import (
    Estimate,
    _binary,
    _interval,
    _primary_rule,
    _sample,
    _to_estimate,
    _unadjusted,
    _validate,
    _warn,
)
from report_kit.validate import Record

__all__ = ["CACE_ASSUMPTIONS", "TF_SAFE_FIRST_STAGE_F", "Noncompliance", "estimate_noncompliance"]


#: First-stage strength below which a warning is issued (F = t^2 < 10;
#: common practice, after Staiger & Stock 1997).
WEAK_FIRST_STAGE_F = 10.0

#: First-stage F below which the Wald (t-ratio) interval at the 5% level is not
#: assured its size (Lee, McCrary, Moreira & Porter 2022: F > 104.7 is needed for
#: the usual 1.96 critical value); the Anderson–Rubin interval is valid at any F.
TF_SAFE_FIRST_STAGE_F = 104.7

#: How the CACE's assumptions are stated in ``results.json`` (``compliance.assumptions``).
CACE_ASSUMPTIONS = (
    "The complier effect (CACE) assumes exclusion: assignment changes outcomes only through "
    "take-up; and monotonicity: no unit takes the treatment up only when not offered it "
    "(no defiers). Assignment is random by design; neither assumption is checked by the data "
    "(Angrist, Imbens & Rubin 1996)."
)


@dataclass(frozen=True, kw_only=True)
class Noncompliance(Record):
    """ITT on the outcome, ITT on take-up, and the CACE (Wald ratio).

    ``rate_treated``/``rate_control`` are the shares of units that received
    treatment in each assigned arm, over the units used for the CACE.
    """

    record_keys = ("itt", "itt_takeup", "cace", "anderson_rubin", "rate_treated", "rate_control")

    itt: Estimate
    itt_takeup: Estimate
    cace: Estimate
    rate_treated: float | None
    rate_control: float | None
    anderson_rubin: dict | None = None


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

    Beside the Wald interval, ``anderson_rubin`` holds the Anderson–Rubin
    interval (valid however weak the first stage), see :func:`_anderson_rubin`.

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
                         rate_treated=rate_t, rate_control=rate_c,
                         anderson_rubin=_anderson_rubin(fit_y, fit_d, cace.df, design.alpha))


def _anderson_rubin(fit_y, fit_d, df, alpha: float) -> dict | None:
    """Anderson–Rubin interval for the CACE by inverting the test of ``ITT(y - c d) = 0``.

    The ITT of ``u_c = y - c d`` is ``a - c b`` (``a``, ``b`` the ITTs on outcome
    and take-up) and its design variance ``sum_u (e_u - c f_u)^2`` is quadratic
    in ``c`` because every variance contribution is linear in the outcome
    (``e``, ``f`` the contributions of ``y`` and ``d``). ``c`` is kept when
    ``(a - c b)^2 <= q^2 (V_yy - 2 c V_yd + c^2 V_dd)`` with ``q = t_{1-alpha/2}``
    at the Wald interval's df (Anderson & Rubin 1949; Imbens & Rosenbaum 2005
    for the randomization form). The set solving this quadratic is an interval
    when the first stage is significant at level alpha (``b^2 > q^2 V_dd``),
    otherwise two half-lines or the whole line: ``shape`` says which
    (``bounded``: ``[ci_low, ci_high]``; ``two_half_lines``: every value except
    the open gap ``(gap_low, gap_high)``; ``whole_line``: no value is excluded).
    """
    if (fit_y.estimate is None or fit_d.estimate is None or not fit_y.se_ok
            or not fit_d.se_ok or df is None or not df > 0
            or not np.array_equal(fit_y.keys, fit_d.keys)):
        return None
    q2 = float(stats.t.ppf(1.0 - alpha / 2.0, df)) ** 2
    a, b = fit_y.estimate, fit_d.estimate
    vyy = float(fit_y.contrib @ fit_y.contrib)
    vyd = float(fit_y.contrib @ fit_d.contrib)
    vdd = float(fit_d.contrib @ fit_d.contrib)
    qa, qb, qc = b * b - q2 * vdd, -2.0 * (a * b - q2 * vyd), a * a - q2 * vyy
    disc = qb * qb - 4.0 * qa * qc
    out = {"level": 1.0 - alpha, "df": float(df), "ci_low": None, "ci_high": None,
           "gap_low": None, "gap_high": None}
    if qa > 0:
        if disc < 0:       # cannot happen with a real variance; kept for safety
            return {**out, "shape": "empty"}
        root = math.sqrt(disc)
        lo, hi = sorted(((-qb - root) / (2 * qa), (-qb + root) / (2 * qa)))
        return {**out, "shape": "bounded", "ci_low": lo, "ci_high": hi}
    if qa < 0 and disc > 0:
        root = math.sqrt(disc)
        lo, hi = sorted(((-qb - root) / (2 * qa), (-qb + root) / (2 * qa)))
        # kept: c <= lo or c >= hi; the gap (lo, hi) is excluded
        return {**out, "shape": "two_half_lines", "gap_low": lo, "gap_high": hi}
    return {**out, "shape": "whole_line"}


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
