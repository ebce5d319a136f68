"""Tests of report_kit.design.mechanism: counting, enumerating, sampling and drawing assignments.

Outside references: binomial-coefficient identities (C(n, k), products over
blocks, 2**P for P pairs), brute-force enumeration with ``itertools`` written
here independently of the library, Pearson's chi-square goodness-of-fit test
(``scipy.stats.chisquare``) for uniformity, a re-implementation of the
documented drawing algorithm (docs/methods/randomization.md), and a frozen copy
of the previous Monte Carlo sampler (``previous_sample_chunks``), which the
current one must reproduce bit for bit.
"""

from __future__ import annotations

import itertools
import math
from collections import Counter

import numpy as np
import pytest
from scipy import stats

from report_kit.design.draw import draw_assignment
from report_kit.design.mechanism import (
    AssignmentSource,
    mechanism_from_arrays,
    number_treated,
)
from report_kit.errors import DataError, DesignError

# --------------------------------------------------------------------------- small designs

Z10 = np.array([1, 0, 1, 0, 0, 1, 1, 0, 0, 0])
BLOCK10 = np.array(list("aabbbccccc"))
CLUSTER10 = np.array([1, 1, 2, 2, 3, 3, 4, 4, 5, 5])
Z_CLUSTER10 = np.array([1, 1, 0, 0, 1, 1, 0, 0, 0, 0])
BLOCK_BC = np.array(list("xxxxxxyyyy"))           # clusters 1-3 in x, 4-5 in y
Z_BC = np.array([1, 1, 0, 0, 0, 0, 1, 1, 0, 0])
PAIRS = np.repeat(np.arange(4), 2)
Z_PAIRS = np.array([1, 0, 0, 1, 1, 0, 0, 1])


def small_designs():
    return {
        "complete": mechanism_from_arrays("complete", Z10),
        "bernoulli": mechanism_from_arrays("bernoulli", Z10[:6], probability=0.3),
        "blocked": mechanism_from_arrays("blocked", Z10, block=BLOCK10),
        "cluster": mechanism_from_arrays("cluster", Z_CLUSTER10, cluster=CLUSTER10),
        "blocked_cluster": mechanism_from_arrays("blocked_cluster", Z_BC, block=BLOCK_BC, cluster=CLUSTER10),
        "matched_pairs": mechanism_from_arrays("matched_pairs", Z_PAIRS, block=PAIRS),
    }


def brute_force(kind: str) -> set[tuple[int, ...]]:
    """Every assignment of the small designs above, by itertools (independent of the library)."""
    if kind == "complete":
        return {tuple(int(i in c) for i in range(10)) for c in itertools.combinations(range(10), 4)}
    if kind == "bernoulli":
        return set(itertools.product((0, 1), repeat=6))
    if kind == "blocked":
        blocks = [np.flatnonzero(BLOCK10 == b) for b in "abc"]
        out = set()
        for ca, cb, cc in itertools.product(itertools.combinations(blocks[0], 1),
                                            itertools.combinations(blocks[1], 1),
                                            itertools.combinations(blocks[2], 2)):
            out.add(tuple(int(i in ca + cb + cc) for i in range(10)))
        return out
    if kind == "cluster":
        return {tuple(int(CLUSTER10[i] in c) for i in range(10))
                for c in itertools.combinations(range(1, 6), 2)}
    if kind == "blocked_cluster":
        return {tuple(int(CLUSTER10[i] in cx + cy) for i in range(10))
                for cx in itertools.combinations((1, 2, 3), 1) for cy in itertools.combinations((4, 5), 1)}
    if kind == "matched_pairs":
        return {tuple(v for p in flips for v in ((1, 0) if p else (0, 1)))
                for flips in itertools.product((0, 1), repeat=4)}
    raise AssertionError(kind)


# --------------------------------------------------------------------------- counting


def test_count_complete_is_binomial():
    # C(n, k): binomial coefficient identity
    z = np.array([1] * 7 + [0] * 13)
    assert mechanism_from_arrays("complete", z).count() == math.comb(20, 7) == 77520


def test_count_blocked_is_product_of_binomials():
    # product over blocks of C(n_b, k_b)
    assert small_designs()["blocked"].count() == math.comb(2, 1) * math.comb(3, 1) * math.comb(5, 2) == 60


def test_count_cluster_counts_clusters():
    # C(number of clusters, treated clusters)
    assert small_designs()["cluster"].count() == math.comb(5, 2)
    assert small_designs()["blocked_cluster"].count() == math.comb(3, 1) * math.comb(2, 1)


def test_count_pairs_and_bernoulli_are_powers_of_two():
    # 2**P sign assignments for P pairs; 2**n subsets for Bernoulli
    assert small_designs()["matched_pairs"].count() == 2 ** 4
    assert small_designs()["bernoulli"].count() == 2 ** 6


def test_count_is_exact_for_huge_designs():
    z = np.zeros(2000, dtype=int)
    z[:1000] = 1
    mech = mechanism_from_arrays("complete", z)
    assert mech.count() == math.comb(2000, 1000)
    assert not mech.count_at_most(10 ** 12)
    assert mech.log_count() == pytest.approx(math.log(math.comb(2000, 1000)), rel=1e-12)


# --------------------------------------------------------------------------- enumeration


@pytest.mark.parametrize("kind", ["complete", "bernoulli", "blocked", "cluster", "blocked_cluster", "matched_pairs"])
def test_enumeration_equals_brute_force(kind):
    mech = small_designs()[kind]
    rows = np.vstack(list(mech.enumerate_chunks(7)))
    assert rows.dtype == np.uint8 and rows.shape == (mech.count(), mech.n)
    found = [tuple(int(v) for v in r) for r in rows]
    assert len(set(found)) == len(found)
    assert set(found) == brute_force(kind)


@pytest.mark.parametrize("kind", ["complete", "blocked", "cluster", "matched_pairs"])
def test_enumeration_does_not_depend_on_chunk_size(kind):
    mech = small_designs()[kind]
    whole = np.vstack(list(mech.enumerate_chunks(10 ** 6)))
    for size in (1, 3, 16):
        assert np.array_equal(np.vstack(list(mech.enumerate_chunks(size))), whole)


def test_enumeration_contains_observed_assignment():
    for mech in small_designs().values():
        rows = np.vstack(list(mech.enumerate_chunks()))
        assert (rows == mech.z).all(axis=1).sum() == 1


# --------------------------------------------------------------------------- sampling


@pytest.mark.parametrize("kind", ["complete", "bernoulli", "blocked", "cluster", "blocked_cluster", "matched_pairs"])
def test_sampling_does_not_depend_on_chunk_size(kind):
    mech = small_designs()[kind]
    reference = np.vstack(list(mech.sample_chunks(97, 20261201, 97)))
    for size in (1, 5, 32):
        assert np.array_equal(np.vstack(list(mech.sample_chunks(97, 20261201, size))), reference)
    assert not np.array_equal(np.vstack(list(mech.sample_chunks(97, 20261202, 97))), reference)


@pytest.mark.parametrize("kind", ["complete", "blocked", "cluster", "blocked_cluster", "matched_pairs"])
def test_samples_are_possible_assignments(kind):
    mech = small_designs()[kind]
    allowed = brute_force(kind)
    rows = np.vstack(list(mech.sample_chunks(300, 7)))
    assert rows.dtype == np.uint8
    assert {tuple(int(v) for v in r) for r in rows} <= allowed


@pytest.mark.parametrize("kind,draws", [("complete", 21000), ("blocked", 18000), ("cluster", 10000)])
def test_sampling_is_uniform(kind, draws):
    # Pearson chi-square goodness of fit to the uniform distribution (scipy.stats.chisquare);
    # fixed seed, so the outcome is deterministic; 1e-4 leaves room for an honest sampler.
    mech = small_designs()[kind]
    rows = np.vstack(list(mech.sample_chunks(draws, 11)))
    freq = Counter(tuple(r) for r in rows.tolist())
    assert len(freq) == mech.count()
    assert stats.chisquare(list(freq.values())).pvalue > 1e-4


def test_threshold_and_adjust_hits_exact_count_and_is_uniform_per_unit():
    # complete randomization far from one half: every draw has exactly k treated, and each unit is
    # treated with probability k / n (chi-square over units of the inclusion counts).
    n, k = 301, 37
    z = np.zeros(n, dtype=int)
    z[:k] = 1
    mech = mechanism_from_arrays("complete", z)
    rows = np.vstack(list(mech.sample_chunks(4000, 3, 333)))
    assert np.all(rows.sum(axis=1) == k)
    counts = rows.sum(axis=0)
    expected = 4000 * k / n
    chi2 = float(((counts - expected) ** 2 / (expected * (1 - k / n))).sum())
    assert stats.chi2.sf(chi2, n - 1) > 1e-4


def test_bernoulli_sampling_uses_probability():
    mech = mechanism_from_arrays("bernoulli", np.array([1, 0] * 50), probability=0.2)
    rows = np.vstack(list(mech.sample_chunks(2000, 5)))
    # binomial test of the overall treated share against p = 0.2 (scipy.stats.binomtest)
    assert stats.binomtest(int(rows.sum()), rows.size, 0.2).pvalue > 1e-4


def test_bernoulli_default_probability_is_observed_share():
    mech = mechanism_from_arrays("bernoulli", np.array([1, 0, 0, 0]))
    assert mech.probability == 0.25


def test_bernoulli_weights_are_binomial_probabilities():
    mech = small_designs()["bernoulli"]
    rows = np.vstack(list(mech.enumerate_chunks()))
    w = mech.weights(rows)
    assert w.sum() == pytest.approx(1.0, rel=1e-12)  # binomial theorem
    k = rows.sum(axis=1)
    assert np.allclose(w, 0.3 ** k * 0.7 ** (6 - k), rtol=1e-12)
    assert small_designs()["complete"].weights(rows) is None


def test_inclusion_probability():
    assert np.allclose(small_designs()["blocked"].inclusion_probability(),
                       [0.5, 0.5, 1 / 3, 1 / 3, 1 / 3, 0.4, 0.4, 0.4, 0.4, 0.4])
    assert np.allclose(small_designs()["cluster"].inclusion_probability(), 0.4)


# --------------------------------------------------------------------------- choosing a source


def test_assignments_switches_between_exact_and_monte_carlo():
    mech = small_designs()["complete"]
    exact = mech.assignments(max_exact=210, draws=50, seed=1)
    assert isinstance(exact, AssignmentSource)
    assert (exact.method, exact.draws, exact.count) == ("exact", 210, 210)
    mc = mech.assignments(max_exact=209, draws=50, seed=1, chunk_size=8)
    assert (mc.method, mc.draws, mc.count) == ("monte_carlo", 50, 210)
    first = np.vstack(list(mc.chunks()))
    assert first.shape == (50, 10)
    assert np.array_equal(first, np.vstack(list(mc.chunks())))  # re-iterable: same draws


# --------------------------------------------------------------------------- the real draw


def reference_draw(kind, ids, seed, block=None, cluster=None, p=0.5):
    """The documented algorithm, re-implemented from docs/methods/randomization.md."""
    rng = np.random.default_rng(seed)
    order = sorted(range(len(ids)), key=lambda i: ids[i])
    z = {}

    def split(units, share):
        k = math.floor(share * len(units) + 0.5)
        perm = rng.permutation(len(units))
        return {units[j]: int(pos < k) for pos, j in enumerate(perm)}

    if kind == "complete":
        z.update(split(order, p))
    elif kind == "bernoulli":
        u = rng.random(len(ids))
        z.update({i: int(u[pos] < p) for pos, i in enumerate(order)})
    elif kind in ("blocked", "matched_pairs"):
        for b in sorted(set(block)):
            z.update(split([i for i in order if block[i] == b], 0.5 if kind == "matched_pairs" else p))
    elif kind == "cluster":
        labels = sorted(set(cluster))
        chosen = split(labels, p)
        z.update({i: chosen[cluster[i]] for i in order})
    return np.array([z[i] for i in range(len(ids))])


@pytest.mark.parametrize("kind", ["complete", "bernoulli", "blocked", "matched_pairs", "cluster"])
def test_draw_follows_documented_algorithm(kind):
    ids = [f"u{i:03d}" for i in (17, 3, 88, 41, 5, 60, 12, 99, 27, 70)]
    block = list("abababbaba") if kind != "matched_pairs" else [1, 1, 2, 2, 3, 3, 4, 4, 5, 5]
    cluster = [1, 1, 2, 2, 3, 3, 4, 4, 5, 5]
    got = draw_assignment(kind, ids, seed=20261201, block=block, cluster=cluster, probability=0.5)
    expected = reference_draw(kind, ids, 20261201, block=block, cluster=cluster)
    assert np.array_equal(got, expected)


def test_draw_does_not_depend_on_row_order():
    ids = np.arange(40) * 7 % 101
    block = np.repeat(list("abcd"), 10)
    z = draw_assignment("blocked", ids, seed=99, block=block, probability=0.3)
    perm = np.random.default_rng(0).permutation(40)
    z2 = draw_assignment("blocked", ids[perm], seed=99, block=block[perm], probability=0.3)
    assert np.array_equal(z[perm], z2)
    assert [int(z[block == b].sum()) for b in "abcd"] == [3, 3, 3, 3]


def test_drawn_assignment_is_possible_under_its_mechanism():
    ids = np.arange(12)
    cluster = np.repeat([10, 20, 30, 40, 50, 60], 2)
    block = np.repeat(["n", "s"], 6)
    z = draw_assignment("blocked_cluster", ids, seed=4, block=block, cluster=cluster)
    mech = mechanism_from_arrays("blocked_cluster", z, block=block, cluster=cluster)
    assert mech.stratum_treated == (2, 2)  # round half up of 0.5 * 3 clusters per block


def test_number_treated_rounds_half_up_from_the_written_decimal():
    assert number_treated(0.35, 10) == 4   # 3.5 -> 4, although 0.35 is 0.34999... in binary
    assert number_treated(0.5, 7) == 4
    assert number_treated(0.5, 6) == 3
    assert number_treated(0.3, 10) == 3
    assert number_treated(1 / 3, 9) == 3


# --------------------------------------------------------------------------- validation


def test_unknown_kind_message():
    with pytest.raises(ValueError) as err:
        mechanism_from_arrays("stratified", Z10)
    assert str(err.value) == ("`kind` must be one of {'complete', 'bernoulli', 'blocked', 'cluster', "
                              "'blocked_cluster', 'matched_pairs'}; got 'stratified'")


def test_assignment_must_be_zero_one():
    with pytest.raises(DataError, match="only 0 and 1"):
        mechanism_from_arrays("complete", np.array([0, 1, 2]))
    with pytest.raises(DataError, match="missing"):
        mechanism_from_arrays("complete", np.array([0, 1, np.nan]))


def test_block_required():
    with pytest.raises(ValueError, match="`block` is required for mechanism 'blocked'"):
        mechanism_from_arrays("blocked", Z10)


def test_block_without_control_is_a_design_error():
    with pytest.raises(DesignError, match="block 'a' has no control unit"):
        mechanism_from_arrays("blocked", np.array([1, 1, 0, 1]), block=np.array(list("aabb")))


def test_split_cluster_is_a_design_error():
    with pytest.raises(DesignError, match="cluster\\(s\\) 1 are split across arms"):
        mechanism_from_arrays("cluster", np.array([1, 0, 0, 0]), cluster=np.array([1, 1, 2, 2]))


def test_cluster_spanning_blocks_is_a_design_error():
    with pytest.raises(DesignError, match="spans more than one block"):
        mechanism_from_arrays("blocked_cluster", np.array([1, 1, 0, 0, 1, 0]),
                              block=np.array(list("aaabbb")), cluster=np.array([1, 1, 2, 2, 3, 4]))


def test_pairs_need_two_units_one_treated():
    with pytest.raises(DesignError, match="pair 2 has 3 unit\\(s\\)"):
        mechanism_from_arrays("matched_pairs", np.array([1, 0, 1, 0, 0]), block=np.array([1, 1, 2, 2, 2]))
    with pytest.raises(DesignError, match="each pair needs exactly two units"):
        draw_assignment("matched_pairs", np.arange(5), seed=1, block=np.array([1, 1, 2, 2, 2]))


def test_missing_labels_and_duplicate_ids():
    with pytest.raises(DataError, match="missing label"):
        mechanism_from_arrays("blocked", np.array([1, 0, 1, 0]), block=np.array(["a", "a", None, "b"], dtype=object))
    with pytest.raises(DataError, match="`ids` must be unique; 3 appears more than once"):
        draw_assignment("complete", np.array([1, 3, 3, 4]), seed=1)


def test_sampling_arguments_are_validated():
    mech = small_designs()["complete"]
    with pytest.raises(ValueError, match="`draws` must be an integer >= 1; got 0"):
        mech.sample_chunks(0, 1)
    with pytest.raises(ValueError, match="`seed` must be a non-negative integer; got -1"):
        mech.assignments(max_exact=1, draws=10, seed=-1)
    with pytest.raises(ValueError, match="`probability` must be a number strictly between 0 and 1; got 1.5"):
        mechanism_from_arrays("bernoulli", Z10, probability=1.5)


# --------------------------------------------------------------------------- the previous sampler (frozen)
#
# A frozen copy of the Monte Carlo sampler of report_kit.design.mechanism as it was before the per-row
# correction of threshold-and-adjust was vectorized (Mechanism._sample, _sample_rows, _sorted_keys,
# _stratum_members, _expand, and the module functions _threshold_and_adjust, _adjust_row,
# _first_distinct), rewritten as plain functions of a Mechanism. It is the reference that the current
# sampler must reproduce bit for bit; do not edit it. The only addition is the optional `tally`,
# which counts how often each branch of the old per-row correction ran (it changes no output), so
# the identity test can show that it reached the rare branches. benchmarks/sampler.py imports it.

PREVIOUS_CHUNK_CELLS = 1 << 22


def previous_sample_chunks(mech, draws: int, seed: int, chunk_size: int | None = None, tally=None):
    """Previous algorithm: what ``mech.sample_chunks(draws, seed, chunk_size)`` returned before."""
    if chunk_size is None:
        chunk_size = int(max(1, min(draws, PREVIOUS_CHUNK_CELLS // max(mech.n, 1))))
    key_seq, fix_seq = np.random.SeedSequence(seed).spawn(2)
    keys = np.random.Generator(np.random.PCG64(key_seq))
    fixes = np.random.Generator(np.random.PCG64(fix_seq))
    for start in range(0, draws, chunk_size):
        rows = min(chunk_size, draws - start)
        yield _previous_sample_rows(mech, rows, keys, fixes, tally)


def _previous_sample_rows(mech, rows, keys, fixes, tally):
    if mech.kind == "bernoulli":
        return (keys.random((rows, mech.n)) < mech.probability).view(np.uint8)
    if len(mech.stratum_size) == 1:
        groups = _previous_threshold_and_adjust(rows, mech.n_groups, mech.stratum_treated[0], keys, fixes, tally)
    else:
        groups = _previous_sorted_keys(mech, rows, keys)
    if not mech.clustered:
        return groups
    return np.ascontiguousarray(groups[:, mech.unit_group])


def _previous_stratum_members(mech):
    order = np.argsort(mech.group_stratum, kind="stable")
    bounds = np.cumsum((0,) + mech.stratum_size)
    return [order[bounds[s]:bounds[s + 1]] for s in range(len(mech.stratum_size))]


def _previous_sorted_keys(mech, rows, keys):
    u = keys.random((rows, mech.n_groups))
    out = np.zeros((rows, mech.n_groups), dtype=np.uint8)
    members = _previous_stratum_members(mech)
    sizes = np.asarray(mech.stratum_size)
    for g in np.unique(sizes):
        strata = np.flatnonzero(sizes == g)
        cols = np.stack([members[s] for s in strata])  # (S_g, g)
        order = np.argsort(u[:, cols], axis=2, kind="stable")
        take = np.arange(g)[None, :] < np.asarray(mech.stratum_treated)[strata][:, None]
        block = np.zeros((rows, strata.size, g), dtype=np.uint8)
        np.put_along_axis(block, order, np.broadcast_to(take, order.shape).astype(np.uint8), axis=2)
        out[:, cols] = block
    return out


def _previous_threshold_and_adjust(rows, size, treated, keys, fixes, tally):
    words = -(-size // 4)
    raw = keys.bit_generator.random_raw((rows, words)).astype("<u8", copy=False)
    key16 = raw.view("<u2")[:, :size]
    threshold = min(65535, max(1, round(65536 * treated / size)))
    provisional = key16 < threshold
    counts = np.count_nonzero(provisional, axis=1)
    out = provisional.view(np.uint8)
    for r in np.flatnonzero(counts != treated):
        _previous_adjust_row(out[r], int(counts[r]), treated, fixes, tally)
    return out


def _previous_adjust_row(row, current, target, rng, tally):
    surplus = 1 if current > target else 0
    need = abs(current - target)
    pool = current if surplus else row.size - current
    batch = int(math.ceil(1.3 * need * row.size / pool)) + 16
    cand = rng.integers(0, row.size, size=batch)
    cand = cand[row[cand] == surplus]
    ordered = np.sort(cand)
    if tally is not None:
        tally["rows adjusted"] += 1
    if cand.size >= need and not np.any(ordered[1:] == ordered[:-1]):
        row[cand[:need]] = 1 - surplus
        return
    picked = _previous_first_distinct(cand, need)
    if tally is not None:
        tally["duplicates"] += 1
        tally["extra batches"] += picked.size < need
    while picked.size < need:
        more = rng.integers(0, row.size, size=batch)
        picked = _previous_first_distinct(np.concatenate([picked, more[row[more] == surplus]]), need)
    row[picked] = 1 - surplus


def _previous_first_distinct(values, limit):
    _, first = np.unique(values, return_index=True)
    return values[np.sort(first)][:limit]


# --------------------------------------------------------------------------- identity with the previous sampler


def _complete(n: int, k: int):
    z = np.zeros(n, dtype=int)
    z[np.arange(k) * 7 % n] = 1  # k distinct units (7 is coprime with every n used here)
    assert z.sum() == k
    return mechanism_from_arrays("complete", z)


IDENTITY_DESIGNS = {
    # one stratum (threshold and adjust): complete with n in {5, 12, 101, 1000}, shares near and far
    # from one half (k = 1 and k = n - 3 leave few units in an arm, so the rare branches of the
    # correction run: duplicate candidates and extra batches)
    "complete n=5 k=2": lambda: _complete(5, 2),
    "complete n=5 k=1": lambda: _complete(5, 1),
    "complete n=12 k=6": lambda: _complete(12, 6),
    "complete n=12 k=1": lambda: _complete(12, 1),
    "complete n=12 k=11": lambda: _complete(12, 11),
    "complete n=101 k=30": lambda: _complete(101, 30),
    "complete n=101 k=50": lambda: _complete(101, 50),
    "complete n=1000 k=500": lambda: _complete(1000, 500),
    "complete n=1000 k=1": lambda: _complete(1000, 1),
    "complete n=1000 k=997": lambda: _complete(1000, 997),
    "cluster": lambda: small_designs()["cluster"],
    "cluster 40 clusters": lambda: mechanism_from_arrays(
        "cluster", np.repeat((np.arange(40) % 3 == 0).astype(int), 3), cluster=np.repeat(np.arange(40), 3)),
    "blocked one block": lambda: mechanism_from_arrays("blocked", Z10, block=np.zeros(10, int)),
    "blocked_cluster one block": lambda: mechanism_from_arrays(
        "blocked_cluster", Z_CLUSTER10, block=np.zeros(10, int), cluster=CLUSTER10),
    # several strata and bernoulli (sorted keys and coins: untouched, checked all the same)
    "blocked": lambda: small_designs()["blocked"],
    "blocked_cluster": lambda: small_designs()["blocked_cluster"],
    "matched_pairs": lambda: small_designs()["matched_pairs"],
    "bernoulli": lambda: small_designs()["bernoulli"],
    "bernoulli n=101": lambda: mechanism_from_arrays("bernoulli", np.arange(101) % 4 == 0, probability=0.3),
}
IDENTITY_SEEDS = (0, 7, 20261201)
IDENTITY_CHUNKS = (1, 7, 64, None)


def _identity_draws(mech) -> int:
    return 120 if mech.n >= 1000 else 400


def _assert_same_chunks(got: list[np.ndarray], expected: list[np.ndarray]) -> None:
    assert len(got) == len(expected)
    for a, b in zip(got, expected):
        assert a.dtype == b.dtype == np.uint8
        assert a.shape == b.shape
        assert a.tobytes() == b.tobytes()


@pytest.mark.parametrize("seed", IDENTITY_SEEDS)
@pytest.mark.parametrize("design", list(IDENTITY_DESIGNS))
def test_sampler_reproduces_previous_algorithm_bit_for_bit(design, seed):
    # reference: the frozen copy of the previous sampler above, for every chunk size
    mech = IDENTITY_DESIGNS[design]()
    draws = _identity_draws(mech)
    for chunk_size in IDENTITY_CHUNKS:
        got = list(mech.sample_chunks(draws, seed, chunk_size))
        expected = list(previous_sample_chunks(mech, draws, seed, chunk_size))
        _assert_same_chunks(got, expected)


def test_identity_grid_reaches_the_rare_branches_of_the_previous_correction():
    # the identity test above is only as strong as the branches it runs: over its grid the previous
    # algorithm must have hit duplicate candidates and needed extra batches many times
    tally = Counter()
    for design, build in IDENTITY_DESIGNS.items():
        mech = build()
        for seed in IDENTITY_SEEDS:
            for _ in previous_sample_chunks(mech, _identity_draws(mech), seed, 64, tally):
                pass
    assert tally["rows adjusted"] > 5000
    assert tally["duplicates"] > 1000
    assert tally["extra batches"] > 40


def test_identity_grid_reaches_every_path_of_the_current_correction(monkeypatch):
    # the current correction groups rows in several ways (one by one, windows that succeed, windows
    # cut short by a row that needs a further batch; duplicates found by a table or by sorting); the
    # identity grid must run each of them, or the identity test would not cover them
    from report_kit.design import sampling as designs

    seen = Counter()
    window, each, first = designs._adjust_window, designs._adjust_each, designs._first_occurrences

    def counting_window(out, rows, *args):
        settled = window(out, rows, *args)
        seen["window cut short" if settled < rows.size else "window"] += 1
        return settled

    def counting_each(out, rows, *args):
        seen["one by one"] += rows.size
        return each(out, rows, *args)

    def counting_first(keys, span):
        seen["table" if span <= 4 * keys.size else "sort"] += 1
        return first(keys, span)

    monkeypatch.setattr(designs, "_adjust_window", counting_window)
    monkeypatch.setattr(designs, "_adjust_each", counting_each)
    monkeypatch.setattr(designs, "_first_occurrences", counting_first)
    for build in IDENTITY_DESIGNS.values():
        mech = build()
        for seed in IDENTITY_SEEDS:
            for chunk_size in IDENTITY_CHUNKS:
                for _ in mech.sample_chunks(_identity_draws(mech), seed, chunk_size):
                    pass
    assert min(seen[path] for path in ("window", "window cut short", "one by one", "table", "sort")) >= 10


def test_sampler_matches_previous_algorithm_on_long_runs():
    # many chunks in a row carry the random streams over chunk boundaries (reference: frozen copy above)
    for mech, draws in ((_complete(12, 6), 5000), (_complete(1000, 1), 1500), (_complete(101, 97), 3000)):
        for chunk_size in (None, 333):
            _assert_same_chunks(list(mech.sample_chunks(draws, 11, chunk_size)),
                                list(previous_sample_chunks(mech, draws, 11, chunk_size)))


def test_numpy_bounded_integers_do_not_depend_on_call_boundaries():
    # property of numpy's Generator.integers the sampler relies on (values are drawn one after
    # another from the bit generator): one call for a + b values equals a call for a then one for b
    for high in (2, 5, 12, 101, 1000, 65536):
        one = np.random.Generator(np.random.PCG64(3))
        two = np.random.Generator(np.random.PCG64(3))
        sizes = [1, 19, 3, 146, 7, 2]
        joined = np.concatenate([one.integers(0, high, size=s) for s in sizes])
        assert np.array_equal(joined, two.integers(0, high, size=sum(sizes)))
        assert one.bit_generator.state == two.bit_generator.state


def test_count_text_short_and_huge():
    from report_kit.design.mechanism import mechanism_from_arrays

    small = mechanism_from_arrays("complete", [1] * 5 + [0] * 7)
    assert small.count_text() == str(math.comb(12, 5))           # 792, exact (math.comb)
    big = mechanism_from_arrays("complete", [1] * 7150 + [0] * 7150)
    assert big.count_text() is None                               # thousands of digits: never built
    assert abs(big.log10_count() - math.log10(math.comb(14300, 7150))) < 1e-6   # math.log10 of the exact int
