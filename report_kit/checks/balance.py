"""Covariate balance between the arms and the CONSORT-style participant flow.

Owns: the per-covariate balance table (means by arm, standardized mean
difference, variance ratio, missing counts) and WHAT the omnibus Mahalanobis
balance test computes for each assignment (:func:`mahalanobis_statistic`).
HOW the draws are produced, counted and turned into p-values is the
randomization engine's (:mod:`report_kit.inference.engine`,
:mod:`report_kit.inference.pvalues`). The participant-flow counts live in
:mod:`report_kit.checks.flow`.

Assignment draws come from outside, as *chunks*: an iterable (or a callable
returning one) of ``(k, n)`` 0/1 arrays, one row per drawn assignment and one
column per unit in the frame's row order, together with the method that drew
them: ``"exact"`` (every assignment of the design, each listed once and the
observed one among them) or ``"monte_carlo"`` (independent draws under the
design). Results depend only on the sequence of rows, never on how they are
split into chunks.

When the enumerated assignments are not equally likely (exact enumeration of
a Bernoulli design with ``p != 0.5``), pass ``weights``: a callable
``chunk -> (k,) probabilities or None`` (None: equal weights), called with
each chunk as given. Weights are only meaningful for ``"exact"``; Monte Carlo
draws already follow the mechanism.
"""

from __future__ import annotations

import logging
import warnings
from collections.abc import Callable, Iterable, Sequence
from dataclasses import dataclass, field

import numpy as np

from report_kit.validate import finite_or_none as _num, mean_impute_with_indicators
from report_kit.errors import DataError, DesignError, ReportKitWarning
from report_kit.inference.engine import StoredDraws, drawn_statistics
from report_kit.inference.pvalues import DrawnStatistics
from report_kit.validate import METHODS, Record, check_choice

logger = logging.getLogger(__name__)


#: Thresholds on ``|std_diff|`` used to flag covariates (common practice, not a
#: test): at most 0.1 is "small", above 0.25 is "large", in between "moderate".
SMD_THRESHOLDS = (0.1, 0.25)

__all__ = [
    "BalanceCheck",
    "CovariateBalance",
    "METHODS",
    "OmnibusBalance",
    "SMD_THRESHOLDS",
    "balance_rows",
    "balance_statistic",
    "covariate_balance",
    "mahalanobis_balance_test",
    "mahalanobis_statistic",
    "omnibus_balance",
    "omnibus_from_draws",
    "study_balance",
    "study_balance_check",
]

ChunkSource = Iterable[np.ndarray] | Callable[[], Iterable[np.ndarray]]
WeightFn = Callable[[np.ndarray], "np.ndarray | None"]


# ---------------------------------------------------------------------------
# assignment check shared with attrition.py
# ---------------------------------------------------------------------------


def _check_assignment(z, n: int | None = None) -> np.ndarray:
    """Validate a 0/1 assignment vector with both arms present; return it as bool."""
    arr = np.asarray(z)
    if arr.ndim != 1:
        raise DataError(f"`z` must be one-dimensional; got shape {arr.shape}")
    if n is not None and arr.size != n:
        raise DataError(f"`z` must have one entry per unit ({n}); got {arr.size}")
    if arr.dtype.kind == "f" and np.isnan(arr).any():
        raise DataError("`z` must not contain missing values")
    if not np.isin(arr, (0, 1)).all():
        bad = arr[~np.isin(arr, (0, 1))][0].item()
        raise DataError(f"`z` must contain only 0 and 1; got {bad!r}")
    zb = arr.astype(bool)
    if zb.all() or not zb.any():
        raise DesignError(
            f"need at least one treated and one control unit; got {int(zb.sum())} treated "
            f"and {int((~zb).sum())} control"
        )
    return zb


# ---------------------------------------------------------------------------
# balance table
# ---------------------------------------------------------------------------


@dataclass(frozen=True, kw_only=True)
class CovariateBalance(Record):
    """Balance of one covariate; field names match ``results.json`` ``balance.covariates``."""

    name: str
    mean_treated: float | None
    mean_control: float | None
    sd_treated: float | None
    sd_control: float | None
    std_diff: float | None
    variance_ratio: float | None
    missing_treated: int
    missing_control: int
    flag: str | None
    weighting: str = "none"


def _check_covariates(X, z, names) -> tuple[np.ndarray, np.ndarray, tuple[str, ...]]:
    zb = _check_assignment(z)
    try:
        arr = np.asarray(X, dtype=float)
    except (TypeError, ValueError) as err:
        raise DataError("`X` must hold numbers (NaN for missing)") from err
    if arr.ndim == 1:
        arr = arr[:, None]
    if arr.ndim != 2 or arr.shape[0] != zb.size:
        raise DataError(
            f"`X` must have shape (n, p) with n = {zb.size} units; got {np.shape(X)}"
        )
    if names is None:
        names = [f"x{j + 1}" for j in range(arr.shape[1])]
    names = tuple(str(s) for s in names)
    if len(names) != arr.shape[1]:
        raise ValueError(f"`names` must have {arr.shape[1]} entries (one per column of X); got {len(names)}")
    dup = sorted({s for s in names if names.count(s) > 1})
    if dup:
        raise ValueError(f"`names` must be unique; repeated: {dup}")
    if np.isinf(arr).any():
        raise DataError("`X` must not contain infinite values")
    return arr, zb, names


def _flag(d: float | None) -> str | None:
    """Size class of ``|d|`` by the common-practice thresholds 0.1 and 0.25."""
    if d is None:
        return None
    small, large = SMD_THRESHOLDS
    a = abs(d)
    return "small" if a <= small else ("moderate" if a <= large else "large")


def _arm_summary(x: np.ndarray) -> tuple[float | None, float | None, int]:
    """Mean, SD (ddof=1) and missing count of one arm's values."""
    obs = x[~np.isnan(x)]
    mean = float(obs.mean()) if obs.size else None
    sd = float(obs.std(ddof=1)) if obs.size >= 2 else None
    return mean, sd, int(x.size - obs.size)


def _block_weighted_means(x: np.ndarray, zb: np.ndarray, block: np.ndarray
                          ) -> tuple[float | None, float | None]:
    """``sum_b w_b xbar_ab`` per arm, ``w_b = n_b / n`` over blocks observed in both arms."""
    obs = ~np.isnan(x)
    sums = np.zeros((2, int(block.max()) + 1))
    counts = np.zeros_like(sums)
    for a, arm in enumerate((zb, ~zb)):
        keep = arm & obs
        sums[a] = np.bincount(block[keep], weights=x[keep], minlength=sums.shape[1])
        counts[a] = np.bincount(block[keep], minlength=sums.shape[1])
    both = (counts > 0).all(axis=0)
    if not both.any():
        return None, None
    size = np.bincount(block, minlength=sums.shape[1]).astype(float) * both
    w = size / size.sum()
    means = np.divide(sums, counts, out=np.zeros_like(sums), where=counts > 0)
    return float(w @ means[0]), float(w @ means[1])


def _one_covariate(name: str, x: np.ndarray, zb: np.ndarray,
                   block: np.ndarray | None = None) -> CovariateBalance:
    m1, s1, miss1 = _arm_summary(x[zb])
    m0, s0, miss0 = _arm_summary(x[~zb])
    if block is not None:
        m1, m0 = _block_weighted_means(x, zb, block)
    std_diff = variance_ratio = None
    if None not in (m1, m0, s1, s0):
        pooled = np.sqrt((s1 ** 2 + s0 ** 2) / 2)
        if pooled > 0:
            std_diff = (m1 - m0) / pooled
        else:
            warnings.warn(
                f"covariate {name!r} is constant within both arms; its standardized "
                "difference is undefined", ReportKitWarning, stacklevel=3,
            )
        if s0 > 0:
            variance_ratio = s1 ** 2 / s0 ** 2
    return CovariateBalance(
        name=name, mean_treated=_num(m1), mean_control=_num(m0),
        sd_treated=_num(s1), sd_control=_num(s0),
        std_diff=_num(std_diff), variance_ratio=_num(variance_ratio),
        missing_treated=miss1, missing_control=miss0, flag=_flag(_num(std_diff)),
        weighting="none" if block is None else "blocks",
    )


def covariate_balance(X, z, names: Sequence[str], *, block=None) -> tuple[CovariateBalance, ...]:
    """Per-covariate balance as result objects (see :func:`balance_rows`)."""
    arr, zb, names = _check_covariates(X, z, names)
    codes = None
    if block is not None:
        labels = np.asarray(block, dtype=object)
        if labels.shape != zb.shape:
            raise ValueError(f"`block` must have one label per unit ({zb.size}); got shape {labels.shape}")
        codes = np.unique(labels.astype(str), return_inverse=True)[1].ravel()
    return tuple(_one_covariate(name, arr[:, j], zb, codes) for j, name in enumerate(names))


def balance_rows(X, z, names: Sequence[str], *, block=None) -> list[dict]:
    r"""Means by arm, standardized mean difference and variance ratio per covariate.

    Parameters
    ----------
    X : array_like, shape (n, p)
        Baseline covariates, NaN for missing. Each statistic uses the
        non-missing values of its arm; missing values are counted.
    z : array_like, shape (n,)
        Assignment, 1 treated and 0 control.
    names : sequence of str
        One name per column of ``X``.
    block : array_like, shape (n,), optional
        Block labels of a blocked design: the arm means become
        ``sum_b w_b xbar_ab`` with ``w_b = n_b / n`` (blocks observed in both
        arms), the weights of the block-weighted effect estimate.

    Returns
    -------
    list of dict
        One dict per covariate with ``name, mean_treated, mean_control,
        sd_treated, sd_control, std_diff, variance_ratio, missing_treated,
        missing_control, flag, weighting`` (``"blocks"`` or ``"none"``).

    Notes
    -----
    With arm means :math:`\bar x_1, \bar x_0` and sample standard deviations
    :math:`s_1, s_0` (divisor :math:`n_a - 1`), the standardized mean
    difference is

    .. math:: d = \frac{\bar x_1 - \bar x_0}{\sqrt{(s_1^2 + s_0^2)/2}}

    (Rosenbaum & Rubin 1985; Austin 2009). In blocked designs the numerator
    is the block-weighted difference :math:`\sum_b w_b (\bar x_{1b} - \bar
    x_{0b})`, equal to the inverse-probability-weighted difference, over the
    unweighted pooled SD (Austin & Stuart 2015), so that treatment shares
    varying across blocks do not show as imbalance. The variance ratio is
    :math:`s_1^2 / s_0^2`. ``flag`` classes :math:`|d|` as ``"small"``
    (:math:`\le 0.1`), ``"moderate"`` (:math:`\le 0.25`) or ``"large"``; these
    cut-offs are common practice (Stuart 2010), not a test. Undefined values
    (fewer than two observed values in an arm, zero pooled SD, zero control
    variance) are None.
    """
    return [row.to_dict() for row in covariate_balance(X, z, names, block=block)]


# ---------------------------------------------------------------------------
# omnibus Mahalanobis test
# ---------------------------------------------------------------------------


@dataclass(frozen=True, kw_only=True)
class OmnibusBalance(Record):
    """The omnibus balance test; ``to_dict`` feeds ``results.json`` ``balance.omnibus``.

    ``null_distribution`` keeps every drawn statistic (and ``null_weights``
    their probabilities when weights were given) so the p-value can be audited;
    ``results.json`` does not store them.
    """

    record_keys = ("statistic", "p_value", "method", "draws", "df", "mc_std_error")

    statistic: float | None
    p_value: float | None
    method: str
    draws: int
    df: int
    mc_std_error: float | None
    null_distribution: np.ndarray | None = field(default=None, compare=False, repr=False)
    null_weights: np.ndarray | None = field(default=None, compare=False, repr=False)


def _whiten(arr: np.ndarray) -> np.ndarray:
    """Centre the columns and rotate them to unit sample covariance.

    Returns ``W`` (n, r) with ``W.T @ W / (n - 1) = I_r``, where ``r`` is the
    numerical rank of the sample covariance; so that
    ``s' S^+ s = ||Z W||^2`` for any sum ``s`` of centred rows.
    """
    n = arr.shape[0]
    xc = arr - arr.mean(axis=0)
    scale = xc.std(axis=0, ddof=1)
    keep = scale > 0
    xc = xc[:, keep] / scale[keep]
    if xc.shape[1] == 0:
        return xc
    cov = xc.T @ xc / (n - 1)
    w, v = np.linalg.eigh(cov)
    good = w > 1e-10 * w.max()
    return xc @ (v[:, good] / np.sqrt(w[good]))


def mahalanobis_statistic(W: np.ndarray) -> Callable[[np.ndarray], np.ndarray]:
    r"""The per-assignment omnibus statistic on whitened covariates ``W`` (see :func:`balance_statistic`).

    Returns a function from a float block of assignments ``(rows, n)`` to
    ``(rows, 1)``: :math:`M = \lVert Z W \rVert^2 \, n / (n_1 (n - n_1))`,
    NaN for an assignment with an empty arm (undefined; the engine sets it
    aside).
    """
    n = W.shape[0]

    def statistic(block: np.ndarray) -> np.ndarray:
        s = block @ W
        n1 = block.sum(axis=1)
        with np.errstate(divide="ignore", invalid="ignore"):
            m = (s * s).sum(axis=1) * n / (n1 * (n - n1))
        return np.where((n1 > 0) & (n1 < n), m, np.nan)[:, None]
    return statistic


def balance_statistic(X, names: Sequence[str]) -> tuple[Callable[[np.ndarray], np.ndarray] | None, int]:
    """The omnibus statistic of covariates ``X`` (n, p) for the engine, and its degrees of freedom.

    Imputes missing values (pooled mean plus one missingness indicator per
    pattern), whitens, and returns ``(statistic, df)``; ``(None, 0)`` when no
    direction is left. Warns when constant or collinear directions are dropped.
    """
    arr = np.asarray(X, dtype=float)
    filled = mean_impute_with_indicators(arr, tuple(names))
    W = _whiten(filled)
    if W.shape[1] == 0:
        return None, 0
    if W.shape[1] < filled.shape[1]:
        warnings.warn(
            f"the covariates span {W.shape[1]} of {filled.shape[1]} dimensions (constant or collinear "
            "columns); the omnibus statistic uses the independent directions only",
            ReportKitWarning, stacklevel=3,
        )
    return mahalanobis_statistic(W), int(W.shape[1])


def omnibus_from_draws(drawn: DrawnStatistics, df: int) -> OmnibusBalance:
    """The omnibus result from the engine's drawn statistics (p-value by the engine's rules)."""
    p, se, defined = drawn.p_values()
    null, weights = drawn.defined_rows(0)
    return OmnibusBalance(
        statistic=_num(drawn.observed[0]), p_value=_num(p[0]), method=drawn.method,
        draws=int(defined[0]), df=df, mc_std_error=_num(se[0]),
        null_distribution=null, null_weights=weights,
    )


def mahalanobis_balance_test(
    X, z, chunks: ChunkSource, method: str, names: Sequence[str] | None = None,
    *, weights: WeightFn | None = None,
) -> OmnibusBalance:
    r"""Omnibus balance test: the randomization distribution of the Mahalanobis distance.

    Parameters
    ----------
    X : array_like, shape (n, p)
        Baseline covariates (NaN = missing).
    z : array_like, shape (n,)
        Observed assignment (0/1).
    chunks : iterable or callable
        Assignment draws under the real mechanism: ``(k, n)`` 0/1 arrays
        (or a callable returning an iterable of them).
    method : {'exact', 'monte_carlo'}
        How the draws were produced.
    names : sequence of str, optional
        Covariate names, used in warnings.
    weights : callable, optional
        ``chunk -> probabilities or None`` for exact enumerations whose
        assignments are not equally likely (see the module docstring).

    Returns
    -------
    OmnibusBalance

    Notes
    -----
    With :math:`S` the pooled sample covariance of the covariates (divisor
    :math:`n-1`) and :math:`\bar x_1 - \bar x_0` the difference of arm means,

    .. math:: M = (\bar x_1 - \bar x_0)^\top
              \Big[\big(\tfrac{1}{n_1} + \tfrac{1}{n_0}\big) S\Big]^{-1}
              (\bar x_1 - \bar x_0)

    (Morgan & Rubin 2012). The statistic is computed for every drawn
    assignment, with that draw's :math:`n_1, n_0`; the p-value is the share of
    draws with :math:`M` at least as large as the observed value (exact), or
    :math:`(1 + \#)/(1 + D)` for :math:`D` Monte Carlo draws (with
    ``weights``: the probability mass of those draws). Draws with an
    empty arm are left out (the test is then conditional on both arms being
    non-empty, which the observed assignment satisfies). Under complete
    randomization :math:`M` is approximately :math:`\chi^2_p`, and its exact
    randomization mean is :math:`p`.

    Missing covariate values are replaced by the pooled mean and a
    missingness indicator is added for each distinct pattern of missing
    values; constant or collinear directions are dropped (``df`` = rank used).
    """
    arr, zb, names = _check_covariates(X, z, names)
    check_choice("method", method, METHODS)
    statistic, df = balance_statistic(arr, names)
    if statistic is None:
        return OmnibusBalance(statistic=None, p_value=None, method=method, draws=0, df=0, mc_std_error=None)
    draws = StoredDraws.from_arrays(chunks, zb.size, method, weights)
    return omnibus_from_draws(drawn_statistics(draws, [statistic], zb)[0], df)


def omnibus_balance(
    X, z, chunks: ChunkSource, method: str, names: Sequence[str] | None = None,
    *, weights: WeightFn | None = None,
) -> dict:
    """The ``results.json`` form of :func:`mahalanobis_balance_test`.

    Keys: ``statistic, p_value, method, draws, df, mc_std_error``.
    """
    return mahalanobis_balance_test(X, z, chunks, method, names, weights=weights).to_dict()


# ---------------------------------------------------------------------------
# study-level entry points
# ---------------------------------------------------------------------------


@dataclass(frozen=True, kw_only=True, eq=False)
class BalanceCheck:
    """A study's balance section waiting for the engine's draws of its omnibus statistic.

    ``statistic`` (None without usable covariates) is handed to the
    engine's shared pass; :meth:`section` builds the ``results.json`` entry
    from what the pass drew.
    """

    covariates: list
    statistic: Callable[[np.ndarray], np.ndarray] | None
    df: int

    def section(self, drawn: DrawnStatistics | None, method: str) -> dict:
        """``{covariates: [...], omnibus: {...}}``; the omnibus entry holds None values without a statistic."""
        if self.statistic is None or drawn is None:
            omnibus = OmnibusBalance(statistic=None, p_value=None, method=method, draws=0, df=0, mc_std_error=None)
        else:
            omnibus = omnibus_from_draws(drawn, self.df)
        return {"covariates": self.covariates, "omnibus": omnibus.to_dict()}


def study_balance_check(study) -> BalanceCheck:
    """The balance table of the spec's ``analysis.covariates`` and their omnibus statistic for the engine."""
    names = tuple(study.spec.analysis.covariates)
    if not names:
        return BalanceCheck(covariates=[], statistic=None, df=0)
    X = study.frame.loc[:, list(names)].to_numpy(dtype=float)
    arr, _, names = _check_covariates(X, study.z, names)
    statistic, df = balance_statistic(arr, names)
    block = study.block if study.spec.design.block else None
    return BalanceCheck(covariates=balance_rows(X, study.z, names, block=block), statistic=statistic, df=df)


def study_balance(study, chunks_factory: Callable[[], Iterable[np.ndarray]], method: str,
                  *, weights: WeightFn | None = None) -> dict:
    """Balance section of ``results.json``: ``{covariates: [...], omnibus: {...}}``.

    Uses the spec's pre-specified ``analysis.covariates``. With no covariates
    the table is empty and the omnibus entry holds None values.
    ``chunks_factory()`` must return a fresh iterator of assignment chunks
    drawn under the study's mechanism, in the frame's row order; ``weights``
    as in :func:`mahalanobis_balance_test`. (The analysis itself uses
    :func:`study_balance_check` on the engine's shared pass.)
    """
    check_choice("method", method, METHODS)
    check = study_balance_check(study)
    drawn = None
    if check.statistic is not None:
        draws = StoredDraws.from_arrays(chunks_factory, study.z.size, method, weights)
        drawn = drawn_statistics(draws, [check.statistic], study.z)[0]
    return check.section(drawn, method)
