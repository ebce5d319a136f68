"""Confidence intervals by inverting randomization tests, and the Hodges-Lehmann estimate.

Owns :func:`invert_test` and its result :class:`Interval`: the set of
constant additive effects ``tau0`` whose sharp null is not rejected, found by
bracketing and bisection on common random numbers (one pass over the draws
for the difference in means, by linearity; the statistic recomputed for each
``tau0`` otherwise), and the Hodges-Lehmann estimate. Built on
:mod:`report_kit.inference.engine`; also importable from
:mod:`report_kit.inference.randomization`. Definitions: ``docs/methods/randomization.md``.
"""

from __future__ import annotations

import math
import warnings
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

from report_kit.inference.engine import (
    ALTERNATIVES,
    STATISTICS,
    ChunkMap,
    MechanismDraws,
    NullDistribution,
    _check_choice,
    _check_outcomes,
    _check_rtol,
    _check_source,
    _num,
    _Request,
    _run,
)
from report_kit.design.mechanism import AssignmentSource, Mechanism
from report_kit.errors import DataError, ReportKitWarning
from report_kit.inference.pvalues import DEFAULT_RTOL, null_centre, tail_p_values
from report_kit.validate import Record, open_unit_interval

__all__ = ["Interval", "invert_test"]

_MAX_DOUBLINGS = 64
_BISECTIONS = 60
_CACHE_CELLS = 1 << 26


# =========================================================================== intervals


@dataclass(frozen=True, kw_only=True)
class Interval(Record):
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


class _LinearInversion:
    """p-value of the sharp null ``tau`` for the difference in means, in ``O(B)`` 1-D operations per ``tau``.

    The (block-weighted) difference in means is linear in the outcomes for a
    fixed assignment, so ``T_b(tau) = A_b - tau C_b`` and ``t(tau) = a - tau c``
    with ``A_b``, ``a`` the statistic of ``Y`` and ``C_b``, ``c`` that of
    ``Z_obs`` (masked like ``Y``), under draw ``b`` and the observed assignment.
    The same draws serve every ``tau`` (common random numbers); ``A`` and ``C``
    are kept as contiguous vectors and each ``tau`` costs a few vector
    operations (no matrix product), with the engine's tie, centre and p-value
    rules.
    """

    def __init__(self, dist: NullDistribution, rtol: float, zero_centre: bool):
        self.a, self.c = (float(v) for v in dist.observed)
        valid = np.isfinite(dist.null[:, 0])
        self.A = np.ascontiguousarray(dist.null[valid, 0])
        self.C = np.ascontiguousarray(dist.null[valid, 1])
        self.w = None if dist.weights is None else dist.weights[valid]
        self.method, self.rtol, self.zero_centre = dist.method, rtol, zero_centre

    def centre(self, tau: float) -> float:
        """Null centre at ``tau``: 0 when known, else :func:`~report_kit.inference.pvalues.null_centre`."""
        if self.zero_centre:
            return 0.0
        return null_centre(self.a - tau * self.c, self.A - tau * self.C, self.w, self.method)

    def p(self, tau: float, alternative: str) -> float:
        values = self.A - tau * self.C
        obs = self.a - tau * self.c
        centre = self.centre(tau)
        tol = self.rtol * max(abs(obs), float(np.abs(values).max(initial=0.0)), abs(centre))
        if alternative == "less":
            obs, values = -obs, -values
        elif alternative == "two-sided":
            obs, values = abs(obs - centre), np.abs(values - centre)
        p, _, _ = tail_p_values(np.array([obs]), values[:, None], method=self.method,
                                tolerance=np.array([tol]), weights=self.w)
        return float(p[0])

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
        draws = MechanismDraws(source)
        self.source = draws.stored() if source.draws * mechanism.n <= _CACHE_CELLS else draws
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
                rtol: float = DEFAULT_RTOL, chunk_map: ChunkMap | None = None) -> Interval:
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
    ``chunk_map`` runs the chunks of the ``mean_difference`` pass (e.g. on Dask
    workers); results do not depend on it.
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
                    mechanism, source, 0.0, chunk_map=chunk_map)[0]
        inv = _LinearInversion(dist, rtol, mechanism.fixed_arms_within_blocks)
        return _interval(inv, inv.hodges_lehmann(), inv.scale(), alternative, level, outcome)
    gen = _GenericInversion(y, mechanism, source, statistic, rtol)
    start = _plain_difference(y[:, 0], mechanism.z)
    scale = gen.scale()
    return _interval(gen, gen.hodges_lehmann(start, scale), scale, alternative, level, outcome)


def _check_level(level) -> float:
    open_unit_interval("level", level)
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
