"""The analysis of a multi-arm or factorial study: a validated :class:`Study` in, ``results.json`` sections out.

Owns the order of the multi-arm steps (``analysis.py`` calls :func:`arm_sections`
when ``design.multi_arm``): the arm table, the contrasts (unadjusted, Lin,
CACE, within subgroups), factorial effects, contrast tests and intervals, the omnibus tests, per-arm
balance, flow and attrition (each with the omnibus randomization test over the
full multi-arm mechanism), multiplicity and the MDE of each contrast as run.
Field names: ``docs/results.md`` ("Multi-arm and factorial runs").
"""

from __future__ import annotations

import logging
import math
import warnings
from dataclasses import dataclass

import numpy as np

from report_kit.design.arms import ArmSource, multi_arm_mechanism
from report_kit.errors import DesignError, ReportKitWarning
from report_kit.estimation.arms import (
    contrast_pairs,
    estimate_arm_cace,
    estimate_contrast_subgroups,
    estimate_contrasts,
    estimate_contrasts_adjusted,
)
from report_kit.estimation.core import BLOCKED, CLUSTERED
from report_kit.estimation.factorial import estimate_factorial
from report_kit.estimation.roles import estimate_roles
from report_kit.inference.arms import ArmPass, arm_multiplicity, contrast_tests, omnibus_test
from report_kit.inference.engine import ChunkMap
from report_kit.inference.factorial import MAIN_EFFECT, main_effect_tests
from report_kit.inference.multiplicity import multiplicity_table
from report_kit.inference.scope import inference_scope
from report_kit.inputs.model import Study
from report_kit.planning.power import mde

log = logging.getLogger(__name__)

ESTIMATE_KEYS = ("outcome", "estimand", "estimator", "subgroup", "arm", "reference", "factor", "estimate",
                 "std_error", "ci_low", "ci_high", "df", "n_treated", "n_control", "method", "mean_treated",
                 "mean_control")

#: What the factorial main-effect tests claim (``inference_scope.main_effects.note``).
MAIN_EFFECT_NOTE = (
    "Each main-effect test concerns the sharp null that the factor changes no unit's outcome, whatever the "
    "other factors' levels; it re-randomizes that factor only, holding every unit's levels of the other "
    "factors. These tests are reported unadjusted, outside the multiplicity families: the contrast tests of "
    "the same arms already make up the families. Interactions have no randomization test: no interaction "
    "null fixes the outcomes a unit would have in the other cells, so the randomization distribution is not "
    "known; read the interaction's design-based confidence interval.")


def _num(value):
    if value is None:
        return None
    value = float(value)
    return value if math.isfinite(value) else None


def _design_kw(study: Study) -> dict:
    mech = study.spec.design.mechanism
    return {"mechanism": mech, "block": study.block if mech in BLOCKED else None,
            "cluster": study.cluster if mech in CLUSTERED else None}


def arm_labels(study: Study) -> np.ndarray:
    """Each unit's arm label (text)."""
    return study.frame[study.spec.design.treatment].to_numpy(dtype=object)


def arm_source(study: Study) -> ArmSource:
    """The full multi-arm mechanism of the study and its assignments (enumerated when few)."""
    design, analysis = study.spec.design, study.spec.analysis
    mech = multi_arm_mechanism(design.mechanism, study.z, n_arms=len(design.arms), block=study.block,
                               cluster=study.cluster)
    return ArmSource.choose(mech, max_exact=analysis.max_exact, draws=analysis.randomizations, seed=analysis.seed)


def arm_table(study: Study) -> list[dict]:
    """Per outcome and arm: label, units randomized, outcomes observed, mean and SD."""
    labels = arm_labels(study)
    rows = []
    for outcome in study.spec.outcomes:
        y = study.outcome(outcome.column)
        for arm in study.spec.design.arms:
            vals = y[(labels == arm) & ~np.isnan(y)]
            rows.append({"outcome": outcome.column, "arm": arm, "label": study.spec.design.arm_label(arm),
                         "n_units": int((labels == arm).sum()), "n_observed": int(vals.size),
                         "mean": _num(vals.mean()) if vals.size else None,
                         "sd": _num(vals.std(ddof=1)) if vals.size > 1 else None})
    return rows


def _estimate_row(outcome: str, estimand: str, item: dict, *, factor=None) -> dict:
    row = {key: item.get(key) for key in ESTIMATE_KEYS}
    row.update(outcome=outcome, estimand=estimand, factor=factor, subgroup=None,
               mean_treated=item.get("mean_arm"), mean_control=item.get("mean_reference"))
    if factor is not None:
        row["arm"] = row["reference"] = None
    return row


def arm_estimates(study: Study) -> list[dict]:
    """The ``estimates`` rows: each contrast (unadjusted, adjusted, CACE), then factorial effects."""
    spec = study.spec
    design = spec.design
    labels = arm_labels(study)
    kw = dict(arms=design.arms, contrasts=design.contrasts, alpha=spec.analysis.alpha, **_design_kw(study))
    effect = "ITT" if spec.compliance is not None else "ATE"
    covariates = spec.analysis.covariates if spec.analysis.adjust else ()
    X = study.frame[list(covariates)].to_numpy(dtype=float) if covariates else None
    rows: list[dict] = []
    for outcome in spec.outcomes:
        y = study.outcome(outcome.column)
        rows += [_estimate_row(outcome.column, effect, c.to_dict()) for c in estimate_contrasts(y, labels, **kw)]
        if X is not None:
            rows += [_estimate_row(outcome.column, effect, c.to_dict())
                     for c in _adjusted(outcome.column, y, labels, X, kw, covariates)]
        if spec.compliance is not None:
            d = study.frame[spec.compliance.received].to_numpy(dtype=float)
            rows += [_estimate_row(outcome.column, "CACE", c.to_dict())
                     for c in estimate_arm_cace(y, labels, d, **kw)]
        if design.factors is not None:
            for effect_row in estimate_factorial(y, labels, arms=design.arms, factors=design.factors,
                                                 block=kw["block"], cluster=kw["cluster"], alpha=spec.analysis.alpha):
                item = effect_row.to_dict()
                rows.append(_estimate_row(outcome.column, item["estimand"], item, factor=effect_row.factor))
    return rows


def arm_subgroups(study: Study) -> tuple[list[dict], list[dict]]:
    """The subgroup rows of ``estimates`` and the ``subgroup_differences`` rows.

    Per subgroup variable, outcome, contrast and level: the contrast within the
    level (estimand ``subgroup ATE``, ``subgroup`` = ``"col=level"``), and per
    contrast each level's effect minus the first level's (``subgroup`` and
    ``subgroup_reference`` name the levels; ``arm``/``reference`` the arms).
    """
    rows, differences = [], []
    spec = study.spec
    design = spec.design
    labels = arm_labels(study)
    kw = dict(arms=design.arms, contrasts=design.contrasts, alpha=spec.analysis.alpha, **_design_kw(study))
    for column in spec.subgroups:
        g = study.frame[column].to_numpy(dtype=object)
        for outcome in spec.outcomes:
            for item in estimate_contrast_subgroups(study.outcome(outcome.column), labels, g, **kw):
                result = item.subgroups
                diffs = {d.level: d for d in result.differences}
                for level, est, (mean_arm, mean_ref) in zip(result.levels, result.estimates, item.means):
                    values = {**est.to_dict(), "arm": item.arm, "reference": item.reference, "mean_arm": mean_arm,
                              "mean_reference": mean_ref}
                    row = _estimate_row(outcome.column, "subgroup ATE", values)
                    row["subgroup"] = f"{column}={level}"
                    rows.append(row)
                    if level in diffs:
                        differences.append(_difference_row(outcome.column, column, item, diffs[level]))
    return rows, differences


def _difference_row(outcome: str, column: str, item, diff) -> dict:
    values = diff.to_dict()
    return {"outcome": outcome, "arm": item.arm, "reference": item.reference,
            "subgroup": f"{column}={values.pop('level')}",
            "subgroup_reference": f"{column}={values.pop('reference')}", **values, "label": "exploratory"}


def _adjusted(column: str, y, labels, X, kw: dict, names):
    try:
        return estimate_contrasts_adjusted(y, labels, X, names=names, **kw)
    except DesignError as err:
        warnings.warn(f"outcome '{column}': no covariate-adjusted contrasts ({err})", ReportKitWarning, stacklevel=3)
        return []


def arm_tests(study: Study, shared: SharedPass, chunk_map: ChunkMap | None = None) -> tuple[list[dict], list[dict]]:
    """``tests`` and ``intervals`` rows: each contrast, one omnibus test per outcome, then factorial main effects.

    The omnibus tests read the shared pass over the multi-arm draws (:func:`shared_pass`).

    With ``design.factors`` each outcome's main effects follow (rows with
    ``factor`` set, ``arm``/``reference`` None; :func:`main_effect_tests`).
    """
    spec = study.spec
    design, analysis = spec.design, spec.analysis
    labels = arm_labels(study)
    pairs = contrast_pairs(design.arms, design.contrasts)
    tests, intervals = [], []
    for outcome in spec.outcomes:
        y = study.outcome(outcome.column)
        results = contrast_tests(
            y, labels, pairs, kind=design.mechanism, block=study.block, cluster=study.cluster,
            statistic=outcome.statistic, alternative=outcome.alternative, level=1 - analysis.alpha,
            max_exact=analysis.max_exact, draws=analysis.randomizations, seed=analysis.seed,
            outcome=outcome.column, chunk_map=chunk_map)
        tests += [r.test_row() for r in results]
        intervals += [r.interval_row() for r in results]
    names = [o.column for o in spec.outcomes]
    tests += [r.test_row() for r in omnibus_test(None, shared.source, outcomes=names,
                                                 drawn=shared.run.omnibus(shared.outcomes))]
    if design.factors is not None:
        kw = _design_kw(study)
        for outcome in spec.outcomes:
            results = main_effect_tests(
                study.outcome(outcome.column), labels, arms=design.arms, factors=design.factors,
                kind=design.mechanism, block=kw["block"], cluster=kw["cluster"], alternative=outcome.alternative,
                level=1 - analysis.alpha, max_exact=analysis.max_exact, draws=analysis.randomizations,
                seed=analysis.seed, outcome=outcome.column)
            tests += [r.test_row() for r in results]
            intervals += [r.interval_row() for r in results]
    return tests, intervals


@dataclass(frozen=True)
class SharedPass:
    """The one pass over a study's multi-arm draws and the handles of what it holds (:func:`shared_pass`)."""

    source: ArmSource
    run: ArmPass
    outcomes: int
    lost: int | None
    covariates: int | None
    families: dict


def lost_indicator(study: Study) -> np.ndarray:
    """1 for a unit missing any outcome, else 0."""
    lost = np.zeros(len(study.frame))
    for outcome in study.spec.outcomes:
        lost = np.maximum(lost, np.isnan(study.outcome(outcome.column)).astype(float))
    return lost


def shared_pass(study: Study, source: ArmSource, chunk_map: ChunkMap | None = None) -> SharedPass:
    """ONE pass over the multi-arm draws for every statistic that uses the full mechanism.

    The ``between_arms`` statistic of every outcome, of the missing-outcome
    indicator (differential attrition, when some but not all units miss an
    outcome) and of every baseline covariate (balance), and the contrasts of
    each family whose outcomes all use ``mean_difference`` (Westfall–Young):
    each chunk of draws is generated once and feeds them all
    (:class:`report_kit.inference.arms.ArmPass`).
    """
    spec = study.spec
    design = spec.design
    shared = ArmPass(source)
    names = [o.column for o in spec.outcomes]
    outcomes = shared.add_omnibus(np.column_stack([study.outcome(c) for c in names]))
    lost = lost_indicator(study)
    lost_handle = shared.add_omnibus(lost) if lost.any() and not lost.all() else None
    covariates = list(spec.analysis.covariates)
    cov_handle = shared.add_omnibus(study.frame[covariates].to_numpy(dtype=float)) if covariates else None
    position = {arm: k for k, arm in enumerate(design.arms)}
    pairs = contrast_pairs(design.arms, design.contrasts)
    block = study.block if design.mechanism in BLOCKED else None
    families = {}
    for family in dict.fromkeys(o.family for o in spec.outcomes):
        members = [o for o in spec.outcomes if o.family == family]
        if any(o.statistic != "mean_difference" for o in members):
            continue
        Y = np.column_stack([study.outcome(o.column) for o in members])
        columns = [(j, position[a], position[r]) for j in range(len(members)) for a, r in pairs]
        keys = [(members[j].column, a, r) for j in range(len(members)) for a, r in pairs]
        alternatives = [members[j].alternative for j, _, _ in columns]
        families[family] = (shared.add_contrasts(Y, columns, block=block), keys, alternatives)
    shared.run(chunk_map)
    return SharedPass(source=source, run=shared, outcomes=outcomes, lost=lost_handle, covariates=cov_handle,
                      families=families)


def shared_contrast_nulls(shared: SharedPass) -> dict:
    """Per family whose outcomes all use ``mean_difference``: the contrasts on the shared multi-arm draws."""
    out = {}
    for family, (handle, keys, alternatives) in shared.families.items():
        observed, null = shared.run.contrasts(handle, alternatives)
        out[family] = (keys, observed, null, shared.source.method)
    return out


def arm_flow(study: Study, shared: SharedPass) -> dict:
    """Participant flow and attrition per arm, with the omnibus test of differential attrition.

    The attrition test applies the ``between_arms`` randomization test to the
    missing-outcome indicator (1 = any outcome missing) under the full mechanism.
    """
    labels = arm_labels(study)
    spec = study.spec
    flow = []
    for outcome in spec.outcomes:
        y = study.outcome(outcome.column)
        for arm in spec.design.arms:
            member = labels == arm
            seen = int((member & ~np.isnan(y)).sum())
            flow.append({"outcome": outcome.column, "arm": arm, "randomized": int(member.sum()),
                         "outcome_observed": seen, "lost": int(member.sum()) - seen, "analysed": seen})
    lost = lost_indicator(study)
    rates = [{"arm": arm, "rate": _num(lost[labels == arm].mean())} for arm in spec.design.arms]
    test = None
    if shared.lost is not None:
        (result,) = omnibus_test(None, shared.source, outcomes=["any outcome missing"],
                                 drawn=shared.run.omnibus(shared.lost))
        test = {k: result.test.to_dict()[k] for k in ("statistic", "observed", "p_value", "method", "draws",
                                                       "mc_std_error")}
    return {"flow": flow, "attrition": {"rates": rates, "test": test}}


def arm_balance(study: Study, shared: SharedPass) -> dict:
    """Covariate means per arm and the omnibus randomization test of each covariate."""
    labels = arm_labels(study)
    covariates = list(study.spec.analysis.covariates)
    rows = []
    if covariates:
        X = study.frame[covariates].to_numpy(dtype=float)
        tests = omnibus_test(None, shared.source, outcomes=covariates, drawn=shared.run.omnibus(shared.covariates))
        for j, name in enumerate(covariates):
            means = {}
            for arm in study.spec.design.arms:
                vals = X[(labels == arm) & ~np.isnan(X[:, j]), j]
                means[arm] = _num(vals.mean()) if vals.size else None
            rows.append({"name": name, "means": means, "statistic": "between_arms",
                         "observed": tests[j].test.observed, "p_value": tests[j].test.p_value,
                         "method": tests[j].test.method})
    return {"covariates": rows}


def arm_power(study: Study, estimates: list[dict], *, power: float = 0.8) -> dict:
    """MDE of each unadjusted contrast as run, from its standard error (Bloom 1995)."""
    alpha = float(study.spec.analysis.alpha)
    alternative = {o.column: o.alternative for o in study.spec.outcomes}
    rows, seen = [], set()
    for e in estimates:
        key = (e["outcome"], e["arm"], e["reference"])
        if e["estimator"] != "unadjusted" or e["estimand"] not in ("ATE", "ITT") or key in seen:
            continue
        seen.add(key)
        se, df = e["std_error"], e["df"]
        size = mde(se, alpha, power, df if df and df > 0 else None, alternative=alternative[e["outcome"]]) \
            if se else None
        rows.append({"outcome": e["outcome"], "arm": e["arm"], "reference": e["reference"], "std_error": se,
                     "df": df, "mde": size})
    return {"alpha": alpha, "target_power": power, "as_run": rows, "planned": []}


def arm_compliance(study: Study) -> dict | None:
    """Take-up by arm: share of each arm's units (with known take-up) that received a programme."""
    if study.spec.compliance is None:
        return None
    column = study.spec.compliance.received
    d = study.frame[column].to_numpy(dtype=float)
    labels = arm_labels(study)
    rates = []
    for arm in study.spec.design.arms:
        known = (labels == arm) & ~np.isnan(d)
        rates.append({"arm": arm, "rate": _num(d[known].mean()) if known.any() else None, "n": int(known.sum())})
    return {"received": column, "rates": rates}


def arm_design(study: Study, source: ArmSource, assignment_check: str) -> dict:
    """The ``design`` section of a multi-arm run."""
    design = study.spec.design
    labels = arm_labels(study)
    block, cluster = study.block, study.cluster
    return {
        "mechanism": design.mechanism, "n_units": int(labels.size), "n_treated": None, "n_control": None,
        "n_blocks": None if block is None else len(set(block.tolist())),
        "n_clusters": None if cluster is None else len(set(cluster.tolist())),
        "n_assignments": source.mechanism.count_text(),
        "n_assignments_log10": round(source.mechanism.log10_count(), 6), "assignment_check": assignment_check,
        "inference_method": source.method, "draws": int(source.draws),
        "arms": [{"arm": a, "label": design.arm_label(a), "n_units": int((labels == a).sum()),
                  "reference": k == 0} for k, a in enumerate(design.arms)],
        "contrasts": design.contrasts,
        "factors": None if design.factors is None else {name: list(on) for name, on in design.factors},
    }


def arm_inference_scope(study: Study) -> dict:
    """The ``inference_scope`` section of a multi-arm run.

    As for two arms (:func:`report_kit.inference.scope.inference_scope`), for the
    contrast tests and the subgroup contrasts (exploratory, when the spec lists
    subgroups); ``omnibus`` states the null of the ``between_arms`` tests (no
    arm changes any unit's outcome). A factorial design adds ``main_effects``:
    the null of the main-effect tests, that they are not adjusted for
    multiplicity, and that interactions have no test (:data:`MAIN_EFFECT_NOTE`).
    """
    scope = inference_scope(study)
    scope["omnibus"] = {"statistic": "between_arms", "null": "sharp", "valid_for_average_effect": False,
                        "note": ("The omnibus between-arms test concerns the sharp null that no arm changes "
                                 "any unit's outcome; it is not a test of equal average outcomes.")}
    if study.spec.design.factors is not None:
        scope["main_effects"] = {"statistic": MAIN_EFFECT, "null": "sharp", "valid_for_average_effect": False,
                                 "adjusted": False, "note": MAIN_EFFECT_NOTE}
    return scope


def arm_sections(study: Study, assignment_check: str, *, chunk_map: ChunkMap | None = None) -> dict:
    """Every section of ``results.json`` for a multi-arm or factorial study (``schema`` added by the caller).

    ``chunk_map`` runs the chunks of the engine's passes over the multi-arm draws
    (see :func:`report_kit.inference.engine.run_pass`); results do not depend on it.
    """
    spec = study.spec
    log.info("arm contrasts")
    subgroup_rows, subgroup_differences = arm_subgroups(study)
    estimates = arm_estimates(study) + subgroup_rows
    received = None if spec.compliance is None else spec.compliance.received
    for row, role in zip(estimates, estimate_roles(estimates, take_up_column=received)):
        row["role"] = role
    source = arm_source(study)
    log.info("randomization tests (%s, %d assignments)", source.method, source.draws)
    shared = shared_pass(study, source, chunk_map)
    tests, intervals = arm_tests(study, shared, chunk_map)
    log.info("balance, flow, attrition")
    flow = arm_flow(study, shared)
    multiplicity = arm_multiplicity(tests, spec.outcomes, lead=spec.analysis.multiplicity,
                                    joint=shared_contrast_nulls(shared))
    return {
        "design": arm_design(study, source, assignment_check),
        "arms": arm_table(study),
        "estimates": estimates,
        "subgroup_differences": subgroup_differences,
        "compliance": arm_compliance(study),
        "tests": tests,
        "intervals": intervals,
        "balance": arm_balance(study, shared),
        "flow": flow["flow"],
        "attrition": flow["attrition"],
        "multiplicity": multiplicity,
        "inference_scope": arm_inference_scope(study),
        "multiplicity_table": multiplicity_table(multiplicity),
        "power": arm_power(study, estimates),
        "inputs": [f.to_dict() for f in study.inputs],
        **({"data_handling": list(study.handling)} if study.handling else {}),
    }
