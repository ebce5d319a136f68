"""Tests of report_kit.inference.exact and exact_tests against outside references.

Sources, named beside each check: scipy.stats (hypergeom, fisher_exact,
multivariate_hypergeom, mannwhitneyu(method="exact"), wilcoxon(method="exact")),
brute-force enumeration with itertools written here independently of the
library, and agreement with Monte Carlo within its standard error.
"""

from __future__ import annotations

import itertools
import math
from fractions import Fraction
from pathlib import Path

import numpy as np
import pytest
from scipy import stats

from report_kit.design.mechanism import mechanism_from_arrays
from report_kit.inference.exact import LatticeLaw, LatticeTooLarge, treated_sum_law, weighted_block_law
from report_kit.inference.exact_tests import NoExactLaw, exact_interval, exact_law_test, upgrade_tests
from report_kit.inference.randomization import randomization_test


def brute_law(q, k):
    """Law of the treated sum by listing every subset (itertools, exact integer counts)."""
    counts: dict[int, int] = {}
    for chosen in itertools.combinations(range(len(q)), k):
        s = int(sum(q[i] for i in chosen))
        counts[s] = counts.get(s, 0) + 1
    return {s: Fraction(c, math.comb(len(q), k)) for s, c in counts.items()}


def law_dict(law: LatticeLaw):
    return {int(s): float(p) for s, p in zip(law.support, law.pmf) if p > 1e-14}


@pytest.mark.parametrize("q,k", [
    ([3, 1, 4, 1, 5, 9, 2, 6, 5, 3], 4),
    ([0, 0, 1, 1, 1, 0, 1, 0, 0], 4),
    ([-3, 7, 7, 2, -1, 0, 12, 5, 5, 5, 8, 1], 6),
    ([2, 2, 2, 2], 2),
    ([0, 5, 10, 15, 20, 25, 30], 3),
])
def test_treated_sum_law_equals_brute_force_enumeration(q, k):
    # exact enumeration of all C(n, k) subsets (itertools, integer counts)
    law = treated_sum_law(np.array(q), k)
    ref = brute_law(q, k)
    got = law_dict(law)
    assert set(got) == set(ref)
    for s, p in ref.items():
        assert got[s] == pytest.approx(float(p), abs=1e-14)
    assert law.pmf.sum() == pytest.approx(1.0, abs=1e-13)


def test_two_valued_scores_follow_scipy_hypergeom():
    # scipy.stats.hypergeom: treated successes among k draws from n units with m successes
    q = np.array([1] * 3100 + [0] * 6900)
    law = treated_sum_law(q, 5000)
    assert law.algorithm == "hypergeometric"
    x = np.arange(1400, 1700)
    np.testing.assert_allclose(law.pmf[x - law.offset], stats.hypergeom.pmf(x, 10000, 3100, 5000), rtol=1e-12)


def test_windowed_fft_law_equals_scipy_multivariate_hypergeom():
    # scores in {0, 1, 2}: P(U = s) = sum over (c1, c2) with c1 + 2 c2 = s of the multivariate
    # hypergeometric probability of (k - c1 - c2, c1, c2) (scipy.stats.multivariate_hypergeom);
    # n is large enough that the FFT grid uses the Bernstein windows (aliasing bound)
    m = np.array([1300, 900, 800])
    q = np.repeat([0, 1, 2], m)
    k = 1500
    law = treated_sum_law(q, k)
    assert law.algorithm == "characteristic function (FFT)"
    assert law.pmf.size < 2 * k + 1  # the window is narrower than the support
    for s in (1150, 1200, 1240, 1250, 1290, 1350):
        c2 = np.arange(0, s // 2 + 1)
        c1 = s - 2 * c2
        c0 = k - c1 - c2
        ok = (c0 >= 0) & (c1 >= 0) & (c0 <= m[0]) & (c1 <= m[1]) & (c2 <= m[2])
        ref = stats.multivariate_hypergeom.pmf(np.column_stack([c0[ok], c1[ok], c2[ok]]), m, k).sum()
        assert law.pmf[s - law.offset] == pytest.approx(ref, rel=1e-9, abs=1e-15)


def test_block_convolution_equals_enumeration_with_multipliers():
    # brute force over every pair of subsets of two blocks (itertools), U = 1 * U_1 + 3 * U_2
    q1, q2 = [4, 0, 2, 7, 1], [5, 5, 1, 0, 2, 3]
    law = weighted_block_law([treated_sum_law(np.array(q1), 2), treated_sum_law(np.array(q2), 3)], [1, 3])
    ref: dict[int, Fraction] = {}
    for s1, p1 in brute_law(q1, 2).items():
        for s2, p2 in brute_law(q2, 3).items():
            ref[s1 + 3 * s2] = ref.get(s1 + 3 * s2, 0) + p1 * p2
    got = law_dict(law)
    assert set(got) == set(ref)
    for s, p in ref.items():
        assert got[s] == pytest.approx(float(p), abs=1e-14)


# --------------------------------------------------------------------------- tests of a study


@pytest.mark.parametrize("alternative", ["greater", "less"])
def test_large_binary_trial_equals_fisher_exact(alternative):
    # Fisher's exact test, scipy.stats.fisher_exact, on a 10,000-unit 0/1 trial
    rng = np.random.default_rng(11)
    z = np.zeros(10000, dtype=int)
    z[rng.permutation(10000)[:4000]] = 1
    y = (rng.random(10000) < np.where(z == 1, 0.33, 0.30)).astype(float)
    res = exact_law_test(y, mechanism_from_arrays("complete", z), alternative=alternative)
    a, b = int(y[z == 1].sum()), int(y[z == 0].sum())
    ref = stats.fisher_exact([[a, 4000 - a], [b, 6000 - b]], alternative=alternative).pvalue
    assert res.p_value == pytest.approx(ref, rel=1e-9)
    assert "hypergeometric" in res.detail


def test_binary_two_sided_is_distance_from_the_null_mean_by_scipy_hypergeom():
    # two-sided rule |X - E X| >= |x - E X| summed over scipy.stats.hypergeom.pmf
    z = np.array([1] * 40 + [0] * 60)
    y = np.array([1] * 25 + [0] * 15 + [1] * 20 + [0] * 40, dtype=float)
    res = exact_law_test(y, mechanism_from_arrays("complete", z))
    x = np.arange(0, 41)
    mean = 40 * 45 / 100
    ref = stats.hypergeom.pmf(x, 100, 45, 40)[np.abs(x - mean) >= abs(25 - mean) - 1e-12].sum()
    assert res.p_value == pytest.approx(ref, rel=1e-12)


@pytest.mark.parametrize("alternative", ["greater", "less", "two-sided"])
def test_rank_sum_untied_equals_scipy_mannwhitneyu_exact(alternative):
    # Wilcoxon-Mann-Whitney exact law: scipy.stats.mannwhitneyu(method="exact"), no ties
    y = np.random.default_rng(5).normal(size=30)
    z = np.array([1] * 13 + [0] * 17)
    res = exact_law_test(y, mechanism_from_arrays("complete", z), statistic="rank_sum", alternative=alternative)
    ref = stats.mannwhitneyu(y[z == 1], y[z == 0], alternative=alternative, method="exact").pvalue
    assert res.p_value == pytest.approx(ref, rel=1e-9)


@pytest.mark.parametrize("alternative", ["greater", "less", "two-sided"])
def test_matched_pairs_equal_scipy_wilcoxon_exact(alternative):
    # pair differences equal to their own signed ranks: the sign-flip law of the mean difference is the
    # Wilcoxon signed-rank law, scipy.stats.wilcoxon(method="exact")
    d = np.array([3, -1, 7, 5, -2, 10, 8, -4, 6, 9, 11, -12, 14, 13, -15, 16, 17, -18, 19, 20])
    y, z = [], []
    for p, v in enumerate(d):
        first = p % 2 == 0
        y += [float(v), 0.0] if first else [0.0, float(v)]
        z += [1, 0] if first else [0, 1]
    mech = mechanism_from_arrays("matched_pairs", np.array(z), block=np.repeat(np.arange(d.size), 2))
    res = exact_law_test(np.array(y), mech, alternative=alternative)
    ref = stats.wilcoxon(d, alternative=alternative, method="exact").pvalue
    assert res.p_value == pytest.approx(ref, rel=1e-9)


def blocked_brute_p(y, z, block, alternative, stat):
    """p-value by listing every within-block assignment (itertools), statistic computed here."""
    labels = sorted(set(block))
    members = [[i for i in range(len(y)) if block[i] == b] for b in labels]
    ks = [sum(z[i] for i in m) for m in members]

    def t_of(zz):
        if stat == "rank_sum":
            return sum(r for r, zi in zip(stat_scores, zz) if zi)
        total = Fraction(0)
        for m in members:
            t1 = [y[i] for i in m if zz[i]]
            t0 = [y[i] for i in m if not zz[i]]
            total += Fraction(len(m), len(y)) * (Fraction(sum(t1), len(t1)) - Fraction(sum(t0), len(t0)))
        return total

    if stat == "rank_sum":  # aligned mid-ranks (block means subtracted), scipy.stats.rankdata
        aligned = np.array(y, float) - np.array([np.mean([y[j] for j in members[labels.index(b)]]) for b in block])
        stat_scores = [Fraction(r) for r in stats.rankdata(aligned)]
    values = []
    for choice in itertools.product(*[itertools.combinations(m, k) for m, k in zip(members, ks)]):
        zz = [0] * len(y)
        for part in choice:
            for i in part:
                zz[i] = 1
        values.append(t_of(zz))
    t = t_of(list(z))
    centre = sum(values) / len(values)
    if alternative == "greater":
        hits = sum(v >= t for v in values)
    elif alternative == "less":
        hits = sum(v <= t for v in values)
    else:
        hits = sum(abs(v - centre) >= abs(t - centre) for v in values)
    return hits / len(values)


@pytest.mark.parametrize("stat", ["mean_difference", "rank_sum"])
@pytest.mark.parametrize("alternative", ["greater", "less", "two-sided"])
def test_blocked_unequal_shares_with_ties_equal_brute_force(stat, alternative):
    # brute-force enumeration with exact fractions (itertools; no library code): blocks with different
    # treated shares give different block weights; tied integer outcomes
    y = [3, 1, 4, 1, 5, 9, 2, 6, 5, 3, 5, 8, 9, 7, 9]
    z = [1, 0, 0, 1, 0, 1, 1, 0, 0, 1, 0, 1, 1, 0, 0]
    block = ["a"] * 5 + ["b"] * 4 + ["c"] * 6
    mech = mechanism_from_arrays("blocked", np.array(z), block=np.array(block))
    res = exact_law_test(np.array(y, float), mech, statistic=stat, alternative=alternative)
    assert res.p_value == pytest.approx(blocked_brute_p(y, z, block, alternative, stat), abs=1e-12)


def test_declared_resolution_and_null_effect_equal_brute_force():
    # outcomes on a 0.25 grid; sharp null tau0 = 0.5 shifts treated outcomes on the same grid;
    # brute-force enumeration (itertools) of the difference in means with fractions
    y = np.array([1.25, 0.5, 2.0, 3.75, 0.0, 1.5, 2.25, 0.75, 1.0, 2.5, 3.0])
    z = np.array([1, 0, 1, 1, 0, 0, 1, 0, 0, 1, 0])
    y0 = [Fraction(v).limit_denominator(8) - Fraction(1, 2) * int(zi) for v, zi in zip(y, z)]
    t = sum(v for v, zi in zip(y0, z) if zi) / 5 - sum(v for v, zi in zip(y0, z) if not zi) / 6
    hits = total = 0
    for chosen in itertools.combinations(range(11), 5):
        s1 = sum(y0[i] for i in chosen)
        tb = s1 / 5 - (sum(y0) - s1) / 6
        hits += abs(tb) >= abs(t)
        total += 1
    mech = mechanism_from_arrays("complete", z)
    res = exact_law_test(y, mech, null_effect=0.5, resolution=0.25)
    assert res.p_value == pytest.approx(hits / total, abs=1e-13)
    # without a declared resolution the common step (0.25) is found from the data, in any units
    assert exact_law_test(y, mech, null_effect=0.5).p_value == pytest.approx(hits / total, abs=1e-13)
    assert exact_law_test(y * 1e-9, mech, null_effect=0.5e-9).p_value == pytest.approx(hits / total, abs=1e-13)
    noisy = y + np.random.default_rng(0).uniform(0, 1e-3, y.size)       # continuous: no lattice
    with pytest.raises(NoExactLaw, match="declare a resolution"):
        exact_law_test(noisy, mech)


def test_large_integer_trial_agrees_with_monte_carlo():
    # agreement with a seeded Monte Carlo run of 40,000 draws within 4 Monte Carlo standard errors
    rng = np.random.default_rng(21)
    z = np.zeros(600, dtype=int)
    z[rng.permutation(600)[:300]] = 1
    y = np.clip(np.round(rng.normal(5 + 0.25 * z, 2.5)), 0, 10)
    mech = mechanism_from_arrays("complete", z)
    res = exact_law_test(y, mech)
    assert res.law.algorithm == "characteristic function (FFT)"
    mc = randomization_test(y, mech, source=mech.assignments(max_exact=0, draws=40000, seed=3))[0]
    assert abs(res.p_value - mc.p_value) <= 4 * mc.mc_std_error
    assert 0.001 < res.p_value < 0.999


def test_exact_law_equals_the_engine_enumeration_on_a_small_design():
    # cross-check with listing every assignment (the engine's exact path), both statistics
    y = np.array([2, 0, 3, 3, 1, 4, 2, 2, 0, 5, 1, 3], float)
    z = np.array([1, 1, 0, 0, 1, 0, 1, 0, 0, 1, 0, 0])
    mech = mechanism_from_arrays("complete", z)
    for stat in ("mean_difference", "rank_sum"):
        for alt in ("greater", "less", "two-sided"):
            ref = randomization_test(y, mech, source=mech.assignments(max_exact=10**6, draws=1, seed=1),
                                     statistic=stat, alternative=alt)[0]
            assert exact_law_test(y, mech, statistic=stat, alternative=alt).p_value == pytest.approx(
                ref.p_value, abs=1e-13)


# --------------------------------------------------------------------------- fall-backs and misuse


@pytest.mark.parametrize("kind,kw,stat,y,match", [
    ("bernoulli", {}, "mean_difference", [1, 0, 1, 0, 1, 1.0], "number treated is random"),
    ("cluster", {"cluster": [1, 1, 2, 2, 3, 3]}, "mean_difference", [1, 0, 1, 0, 1, 1.0], "clusters"),
    ("complete", {}, "studentized", [1, 0, 1, 0, 1, 1.0], "not a fixed linear function"),
    ("complete", {}, "mean_difference", [1, np.nan, 1, 0, 1, 1.0], "missing outcomes"),
    ("complete", {}, "mean_difference", [1.3, 0.1, 1.7, 0, 1, 2 ** 0.5], "not on a lattice"),
])
def test_no_exact_law_says_why(kind, kw, stat, y, match):
    z = np.array([1, 1, 0, 0, 1, 0]) if kind != "cluster" else np.array([1, 1, 0, 0, 1, 1])
    mech = mechanism_from_arrays(kind, z, **kw)
    with pytest.raises(NoExactLaw, match=match):
        exact_law_test(np.array(y), mech, statistic=stat)


def test_too_large_law_falls_back_with_reason():
    z = np.array([1, 0] * 50)
    y = np.arange(100, dtype=float)
    with pytest.raises(NoExactLaw, match="too large"):
        exact_law_test(y, mechanism_from_arrays("complete", z), max_cells=1000)
    with pytest.raises(LatticeTooLarge):
        treated_sum_law(np.arange(100), 50, max_cells=1000)


def test_misuse_raises_type_and_value_errors():
    with pytest.raises(TypeError, match="integers"):
        treated_sum_law(np.array([0.5, 1.0]), 1)
    with pytest.raises(ValueError, match="n_treated"):
        treated_sum_law(np.array([0, 1]), 3)
    with pytest.raises(ValueError, match="multipliers"):
        weighted_block_law([treated_sum_law(np.array([0, 1]), 1)], [0])
    mech = mechanism_from_arrays("complete", np.array([1, 0, 1, 0]))
    with pytest.raises(ValueError, match="shape"):
        exact_law_test(np.zeros(3), mech)
    with pytest.raises(ValueError, match="resolution"):
        exact_law_test(np.zeros(4), mech, resolution=-1.0)


def test_upgrade_tests_replaces_monte_carlo_rows_only():
    # the upgraded p-value is Fisher's exact test (scipy.stats.fisher_exact); other rows explain the fallback
    z = np.array([1] * 30 + [0] * 30)
    y = np.column_stack([np.r_[np.ones(20), np.zeros(10), np.ones(12), np.zeros(18)],
                         np.sqrt(np.arange(1.0, 61.0))])                 # continuous: on no lattice
    mech = mechanism_from_arrays("complete", z)
    rows = [dict(outcome=o, statistic="mean_difference", alternative="greater", null_effect=0.0, observed=0.2,
                 p_value=0.5, method="monte_carlo", draws=100, mc_std_error=0.05) for o in ("b", "c")]
    rows.append({**rows[0], "outcome": "e", "method": "exact"})
    out = upgrade_tests(rows, np.column_stack([y, y[:, 0]]), ["b", "c", "e"], mech)
    ref = stats.fisher_exact([[20, 10], [12, 18]], alternative="greater").pvalue
    assert out[0]["method"] == "exact" and out[0]["draws"] == 0 and out[0]["mc_std_error"] is None
    assert out[0]["p_value"] == pytest.approx(ref, rel=1e-12)
    assert out[1]["method"] == "monte_carlo" and out[1]["detail"].startswith("monte carlo: ")
    assert out[2] == rows[2]


def test_collection_postcards_example_is_exact_without_listing(tmp_path):
    # the invented 8,000-household example: its 0/1 primary outcome's two-sided p-value is the
    # distance-from-mean hypergeometric tail (scipy.stats.hypergeom) from the counts in its CSV;
    # the count outcome agrees with a seeded Monte Carlo run within 4 standard errors
    import pandas as pd

    from report_kit.pipeline import analyse_project

    root = Path(__file__).resolve().parents[2] / "projects" / "collection-postcards"
    results = analyse_project(root)
    frame = pd.read_csv(root / "data" / "households.csv")
    z, y = frame["postcard"].to_numpy(), frame["booked"].to_numpy()
    n, k, m, x = z.size, int(z.sum()), int(y.sum()), int(y[z == 1].sum())
    support = np.arange(max(0, k - (n - m)), min(k, m) + 1)
    mean = k * m / n
    ref = stats.hypergeom.pmf(support, n, m, k)[np.abs(support - mean) >= abs(x - mean) - 1e-9].sum()
    booked, items = results["tests"]
    assert booked["method"] == "exact" and booked["draws"] == 0 and "hypergeometric" in booked["detail"]
    assert booked["p_value"] == pytest.approx(ref, rel=1e-9)
    assert results["design"]["assignment_check"] == "reproduced"
    # intervals: the 0/1 outcome keeps its Monte Carlo interval and says why; the 0..8 count is inverted
    # exactly on the grid tau = k (docs/methods/exact.md)
    booked_ci, items_ci = results["intervals"]
    assert booked_ci["method"] == "test_inversion" and "{-1, 0, 1}" in booked_ci["detail"]
    assert items_ci["method"] == "test_inversion" and items_ci["detail"].startswith("exact") and "tau = k * 1" in items_ci["detail"]
    assert float(items_ci["ci_low"]).is_integer() and float(items_ci["ci_high"]).is_integer()
    assert items["method"] == "exact" and "FFT" in items["detail"]
    mech = mechanism_from_arrays("complete", z)
    mc = randomization_test(frame["items_set_out"].to_numpy(float), mech, alternative="greater",
                            source=mech.assignments(max_exact=0, draws=20000, seed=9))[0]
    assert abs(items["p_value"] - mc.p_value) <= 4 * mc.mc_std_error


# =========================================================================== exact test-inversion intervals


def brute_grid_interval(y, z, block, grid, alpha):
    """Accepted grid effects: two-sided p-value of Y - tau Z by listing every assignment (blocked_brute_p)."""
    accepted = [tau for tau in grid
                if blocked_brute_p([v - tau * zi for v, zi in zip(y, z)], z, block, "two-sided",
                                   "mean_difference") > alpha]
    return accepted


@pytest.mark.parametrize("kind", ["complete", "blocked"])
@pytest.mark.parametrize("shift", [-3, 0, 2])
def test_exact_interval_equals_brute_force_inversion_on_the_grid(kind, shift):
    # exact enumeration identity: the accepted set {tau on the grid : p(tau) > alpha}, every p(tau) found by
    # listing all assignments (itertools, fractions); the search starts from Monte Carlo ends moved by `shift`
    y = [3, 1, 4, 1, 5, 9, 2, 6, 5, 3, 5, 8, 9, 7]
    z = [1, 0, 0, 1, 0, 1, 1, 0, 0, 1, 0, 1, 1, 0]
    block = ["a"] * 14 if kind == "complete" else ["a"] * 5 + ["b"] * 4 + ["c"] * 5
    mech = (mechanism_from_arrays("complete", np.array(z)) if kind == "complete"
            else mechanism_from_arrays("blocked", np.array(z), block=np.array(block)))
    level = 0.9
    accepted = brute_grid_interval(y, z, block, range(-12, 13), 1.0 - level)
    assert accepted and -12 < min(accepted) and max(accepted) < 12     # the grid range covers the interval
    row = dict(outcome="y", method="test_inversion", level=level, ci_low=min(accepted) + shift + 0.3,
               ci_high=max(accepted) - shift - 0.2, hodges_lehmann=0.5)
    out = exact_interval(row, np.array(y, float), mech)
    assert out["method"] == "test_inversion" and out["detail"].startswith("exact") and "tau = k * 1" in out["detail"]
    assert (out["ci_low"], out["ci_high"]) == (min(accepted), max(accepted))
    assert out["hodges_lehmann"] == 0.5


def test_exact_interval_on_a_declared_resolution_equals_brute_force():
    # outcomes on a 0.5 grid: the effects tried are multiples of 0.5 (exact enumeration identity, as above)
    y = [1.5, 0.5, 2.0, 3.5, 0.0, 1.5, 2.5, 0.5, 1.0, 2.5, 3.0, 4.0]
    z = [1, 0, 1, 1, 0, 0, 1, 0, 0, 1, 1, 0]
    grid = [Fraction(j, 2) for j in range(-16, 17)]
    accepted = brute_grid_interval([Fraction(v) for v in y], z, ["a"] * 12, grid, 0.1)
    row = dict(outcome="y", method="test_inversion", level=0.9, ci_low=float(min(accepted)) - 0.7,
               ci_high=float(max(accepted)) + 0.1, hodges_lehmann=1.0)
    out = exact_interval(row, np.array(y), mechanism_from_arrays("complete", np.array(z)), resolution=0.5)
    assert out["method"] == "test_inversion" and out["detail"].startswith("exact") and "tau = k * 0.5" in out["detail"]
    assert out["ci_low"] == pytest.approx(float(min(accepted)), abs=1e-12)
    assert out["ci_high"] == pytest.approx(float(max(accepted)), abs=1e-12)


def test_exact_interval_keeps_monte_carlo_with_a_reason():
    z = np.array([1, 0] * 10)
    row = dict(outcome="y", method="test_inversion", level=0.95, ci_low=-0.2, ci_high=0.4, hodges_lehmann=0.1)
    binary = exact_interval(row, np.array([1.0, 0.0, 1.0] * 6 + [0.0, 1.0]), mechanism_from_arrays("complete", z))
    assert binary["method"] == "test_inversion" and "{-1, 0, 1}" in binary["detail"]
    assert (binary["ci_low"], binary["ci_high"]) == (-0.2, 0.4)
    continuous = exact_interval(row, np.sqrt(np.arange(1.0, 21.0)), mechanism_from_arrays("complete", z))
    assert continuous["method"] == "test_inversion" and "lattice" in continuous["detail"]
    counts = np.arange(20.0) % 7
    spent = exact_interval(row, counts, mechanism_from_arrays("complete", z), max_evaluations=1)
    assert spent["method"] == "test_inversion" and "1 exact p-values" in spent["detail"]
    unbounded = exact_interval({**row, "ci_high": None}, counts, mechanism_from_arrays("complete", z))
    assert unbounded == {**row, "ci_high": None, "detail": "monte carlo: the Monte Carlo interval is unbounded"}
