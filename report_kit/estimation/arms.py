"""Contrasts between the arms of a multi-arm trial.

Owns: the list of contrasts a design asks for (each arm against the reference,
or every pair), their unadjusted design-based estimates, the covariate-adjusted
estimate with all arm indicators (Lin 2013; blocked and cluster designs in
:mod:`report_kit.estimation.arms_adjusted`), the CACE per arm and each
contrast within pre-specified subgroups. A contrast
between arm ``a`` and arm ``r`` is the average effect of ``a`` instead of ``r``,
``tau_ar = mean_i (Y_i(a) - Y_i(r))``. Formulas and sources are in
``docs/methods/arms.md``. Pure numpy, no I/O.
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass

import numpy as np

from report_kit.errors import ReportKitWarning
from report_kit.estimation.arms_adjusted import lin_all_arms
from report_kit.estimation.core import BLOCKED, CLUSTERED, MECHANISMS, Estimate, _interval
from report_kit.estimation.neyman import estimate_effects
from report_kit.estimation.noncompliance import estimate_noncompliance
from report_kit.estimation.subgroups import SubgroupResult, _group_codes, estimate_subgroups
from report_kit.validate import Record

__all__ = ["CONTRASTS", "ArmContrast", "ArmSubgroups", "contrast_pairs", "estimate_contrasts",
           "estimate_contrasts_adjusted", "estimate_contrast_subgroups", "estimate_arm_cace",
           "check_arm_labels"]

CONTRASTS = ("reference", "pairwise")
ARM_MECHANISMS = tuple(m for m in MECHANISMS if m != "matched_pairs")
_SATURATED = ("complete", "bernoulli")  # the all-arms Lin regression separates by arm


@dataclass(frozen=True, kw_only=True)
class ArmContrast(Record):
    """One contrast ``arm`` minus ``reference`` and its estimate.

    ``estimate.n_treated`` counts the units of ``arm`` used, ``n_control`` those
    of ``reference``; ``mean_arm`` and ``mean_reference`` are the two arms'
    observed outcome means. In ``results.json`` the estimate's entries sit
    in the contrast's own dict.
    """

    record_merged = ("estimate",)

    arm: str
    reference: str
    estimate: Estimate
    mean_arm: float | None = None
    mean_reference: float | None = None


def contrast_pairs(arms, contrasts: str = "reference") -> list[tuple[str, str]]:
    """The ``(arm, reference)`` pairs a design asks for.

    ``reference``: every later arm against the first; ``pairwise``: every pair
    ``(arms[j], arms[i])`` with ``i < j``, in that order.
    """
    arms = [str(a) for a in arms]
    if len(arms) < 2 or len(set(arms)) != len(arms):
        raise ValueError(f"`arms` must list at least two distinct arm labels; got {arms}")
    if contrasts not in CONTRASTS:
        raise ValueError(f"`contrasts` must be one of {set(CONTRASTS)}; got {contrasts!r}")
    if contrasts == "reference":
        return [(arm, arms[0]) for arm in arms[1:]]
    return [(arms[j], arms[i]) for i in range(len(arms)) for j in range(i + 1, len(arms))]


def check_arm_labels(arm, arms) -> np.ndarray:
    """Validate an array of arm labels against ``arms``; return it as an object array of text."""
    if isinstance(arm, (str, bytes)) or not hasattr(arm, "__len__"):
        raise TypeError(f"`arm` must be an array of arm labels; got {type(arm).__name__}")
    labels = np.asarray([str(a) for a in arm], dtype=object)
    arms = [str(a) for a in arms]
    unknown = sorted(set(labels.tolist()) - set(arms))
    if unknown:
        raise ValueError(f"`arm` holds label(s) not in `arms` {arms}: {unknown[:5]}")
    empty = [a for a in arms if not (labels == a).any()]
    if empty:
        raise ValueError(f"arm(s) {empty} of `arms` have no units")
    return labels


def _check_mechanism(mechanism: str) -> None:
    if mechanism not in ARM_MECHANISMS:
        raise ValueError(f"`mechanism` must be one of {set(ARM_MECHANISMS)} for a multi-arm design; "
                         f"got {mechanism!r}")


def _two_arm_units(labels: np.ndarray, pairs):
    """For each contrast ``(a, r)``: the mask of the two arms' units and ``z`` on them (1 = arm ``a``)."""
    for a, r in pairs:
        mask = (labels == a) | (labels == r)
        yield a, r, mask, (labels[mask] == a).astype(int)


def _subset(values, mask):
    return None if values is None else np.asarray(values)[mask]


def _means(y, labels, arm, reference) -> tuple[float | None, float | None]:
    out = []
    for a in (arm, reference):
        vals = y[(labels == a) & ~np.isnan(y)]
        out.append(float(vals.mean()) if vals.size else None)
    return out[0], out[1]


def estimate_contrasts(y, arm, *, arms, contrasts: str = "reference", mechanism: str, block=None,
                       cluster=None, alpha: float = 0.05) -> list[ArmContrast]:
    """Unadjusted design-based estimate of each contrast.

    Each contrast ``a`` vs ``r`` uses the units of the two arms compared, with
    ``z = 1`` for arm ``a``, and the two-arm estimator of the design
    (:func:`report_kit.estimation.neyman.estimate_effects`): difference in means
    ``ybar_a - ybar_r`` with Neyman's variance ``s_a^2/n_a + s_r^2/n_r``
    (Neyman 1923) for complete and Bernoulli designs; the block-size-weighted
    average of within-block differences for blocked designs (block weights are
    the block's units in the two arms); CR2 and Horvitz–Thompson for cluster
    designs. For complete randomization the estimate equals the arm-dummy
    coefficient of OLS on all arms and the variance its HC2 variance (Samii &
    Aronow 2012). Cluster designs give two rows per contrast (CR2, then HT).

    Parameters
    ----------
    y : array_like, shape (n,)
        Outcome (NaN = missing, dropped).
    arm : array_like, shape (n,)
        Arm label of each unit.
    arms : sequence of str
        The arms, reference first.
    contrasts : {'reference', 'pairwise'}
    mechanism, block, cluster, alpha
        As in :func:`~report_kit.estimation.neyman.estimate_effects`.
    """
    _check_mechanism(mechanism)
    pairs = contrast_pairs(arms, contrasts)
    labels = check_arm_labels(arm, arms)
    y = np.asarray(y, dtype=float)
    if y.shape != labels.shape:
        raise ValueError(f"`y` and `arm` must have the same length; got {y.size} and {labels.size}")
    out = []
    for a, r, mask, z in _two_arm_units(labels, pairs):
        means = _means(y, labels, a, r)
        for est in estimate_effects(y[mask], z, mechanism=mechanism, block=_subset(block, mask),
                                    cluster=_subset(cluster, mask), alpha=alpha):
            out.append(ArmContrast(arm=a, reference=r, estimate=est, mean_arm=means[0], mean_reference=means[1]))
    return out


@dataclass(frozen=True, kw_only=True)
class ArmSubgroups:
    """The subgroup analysis of one contrast ``arm`` minus ``reference``.

    ``subgroups`` is the two-arm :class:`~report_kit.estimation.subgroups.SubgroupResult`
    on the units of the two arms (levels, the effect within each level, each
    level's difference from the first); ``means[i]`` holds the observed
    outcome means of ``arm`` and ``reference`` within ``subgroups.levels[i]``.
    """

    arm: str
    reference: str
    subgroups: SubgroupResult
    means: tuple[tuple[float | None, float | None], ...]


def estimate_contrast_subgroups(y, arm, g, *, arms, contrasts: str = "reference", mechanism: str, block=None,
                                cluster=None, alpha: float = 0.05) -> list[ArmSubgroups]:
    """Each contrast within each level of a pre-specified subgroup variable.

    For ``a`` vs ``r`` the two-arm subgroup analysis
    (:func:`report_kit.estimation.subgroups.estimate_subgroups`) runs on the
    units of the two arms, with ``z = 1`` for arm ``a``: within each level the
    design's primary unadjusted estimate (the first row of
    :func:`estimate_contrasts` on the level's units), and each level's effect
    minus the first level's with variance ``V_l + V_0 - 2 C`` (``C`` from the
    clusters holding units of both levels). Units with a missing label are left
    out.
    """
    _check_mechanism(mechanism)
    pairs = contrast_pairs(arms, contrasts)
    labels = check_arm_labels(arm, arms)
    y = np.asarray(y, dtype=float)
    g = np.asarray(g, dtype=object)
    if y.shape != labels.shape or g.shape != labels.shape:
        raise ValueError(f"`y`, `arm` and `g` must have the same length; got {y.size}, {labels.size} and {g.size}")
    out = []
    for a, r, mask, z in _two_arm_units(labels, pairs):
        result = estimate_subgroups(y[mask], z, g[mask], mechanism=mechanism, block=_subset(block, mask),
                                    cluster=_subset(cluster, mask), alpha=alpha)
        codes, _ = _group_codes(g[mask], int(mask.sum()))
        means = tuple(_means(np.where(codes == k, y[mask], np.nan), labels[mask], a, r)
                      for k in range(len(result.levels)))
        out.append(ArmSubgroups(arm=a, reference=r, subgroups=result, means=means))
    return out


def estimate_arm_cace(y, arm, d, *, arms, contrasts: str = "reference", mechanism: str, block=None,
                      cluster=None, alpha: float = 0.05) -> list[ArmContrast]:
    """CACE of each contrast (Wald ratio, Angrist, Imbens & Rubin 1996).

    On the units of the two arms compared, ``CACE = ITT_y / ITT_d`` where ``d``
    is the 0/1 take-up column (1 = received the programme of its arm's
    contrast); delta-method standard error as in
    :func:`report_kit.estimation.noncompliance.estimate_noncompliance`.
    """
    _check_mechanism(mechanism)
    pairs = contrast_pairs(arms, contrasts)
    labels = check_arm_labels(arm, arms)
    y, d = np.asarray(y, dtype=float), np.asarray(d, dtype=float)
    out = []
    for a, r, mask, z in _two_arm_units(labels, pairs):
        result = estimate_noncompliance(y[mask], z, d[mask], mechanism=mechanism, block=_subset(block, mask),
                                        cluster=_subset(cluster, mask), alpha=alpha)
        out.append(ArmContrast(arm=a, reference=r, estimate=result.cace))
    return out


def estimate_contrasts_adjusted(y, arm, X, *, arms, contrasts: str = "reference", mechanism: str,
                                block=None, cluster=None, alpha: float = 0.05, names=None) -> list[ArmContrast]:
    """Covariate-adjusted estimate of each contrast (Lin 2013), one regression on all arms.

    Complete and Bernoulli designs: one OLS of ``y`` on all arm indicators and
    their interactions with the covariates centred at the mean of all units,
    ``y_i = sum_k alpha_k 1[arm_i = k] + sum_k 1[arm_i = k] (x_i - xbar)' beta_k``;
    the contrast is ``alpha_a - alpha_r`` with the HC2 variance
    ``V_a + V_r`` (the regression separates by arm, so the arm intercepts are
    uncorrelated and each ``V_k`` is the HC2 variance of the intercept of the
    regression within arm ``k``; MacKinnon & White 1985). df ``n - K (p + 1)``.
    Units with a missing covariate are dropped.

    Blocked and cluster designs: the same regression with the design's block
    terms (centred block indicators interacted with every arm indicator, or
    additive block effects when a block has fewer than two units or clusters
    of an arm) and the HC2, or CR2 for clusters, variance of
    ``alpha_a - alpha_r`` from the full covariance matrix
    (:func:`report_kit.estimation.arms_adjusted.lin_all_arms`; missing
    covariates mean-imputed with indicators, as for two arms). ``names``
    label the covariates in messages.
    """
    _check_mechanism(mechanism)
    pairs = contrast_pairs(arms, contrasts)
    labels = check_arm_labels(arm, arms)
    y = np.asarray(y, dtype=float)
    X = np.asarray(X, dtype=float)
    if X.ndim == 1:
        X = X[:, None]
    if X.shape[0] != y.size or labels.size != y.size:
        raise ValueError(f"`y`, `arm` and `X` must have the same number of rows; got {y.size}, "
                         f"{labels.size}, {X.shape[0]}")
    if mechanism not in _SATURATED:
        estimates = lin_all_arms(y, labels, X, arms=arms, pairs=pairs, mechanism=mechanism,
                                 block=block if mechanism in BLOCKED else None,
                                 cluster=cluster if mechanism in CLUSTERED else None, alpha=alpha, names=names)
        return [ArmContrast(arm=a, reference=r, estimate=est) for (a, r), est in zip(pairs, estimates)]
    keep = ~np.isnan(y) & ~np.isnan(X).any(axis=1)
    y, labels, X = y[keep], labels[keep], X[keep]
    xc = X - X.mean(axis=0)
    fits = {k: _arm_intercept(y[labels == k], xc[labels == k]) for k in dict.fromkeys(str(a) for a in arms)}
    df = float(y.size - len(fits) * (X.shape[1] + 1))
    out = []
    for a, r in pairs:
        (est_a, var_a, n_a), (est_r, var_r, n_r) = fits[a], fits[r]
        est = None if est_a is None or est_r is None else est_a - est_r
        se = None if var_a is None or var_r is None else math.sqrt(var_a + var_r)
        low, high = _interval(est, se, df if df > 0 else None, alpha)
        estimate = Estimate(estimand="ATE", estimator="adjusted", estimate=est, std_error=se,
                            ci_low=low, ci_high=high, df=df if df > 0 else None, n_treated=n_a,
                            n_control=n_r, method="lin_arms", variance_rule="hc2")
        out.append(ArmContrast(arm=a, reference=r, estimate=estimate))
    return out


def _arm_intercept(y: np.ndarray, xc: np.ndarray) -> tuple[float | None, float | None, int]:
    """Intercept of OLS of ``y`` on ``[1, xc]`` within one arm and its HC2 variance."""
    n = y.size
    design = np.column_stack([np.ones(n), xc])
    if n <= design.shape[1] or np.linalg.matrix_rank(design) < design.shape[1]:
        warnings.warn(f"an arm with {n} unit(s) cannot carry {xc.shape[1]} covariate(s); no adjusted "
                      "estimate for its contrasts", ReportKitWarning, stacklevel=3)
        return None, None, n
    bread = np.linalg.inv(design.T @ design)
    coef = bread @ design.T @ y
    resid = y - design @ coef
    lev = np.einsum("ij,jk,ik->i", design, bread, design)
    if np.any(lev >= 1 - 1e-12):
        return float(coef[0]), None, n
    meat = (design * (resid ** 2 / (1 - lev))[:, None]).T @ design
    cov = bread @ meat @ bread
    return float(coef[0]), float(cov[0, 0]), n
