"""The analysis step: a validated :class:`Study` in, the ``results.json`` dict out.

Owns the order of the analysis and nothing else: each section of the results
comes from one library module (``estimate``, ``randomization``, ``balance``,
``attrition``, ``multiplicity``, ``power``). Deterministic: the same study gives
the same dict, whatever the machine.
"""

from __future__ import annotations

import logging
from dataclasses import dataclass, field

import numpy as np

from .estimate import difference_in_means
from .model import Study

log = logging.getLogger(__name__)

SCHEMA = "report-kit/results/1"


@dataclass(frozen=True, kw_only=True)
class Analysis:
    """The results dict plus arrays the report plots but ``results.json`` does not hold."""

    results: dict
    arrays: dict[str, np.ndarray] = field(default_factory=dict)


def design_summary(study: Study, *, n_assignments: str | None = None,
                   assignment_check: str = "not_checked") -> dict:
    """The ``design`` section: counts of units, arms, blocks and clusters."""
    z = study.z
    block, cluster = study.block, study.cluster
    return {
        "mechanism": study.spec.design.mechanism,
        "n_units": int(z.size),
        "n_treated": int(z.sum()),
        "n_control": int(z.size - z.sum()),
        "n_blocks": None if block is None else int(len(set(block.tolist()))),
        "n_clusters": None if cluster is None else int(len(set(cluster.tolist()))),
        "n_assignments": n_assignments,
        "assignment_check": assignment_check,
    }


def basic_estimates(study: Study) -> list[dict]:
    """Unadjusted difference in means with the Neyman SE, one row per outcome."""
    rows = []
    for outcome in study.spec.outcomes:
        y = study.outcome(outcome.column)
        keep = ~np.isnan(y)
        est = difference_in_means(y[keep], study.z[keep], alpha=study.spec.analysis.alpha)
        rows.append({"outcome": outcome.column, "subgroup": None, **est.to_dict()})
    return rows


def analyse(study: Study, *, assignment_check: str = "not_checked") -> Analysis:
    """Run every analysis step on a validated study and return the results."""
    results = {
        "schema": SCHEMA,
        "design": design_summary(study, assignment_check=assignment_check),
        "estimates": basic_estimates(study),
        "inputs": [f.to_dict() for f in study.inputs],
    }
    return Analysis(results=results)
