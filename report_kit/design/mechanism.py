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

The one real assignment of a study is drawn from ``design.seed`` by
:func:`report_kit.design.draw.draw_assignment`; the sampling algorithms behind
:meth:`Mechanism.sample_chunks` live in :mod:`report_kit.design.sampling`.

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

import numpy as np

from report_kit.errors import DesignError
from report_kit.validate import MECHANISMS
from report_kit.design.arguments import (  # noqa: F401  (number_treated is public here)
    _NEEDS_BLOCK, _NEEDS_CLUSTER, _both_arms, _check_assignment, _check_kind, _check_positive_int,
    _check_probability, _check_seed, _codes, number_treated,
)
from report_kit.design.sampling import _IndexStream, _threshold_and_adjust, _unrank_combinations

__all__ = [
    "KINDS",
    "AssignmentSource",
    "Mechanism",
    "mechanism_from_arrays",
    "number_treated",
]

logger = logging.getLogger(__name__)

KINDS = MECHANISMS
#: Target number of assignment cells (draws x units) held in one chunk.
CHUNK_CELLS = 1 << 22


#: Counts of assignments with more digits than this are described by their size (10^N) only.
MAX_COUNT_DIGITS = 20


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
            raise ValueError(f"cannot enumerate {total} assignments; use sample_chunks")
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
            raise ValueError(f"`seed_sequence` must be a numpy.random.SeedSequence; got {type(seed_sequence).__name__}")
        key_seq, fix_seq = seed_sequence.spawn(2)
        keys = np.random.Generator(np.random.PCG64(key_seq))
        fixes = _IndexStream(np.random.Generator(np.random.PCG64(fix_seq)), self.n_groups)
        return self._sample_rows(rows, keys, fixes)

    def enumerate_range(self, start: int, stop: int) -> np.ndarray:
        """Assignments number ``start`` to ``stop - 1`` of :meth:`enumerate_chunks`, as ``uint8`` rows."""
        total = self.count()
        if total > np.iinfo(np.int64).max:
            raise ValueError(f"cannot enumerate {total} assignments; use sample_chunks")
        if not (isinstance(start, int) and isinstance(stop, int) and 0 <= start <= stop <= total):
            raise ValueError(f"`start` and `stop` must be integers with 0 <= start <= stop <= {total}; "
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
        raise ValueError(f"`block` is required for mechanism {kind!r}")
    if kind in _NEEDS_CLUSTER and cluster is None:
        raise ValueError(f"`cluster` is required for mechanism {kind!r}")
    probability = _check_probability(probability)
    builder = _BUILDERS[kind]
    parts = builder(z, n, block, cluster, probability)
    for arr in (parts["unit_group"], parts["group_stratum"], parts["unit_block"]):
        arr.setflags(write=False)
    z.setflags(write=False)
    return Mechanism(kind=kind, z=z, **parts)


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


def __getattr__(name: str):
    # draw_assignment lived here before 2026-12; it is now in report_kit.design.draw (loaded on first use,
    # since that module imports this one)
    if name == "draw_assignment":
        from report_kit.design.draw import draw_assignment

        return draw_assignment
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
