"""Attrition: missing outcomes, whether they differ by arm, and bounds on the effect.

Owns: attrition rates by arm, WHAT the randomization test of differential
attrition computes per assignment (:func:`attrition_statistic`; draws,
counting and p-values are the engine's, :mod:`report_kit.inference.engine`),
Lee (2009) trimming bounds and Manski (1990) worst-case bounds. A unit whose
outcome is missing counts as attrited for that outcome.
"""

from __future__ import annotations

import warnings
from collections.abc import Callable, Iterable, Sequence
from dataclasses import dataclass

import numpy as np

from report_kit.checks.balance import ChunkSource, WeightFn, _check_assignment, _num
from report_kit.errors import DataError, ReportKitWarning, UsageError
from report_kit.inference.engine import StoredDraws, drawn_statistics
from report_kit.inference.pvalues import DrawnStatistics
from report_kit.validate import METHODS, check_choice

__all__ = [
    "AttritionCheck",
    "AttritionTest",
    "EffectBounds",
    "attrition_statistic",
    "attrition_test",
    "lee_bounds",
    "manski_bounds",
    "study_attrition",
    "study_attrition_check",
]


# ---------------------------------------------------------------------------
# validation
# ---------------------------------------------------------------------------


@dataclass(frozen=True, kw_only=True)
class _ArmOutcomes:
    """Observed outcome values by arm, plus the arm sizes."""

    y1: np.ndarray   # observed treated outcomes
    y0: np.ndarray   # observed control outcomes
    n1: int
    n0: int


def _check_outcome(y, z, observed) -> _ArmOutcomes:
    zb = _check_assignment(z)
    try:
        yv = np.asarray(y, dtype=float)
    except (TypeError, ValueError) as err:
        raise DataError("`y` must hold numbers (NaN for missing)") from err
    if yv.shape != zb.shape:
        raise DataError(f"`y` must have one entry per unit ({zb.size}); got shape {yv.shape}")
    if observed is None:
        obs = ~np.isnan(yv)
    else:
        obs_arr = np.asarray(observed)
        if obs_arr.shape != zb.shape or not np.isin(obs_arr, (0, 1)).all():
            raise DataError(f"`observed` must be a 0/1 (or bool) vector of length {zb.size}")
        obs = obs_arr.astype(bool)
    if not np.isfinite(yv[obs]).all():
        raise DataError("`y` must be finite wherever `observed` is true")
    return _ArmOutcomes(y1=yv[zb & obs], y0=yv[~zb & obs], n1=int(zb.sum()), n0=int((~zb).sum()))


# ---------------------------------------------------------------------------
# bounds
# ---------------------------------------------------------------------------


@dataclass(frozen=True, kw_only=True)
class EffectBounds:
    """Bounds on an average effect; ``to_dict`` gives the ``results.json`` entry plus details."""

    method: str
    lower: float | None
    upper: float | None
    observed_share_treated: float
    observed_share_control: float
    trimmed_arm: str | None = None
    trim_share: float | None = None
    low: float | None = None
    high: float | None = None
    std_error_lower: float | None = None
    std_error_upper: float | None = None
    n_blocks: int | None = None

    def to_dict(self) -> dict:
        out = {
            "method": self.method,
            "lower": self.lower,
            "upper": self.upper,
            "observed_share_treated": self.observed_share_treated,
            "observed_share_control": self.observed_share_control,
        }
        if self.method == "lee":
            out.update(trimmed_arm=self.trimmed_arm, trim_share=self.trim_share,
                       std_error_lower=self.std_error_lower,
                       std_error_upper=self.std_error_upper, n_blocks=self.n_blocks)
        else:
            out.update(low=self.low, high=self.high)
        return out


def _trimmed_means(values: np.ndarray, keep_num: int, keep_den: int) -> tuple[float, float]:
    """Means of the lowest and of the highest share ``keep_num / keep_den`` of ``values``.

    The kept mass is ``K = len(values) * keep_num / keep_den``; when ``K`` is
    not whole, the boundary value enters with weight ``K - floor(K)``, so the
    trimmed share is exact.
    """
    v = np.sort(values)
    k = v.size
    whole, rest = divmod(k * keep_num, keep_den)
    frac = rest / keep_den
    mass = whole + frac

    def tail_mean(s: np.ndarray) -> float:
        total = s[:whole].sum() + (frac * s[whole] if frac > 0 else 0.0)
        return float(total / mass)

    return tail_mean(v), tail_mean(v[::-1])


def _trimmed_moments(values: np.ndarray, keep_num: int, keep_den: int, top: bool
                     ) -> tuple[float, float, float]:
    """Mean, variance and cut point of the kept share (lowest, or highest if ``top``)."""
    v = np.sort(values)[::-1] if top else np.sort(values)
    whole, rest = divmod(v.size * keep_num, keep_den)
    frac = rest / keep_den
    wts = np.zeros(v.size)
    wts[:whole] = 1.0
    if frac > 0:
        wts[whole] = frac
    mass = wts.sum()
    mean = float(np.dot(wts, v) / mass)
    var = float(np.dot(wts, (v - mean) ** 2) / mass)
    cut = float(v[min(whole, v.size - 1)] if frac > 0 else v[whole - 1])
    return mean, var, cut


def _lee_std_errors(arms: _ArmOutcomes, trimmed: str | None) -> tuple[float, float]:
    """Standard errors of the two Lee bounds (Lee 2009, Proposition 3).

    For the trimmed arm (``k`` observed of ``n``, observed share ``s``, trimming
    share ``p``, kept mean ``mu``, variance ``sigma^2`` and cut point ``q``):
    ``sigma^2 / (k (1 - p)) + (q - mu)^2 p / (k (1 - p))`` (the trimmed mean with
    a known share) ``+ ((mu - q) / (1 - p))^2 Var(p_hat)`` (the estimated share,
    ``p = 1 - s_other / s_trimmed``, delta method with ``Var(s_a) = s_a (1 - s_a)
    / n_a``); plus ``Var(Y) / k`` of the untrimmed arm's mean.
    """
    y_hi, y_lo = (arms.y1, arms.y0) if trimmed != "control" else (arms.y0, arms.y1)
    n_hi, n_lo = (arms.n1, arms.n0) if trimmed != "control" else (arms.n0, arms.n1)
    k_hi, k_lo = y_hi.size, y_lo.size
    s_hi, s_lo = k_hi / n_hi, k_lo / n_lo
    p = 1.0 - (k_lo * n_hi) / (k_hi * n_lo)
    var_p = (s_lo / s_hi) ** 2 * ((1 - s_lo) / (s_lo * n_lo) + (1 - s_hi) / (s_hi * n_hi))
    other = float(np.var(y_lo)) / k_lo
    out = []
    for top in (False, True):
        mu, var, cut = _trimmed_moments(y_hi, k_lo * n_hi, k_hi * n_lo, top)
        v = ((var + (cut - mu) ** 2 * p) / (k_hi * (1 - p))
             + ((mu - cut) / (1 - p)) ** 2 * var_p + other)
        out.append(float(np.sqrt(v)))
    # lower bound: low tail of treated (or high tail of control); upper: the other
    return (out[0], out[1]) if trimmed != "control" else (out[1], out[0])


def _lee(arms: _ArmOutcomes, *, quiet: bool = False) -> EffectBounds:
    k1, k0 = arms.y1.size, arms.y0.size
    share1, share0 = k1 / arms.n1, k0 / arms.n0
    if k1 == 0 or k0 == 0:
        if not quiet:
            warnings.warn("an arm has no observed outcome; Lee bounds are undefined",
                          ReportKitWarning, stacklevel=3)
        return EffectBounds(method="lee", lower=None, upper=None,
                            observed_share_treated=share1, observed_share_control=share0)
    # keep share p_low / p_high of the better-observed arm, as an exact fraction
    # (the shares k_a / n_a are compared, never the counts k_a)
    if k1 * arms.n0 >= k0 * arms.n1:
        trimmed = "treated" if k1 * arms.n0 > k0 * arms.n1 else None
        low_mean, high_mean = _trimmed_means(arms.y1, k0 * arms.n1, k1 * arms.n0)
        m0 = float(arms.y0.mean())
        lower, upper = low_mean - m0, high_mean - m0
        q = 1 - (k0 * arms.n1) / (k1 * arms.n0)
    else:
        trimmed = "control"
        low_mean, high_mean = _trimmed_means(arms.y0, k1 * arms.n0, k0 * arms.n1)
        m1 = float(arms.y1.mean())
        lower, upper = m1 - high_mean, m1 - low_mean
        q = 1 - (k1 * arms.n0) / (k0 * arms.n1)
    se_lower = se_upper = None
    if min(k1, k0) >= 2:
        se_lower, se_upper = _lee_std_errors(arms, trimmed)
    return EffectBounds(method="lee", lower=_num(lower), upper=_num(upper),
                        observed_share_treated=share1, observed_share_control=share0,
                        trimmed_arm=trimmed, trim_share=float(q),
                        std_error_lower=_num(se_lower), std_error_upper=_num(se_upper))


def _lee_blocked(y, zb: np.ndarray, obs: np.ndarray, block) -> EffectBounds:
    """Lee bounds within each block, combined with the headline's block weights.

    Block ``b`` enters with ``w_b = k_b / k`` (``k_b`` units with an observed
    outcome in the block, over the blocks where both arms have one), the weights
    of the block-weighted difference in means. Each block's bounds contain its
    observed difference, so the combined bounds contain the headline estimate;
    standard errors combine as ``sqrt(sum_b w_b^2 SE_b^2)`` (blocks independent).
    """
    labels = np.asarray(block, dtype=object)
    if labels.shape != zb.shape:
        raise UsageError(f"`block` must have one label per unit ({zb.size}); got shape {labels.shape}")
    codes = np.unique(labels.astype(str), return_inverse=True)[1]
    parts, weights = [], []
    for b in range(int(codes.max()) + 1):
        m = codes == b
        arms = _ArmOutcomes(y1=y[m & zb & obs], y0=y[m & ~zb & obs],
                            n1=int((m & zb).sum()), n0=int((m & ~zb).sum()))
        if arms.y1.size and arms.y0.size:
            parts.append(_lee(arms, quiet=True))
            weights.append(arms.y1.size + arms.y0.size)
    share1, share0 = float(obs[zb].mean()), float(obs[~zb].mean())
    if not parts:
        warnings.warn("no block has an observed outcome in both arms; Lee bounds are undefined",
                      ReportKitWarning, stacklevel=3)
        return EffectBounds(method="lee", lower=None, upper=None, observed_share_treated=share1,
                            observed_share_control=share0, n_blocks=0)
    w = np.asarray(weights, dtype=float) / sum(weights)
    arms_trimmed = {p.trimmed_arm for p in parts if p.trimmed_arm is not None}
    se = [[p.std_error_lower for p in parts], [p.std_error_upper for p in parts]]
    std_errors = [None if any(v is None for v in col) else float(np.sqrt(np.dot(w ** 2, np.square(col))))
                  for col in se]
    return EffectBounds(
        method="lee", lower=_num(float(np.dot(w, [p.lower for p in parts]))),
        upper=_num(float(np.dot(w, [p.upper for p in parts]))),
        observed_share_treated=share1, observed_share_control=share0,
        trimmed_arm=arms_trimmed.pop() if len(arms_trimmed) == 1 else ("by block" if arms_trimmed else None),
        trim_share=float(np.dot(w, [p.trim_share for p in parts])),
        std_error_lower=_num(std_errors[0]), std_error_upper=_num(std_errors[1]), n_blocks=len(parts))


def lee_bounds(y, z, observed=None, *, block=None) -> dict:
    r"""Lee (2009) trimming bounds on the effect among always-observed units.

    Parameters
    ----------
    y : array_like, shape (n,)
        Outcome; values where ``observed`` is false are ignored (may be NaN).
    z : array_like, shape (n,)
        Assignment (0/1).
    observed : array_like of bool, shape (n,), optional
        Whether the outcome was observed; default ``~isnan(y)``.
    block : array_like, shape (n,), optional
        Block labels: bounds are computed within each block and combined with
        the weights of the block-weighted difference in means (share of
        observed units), so they contain that estimate.

    Returns
    -------
    dict
        ``method="lee", lower, upper, observed_share_treated,
        observed_share_control, trimmed_arm ("treated"|"control"|None, or
        "by block" when blocks differ), trim_share (weighted mean over blocks),
        std_error_lower, std_error_upper, n_blocks`` (None without ``block``).

    Notes
    -----
    Let :math:`p_1, p_0` be the observed shares by arm. Assuming assignment
    can only move units into (or only out of) observation (monotonicity), the
    arm with the larger share, say treated, holds the always-observed units
    plus a share :math:`q = (p_1 - p_0)/p_1` of others. Trimming :math:`q`
    from the top or the bottom of its observed outcomes gives

    .. math:: \Delta^{lo} = E[Y \mid Z=1, \text{obs}, Y \le y_{1-q}] - E[Y \mid Z=0, \text{obs}],
    .. math:: \Delta^{hi} = E[Y \mid Z=1, \text{obs}, Y \ge y_{q}] - E[Y \mid Z=0, \text{obs}]

    (Lee 2009, Proposition 1a); symmetrically when the control arm is better
    observed. Here the empirical distribution is trimmed by exactly the share
    :math:`q`, the boundary value entering with a fractional weight. When
    :math:`p_1 = p_0` both bounds equal the difference in observed means.
    Standard errors: Lee (2009, Proposition 3); see :func:`_lee_std_errors`
    (None when an arm has fewer than two observed outcomes).
    """
    arms = _check_outcome(y, z, observed)
    if block is None:
        return _lee(arms).to_dict()
    zb = _check_assignment(z)
    yv = np.asarray(y, dtype=float)
    obs = ~np.isnan(yv) if observed is None else np.asarray(observed).astype(bool)
    return _lee_blocked(yv, zb, obs, block).to_dict()


def _manski(arms: _ArmOutcomes, low: float, high: float) -> EffectBounds:
    share1, share0 = arms.y1.size / arms.n1, arms.y0.size / arms.n0
    sum1, sum0 = float(arms.y1.sum()), float(arms.y0.sum())
    # E[Y(a)] lies in [sum_a/n_a + (1 - p_a) low, sum_a/n_a + (1 - p_a) high]
    lo1, hi1 = sum1 / arms.n1 + (1 - share1) * low, sum1 / arms.n1 + (1 - share1) * high
    lo0, hi0 = sum0 / arms.n0 + (1 - share0) * low, sum0 / arms.n0 + (1 - share0) * high
    return EffectBounds(method="manski", lower=_num(lo1 - hi0), upper=_num(hi1 - lo0),
                        observed_share_treated=share1, observed_share_control=share0,
                        low=float(low), high=float(high))


def _check_range(low, high) -> tuple[float, float]:
    try:
        lo, hi = float(low), float(high)
    except (TypeError, ValueError) as err:
        raise UsageError(f"`low` and `high` must be numbers; got {low!r} and {high!r}") from err
    if not (np.isfinite(lo) and np.isfinite(hi) and lo < hi):
        raise UsageError(f"`low` must be finite and below `high`; got low={lo!r}, high={hi!r}")
    return lo, hi


def manski_bounds(y, z, observed, low: float, high: float) -> dict:
    r"""Manski (1990) worst-case bounds on the average treatment effect.

    Parameters
    ----------
    y, z, observed
        As in :func:`lee_bounds` (``observed`` may be None for ``~isnan(y)``).
    low, high : float
        The outcome's logical range (``OutcomeSpec.range``); observed values
        outside it are a :class:`~report_kit.errors.DataError`.

    Returns
    -------
    dict
        ``method="manski", lower, upper, observed_share_treated,
        observed_share_control, low, high``.

    Notes
    -----
    With observed share :math:`p_a` and observed mean :math:`\bar y_a` in arm
    :math:`a`, the mean of :math:`Y(a)` lies in
    :math:`[p_a \bar y_a + (1-p_a)\,low,\; p_a \bar y_a + (1-p_a)\,high]`
    (Manski 1990; Horowitz & Manski 2000), so

    .. math:: \tau \in [L_1 - H_0,\; H_1 - L_0].

    No assumption about why outcomes are missing is needed; the width is
    :math:`(high - low)(2 - p_1 - p_0)`.
    """
    lo, hi = _check_range(low, high)
    arms = _check_outcome(y, z, observed)
    for label, vals in (("treated", arms.y1), ("control", arms.y0)):
        if vals.size and (vals.min() < lo or vals.max() > hi):
            raise DataError(
                f"observed {label} outcomes must lie in the declared range [{lo}, {hi}]; "
                f"got values from {vals.min()} to {vals.max()}"
            )
    return _manski(arms, lo, hi).to_dict()


# ---------------------------------------------------------------------------
# differential attrition test
# ---------------------------------------------------------------------------


@dataclass(frozen=True, kw_only=True)
class AttritionTest:
    """Attrition rates by arm and the randomization test of their difference, per indicator."""

    labels: tuple[str, ...]
    missing_treated: tuple[int, ...]
    missing_control: tuple[int, ...]
    rate_treated: tuple[float, ...]
    rate_control: tuple[float, ...]
    p_value: tuple[float, ...]
    mc_std_error: tuple[float, ...] | None
    method: str
    draws: int

    def rows(self) -> list[dict]:
        """One dict per indicator: the ``per_outcome`` entries of ``results.json``."""
        out = []
        for i, label in enumerate(self.labels):
            out.append({
                "outcome": label,
                "missing_treated": self.missing_treated[i],
                "missing_control": self.missing_control[i],
                "rate_treated": self.rate_treated[i],
                "rate_control": self.rate_control[i],
                "difference": self.rate_treated[i] - self.rate_control[i],
                "p_value": self.p_value[i],
                "method": self.method,
                "draws": self.draws,
                "mc_std_error": None if self.mc_std_error is None else self.mc_std_error[i],
            })
        return out

    def to_dict(self) -> dict:
        return {"per_outcome": self.rows()}


def attrition_statistic(R: np.ndarray) -> Callable[[np.ndarray], np.ndarray]:
    """Per-assignment statistic for the engine: ``|r1 - r0|`` for each indicator column of ``R`` (n, q).

    Maps a float block of assignments ``(rows, n)`` to ``(rows, q)``; NaN for
    an assignment with an empty arm (undefined; the engine sets it aside).
    """
    R = np.asarray(R, dtype=float)
    n = R.shape[0]
    total = R.sum(axis=0)

    def statistic(block: np.ndarray) -> np.ndarray:
        c1 = block @ R
        n1 = block.sum(axis=1)[:, None]
        with np.errstate(divide="ignore", invalid="ignore"):
            gap = np.abs(c1 / n1 - (total - c1) / (n - n1))
        return np.where((n1 > 0) & (n1 < n), gap, np.nan)
    return statistic


def attrition_test(missing, z, chunks: ChunkSource, method: str,
                   labels: Sequence[str] | None = None, *,
                   weights: WeightFn | None = None) -> AttritionTest:
    r"""Randomization test of differential attrition for one or more missingness indicators.

    Parameters
    ----------
    missing : array_like, shape (n,) or (n, q)
        1 where the outcome is missing (attrited), 0 where observed.
    z : array_like, shape (n,)
        Observed assignment (0/1).
    chunks : iterable or callable
        Assignment draws under the real mechanism (see :mod:`report_kit.checks.balance`).
    method : {'exact', 'monte_carlo'}
        How the draws were produced.
    labels : sequence of str, optional
        One label per indicator.
    weights : callable, optional
        ``chunk -> probabilities or None`` for exact enumerations whose
        assignments are not equally likely (see :mod:`report_kit.checks.balance`).

    Notes
    -----
    The statistic is :math:`T = |r_1 - r_0|`, the absolute difference of the
    attrition rates by arm. Under the sharp null that assignment changes no
    unit's missingness, the indicators are fixed and :math:`T` is recomputed
    for every drawn assignment (Fisher 1935; Imbens & Rubin 2015, ch. 5).
    The p-value is the share of draws with :math:`T` at least the observed
    value (exact) or :math:`(1 + \#)/(1 + D)` (Monte Carlo, the +1 rule).
    Under complete randomization with exact enumeration this is the
    two-sided hypergeometric test ordered by distance from the mean.
    """
    zb = _check_assignment(z)
    check_choice("method", method, METHODS)
    R, labels = _check_indicators(missing, zb, labels)
    draws = StoredDraws.from_arrays(chunks, zb.size, method, weights)
    return _test_from_draws(R, zb, labels, drawn_statistics(draws, [attrition_statistic(R)], zb)[0])


def _check_indicators(missing, zb: np.ndarray, labels) -> tuple[np.ndarray, tuple[str, ...]]:
    R = np.asarray(missing, dtype=float)
    if R.ndim == 1:
        R = R[:, None]
    if R.ndim != 2 or R.shape[0] != zb.size or not np.isin(R, (0, 1)).all():
        raise DataError(
            f"`missing` must be 0/1 with shape (n,) or (n, q), n = {zb.size}; got {np.shape(missing)}"
        )
    labels = tuple(labels) if labels is not None else tuple(f"indicator {j + 1}" for j in range(R.shape[1]))
    if len(labels) != R.shape[1]:
        raise UsageError(f"`labels` must have {R.shape[1]} entries; got {len(labels)}")
    return R, labels


def _test_from_draws(R: np.ndarray, zb: np.ndarray, labels, drawn: DrawnStatistics) -> AttritionTest:
    p, se, defined = drawn.p_values()
    m1, m0 = R[zb].sum(axis=0), R[~zb].sum(axis=0)
    return AttritionTest(
        labels=labels,
        missing_treated=tuple(int(v) for v in m1),
        missing_control=tuple(int(v) for v in m0),
        rate_treated=tuple(float(v) for v in m1 / zb.sum()),
        rate_control=tuple(float(v) for v in m0 / (~zb).sum()),
        p_value=tuple(_num(v) for v in p),
        mc_std_error=None if drawn.method == "exact" else tuple(_num(v) for v in se),
        method=drawn.method,
        draws=int(defined[0]),
    )


# ---------------------------------------------------------------------------
# study-level entry point
# ---------------------------------------------------------------------------


def _overall_columns(outcomes) -> tuple[str, ...]:
    primary = tuple(o.column for o in outcomes if o.family == "primary")
    return primary or tuple(o.column for o in outcomes)


def _outcome_bounds(study, spec, zb: np.ndarray, notes: list[str]) -> list[dict]:
    y = study.outcome(spec.column)
    arms = _check_outcome(y, zb.astype(int), None)
    entries = []
    observed = ~np.isnan(y)
    if observed.all():
        notes.append(f"No Lee bounds for {spec.column!r}: no outcome is missing, so there is "
                     "nothing to trim and the bounds would equal the estimate.")
    else:
        block = study.block if study.spec.design.block is not None else None
        lee = _lee(arms) if block is None else _lee_blocked(y, zb, observed, block)
        se_lower, se_upper = lee.std_error_lower, lee.std_error_upper
        if study.spec.design.cluster is not None:
            se_lower = se_upper = None
            notes.append(f"Lee bounds for {spec.column!r} have no standard errors: the formula of "
                         "Lee (2009) treats units as independent, which a cluster design is not.")
        entries.append({"outcome": spec.column, "method": "lee", "lower": lee.lower,
                        "upper": lee.upper, "std_error_lower": se_lower,
                        "std_error_upper": se_upper, "trimmed_arm": lee.trimmed_arm,
                        "n_blocks": lee.n_blocks})
    if spec.range is not None:
        lo, hi = _check_range(*spec.range)
        obs = y[~np.isnan(y)]
        if obs.size and (obs.min() < lo or obs.max() > hi):
            raise DataError(
                f"outcome {spec.column!r} has observed values outside its declared range "
                f"[{lo}, {hi}] (from {obs.min()} to {obs.max()})"
            )
        manski = _manski(arms, lo, hi)
        entries.append({"outcome": spec.column, "method": "manski",
                        "lower": manski.lower, "upper": manski.upper})
    return entries


@dataclass(frozen=True, kw_only=True, eq=False)
class AttritionCheck:
    """A study's attrition section waiting for the engine's draws of its statistic.

    ``statistic`` is handed to the engine's shared pass; :meth:`section`
    builds the ``results.json`` entry from what the pass drew.
    """

    indicators: np.ndarray
    labels: tuple[str, ...]
    assignment: np.ndarray
    overall_columns: tuple[str, ...]
    bounds: list
    bounds_notes: list

    @property
    def statistic(self) -> Callable[[np.ndarray], np.ndarray]:
        return attrition_statistic(self.indicators)

    def section(self, drawn: DrawnStatistics) -> dict:
        """The attrition section of ``results.json`` (see :func:`study_attrition`)."""
        rows = _test_from_draws(self.indicators, self.assignment, self.labels, drawn).rows()
        head = rows[0]
        return {
            "rate_treated": head["rate_treated"],
            "rate_control": head["rate_control"],
            "p_value": head["p_value"],
            "method": drawn.method,
            "draws": head["draws"],
            "mc_std_error": head["mc_std_error"],
            "attrited_if_missing": list(self.overall_columns),
            "bounds": self.bounds,
            "bounds_notes": self.bounds_notes,
            "per_outcome": rows[1:],
        }


def study_attrition_check(study) -> AttritionCheck:
    """The study's missingness indicators (overall first, then one per outcome) and its bounds."""
    zb = _check_assignment(study.z)
    outcomes = study.spec.outcomes
    missing = np.column_stack([np.isnan(study.outcome(o.column)) for o in outcomes]).astype(float)
    overall_cols = _overall_columns(outcomes)
    idx = [i for i, o in enumerate(outcomes) if o.column in overall_cols]
    overall = missing[:, idx].max(axis=1)
    notes: list[str] = []
    bounds = [entry for o in outcomes for entry in _outcome_bounds(study, o, zb, notes)]
    return AttritionCheck(indicators=np.column_stack([overall, missing]),
                          labels=("overall",) + tuple(o.column for o in outcomes),
                          assignment=zb, overall_columns=overall_cols, bounds=bounds, bounds_notes=notes)


def study_attrition(study, chunks_factory: Callable[[], Iterable[np.ndarray]], method: str,
                    *, weights: WeightFn | None = None) -> dict:
    """Attrition section of ``results.json``.

    Returns
    -------
    dict
        ``rate_treated, rate_control, p_value, method, draws, mc_std_error``
        for the overall indicator (a unit is attrited when any primary outcome
        is missing; any outcome when the spec has no primary outcome; the
        columns used are listed in ``attrited_if_missing``), ``bounds`` (Lee
        bounds, with standard errors and computed within blocks in blocked
        designs, for every outcome with a missing value; Manski bounds for
        outcomes with a declared ``range``), ``bounds_notes`` (a sentence for
        each outcome whose Lee bounds are omitted because nothing is missing,
        or have no standard errors because the design is clustered) and ``per_outcome`` (rates and test per outcome; see
        :meth:`AttritionTest.rows`).

    ``chunks_factory()`` returns a fresh iterator of assignment chunks drawn
    under the study's mechanism; all indicators share one pass over the draws.
    ``weights`` as in :func:`attrition_test`. (The analysis itself uses
    :func:`study_attrition_check` on the engine's shared pass.)
    """
    check_choice("method", method, METHODS)
    check = study_attrition_check(study)
    draws = StoredDraws.from_arrays(chunks_factory, check.assignment.size, method, weights)
    return check.section(drawn_statistics(draws, [check.statistic], check.assignment)[0])
