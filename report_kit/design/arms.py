"""Multi-arm assignment mechanisms: count, enumerate, sample and draw assignments of K arms.

Owns the multi-arm counterpart of :class:`report_kit.design.mechanism.Mechanism`.
Randomization units (units, or clusters) are grouped into strata (one
stratum, or the blocks); under analysis the mechanism conditions on the
observed number of randomization units of each arm in each stratum (Fisher
1935), so every assignment permutes the arm labels within strata. A Bernoulli
design is analysed the same way, conditionally on the arm sizes (a valid
randomization test under independent draws: given the sizes every permutation
is equally likely). Assignments are ``(rows, n)`` ``int8`` arrays of arm codes
(0 = the reference arm). :func:`draw_arms` draws the one real assignment from
``design.seed``; the algorithm is in ``docs/methods/arms.md``.
"""

from __future__ import annotations

import itertools
import math
from collections.abc import Iterator
from dataclasses import dataclass

import numpy as np

from report_kit.errors import DesignError

__all__ = ["MultiArmMechanism", "ArmSource", "multi_arm_mechanism", "draw_arms"]

ARM_KINDS = ("complete", "bernoulli", "blocked", "cluster", "blocked_cluster")
_CHUNK_CELLS = 1 << 22
MAX_COUNT_DIGITS = 20  # longer counts are reported by their base-10 logarithm only


def _codes(labels) -> np.ndarray:
    """Codes of labels in sorted label order (numbers by value, otherwise as text)."""
    values = np.asarray(labels)
    if values.dtype == object:
        values = np.asarray([str(v) for v in values], dtype=object)
    _, codes = np.unique(values, return_inverse=True)
    return codes.astype(np.intp).ravel()


@dataclass(frozen=True, kw_only=True, eq=False)
class MultiArmMechanism:
    """Permutations of arm labels among randomization units within strata.

    Attributes
    ----------
    kind : str
    arm : ndarray of int8, shape (n,)
        Observed arm code of each unit.
    n_arms : int
    unit_group : ndarray of intp, shape (n,)
        Randomization unit of each unit (its cluster, or itself).
    group_arm : ndarray of int8, shape (G,)
        Observed arm of each randomization unit.
    strata : tuple of ndarray
        The randomization units of each stratum.
    """

    kind: str
    arm: np.ndarray
    n_arms: int
    unit_group: np.ndarray
    group_arm: np.ndarray
    strata: tuple

    @property
    def n(self) -> int:
        return int(self.arm.size)

    def count(self) -> int:
        """Number of assignments: ``prod_s G_s! / prod_k G_sk!`` (multinomial coefficients)."""
        total = 1
        for members in self.strata:
            counts = np.bincount(self.group_arm[members], minlength=self.n_arms)
            total *= math.factorial(members.size) // math.prod(math.factorial(int(c)) for c in counts)
        return total

    def log10_count(self) -> float:
        """Base-10 logarithm of :meth:`count`, from ``lgamma`` (cheap for huge designs)."""
        total = 0.0
        for members in self.strata:
            counts = np.bincount(self.group_arm[members], minlength=self.n_arms)
            total += math.lgamma(members.size + 1) - sum(math.lgamma(int(c) + 1) for c in counts)
        return total / math.log(10.0)

    def count_text(self, max_digits: int = MAX_COUNT_DIGITS) -> str | None:
        """:meth:`count` as decimal digits when it has at most ``max_digits`` digits, else ``None``."""
        if self.log10_count() >= max_digits + 1:
            return None
        text = str(self.count())
        return text if len(text) <= max_digits else None

    def enumerate_chunks(self) -> Iterator[np.ndarray]:
        """Every assignment once (strata in order, last stratum fastest), in chunks."""
        per_stratum = [_distinct_orders(self.group_arm[members], self.n_arms) for members in self.strata]
        rows = max(1, _CHUNK_CELLS // max(self.n, 1))
        product = itertools.product(*per_stratum)
        while True:
            batch = list(itertools.islice(product, rows))
            if not batch:
                return
            groups = np.empty((len(batch), self.group_arm.size), dtype=np.int8)
            for s, members in enumerate(self.strata):
                groups[:, members] = np.asarray([row[s] for row in batch], dtype=np.int8)
            yield groups[:, self.unit_group]

    def chunk_rows(self) -> int:
        """Draws per chunk: about four million cells, at most 1024 (fixed by the number of units alone)."""
        return int(max(1, min(1024, _CHUNK_CELLS // max(self.n, 1))))

    def sample_block(self, size: int, seed_sequence: np.random.SeedSequence) -> np.ndarray:
        """``size`` random assignments as ``(size, n)`` ``int8`` arm codes, from one seed sequence.

        In each stratum the observed arm labels of its randomization units are
        put in a uniformly random order, row by row (``Generator.permuted``, a
        Fisher–Yates shuffle of each row), with ``numpy.random.default_rng(seed_sequence)``;
        every assignment with the observed arm sizes per stratum is equally likely.
        """
        rng = np.random.default_rng(seed_sequence)
        groups = np.empty((size, self.group_arm.size), dtype=np.int8)
        for members in self.strata:
            block = np.tile(np.sort(self.group_arm[members]).astype(np.int8), (size, 1))
            groups[:, members] = rng.permuted(block, axis=1, out=block)
        return groups[:, self.unit_group]

    def sample_chunks(self, draws: int, seed: int) -> Iterator[np.ndarray]:
        """``draws`` random assignments in chunks of :meth:`chunk_rows`.

        Chunk ``i`` is :meth:`sample_block` with child ``i`` of
        ``SeedSequence(seed)`` (``SeedSequence(seed, spawn_key=(i,))``), as in
        the two-arm engine, so any chunk can be made on its own, in any process,
        without the ones before it.
        """
        for i in range(-(-draws // self.chunk_rows())):
            yield self.sample_chunk(i, draws, seed)

    def sample_chunk(self, i: int, draws: int, seed: int) -> np.ndarray:
        """Chunk ``i`` of :meth:`sample_chunks` on its own (any process, any order)."""
        rows = self.chunk_rows()
        size = min(rows, draws - i * rows)
        return self.sample_block(size, np.random.SeedSequence(seed, spawn_key=(i,)))


@dataclass(frozen=True, kw_only=True, eq=False)
class ArmSource:
    """The multi-arm assignments a test runs over: all of them, or seeded draws."""

    mechanism: MultiArmMechanism
    method: str
    draws: int
    seed: int | None

    def chunks(self) -> Iterator[np.ndarray]:
        if self.method == "exact":
            return self.mechanism.enumerate_chunks()
        return self.mechanism.sample_chunks(self.draws, self.seed)

    @classmethod
    def choose(cls, mechanism: MultiArmMechanism, *, max_exact: int, draws: int, seed: int) -> ArmSource:
        """Every assignment when there are at most ``max_exact``; otherwise ``draws`` seeded ones."""
        if mechanism.log10_count() <= math.log10(max(max_exact, 1)) + 1 and mechanism.count() <= max_exact:
            return cls(mechanism=mechanism, method="exact", draws=mechanism.count(), seed=None)
        return cls(mechanism=mechanism, method="monte_carlo", draws=int(draws), seed=int(seed))


def _distinct_orders(labels: np.ndarray, n_arms: int) -> list[tuple[int, ...]]:
    """Every distinct arrangement of a multiset of arm codes (multinomial order, lexicographic)."""
    counts = np.bincount(labels, minlength=n_arms).tolist()
    out: list[tuple[int, ...]] = []

    def place(prefix: list[int]) -> None:
        if len(prefix) == labels.size:
            out.append(tuple(prefix))
            return
        for k in range(n_arms):
            if counts[k]:
                counts[k] -= 1
                prefix.append(k)
                place(prefix)
                prefix.pop()
                counts[k] += 1

    place([])
    return out


def multi_arm_mechanism(kind: str, arm, *, n_arms: int, block=None, cluster=None) -> MultiArmMechanism:
    """Build the multi-arm mechanism of a study from arm codes (0..K-1) and labels.

    Raises ``ValueError`` for an unknown kind, a missing block/cluster array,
    codes out of range, or a cluster split across arms or blocks.
    """
    if kind not in ARM_KINDS:
        raise ValueError(f"`kind` must be one of {set(ARM_KINDS)} for a multi-arm design; got {kind!r}")
    arm = np.asarray(arm)
    if arm.ndim != 1 or not np.issubdtype(arm.dtype, np.integer) or arm.min() < 0 or arm.max() >= n_arms:
        raise ValueError(f"`arm` must be a 1-d array of arm codes 0..{n_arms - 1}")
    n = arm.size
    clustered = kind in ("cluster", "blocked_cluster")
    blocked = kind in ("blocked", "blocked_cluster")
    if (clustered and cluster is None) or (blocked and block is None):
        raise ValueError(f"mechanism {kind!r} needs {'cluster' if clustered and cluster is None else 'block'} labels")
    unit_group = _codes(cluster) if clustered else np.arange(n, dtype=np.intp)
    g = int(unit_group.max()) + 1
    group_arm = np.full(g, -1, dtype=np.int64)
    group_arm[unit_group] = arm
    if np.any(group_arm[unit_group] != arm):
        raise ValueError("a cluster is split across arms; a cluster is assigned as a whole")
    stratum = np.zeros(g, dtype=np.intp)
    if blocked:
        unit_block = _codes(block)
        stratum[unit_group] = unit_block
        if np.any(stratum[unit_group] != unit_block):
            raise ValueError("a cluster spans more than one block; clusters must be nested in blocks")
    strata = tuple(np.flatnonzero(stratum == s) for s in range(int(stratum.max()) + 1))
    return MultiArmMechanism(kind=kind, arm=arm.astype(np.int8), n_arms=int(n_arms), unit_group=unit_group,
                             group_arm=group_arm.astype(np.int8), strata=strata)


def draw_arms(kind: str, n_arms: int, ids, *, seed: int, block=None, cluster=None,
              probabilities=None) -> np.ndarray:
    """Draw a multi-arm assignment from ``design.seed``.

    Algorithm (fixed; ``docs/methods/arms.md``): units are sorted by id;
    randomization units are the units, or the clusters sorted by label; strata
    are the blocks sorted by label (one stratum without blocks). With
    ``rng = numpy.random.default_rng(seed)``:

    * ``bernoulli``: ``rng.integers(0, K, size=G)`` gives each randomization unit
      (in sorted order) an arm with probability ``1/K``, independently; with
      ``probabilities`` ``p_0..p_{K-1}`` (``design.probability`` as a mapping,
      in arm order) instead ``u = rng.random(G)`` and each unit gets the first
      arm ``k`` with ``u < p_0 + ... + p_k`` (the last arm when rounding leaves
      none), so arm ``k`` with probability ``p_k``, independently;
    * otherwise, stratum by stratum in label order, the stratum's ``G``
      randomization units (in sorted order) receive the labels
      ``[0, 1, ..., K-1, 0, 1, ...]`` (``G`` labels, so arm sizes differ by at
      most one and earlier arms get the extra unit) permuted by
      ``rng.permutation(G)``.

    Returns the arm code (0..K-1) of each unit in the caller's order. Raises
    :class:`~report_kit.errors.DesignError` when a stratum has fewer
    randomization units than arms.
    """
    if kind not in ARM_KINDS:
        raise ValueError(f"`kind` must be one of {set(ARM_KINDS)} for a multi-arm design; got {kind!r}")
    ids = np.asarray(ids)
    n = ids.size
    rng = np.random.default_rng(seed)
    if cluster is not None:
        group = _codes(cluster)
    else:
        group = np.empty(n, dtype=np.intp)
        group[np.argsort(_codes(ids), kind="stable")] = np.arange(n)
    g = int(group.max()) + 1
    group_stratum = np.zeros(g, dtype=np.intp)
    group_stratum[group] = _codes(block) if block is not None else 0
    if probabilities is not None:
        p = np.asarray(probabilities, dtype=float)
        if kind != "bernoulli" or p.shape != (n_arms,) or np.any(p <= 0) or abs(p.sum() - 1.0) > 1e-9:
            raise ValueError(f"`probabilities` must be {n_arms} positive numbers summing to 1, for a bernoulli "
                             f"design; got {probabilities!r} for {kind!r}")
        codes = np.minimum(np.searchsorted(np.cumsum(p), rng.random(g), side="right"), n_arms - 1)
        return codes[group].astype(int)
    if kind == "bernoulli":
        return rng.integers(0, n_arms, size=g)[group].astype(int)
    group_arm = np.empty(g, dtype=np.int8)
    for s in range(int(group_stratum.max()) + 1):
        members = np.flatnonzero(group_stratum == s)
        if members.size < n_arms:
            what = "cluster(s)" if cluster is not None else "unit(s)"
            where = "the study" if block is None else f"block number {s + 1} in label order"
            raise DesignError(f"{where} has {members.size} {what}, fewer than the {n_arms} arms; every arm "
                              "needs one")
        labels = np.arange(members.size) % n_arms
        group_arm[members] = labels[rng.permutation(members.size)]
    return group_arm[group].astype(int)

