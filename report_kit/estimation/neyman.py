"""Design-based estimators of average treatment effects.

Owns: point estimates, standard errors, degrees of freedom and confidence
intervals of the unadjusted estimators for every supported assignment
mechanism; take-up by arm; and the ``estimates`` list (with the subgroup
contrasts and the ``compliance`` section) of ``results.json``. Pure
numpy/scipy, no I/O. The formulas, the rule that picks among them, the
degrees-of-freedom rules and the citations are written out in
``docs/methods/estimation.md``.

The shared building blocks (validation, variance contributions, intervals)
live in :mod:`report_kit.estimation.core`; the covariate-adjusted estimate
(Lin 2013) in :mod:`report_kit.estimation.adjustment`; noncompliance (ITT, ITT on
take-up, CACE) in :mod:`report_kit.estimation.noncompliance`; pre-specified subgroups in
:mod:`report_kit.estimation.subgroups`. Their public names are importable from here too.
"""

from __future__ import annotations

import warnings

import numpy as np

from report_kit.estimation.core import (
    BLOCKED,
    CLUSTERED,
    Estimate,
    _binary,
    _primary_rule,
    _sample,
    _to_estimate,
    _unadjusted,
    _unadjusted_rules,
    _validate,
)
from report_kit.estimation.adjustment import estimate_adjusted
from report_kit.errors import DesignError, ReportKitWarning
from report_kit.estimation.noncompliance import (  # noqa: F401
    CACE_ASSUMPTIONS,
    TF_SAFE_FIRST_STAGE_F,
    WEAK_FIRST_STAGE_F,
    Noncompliance,
    estimate_noncompliance,
)
from report_kit.estimation.subgroups import SubgroupDifference, SubgroupResult, estimate_subgroups

__all__ = [
    "ESTIMATE_KEYS",
    "Estimate",
    "Noncompliance",
    "SubgroupDifference",
    "SubgroupResult",
    "neyman_difference",
    "estimate_adjusted",
    "estimate_effects",
    "estimate_noncompliance",
    "estimate_subgroups",
    "study_estimates",
    "study_subgroup_differences",
]


ESTIMATE_KEYS = (
    "outcome", "estimand", "estimator", "subgroup", "estimate", "std_error",
    "ci_low", "ci_high", "df", "n_treated", "n_control", "method",
)


# ---------------------------------------------------------------------------
# Public: unadjusted estimates
# ---------------------------------------------------------------------------


def neyman_difference(y, z, *, alpha: float = 0.05) -> Estimate:
    """Difference in means with Neyman's conservative variance (complete randomization).

    ``tau_hat = mean(y | z=1) - mean(y | z=0)``;
    ``Var_hat = s1^2/n1 + s0^2/n0`` (Neyman 1923). The interval uses a t
    reference with Welch–Satterthwaite degrees of freedom (Welch 1947).
    Units with a missing outcome are dropped. Same as
    ``estimate_effects(y, z, mechanism="complete", alpha=alpha)[0]``.
    """
    return estimate_effects(y, z, mechanism="complete", alpha=alpha)[0]


def estimate_effects(y, z, *, mechanism: str, block=None, cluster=None,
                     alpha: float = 0.05) -> list[Estimate]:
    """Design-appropriate unadjusted estimates of the ATE.

    Parameters
    ----------
    y : array_like, shape (n,)
        Outcome; NaN marks a missing outcome (that unit is dropped).
    z : array_like, shape (n,)
        Assignment, 0/1.
    mechanism : str
        One of ``complete``, ``bernoulli``, ``blocked``, ``cluster``,
        ``blocked_cluster``, ``matched_pairs``.
    block, cluster : array_like, optional
        Block (pair) and cluster labels, required exactly for the mechanisms that
        use them.
    alpha : float
        Two-sided interval level is ``1 - alpha``.

    Returns
    -------
    list of Estimate
        ``complete``/``bernoulli``: difference in means, Neyman variance
        ``s1^2/n1 + s0^2/n0`` (Neyman 1923), Welch–Satterthwaite df.
        ``blocked``/``matched_pairs``: block-size-weighted average of within-block
        differences; variance ``sum_b w_b^2 (s1b^2/n1b + s0b^2/n0b)``, with blocks
        holding a single treated or control unit in the shift-invariant small-block
        estimator (Pashley & Miratrix 2021; for equal pairs the paired formula of
        Imai 2008).
        ``cluster``/``blocked_cluster``: two estimates, the unit-level difference in
        means with CR2 standard error and Bell–McCaffrey degrees of freedom
        (Bell & McCaffrey 2002) and the Horvitz–Thompson difference in totals
        (Middleton & Aronow 2015).
    """
    y, design = _validate(y, z, mechanism, block, cluster, alpha)
    s = _sample(design, y, np.ones(design.n, dtype=bool))
    return [
        _to_estimate(_unadjusted(s, rule), design.alpha, estimand="ATE",
                     estimator="unadjusted", n_missing=s.n_missing)
        for rule in _unadjusted_rules(mechanism)
    ]


# ---------------------------------------------------------------------------
# Public: the results.json ``estimates`` list
# ---------------------------------------------------------------------------


def study_estimates(study) -> list[dict]:
    """The ``estimates`` list of ``results.json`` for a validated study.

    For each outcome (in spec order): the unadjusted estimate(s) (two for
    cluster designs: CR2 then Horvitz–Thompson), the Lin estimate when
    ``analysis.adjust`` is true and covariates are listed, and the CACE when
    ``compliance`` is set. With ``compliance`` set the unadjusted and adjusted
    rows carry estimand ``"ITT"`` (the effect of assignment) instead of
    ``"ATE"``, and one ``"ITT"`` row on take-up (outcome = the received column,
    all units with observed take-up) follows the outcomes. Then one
    ``"subgroup ATE"`` row per outcome, subgroup variable and level
    (``subgroup = "col=value"``). Each dict has exactly :data:`ESTIMATE_KEYS`.
    """
    spec = study.spec
    kw = _study_design(study)
    z = study.z
    compliance = spec.compliance
    effect = "ITT" if compliance is not None else "ATE"
    covariates = spec.analysis.covariates if spec.analysis.adjust else ()
    X = study.frame[list(covariates)].to_numpy(dtype=float) if covariates else None
    rows: list[dict] = []
    for outcome in spec.outcomes:
        y = study.outcome(outcome.column)
        rows += [_row(outcome.column, est, effect) for est in estimate_effects(y, z, **kw)]
        if X is not None:
            adjusted = _adjusted_or_note(outcome.column, y, z, X, covariates, kw)
            if adjusted is not None:
                rows.append(_row(outcome.column, adjusted, effect))
        if compliance is not None:
            d = study.frame[compliance.received].to_numpy(dtype=float)
            cace = estimate_noncompliance(y, z, d, **kw).cace
            rows.append(_row(outcome.column, cace, "CACE"))
    if compliance is not None:
        rows.append(_row(compliance.received, _takeup(study, compliance.received, kw), "ITT"))
    for column in spec.subgroups:
        g = study.frame[column].to_numpy(dtype=object)
        for outcome in spec.outcomes:
            result = estimate_subgroups(study.outcome(outcome.column), z, g, **kw)
            rows += [_row(outcome.column, est, "subgroup ATE", subgroup=f"{column}={level}")
                     for level, est in zip(result.levels, result.estimates)]
    return rows


def study_subgroup_differences(study) -> list[dict]:
    """Subgroup contrasts for every outcome and subgroup variable of a study.

    One dict per (outcome, subgroup variable, level other than the first):
    ``{outcome, subgroup: "col=level", reference: "col=first", estimate,
    std_error, ci_low, ci_high, df, label: "exploratory"}`` (not adjusted for
    multiplicity; see ``inference_scope`` in ``results.json``). Not part of the
    ``results.json`` schema 1 ``estimates`` list; offered for a report table.
    """
    spec = study.spec
    kw = _study_design(study)
    rows = []
    for column in spec.subgroups:
        g = study.frame[column].to_numpy(dtype=object)
        for outcome in spec.outcomes:
            result = estimate_subgroups(study.outcome(outcome.column), study.z, g, **kw)
            for diff in result.differences:
                item = diff.to_dict()
                rows.append({"outcome": outcome.column,
                             "subgroup": f"{column}={item.pop('level')}",
                             "reference": f"{column}={item.pop('reference')}", **item,
                             "label": "exploratory"})
    return rows


def _adjusted_or_note(column: str, y, z, X, names, kw: dict) -> Estimate | None:
    """The Lin estimate, or None with a warning when the design cannot carry the regression.

    Too many covariates for the units (or a degenerate design) must not cost the
    report its unadjusted estimates, which are the primary analysis. Missing
    baseline covariates are mean-imputed with missingness indicators.
    """
    try:
        return estimate_adjusted(y, z, X, names=names, **kw)
    except DesignError as err:
        warnings.warn(f"outcome '{column}': no covariate-adjusted estimate ({err}); "
                      "reduce analysis.covariates or set analysis.adjust: false", ReportKitWarning, stacklevel=3)
        return None


def _study_design(study) -> dict:
    mechanism = study.spec.design.mechanism
    return dict(mechanism=mechanism,
                block=study.block if mechanism in BLOCKED else None,
                cluster=study.cluster if mechanism in CLUSTERED else None,
                alpha=study.spec.analysis.alpha)


def _takeup(study, received: str, kw: dict) -> Estimate:
    d = _binary(study.frame[received].to_numpy(dtype=float), received, allow_missing=True)
    y, design = _validate(d, study.z, kw["mechanism"], kw["block"], kw["cluster"], kw["alpha"])
    s = _sample(design, y, np.ones(design.n, dtype=bool))
    fit = _unadjusted(s, _primary_rule(design.mechanism), warn_zero=False)
    return _to_estimate(fit, design.alpha, estimand="ITT", estimator="unadjusted",
                        n_missing=s.n_missing)


def _row(outcome: str, est: Estimate, estimand: str, *, subgroup: str | None = None) -> dict:
    values = est.to_dict()
    row = {"outcome": outcome, "estimand": estimand, "estimator": est.estimator,
           "subgroup": subgroup}
    row.update({key: values[key] for key in ESTIMATE_KEYS if key not in row})
    return row


def compliance_rates(z, d) -> dict:
    """Share of each arm that received the treatment (units with known take-up).

    ``rate_treated = mean(d | z = 1)`` is the take-up among those assigned to
    treatment; ``rate_control = mean(d | z = 0)`` the crossover among controls.
    Their difference is the ITT on take-up, the denominator of the Wald CACE
    (Angrist, Imbens & Rubin 1996).
    """
    z = np.asarray(z, dtype=float)
    d = np.asarray(d, dtype=float)
    if z.shape != d.shape:
        raise DesignError(f"`z` and `d` must have the same length; got {z.size} and {d.size}")
    known = ~np.isnan(d)
    treated, control = known & (z == 1), known & (z == 0)
    return {
        "rate_treated": float(d[treated].mean()) if treated.any() else None,
        "rate_control": float(d[control].mean()) if control.any() else None,
        "n_treated": int(treated.sum()),
        "n_control": int(control.sum()),
    }


def study_compliance(study) -> dict | None:
    """The ``compliance`` section (extension), or None without a compliance column.

    Take-up by arm; ``cace``: per outcome the Wald CACE with its interval, the
    first-stage F (``(ITT on take-up / SE)^2``), the Anderson–Rubin interval
    (see :func:`~report_kit.estimation.noncompliance.estimate_noncompliance`)
    and a note when F is below 104.7 (Lee, McCrary, Moreira & Porter 2022);
    ``assumptions``: the exclusion and monotonicity assumptions in words.
    """
    if study.spec.compliance is None:
        return None
    column = study.spec.compliance.received
    d = study.frame[column].to_numpy(dtype=float)
    kw = _study_design(study)
    cace = []
    for outcome in study.spec.outcomes:
        with warnings.catch_warnings():   # already raised once by study_estimates
            warnings.simplefilter("ignore", ReportKitWarning)
            result = estimate_noncompliance(study.outcome(outcome.column), study.z, d, **kw)
        cace.append(_cace_entry(outcome.column, result))
    return {"received": column, **compliance_rates(study.z, d), "cace": cace,
            "assumptions": CACE_ASSUMPTIONS}


def _cace_entry(outcome: str, result: Noncompliance) -> dict:
    first = result.itt_takeup
    f_stat = None
    if first.estimate is not None and first.std_error:
        f_stat = (first.estimate / first.std_error) ** 2
    note = None
    if f_stat is not None and f_stat < TF_SAFE_FIRST_STAGE_F:
        note = (f"First-stage F = {f_stat:.1f} is below {TF_SAFE_FIRST_STAGE_F:g}, so the Wald "
                "interval's 95% level is not assured (Lee, McCrary, Moreira & Porter 2022); the "
                "Anderson–Rubin interval is valid however weak the first stage.")
    ar = result.anderson_rubin or {}
    return {"outcome": outcome, "estimate": result.cace.estimate,
            "wald_ci_low": result.cace.ci_low, "wald_ci_high": result.cace.ci_high,
            "first_stage_f": f_stat, "ar_shape": ar.get("shape"),
            "ar_ci_low": ar.get("ci_low"), "ar_ci_high": ar.get("ci_high"),
            "ar_gap_low": ar.get("gap_low"), "ar_gap_high": ar.get("gap_high"),
            "weak_instrument_note": note}
