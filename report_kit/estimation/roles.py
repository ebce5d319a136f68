"""Which estimate leads: the role of each row of ``results["estimates"]``.

Owns the rule that picks, for each outcome, estimand and subgroup, the
pre-specified estimate the report leads with, and marks the other rows
(covariate-adjusted, robustness check, take-up of the treatment). The rule is
stored in ``results.json`` (field ``role`` of each estimate) so that the report
only shows it.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence

__all__ = ["LEAD_METHODS", "ROLES", "estimate_roles"]

#: Design-based unadjusted estimators that the assignment mechanism implies:
#: Neyman difference in means, block-weighted, paired, and CR2 for clusters;
#: for the main effects and interactions of a factorial, the contrast of cell means
#: (with the CR2 variance when the cells are assigned to clusters).
LEAD_METHODS = ("neyman", "blocked_neyman", "paired", "cr2", "factorial_neyman",
                "blocked_factorial_neyman", "cluster_factorial_cr2", "blocked_cluster_factorial_cr2")

#: Every value ``role`` can take ("" for a row with no special role).
ROLES = ("lead", "adjusted", "check", "take_up", "")


def _role(row: Mapping, seen: set, take_up_column: str | None) -> str:
    if take_up_column is not None and row.get("outcome") == take_up_column and row.get("estimand") == "ITT":
        return "take_up"
    key = (row.get("outcome"), row.get("estimand"), row.get("subgroup"),
           row.get("arm"), row.get("reference"), row.get("factor"))  # the last three: multi-arm rows only
    if row.get("method") in LEAD_METHODS and row.get("estimator") == "unadjusted" and key not in seen:
        seen.add(key)
        return "lead"
    if row.get("estimator") == "adjusted":
        return "adjusted"
    return "check" if row.get("method") == "horvitz_thompson" else ""


def estimate_roles(rows: Sequence[Mapping], *, take_up_column: str | None = None) -> list[str]:
    """The role of each estimate row, in order.

    Parameters
    ----------
    rows : sequence of mappings
        Estimate rows with ``outcome``, ``estimand``, ``estimator``,
        ``subgroup`` and ``method`` (multi-arm rows also ``arm``,
        ``reference`` and ``factor``: each contrast and factorial effect has
        its own lead).
    take_up_column : str, optional
        The column recording treatment received (``compliance.received``);
        its ITT rows are the first stage and get the role ``"take_up"``.

    Returns
    -------
    list of str
        ``"lead"`` for the first design-based unadjusted row (method in
        :data:`LEAD_METHODS`) of each (outcome, estimand, subgroup[, arm,
        reference, factor]);
        ``"adjusted"`` for Lin-adjusted rows; ``"check"`` for Horvitz–Thompson;
        ``"take_up"`` for the first stage; ``""`` otherwise.
    """
    if isinstance(rows, (str, bytes)) or not isinstance(rows, Sequence):
        raise TypeError(f"`rows` must be a sequence of mappings; got {type(rows).__name__}")
    if take_up_column is not None and not isinstance(take_up_column, str):
        raise TypeError(f"`take_up_column` must be a string or None; got {type(take_up_column).__name__}")
    seen: set = set()
    out = []
    for i, row in enumerate(rows):
        if not isinstance(row, Mapping):
            raise TypeError(f"`rows[{i}]` must be a mapping; got {type(row).__name__}")
        out.append(_role(row, seen, take_up_column))
    return out
