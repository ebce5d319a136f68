"""Shared engine of the randomization tests (private).

Owns what :mod:`report_kit.inference.randomization` and :mod:`report_kit.inference.inversion`
both build on: argument validation, the :class:`NullDistribution` result
(orientation, tie tolerance, p-value rules) and the one pass over an
assignment source that evaluates the statistics of
:mod:`report_kit.inference.kernels` on blocks of one fixed shape.
``NullDistribution`` and the constants are public through
:mod:`report_kit.inference.randomization`; definitions in
``docs/methods/randomization.md``.
"""

from __future__ import annotations

import logging
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from report_kit.validate import finite_number
from report_kit.validate import finite_or_none as _num
from report_kit.design.mechanism import AssignmentSource, Mechanism
from report_kit.errors import DataError, UsageError
from report_kit.inference.kernels import _KERNELS, _analytic_centre

logger = logging.getLogger(__name__)

STATISTICS = ("mean_difference", "rank_sum", "studentized", "ks")
ALTERNATIVES = ("two-sided", "greater", "less")
#: Relative tolerance under which two statistics count as tied (see :func:`_tolerance`).
DEFAULT_RTOL = 1e-12


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
    return finite_number("null_effect", value)


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


