"""Shared pieces of the power calculations (private).

Owns what :mod:`report_kit.planning.power` and :mod:`report_kit.planning.plan` both build
on: the argument checks, the analytic power and MDE of a two-arm design as
planned (:func:`planned_power` with :func:`design_effect` and the noncentral
t), and the seeded loop that counts rejections over simulated experiments.
``planned_power`` and ``design_effect`` are public through
:mod:`report_kit.planning.power`.
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np
from scipy import optimize, stats

from report_kit.validate import closed_unit_interval, open_unit_interval
from report_kit.inputs.model import ALTERNATIVES


# ---------------------------------------------------------------------------
# validation
# ---------------------------------------------------------------------------




def _check_positive(name: str, value, *, allow_none: bool = False) -> float | None:
    if value is None and allow_none:
        return None
    try:
        v = float(value)
    except (TypeError, ValueError) as err:
        raise TypeError(f"`{name}` must be a positive number; got {value!r}") from err
    if not (np.isfinite(v) and v > 0):
        raise ValueError(f"`{name}` must be a positive number; got {value!r}")
    return v


def _check_alternative(alternative: str) -> str:
    if alternative not in ALTERNATIVES:
        raise ValueError(
            f"`alternative` must be one of {{'two-sided', 'greater', 'less'}}; got {alternative!r}"
        )
    return alternative


def _plain(x: float) -> int | float:
    """Whole numbers as int (sizes read better in results.json), others as float."""
    return int(x) if float(x).is_integer() else float(x)


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
                  alternative: str = "two-sided", attrition: float = 0.0,
                  takeup_treated: float | None = None, takeup_control: float | None = None) -> dict:
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
    attrition : float in [0, 1), default 0
        Expected share of units whose outcome will be missing (the same in
        both arms). Only the others are analysed: ``n_a (1 - attrition)``
        units per arm; in cluster designs the clusters stay and their mean
        size becomes ``m (1 - attrition)``.
    takeup_treated, takeup_control : float in [0, 1], optional
        Expected shares receiving the treatment in each assigned arm (give
        both). Then ``mde_cace = mde / (takeup_treated - takeup_control)``.

    Returns
    -------
    dict
        ``method="analytic", n_treated, n_control, sd, icc, cluster_size,
        design_effect, std_error, df, alpha, alternative, target_power, mde,
        mde_std, effect, power`` (``power`` None without ``effect``),
        ``attrition, n_treated_analysed, n_control_analysed, takeup_treated,
        takeup_control, mde_cace`` (None without take-up).

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

    With attrition :math:`a`, :math:`n_a` becomes :math:`n_a(1-a)` in the
    standard error and the df, and :math:`m` becomes :math:`m(1-a)` in the
    design effect (never below 1). With take-up :math:`c_1, c_0` the
    complier effect is the ITT over :math:`c_1 - c_0`, so its MDE is
    :math:`\mathrm{MDE}/(c_1 - c_0)` (Bloom 1984; Duflo, Glennerster & Kremer
    2007, Section 4.3).
    """
    n1 = _check_positive("n_treated", n_treated)
    n0 = _check_positive("n_control", n_control)
    sd = _check_positive("sd", sd)
    power = open_unit_interval("power", power)
    alpha = open_unit_interval("alpha", alpha)
    _check_alternative(alternative)
    m = _check_positive("cluster_size", cluster_size)
    if m < 1:
        raise ValueError(f"`cluster_size` must be at least 1; got {cluster_size!r}")
    rho = closed_unit_interval("icc", icc)
    if effect is not None and not np.isfinite(float(effect)):
        raise ValueError(f"`effect` must be a finite number; got {effect!r}")
    attrition = closed_unit_interval("attrition", attrition)
    if attrition >= 1:
        raise ValueError(f"`attrition` must be below 1; got {attrition!r}")
    takeup = _check_takeup(takeup_treated, takeup_control)
    kept = 1.0 - attrition
    n1a, n0a = n1 * kept, n0 * kept
    df = (n1 + n0) / m - 2 if m > 1 else n1a + n0a - 2
    if df <= 0:
        raise ValueError(f"the design needs more than two clusters (or analysed units); got {df + 2:g}")
    deff = design_effect(max(1.0, m * kept), rho) if m > 1 else design_effect(m, rho)
    se = sd * np.sqrt(deff * (1 / n1a + 1 / n0a))
    size = _solve_mde(se, df, alpha, power, alternative)
    return {
        "method": "analytic", "n_treated": _plain(n1), "n_control": _plain(n0), "sd": sd,
        "icc": rho, "cluster_size": _plain(m), "design_effect": deff, "std_error": float(se), "df": float(df),
        "alpha": alpha, "alternative": alternative, "target_power": power,
        "mde": size, "mde_std": size / sd,
        "effect": None if effect is None else float(effect),
        "power": None if effect is None else _t_power(float(effect), se, df, alpha, alternative),
        "attrition": attrition, "n_treated_analysed": float(n1a), "n_control_analysed": float(n0a),
        "takeup_treated": None if takeup is None else takeup[0],
        "takeup_control": None if takeup is None else takeup[1],
        "mde_cace": None if takeup is None else size / (takeup[0] - takeup[1]),
    }


def _check_takeup(treated, control) -> tuple[float, float] | None:
    if treated is None and control is None:
        return None
    if treated is None or control is None:
        raise ValueError("`takeup_treated` and `takeup_control` go together: give both expected take-up shares")
    t1 = closed_unit_interval("takeup_treated", treated)
    t0 = closed_unit_interval("takeup_control", control)
    if not t1 > t0:
        raise ValueError(f"`takeup_treated` must exceed `takeup_control` for a complier effect; got {t1!r} and {t0!r}")
    return t1, t0


# ---------------------------------------------------------------------------
# simulation bookkeeping
# ---------------------------------------------------------------------------


def _check_progress(progress):
    if progress is not None and not callable(progress):
        raise TypeError(f"`progress` must be a callable (done, total) or None; got {progress!r}")
    return progress


def _count_rejections(one_run: Callable, *, n_sims: int, alpha: float, seed: int,
                      progress: Callable | None) -> int:
    """Run ``one_run(rng) -> p`` for the ``i``-th child of ``SeedSequence(seed)``; count ``p <= alpha``."""
    rejections = 0
    for done, child in enumerate(np.random.SeedSequence(seed).spawn(n_sims), start=1):
        rejections += one_run(np.random.default_rng(child)) <= alpha
        if progress is not None:
            progress(done, n_sims)
    return int(rejections)


def _simulation_summary(effect: float, alpha: float, n_sims: int, rejections: int) -> dict:
    share = rejections / n_sims
    return {
        "method": "simulation", "effect": float(effect), "alpha": alpha,
        "n_sims": n_sims, "rejections": int(rejections), "power": float(share),
        "mc_std_error": float(np.sqrt(share * (1 - share) / n_sims)),
    }
