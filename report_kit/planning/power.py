"""Power and minimum detectable effect (MDE).

Owns: the MDE from a standard error, power by simulation under the real
assignment mechanism and randomization test, and the ``power`` section of
``results.json`` (MDE of the study as run). The analytic power and MDE of a
design as planned (with the design effect of cluster randomization) live in
:mod:`report_kit.planning.core`, the power plan of a project folder
(:func:`plan_power`, behind ``report-kit power``) in :mod:`report_kit.planning.plan`;
their public names are importable from here too.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping, Sequence

import numpy as np
from scipy import stats

from report_kit.planning.core import (
    _check_alternative,
    _check_positive,
    _check_progress,
    _count_rejections,
    _simulation_summary,
    design_effect,
    planned_power,
)
from report_kit.errors import DataError
from report_kit.validate import finite_or_none as _num
from report_kit.validate import open_unit_interval
from report_kit.planning.plan import DEFAULT_TEST_DRAWS, SIM_EXACT_LIMIT, PowerPlan, format_plan_text, plan_power

__all__ = [
    "DEFAULT_TEST_DRAWS",
    "SIM_EXACT_LIMIT",
    "PowerPlan",
    "design_effect",
    "format_plan_text",
    "mde",
    "plan_power",
    "planned_power",
    "simulated_power",
    "study_power",
]


def _quantile(q: float, df: float | None) -> float:
    return float(stats.norm.ppf(q) if df is None else stats.t.ppf(q, df))


# ---------------------------------------------------------------------------
# MDE from a standard error
# ---------------------------------------------------------------------------


def mde(se: float, alpha: float = 0.05, power: float = 0.8, df: float | None = None,
        *, alternative: str = "two-sided") -> float:
    r"""Minimum detectable effect for an estimator with standard error ``se``.

    .. math:: \mathrm{MDE} = (q_{1-\alpha/2} + q_{\pi})\; \mathrm{SE}

    (Bloom 1995), with :math:`q` the standard normal quantile, or the
    Student t quantile with ``df`` degrees of freedom when ``df`` is given;
    :math:`\alpha` replaces :math:`\alpha/2` for a one-sided alternative.
    The formula neglects rejections in the wrong tail. Returned as a positive
    magnitude (for ``"less"``, the size of the smallest detectable decrease).
    """
    se = _check_positive("se", se)
    alpha = open_unit_interval("alpha", alpha)
    power = open_unit_interval("power", power)
    df = _check_positive("df", df, allow_none=True)
    _check_alternative(alternative)
    level = 1 - alpha / 2 if alternative == "two-sided" else 1 - alpha
    return float((_quantile(level, df) + _quantile(power, df)) * se)


# ---------------------------------------------------------------------------
# simulated power
# ---------------------------------------------------------------------------


def _check_simulation(y0, effect, n_sims, alpha, seed):
    if not callable(y0):
        y0 = np.asarray(y0, dtype=float)
        if y0.ndim != 1 or not np.isfinite(y0).all():
            raise DataError("`y0` must be a finite one-dimensional array or a callable rng -> array")
    eff = np.asarray(effect, dtype=float)
    if eff.ndim > 1 or not np.isfinite(eff).all():
        raise ValueError("`effect` must be a finite number or a one-dimensional array of unit effects")
    if isinstance(n_sims, bool) or not isinstance(n_sims, (int, np.integer)) or n_sims < 1:
        raise ValueError(f"`n_sims` must be a positive integer; got {n_sims!r}")
    alpha = open_unit_interval("alpha", alpha)
    if isinstance(seed, bool) or not isinstance(seed, (int, np.integer)):
        raise TypeError(f"`seed` must be an integer; got {seed!r}")
    return y0, eff, int(n_sims), alpha, int(seed)


def _one_simulation(rng, y0, eff, draw_assignment, test) -> float:
    base = np.asarray(y0(rng), dtype=float) if callable(y0) else y0
    z = np.asarray(draw_assignment(rng))
    if z.shape != base.shape:
        raise ValueError(f"`draw_assignment` returned shape {z.shape}; the outcomes have shape {base.shape}")
    p = float(test(base + eff * z, z))
    if not 0 <= p <= 1:
        raise ValueError(f"`test` must return a p-value in [0, 1]; got {p!r}")
    return p


def simulated_power(y0, effect, draw_assignment: Callable, test: Callable, *,
                    n_sims: int = 1000, alpha: float = 0.05, seed: int,
                    progress: Callable[[int, int], None] | None = None) -> dict:
    r"""Power by simulation under the real assignment mechanism and test.

    Parameters
    ----------
    y0 : array_like, shape (n,), or callable ``rng -> array``
        Control potential outcomes: fixed (finite-population power) or drawn
        afresh in each simulation from a model.
    effect : float or array_like, shape (n,)
        Additive treatment effect: ``y = y0 + effect * z``.
    draw_assignment : callable ``rng -> z``
        Draws one assignment (0/1, shape (n,)) under the design's mechanism.
    test : callable ``(y, z) -> p_value``
        The analysis test, e.g. the randomization (Fisher) test.
    n_sims : int, default 1000
    alpha : float, default 0.05
    seed : int
        Seed of :func:`numpy.random.default_rng`; simulation ``i`` uses the
        ``i``-th child of ``SeedSequence(seed)``, so results do not depend on
        how the simulations are scheduled.
    progress : callable ``(done, total)``, optional
        Called after each simulation.

    Returns
    -------
    dict
        ``method="simulation", effect, alpha, n_sims, rejections, power,
        mc_std_error``; ``effect`` is the mean unit effect.

    Notes
    -----
    Power is estimated by :math:`\hat\pi = R/S`, the share of :math:`S`
    simulated experiments whose test gives :math:`p \le \alpha`, with Monte
    Carlo standard error :math:`\sqrt{\hat\pi(1-\hat\pi)/S}` (Arnold et al.
    2011).
    """
    y0, eff, n_sims, alpha, seed = _check_simulation(y0, effect, n_sims, alpha, seed)
    progress = _check_progress(progress)
    rejections = _count_rejections(
        lambda rng: _one_simulation(rng, y0, eff, draw_assignment, test),
        n_sims=n_sims, alpha=alpha, seed=seed, progress=progress)
    return _simulation_summary(float(eff.mean()), alpha, n_sims, rejections)


# ---------------------------------------------------------------------------
# study as run
# ---------------------------------------------------------------------------


def _main_estimate(estimates: Sequence[Mapping], column: str) -> Mapping | None:
    for e in estimates:
        if (e.get("outcome") == column and e.get("estimator") == "unadjusted"
                and e.get("estimand") in ("ATE", "ITT") and e.get("subgroup") is None):
            return e
    return None


def _control_sd(study, column: str) -> float | None:
    y = study.outcome(column)[study.z == 0]
    y = y[~np.isnan(y)]
    return _num(y.std(ddof=1)) if y.size >= 2 else None


def _as_run_entry(study, spec, estimate, alpha: float, power: float) -> dict:
    se = None if estimate is None else _num(estimate.get("std_error"))
    df = None if estimate is None else _num(estimate.get("df"))
    size = None
    if se is not None and se > 0:
        size = mde(se, alpha, power, df if df is not None and df > 0 else None,
                   alternative=spec.alternative)
    sd0 = _control_sd(study, spec.column)
    return {
        "outcome": spec.column, "std_error": se, "df": df, "mde": size,
        "sd_control": sd0,
        "mde_std": None if size is None or not sd0 else size / sd0,
    }


def study_power(study, estimates: Sequence[Mapping], *, power: float = 0.8,
                planned: Sequence[Mapping] = ()) -> dict:
    """The ``power`` section of ``results.json``: the MDE of the study as run.

    For each outcome, the MDE at ``power`` (default 80%) and the spec's
    ``alpha`` and ``alternative`` from the realized standard error of its main
    unadjusted ATE/ITT estimate (t quantiles with the estimate's ``df`` when
    given; see :func:`mde`), also in control-arm SD units.

    Returns
    -------
    dict
        ``{alpha, target_power, as_run: [{outcome, std_error, df, mde,
        sd_control, mde_std}], planned: [...]}``; ``planned`` holds the given
        :func:`planned_power` results unchanged (empty by default). Power to
        detect the *observed* effect is deliberately not reported: it is a
        function of the p-value and adds nothing (Hoenig & Heisey 2001).
    """
    power = open_unit_interval("power", power)
    alpha = float(study.spec.analysis.alpha)
    rows = [
        _as_run_entry(study, spec, _main_estimate(estimates, spec.column), alpha, power)
        for spec in study.spec.outcomes
    ]
    return {"alpha": alpha, "target_power": power, "as_run": rows, "planned": [dict(p) for p in planned]}
