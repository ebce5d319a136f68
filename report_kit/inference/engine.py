"""The randomization engine: one pass over the draws for every procedure.

Owns HOW assignments are produced, chunked, evaluated and weighted:

* :class:`MechanismDraws` - the draws of an :class:`~report_kit.design.mechanism.AssignmentSource`
  cut into chunks of a fixed number of rows (a function of the number of
  units alone). Exact chunk ``i`` holds assignments ``i * rows`` onwards of
  the enumeration; Monte Carlo chunk ``i`` is drawn from
  ``numpy.random.SeedSequence(seed).spawn(n_chunks)[i]`` alone, so any chunk
  can be generated in any process, independently of the others;
* :class:`StoredDraws` - draws held in memory (given as arrays, or kept for
  repeated passes);
* :func:`run_pass` - ``partials = chunk_map(work, tasks)``: each task (a small
  picklable :class:`ChunkTask`) builds its chunks once, as ``uint8``, turns
  each into one float block and evaluates every registered statistic on it;
  the per-chunk statistics come back in task order;
* :class:`NullDistribution` and the study-level ``_run`` that builds the
  statistics of :mod:`report_kit.inference.kernels` plus any statistic
  registered by another part (balance, attrition).

The counting rules (ties, p-values, Monte Carlo error, undefined draws) are in
:mod:`report_kit.inference.pvalues`. ``docs/methods/randomization.md`` has the
definitions.
"""

from __future__ import annotations

import logging
import math
from collections.abc import Callable, Iterable, Iterator, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from report_kit.design.mechanism import AssignmentSource, Mechanism
from report_kit.errors import DataError
from report_kit.inference.kernels import _KERNELS, _analytic_centre, one_blas_thread
from report_kit.inference.pvalues import DEFAULT_RTOL, DrawnStatistics, null_centre, tail_p_values, tie_tolerance
from report_kit.validate import ALTERNATIVES, METHODS, STATISTICS, Record, check_choice, finite_number
from report_kit.validate import finite_or_none as _num

logger = logging.getLogger(__name__)

__all__ = [
    "ChunkMap",
    "ChunkTask",
    "MechanismDraws",
    "NullDistribution",
    "StoredDraws",
    "chunk_rows",
    "drawn_statistics",
    "observed_statistics",
    "run_pass",
    "serial_chunk_map",
]


#: ``chunk_map(fn, tasks)``: apply ``fn`` to every task and return the results in task order.
ChunkMap = Callable[[Callable[[Any], Any], Sequence[Any]], Iterable[Any]]

#: A statistic evaluated on a float block of assignments ``(rows, n)``, returning ``(rows, q)`` (NaN: undefined).
Statistic = Callable[[np.ndarray], np.ndarray]


def serial_chunk_map(fn: Callable[[Any], Any], tasks: Sequence[Any]) -> Iterator[Any]:
    """The default :data:`ChunkMap`: the tasks one after another in this process (``map``)."""
    return map(fn, tasks)


# =========================================================================== validation


def _check_choice(name: str, value, choices: Sequence[str]) -> str:
    return check_choice(name, value, choices)


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
        raise ValueError(f"`alternative` must be one string or one per outcome ({m}); got {len(alts)}")
    return tuple(_check_choice("alternative", a, ALTERNATIVES) for a in alts)


def _check_names(outcomes, m: int) -> tuple[str, ...]:
    if outcomes is None:
        return tuple(f"y{j}" for j in range(m))
    names = tuple(str(o) for o in outcomes)
    if len(names) != m:
        raise ValueError(f"`outcomes` must name each of the {m} outcome columns; got {len(names)}")
    return names


def _check_source(source, mechanism: Mechanism) -> AssignmentSource:
    if not isinstance(source, AssignmentSource):
        raise ValueError(f"`source` must be an AssignmentSource (Mechanism.assignments); got {type(source).__name__}")
    if source.mechanism is not mechanism:
        raise ValueError("`source` was built from a different mechanism than the one given")
    return source


def _check_rtol(rtol) -> float:
    if not isinstance(rtol, (int, float)) or not 0.0 <= float(rtol) < 1e-3:
        raise ValueError(f"`rtol` must be a number in [0, 0.001); got {rtol!r}")
    return float(rtol)


def _check_chunk_map(chunk_map) -> ChunkMap:
    if chunk_map is None:
        return serial_chunk_map
    if not callable(chunk_map):
        raise TypeError(f"`chunk_map` must be callable as chunk_map(fn, tasks); got {type(chunk_map).__name__}")
    return chunk_map


# =========================================================================== draws


def chunk_rows(n: int) -> int:
    """Rows of every chunk of draws: fixed by the number of units alone (about 4 million cells, at most 1024)."""
    return int(max(1, min(1024, (1 << 22) // max(n, 1))))


@dataclass(frozen=True)
class ChunkTask:
    """``count`` consecutive chunks from chunk ``first``: the unit of work handed to a :data:`ChunkMap`."""

    first: int
    count: int


class _Draws:
    """What both kinds of draws share: the cut into chunks and the tasks."""

    method: str
    n: int
    draws: int
    rows: int

    @property
    def n_chunks(self) -> int:
        return -(-self.draws // self.rows)

    def tasks(self, chunks_per_task: int = 1) -> list[ChunkTask]:
        """The tasks of one pass: ``chunks_per_task`` chunks each (the last may hold fewer)."""
        if isinstance(chunks_per_task, bool) or not isinstance(chunks_per_task, int) or chunks_per_task < 1:
            raise TypeError(f"`chunks_per_task` must be a positive integer; got {chunks_per_task!r}")
        total = self.n_chunks
        return [ChunkTask(first, min(chunks_per_task, total - first)) for first in range(0, total, chunks_per_task)]

    def chunk(self, i: int) -> tuple[np.ndarray, np.ndarray | None]:  # pragma: no cover - interface
        raise NotImplementedError


class MechanismDraws(_Draws):
    """The assignments of an :class:`AssignmentSource`, generated chunk by chunk on demand.

    Chunk ``i`` covers draws ``i * rows`` to ``(i + 1) * rows - 1`` with
    ``rows = chunk_rows(n)``. Exact: those assignments of the enumeration
    order. Monte Carlo: ``mechanism.sample_block(k, SeedSequence(seed).spawn(n_chunks)[i])``
    (computed as the equal ``SeedSequence(seed, spawn_key=(i,))``), so
    the draws do not depend on which process generates which chunk.
    """

    def __init__(self, source: AssignmentSource):
        if not isinstance(source, AssignmentSource):
            raise TypeError(f"`source` must be an AssignmentSource; got {type(source).__name__}")
        self.mechanism = source.mechanism
        self.method, self.draws, self.seed = source.method, int(source.draws), source.seed
        self.n = self.mechanism.n
        self.rows = chunk_rows(self.n)

    def seed_sequence(self, i: int) -> np.random.SeedSequence:
        """The seed sequence of Monte Carlo chunk ``i``: child ``i`` of ``SeedSequence(seed)``."""
        return np.random.SeedSequence(self.seed, spawn_key=(i,))

    def chunk(self, i: int) -> tuple[np.ndarray, np.ndarray | None]:
        """Chunk ``i`` as ``(k, n)`` ``uint8`` assignments and their weights (``None``: equal)."""
        start = i * self.rows
        stop = min(self.draws, start + self.rows)
        if self.method == "exact":
            z = self.mechanism.enumerate_range(start, stop)
            return z, self.mechanism.weights(z)
        return self.mechanism.sample_block(stop - start, self.seed_sequence(i)), None

    def stored(self) -> StoredDraws:
        """Every chunk generated once and kept (for repeated passes over the same draws)."""
        chunks = [self.chunk(i) for i in range(self.n_chunks)]
        return StoredDraws(self.method, self.n, self.rows, chunks)


class StoredDraws(_Draws):
    """Draws held in memory as chunks of ``rows`` rows (the last may be shorter)."""

    def __init__(self, method: str, n: int, rows: int, chunks: list[tuple[np.ndarray, np.ndarray | None]]):
        self.method, self.n, self.rows = check_choice("method", method, METHODS), int(n), int(rows)
        self._chunks = chunks
        self.draws = int(sum(c[0].shape[0] for c in chunks))

    def chunk(self, i: int) -> tuple[np.ndarray, np.ndarray | None]:
        return self._chunks[i]

    @classmethod
    def from_arrays(cls, chunks, n: int, method: str, weights: Callable | None = None) -> StoredDraws:
        """Validated draws from an iterable of ``(k, n)`` 0/1 arrays (or a callable returning one).

        ``weights``: ``chunk -> (k,) probabilities or None``, exact enumerations
        only, called with each chunk as given. The rows are re-cut into chunks
        of :func:`chunk_rows` so results do not depend on how they were split.
        """
        method = check_choice("method", method, METHODS)
        source = chunks() if callable(chunks) else chunks
        try:
            iterator = iter(source)
        except TypeError as err:
            raise ValueError("`chunks` must be an iterable of (k, n) 0/1 arrays or a callable returning one; "
                             f"got {type(source).__name__}") from err
        parts, wparts = [], []
        for i, chunk in enumerate(iterator):
            arr = np.asarray(chunk)
            if arr.ndim == 1:
                arr = arr[None, :]
            if arr.ndim != 2 or arr.shape[1] != n:
                raise ValueError(f"assignment chunk {i} must have shape (k, {n}); got {np.shape(chunk)}")
            if arr.dtype.kind != "b" and arr.size and not np.isin(arr, (0, 1)).all():
                raise ValueError(f"assignment chunk {i} must contain only 0 and 1")
            parts.append(arr.astype(np.uint8))
            wparts.append(_given_weights(weights, arr, method, i))
        if not parts or sum(p.shape[0] for p in parts) == 0:
            raise ValueError("`chunks` yielded no assignment")
        z = np.concatenate(parts)
        w = None if all(x is None for x in wparts) else np.concatenate(
            [np.ones(p.shape[0]) if x is None else x for p, x in zip(parts, wparts)])
        rows = chunk_rows(n)
        cut = [(z[s:s + rows], None if w is None else w[s:s + rows]) for s in range(0, z.shape[0], rows)]
        return cls(method, n, rows, cut)


def _given_weights(weights, chunk: np.ndarray, method: str, i: int) -> np.ndarray | None:
    if weights is None:
        return None
    w = weights(chunk)
    if w is None:
        return None
    if method != "exact":
        raise ValueError("`weights` apply to exact enumeration only; Monte Carlo draws follow the mechanism")
    w = np.asarray(w, dtype=np.float64)
    if w.shape != (chunk.shape[0],) or not np.isfinite(w).all() or (w < 0).any():
        raise ValueError(f"`weights` of chunk {i} must be {chunk.shape[0]} finite non-negative numbers")
    return w


# =========================================================================== the pass



class _PassWork:
    """``work(task)``: build the task's chunks and evaluate every statistic on them.

    Each chunk is converted once to a float block of exactly ``rows`` rows
    (zero rows pad the last one), so every statistic sees blocks of one fixed
    shape and floating-point results are bitwise identical however the chunks
    are grouped into tasks or spread over processes. The products inside are
    thin (``rows x n`` by ``n x q``); BLAS runs them on one thread, since
    waiting for a second thread on a busy machine costs more than it saves
    (parallel work comes from the chunk map instead).
    """

    def __init__(self, draws: _Draws, statistics: Sequence[Statistic]):
        self.draws, self.statistics = draws, tuple(statistics)

    def __call__(self, task: ChunkTask) -> tuple[tuple[np.ndarray, ...], np.ndarray | None]:
        with one_blas_thread():
            return self._compute(task)

    def _compute(self, task: ChunkTask) -> tuple[tuple[np.ndarray, ...], np.ndarray | None]:
        block = np.zeros((self.draws.rows, self.draws.n))
        outs: list[list[np.ndarray]] = [[] for _ in self.statistics]
        weights = []
        for i in range(task.first, task.first + task.count):
            z, w = self.draws.chunk(i)
            used = z.shape[0]
            block[:used] = z
            block[used:] = 0.0
            for out, statistic in zip(outs, self.statistics):
                out.append(statistic(block)[:used])
            weights.append(w)
        w = None if all(x is None for x in weights) else np.concatenate(weights)
        return tuple(np.concatenate(o) for o in outs), w


def observed_statistics(statistics: Sequence[Statistic], z: np.ndarray, rows: int) -> list[np.ndarray]:
    """Each statistic under the observed assignment ``z``, computed in a block of ``rows`` rows.

    The outcome tests use the pass's block shape (the observed assignment then
    gets the very bits it gets as a draw); the checks' statistics use one row.
    Either way the tie rule absorbs the floating-point noise.
    """
    block = np.zeros((rows, z.size))
    block[0] = z
    with one_blas_thread():
        return [np.asarray(s(block)[0], dtype=np.float64) for s in statistics]


def run_pass(draws: _Draws, statistics: Sequence[Statistic], *, chunk_map: ChunkMap | None = None,
             chunks_per_task: int = 1) -> tuple[list[np.ndarray], np.ndarray | None]:
    """One pass over the draws: every statistic on every draw, ``(B, q_k)`` each, and the weights.

    ``partials = chunk_map(work, draws.tasks(chunks_per_task))``; the partials
    come back in task order and are joined in that order, so the result does
    not depend on ``chunk_map`` or ``chunks_per_task``.
    """
    mapper = _check_chunk_map(chunk_map)
    tasks = draws.tasks(chunks_per_task)
    work = _PassWork(draws, statistics)
    parts: list[list[np.ndarray]] = [[] for _ in statistics]
    weights: list[np.ndarray | None] = []
    for values, w in mapper(work, tasks):
        for out, v in zip(parts, values):
            out.append(v)
        weights.append(w)
    null = [np.concatenate(p) if p else np.empty((0, 0)) for p in parts]
    wts = None if not weights or all(w is None for w in weights) else np.concatenate(weights)
    if wts is not None and draws.method != "exact":
        raise ValueError("`weights` apply to exact enumeration only")
    return null, wts


# =========================================================================== null distribution


@dataclass(frozen=True, kw_only=True, eq=False)
class NullDistribution(Record):
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

    ``to_dict()`` gives the plain-Python form (lists; None for undefined) for
    plotting or archiving, with the number of ``draws``.
    """

    record_keys = ("statistic", "direction", "null_effect", "method", "draws", "observed", "centre", "null",
                   "weights")

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
                    raise ValueError(f"this ks null distribution measures the {self.direction!r} distance; "
                                     f"got alternative {alt!r}")
            elif alt == "less":
                obs[j], null[:, j] = -obs[j], -null[:, j]
            elif alt == "two-sided":
                obs[j], null[:, j] = abs(obs[j] - self.centre[j]), np.abs(null[:, j] - self.centre[j])
        return obs, null, tie_tolerance(self.observed, self.null, self.centre, rtol)

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
        return tail_p_values(obs, null, method=self.method, tolerance=tol, weights=self.weights)


def drawn_statistics(draws: _Draws, statistics: Sequence[Statistic], z, *,
                     chunk_map: ChunkMap | None = None) -> list[DrawnStatistics]:
    """Observed (assignment ``z``) and drawn values of upper-tailed statistics, one pass for all."""
    z = np.asarray(z, dtype=np.float64)
    observed = observed_statistics(statistics, z, 1)
    nulls, wts = run_pass(draws, statistics, chunk_map=chunk_map)
    return [DrawnStatistics(observed=o, null=v, method=draws.method, weights=wts) for o, v in zip(observed, nulls)]


# =========================================================================== study statistics


@dataclass(frozen=True)
class _Request:
    statistic: str
    direction: str | None
    y: np.ndarray


def _draws_of(source) -> _Draws:
    if isinstance(source, _Draws):
        return source
    if isinstance(source, AssignmentSource) and not source.by_chunk_index:
        return StoredDraws.from_arrays(source.chunks, source.mechanism.n, source.method, source.weights)
    return MechanismDraws(source)


def _run(requests: Sequence[_Request], mechanism: Mechanism, source, null_effect: float, *,
         extra: Sequence[Statistic] = (), chunk_map: ChunkMap | None = None) -> list:
    """Every requested statistic, and every ``extra`` statistic, on one pass over the draws.

    Returns one :class:`NullDistribution` per request followed by one
    :class:`~report_kit.inference.pvalues.DrawnStatistics` per ``extra`` statistic.
    """
    draws = _draws_of(source)
    z = mechanism.z.astype(np.float64)
    # y - 0 * z is y itself, bit for bit: no copy of the outcome matrix for the null of no effect
    adjusted = [r.y if null_effect == 0 else r.y - null_effect * z[:, None] for r in requests]
    statistics = [_KERNELS[r.statistic](y, mechanism, r.direction) for r, y in zip(requests, adjusted)]
    observed = observed_statistics(statistics, z, draws.rows) + observed_statistics(extra, z, 1)
    statistics += list(extra)
    nulls, wts = run_pass(draws, statistics, chunk_map=chunk_map)
    results: list = []
    for r, y, obs, null in zip(requests, adjusted, observed, nulls):
        undefined = int(np.count_nonzero(~np.isfinite(null)))
        if undefined:
            logger.debug("%s: %d undefined statistic(s) among %d draws x %d outcomes set aside",
                         r.statistic, undefined, null.shape[0], null.shape[1])
        centre = _analytic_centre(r.statistic, y, mechanism)
        for j in np.flatnonzero(np.isnan(centre)):
            keep = np.isfinite(null[:, j])
            centre[j] = null_centre(obs[j], null[keep, j], None if wts is None else wts[keep], draws.method)
        for arr in (obs, null, centre):
            arr.setflags(write=False)
        results.append(NullDistribution(statistic=r.statistic, direction=r.direction, null_effect=null_effect,
                                        observed=obs, null=null, centre=centre, method=draws.method,
                                        weights=wts))
    for obs, null in zip(observed[len(requests):], nulls[len(requests):]):
        results.append(DrawnStatistics(observed=obs, null=null, method=draws.method, weights=wts))
    return results
