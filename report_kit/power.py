"""Power and minimum detectable effect (MDE).

Owns: the MDE from a standard error, analytic power and MDE of a design as
planned (with the design effect of cluster randomization), power by
simulation under the real assignment mechanism and randomization test, and
the ``power`` section of ``results.json`` (MDE of the study as run).
"""

from __future__ import annotations

from collections.abc import Callable, Mapping, Sequence

import numpy as np
from scipy import optimize, stats

from .balance import _num
from .errors import DataError, UsageError
from .model import ALTERNATIVES

__all__ = ["design_effect", "mde", "planned_power", "simulated_power", "study_power"]


# ---------------------------------------------------------------------------
# validation
# ---------------------------------------------------------------------------


def _check_unit_interval(name: str, value) -> float:
    try:
        v = float(value)
    except (TypeError, ValueError) as err:
        raise UsageError(f"`{name}` must be a number in (0, 1); got {value!r}") from err
    if not 0 < v < 1:
        raise UsageError(f"`{name}` must be in (0, 1); got {value!r}")
    return v


def _check_positive(name: str, value, *, allow_none: bool = False) -> float | None:
    if value is None and allow_none:
        return None
    try:
        v = float(value)
    except (TypeError, ValueError) as err:
        raise UsageError(f"`{name}` must be a positive number; got {value!r}") from err
    if not (np.isfinite(v) and v > 0):
        raise UsageError(f"`{name}` must be a positive number; got {value!r}")
    return v


def _check_alternative(alternative: str) -> str:
    if alternative not in ALTERNATIVES:
        raise UsageError(
            f"`alternative` must be one of {{'two-sided', 'greater', 'less'}}; got {alternative!r}"
        )
    return alternative


def _plain(x: float) -> int | float:
    """Whole numbers as int (sizes read better in results.json), others as float."""
    return int(x) if float(x).is_integer() else float(x)


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
    alpha = _check_unit_interval("alpha", alpha)
    power = _check_unit_interval("power", power)
    df = _check_positive("df", df, allow_none=True)
    _check_alternative(alternative)
    level = 1 - alpha / 2 if alternative == "two-sided" else 1 - alpha
    return float((_quantile(level, df) + _quantile(power, df)) * se)


# ---------------------------------------------------------------------------
# analytic power of a planned design
# ---------------------------------------------------------------------------


def design_effect(cluster_size: float, icc: float) -> float:
    r"""Variance inflation of cluster randomization: :math:`1 + (m - 1)\rho`.

    ``cluster_size`` is :math:`m`, the (average) number of units per cluster,
    and ``icc`` the intraclass correlation :math:`\rho` (Kish 1965; Donner &
    Klar 2000, ch. 2).
    """
    return float(1 + (cluster_size - 1) * icc)


def _t_power(effect: float, se: float, df: float, alpha: float, alternative: str) -> float:
    """Power of the t test: noncentral t with noncentrality ``effect / se``."""
    nc = effect / se
    if alternative == "two-sided":
        crit = stats.t.ppf(1 - alpha / 2, df)
        return float(stats.nct.sf(crit, df, nc) + stats.nct.cdf(-crit, df, nc))
    crit = stats.t.ppf(1 - alpha, df)
    if alternative == "greater":
        return float(stats.nct.sf(crit, df, nc))
    return float(stats.nct.cdf(-crit, df, nc))


def _solve_mde(se: float, df: float, alpha: float, power: float, alternative: str) -> float:
    sign = -1.0 if alternative == "less" else 1.0

    def gap(d: float) -> float:
        return _t_power(sign * d, se, df, alpha, alternative) - power

    floor = _t_power(0.0, se, df, alpha, alternative)
    if floor >= power:
        return 0.0
    hi = se
    while gap(hi) < 0:
        hi *= 2
    return float(optimize.brentq(gap, 0.0, hi, xtol=1e-12 * se, rtol=1e-12))


def planned_power(*, n_treated: float, n_control: float, sd: float = 1.0,
                  effect: float | None = None, power: float = 0.8, icc: float = 0.0,
                  cluster_size: float = 1, alpha: float = 0.05,
                  alternative: str = "two-sided") -> dict:
    r"""Power and MDE of a two-arm design before data (analytic).

    Parameters
    ----------
    n_treated, n_control : float
        Planned numbers of *units* per arm.
    sd : float, default 1
        Outcome standard deviation (1 gives answers in SD units).
    effect : float, optional
        Effect to compute the power for; the MDE at ``power`` is always given.
    power : float, default 0.8
        Target power for the MDE.
    icc, cluster_size : float
        Intraclass correlation :math:`\rho` and units per cluster :math:`m`
        for cluster randomization (defaults: individual randomization).
    alpha : float, default 0.05
    alternative : {'two-sided', 'greater', 'less'}

    Returns
    -------
    dict
        ``method="analytic", n_treated, n_control, sd, icc, cluster_size,
        design_effect, std_error, df, alpha, alternative, target_power, mde,
        mde_std, effect, power`` (``power`` None without ``effect``).

    Notes
    -----
    The standard error of the difference in means is

    .. math:: \mathrm{SE} = \sigma \sqrt{D\,(1/n_1 + 1/n_0)},\qquad D = 1 + (m-1)\rho

    (Donner & Klar 2000). Power is that of the two-sample t test: with
    :math:`\delta = \tau / \mathrm{SE}` and :math:`c = t_{1-\alpha/2,\,\nu}`,
    :math:`\pi = P(T'_{\nu,\delta} > c) + P(T'_{\nu,\delta} < -c)` for the
    noncentral t :math:`T'` (Cohen 1988, ch. 2), with
    :math:`\nu = n_1 + n_0 - 2`, or :math:`\nu = J - 2` for :math:`J =
    (n_1 + n_0)/m` clusters. The MDE solves :math:`\pi(\tau) =` ``power``.
    """
    n1 = _check_positive("n_treated", n_treated)
    n0 = _check_positive("n_control", n_control)
    sd = _check_positive("sd", sd)
    power = _check_unit_interval("power", power)
    alpha = _check_unit_interval("alpha", alpha)
    _check_alternative(alternative)
    m = _check_positive("cluster_size", cluster_size)
    if m < 1:
        raise UsageError(f"`cluster_size` must be at least 1; got {cluster_size!r}")
    try:
        rho = float(icc)
    except (TypeError, ValueError) as err:
        raise UsageError(f"`icc` must be a number in [0, 1]; got {icc!r}") from err
    if not 0 <= rho <= 1:
        raise UsageError(f"`icc` must be in [0, 1]; got {icc!r}")
    if effect is not None and not np.isfinite(float(effect)):
        raise UsageError(f"`effect` must be a finite number; got {effect!r}")
    df = (n1 + n0) / m - 2
    if df <= 0:
        raise UsageError(f"the design needs more than two clusters (or units); got {(n1 + n0) / m:g}")
    deff = design_effect(m, rho)
    se = sd * np.sqrt(deff * (1 / n1 + 1 / n0))
    size = _solve_mde(se, df, alpha, power, alternative)
    return {
        "method": "analytic", "n_treated": _plain(n1), "n_control": _plain(n0), "sd": sd,
        "icc": rho, "cluster_size": _plain(m), "design_effect": deff, "std_error": float(se), "df": float(df),
        "alpha": alpha, "alternative": alternative, "target_power": power,
        "mde": size, "mde_std": size / sd,
        "effect": None if effect is None else float(effect),
        "power": None if effect is None else _t_power(float(effect), se, df, alpha, alternative),
    }


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
        raise UsageError("`effect` must be a finite number or a one-dimensional array of unit effects")
    if isinstance(n_sims, bool) or not isinstance(n_sims, (int, np.integer)) or n_sims < 1:
        raise UsageError(f"`n_sims` must be a positive integer; got {n_sims!r}")
    alpha = _check_unit_interval("alpha", alpha)
    if isinstance(seed, bool) or not isinstance(seed, (int, np.integer)):
        raise UsageError(f"`seed` must be an integer; got {seed!r}")
    return y0, eff, int(n_sims), alpha, int(seed)


def _one_simulation(rng, y0, eff, draw_assignment, test) -> float:
    base = np.asarray(y0(rng), dtype=float) if callable(y0) else y0
    z = np.asarray(draw_assignment(rng))
    if z.shape != base.shape:
        raise UsageError(f"`draw_assignment` returned shape {z.shape}; the outcomes have shape {base.shape}")
    p = float(test(base + eff * z, z))
    if not 0 <= p <= 1:
        raise UsageError(f"`test` must return a p-value in [0, 1]; got {p!r}")
    return p


def simulated_power(y0, effect, draw_assignment: Callable, test: Callable, *,
                    n_sims: int = 1000, alpha: float = 0.05, seed: int) -> dict:
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
    children = np.random.SeedSequence(seed).spawn(n_sims)
    rejections = 0
    for child in children:
        p = _one_simulation(np.random.default_rng(child), y0, eff, draw_assignment, test)
        rejections += p <= alpha
    share = rejections / n_sims
    return {
        "method": "simulation", "effect": float(eff.mean()), "alpha": alpha,
        "n_sims": n_sims, "rejections": int(rejections), "power": float(share),
        "mc_std_error": float(np.sqrt(share * (1 - share) / n_sims)),
    }


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
    power = _check_unit_interval("power", power)
    alpha = float(study.spec.analysis.alpha)
    rows = [
        _as_run_entry(study, spec, _main_estimate(estimates, spec.column), alpha, power)
        for spec in study.spec.outcomes
    ]
    return {"alpha": alpha, "target_power": power, "as_run": rows, "planned": [dict(p) for p in planned]}
