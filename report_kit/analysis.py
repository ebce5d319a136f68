"""The analysis step: a validated :class:`Study` in, the ``results.json`` dict out.

Owns the order of the analysis and nothing else: each section of the results
comes from one library module (``estimate``, ``randomization``, ``balance``,
``attrition``, ``multiplicity``, ``power``). All procedures that need
assignments share one :class:`~report_kit.design.mechanism.AssignmentSource`, so the
tests, the balance and attrition checks and Westfall–Young see the same draws.
Deterministic: the same study gives the same dict, whatever the machine.
"""

from __future__ import annotations

import logging
import math
import warnings
from dataclasses import dataclass, field

import numpy as np

from report_kit.analysis_arms import arm_sections
from report_kit.checks.attrition import study_attrition_check
from report_kit.checks.balance import study_balance_check
from report_kit.checks.flow import participant_flow
from report_kit.design.mechanism import Mechanism
from report_kit.inference.scope import inference_scope
from report_kit.errors import ReportKitWarning
from report_kit.estimation.neyman import study_compliance, study_estimates, study_subgroup_differences
from report_kit.inference.engine import ChunkMap
from report_kit.estimation.rerandomized import study_rerandomized_intervals
from report_kit.inputs.model import Study
from report_kit.estimation.roles import estimate_roles
from report_kit.inference.multiplicity import SharedNull, multiplicity_table, study_multiplicity
from report_kit.planning.power import study_power
from report_kit.inference.randomization import StudyRandomization, study_assignments, study_randomization

log = logging.getLogger(__name__)

SCHEMA = "report-kit/results/1"


@dataclass(frozen=True, kw_only=True)
class Analysis:
    """The results dict plus arrays the report plots but ``results.json`` does not hold."""

    results: dict
    arrays: dict[str, np.ndarray] = field(default_factory=dict)


def design_summary(study: Study, rand: StudyRandomization | None = None, *,
                   assignment_check: str = "not_checked", mechanism: Mechanism | None = None) -> dict:
    """The ``design`` section: counts of units, arms, blocks, clusters and assignments."""
    z = study.z
    block, cluster = study.block, study.cluster
    summary = {
        "mechanism": study.spec.design.mechanism,
        "n_units": int(z.size),
        "n_treated": int(z.sum()),
        "n_control": int(z.size - z.sum()),
        "n_blocks": None if block is None else int(len(set(block.tolist()))),
        "n_clusters": None if cluster is None else int(len(set(cluster.tolist()))),
        "n_assignments": None if rand is None else rand.n_assignments,
        "n_assignments_log10": None if mechanism is None else round(mechanism.log10_count(), 6),
        "assignment_check": assignment_check,
        "arm_labels": dict(zip(("control", "treated"), study.spec.design.arm_labels)),
        "inference_method": None if rand is None else rand.method,
        "draws": None if rand is None else int(rand.draws),
    }
    if rand is not None and rand.rerandomization is not None:
        summary["rerandomization"] = rand.rerandomization
        # the acceptable assignments: their size is known only when they were all listed
        listed = rand.n_assignments
        summary["n_assignments_log10"] = None if listed is None else round(math.log10(int(listed)), 6)
    return summary


def shared_nulls(study: Study, rand: StudyRandomization) -> dict[str, SharedNull]:
    """Per family, every outcome's null statistics on the shared draws (for Westfall–Young)."""
    families: dict[str, list[str]] = {}
    for o in study.spec.outcomes:
        families.setdefault(o.family, []).append(o.column)
    out = {}
    for family, columns in families.items():
        joint = rand.joint_null(columns)
        out[family] = SharedNull(outcomes=joint.outcomes, observed=joint.observed, null=joint.null,
                                 method=joint.method, weights=joint.weights, tolerance=joint.tolerance)
    return out


def plot_arrays(study: Study, rand: StudyRandomization) -> dict[str, np.ndarray]:
    """Null distributions of the primary outcomes' test statistics, for the report's plots."""
    arrays = {}
    for o in study.spec.outcomes:
        if o.family != "primary":
            continue
        dist = rand.distributions[o.column]
        arrays[f"null::{o.column}"] = np.asarray(dist.null[:, 0], dtype=float)
        arrays[f"observed::{o.column}"] = np.asarray([dist.observed[0]], dtype=float)
    return arrays


def with_roles(estimates: list[dict], compliance: dict | None) -> None:
    """Give each estimate row its ``role`` (which estimate leads; see :mod:`report_kit.estimation.roles`)."""
    received = (compliance or {}).get("received")
    for row, role in zip(estimates, estimate_roles(estimates, take_up_column=received)):
        row["role"] = role


def analyse(study: Study, *, assignment_check: str = "not_checked", chunk_map: ChunkMap | None = None) -> Analysis:
    """Run every analysis step on a validated study and return the results.

    ``chunk_map`` runs the chunks of the one pass over the assignment draws
    (default: one after another in this process; see
    :func:`report_kit.inference.engine.run_pass`); results do not depend on it.
    """
    if chunk_map is not None and not callable(chunk_map):
        raise TypeError(f"`chunk_map` must be a chunk map (callable) or None; got {type(chunk_map).__name__}")
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", ReportKitWarning)
        results, arrays = _sections(study, assignment_check, chunk_map)
    notes = sorted({str(w.message) for w in caught if issubclass(w.category, ReportKitWarning)})
    for note in notes:
        log.warning("%s", note)
    results["notes"] = notes
    results["enrolment"] = enrolment_summary(study)
    return Analysis(results=results, arrays=arrays)


def _sections(study: Study, assignment_check: str, chunk_map: ChunkMap | None) -> tuple[dict, dict]:
    spec = study.spec
    if spec.design.multi_arm:
        return {"schema": SCHEMA, **arm_sections(study, assignment_check, chunk_map=chunk_map)}, {}
    log.info("estimates")
    estimates = study_estimates(study)
    log.info("randomization tests, balance and attrition: one pass over the draws")
    balance_check, attrition_check = study_balance_check(study), study_attrition_check(study)
    extra = [attrition_check.statistic] + ([balance_check.statistic] if balance_check.statistic else [])
    assignments = study_assignments(study)
    mechanism = assignments[0]
    rand = study_randomization(study, assignments, extra=extra, chunk_map=chunk_map)
    attrition = attrition_check.section(rand.extra[0])
    balance = balance_check.section(rand.extra[1] if len(rand.extra) > 1 else None, rand.method)
    log.info("multiplicity and power")
    multiplicity = study_multiplicity(rand.tests, spec.outcomes, shared_nulls(study, rand),
                                      lead=spec.analysis.multiplicity)
    compliance = study_compliance(study)
    with_roles(estimates, compliance)
    results = {
        "schema": SCHEMA,
        "design": design_summary(study, rand, assignment_check=assignment_check, mechanism=mechanism),
        "estimates": estimates,
        "subgroup_differences": study_subgroup_differences(study),
        "compliance": compliance,
        "tests": rand.tests,
        "intervals": rand.intervals,
        "balance": balance,
        "flow": participant_flow(study, estimates),
        "attrition": attrition,
        "multiplicity": multiplicity,
        "inference_scope": inference_scope(study),
        "multiplicity_table": multiplicity_table(multiplicity),
        "power": study_power(study, estimates),
        "inputs": [f.to_dict() for f in study.inputs],
    }
    if study.handling:  # only when design.yaml declares a data-handling option
        results["data_handling"] = list(study.handling)
    if study.spec.design.rerandomization is not None:
        results["rerandomization_intervals"] = study_rerandomized_intervals(study)
    return results, plot_arrays(study, rand)


def enrolment_summary(study: Study) -> dict | None:
    """The ``enrolment`` section: counts before randomization declared in the spec, or None."""
    e = study.spec.enrolment
    if e is None:
        return None
    return {"assessed": e.assessed, "randomized": e.randomized,
            "excluded": [{"reason": reason, "n": n} for reason, n in e.excluded]}


def add_points_to_weigh(study: Study, results: dict, *, plan: dict | None = None) -> dict:
    """Add the ``points_to_weigh`` list to finished results (in place) and return them.

    ``plan`` is the plan-lock status of the project folder
    (``report_kit.audit.planlock.plan_deviations``), which the recipe that
    knows the folder passes in; None leaves the plan out of the points.
    """
    from report_kit.checks.points import points_to_weigh

    labels = {o.column: o.label for o in study.spec.outcomes}
    enrolment = study.spec.enrolment
    results["points_to_weigh"] = points_to_weigh(
        results, alpha=study.spec.analysis.alpha, label=lambda c: labels.get(c, c),
        arm_labels=study.spec.design.arm_labels, plan=plan,
        enrolled=None if enrolment is None else enrolment.randomized)
    return results
