"""Factorial main-effect randomization tests: brute-force enumeration of the restricted assignments and
scipy.stats.permutation_test."""

from __future__ import annotations

import itertools
import math

import numpy as np
import pytest
from scipy import stats

from report_kit.errors import ReportKitWarning
from report_kit.estimation.factorial import estimate_factorial
from report_kit.inference.factorial import factor_mechanism, main_effect_tests

CELLS = ("none", "text", "call", "both")
FACTORS = (("text", ("text", "both")), ("call", ("call", "both")))
TEXT_ON = {"none": 0, "text": 1, "call": 0, "both": 1}
CALL_ON = {"none": 0, "text": 0, "call": 1, "both": 1}


def main_effect_by_hand(y, arm, weights_by_block, block):
    """Text main effect: per block, the mean of the text-on cells minus the text-off cells, block-weighted."""
    total = 0.0
    for b, w in weights_by_block.items():
        m = {a: np.nanmean(y[(arm == a) & (block == b)]) for a in CELLS}
        total += w * ((m["text"] + m["both"]) / 2 - (m["none"] + m["call"]) / 2)
    return total


def restricted_assignments(arm, block, unit_of):
    """Every re-randomization of text within (block, call level), holding call and each stratum's text count.

    ``unit_of`` maps each unit to its randomization unit (itself, or its cluster). Written out here,
    independently of the mechanism under test.
    """
    per_stratum = []
    for key in sorted(set(zip(block.tolist(), [CALL_ON[a] for a in arm]))):
        members = [i for i in range(arm.size) if (block[i], CALL_ON[arm[i]]) == key]
        groups = sorted(set(unit_of[i] for i in members))
        on = sorted(set(unit_of[i] for i in members if TEXT_ON[arm[i]]))
        per_stratum.append([(members, set(chosen)) for chosen in itertools.combinations(groups, len(on))])
    for combo in itertools.product(*per_stratum):
        relabelled = arm.copy()
        for members, chosen in combo:
            for i in members:
                call = CALL_ON[arm[i]]
                text = unit_of[i] in chosen
                relabelled[i] = {(0, 0): "none", (1, 0): "text", (0, 1): "call", (1, 1): "both"}[(text, call)]
        yield relabelled


def brute_force_p(y, arm, block, unit_of, weights, *, shift=0.0, alternative="two-sided"):
    """Exact p-value of the sharp null ``Y(text on) = Y(text off) + shift``, by enumeration.

    Two-sided: share of assignments with ``|T_b| >= |t|`` (the null centre is 0 without clusters).
    """
    z_obs = np.array([TEXT_ON[a] for a in arm])
    y0 = y - shift * z_obs
    t = main_effect_by_hand(y0, arm, weights, block)
    values = np.array([main_effect_by_hand(y0, a, weights, block) for a in restricted_assignments(arm, block,
                                                                                               unit_of)])
    tol = 1e-12 * max(abs(t), np.abs(values).max())
    if alternative == "greater":
        return float(np.mean(values >= t - tol)), values.size, t
    return float(np.mean(np.abs(values) >= abs(t) - tol)), values.size, t


def design(sizes, seed, *, missing=()):
    rng = np.random.default_rng(seed)
    arm = np.repeat(np.array(CELLS, dtype=object), sizes)
    y = rng.normal(size=arm.size) + 0.7 * np.array([TEXT_ON[a] for a in arm]) + 0.4 * np.array(
        [CALL_ON[a] for a in arm])
    y[list(missing)] = np.nan
    return y, arm


@pytest.mark.parametrize("missing", [(), (1,)])
def test_complete_2x2_main_effect_p_value_by_enumeration(missing):
    # Reference: brute-force enumeration of the restricted assignments (text re-randomized within
    # each call level, holding the cell sizes): C(6,4) x C(7,4) = 525 of them. Unequal cells, so
    # the main effect (equal weights on the two call levels) differs from a size-weighted difference.
    y, arm = design((2, 4, 3, 4), seed=2, missing=missing)
    block = np.zeros(arm.size, dtype=int)
    (text, call) = main_effect_tests(y, arm, arms=CELLS, factors=FACTORS, kind="complete", outcome="score")
    p, count, t = brute_force_p(y, arm, block, list(range(arm.size)), {0: 1.0})
    assert count == math.comb(6, 4) * math.comb(7, 4) == 525
    assert text.factor == "text" and call.factor == "call"
    row = text.test_row()
    assert row["arm"] is None and row["reference"] is None and row["factor"] == "text"
    assert row["statistic"] == "main_effect" and row["method"] == "exact" and row["draws"] == 525
    assert row["observed"] == pytest.approx(t, rel=1e-12)
    assert row["p_value"] == pytest.approx(p, abs=1e-12)
    # the statistic is the estimator's main effect (Dasgupta, Pillai & Rubin 2015)
    (effect, *_) = estimate_factorial(y, arm, arms=CELLS, factors=FACTORS)
    assert row["observed"] == pytest.approx(effect.estimate.estimate, rel=1e-12)
    (greater, _) = main_effect_tests(y, arm, arms=CELLS, factors=FACTORS, kind="complete", alternative="greater")
    assert greater.test.p_value == pytest.approx(brute_force_p(y, arm, block, list(range(arm.size)), {0: 1.0},
                                                               alternative="greater")[0], abs=1e-12)


def test_interval_ends_by_enumeration():
    # Reference: brute-force p-values of the shifted sharp nulls just inside and just outside each
    # end of the test-inversion interval (the set of shifts whose p-value exceeds alpha).
    y, arm = design((2, 4, 3, 3), seed=7)
    block = np.zeros(arm.size, dtype=int)
    (text, _) = main_effect_tests(y, arm, arms=CELLS, factors=FACTORS, kind="complete", level=0.9)
    interval = text.interval_row()
    assert interval["factor"] == "text" and interval["method"] == "test_inversion" and interval["level"] == 0.9
    low, high = interval["ci_low"], interval["ci_high"]
    assert low < text.test.observed < high
    step = 1e-6 * (high - low)
    units = list(range(arm.size))
    alpha = 1 - 0.9   # the interval is {shift: p > 1 - level}
    assert brute_force_p(y, arm, block, units, {0: 1.0}, shift=low + step)[0] > alpha
    assert brute_force_p(y, arm, block, units, {0: 1.0}, shift=low - step)[0] <= alpha
    assert brute_force_p(y, arm, block, units, {0: 1.0}, shift=high - step)[0] > alpha
    assert brute_force_p(y, arm, block, units, {0: 1.0}, shift=high + step)[0] <= alpha


def test_blocked_2x2_main_effect_by_enumeration():
    # Reference: brute-force enumeration within (block, call level): 3 x 3 x 3 x 6 = 162 assignments;
    # the statistic weights the blocks by their share of the units (blocked factorial estimator).
    sizes_a, sizes_b = (1, 2, 1, 2), (2, 1, 2, 2)
    rng = np.random.default_rng(9)
    arm = np.concatenate([np.repeat(np.array(CELLS, dtype=object), s) for s in (sizes_a, sizes_b)])
    block = np.repeat(["A", "B"], (6, 7)).astype(object)
    y = rng.normal(size=13) + np.where(block == "B", 2.0, 0.0)
    (text, _) = main_effect_tests(y, arm, arms=CELLS, factors=FACTORS, kind="blocked", block=block)
    p, count, t = brute_force_p(y, arm, block, list(range(13)), {"A": 6 / 13, "B": 7 / 13})
    assert count == 162 and text.test.draws == 162
    assert text.test.observed == pytest.approx(t, rel=1e-12)
    assert text.test.p_value == pytest.approx(p, abs=1e-12)


def test_cluster_2x2_main_effect_by_enumeration():
    # Reference: brute-force enumeration of clusters: 2 clusters per cell (sizes 1-4), text
    # re-randomized among the 4 clusters of each call level: C(4,2)^2 = 36 assignments. With
    # clusters the null centre is the mean over the assignments (not 0).
    sizes = (1, 3, 2, 4, 2, 2, 3, 1)
    cell_of_cluster = (0, 0, 1, 1, 2, 2, 3, 3)
    cluster = np.repeat([f"k{g}" for g in range(8)], sizes).astype(object)
    arm = np.array(CELLS, dtype=object)[np.repeat(cell_of_cluster, sizes)]
    rng = np.random.default_rng(12)
    y = rng.normal(size=arm.size) + np.repeat(rng.normal(size=8), sizes)
    block = np.zeros(arm.size, dtype=int)
    with pytest.warns(ReportKitWarning, match="interval of outcome 'y' is unbounded"):   # 36 assignments only
        (text, _) = main_effect_tests(y, arm, arms=CELLS, factors=FACTORS, kind="cluster", cluster=cluster)
    unit_of = [int(c[1:]) for c in cluster]
    values = np.array([main_effect_by_hand(y, a, {0: 1.0}, block)
                       for a in restricted_assignments(arm, block, unit_of)])
    t = main_effect_by_hand(y, arm, {0: 1.0}, block)
    centre = values.mean()
    p = np.mean(np.abs(values - centre) >= abs(t - centre) - 1e-12)
    assert values.size == 36 and text.test.draws == 36
    assert text.test.observed == pytest.approx(t, rel=1e-12)
    assert text.test.p_value == pytest.approx(p, abs=1e-12)


@pytest.mark.parametrize("alternative", ["greater", "two-sided"])
def test_reduces_to_two_arm_permutation_test(alternative):
    # Reference: scipy.stats.permutation_test (exact, independent samples, difference in means).
    # Where the other factor is on, every outcome is the same constant, so that stratum adds no
    # variation: the main effect is half the text-vs-none difference among the units with call off,
    # and its test is the two-arm permutation test of those units. Equal arm sizes make the null
    # distribution symmetric, so scipy's two-sided rule (twice the smaller tail) agrees with ours.
    rng = np.random.default_rng(21)
    arm = np.repeat(np.array(CELLS, dtype=object), (6, 6, 2, 2))
    y = np.where(np.isin(arm, ["none", "text"]), rng.normal(size=arm.size) + 0.6 * (arm == "text"), 3.0)
    (text, _) = main_effect_tests(y, arm, arms=CELLS, factors=FACTORS, kind="complete", alternative=alternative)
    reference = stats.permutation_test((y[arm == "text"], y[arm == "none"]),
                                       lambda a, b, axis: a.mean(axis=axis) - b.mean(axis=axis),
                                       permutation_type="independent", alternative=alternative,
                                       n_resamples=np.inf, vectorized=True)
    assert text.test.method == "exact" and text.test.draws == math.comb(12, 6) * math.comb(4, 2)
    assert text.test.observed == pytest.approx(reference.statistic / 2, rel=1e-12)
    assert text.test.p_value == pytest.approx(reference.pvalue, abs=1e-12)


def test_factor_mechanism_strata_and_counts():
    # Reference: the count of restricted assignments written out: prod over (block, call level)
    # of C(units or clusters in the stratum, those with text on).
    arm = np.repeat(np.array(CELLS, dtype=object), (3, 2, 4, 3))
    mech = factor_mechanism(arm, arms=CELLS, factors=FACTORS, factor="text", kind="bernoulli")
    assert mech.kind == "blocked" and mech.count() == math.comb(5, 2) * math.comb(7, 3)
    assert mech.z.tolist() == [TEXT_ON[a] for a in arm]
    mech = factor_mechanism(arm, arms=CELLS, factors=FACTORS, factor="call", kind="complete")
    assert mech.count() == math.comb(7, 4) * math.comb(5, 3)


def test_monte_carlo_rows_are_seeded():
    y, arm = design((20, 20, 20, 20), seed=4)
    first = main_effect_tests(y, arm, arms=CELLS, factors=FACTORS, kind="complete", max_exact=10, draws=499,
                              seed=3)
    again = main_effect_tests(y, arm, arms=CELLS, factors=FACTORS, kind="complete", max_exact=10, draws=499,
                              seed=3)
    assert [t.test_row() for t in first] == [t.test_row() for t in again]
    assert first[0].test.method == "monte_carlo" and first[0].test.draws == 499
    assert first[0].test.mc_std_error is not None


def test_undefined_main_effect_and_bad_arguments():
    y, arm = design((2, 2, 2, 2), seed=1, missing=(0, 1))
    with pytest.warns(ReportKitWarning, match="no randomization test of the main effect") as caught:
        results = main_effect_tests(y, arm, arms=CELLS, factors=FACTORS, kind="complete")
    assert ["'text'" in str(w.message) for w in caught] == [True, False]
    assert results == []   # the "none" cell has no observed outcome: neither main effect is defined
    y, arm = design((2, 2, 2, 2), seed=1)
    with pytest.raises(ValueError, match="`factor` must be one of"):
        factor_mechanism(arm, arms=CELLS, factors=FACTORS, factor="email", kind="complete")
    with pytest.raises(ValueError, match="`kind` must be one of"):
        main_effect_tests(y, arm, arms=CELLS, factors=FACTORS, kind="matched_pairs")
    with pytest.raises(ValueError, match="not in `arms`"):
        main_effect_tests(y, np.where(arm == "both", "all", arm), arms=CELLS, factors=FACTORS, kind="complete")
    with pytest.raises(ValueError, match="`alternative` must be one of"):
        main_effect_tests(y, arm, arms=CELLS, factors=FACTORS, kind="complete", alternative="both")
