"""Test statistics of the randomization tests, vectorised over assignments.

Owns the statistic kernels: given outcomes ``Y`` (n x m, NaN = missing) and
a mechanism, each builds a function from a block of assignments ``(B, n)`` to
statistics ``(B, m)`` - difference in means (block-weighted), studentized
difference in means, Wilcoxon rank sum (aligned ranks within blocks) and the
Kolmogorov-Smirnov distance - plus the null expectations known in closed
form. Used by :mod:`report_kit.inference.engine`; definitions also in
``docs/methods/randomization.md``.
"""

from __future__ import annotations

import contextlib
import threading
from collections.abc import Callable, Iterator

import numpy as np
from scipy import sparse
from scipy.stats import rankdata
from threadpoolctl import ThreadpoolController

from report_kit.design.mechanism import Mechanism

Kernel = Callable[[np.ndarray], np.ndarray]


# =========================================================================== BLAS on one thread

_BLAS_LOCK = threading.Lock()
_BLAS_STATE: dict = {"controller": None, "users": 0, "limiter": None}


@contextlib.contextmanager
def one_blas_thread() -> Iterator[None]:
    """Run the body with BLAS on one thread; the process's own setting comes back when the last user leaves.

    Every matrix product of the engine (the draws' sums, the kernels' totals)
    runs inside it, so it gets the same bits in any process whatever BLAS
    thread count the process started with (a product of a large matrix on two
    BLAS threads sums in another order). Threads of one process share the
    limit: the first to enter sets it, the last to leave restores it, so
    concurrent chunks (a Dask cluster of threads) never leave the process at a
    changed setting. The controller that finds the loaded BLAS libraries
    (reading /proc) is made once per process.
    """
    with _BLAS_LOCK:
        if _BLAS_STATE["controller"] is None:
            _BLAS_STATE["controller"] = ThreadpoolController()
        if _BLAS_STATE["users"] == 0:
            _BLAS_STATE["limiter"] = _BLAS_STATE["controller"].limit(limits=1, user_api="blas")
        _BLAS_STATE["users"] += 1
    try:
        yield
    finally:
        with _BLAS_LOCK:
            _BLAS_STATE["users"] -= 1
            if _BLAS_STATE["users"] == 0:
                _BLAS_STATE["limiter"].restore_original_limits()
                _BLAS_STATE["limiter"] = None


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
        with one_blas_thread():
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
