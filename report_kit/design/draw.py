"""The one real assignment of a study, drawn from ``design.seed`` (``report-kit assign`` and ``check``).

A fixed, documented algorithm over ``numpy.random.default_rng(seed)`` with
units sorted by id and blocks and clusters sorted by label, so the assignment
is reproducible from the spec alone; see ``docs/methods/randomization.md``.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from report_kit.design.arguments import (
    _NEEDS_BLOCK, _NEEDS_CLUSTER, _both_arms, _check_kind, _check_probability, _check_seed, _codes, number_treated,
)
from report_kit.errors import DataError, DesignError

__all__ = ["draw_assignment"]


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
        raise ValueError(f"`block` is required for mechanism {kind!r}")
    if kind in _NEEDS_CLUSTER and cluster is None:
        raise ValueError(f"`cluster` is required for mechanism {kind!r}")
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
