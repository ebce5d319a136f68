"""What each inference in a run can claim: the ``inference_scope`` section of ``results.json``.

Owns :func:`inference_scope`. Plain statements derived from the spec (the
statistic of each outcome, the mechanism, the subgroups), so that the report
and its readers know which null hypothesis every p-value and interval tests.
No statistics are computed here. Wording and sources:
``docs/methods/randomization.md`` (section "What a p-value here can claim").
"""

from __future__ import annotations

__all__ = ["SHARP_NULL", "SUBGROUP_LABEL", "inference_scope"]

#: The null hypothesis of every randomization test and of the inverted interval.
SHARP_NULL = (
    "Randomization tests, the inverted interval and the Hodges–Lehmann estimate concern the sharp "
    "null of a constant effect (every unit's effect equals the tested value). With unequal arms a "
    "non-studentized statistic can reject although the average effect is zero (Wu & Ding 2021)."
)

#: How subgroup estimates and their differences are labelled.
SUBGROUP_LABEL = "exploratory"

_CLUSTERED = ("cluster", "blocked_cluster")


def _entry(column: str, statistic: str, clustered: bool) -> dict:
    if statistic == "studentized" and not clustered:
        protects, note = True, (
            "Studentized difference in means: the test is also asymptotically valid for the weak null "
            "of a zero average effect (Wu & Ding 2021).")
    elif statistic == "studentized":
        protects, note = False, (
            "Studentized with a unit-level variance in a cluster design: this is not a cluster-level "
            "studentization, so the p-value is a test of the sharp null only, not of a zero average "
            "effect.")
    else:
        protects, note = False, (
            f"The {statistic.replace('_', ' ')} statistic tests the sharp null only; for a claim about "
            "the average effect read the design-based confidence interval.")
    return {"outcome": column, "statistic": statistic, "null": "sharp",
            "valid_for_average_effect": protects, "note": note}


def inference_scope(study) -> dict:
    """The ``inference_scope`` section of ``results.json``.

    Returns
    -------
    dict
        ``null`` (the sentence :data:`SHARP_NULL`), ``tests``: one entry per
        outcome ``{outcome, statistic, null: "sharp", valid_for_average_effect,
        note}`` — ``valid_for_average_effect`` is true only for the studentized
        statistic without clusters (Wu & Ding 2021) — and ``subgroups``:
        ``{label: "exploratory", adjusted: false, note}`` when the spec lists
        subgroups, else None.
    """
    spec = study.spec
    clustered = spec.design.mechanism in _CLUSTERED
    subgroups = None
    if spec.subgroups:
        subgroups = {
            "label": SUBGROUP_LABEL, "adjusted": False,
            "note": ("Subgroup estimates and differences between subgroups are exploratory: they are "
                     "not adjusted for the number of subgroups and outcomes examined, and the "
                     "multiplicity adjustment covers the main tests only."),
        }
    return {"null": SHARP_NULL,
            "tests": [_entry(o.column, o.statistic, clustered) for o in spec.outcomes],
            "subgroups": subgroups}
