"""Tests of report_kit.designs: counting, enumerating, sampling and drawing assignments.

Outside references: binomial-coefficient identities (C(n, k), products over
blocks, 2**P for P pairs), brute-force enumeration with ``itertools`` written
here independently of the library, Pearson's chi-square goodness-of-fit test
(``scipy.stats.chisquare``) for uniformity, and a re-implementation of the
documented drawing algorithm (docs/methods/randomization.md).
"""

from __future__ import annotations

import itertools
import math
from collections import Counter

import numpy as np
import pytest
from scipy import stats

from report_kit.designs import (
    AssignmentSource,
    draw_assignment,
    mechanism_from_arrays,
    number_treated,
)
from report_kit.errors import DataError, DesignError, UsageError

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
    with pytest.raises(UsageError) as err:
        mechanism_from_arrays("stratified", Z10)
    assert str(err.value) == ("`kind` must be one of {'complete', 'bernoulli', 'blocked', 'cluster', "
                              "'blocked_cluster', 'matched_pairs'}; got 'stratified'")


def test_assignment_must_be_zero_one():
    with pytest.raises(DataError, match="only 0 and 1"):
        mechanism_from_arrays("complete", np.array([0, 1, 2]))
    with pytest.raises(DataError, match="missing"):
        mechanism_from_arrays("complete", np.array([0, 1, np.nan]))


def test_block_required():
    with pytest.raises(UsageError, match="`block` is required for mechanism 'blocked'"):
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
    with pytest.raises(UsageError, match="`draws` must be an integer >= 1; got 0"):
        mech.sample_chunks(0, 1)
    with pytest.raises(UsageError, match="`seed` must be a non-negative integer; got -1"):
        mech.assignments(max_exact=1, draws=10, seed=-1)
    with pytest.raises(UsageError, match="`probability` must be a number strictly between 0 and 1; got 1.5"):
        mechanism_from_arrays("bernoulli", Z10, probability=1.5)
