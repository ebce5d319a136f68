"""Power and minimum detectable effect of one contrast in a trial with K arms (before data).

Owns :func:`planned_arm_power`: equal allocation of ``n_units`` over ``n_arms``
arms, one contrast between two arms, optionally at the Bonferroni level that
Holm's first step uses for all the contrasts of an outcome. Formulas in
``docs/methods/arms.md``.
"""

from __future__ import annotations

from report_kit.planning.core import planned_power
from report_kit.validate import open_unit_interval

__all__ = ["planned_arm_power"]

_ADJUST = ("none", "bonferroni")


def planned_arm_power(*, n_units: float, n_arms: int, contrasts: str = "reference", adjust: str = "bonferroni",
                      sd: float = 1.0, effect: float | None = None, power: float = 0.8, icc: float = 0.0,
                      cluster_size: float = 1, alpha: float = 0.05, alternative: str = "two-sided") -> dict:
    r"""Power and MDE of one contrast of a K-arm design with equal arm sizes.

    Each arm gets :math:`n = N / K` units; a contrast compares two arms, so its
    standard error is :math:`\sigma \sqrt{D (2 / n)}` with the design effect
    :math:`D` of cluster randomization, and its power that of the two-sample t
    test on the two arms (see :func:`report_kit.planning.core.planned_power`).
    With ``adjust="bonferroni"`` the test level is :math:`\alpha / m` for the
    :math:`m` contrasts of an outcome (``reference``: :math:`K - 1`;
    ``pairwise``: :math:`K (K - 1) / 2`): the level of Holm's first step, so the
    MDE is the one the most significant contrast must reach.

    Returns the :func:`planned_power` dict plus ``n_arms, n_per_arm, contrasts,
    n_contrasts, adjust, alpha_family`` (``alpha`` then holds the per-contrast level).
    """
    if isinstance(n_arms, bool) or not isinstance(n_arms, int):
        raise TypeError(f"`n_arms` must be a whole number of at least 2; got {n_arms!r}")
    if n_arms < 2:
        raise ValueError(f"`n_arms` must be a whole number of at least 2; got {n_arms!r}")
    if contrasts not in ("reference", "pairwise"):
        raise ValueError(f"`contrasts` must be one of {{'reference', 'pairwise'}}; got {contrasts!r}")
    if adjust not in _ADJUST:
        raise ValueError(f"`adjust` must be one of {{'none', 'bonferroni'}}; got {adjust!r}")
    if isinstance(n_units, bool) or not isinstance(n_units, (int, float)) or not n_units > 0:
        raise ValueError(f"`n_units` must be a positive number; got {n_units!r}")
    alpha = open_unit_interval("alpha", alpha)
    m = n_arms - 1 if contrasts == "reference" else n_arms * (n_arms - 1) // 2
    level = alpha / m if adjust == "bonferroni" else alpha
    n = n_units / n_arms
    result = planned_power(n_treated=n, n_control=n, sd=sd, effect=effect, power=power, icc=icc,
                           cluster_size=cluster_size, alpha=level, alternative=alternative)
    result.update(n_arms=n_arms, n_per_arm=result["n_treated"], contrasts=contrasts, n_contrasts=m,
                  adjust=adjust, alpha_family=float(alpha))
    return result
