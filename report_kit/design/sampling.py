"""Sampling algorithms behind :class:`~report_kit.design.mechanism.Mechanism` (private to ``design/``).

Unranking of combinations for enumeration in chunks, and the Monte Carlo
sampler: random keys thresholded per stratum, then corrected row by row (or
in windows of rows) to the fixed number treated, reading one stream of random
indices so that the draws do not depend on the chunk size. Documented in
``docs/methods/randomization.md`` and ``docs/performance.md``.
"""

from __future__ import annotations

import math

import numpy as np


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
