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
import warnings
from dataclasses import dataclass, field

import numpy as np

from report_kit.checks.attrition import study_attrition
from report_kit.checks.balance import participant_flow, study_balance
from report_kit.errors import ReportKitWarning
from report_kit.estimation.neyman import study_compliance, study_estimates, study_subgroup_differences
from report_kit.inputs.model import Study
from report_kit.inference.distributed import ChunkMapFn
from report_kit.inference.multiplicity import SharedNull, study_multiplicity
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
                   assignment_check: str = "not_checked") -> dict:
    """The ``design`` section: counts of units, arms, blocks, clusters and assignments."""
    z = study.z
    block, cluster = study.block, study.cluster
    return {
        "mechanism": study.spec.design.mechanism,
        "n_units": int(z.size),
        "n_treated": int(z.sum()),
        "n_control": int(z.size - z.sum()),
        "n_blocks": None if block is None else int(len(set(block.tolist()))),
        "n_clusters": None if cluster is None else int(len(set(cluster.tolist()))),
        "n_assignments": None if rand is None else rand.n_assignments,
        "assignment_check": assignment_check,
        "inference_method": None if rand is None else rand.method,
        "draws": None if rand is None else int(rand.draws),
    }


def shared_nulls(study: Study, rand: StudyRandomization) -> dict[str, SharedNull]:
    """Per family, every outcome's null statistics on the shared draws (for Westfall–Young)."""
    families: dict[str, list[str]] = {}
    for o in study.spec.outcomes:
        families.setdefault(o.family, []).append(o.column)
    out = {}
    for family, columns in families.items():
        joint = rand.joint_null(columns)
        out[family] = SharedNull(outcomes=joint.outcomes, observed=joint.observed, null=joint.null,
                                 method=joint.method, weights=joint.weights)
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


def analyse(study: Study, *, assignment_check: str = "not_checked",
            chunk_map: ChunkMapFn | None = None) -> Analysis:
    """Run every analysis step on a validated study and return the results.

    ``chunk_map`` says where the chunks of randomization draws are computed
    (:mod:`report_kit.inference.distributed`): ``None`` is this process, in
    order; :func:`~report_kit.inference.distributed.dask_chunk_map` a Dask
    cluster. The results do not depend on it.
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
    return Analysis(results=results, arrays=arrays)


def _sections(study: Study, assignment_check: str, chunk_map: ChunkMapFn | None) -> tuple[dict, dict]:
    spec = study.spec
    log.info("estimates")
    estimates = study_estimates(study)
    log.info("randomization tests")
    mechanism, source = study_assignments(study)
    # chunk_map: handed to the engine's pass over the draws once it takes one (issue 10).
    rand = study_randomization(study, (mechanism, source))
    weights = mechanism.weights if source.method == "exact" else None
    log.info("balance, flow, attrition")
    balance = study_balance(study, source.chunks, source.method, weights=weights)
    attrition = study_attrition(study, source.chunks, source.method, weights=weights)
    log.info("multiplicity and power")
    multiplicity = study_multiplicity(rand.tests, spec.outcomes, shared_nulls(study, rand),
                                      lead=spec.analysis.multiplicity)
    results = {
        "schema": SCHEMA,
        "design": design_summary(study, rand, assignment_check=assignment_check),
        "estimates": estimates,
        "subgroup_differences": study_subgroup_differences(study),
        "compliance": study_compliance(study),
        "tests": rand.tests,
        "intervals": rand.intervals,
        "balance": balance,
        "flow": participant_flow(study, estimates),
        "attrition": attrition,
        "multiplicity": multiplicity,
        "power": study_power(study, estimates),
        "inputs": [f.to_dict() for f in study.inputs],
    }
    return results, plot_arrays(study, rand)
