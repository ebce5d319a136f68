"""Assignment mechanisms: count, enumerate, sample and draw treatment assignments.

Owns the one abstraction every randomization-based step relies on: a
:class:`Mechanism` describes how treatment could have been assigned in a study
(complete, bernoulli, blocked, cluster, blocked_cluster or matched_pairs). It can

* count its assignments exactly (:meth:`Mechanism.count`, a Python ``int``);
* enumerate them all, in chunks of ``(k, n)`` ``uint8`` arrays
  (:meth:`Mechanism.enumerate_chunks`);
* sample ``B`` of them reproducibly from a seed, in chunks, with a result that
  does not depend on the chunk size (:meth:`Mechanism.sample_chunks`);
* choose between the two given ``max_exact`` (:meth:`Mechanism.assignments`).

:func:`draw_assignment` draws the one real assignment of a study from
``design.seed`` with a fixed, documented algorithm (units sorted by id,
blocks and clusters sorted by label); see ``docs/methods/randomization.md``.

Internally every mechanism except ``bernoulli`` is described the same way:
*randomization units* (the units themselves, or the clusters) are grouped
into *strata* (one stratum, the blocks, or the pairs) and a fixed number of
randomization units is treated in each stratum. Under analysis the mechanism
conditions on the observed number treated in each stratum (Fisher 1935).
"""

from __future__ import annotations

import logging
import math
from collections.abc import Iterator
from dataclasses import dataclass, field
from fractions import Fraction

import numpy as np
import pandas as pd

from report_kit.errors import DataError, DesignError, UsageError
from report_kit.validate import MECHANISMS, METHODS, check_choice  # noqa: F401  (METHODS re-exported)

__all__ = [
    "KINDS",
    "AssignmentSource",
    "Mechanism",
    "draw_assignment",
    "mechanism_from_arrays",
    "number_treated",
]

logger = logging.getLogger(__name__)

KINDS = MECHANISMS
_NEEDS_BLOCK = frozenset({"blocked", "blocked_cluster", "matched_pairs"})
_NEEDS_CLUSTER = frozenset({"cluster", "blocked_cluster"})
#: Target number of assignment cells (draws x units) held in one chunk.
CHUNK_CELLS = 1 << 22


# --------------------------------------------------------------------------- validation


def _check_kind(kind: str) -> str:
    return check_choice("kind", kind, KINDS)


def _check_positive_int(name: str, value, *, minimum: int = 1) -> int:
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < minimum:
        raise UsageError(f"`{name}` must be an integer >= {minimum}; got {value!r}")
    return int(value)


def _check_seed(value) -> int:
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < 0:
        raise UsageError(f"`seed` must be a non-negative integer; got {value!r}")
    return int(value)


def _check_probability(value, *, name: str = "probability") -> float | None:
    if value is None:
        return None
    try:
        p = float(value)
    except (TypeError, ValueError) as err:
        raise UsageError(f"`{name}` must be a number strictly between 0 and 1; got {value!r}") from err
    if not 0.0 < p < 1.0:
        raise UsageError(f"`{name}` must be a number strictly between 0 and 1; got {value!r}")
    return p


def _check_assignment(z, n: int | None = None) -> np.ndarray:
    arr = np.asarray(z)
    if arr.ndim != 1:
        raise DataError(f"the treatment assignment must be one-dimensional; got shape {arr.shape}")
    if n is not None and arr.size != n:
        raise DataError(f"the treatment assignment has {arr.size} entries; expected {n}")
    if arr.dtype.kind == "f" and not np.all(np.isfinite(arr)):
        raise DataError("the treatment assignment has missing values; every unit needs 0 or 1")
    if arr.dtype.kind not in "biuf" or not np.all((arr == 0) | (arr == 1)):
        bad = arr[~np.isin(arr, (0, 1))][:3] if arr.dtype.kind in "biuf" else arr[:3]
        raise DataError(f"the treatment assignment must hold only 0 and 1; found {np.asarray(bad).tolist()!r}")
    return arr.astype(np.uint8)


def _codes(labels, name: str, n: int) -> tuple[np.ndarray, tuple]:
    """Sorted distinct labels and the code of every unit (index into them)."""
    arr = np.asarray(labels)
    if arr.ndim != 1 or arr.size != n:
        raise DataError(f"`{name}` must have one label per unit ({n}); got shape {arr.shape}")
    missing = pd.isna(arr)
    if np.any(missing):
        raise DataError(f"`{name}` has {int(missing.sum())} missing label(s); every unit needs a {name}")
    try:
        uniq, codes = np.unique(arr, return_inverse=True)
    except TypeError as err:
        raise DataError(f"`{name}` labels must be all numbers or all text; got a mixture") from err
    return codes.astype(np.intp), tuple(uniq.tolist())


#: Counts of assignments with more digits than this are described by their size (10^N) only.
MAX_COUNT_DIGITS = 20


def number_treated(probability: float, size: int) -> int:
    """Number of randomization units treated among ``size`` at share ``probability``.

    ``floor(probability * size + 1/2)`` (round half up), computed exactly from
    the shortest decimal form of ``probability`` (so 0.35 * 10 gives 4, as
    written, not the binary value 3.4999...). Documented in
    ``docs/methods/randomization.md``.
    """
    exact = Fraction(repr(float(probability))) * size + Fraction(1, 2)
    return int(math.floor(exact))


# --------------------------------------------------------------------------- the mechanism


@dataclass(frozen=True, kw_only=True, eq=False)
class Mechanism:
    """An assignment mechanism, as used for randomization inference.

    Build it with :func:`mechanism_from_arrays`. All arrays are read-only.

    Attributes
    ----------
    kind : str
        One of :data:`KINDS`.
    z : ndarray of uint8, shape (n,)
        The observed assignment.
    unit_group : ndarray of intp, shape (n,)
        Randomization unit of each unit (the cluster for cluster designs,
        the unit itself otherwise).
    group_stratum : ndarray of intp, shape (G,)
        Stratum of each randomization unit (all 0 when unstratified).
    stratum_size, stratum_treated : tuple of int
        Randomization units, and treated ones, in each stratum (conditioned on
        under analysis).
    unit_block : ndarray of intp, shape (n,)
        Block of each unit, used by block-weighted statistics (all 0 when the
        design has no blocks).
    block_labels, cluster_labels : tuple
        Sorted labels behind the block and cluster codes (empty when absent).
    probability : float or None
        Per-unit treatment probability (``bernoulli`` only).
    """

    kind: str
    z: np.ndarray
    unit_group: np.ndarray
    group_stratum: np.ndarray
    stratum_size: tuple[int, ...]
    stratum_treated: tuple[int, ...]
    unit_block: np.ndarray
    block_labels: tuple = ()
    cluster_labels: tuple = ()
    probability: float | None = None
    _cache: dict = field(default_factory=dict, repr=False, compare=False)

    # ------------------------------------------------------------------ sizes
    @property
    def n(self) -> int:
        """Number of units."""
        return int(self.z.size)

    @property
    def n_groups(self) -> int:
        """Number of randomization units (clusters, or units)."""
        return int(self.group_stratum.size)

    @property
    def n_blocks(self) -> int:
        """Number of blocks seen by block-weighted statistics (1 when unblocked)."""
        return int(self.unit_block.max()) + 1 if self.unit_block.size else 0

    @property
    def clustered(self) -> bool:
        return self.kind in _NEEDS_CLUSTER

    @property
    def fixed_arms_within_blocks(self) -> bool:
        """True when units are exchangeable within blocks (no clusters).

        Then, given the number of treated units per block, every split of the
        units of a block is equally likely; block-weighted differences in
        means have null expectation zero (used as the two-sided centre).
        """
        return not self.clustered

    def inclusion_probability(self) -> np.ndarray:
        """Probability that each unit is treated under the mechanism, shape (n,).

        ``p`` for ``bernoulli``; ``k_s / G_s`` of the unit's stratum (via its
        cluster) otherwise.
        """
        if self.kind == "bernoulli":
            return np.full(self.n, float(self.probability))
        share = np.asarray(self.stratum_treated, float) / np.asarray(self.stratum_size, float)
        return share[self.group_stratum][self.unit_group]

    # ------------------------------------------------------------------ counting
    def count(self) -> int:
        """Exact number of possible assignments (a Python ``int``).

        ``prod_s C(G_s, k_s)`` over strata ``s`` with ``G_s`` randomization
        units and ``k_s`` treated (one stratum for ``complete`` and ``cluster``:
        ``C(n, k)`` and ``C(G, g)``); ``2**n`` for ``bernoulli``; ``2**P`` for
        ``P`` matched pairs. Cached after the first call.
        """
        if "count" not in self._cache:
            if self.kind == "bernoulli":
                total = 1 << self.n
            else:
                total = math.prod(math.comb(g, k) for g, k in zip(self.stratum_size, self.stratum_treated))
            self._cache["count"] = total
        return self._cache["count"]

    def log_count(self) -> float:
        """Natural logarithm of :meth:`count`, from ``lgamma`` (cheap for huge designs)."""
        if self.kind == "bernoulli":
            return self.n * math.log(2.0)
        return float(
            sum(
                math.lgamma(g + 1) - math.lgamma(k + 1) - math.lgamma(g - k + 1)
                for g, k in zip(self.stratum_size, self.stratum_treated)
            )
        )

    def count_text(self, max_digits: int = MAX_COUNT_DIGITS) -> str | None:
        """:meth:`count` as decimal digits when it has at most ``max_digits`` digits, else ``None``.

        A huge count is never turned into a decimal string (Python refuses
        integers of more than 4,300 digits, and building it costs seconds at a
        million units); use :meth:`log10_count` for its size.
        """
        if self.log10_count() >= max_digits + 1:      # surely more digits than allowed
            return None
        text = str(self.count())
        return text if len(text) <= max_digits else None

    def log10_count(self) -> float:
        """Base-10 logarithm of :meth:`count` (the number of digits is ``floor(log10) + 1``)."""
        return self.log_count() / math.log(10.0)

    def count_at_most(self, limit: int) -> bool:
        """Whether :meth:`count` is at most ``limit``, without building huge integers."""
        if self.log_count() > math.log(max(limit, 1)) + 1.0:
            return False
        return self.count() <= limit

    # ------------------------------------------------------------------ weights
    def weights(self, chunk: np.ndarray) -> np.ndarray | None:
        """Probability of each assignment of ``chunk`` under the mechanism, or ``None``.

        ``None`` means all assignments are equally likely (every mechanism but
        ``bernoulli``). For ``bernoulli``, ``p**c * (1 - p)**(n - c)`` with
        ``c`` the number treated in the row.
        """
        if self.kind != "bernoulli":
            return None
        p = float(self.probability)
        c = chunk.sum(axis=1, dtype=np.int64)
        return np.exp(c * math.log(p) + (self.n - c) * math.log1p(-p))

    # ------------------------------------------------------------------ enumeration
    def enumerate_chunks(self, chunk_size: int | None = None) -> Iterator[np.ndarray]:
        """Yield every assignment once, as ``(k, n)`` ``uint8`` chunks.

        Assignment number ``i`` (``0 <= i < count()``) is the mixed-radix
        decomposition of ``i`` over strata (last stratum fastest), each digit
        the colexicographic rank of the treated set within its stratum;
        ``bernoulli`` assignment ``i`` treats unit ``u`` when bit ``u`` of
        ``i`` is set. Only sensible for small counts.
        """
        total = self.count()
        size = self._chunk_size(chunk_size, total)
        if total > np.iinfo(np.int64).max:
            raise UsageError(f"cannot enumerate {total} assignments; use sample_chunks")
        return self._enumerate(total, size)

    def _enumerate(self, total: int, size: int) -> Iterator[np.ndarray]:
        for start in range(0, total, size):
            index = np.arange(start, min(start + size, total), dtype=np.int64)
            yield self._unrank(index)

    def _unrank(self, index: np.ndarray) -> np.ndarray:
        if self.kind == "bernoulli":
            bits = (index[:, None] >> np.arange(self.n, dtype=np.int64)[None, :]) & 1
            return bits.astype(np.uint8)
        groups = np.zeros((index.size, self.n_groups), dtype=np.uint8)
        rest = index.copy()
        members = self._stratum_members()
        for s in reversed(range(len(self.stratum_size))):
            radix = math.comb(self.stratum_size[s], self.stratum_treated[s])
            rank = rest % radix
            rest //= radix
            chosen = _unrank_combinations(rank, self.stratum_size[s], self.stratum_treated[s])
            groups[:, members[s]] = chosen
        return self._expand(groups)

    # ------------------------------------------------------------------ sampling
    def sample_chunks(self, draws: int, seed: int, chunk_size: int | None = None) -> Iterator[np.ndarray]:
        """Yield ``draws`` random assignments (with replacement) as ``(k, n)`` ``uint8`` chunks.

        The draws depend only on ``seed`` (not on ``chunk_size``): each row is
        generated from two streams, spawned from ``numpy.random.SeedSequence(seed)``,
        that are consumed row after row. See ``docs/methods/randomization.md``
        for the algorithms (threshold-and-adjust for one stratum, sorted
        random keys within strata, independent coins for ``bernoulli``).
        """
        draws = _check_positive_int("draws", draws)
        seed = _check_seed(seed)
        size = self._chunk_size(chunk_size, draws)
        return self._sample(draws, seed, size)

    def sample_block(self, rows: int, seed_sequence: np.random.SeedSequence) -> np.ndarray:
        """``rows`` random assignments as a ``(rows, n)`` ``uint8`` array, from one seed sequence alone.

        The rows depend only on ``seed_sequence`` (its two children feed the
        unit keys and the adjustment indices, as in :meth:`sample_chunks`), so
        a block can be generated anywhere, independently of any other block.
        The randomization engine draws its Monte Carlo chunk ``i`` with
        ``numpy.random.SeedSequence(seed).spawn(n_chunks)[i]``.
        """
        rows = _check_positive_int("rows", rows)
        if not isinstance(seed_sequence, np.random.SeedSequence):
            raise UsageError(f"`seed_sequence` must be a numpy.random.SeedSequence; got {type(seed_sequence).__name__}")
        key_seq, fix_seq = seed_sequence.spawn(2)
        keys = np.random.Generator(np.random.PCG64(key_seq))
        fixes = _IndexStream(np.random.Generator(np.random.PCG64(fix_seq)), self.n_groups)
        return self._sample_rows(rows, keys, fixes)

    def enumerate_range(self, start: int, stop: int) -> np.ndarray:
        """Assignments number ``start`` to ``stop - 1`` of :meth:`enumerate_chunks`, as ``uint8`` rows."""
        total = self.count()
        if total > np.iinfo(np.int64).max:
            raise UsageError(f"cannot enumerate {total} assignments; use sample_chunks")
        if not (isinstance(start, int) and isinstance(stop, int) and 0 <= start <= stop <= total):
            raise UsageError(f"`start` and `stop` must be integers with 0 <= start <= stop <= {total}; "
                             f"got {start!r}, {stop!r}")
        return self._unrank(np.arange(start, stop, dtype=np.int64))

    def _sample(self, draws: int, seed: int, size: int) -> Iterator[np.ndarray]:
        key_seq, fix_seq = np.random.SeedSequence(seed).spawn(2)
        keys = np.random.Generator(np.random.PCG64(key_seq))
        fixes = _IndexStream(np.random.Generator(np.random.PCG64(fix_seq)), self.n_groups)
        for start in range(0, draws, size):
            rows = min(size, draws - start)
            yield self._sample_rows(rows, keys, fixes)

    def _sample_rows(self, rows: int, keys: np.random.Generator, fixes: _IndexStream) -> np.ndarray:
        if self.kind == "bernoulli":
            return (keys.random((rows, self.n)) < self.probability).view(np.uint8)
        if len(self.stratum_size) == 1:
            groups = _threshold_and_adjust(rows, self.n_groups, self.stratum_treated[0], keys, fixes)
        else:
            groups = self._sorted_keys(rows, keys)
        return self._expand(groups)

    def _sorted_keys(self, rows: int, keys: np.random.Generator) -> np.ndarray:
        """Treat, in each stratum, the ``k_s`` randomization units with the smallest uniform keys."""
        u = keys.random((rows, self.n_groups))
        out = np.zeros((rows, self.n_groups), dtype=np.uint8)
        members = self._stratum_members()
        sizes = np.asarray(self.stratum_size)
        for g in np.unique(sizes):
            strata = np.flatnonzero(sizes == g)
            cols = np.stack([members[s] for s in strata])  # (S_g, g)
            order = np.argsort(u[:, cols], axis=2, kind="stable")
            take = np.arange(g)[None, :] < np.asarray(self.stratum_treated)[strata][:, None]
            block = np.zeros((rows, strata.size, g), dtype=np.uint8)
            np.put_along_axis(block, order, np.broadcast_to(take, order.shape).astype(np.uint8), axis=2)
            out[:, cols] = block
        return out

    # ------------------------------------------------------------------ choose
    def assignments(
        self, *, max_exact: int, draws: int, seed: int, chunk_size: int | None = None
    ) -> AssignmentSource:
        """All assignments when there are at most ``max_exact``; else ``draws`` random ones.

        Returns an :class:`AssignmentSource` whose :meth:`AssignmentSource.chunks`
        can be iterated again and again (same draws each time: common random
        numbers).
        """
        max_exact = _check_positive_int("max_exact", max_exact, minimum=0)
        draws = _check_positive_int("draws", draws)
        seed = _check_seed(seed)
        if chunk_size is not None:
            _check_positive_int("chunk_size", chunk_size)
        if self.count_at_most(max_exact):
            logger.debug("%s design: enumerating all %d assignments", self.kind, self.count())
            return AssignmentSource(mechanism=self, method="exact", draws=self.count(), seed=None,
                                    chunk_size=chunk_size)
        logger.debug("%s design: more than %d assignments; drawing %d from seed %d", self.kind, max_exact, draws, seed)
        return AssignmentSource(mechanism=self, method="monte_carlo", draws=draws, seed=seed,
                                chunk_size=chunk_size)

    # ------------------------------------------------------------------ helpers
    def _chunk_size(self, chunk_size: int | None, total: int) -> int:
        if chunk_size is None:
            return int(max(1, min(total, CHUNK_CELLS // max(self.n, 1))))
        return _check_positive_int("chunk_size", chunk_size)

    def _stratum_members(self) -> list[np.ndarray]:
        if "members" not in self._cache:
            order = np.argsort(self.group_stratum, kind="stable")
            bounds = np.cumsum((0,) + self.stratum_size)
            self._cache["members"] = [order[bounds[s]:bounds[s + 1]] for s in range(len(self.stratum_size))]
        return self._cache["members"]

    def _expand(self, groups: np.ndarray) -> np.ndarray:
        if not self.clustered:
            return groups
        return np.ascontiguousarray(groups[:, self.unit_group])


@dataclass(frozen=True, kw_only=True, eq=False)
class AssignmentSource:
    """The assignments a randomization test runs over.

    Attributes
    ----------
    mechanism : Mechanism
    method : {"exact", "monte_carlo"}
    draws : int
        Number of assignments produced (``count()`` when exact).
    seed : int or None
        Seed of the Monte Carlo draws (``None`` when exact).
    chunk_size : int or None
        Rows per chunk (``None``: automatic, about 4 million cells per chunk).
    """

    mechanism: Mechanism
    method: str
    draws: int
    seed: int | None
    chunk_size: int | None = None

    @property
    def count(self) -> int:
        """Exact total number of assignments of the mechanism."""
        return self.mechanism.count()

    @property
    def by_chunk_index(self) -> bool:
        """Whether any chunk can be rebuilt from the mechanism alone (enumeration order or seed stream).

        False for sources that filter the mechanism's assignments (e.g. a
        rerandomized design's acceptable ones): the engine then reads
        :meth:`chunks` once and keeps the draws.
        """
        return type(self).chunks is AssignmentSource.chunks

    def chunks(self) -> Iterator[np.ndarray]:
        """A fresh iterator over the assignments, as ``(k, n)`` ``uint8`` chunks."""
        if self.method == "exact":
            return self.mechanism.enumerate_chunks(self.chunk_size)
        return self.mechanism.sample_chunks(self.draws, self.seed, self.chunk_size)

    def weights(self, chunk: np.ndarray) -> np.ndarray | None:
        """Weights of the rows of ``chunk`` in the null distribution (``None``: equal)."""
        return self.mechanism.weights(chunk) if self.method == "exact" else None


# --------------------------------------------------------------------------- algorithms


def _unrank_combinations(rank: np.ndarray, size: int, treated: int) -> np.ndarray:
    """Rows of 0/1 (length ``size``) with ``treated`` ones, from colexicographic ranks.

    Combinatorial number system (Knuth, TAOCP 7.2.1.3): rank
    ``r = sum_i C(c_i, i)`` with ``c_treated > ... > c_1 >= 0``; each ``c_i``
    is the largest ``c`` with ``C(c, i) <= r``. Complements are used when
    more than half are treated.
    """
    flip = treated > size - treated
    k = size - treated if flip else treated
    out = np.zeros((rank.size, size), dtype=np.uint8)
    rest = rank.astype(np.int64).copy()
    rows = np.arange(rank.size)
    cap = np.iinfo(np.int64).max
    for i in range(k, 0, -1):
        table = np.array([min(math.comb(c, i), cap) for c in range(size)], dtype=np.int64)
        c = np.searchsorted(table, rest, side="right") - 1
        out[rows, c] = 1
        rest -= table[c]
    return 1 - out if flip else out


def _threshold_and_adjust(
    rows: int, size: int, treated: int, keys: np.random.Generator, fixes: _IndexStream
) -> np.ndarray:
    """Uniform random subsets of ``treated`` out of ``size``, one per row.

    Each unit first gets an independent 16-bit key (four per 64-bit raw word
    of ``keys``) and is provisionally treated when ``key < round(65536 *
    treated / size)``. Each row is then brought to exactly ``treated`` by
    switching a uniformly random subset of the surplus arm, chosen by
    sequential rejection sampling from ``fixes`` (:func:`_adjust_rows`). Both
    steps are equivariant under permutations of the units, so the result is
    uniform over the ``C(size, treated)`` subsets.
    """
    words = -(-size // 4)
    raw = keys.bit_generator.random_raw((rows, words)).astype("<u8", copy=False)
    key16 = raw.view("<u2")[:, :size]
    threshold = min(65535, max(1, round(65536 * treated / size)))
    provisional = key16 < threshold
    counts = np.count_nonzero(provisional, axis=1)
    out = provisional.view(np.uint8)
    off = np.flatnonzero(counts != treated)
    if off.size:
        _adjust_rows(out, off, counts[off].astype(np.int64), treated, fixes)
    return out


class _IndexStream:
    """The values of successive ``rng.integers(0, high, size=m)`` calls, read ahead in blocks.

    numpy draws bounded integers one after another from the bit generator, so
    one call for ``a + b`` values returns the values of a call for ``a``
    followed by a call for ``b``. Reading ahead (:meth:`peek`) and consuming
    later (:meth:`advance`) therefore hands out exactly the values that
    successive calls would have returned, whatever the block sizes.
    """

    __slots__ = ("_rng", "_high", "_buffer", "_pos")

    def __init__(self, rng: np.random.Generator, high: int) -> None:
        self._rng = rng
        self._high = high
        self._buffer = np.empty(0, dtype=np.int64)
        self._pos = 0

    def peek(self, count: int) -> np.ndarray:
        """The next ``count`` values, without consuming them."""
        pos = self._pos
        if pos + count > self._buffer.size:
            fresh = self._rng.integers(0, self._high, size=max(pos + count - self._buffer.size, _READ_AHEAD))
            self._buffer = np.concatenate([self._buffer[pos:], fresh])
            self._pos = pos = 0
        return self._buffer[pos:pos + count]

    def advance(self, count: int) -> None:
        """Consume ``count`` values (already peeked)."""
        self._pos += count

    def take(self, count: int) -> np.ndarray:
        """The next ``count`` values, consumed."""
        values = self.peek(count)
        self._pos += count
        return values


#: Values read ahead at least, per refill of an :class:`_IndexStream`.
_READ_AHEAD = 4096
#: Most candidate values examined at once by :func:`_adjust_together` (bounds its memory).
_WINDOW_VALUES = 1 << 18
#: Fewest rows tried at once by :func:`_adjust_together` after a row that needed a further batch.
_MIN_WINDOW = 32
#: Fewest consecutive rows worth settling together; shorter runs are settled one by one.
_MIN_RUN = 4
#: A row is settled on its own when the expected number of distinct surplus-arm candidates in its
#: first batch exceeds ``need`` by less than this many standard deviations (:func:`_likely_short`).
_SHORT_MARGIN = 0.5


def _adjust_rows(out: np.ndarray, rows: np.ndarray, current: np.ndarray, target: int, fixes: _IndexStream) -> None:
    """Bring each listed row of ``out`` to exactly ``target`` ones, in place, rows in order.

    For a row with ``c`` provisional ones, ``need = |c - target|`` units of
    the surplus arm (treated when ``c > target``) are switched. They are found
    by sequential sampling without replacement: candidates are drawn
    uniformly with replacement from ``fixes``, in batches of
    ``ceil(1.3 * need * size / pool) + 16`` (``pool`` the size of the surplus
    arm), and the first ``need`` distinct candidates that lie in the surplus
    arm are switched; a row whose batch holds too few takes further batches
    of the same size. Rows consume ``fixes`` one after another.

    Almost every row is settled by its first batch, so runs of rows are
    settled together (:func:`_adjust_together`). Rows whose first batch is
    likely to fall short (:func:`_likely_short`), and runs of fewer than
    ``_MIN_RUN`` other rows between them, are settled one by one
    (:func:`_adjust_row`). Either way each row reads the values of ``fixes``
    that follow those of the row before, so the result is that of settling
    the rows one by one; the grouping only changes the speed.
    """
    size = out.shape[1]
    surplus = (current > target).astype(np.uint8)
    need = np.abs(current - target)
    pool = np.where(surplus == 1, current, size - current)
    batch = np.ceil(1.3 * need * size / pool).astype(np.int64) + 16
    alone = _likely_short(need, pool, batch, size)
    edges = np.flatnonzero(np.diff(alone.view(np.int8))) + 1
    bounds = [0, *edges.tolist(), rows.size]
    for lo, hi in zip(bounds[:-1], bounds[1:]):
        if alone[lo] or hi - lo < _MIN_RUN:
            _adjust_each(out, rows[lo:hi], surplus[lo:hi], need[lo:hi], batch[lo:hi], fixes)
        else:
            _adjust_together(out, rows[lo:hi], surplus[lo:hi], need[lo:hi], batch[lo:hi], fixes)


def _likely_short(need: np.ndarray, pool: np.ndarray, batch: np.ndarray, size: int) -> np.ndarray:
    """Rows whose first batch is likely to hold fewer than ``need`` distinct surplus-arm candidates.

    A guess that only steers the speed of :func:`_adjust_rows`, never the
    result. With ``B`` uniform draws out of ``size`` units, the number ``D``
    of distinct units hit among the ``pool`` surplus-arm units is a sum of
    ``pool`` indicators, each 1 with probability ``1 - a``, any two both 1
    with probability ``1 - 2a + c``, where ``a = (1 - 1/size)**B`` and
    ``c = (1 - 2/size)**B``; hence ``E[D] = pool * (1 - a)`` and
    ``Var[D] = pool * a * (1 - a) + pool * (pool - 1) * (c - a**2)``
    (the moments of the classical occupancy problem; Feller, *An
    Introduction to Probability Theory and Its Applications*, vol. 1, from
    memory). A row is flagged when ``E[D] - need < _SHORT_MARGIN * sqrt(Var[D])``.
    """
    a = np.power(1.0 - 1.0 / size, batch)
    c = np.power(1.0 - 2.0 / size, batch)
    mean = pool * (1.0 - a)
    var = np.maximum(pool * a * (1.0 - a) + pool * (pool - 1.0) * (c - a * a), 0.0)
    return mean - need < _SHORT_MARGIN * np.sqrt(var)


def _adjust_each(
    out: np.ndarray, rows: np.ndarray, surplus: np.ndarray, need: np.ndarray, batch: np.ndarray,
    fixes: _IndexStream,
) -> None:
    """Settle the given rows one by one (:func:`_adjust_row`)."""
    for r, s, k, b in zip(rows.tolist(), surplus.tolist(), need.tolist(), batch.tolist()):
        _adjust_row(out[r], s, k, b, fixes)


def _adjust_together(
    out: np.ndarray, rows: np.ndarray, surplus: np.ndarray, need: np.ndarray, batch: np.ndarray,
    fixes: _IndexStream,
) -> None:
    """Settle the given rows in windows (:func:`_adjust_window`), in order.

    A window ends at the first row that needs a further batch; that row is
    settled on its own and the next window starts after it. Windows grow
    while they succeed and shrink after a row that fell short; their values
    are capped at ``_WINDOW_VALUES``.
    """
    ends = np.cumsum(batch)
    start, window = 0, rows.size
    while start < rows.size:
        base = int(ends[start - 1]) if start else 0
        budget = max(int(np.searchsorted(ends, base + _WINDOW_VALUES, side="right")), start + 1)
        stop = min(rows.size, start + window, budget)
        part = slice(start, stop)
        settled = _adjust_window(out, rows[part], surplus[part], need[part], batch[part], fixes)
        start += settled
        if start < stop:
            _adjust_row(out[rows[start]], int(surplus[start]), int(need[start]), int(batch[start]), fixes)
            start += 1
            window = max(_MIN_WINDOW, 2 * settled)
        else:
            window *= 2


def _adjust_window(
    out: np.ndarray, rows: np.ndarray, surplus: np.ndarray, need: np.ndarray, batch: np.ndarray,
    fixes: _IndexStream,
) -> int:
    """Settle the leading rows that one batch each suffices for; return how many were settled.

    Row ``i`` reads the ``batch[i]`` values of ``fixes`` that follow those of
    row ``i - 1``. The rows settled are switched in ``out`` (C-contiguous)
    and their values consumed; the first row whose batch holds fewer than
    ``need`` distinct surplus-arm candidates, and every row after it, are
    left untouched.
    """
    size = out.shape[1]
    flat = out.reshape(-1)  # a view: ``out`` is C-contiguous
    values = fixes.peek(int(batch.sum()))
    owner = np.repeat(np.arange(rows.size), batch)
    cells = np.repeat(rows * size, batch) + values
    hit = np.flatnonzero(flat[cells] == np.repeat(surplus, batch))
    owner, cells = owner[hit], cells[hit]
    fresh = _first_occurrences(owner * size + values[hit], rows.size * size)
    owner, cells = owner[fresh], cells[fresh]
    found = np.bincount(owner, minlength=rows.size)
    short = np.flatnonzero(found < need)
    settled = int(short[0]) if short.size else rows.size
    rank = np.arange(owner.size) - (np.cumsum(found) - found)[owner]
    switch = (rank < need[owner]) & (owner < settled)
    flat[cells[switch]] = 1 - surplus[owner[switch]]
    fixes.advance(int(batch[:settled].sum()))
    return settled


def _first_occurrences(keys: np.ndarray, span: int) -> np.ndarray:
    """Boolean mask of the entries of ``keys`` (integers in ``[0, span)``) whose value does not appear earlier.

    A table of first positions when ``span`` is small next to the number of
    keys; a stable sort otherwise.
    """
    position = np.arange(keys.size)
    if span <= 4 * keys.size:
        first = np.full(span, keys.size, dtype=position.dtype)
        np.minimum.at(first, keys, position)
        return first[keys] == position
    order = np.argsort(keys, kind="stable")
    ordered = keys[order]
    lead = np.ones(keys.size, dtype=bool)
    lead[1:] = ordered[1:] != ordered[:-1]
    mask = np.zeros(keys.size, dtype=bool)
    mask[order[lead]] = True
    return mask


def _adjust_row(row: np.ndarray, surplus: int, need: int, batch: int, fixes: _IndexStream) -> None:
    """Switch ``need`` uniformly chosen units of the surplus arm of one row, in place.

    Batches of ``batch`` candidates are read from ``fixes`` until ``need``
    distinct ones in the surplus arm are found (first appearances, in order).
    """
    cand = fixes.take(batch)
    cand = cand[row[cand] == surplus]
    ordered = np.sort(cand)
    if cand.size >= need and not np.any(ordered[1:] == ordered[:-1]):
        row[cand[:need]] = 1 - surplus
        return
    picked = _first_distinct(cand, need)
    while picked.size < need:
        more = fixes.take(batch)
        picked = _first_distinct(np.concatenate([picked, more[row[more] == surplus]]), need)
    row[picked] = 1 - surplus


def _first_distinct(values: np.ndarray, limit: int) -> np.ndarray:
    """The first ``limit`` distinct values, in order of first appearance."""
    _, first = np.unique(values, return_index=True)
    return values[np.sort(first)][:limit]


# --------------------------------------------------------------------------- construction


def mechanism_from_arrays(kind: str, z, *, block=None, cluster=None, probability=None) -> Mechanism:
    """Build the :class:`Mechanism` of a study from its assignment and labels.

    Parameters
    ----------
    kind : str
        One of :data:`KINDS`.
    z : array_like of 0/1, shape (n,)
        Observed assignment, in the study's unit order.
    block : array_like, optional
        Block labels (pair ids for ``matched_pairs``); required for blocked
        kinds, ignored by the others.
    cluster : array_like, optional
        Cluster labels; required for cluster kinds, ignored by the others.
    probability : float, optional
        ``bernoulli`` only: per-unit treatment probability used for the
        analysis draws (default: the observed share treated). Ignored by the
        other kinds, which condition on the observed number treated (per block).

    Raises
    ------
    UsageError
        Unknown ``kind`` or a missing required label array.
    DataError
        Assignment not 0/1, or labels missing or of the wrong length.
    DesignError
        The observed assignment is impossible under ``kind`` (an arm empty in a
        block, a cluster split across arms, a pair not of two units with one
        treated, a cluster spanning blocks).
    """
    kind = _check_kind(kind)
    z = _check_assignment(z)
    n = z.size
    if kind in _NEEDS_BLOCK and block is None:
        raise UsageError(f"`block` is required for mechanism {kind!r}")
    if kind in _NEEDS_CLUSTER and cluster is None:
        raise UsageError(f"`cluster` is required for mechanism {kind!r}")
    probability = _check_probability(probability)
    builder = _BUILDERS[kind]
    parts = builder(z, n, block, cluster, probability)
    for arr in (parts["unit_group"], parts["group_stratum"], parts["unit_block"]):
        arr.setflags(write=False)
    z.setflags(write=False)
    return Mechanism(kind=kind, z=z, **parts)


def _both_arms(treated: int, total: int, where: str) -> None:
    if treated == 0 or treated == total:
        arm = "treated" if treated == 0 else "control"
        raise DesignError(f"{where} has no {arm} unit ({treated} of {total} treated); both arms are needed")


def _build_complete(z, n, block, cluster, probability) -> dict:
    t = int(z.sum())
    _both_arms(t, n, "the study")
    return dict(unit_group=np.arange(n, dtype=np.intp), group_stratum=np.zeros(n, np.intp),
                stratum_size=(n,), stratum_treated=(t,), unit_block=np.zeros(n, np.intp))


def _build_bernoulli(z, n, block, cluster, probability) -> dict:
    t = int(z.sum())
    _both_arms(t, n, "the study")
    p = probability if probability is not None else t / n
    return dict(unit_group=np.arange(n, dtype=np.intp), group_stratum=np.zeros(n, np.intp),
                stratum_size=(n,), stratum_treated=(t,), unit_block=np.zeros(n, np.intp),
                probability=float(p))


def _build_blocked(z, n, block, cluster, probability) -> dict:
    codes, labels = _codes(block, "block", n)
    sizes = np.bincount(codes, minlength=len(labels))
    treated = np.bincount(codes, weights=z, minlength=len(labels)).astype(int)
    for b, label in enumerate(labels):
        _both_arms(int(treated[b]), int(sizes[b]), f"block {label!r}")
    return dict(unit_group=np.arange(n, dtype=np.intp), group_stratum=codes, block_labels=labels,
                stratum_size=tuple(int(s) for s in sizes), stratum_treated=tuple(int(t) for t in treated),
                unit_block=codes)


def _build_matched_pairs(z, n, block, cluster, probability) -> dict:
    codes, labels = _codes(block, "block", n)
    sizes = np.bincount(codes, minlength=len(labels))
    treated = np.bincount(codes, weights=z, minlength=len(labels)).astype(int)
    for b, label in enumerate(labels):
        if sizes[b] != 2 or treated[b] != 1:
            raise DesignError(
                f"pair {label!r} has {int(sizes[b])} unit(s) with {int(treated[b])} treated; "
                "each pair needs exactly two units, one treated"
            )
    return dict(unit_group=np.arange(n, dtype=np.intp), group_stratum=codes, block_labels=labels,
                stratum_size=(2,) * len(labels), stratum_treated=(1,) * len(labels), unit_block=codes)


def _cluster_arms(z, ccodes, clabels) -> np.ndarray:
    """Treatment of each cluster; a cluster split across arms is an error."""
    g = len(clabels)
    hi = np.zeros(g, np.uint8)
    lo = np.ones(g, np.uint8)
    np.maximum.at(hi, ccodes, z)
    np.minimum.at(lo, ccodes, z)
    split = np.flatnonzero(hi != lo)
    if split.size:
        names = ", ".join(repr(clabels[c]) for c in split[:5])
        raise DesignError(f"cluster(s) {names} are split across arms; a cluster is assigned as a whole")
    return hi


def _build_cluster(z, n, block, cluster, probability) -> dict:
    ccodes, clabels = _codes(cluster, "cluster", n)
    arms = _cluster_arms(z, ccodes, clabels)
    g = len(clabels)
    _both_arms(int(arms.sum()), g, "the study (counting clusters)")
    return dict(unit_group=ccodes, group_stratum=np.zeros(g, np.intp), cluster_labels=clabels,
                stratum_size=(g,), stratum_treated=(int(arms.sum()),), unit_block=np.zeros(n, np.intp))


def _build_blocked_cluster(z, n, block, cluster, probability) -> dict:
    bcodes, blabels = _codes(block, "block", n)
    ccodes, clabels = _codes(cluster, "cluster", n)
    arms = _cluster_arms(z, ccodes, clabels)
    g = len(clabels)
    cblock = np.full(g, -1, np.intp)
    cblock[ccodes] = bcodes
    spans = np.flatnonzero(cblock[ccodes] != bcodes)
    if spans.size:
        raise DesignError(f"cluster {clabels[ccodes[spans[0]]]!r} spans more than one block; "
                          "clusters must be nested in blocks")
    sizes = np.bincount(cblock, minlength=len(blabels))
    treated = np.bincount(cblock, weights=arms, minlength=len(blabels)).astype(int)
    for b, label in enumerate(blabels):
        _both_arms(int(treated[b]), int(sizes[b]), f"block {label!r} (counting clusters)")
    return dict(unit_group=ccodes, group_stratum=cblock, block_labels=blabels, cluster_labels=clabels,
                stratum_size=tuple(int(s) for s in sizes), stratum_treated=tuple(int(t) for t in treated),
                unit_block=bcodes)


_BUILDERS = {
    "complete": _build_complete,
    "bernoulli": _build_bernoulli,
    "blocked": _build_blocked,
    "cluster": _build_cluster,
    "blocked_cluster": _build_blocked_cluster,
    "matched_pairs": _build_matched_pairs,
}


# --------------------------------------------------------------------------- the real draw


def draw_assignment(kind: str, ids, *, seed: int, block=None, cluster=None, probability=None) -> np.ndarray:
    """Draw the real assignment of a study from ``design.seed``.

    The algorithm is fixed so that anyone can reproduce the assignment from the
    spec alone (``docs/methods/randomization.md``):

    1. ``rng = numpy.random.default_rng(seed)``; units are sorted by id
       (ascending); blocks and clusters are taken in ascending label order,
       and within a block units (or clusters) keep id (label) order.
    2. ``p = probability`` (default 0.5); the number treated among ``m``
       randomization units is :func:`number_treated` ``(p, m)``.
    3. ``complete``: ``perm = rng.permutation(n)``; the sorted units at
       positions ``perm[:k]`` are treated. ``blocked``: the same within each
       block in turn. ``matched_pairs``: ``blocked`` with ``p = 0.5`` (one
       unit of each pair). ``cluster``: the same over the sorted clusters;
       units follow their cluster. ``blocked_cluster``: ``cluster`` within
       each block in turn. ``bernoulli``: unit ``i`` (sorted) is treated
       when ``rng.random(n)[i] < p``.

    Returns
    -------
    ndarray of uint8, shape (n,)
        0/1 in the order of the given ``ids``.
    """
    seed = _check_seed(seed)
    draw = _draw_plan(kind, ids, block=block, cluster=cluster, probability=probability)
    return draw(np.random.default_rng(seed))


def _draw_plan(kind: str, ids, *, block=None, cluster=None, probability=None):
    """Validate the units once; return ``draw(rng)``: one assignment (steps 2-3 above) in ``ids`` order.

    Each call consumes ``rng`` as one draw of :func:`draw_assignment` does, so
    repeated calls continue one documented stream (used by rerandomization).
    """
    kind = _check_kind(kind)
    p = _check_probability(probability)
    p = 0.5 if p is None else p
    ids = np.asarray(ids)
    n = ids.size
    order = _id_order(ids)
    if kind in _NEEDS_BLOCK and block is None:
        raise UsageError(f"`block` is required for mechanism {kind!r}")
    if kind in _NEEDS_CLUSTER and cluster is None:
        raise UsageError(f"`cluster` is required for mechanism {kind!r}")
    if kind == "matched_pairs":
        p = 0.5
    bcodes = _codes(block, "block", n)[0][order] if kind in _NEEDS_BLOCK else np.zeros(n, np.intp)
    ccodes = _codes(cluster, "cluster", n)[0][order] if kind in _NEEDS_CLUSTER else None
    clabels = np.asarray(cluster)[order] if kind in _NEEDS_CLUSTER else None
    _check_draw_structure(kind, bcodes, ccodes)

    def draw(rng: np.random.Generator) -> np.ndarray:
        out = np.empty(n, dtype=np.uint8)
        out[order] = _DRAWS[kind](rng, n, p, bcodes, clabels)
        return out

    return draw


def _id_order(ids: np.ndarray) -> np.ndarray:
    if ids.ndim != 1 or ids.size == 0:
        raise DataError(f"`ids` must be a non-empty one-dimensional array; got shape {ids.shape}")
    if np.any(pd.isna(ids)):
        raise DataError("`ids` has missing values; every unit needs an id")
    try:
        order = np.argsort(ids, kind="stable")
    except TypeError as err:
        raise DataError("`ids` must be all numbers or all text; got a mixture") from err
    sorted_ids = ids[order]
    dup = sorted_ids[1:] == sorted_ids[:-1]
    if np.any(dup):
        raise DataError(f"`ids` must be unique; {sorted_ids[1:][dup].tolist()[0]!r} appears more than once")
    return order


def _check_draw_structure(kind: str, bcodes: np.ndarray, ccodes: np.ndarray | None) -> None:
    if kind == "matched_pairs":
        sizes = np.bincount(bcodes)
        if np.any(sizes != 2):
            raise DesignError(f"each pair needs exactly two units; pair number {int(np.argmax(sizes != 2)) + 1} "
                              f"(in label order) has {int(sizes[sizes != 2][0])}")
    if kind == "blocked_cluster":
        first = np.full(int(ccodes.max()) + 1, -1, np.intp)
        first[ccodes] = bcodes
        if np.any(first[ccodes] != bcodes):
            raise DesignError("a cluster spans more than one block; clusters must be nested in blocks")


def _split(rng: np.random.Generator, size: int, p: float, where: str) -> np.ndarray:
    k = number_treated(p, size)
    _both_arms(k, size, where)
    z = np.zeros(size, dtype=np.uint8)
    z[rng.permutation(size)[:k]] = 1
    return z


def _draw_complete(rng, n, p, bcodes, cluster) -> np.ndarray:
    return _split(rng, n, p, "the study")


def _draw_bernoulli(rng, n, p, bcodes, cluster) -> np.ndarray:
    return (rng.random(n) < p).astype(np.uint8)


def _draw_blocked(rng, n, p, bcodes, cluster) -> np.ndarray:
    z = np.zeros(n, dtype=np.uint8)
    for b in range(int(bcodes.max()) + 1):
        members = np.flatnonzero(bcodes == b)
        z[members] = _split(rng, members.size, p, f"block number {b + 1} (in label order)")
    return z


def _draw_cluster_within(rng, p, clabels: np.ndarray, where: str) -> np.ndarray:
    ccodes, labels = _codes(clabels, "cluster", clabels.size)
    return _split(rng, len(labels), p, where)[ccodes]


def _draw_cluster(rng, n, p, bcodes, cluster) -> np.ndarray:
    return _draw_cluster_within(rng, p, cluster, "the study (counting clusters)")


def _draw_blocked_cluster(rng, n, p, bcodes, cluster) -> np.ndarray:
    z = np.zeros(n, dtype=np.uint8)
    for b in range(int(bcodes.max()) + 1):
        members = np.flatnonzero(bcodes == b)
        z[members] = _draw_cluster_within(rng, p, cluster[members], f"block number {b + 1} (in label order)")
    return z


_DRAWS = {
    "complete": _draw_complete,
    "bernoulli": _draw_bernoulli,
    "blocked": _draw_blocked,
    "cluster": _draw_cluster,
    "blocked_cluster": _draw_blocked_cluster,
    "matched_pairs": _draw_blocked,
}

