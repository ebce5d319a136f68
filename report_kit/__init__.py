"""report-kit: randomized-experiment analysis from a project folder to an audited report.

The package is laid out by part of the data flow (see ``docs/architecture.md``):
``inputs`` (spec, data), ``design`` (assignment mechanisms), ``inference`` (the
randomization engine), ``estimation``, ``checks`` (balance, flow, attrition),
``planning`` (power), ``report`` (what the notebooks show) and ``audit``
(provenance, diff, verify, archive, plan lock), with ``cli``, ``pipeline`` and
``analysis`` on top.

The public functions below are importable from the top level, e.g.
``from report_kit import neyman_difference``. Nothing is imported eagerly: each
name loads its module on first use. The module names of the flat layout before
2026-12 (``report_kit.estimate``, ``report_kit.designs``...) still resolve as
attributes of the package.
"""

from __future__ import annotations

import importlib

__version__ = "0.1.0"

#: public name -> module that defines it
_PUBLIC = {
    # inputs
    "load_spec": "inputs.spec", "design_schema": "inputs.spec",
    "load_study": "inputs.data", "read_table": "inputs.data",
    "Spec": "inputs.model", "Study": "inputs.model",
    # design
    "Mechanism": "design.mechanism", "AssignmentSource": "design.mechanism",
    "mechanism_from_arrays": "design.mechanism", "draw_assignment": "design.draw",
    "Rerandomization": "design.rerandomization", "draw_rerandomized": "design.rerandomization",
    "mahalanobis_imbalance": "design.rerandomization", "rerandomized_assignments": "design.rerandomization",
    # inference
    "randomization_test": "inference.randomization", "null_distribution": "inference.randomization",
    "invert_test": "inference.inversion",
    "holm": "inference.multiplicity", "benjamini_hochberg": "inference.multiplicity",
    "westfall_young": "inference.multiplicity", "inference_scope": "inference.scope",
    "ChunkMap": "inference.engine", "serial_chunk_map": "inference.engine",
    "treated_sum_law": "inference.exact", "weighted_block_law": "inference.exact",
    "exact_law_test": "inference.exact_tests",
    "main_effect_tests": "inference.factorial", "factor_mechanism": "inference.factorial",
    # estimation
    "neyman_difference": "estimation.neyman", "estimate_effects": "estimation.neyman",
    "estimate_adjusted": "estimation.adjustment", "estimate_noncompliance": "estimation.noncompliance",
    "estimate_subgroups": "estimation.subgroups", "rerandomized_interval": "estimation.rerandomized",
    "standardized_effect": "estimation.standardized",
    "estimate_factorial": "estimation.factorial",
    # checks
    "covariate_balance": "checks.balance", "mahalanobis_balance_test": "checks.balance",
    "participant_flow": "checks.flow",
    "lee_bounds": "checks.attrition", "manski_bounds": "checks.attrition", "attrition_test": "checks.attrition",
    "points_to_weigh": "checks.points",
    # planning
    "mde": "planning.power", "simulated_power": "planning.power", "plan_power": "planning.plan",
    # the recipe and the audit trail
    "analyse": "analysis", "run_project": "pipeline", "analyse_project": "pipeline",
    "dask_chunk_map": "inference.distributed",
    "compare_runs": "audit.compare", "verify_run": "audit.verify", "archive_run": "audit.archive",
    "lock_plan": "audit.planlock",
    # result objects: one serialiser for every frozen-dataclass result
    "Record": "validate", "record": "validate", "to_json_value": "validate",
}

#: module names of the flat layout -> their home now
_FORMER_MODULES = {
    "spec": "inputs.spec", "data": "inputs.data", "model": "inputs.model",
    "designs": "design.mechanism", "assignment": "design.assignment",
    "randomization": "inference.randomization", "inversion": "inference.inversion",
    "multiplicity": "inference.multiplicity",
    "estimate": "estimation.neyman", "adjustment": "estimation.adjustment",
    "noncompliance": "estimation.noncompliance", "subgroups": "estimation.subgroups",
    "balance": "checks.balance", "attrition": "checks.attrition",
    "power": "planning.power", "planning": "planning",
    "reporting": "report.view", "figures": "report.figures", "figures_checks": "report.figures_checks",
    "notebooks": "report.notebooks", "render": "report.render",
    "provenance": "audit.provenance", "compare": "audit.compare", "verify": "audit.verify",
    "archive": "audit.archive", "planlock": "audit.planlock",
}

__all__ = ["__version__", *sorted(_PUBLIC)]


def __getattr__(name: str):
    if name in _PUBLIC:
        return getattr(importlib.import_module(f"{__name__}.{_PUBLIC[name]}"), name)
    if name in _FORMER_MODULES:
        return importlib.import_module(f"{__name__}.{_FORMER_MODULES[name]}")
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")


def __dir__() -> list[str]:
    return sorted({*globals(), *__all__})
