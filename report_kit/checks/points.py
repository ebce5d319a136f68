"""Points to weigh: the cautions a reader should see beside the headline, found from the numbers.

Owns the rules that turn finished sections of ``results.json`` (design,
estimates, attrition, the plan-lock status) into the ``points_to_weigh`` list
shown on page 1 of the report. Each rule is a small function returning zero or
more :class:`Point`; :func:`points_to_weigh` runs them in a fixed order, so the
list is deterministic. No statistic is computed here: every number quoted was
computed by the analysis step and is read from the sections given.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass

from report_kit.estimation.noncompliance import WEAK_FIRST_STAGE_F
from report_kit.validate import Record

__all__ = ["ATTRITION_GAP", "Point", "points_to_weigh"]

#: A difference in attrition rates between arms of at least this share is worth
#: weighing even when the randomization test does not reject (common practice:
#: a gap of a few percentage points can bias an estimate by more than its SE).
ATTRITION_GAP = 0.05


@dataclass(frozen=True, kw_only=True)
class Point(Record):
    """One point to weigh: a kind (a fixed word), the sentence shown and what it concerns."""

    kind: str
    message: str
    outcome: str | None = None
    subgroup: str | None = None


@dataclass(frozen=True, kw_only=True)
class _Context:
    results: Mapping
    label: Callable[[str], str]
    alpha: float
    arm_labels: tuple[str, str]
    plan: Mapping | None
    enrolled: int | None


def _pct(x: float) -> str:
    return f"{100 * x:.1f}%"


def _p(p: float) -> str:
    return "p < 0.001" if p < 0.001 else f"p = {p:.3f}"


def _attrition(ctx: _Context) -> list[Point]:
    att = ctx.results.get("attrition") or {}
    control, treated = ctx.arm_labels
    points = []
    for row in att.get("per_outcome") or []:
        rt, rc, p = row.get("rate_treated"), row.get("rate_control"), row.get("p_value")
        if rt is None or rc is None:
            continue
        tested = p is not None and p < ctx.alpha
        if not tested and abs(rt - rc) < ATTRITION_GAP:
            continue
        test = f" (randomization test of equal attrition: {_p(p)})" if p is not None else ""
        points.append(Point(
            kind="differential_attrition", outcome=row["outcome"],
            message=f"{ctx.label(row['outcome'])}: outcomes are missing for {_pct(rt)} of the {treated} arm "
                    f"and {_pct(rc)} of the {control} arm{test}. If the units lost differ between arms, the "
                    "estimate can be biased; see the attrition bounds."))
    return points


def _first_stage(ctx: _Context) -> list[Point]:
    received = (ctx.results.get("compliance") or {}).get("received")
    for row in ctx.results.get("estimates") or []:
        if row["outcome"] != received or row["estimand"] != "ITT" or row.get("subgroup"):
            continue
        est, se = row.get("estimate"), row.get("std_error")
        if est is None or not se:
            return []
        f_stat = (est / se) ** 2
        if f_stat < WEAK_FIRST_STAGE_F:
            return [Point(kind="weak_first_stage", outcome=received,
                          message=f"Take-up differs little between arms (first-stage F = {f_stat:.1f}, below "
                                  f"{WEAK_FIRST_STAGE_F:g}, common practice): the effect on compliers (CACE) "
                                  "is imprecise and its interval may be misleading.")]
        return []
    return []


_ASSIGNMENT_WORDS = {
    "mismatch": "The assignment could not be reproduced from its recorded seed: the treatment column differs "
                "from the draw. Ask how units were actually assigned before relying on the randomization tests.",
    "not_checked": "The assignment was not re-drawn from a seed (design.seed is not recorded), so the report "
                   "cannot confirm that the treatment column is the randomization that was carried out.",
}


def _assignment(ctx: _Context) -> list[Point]:
    status = (ctx.results.get("design") or {}).get("assignment_check")
    words = _ASSIGNMENT_WORDS.get(status)
    return [Point(kind=f"assignment_{status}", message=words)] if words else []


def _plan(ctx: _Context) -> list[Point]:
    plan = ctx.plan
    if plan is None:
        return []
    if not plan.get("locked"):
        return [Point(kind="plan_not_locked",
                      message="The analysis plan (design.yaml) was not locked before the analysis, so the report "
                              "cannot show that the outcomes and methods were chosen before the data were seen.")]
    points = []
    changes = plan.get("changes") or []
    if changes:
        keys = ", ".join(c["key"] for c in changes[:5]) + (", …" if len(changes) > 5 else "")
        points.append(Point(kind="plan_deviations",
                            message=f"{len(changes)} key(s) of the plan changed after it was locked on "
                                    f"{plan.get('locked_at')}: {keys}. See Deviations from the plan."))
    if plan.get("lock_intact") is False:
        points.append(Point(kind="plan_lock_edited",
                            message="The plan lock file was edited after locking: its text no longer matches "
                                    "its recorded fingerprint."))
    changed = plan.get("data_changed") or []
    if changed:
        points.append(Point(kind="data_changed_since_lock",
                            message=f"Input data changed since the plan was locked: {', '.join(changed)}. "
                                    "Expected when outcomes arrived after the lock; otherwise ask why."))
    return points


def _blocks_left_out(ctx: _Context) -> list[Point]:
    points = []
    for row in ctx.results.get("estimates") or []:
        left = row.get("blocks_left_out")
        if not left or row.get("estimator") != "unadjusted":
            continue
        where = f", subgroup {row['subgroup']}" if row.get("subgroup") else ""
        points.append(Point(
            kind="blocks_left_out", outcome=row["outcome"], subgroup=row.get("subgroup"),
            message=f"{left} block(s) have no unit of one arm with an observed outcome and are left out of the "
                    f"{row['estimand']} estimate for {ctx.label(row['outcome'])}{where} only; the estimate "
                    "covers the remaining blocks."))
    return points


def _enrolment(ctx: _Context) -> list[Point]:
    n_units = (ctx.results.get("design") or {}).get("n_units")
    if ctx.enrolled is None or n_units is None or ctx.enrolled == n_units:
        return []
    return [Point(kind="enrolment_mismatch",
                  message=f"The spec declares {ctx.enrolled:,} units randomized but the data hold {n_units:,}; "
                          "the participant flow does not add up.")]


RULES: tuple[Callable[[_Context], list[Point]], ...] = (
    _assignment, _plan, _attrition, _first_stage, _blocks_left_out, _enrolment)


def points_to_weigh(results: Mapping, *, alpha: float = 0.05, label: Callable[[str], str] = str,
                    arm_labels: Sequence[str] = ("control", "treated"), plan: Mapping | None = None,
                    enrolled: int | None = None) -> list[dict]:
    """The ``points_to_weigh`` list of ``results.json``.

    Parameters
    ----------
    results : mapping
        The finished sections of ``results.json`` (``design``, ``estimates``,
        ``compliance``, ``attrition``).
    alpha : float
        Level below which the differential-attrition test counts as a point.
    label : callable
        Outcome column -> the label the report prints.
    arm_labels : (str, str)
        Words for the arms coded 0 and 1.
    plan : mapping, optional
        The plan-lock status (:func:`report_kit.audit.planlock.plan_deviations`);
        None leaves the plan rules out.
    enrolled : int, optional
        Units declared randomized in the spec (``enrolment.randomized``).

    Returns
    -------
    list of dict
        ``{kind, message, outcome, subgroup}`` in rule order: assignment,
        plan, differential attrition (test below ``alpha`` or a gap of at least
        :data:`ATTRITION_GAP`), weak first stage (F below
        ``WEAK_FIRST_STAGE_F``), blocks left out (named by estimate and
        subgroup), declared enrolment that does not match the data.
    """
    if not isinstance(results, Mapping):
        raise ValueError(f"`results` must be a mapping (the results.json dict); got {type(results).__name__}")
    if len(arm_labels) != 2:
        raise ValueError(f"`arm_labels` must name two arms (0, 1); got {arm_labels!r}")
    ctx = _Context(results=results, label=label, alpha=float(alpha), arm_labels=tuple(arm_labels),
                   plan=plan, enrolled=enrolled)
    return [p.to_dict() for rule in RULES for p in rule(ctx)]
