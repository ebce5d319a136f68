"""Bounds on the average effect when outcomes are missing: Lee (2009) trimming and Manski (1990) worst case.

Owns the bounds only; attrition rates and the test of differential attrition
are in :mod:`report_kit.checks.attrition`, which reports these bounds per
outcome. Definitions and sources in ``docs/methods/checks.md``.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass

import numpy as np

from report_kit.checks.balance import _check_assignment, _num
from report_kit.errors import DataError, ReportKitWarning
from report_kit.validate import Record

__all__ = ["EffectBounds", "LeeBounds", "lee_bounds", "manski_bounds"]


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
class EffectBounds(Record):
    """Bounds on an average effect; ``to_dict`` gives the ``results.json`` entry plus details.

    Stored keys: the bounds and the observed shares, then ``low, high`` (the
    declared outcome range) for Manski bounds; :class:`LeeBounds` stores its
    trimming details instead.
    """

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

    record_keys = ("method", "lower", "upper", "observed_share_treated", "observed_share_control", "low", "high")


@dataclass(frozen=True, kw_only=True)
class LeeBounds(EffectBounds):
    """Lee (2009) trimming bounds: the trimmed arm and share, standard errors and blocks used."""

    record_keys = ("method", "lower", "upper", "observed_share_treated", "observed_share_control",
                   "trimmed_arm", "trim_share", "std_error_lower", "std_error_upper", "n_blocks")


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
        return LeeBounds(method="lee", lower=None, upper=None,
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
    return LeeBounds(method="lee", lower=_num(lower), upper=_num(upper),
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
        raise ValueError(f"`block` must have one label per unit ({zb.size}); got shape {labels.shape}")
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
        return LeeBounds(method="lee", lower=None, upper=None, observed_share_treated=share1,
                            observed_share_control=share0, n_blocks=0)
    w = np.asarray(weights, dtype=float) / sum(weights)
    arms_trimmed = {p.trimmed_arm for p in parts if p.trimmed_arm is not None}
    se = [[p.std_error_lower for p in parts], [p.std_error_upper for p in parts]]
    std_errors = [None if any(v is None for v in col) else float(np.sqrt(np.dot(w ** 2, np.square(col))))
                  for col in se]
    return LeeBounds(
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
        raise ValueError(f"`low` and `high` must be numbers; got {low!r} and {high!r}") from err
    if not (np.isfinite(lo) and np.isfinite(hi) and lo < hi):
        raise ValueError(f"`low` must be finite and below `high`; got low={lo!r}, high={hi!r}")
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
