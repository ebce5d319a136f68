"""Multi-arm randomization inference against scipy (one-way ANOVA, Kruskal-Wallis) and brute force."""

from __future__ import annotations

import itertools
import math

import numpy as np
import pytest
from scipy import stats

from report_kit.design.arms import ArmSource, multi_arm_mechanism
from report_kit.inference.arms import between_arms, contrast_tests, omnibus_test


def data(seed=1, sizes=(3, 2, 3)):
    rng = np.random.default_rng(seed)
    arm = np.repeat(np.arange(len(sizes)), sizes)
    y = rng.normal(size=arm.size) + 0.8 * arm
    return y, arm


def test_between_arms_matches_f_oneway():
    # Reference: scipy.stats.f_oneway. F = (SSB/(K-1)) / ((SST-SSB)/(N-K)), so
    # SSB = F (K-1) SST / ((N-K) + F (K-1)) with SST the total sum of squares.
    y, arm = data(sizes=(5, 7, 6, 4))
    f = stats.f_oneway(*[y[arm == k] for k in range(4)]).statistic
    sst = ((y - y.mean()) ** 2).sum()
    n, k = y.size, 4
    ssb = f * (k - 1) * sst / ((n - k) + f * (k - 1))
    assert between_arms(y, arm, 4)[0] == pytest.approx(ssb, rel=1e-10)


def test_between_arms_of_a_large_design_matches_f_oneway_row_by_row():
    # Reference: scipy.stats.f_oneway on each row's arms, observed units only (the large-design path
    # sums each row's arms with bincount; the small-design path is checked above).
    rng = np.random.default_rng(12)
    n = 7000
    y = rng.normal(size=n)
    y[rng.random(n) < 0.05] = np.nan
    rows = np.stack([rng.permutation(np.arange(n) % 3) for _ in range(3)])
    got = between_arms(y, rows, 3)
    for r, row in enumerate(rows):
        seen = ~np.isnan(y)
        groups = [y[seen & (row == k)] for k in range(3)]
        f = stats.f_oneway(*groups).statistic
        yo = y[seen]
        sst = ((yo - yo.mean()) ** 2).sum()
        ssb = f * 2 * sst / ((yo.size - 3) + f * 2)
        assert got[r] == pytest.approx(ssb, rel=1e-10)


def test_between_arms_on_ranks_is_kruskal_h():
    # Reference: scipy.stats.kruskal; without ties H = 12 / (N (N+1)) * sum n_k (Rbar_k - Rbar)^2.
    y, arm = data(seed=4, sizes=(6, 5, 7))
    ranks = stats.rankdata(y)
    h = stats.kruskal(*[y[arm == k] for k in range(3)]).statistic
    assert between_arms(ranks, arm, 3)[0] * 12 / (y.size * (y.size + 1)) == pytest.approx(h, rel=1e-12)


def test_count_and_enumeration_are_the_multinomial_assignments():
    # Exact enumeration identity: 8! / (3! 2! 3!) = 560 distinct assignments with the observed sizes.
    _, arm = data()
    mech = multi_arm_mechanism("complete", arm, n_arms=3)
    assert mech.count() == math.factorial(8) // (6 * 2 * 6) == 560
    rows = np.vstack(list(mech.enumerate_chunks()))
    assert rows.shape == (560, 8)
    assert len({r.tobytes() for r in rows}) == 560
    assert all(np.bincount(r, minlength=3).tolist() == [3, 2, 3] for r in rows)


def test_blocked_and_cluster_counts():
    arm = np.array([0, 1, 2, 0, 1, 2, 2])
    block = np.array(["a", "a", "a", "b", "b", "b", "b"])
    mech = multi_arm_mechanism("blocked", arm, n_arms=3, block=block)
    assert mech.count() == math.factorial(3) * math.factorial(4) // 2  # 3! x 4!/(1!1!2!)
    rows = np.vstack(list(mech.enumerate_chunks()))
    assert len({r.tobytes() for r in rows}) == mech.count()
    cl = multi_arm_mechanism("cluster", np.array([0, 0, 1, 1, 2, 2]), n_arms=3, cluster=[1, 1, 2, 2, 3, 3])
    rows = np.vstack(list(cl.enumerate_chunks()))
    assert cl.count() == 6 and (rows[:, 0] == rows[:, 1]).all()


def test_exact_omnibus_p_equals_brute_force_anova():
    # Reference: brute force over every assignment with scipy.stats.f_oneway (F is increasing in
    # the between-arm sum of squares for fixed outcomes), p = share with F_b >= F_obs.
    y, arm = data(seed=7)
    f_obs = stats.f_oneway(*[y[arm == k] for k in range(3)]).statistic
    hits = total = 0
    for first in itertools.combinations(range(8), 3):
        rest = [i for i in range(8) if i not in first]
        for second in itertools.combinations(rest, 2):
            a = np.full(8, 2)
            a[list(first)], a[list(second)] = 0, 1
            f = stats.f_oneway(*[y[a == k] for k in range(3)]).statistic
            hits += f >= f_obs * (1 - 1e-12)
            total += 1
    mech = multi_arm_mechanism("complete", arm, n_arms=3)
    source = ArmSource.choose(mech, max_exact=10_000, draws=100, seed=1)
    (result,) = omnibus_test(y, source, outcomes=["y"])
    assert source.method == "exact" and result.test.draws == total == 560
    assert result.test.p_value == pytest.approx(hits / total, abs=1e-15)
    assert result.test.statistic == "between_arms" and result.arm is None


def test_sampled_draws_keep_sizes_and_are_seeded():
    arm = np.array([0, 1, 2, 0, 1, 2, 0, 1, 2, 2])
    block = np.array([0] * 5 + [1] * 5)
    mech = multi_arm_mechanism("blocked", arm, n_arms=3, block=block)
    a = np.vstack(list(mech.sample_chunks(300, seed=9)))
    b = np.vstack(list(mech.sample_chunks(300, seed=9)))
    assert np.array_equal(a, b)
    for s in (0, 1):
        want = np.bincount(arm[block == s], minlength=3)
        assert all((np.bincount(r[block == s], minlength=3) == want).all() for r in a)
    assert len({r.tobytes() for r in a}) > 100


def test_monte_carlo_omnibus_close_to_exact():
    # Consistency check: Monte Carlo p-value within 4 standard errors of the exact one.
    y, arm = data(seed=3, sizes=(4, 4, 4))
    mech = multi_arm_mechanism("complete", arm, n_arms=3)
    (exact,) = omnibus_test(y, ArmSource.choose(mech, max_exact=10**6, draws=1, seed=1), outcomes=["y"])
    (mc,) = omnibus_test(y, ArmSource.choose(mech, max_exact=0, draws=4000, seed=2), outcomes=["y"])
    assert mc.test.method == "monte_carlo"
    assert abs(mc.test.p_value - exact.test.p_value) < 4 * mc.test.mc_std_error


def test_contrast_test_re_randomizes_only_the_two_arms():
    # Reference: brute force over the C(10, 5) splits of the 10 units of arms 0 and 2 only,
    # two-sided difference in means (null mean 0 under complete randomization).
    y, arm = data(seed=5, sizes=(5, 2, 5))
    labels = np.array(["u", "s", "l"], dtype=object)[arm]
    sub = y[(arm == 0) | (arm == 2)]
    z_obs = arm[(arm == 0) | (arm == 2)] == 2
    t_obs = sub[z_obs].mean() - sub[~z_obs].mean()
    diffs = []
    for treated in itertools.combinations(range(10), 5):
        z = np.zeros(10, dtype=bool)
        z[list(treated)] = True
        diffs.append(sub[z].mean() - sub[~z].mean())
    p = np.mean(np.abs(diffs) >= abs(t_obs) * (1 - 1e-12))
    (result,) = contrast_tests(y, labels, [("l", "u")], kind="complete", outcome="y")
    assert result.test.p_value == pytest.approx(p, abs=1e-15) and result.test.draws == 252
    row = result.interval_row()
    assert row["arm"] == "l" and row["reference"] == "u" and row["hodges_lehmann"] == pytest.approx(t_obs)
    assert result.test_row()["arm"] == "l"


def test_arm_multiplicity_families_match_statsmodels():
    # Reference: statsmodels.stats.multitest.multipletests ('holm', 'fdr_bh') on the
    # contrasts of all outcomes of one family; omnibus rows are not adjusted.
    from types import SimpleNamespace

    from statsmodels.stats.multitest import multipletests

    from report_kit.inference.arms import arm_multiplicity

    outcomes = [SimpleNamespace(column="a", family="primary"), SimpleNamespace(column="b", family="primary"),
                SimpleNamespace(column="c", family="secondary")]
    tests = [{"outcome": "a", "arm": None, "reference": None, "p_value": 0.001},
             {"outcome": "a", "arm": "s", "reference": "u", "p_value": 0.01},
             {"outcome": "a", "arm": "l", "reference": "u", "p_value": 0.04},
             {"outcome": "b", "arm": "s", "reference": "u", "p_value": 0.03},
             {"outcome": "b", "arm": "l", "reference": "u", "p_value": 0.20},
             {"outcome": "c", "arm": "s", "reference": "u", "p_value": 0.02},
             {"outcome": "c", "arm": "l", "reference": "u", "p_value": None}]
    rows = arm_multiplicity(tests, outcomes, lead="holm")
    primary = [0.01, 0.04, 0.03, 0.20]
    for method, name in (("holm", "holm"), ("bh", "fdr_bh")):
        got = [r["p_adjusted"] for r in rows if r["family"] == "primary" and r["method"] == method]
        assert got == pytest.approx(multipletests(primary, method=name)[1].tolist())
    secondary = [r for r in rows if r["family"] == "secondary" and r["method"] == "holm"]
    assert [r["p_adjusted"] for r in secondary] == [0.02, None]
    assert all(r["lead"] == (r["method"] == "holm") for r in rows)
    assert len(rows) == 2 * 6


def test_westfall_young_of_contrasts_equals_brute_force():
    # Reference: exact enumeration of all 8!/(3!2!3!) = 560 assignments with plain numpy means,
    # and the step-down min-p rule of Westfall & Young (1993) written out for two hypotheses.
    from report_kit.inference.arms import contrast_joint_null
    from report_kit.inference.multiplicity import westfall_young

    y, arm = data(seed=12)
    mech = multi_arm_mechanism("complete", arm, n_arms=3)
    source = ArmSource.choose(mech, max_exact=10_000, draws=10, seed=1)
    observed, null = contrast_joint_null(y[:, None], [(0, 1, 0), (0, 2, 0)], source,
                                         alternatives=["two-sided", "two-sided"])
    adjusted = westfall_young(observed, null, method="exact")

    def stats_of(a):
        return np.array([y[a == 1].mean() - y[a == 0].mean(), y[a == 2].mean() - y[a == 0].mean()])

    rows = []
    for first in itertools.combinations(range(8), 3):
        rest = [i for i in range(8) if i not in first]
        for second in itertools.combinations(rest, 2):
            a = np.full(8, 2)
            a[list(first)], a[list(second)] = 0, 1
            rows.append(stats_of(a))
    rows = np.array(rows)
    dist = np.abs(rows - rows.mean(axis=0))
    obs = np.abs(stats_of(arm) - rows.mean(axis=0))
    pb = np.array([[np.mean(dist[:, j] >= dist[b, j] * (1 - 1e-12)) for j in range(2)] for b in range(len(rows))])
    raw = np.array([np.mean(dist[:, j] >= obs[j] * (1 - 1e-12)) for j in range(2)])
    first, second = np.argsort(raw, kind="stable")
    p_first = np.mean(pb.min(axis=1) <= raw[first] * (1 + 1e-12))
    p_second = max(p_first, np.mean(pb[:, second] <= raw[second] * (1 + 1e-12)))
    assert np.sort(observed) == pytest.approx(np.sort(obs))
    assert adjusted[first] == pytest.approx(p_first) and adjusted[second] == pytest.approx(p_second)


def test_log10_count_and_count_text():
    # Exact identity: log10 of the multinomial coefficient 8!/(3!2!3!) = 560; a large design
    # (90 units, 3 arms of 30: about 10^41) is reported by its logarithm only.
    _, arm = data()
    mech = multi_arm_mechanism("complete", arm, n_arms=3)
    assert mech.log10_count() == pytest.approx(math.log10(560)) and mech.count_text() == "560"
    big = multi_arm_mechanism("complete", np.repeat([0, 1, 2], 30), n_arms=3)
    exact = math.factorial(90) // math.factorial(30) ** 3
    assert big.log10_count() == pytest.approx(math.log10(exact)) and big.count_text() is None
    assert ArmSource.choose(big, max_exact=10**6, draws=50, seed=1).method == "monte_carlo"


def test_multi_arm_draws_keep_arm_sizes_and_are_uniform():
    # Reference: scipy.stats.chisquare against the uniform law on all 6!/(2!2!2!) = 90 assignments
    # (Monte Carlo draws of the full mechanism must make every assignment equally likely).
    from report_kit.inference.arms import ArmDraws

    mech = multi_arm_mechanism("complete", np.array([0, 0, 1, 1, 2, 2]), n_arms=3)
    source = ArmSource.choose(mech, max_exact=0, draws=18000, seed=42)
    draws = ArmDraws(source)
    rows = np.vstack([draws.chunk(i)[0] for i in range(draws.n_chunks)])
    assert rows.shape == (18000, 6)
    assert (np.sort(rows, axis=1) == [0, 0, 1, 1, 2, 2]).all()            # arm sizes kept in every draw
    _, counts = np.unique(rows, axis=0, return_counts=True)
    assert counts.size == 90
    assert stats.chisquare(counts).pvalue > 1e-3
    # any chunk can be made on its own, in any order, and equals the source's own chunks
    assert np.array_equal(draws.chunk(3)[0], list(source.chunks())[3])


def test_blocked_multi_arm_draws_stay_within_blocks():
    from report_kit.inference.arms import ArmDraws

    arm = np.array([0, 1, 2, 0, 1, 2, 2, 0, 1])
    block = np.array(["a", "a", "a", "b", "b", "b", "c", "c", "c"])
    mech = multi_arm_mechanism("blocked", arm, n_arms=3, block=block)
    draws = ArmDraws(ArmSource.choose(mech, max_exact=0, draws=500, seed=1))
    rows = np.vstack([draws.chunk(i)[0] for i in range(draws.n_chunks)])
    for b in "abc":
        assert (np.sort(rows[:, block == b], axis=1) == [0, 1, 2]).all()


def test_one_shared_pass_equals_separate_passes():
    # The statistics that share a pass get exactly what a pass of their own gives.
    from report_kit.inference.arms import ArmPass, contrast_joint_null, omnibus_null

    y, arm = data(seed=9, sizes=(9, 8, 10))
    mech = multi_arm_mechanism("complete", arm, n_arms=3)
    source = ArmSource.choose(mech, max_exact=0, draws=700, seed=5)
    x = np.random.default_rng(2).normal(size=y.size)
    shared = ArmPass(source)
    h_y, h_x = shared.add_omnibus(y), shared.add_omnibus(x)
    h_c = shared.add_contrasts(y[:, None], [(0, 1, 0), (0, 2, 0)])
    shared.run()
    for handle, column in ((h_y, y), (h_x, x)):
        alone = omnibus_null(column, source)
        assert np.array_equal(shared.omnibus(handle).null, alone.null)
        assert np.array_equal(shared.omnibus(handle).observed, alone.observed)
    obs, null = contrast_joint_null(y[:, None], [(0, 1, 0), (0, 2, 0)], source, alternatives=["two-sided"] * 2)
    got_obs, got_null = shared.contrasts(h_c, ["two-sided"] * 2)
    assert np.array_equal(obs, got_obs) and np.array_equal(null, got_null)
    with pytest.raises(ValueError, match="register every statistic before"):
        shared.add_omnibus(x)
