"""CONSORT-style participant flow counts by arm and outcome.

Owns :func:`participant_flow` (moved from :mod:`report_kit.checks.balance`).
Counts only; no test.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np

from report_kit.checks.balance import _check_assignment

__all__ = ["participant_flow"]


def _main_estimate_sizes(estimates, outcome: str) -> tuple[int, int] | None:
    for e in estimates or ():
        if (e.get("outcome") == outcome and e.get("estimator") == "unadjusted"
                and e.get("estimand") in ("ATE", "ITT") and e.get("subgroup") is None):
            return int(e["n_treated"]), int(e["n_control"])
    return None


def participant_flow(study, estimates: Sequence[dict] | None = None) -> list[dict]:
    """CONSORT-style participant flow by arm and outcome.

    One dict per outcome and arm (``"treated"`` then ``"control"``):

    ``outcome``, ``arm``, ``randomized`` (units assigned to the arm),
    ``received_treatment`` (units of the arm with ``compliance.received`` = 1;
    None without a compliance column), ``outcome_observed`` (non-missing
    outcome), ``lost`` (``randomized - outcome_observed``) and ``analysed``
    (units in the main unadjusted ITT/ATE estimate when ``estimates`` — the
    ``results.json`` list — is given, else the units with an observed outcome,
    the complete-case rule of the estimators).

    The stages follow the CONSORT 2010 flow diagram (Schulz, Altman & Moher 2010).
    """
    zb = _check_assignment(study.z)
    received = None
    if study.spec.compliance is not None:
        received = study.frame[study.spec.compliance.received].to_numpy(dtype=float) == 1
    rows = []
    for spec in study.spec.outcomes:
        observed = ~np.isnan(study.outcome(spec.column))
        sizes = _main_estimate_sizes(estimates, spec.column)
        for arm, mask in (("treated", zb), ("control", ~zb)):
            n_obs = int(observed[mask].sum())
            if sizes is None:
                analysed = n_obs
            else:
                analysed = sizes[0] if arm == "treated" else sizes[1]
            rows.append({
                "outcome": spec.column,
                "arm": arm,
                "randomized": int(mask.sum()),
                "received_treatment": None if received is None else int(received[mask].sum()),
                "outcome_observed": n_obs,
                "lost": int(mask.sum()) - n_obs,
                "analysed": analysed,
            })
    return rows
