"""Fisher randomization inference: null distributions, p-values and test-inversion intervals.

Owns the randomization tests of report-kit. Given outcomes ``Y`` (n units x m
outcomes, NaN = missing), an assignment :class:`~report_kit.designs.Mechanism`
and an :class:`~report_kit.designs.AssignmentSource` (every assignment, or
seeded random ones), it computes a test statistic for the observed assignment
and for every assignment of the source, all outcomes at once, chunk by chunk:

* :func:`null_distribution` - observed statistics ``(m,)`` and null statistics ``(B, m)``;
* :func:`randomization_test` - p-values (exact or Monte Carlo) as :class:`TestResult`;
* :func:`invert_test` - confidence interval by test inversion and the
  Hodges-Lehmann estimate, as :class:`Interval`;
* :func:`study_randomization` - everything above for a validated
  :class:`~report_kit.model.Study`, on one shared set of draws.

Definitions (statistics, sharp null, p-value rules, tie tolerance, centre of
the two-sided rule) are in the docstrings below and in
``docs/methods/randomization.md``.
"""

from __future__ import annotations

import logging
import math
import warnings
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from decimal import Decimal

import numpy as np
from scipy import sparse
from scipy.stats import rankdata

from .designs import AssignmentSource, Mechanism, mechanism_from_arrays
from .errors import DataError, ReportKitWarning, UsageError

__all__ = [
    "ALTERNATIVES",
    "DEFAULT_RTOL",
    "STATISTICS",
    "Interval",
    "JointNull",
    "NullDistribution",
    "StudyRandomization",
    "TestResult",
    "invert_test",
    "null_distribution",
    "randomization_test",
    "study_randomization",
]

logger = logging.getLogger(__name__)

STATISTICS = ("mean_difference", "rank_sum", "studentized", "ks")
ALTERNATIVES = ("two-sided", "greater", "less")
#: Relative tolerance under which two statistics count as tied (see :func:`_tolerance`).
DEFAULT_RTOL = 1e-12
_MAX_DOUBLINGS = 64
_BISECTIONS = 60
_CACHE_CELLS = 1 << 26

Kernel = Callable[[np.ndarray], np.ndarray]


# =========================================================================== validation


def _braces(choices) -> str:
    """``{'a', 'b'}`` in the given order (a set's repr would vary between runs)."""
    return "{" + ", ".join(repr(c) for c in choices) + "}"


def _check_choice(name: str, value, choices: Sequence[str]) -> str:
    if not isinstance(value, str) or value not in choices:
        raise UsageError(f"`{name}` must be one of {_braces(choices)}; got {value!r}")
    return value


def _check_outcomes(y, n: int) -> np.ndarray:
    try:
        arr = np.asarray(y, dtype=np.float64)
    except (TypeError, ValueError) as err:
        raise DataError("outcomes must be numeric (NaN for missing)") from err
    if arr.ndim == 1:
        arr = arr[:, None]
    if arr.ndim != 2 or arr.shape[0] != n:
        raise DataError(f"outcomes must have shape (n, m) with n = {n} units; got {np.shape(y)}")
    if np.any(np.isinf(arr)):
        raise DataError("outcomes must be finite or NaN (missing); found an infinite value")
    return arr


def _check_null_effect(value) -> float:
    try:
        tau = float(value)
    except (TypeError, ValueError) as err:
        raise UsageError(f"`null_effect` must be a finite number; got {value!r}") from err
    if not math.isfinite(tau):
        raise UsageError(f"`null_effect` must be a finite number; got {value!r}")
    return tau


def _check_alternatives(alternative, m: int) -> tuple[str, ...]:
    if isinstance(alternative, str):
        return (_check_choice("alternative", alternative, ALTERNATIVES),) * m
    alts = tuple(alternative)
    if len(alts) != m:
        raise UsageError(f"`alternative` must be one string or one per outcome ({m}); got {len(alts)}")
    return tuple(_check_choice("alternative", a, ALTERNATIVES) for a in alts)


def _check_names(outcomes, m: int) -> tuple[str, ...]:
    if outcomes is None:
        return tuple(f"y{j}" for j in range(m))
    names = tuple(str(o) for o in outcomes)
    if len(names) != m:
        raise UsageError(f"`outcomes` must name each of the {m} outcome columns; got {len(names)}")
    return names


def _check_source(source, mechanism: Mechanism) -> AssignmentSource:
    if not isinstance(source, AssignmentSource):
        raise UsageError(f"`source` must be an AssignmentSource (Mechanism.assignments); got {type(source).__name__}")
    if source.mechanism is not mechanism:
        raise UsageError("`source` was built from a different mechanism than the one given")
    return source


def _check_rtol(rtol) -> float:
    if not isinstance(rtol, (int, float)) or not 0.0 <= float(rtol) < 1e-3:
        raise UsageError(f"`rtol` must be a number in [0, 0.001); got {rtol!r}")
    return float(rtol)


# =========================================================================== statistics


class _BlockSums:
    """``sum_{i in block b} Z_i X_ic`` for every draw, block and column, in one product.

    Unblocked designs use a dense matrix product ``Z @ X``; blocked designs a
    sparse ``Z @ W`` with ``W[i, b(i) * c + col] = X[i, col]``.
    """

    def __init__(self, mechanism: Mechanism, x: np.ndarray):
        self.blocks = mechanism.n_blocks
        self.cols = x.shape[1]
        if self.blocks == 1:
            self.matrix = np.ascontiguousarray(x)
        else:
            n, c = x.shape
            rows = np.repeat(np.arange(n), c)
            cols = (mechanism.unit_block[:, None] * c + np.arange(c)[None, :]).ravel()
            self.matrix = sparse.csr_array((x.ravel(), (rows, cols)), shape=(n, self.blocks * c))
        self.totals = self(np.ones((1, x.shape[0])))[0]

    def __call__(self, zf: np.ndarray) -> np.ndarray:
        out = zf @ self.matrix
        return np.asarray(out).reshape(zf.shape[0], self.blocks, self.cols)


def _mask_columns(y: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Zero-filled outcomes, distinct non-missing masks (as float) and each column's mask index."""
    present = ~np.isnan(y)
    seen: dict[bytes, int] = {}
    which = np.array([seen.setdefault(present[:, j].tobytes(), len(seen)) for j in range(y.shape[1])],
                     dtype=np.intp)
    first = [int(np.flatnonzero(which == k)[0]) for k in range(len(seen))]
    return np.where(present, y, 0.0), present[:, first].astype(np.float64), which


def _block_difference(s1, n1, s0, n0, weight):
    """Block-weighted difference in means and the per-block pieces.

    ``T = sum_b w_b (S1_b / N1_b - S0_b / N0_b) / sum_b w_b`` over the blocks
    where both arms have a non-missing outcome, with ``w_b`` the number of
    units with a non-missing outcome in block ``b`` (Imbens & Rubin 2015,
    ch. 9); a single block gives the plain difference in means.
    """
    with np.errstate(divide="ignore", invalid="ignore"):
        diff = s1 / n1 - s0 / n0
    valid = (n1 > 0) & (n0 > 0)
    w = np.where(valid, weight, 0.0)
    total = w.sum(axis=1)
    with np.errstate(divide="ignore", invalid="ignore"):
        t = (w * np.where(valid, diff, 0.0)).sum(axis=1) / total
    return np.where(total > 0, t, np.nan), diff, valid, w, total


def _kernel_mean_difference(y: np.ndarray, mechanism: Mechanism, direction: str | None) -> Kernel:
    """Difference in means, treated minus control; block-weighted for blocked designs.

    For draw ``Z`` and outcome ``j`` (units with missing ``Y_ij`` left out):
    ``T = sum_b w_b (mean(Y | Z=1, b) - mean(Y | Z=0, b)) / sum_b w_b`` with
    ``w_b`` the number of units with a non-missing outcome in block ``b``
    (one block when unblocked). Undefined (NaN) when no block has both arms.
    """
    yz, masks, which = _mask_columns(y)
    m = y.shape[1]
    sums = _BlockSums(mechanism, np.hstack([yz, masks]))
    tot_s, tot_n = sums.totals[:, :m], sums.totals[:, m:][:, which]

    def kernel(zf: np.ndarray) -> np.ndarray:
        r = sums(zf)
        s1, n1 = r[:, :, :m], r[:, :, m:][:, :, which]
        return _block_difference(s1, n1, tot_s - s1, tot_n - n1, tot_n)[0]

    return kernel


def _kernel_studentized(y: np.ndarray, mechanism: Mechanism, direction: str | None) -> Kernel:
    """Difference in means over its Neyman standard error.

    ``T = D / sqrt(V)`` with ``D`` the (block-weighted) difference in means and
    ``V = sum_b (w_b / W)^2 (s1_b^2 / N1_b + s0_b^2 / N0_b)`` (Neyman 1923;
    sample variances with divisor ``N - 1``). For matched pairs
    ``V = sum_p (d_p - D)^2 / (P (P - 1))`` over the ``P`` pairs with both
    outcomes (Imai 2008). Undefined (NaN) when an arm of a used block has
    fewer than two units, fewer than two pairs remain, or ``V = 0``.
    Studentizing keeps the test asymptotically valid for the weak null of a
    zero average effect (Wu & Ding 2021).
    """
    present = ~np.isnan(y)
    counts = present.sum(axis=0)
    centre = np.where(present, y, 0.0).sum(axis=0) / np.maximum(counts, 1)
    yc = np.where(present, y - centre, np.nan)
    yz, masks, which = _mask_columns(yc)
    m = y.shape[1]
    sums = _BlockSums(mechanism, np.hstack([yz, yz * yz, masks]))
    tot = sums.totals
    paired = mechanism.kind == "matched_pairs"

    def kernel(zf: np.ndarray) -> np.ndarray:
        r = sums(zf)
        s1, q1, n1 = r[:, :, :m], r[:, :, m:2 * m], r[:, :, 2 * m:][:, :, which]
        s0, q0, n0 = tot[:, :m] - s1, tot[:, m:2 * m] - q1, tot[:, 2 * m:][:, which] - n1
        d, diff, valid, w, total = _block_difference(s1, n1, s0, n0, tot[:, 2 * m:][:, which])
        with np.errstate(divide="ignore", invalid="ignore"):
            if paired:
                pairs = valid.sum(axis=1)
                dev = np.where(valid, diff - d[:, None, :], 0.0)
                var = (dev * dev).sum(axis=1) / (pairs * (pairs - 1.0))
            else:
                v1 = (q1 - s1 * s1 / n1) / (n1 - 1.0)
                v0 = (q0 - s0 * s0 / n0) / (n0 - 1.0)
                piece = (w / total[:, None, :]) ** 2 * (v1 / n1 + v0 / n0)
                bad = valid & ((n1 < 2) | (n0 < 2))
                var = np.where(bad.any(axis=1), np.nan, np.where(valid, piece, 0.0).sum(axis=1))
            t = d / np.sqrt(var)
            return np.where(np.isfinite(t) & (var > 0), t, np.nan)

    return kernel


def _rank_scores(y: np.ndarray, mechanism: Mechanism) -> np.ndarray:
    """Mid-ranks of each outcome among its non-missing units (0 for missing).

    For blocked designs the outcomes are first aligned by subtracting their
    block mean (aligned ranks; Hodges & Lehmann 1962).
    """
    present = ~np.isnan(y)
    x = y.copy()
    if mechanism.n_blocks > 1:
        b = mechanism.unit_block
        for j in range(y.shape[1]):
            ok = present[:, j]
            sums = np.bincount(b[ok], weights=y[ok, j], minlength=mechanism.n_blocks)
            counts = np.bincount(b[ok], minlength=mechanism.n_blocks)
            with np.errstate(invalid="ignore", divide="ignore"):
                x[ok, j] = y[ok, j] - (sums / counts)[b[ok]]
    scores = np.zeros_like(y)
    for j in range(y.shape[1]):
        ok = present[:, j]
        if ok.any():
            scores[ok, j] = rankdata(x[ok, j])
    return scores


def _kernel_rank_sum(y: np.ndarray, mechanism: Mechanism, direction: str | None) -> Kernel:
    """Wilcoxon rank sum: ``T = sum_i Z_i R_i`` over units with a non-missing outcome.

    ``R`` are mid-ranks among the non-missing outcomes (Wilcoxon 1945; Mann &
    Whitney 1947), of block-aligned outcomes for blocked designs (Hodges &
    Lehmann 1962). Always defined.
    """
    scores = _rank_scores(y, mechanism)
    return lambda zf: zf @ scores


def _kernel_ks(y: np.ndarray, mechanism: Mechanism, direction: str | None) -> Kernel:
    """Two-sample Kolmogorov-Smirnov distance between treated and control outcomes.

    With ``F1``, ``F0`` the empirical distribution functions of the
    non-missing outcomes of treated and control units (Smirnov 1939):
    ``two-sided``: ``sup |F1 - F0|``; ``greater`` (treated outcomes larger):
    ``sup (F0 - F1)``; ``less``: ``sup (F1 - F0)``. Blocks are ignored by the
    statistic (the null distribution still follows the design). Undefined
    (NaN) when an arm has no non-missing outcome.
    """
    sign = {"two-sided": 0, "greater": -1, "less": 1}[direction or "two-sided"]
    plans = []
    for j in range(y.shape[1]):
        ok = np.flatnonzero(~np.isnan(y[:, j]))
        order = ok[np.argsort(y[ok, j], kind="stable")]
        vals = y[order, j]
        ends = np.flatnonzero(np.append(vals[1:] != vals[:-1], True))
        plans.append((order, ends))

    def kernel(zf: np.ndarray) -> np.ndarray:
        out = np.full((zf.shape[0], len(plans)), np.nan)
        for j, (order, ends) in enumerate(plans):
            if order.size == 0:
                continue
            c1 = np.cumsum(zf[:, order], axis=1)
            n1 = c1[:, -1:]
            c0 = np.arange(1, order.size + 1)[None, :] - c1
            n0 = order.size - n1
            with np.errstate(divide="ignore", invalid="ignore"):
                gap = c1[:, ends] / n1 - c0[:, ends] / n0
            gap = np.abs(gap) if sign == 0 else sign * gap
            d = gap.max(axis=1)
            out[:, j] = np.where((n1[:, 0] > 0) & (n0[:, 0] > 0), d, np.nan)
        return out

    return kernel


_KERNELS = {
    "mean_difference": _kernel_mean_difference,
    "rank_sum": _kernel_rank_sum,
    "studentized": _kernel_studentized,
    "ks": _kernel_ks,
}


def _analytic_centre(statistic: str, y: np.ndarray, mechanism: Mechanism) -> np.ndarray:
    """Null expectation of the statistic where it is known in closed form, else NaN.

    ``mean_difference``: 0 when units are exchangeable within blocks (no
    clusters): given the counts per block every split is equally likely.
    ``rank_sum``: ``sum_i pi_i R_i`` with ``pi_i`` the unit's treatment
    probability (linearity of expectation).
    """
    m = y.shape[1]
    if statistic == "mean_difference" and mechanism.fixed_arms_within_blocks:
        return np.zeros(m)
    if statistic == "rank_sum":
        return mechanism.inclusion_probability() @ _rank_scores(y, mechanism)
    return np.full(m, np.nan)


# =========================================================================== null distribution


@dataclass(frozen=True, kw_only=True, eq=False)
class NullDistribution:
    """Randomization distribution of a statistic, for ``m`` outcomes on the same draws.

    Attributes
    ----------
    statistic : str
    direction : str or None
        ``ks`` only: which distance was computed (an alternative); ``None`` otherwise.
    null_effect : float
        Constant additive effect ``tau0`` of the sharp null.
    observed : ndarray, shape (m,)
        Statistic of the adjusted outcomes ``Y - tau0 * Z_obs`` under the observed assignment.
    null : ndarray, shape (B, m)
        The same statistic under each assignment of the source (NaN: undefined).
    centre : ndarray, shape (m,)
        Null expectation used by the two-sided rule (see :func:`null_distribution`).
    method : {"exact", "monte_carlo"}
    weights : ndarray, shape (B,), or None
        Probabilities of the enumerated assignments when they are not all equal
        (exact ``bernoulli``); ``None`` otherwise.
    """

    statistic: str
    direction: str | None
    null_effect: float
    observed: np.ndarray
    null: np.ndarray
    centre: np.ndarray
    method: str
    weights: np.ndarray | None = None

    @property
    def draws(self) -> int:
        """Number of assignments in the null distribution (rows of ``null``)."""
        return int(self.null.shape[0])

    def column(self, j: int) -> NullDistribution:
        """The distribution of outcome ``j`` alone."""
        return NullDistribution(
            statistic=self.statistic, direction=self.direction, null_effect=self.null_effect,
            observed=self.observed[j:j + 1], null=self.null[:, j:j + 1], centre=self.centre[j:j + 1],
            method=self.method, weights=self.weights,
        )

    def oriented(self, alternative, rtol: float = DEFAULT_RTOL) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Observed ``(m,)`` and null ``(B, m)`` values oriented so that larger is more extreme.

        ``greater``: ``T``; ``less``: ``-T``; ``two-sided``: ``|T - centre|``;
        ``ks``: the distance itself (it must have been computed for that
        alternative). Also returns the tie tolerance ``(m,)``:
        ``rtol * max(|t|, max_b |T_b|, |centre|)``.
        """
        alts = _check_alternatives(alternative, self.observed.size)
        rtol = _check_rtol(rtol)
        obs = self.observed.copy()
        null = self.null.copy()
        for j, alt in enumerate(alts):
            if self.statistic == "ks":
                if alt != self.direction:
                    raise UsageError(f"this ks null distribution measures the {self.direction!r} distance; "
                                     f"got alternative {alt!r}")
            elif alt == "less":
                obs[j], null[:, j] = -obs[j], -null[:, j]
            elif alt == "two-sided":
                obs[j], null[:, j] = abs(obs[j] - self.centre[j]), np.abs(null[:, j] - self.centre[j])
        return obs, null, _tolerance(self.observed, self.null, self.centre, rtol)

    def p_values(self, alternative, rtol: float = DEFAULT_RTOL) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """p-values, Monte Carlo standard errors and defined draws, each ``(m,)``.

        Exact: ``p = sum_b w_b 1{T_b >= t - tol} / sum_b w_b`` over every
        assignment with a defined statistic (``w_b`` equal unless ``weights``).
        Monte Carlo: ``p = (1 + #{T_b >= t - tol}) / (1 + B)`` (Phipson & Smyth
        2010), standard error ``sqrt(p (1 - p) / B)``, with ``T`` oriented as
        in :meth:`oriented` and ``B`` the draws with a defined statistic. NaN
        where the observed statistic is undefined; the standard error is NaN
        for exact p-values.
        """
        obs, null, tol = self.oriented(alternative, rtol)
        valid = np.isfinite(null)
        with np.errstate(invalid="ignore"):
            hit = valid & (null >= (obs - tol)[None, :])
        if self.method == "exact":
            w = np.ones(self.draws) if self.weights is None else self.weights
            with np.errstate(invalid="ignore", divide="ignore"):
                p = (w @ hit) / (w @ valid)
            se = np.full(p.shape, np.nan)
        else:
            b = valid.sum(axis=0)
            p = (1.0 + hit.sum(axis=0)) / (1.0 + b)
            with np.errstate(invalid="ignore", divide="ignore"):
                se = np.sqrt(p * (1.0 - p) / b)
        undefined = ~np.isfinite(self.observed)
        p[undefined], se[undefined] = np.nan, np.nan
        return np.minimum(p, 1.0), se, valid.sum(axis=0)

    def to_dict(self) -> dict:
        """Plain-Python form (lists; None for undefined) for plotting or archiving."""
        return {
            "statistic": self.statistic, "direction": self.direction, "null_effect": self.null_effect,
            "method": self.method, "draws": self.draws,
            "observed": [_num(v) for v in self.observed], "centre": [_num(v) for v in self.centre],
            "null": [[_num(v) for v in row] for row in self.null],
            "weights": None if self.weights is None else [float(v) for v in self.weights],
        }


def _tolerance(observed, null, centre, rtol: float) -> np.ndarray:
    """Tie tolerance per outcome: ``rtol * max(|t|, max_b |T_b|, |centre|)``.

    Statistics within this distance of the observed one count as ties (as
    extreme); it absorbs floating-point noise from summing in different
    orders without merging genuinely different values.
    """
    finite = np.where(np.isfinite(null), np.abs(null), 0.0)
    scale = np.maximum(np.nan_to_num(np.abs(observed)), finite.max(axis=0, initial=0.0))
    return rtol * np.maximum(scale, np.nan_to_num(np.abs(centre)))


def _empirical_centre(observed, null, weights, method) -> np.ndarray:
    """Mean of the null distribution: exact (weighted) mean, or the mean of the draws and the observed value.

    Including the observed value keeps the Monte Carlo two-sided statistic a
    symmetric function of the observed and drawn assignments, so the
    Phipson-Smyth p-value stays valid.
    """
    valid = np.isfinite(null)
    vals = np.where(valid, null, 0.0)
    if method == "exact":
        w = np.ones(null.shape[0]) if weights is None else weights
        with np.errstate(invalid="ignore", divide="ignore"):
            return (w @ vals) / (w @ valid)
    obs_ok = np.isfinite(observed)
    with np.errstate(invalid="ignore", divide="ignore"):
        return (vals.sum(axis=0) + np.where(obs_ok, observed, 0.0)) / (valid.sum(axis=0) + obs_ok)


@dataclass(frozen=True)
class _Request:
    statistic: str
    direction: str | None
    y: np.ndarray


def _block_rows(n: int) -> int:
    """Rows of every compute block: fixed by the number of units alone (about 4 million cells)."""
    return int(max(1, min(1024, (1 << 22) // max(n, 1))))


def _blocks(source, rows: int, n: int):
    """Re-cut the source's chunks into ``(rows, n)`` float blocks, the last one padded with zero rows.

    Every statistic is computed on blocks of one fixed shape whatever the
    source's chunk size, so floating-point results are bitwise identical for
    any chunking. Yields ``(block, used_rows)``; the block buffer is reused.
    """
    buf = np.zeros((rows, n))
    filled = 0
    for chunk in source.chunks():
        start = 0
        while start < chunk.shape[0]:
            take = min(rows - filled, chunk.shape[0] - start)
            buf[filled:filled + take] = chunk[start:start + take]
            filled += take
            start += take
            if filled == rows:
                yield buf, rows
                filled = 0
    if filled:
        buf[filled:] = 0.0
        yield buf, filled


def _source_weights(source) -> np.ndarray | None:
    if source.method != "exact" or source.mechanism.kind != "bernoulli":
        return None
    return np.concatenate([source.weights(chunk) for chunk in source.chunks()])


def _run(requests: Sequence[_Request], mechanism: Mechanism, source: AssignmentSource,
         null_effect: float) -> list[NullDistribution]:
    """Compute every requested statistic on one pass over the source's draws."""
    z = mechanism.z.astype(np.float64)
    rows = _block_rows(mechanism.n)
    adjusted = [r.y - null_effect * z[:, None] for r in requests]
    kernels = [_KERNELS[r.statistic](y, mechanism, r.direction) for r, y in zip(requests, adjusted)]
    first = np.zeros((rows, mechanism.n))
    first[0] = z
    observed = [k(first)[0] for k in kernels]
    parts: list[list[np.ndarray]] = [[] for _ in kernels]
    for block, used in _blocks(source, rows, mechanism.n):
        for out, kernel in zip(parts, kernels):
            out.append(kernel(block)[:used])
    wts = _source_weights(source)
    results = []
    for r, y, obs, out in zip(requests, adjusted, observed, parts):
        null = np.vstack(out)
        undefined = int(np.count_nonzero(~np.isfinite(null)))
        if undefined:
            logger.debug("%s: %d undefined statistic(s) among %d draws x %d outcomes set aside",
                         r.statistic, undefined, null.shape[0], null.shape[1])
        centre = _analytic_centre(r.statistic, y, mechanism)
        fill = np.isnan(centre)
        if fill.any():
            centre[fill] = _empirical_centre(obs, null, wts, source.method)[fill]
        for arr in (obs, null, centre):
            arr.setflags(write=False)
        results.append(NullDistribution(statistic=r.statistic, direction=r.direction, null_effect=null_effect,
                                        observed=obs, null=null, centre=centre, method=source.method,
                                        weights=wts))
    return results


def null_distribution(y, mechanism: Mechanism, *, statistic: str, source: AssignmentSource,
                      null_effect: float = 0.0, alternative: str = "two-sided") -> NullDistribution:
    """Randomization distribution of a statistic under the sharp null ``Y_i(1) = Y_i(0) + tau0``.

    Under the sharp null the control outcomes are known: ``Y0 = Y - tau0 *
    Z_obs`` (Fisher 1935; Imbens & Rubin 2015, ch. 5). The statistic is
    computed on ``Y0`` under the observed assignment and under every
    assignment of ``source``; all outcomes share the same draws.

    Parameters
    ----------
    y : array_like, shape (n,) or (n, m)
        Outcomes; NaN marks a missing outcome, which leaves that unit out of
        that outcome's statistic only.
    mechanism : Mechanism
    statistic : {"mean_difference", "rank_sum", "studentized", "ks"}
    source : AssignmentSource
        From ``mechanism.assignments(...)``.
    null_effect : float, default 0.0
        ``tau0``.
    alternative : str, default "two-sided"
        Only used by ``ks``, whose distance depends on the direction.

    Returns
    -------
    NullDistribution
        ``centre`` is the exact null expectation where known in closed form
        (0 for differences in means without clusters; ``sum pi_i R_i`` for rank
        sums), otherwise the mean over all assignments (exact) or over the
        draws and the observed value (Monte Carlo).
    """
    statistic = _check_choice("statistic", statistic, STATISTICS)
    alternative = _check_choice("alternative", alternative, ALTERNATIVES)
    source = _check_source(source, mechanism)
    y = _check_outcomes(y, mechanism.n)
    tau = _check_null_effect(null_effect)
    direction = alternative if statistic == "ks" else None
    return _run([_Request(statistic, direction, y)], mechanism, source, tau)[0]


# =========================================================================== tests


@dataclass(frozen=True, kw_only=True)
class TestResult:
    """One randomization test; fields are the ``tests`` entries of ``results.json``."""

    __test__ = False  # not a pytest class

    outcome: str
    statistic: str
    alternative: str
    null_effect: float
    observed: float | None
    p_value: float | None
    method: str
    draws: int
    mc_std_error: float | None

    def to_dict(self) -> dict:
        return {
            "outcome": self.outcome, "statistic": self.statistic, "alternative": self.alternative,
            "null_effect": float(self.null_effect), "observed": _num(self.observed),
            "p_value": _num(self.p_value), "method": self.method, "draws": int(self.draws),
            "mc_std_error": _num(self.mc_std_error),
        }


def _num(value) -> float | None:
    if value is None:
        return None
    value = float(value)
    return value if math.isfinite(value) else None


def _results(dist: NullDistribution, names, alternatives, rtol) -> list[TestResult]:
    p, se, defined = dist.p_values(alternatives, rtol)
    out = []
    for j, (name, alt) in enumerate(zip(names, alternatives)):
        if not np.isfinite(dist.observed[j]):
            warnings.warn(f"the {dist.statistic} statistic of outcome {name!r} is undefined for the observed "
                          "assignment (an arm without usable outcomes, or zero variance); p-value left empty",
                          ReportKitWarning, stacklevel=3)
        out.append(TestResult(outcome=name, statistic=dist.statistic, alternative=alt,
                              null_effect=dist.null_effect, observed=_num(dist.observed[j]),
                              p_value=_num(p[j]), method=dist.method, draws=int(defined[j]),
                              mc_std_error=_num(se[j])))
    return out


def randomization_test(y, mechanism: Mechanism, *, source: AssignmentSource, statistic: str = "mean_difference",
                       alternative="two-sided", null_effect: float = 0.0, outcomes=None,
                       rtol: float = DEFAULT_RTOL) -> list[TestResult]:
    """Fisher randomization test of the sharp null ``Y_i(1) = Y_i(0) + tau0`` for each outcome.

    p-values (see :meth:`NullDistribution.p_values`): exact when the source
    enumerates every assignment, ``sum 1{T_b >= t} / count``; otherwise the
    Monte Carlo ``(1 + #{T_b >= t}) / (1 + B)`` (Phipson & Smyth 2010) with its
    standard error. One-sided: ``greater`` counts ``T_b >= t``, ``less`` counts
    ``T_b <= t``; two-sided counts ``|T_b - c| >= |t - c|`` with ``c`` the null
    expectation of the statistic (the distance from the null mean). ``ks`` is
    always upper-tailed, in the distance matching the alternative. Ties are
    within ``rtol`` (relative, :func:`_tolerance`).

    Parameters
    ----------
    y : array_like, shape (n,) or (n, m)
    mechanism : Mechanism
    source : AssignmentSource
    statistic : str, default "mean_difference"
    alternative : str or sequence of str, default "two-sided"
        One for all outcomes or one per outcome.
    null_effect : float, default 0.0
    outcomes : sequence of str, optional
        Names for the ``outcome`` field (default ``y0, y1, ...``).
    rtol : float, default 1e-12

    Returns
    -------
    list of TestResult
        ``draws`` counts the assignments with a defined statistic;
        ``mc_std_error`` is ``None`` for exact p-values.
    """
    statistic = _check_choice("statistic", statistic, STATISTICS)
    source = _check_source(source, mechanism)
    y = _check_outcomes(y, mechanism.n)
    m = y.shape[1]
    alts = _check_alternatives(alternative, m)
    names = _check_names(outcomes, m)
    tau = _check_null_effect(null_effect)
    rtol = _check_rtol(rtol)
    groups = _groups(statistic, alts)
    dists = _run([_Request(statistic, d, y[:, idx]) for d, idx in groups], mechanism, source, tau)
    by_column: dict[int, TestResult] = {}
    for (direction, idx), dist in zip(groups, dists):
        res = _results(dist, [names[j] for j in idx], [alts[j] for j in idx], rtol)
        by_column.update(zip(idx, res))
    return [by_column[j] for j in range(m)]


def _groups(statistic: str, alts: Sequence[str]) -> list[tuple[str | None, list[int]]]:
    """Columns sharing one computation: all of them, or (ks) those with the same alternative."""
    if statistic != "ks":
        return [(None, list(range(len(alts))))]
    return [(a, [j for j, b in enumerate(alts) if b == a]) for a in ALTERNATIVES if a in alts]


# =========================================================================== intervals


@dataclass(frozen=True, kw_only=True)
class Interval:
    """Confidence interval by test inversion; fields are the ``intervals`` entries of ``results.json``.

    ``ci_low`` / ``ci_high`` are ``None`` when unbounded (one-sided intervals,
    or too few assignments to reject any ``tau0``).
    """

    outcome: str
    method: str
    level: float
    ci_low: float | None
    ci_high: float | None
    hodges_lehmann: float | None

    def to_dict(self) -> dict:
        return {"outcome": self.outcome, "method": self.method, "level": float(self.level),
                "ci_low": _num(self.ci_low), "ci_high": _num(self.ci_high),
                "hodges_lehmann": _num(self.hodges_lehmann)}


class _LinearInversion:
    """p-value of the sharp null ``tau`` for the difference in means, in ``O(B)`` per ``tau``.

    The (block-weighted) difference in means is linear in the outcomes for a
    fixed assignment, so ``T_b(tau) = A_b - tau C_b`` and ``t(tau) = a - tau c``
    with ``A_b``, ``a`` the statistic of ``Y`` and ``C_b``, ``c`` that of
    ``Z_obs`` (masked like ``Y``), under draw ``b`` and the observed assignment.
    The same draws serve every ``tau`` (common random numbers).
    """

    def __init__(self, dist: NullDistribution, rtol: float, zero_centre: bool):
        self.a, self.c = dist.observed
        valid = np.isfinite(dist.null[:, 0])
        self.A, self.C = dist.null[valid, 0], dist.null[valid, 1]
        self.w = None if dist.weights is None else dist.weights[valid]
        self.method, self.rtol, self.zero_centre = dist.method, rtol, zero_centre

    def centre(self, tau: float) -> float:
        if self.zero_centre:
            return 0.0
        values = self.A - tau * self.C
        obs = self.a - tau * self.c
        if self.method == "exact":
            return float(np.average(values, weights=self.w))
        return float((values.sum() + obs) / (values.size + 1))

    def p(self, tau: float, alternative: str) -> float:
        dist = NullDistribution(statistic="mean_difference", direction=None, null_effect=tau,
                                observed=np.array([self.a - tau * self.c]), null=(self.A - tau * self.C)[:, None],
                                centre=np.array([self.centre(tau)]), method=self.method, weights=self.w)
        return float(dist.p_values(alternative, self.rtol)[0][0])

    def hodges_lehmann(self) -> float | None:
        """``tau`` where ``t(tau)`` equals the null centre: ``a / c``, or ``(mean A - a) / (mean C - c)``."""
        if self.zero_centre:
            return self.a / self.c if self.c != 0 else None
        mean_a = float(np.average(self.A, weights=self.w))
        mean_c = float(np.average(self.C, weights=self.w))
        return (mean_a - self.a) / (mean_c - self.c) if mean_c != self.c else None

    def scale(self) -> float:
        spread = float(np.std(self.A)) if self.A.size > 1 else 0.0
        return spread if spread > 0 else max(abs(self.a), 1.0)


class _GenericInversion:
    """p-value of the sharp null ``tau`` by recomputing the statistic on ``Y - tau Z_obs``.

    The same assignments are reused for every ``tau`` (common random
    numbers): the source is re-iterated, or its chunks are kept in memory
    when small.
    """

    def __init__(self, y, mechanism, source, statistic, rtol):
        self.y, self.mechanism, self.statistic, self.rtol = y, mechanism, statistic, rtol
        cells = source.draws * mechanism.n
        self.source = _CachedSource(source) if cells <= _CACHE_CELLS else source
        self._memo: dict[float, NullDistribution] = {}

    def dist(self, tau: float) -> NullDistribution:
        if tau not in self._memo:
            req = _Request(self.statistic, None, self.y - tau * self.mechanism.z[:, None])
            self._memo[tau] = _run([req], self.mechanism, self.source, 0.0)[0]
        return self._memo[tau]

    def p(self, tau: float, alternative: str) -> float:
        return float(self.dist(tau).p_values(alternative, self.rtol)[0][0])

    def gap(self, tau: float) -> float:
        d = self.dist(tau)
        return float(d.observed[0] - d.centre[0])

    def hodges_lehmann(self, start: float, scale: float) -> float | None:
        """Midpoint of ``sup{tau: gap > 0}`` and ``inf{tau: gap < 0}`` (Hodges & Lehmann 1963).

        ``gap(tau)`` (observed statistic minus its null centre) decreases in ``tau``.
        """
        strict = _edge(lambda t: self.gap(t) > 0, start, scale)
        loose = _edge(lambda t: self.gap(t) >= 0, start, scale)
        if strict is None or loose is None:
            return None
        return 0.5 * (strict + loose)

    def scale(self) -> float:
        d = self.dist(0.0)
        spread = float(np.nanstd(d.null[:, 0]))
        return spread if spread > 0 else 1.0


class _CachedSource:
    """An AssignmentSource whose chunks are generated once and kept."""

    def __init__(self, source: AssignmentSource):
        self.method, self.draws, self.mechanism = source.method, source.draws, source.mechanism
        self._chunks = list(source.chunks())

    def chunks(self):
        return iter(self._chunks)

    def weights(self, chunk):
        return self.mechanism.weights(chunk) if self.method == "exact" else None


def _boundary(inside: Callable[[float], bool], start: float, scale: float, *, upward: bool) -> float | None:
    """Last ``tau`` with ``inside(tau)`` going from ``start`` (inside) upward or downward.

    Bracketing by doubling steps from ``scale``, then bisection; returns the
    inside end of the final bracket, or ``None`` when no outside point is found
    (unbounded).
    """
    sign = 1.0 if upward else -1.0
    step = scale
    last_in = start
    for _ in range(_MAX_DOUBLINGS):
        probe = start + sign * step
        if not inside(probe):
            return _bisect(inside, last_in, probe)
        last_in, step = probe, 2.0 * step
    return None


def _bisect(inside: Callable[[float], bool], good: float, bad: float) -> float:
    """Bisection between ``good`` (inside) and ``bad`` (outside); returns the inside end."""
    for _ in range(_BISECTIONS):
        mid = 0.5 * (good + bad)
        if mid in (good, bad):
            break
        if inside(mid):
            good = mid
        else:
            bad = mid
    return good


def _edge(true_below: Callable[[float], bool], start: float, scale: float) -> float | None:
    """Boundary of a predicate that holds below some ``tau`` and fails above it."""
    if true_below(start):
        return _boundary(true_below, start, scale, upward=True)
    step = scale
    for _ in range(_MAX_DOUBLINGS):
        probe = start - step
        if true_below(probe):
            return _bisect(true_below, probe, probe + step)
        step *= 2.0
    return None


def invert_test(y, mechanism: Mechanism, *, source: AssignmentSource, level: float = 0.95,
                statistic: str = "mean_difference", alternative: str = "two-sided", outcome: str = "y",
                rtol: float = DEFAULT_RTOL) -> Interval:
    """Confidence interval for a constant additive effect by inverting randomization tests.

    The interval is the set of ``tau0`` whose sharp null ``Y_i(1) = Y_i(0) +
    tau0`` is not rejected at ``alpha = 1 - level``: ``{tau0 : p(tau0) > alpha}``
    (Rosenbaum 2002, sec. 2.6; Imbens & Rubin 2015, sec. 5.7), using the
    p-value rule of :func:`randomization_test` for ``alternative`` (two-sided:
    both ends; ``greater``: a lower bound only; ``less``: an upper bound only).
    Every ``tau0`` uses the same assignments (common random numbers). Each end
    is found by bracketing (doubling steps away from the Hodges-Lehmann
    estimate) then bisection. The Hodges-Lehmann estimate is the ``tau0`` at
    which the observed statistic equals its null centre (Hodges & Lehmann
    1963); for the difference in means without clusters it is the difference
    in means itself.

    For ``mean_difference`` the p-value of any ``tau0`` is computed from one
    pass over the draws (linearity); ``rank_sum`` and ``studentized`` recompute
    the statistic for each ``tau0``. ``ks`` has no sign and is not supported.
    """
    statistic = _check_choice("statistic", statistic, STATISTICS[:3])
    alternative = _check_choice("alternative", alternative, ALTERNATIVES)
    source = _check_source(source, mechanism)
    y = _check_outcomes(y, mechanism.n)
    if y.shape[1] != 1:
        raise DataError(f"invert_test takes one outcome; got {y.shape[1]} columns")
    level = _check_level(level)
    rtol = _check_rtol(rtol)
    if statistic == "mean_difference":
        dist = _run([_Request("mean_difference", None, _with_assignment_column(y, mechanism))],
                    mechanism, source, 0.0)[0]
        inv = _LinearInversion(dist, rtol, mechanism.fixed_arms_within_blocks)
        return _interval(inv, inv.hodges_lehmann(), inv.scale(), alternative, level, outcome)
    gen = _GenericInversion(y, mechanism, source, statistic, rtol)
    start = _plain_difference(y[:, 0], mechanism.z)
    scale = gen.scale()
    return _interval(gen, gen.hodges_lehmann(start, scale), scale, alternative, level, outcome)


def _check_level(level) -> float:
    if not isinstance(level, (int, float)) or not 0.0 < float(level) < 1.0:
        raise UsageError(f"`level` must be a number strictly between 0 and 1; got {level!r}")
    return float(level)


def _with_assignment_column(y: np.ndarray, mechanism: Mechanism) -> np.ndarray:
    """``[Y, Z_obs]`` with ``Z_obs`` masked where ``Y`` is missing, for the linear inversion."""
    z = np.where(np.isnan(y[:, 0]), np.nan, mechanism.z.astype(np.float64))
    return np.column_stack([y[:, 0], z])


def _plain_difference(y: np.ndarray, z: np.ndarray) -> float:
    ok = ~np.isnan(y)
    t, c = ok & (z == 1), ok & (z == 0)
    return float(y[t].mean() - y[c].mean()) if t.any() and c.any() else 0.0


def _interval(inv, estimate: float | None, scale: float, alternative: str, level: float,
              outcome: str) -> Interval:
    alpha = 1.0 - level
    low = high = None
    if estimate is not None and math.isfinite(estimate):
        if alternative in ("two-sided", "greater"):
            low = _boundary(lambda t: inv.p(t, alternative) > alpha, estimate, scale, upward=False)
        if alternative in ("two-sided", "less"):
            high = _boundary(lambda t: inv.p(t, alternative) > alpha, estimate, scale, upward=True)
        unbounded = (alternative != "less" and low is None) or (alternative != "greater" and high is None)
        if unbounded:
            warnings.warn(f"the {level:.0%} test-inversion interval of outcome {outcome!r} is unbounded: "
                          "no effect is rejected (too few possible assignments?)", ReportKitWarning, stacklevel=3)
    return Interval(outcome=outcome, method="test_inversion", level=level, ci_low=_num(low), ci_high=_num(high),
                    hodges_lehmann=_num(estimate))


# =========================================================================== study level


@dataclass(frozen=True, kw_only=True, eq=False)
class JointNull:
    """Null statistics of several outcomes on the same draws, oriented so that larger = more extreme.

    Input for joint procedures such as Westfall-Young (1993) max-T.

    Attributes
    ----------
    outcomes : tuple of str
    observed : ndarray, shape (m,)
    null : ndarray, shape (B, m)
        Row ``b`` holds every outcome's statistic under the same assignment ``b``
        (NaN where undefined).
    tolerance : ndarray, shape (m,)
        Tie tolerance of each outcome (same rule as the p-values).
    method : {"exact", "monte_carlo"}
    weights : ndarray, shape (B,), or None
    """

    outcomes: tuple[str, ...]
    observed: np.ndarray
    null: np.ndarray
    tolerance: np.ndarray
    method: str
    weights: np.ndarray | None = None


@dataclass(frozen=True, kw_only=True, eq=False)
class StudyRandomization:
    """Randomization inference for a study: tests, intervals and the null distributions behind them.

    Attributes
    ----------
    tests : list of dict
        ``results.json`` ``tests`` entries (one per outcome, ``tau0 = 0``).
    intervals : list of dict
        ``results.json`` ``intervals`` entries (difference in means, two-sided,
        level ``1 - alpha``).
    n_assignments : str or None
        Exact number of possible assignments, as decimal digits.
    method : {"exact", "monte_carlo"}
    draws : int
        Assignments in every null distribution.
    distributions : dict of str to NullDistribution
        Per outcome column (one column each): observed and null statistics, for
        plots and joint procedures.
    alternatives : dict of str to str
    """

    tests: list
    intervals: list
    n_assignments: str | None
    method: str
    draws: int
    distributions: dict
    alternatives: dict

    def joint_null(self, outcomes: Sequence[str] | None = None, rtol: float = DEFAULT_RTOL) -> JointNull:
        """Oriented ``(B, m)`` null matrix of ``outcomes`` (default: all), each by its own alternative."""
        names = tuple(self.distributions) if outcomes is None else tuple(outcomes)
        unknown = [o for o in names if o not in self.distributions]
        if unknown:
            raise UsageError(f"`outcomes` must be among {sorted(self.distributions)}; got {unknown[0]!r}")
        cols = [self.distributions[o].oriented(self.alternatives[o], rtol) for o in names]
        first = self.distributions[names[0]] if names else None
        return JointNull(
            outcomes=names,
            observed=np.array([c[0][0] for c in cols]),
            null=np.column_stack([c[1][:, 0] for c in cols]) if cols else np.empty((self.draws, 0)),
            tolerance=np.array([c[2][0] for c in cols]),
            method=self.method,
            weights=None if first is None else first.weights,
        )

    def to_dict(self) -> dict:
        return {"tests": list(self.tests), "intervals": list(self.intervals),
                "n_assignments": self.n_assignments, "method": self.method, "draws": int(self.draws)}


def count_digits(count: int) -> str:
    """Decimal digits of a (possibly huge) integer, avoiding Python's int-to-str digit limit."""
    return str(Decimal(count))


def study_assignments(study) -> tuple[Mechanism, AssignmentSource]:
    """The study's assignment mechanism and the one set of assignments every procedure shares.

    Built from ``study.spec.design`` and the observed assignment; enumerated
    when there are at most ``analysis.max_exact`` assignments, otherwise
    ``analysis.randomizations`` draws seeded by ``analysis.seed``.
    """
    design, analysis = study.spec.design, study.spec.analysis
    mechanism = mechanism_from_arrays(
        design.mechanism, study.z, block=study.block, cluster=study.cluster,
        probability=design.probability if design.mechanism == "bernoulli" else None,
    )
    source = mechanism.assignments(max_exact=analysis.max_exact, draws=analysis.randomizations,
                                   seed=analysis.seed)
    return mechanism, source


def study_randomization(study) -> StudyRandomization:
    """Randomization tests and intervals for every outcome of a validated study.

    Builds the mechanism from ``study.spec.design`` and the study's assignment,
    blocks and clusters; draws (or enumerates) assignments once with
    ``analysis.max_exact``, ``analysis.randomizations`` and ``analysis.seed``;
    tests each outcome with its own ``statistic`` and ``alternative`` (sharp
    null of no effect) and inverts the two-sided difference-in-means test at
    level ``1 - analysis.alpha``. All outcomes use the same assignments.
    """
    spec = study.spec
    analysis = spec.analysis
    mechanism, source = study_assignments(study)
    names = [o.column for o in spec.outcomes]
    y = np.column_stack([study.outcome(c) for c in names]) if names else np.empty((mechanism.n, 0))
    stats = {o.column: o.statistic for o in spec.outcomes}
    alts = {o.column: o.alternative for o in spec.outcomes}
    requests, slots = _study_requests(y, names, stats, alts, mechanism)
    dists = _run(requests, mechanism, source, 0.0)
    per_outcome = {name: dists[r].column(j) for name, (r, j) in slots.items()}
    level = 1.0 - analysis.alpha
    tests, intervals = [], []
    for k, name in enumerate(names):
        tests.extend(t.to_dict() for t in _results(per_outcome[name], [name], [alts[name]], DEFAULT_RTOL))
        pair = NullDistribution(
            statistic="mean_difference", direction=None, null_effect=0.0,
            observed=dists[0].observed[[k, len(names) + k]], null=dists[0].null[:, [k, len(names) + k]],
            centre=dists[0].centre[[k, len(names) + k]], method=source.method, weights=dists[0].weights)
        inv = _LinearInversion(pair, DEFAULT_RTOL, mechanism.fixed_arms_within_blocks)
        intervals.append(_interval(inv, inv.hodges_lehmann(), inv.scale(), "two-sided", level, name).to_dict())
    return StudyRandomization(
        tests=tests, intervals=intervals, n_assignments=count_digits(mechanism.count()),
        method=source.method, draws=source.draws, distributions=per_outcome, alternatives=alts,
    )


def _study_requests(y, names, stats, alts, mechanism):
    """One mean-difference request on ``[Y, Z_obs masked per outcome]`` plus one per other statistic."""
    m = len(names)
    zmask = np.where(np.isnan(y), np.nan, mechanism.z.astype(np.float64)[:, None])
    requests = [_Request("mean_difference", None, np.hstack([y, zmask]))]
    slots: dict[str, tuple[int, int]] = {}
    keys: dict[tuple[str, str | None], list[int]] = {}
    for j, name in enumerate(names):
        if stats[name] == "mean_difference":
            slots[name] = (0, j)
        else:
            key = (stats[name], alts[name] if stats[name] == "ks" else None)
            keys.setdefault(key, []).append(j)
    for (stat, direction), cols in keys.items():
        requests.append(_Request(stat, direction, y[:, cols]))
        for pos, j in enumerate(cols):
            slots[names[j]] = (len(requests) - 1, pos)
    assert len(slots) == m
    return requests, slots
