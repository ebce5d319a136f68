"""Tests of report_kit.inference.multiplicity."""

from __future__ import annotations

import itertools
import json

import numpy as np
import pytest
from scipy import stats
from statsmodels.stats.multitest import multipletests

from report_kit.inference import multiplicity as mt
from report_kit.errors import DesignError
from report_kit.inputs.model import OutcomeSpec

P_SETS = [
    [0.01, 0.04, 0.03, 0.005, 0.2],
    [0.5, 0.5, 0.01, 0.01, 0.049, 1.0],          # ties
    [0.001],
    [0.04, 0.03, 0.02, 0.01],
    list(np.random.default_rng(3).random(25)),
]


# ---------------------------------------------------------------------------
# Holm and Benjamini-Hochberg
# ---------------------------------------------------------------------------


@pytest.mark.parametrize("p", P_SETS)
def test_holm_matches_statsmodels(p):
    # Reference: statsmodels.stats.multitest.multipletests(method="holm").
    expected = multipletests(p, method="holm")[1]
    np.testing.assert_allclose(mt.holm(p), expected, rtol=1e-12, atol=0)


@pytest.mark.parametrize("p", P_SETS)
def test_bh_matches_statsmodels_and_scipy(p):
    # References: statsmodels multipletests(method="fdr_bh") and
    # scipy.stats.false_discovery_control(method="bh").
    np.testing.assert_allclose(mt.benjamini_hochberg(p), multipletests(p, method="fdr_bh")[1], rtol=1e-12)
    np.testing.assert_allclose(mt.benjamini_hochberg(p), stats.false_discovery_control(p, method="bh"),
                               rtol=1e-12)


def test_holm_and_bh_worked_example():
    # By hand: p = (0.01, 0.02, 0.03, 0.04), m = 4.
    # Holm: 4*0.01, 3*0.02, 2*0.03, 1*0.04 -> 0.04, 0.06, 0.06 (monotone), 0.06
    # BH: 4*0.01/1, 4*0.02/2, 4*0.03/3, 4*0.04/4 -> all 0.04
    np.testing.assert_allclose(mt.holm([0.01, 0.02, 0.03, 0.04]), [0.04, 0.06, 0.06, 0.06])
    np.testing.assert_allclose(mt.benjamini_hochberg([0.01, 0.02, 0.03, 0.04]), [0.04] * 4)
    assert mt.holm([]).size == 0


def test_p_value_validation():
    with pytest.raises(ValueError, match=r"`p` must hold p-values in \[0, 1\]"):
        mt.holm([0.1, np.nan])
    with pytest.raises(ValueError, match=r"`p` must hold p-values in \[0, 1\]"):
        mt.benjamini_hochberg([0.1, 1.2])
    with pytest.raises(ValueError, match="`p` must be one-dimensional"):
        mt.holm([[0.1, 0.2]])


# ---------------------------------------------------------------------------
# Westfall-Young: small exact design and a brute-force reference
# ---------------------------------------------------------------------------


def exact_design_statistics():
    """n = 8, 4 treated: all 70 assignments; 3 correlated integer outcomes.

    Statistics are |mean difference| = |S1 - S0| / 4 with integer sums, so ties
    are exact in floating point and the brute force needs no tolerance.
    """
    y = np.array([
        [3, 1, 2], [5, 4, 1], [4, 4, 0], [6, 5, 3],
        [1, 0, 2], [2, 2, 1], [0, 1, 3], [2, 0, 0],
    ], dtype=float)
    z_obs = np.array([1, 1, 1, 1, 0, 0, 0, 0])
    rows = []
    for treated in itertools.combinations(range(8), 4):
        z = np.zeros(8, dtype=int)
        z[list(treated)] = 1
        rows.append(z)
    Z = np.array(rows)

    def stat(z):
        return np.abs(y[z == 1].mean(axis=0) - y[z == 0].mean(axis=0))

    return stat(z_obs), np.array([stat(z) for z in Z])


def brute_force_wy(observed, null, kind):
    """Direct, loop-by-loop Westfall & Young (1993) step-down over a full enumeration."""
    big_n, m = null.shape
    if kind == "max_t":
        order = sorted(range(m), key=lambda j: -observed[j])
        adj, running = [0.0] * m, 0.0
        for i, j in enumerate(order):
            rest = order[i:]
            count = sum(1 for b in range(big_n) if max(null[b][k] for k in rest) >= observed[j])
            running = max(running, count / big_n)
            adj[j] = running
        return adj
    raw = [sum(1 for b in range(big_n) if null[b][j] >= observed[j]) / big_n for j in range(m)]
    pstar = [[sum(1 for c in range(big_n) if null[c][j] >= null[b][j]) / big_n for j in range(m)]
             for b in range(big_n)]
    order = sorted(range(m), key=lambda j: raw[j])
    adj, running = [0.0] * m, 0.0
    for i, j in enumerate(order):
        rest = order[i:]
        count = sum(1 for b in range(big_n) if min(pstar[b][k] for k in rest) <= raw[j])
        running = max(running, count / big_n)
        adj[j] = running
    return adj


def heterogeneous_statistics():
    """Columns on very different scales, so the step-down needs its running maximum."""
    rng = np.random.default_rng(14)
    null = rng.normal(size=(60, 3)) * np.array([10.0, 1.0, 3.0])
    observed = np.array([5.0, 3.0, 1.0])
    null[0] = observed          # the observed assignment is one of the rows
    return observed, null


@pytest.mark.parametrize("kind", ["min_p", "max_t"])
@pytest.mark.parametrize("data", [exact_design_statistics, heterogeneous_statistics])
def test_westfall_young_matches_brute_force_on_exact_design(kind, data):
    # Reference: a direct brute-force implementation of the step-down
    # algorithm (Westfall & Young 1993) written independently above.
    observed, null = data()
    got = mt.westfall_young(observed, null, method="exact", kind=kind)
    np.testing.assert_allclose(got, brute_force_wy(observed, null, kind), rtol=0, atol=1e-15)


def test_max_t_step_down_keeps_the_running_maximum():
    # By construction the second step alone would give a smaller p-value than
    # the first; step-down monotonicity (Westfall & Young 1993) lifts it.
    observed, null = heterogeneous_statistics()
    adj = mt.westfall_young(observed, null, method="exact", kind="max_t")
    second_alone = np.mean(np.maximum(null[:, 1], null[:, 2]) >= observed[1])
    assert second_alone < adj[0]
    assert adj[1] == pytest.approx(adj[0])


@pytest.mark.parametrize("kind", ["min_p", "max_t"])
def test_westfall_young_is_above_raw_and_monotone(kind):
    observed, null = exact_design_statistics()
    adj = mt.westfall_young(observed, null, method="exact", kind=kind)
    raw = (null >= observed).mean(axis=0)
    assert (adj >= raw - 1e-15).all()
    order = np.argsort(raw, kind="stable")
    assert (np.diff(adj[order]) >= -1e-15).all()


def test_min_p_westfall_young_is_never_above_holm():
    # Known dominance (Westfall & Young 1993): the min-p step-down with exact
    # marginal p-values is uniformly no larger than Holm applied to the same
    # raw p-values, because P(p*_j <= u) <= u for each margin.
    rng = np.random.default_rng(9)
    observed, null = exact_design_statistics()
    for trial in range(5):
        pick = rng.choice(null.shape[0], 1, replace=False)[0]
        obs = null[pick] if trial else observed
        adj = mt.westfall_young(obs, null, method="exact")
        raw = (null >= obs).mean(axis=0)
        assert (adj <= mt.holm(raw) + 1e-12).all()


@pytest.mark.parametrize("kind", ["min_p", "max_t"])
def test_weighted_westfall_young_equals_replicated_rows(kind):
    # Identity: integer weights act as replicated rows of the enumeration
    # (each assignment counted by its probability mass).
    observed, null = heterogeneous_statistics()
    w = np.random.default_rng(5).integers(1, 4, size=null.shape[0])
    weighted = mt.westfall_young(observed, null, method="exact", kind=kind, weights=w)
    replicated = mt.westfall_young(observed, np.repeat(null, w, axis=0), method="exact", kind=kind)
    np.testing.assert_allclose(weighted, replicated, rtol=1e-12)
    assert not np.allclose(weighted, mt.westfall_young(observed, null, method="exact", kind=kind))
    with pytest.raises(ValueError, match="`weights` apply to exact enumeration only"):
        mt.westfall_young(observed, null, method="monte_carlo", weights=w)


def test_westfall_young_single_outcome_is_the_raw_p_value_with_plus_one_rule():
    rng = np.random.default_rng(1)
    null = rng.normal(size=(99, 1))
    observed = np.array([1.5])
    count = int((null[:, 0] >= 1.5).sum())
    got = mt.westfall_young(observed, null, method="monte_carlo")
    assert got[0] == pytest.approx((1 + count) / 100)   # +1 rule (Phipson & Smyth 2010)
    got_t = mt.westfall_young(observed, null, method="monte_carlo", kind="max_t")
    assert got_t[0] == pytest.approx((1 + count) / 100)


def test_westfall_young_monte_carlo_equals_exact_on_augmented_rows():
    # The +1 rule is the exact rule applied to the draws plus the observed row.
    rng = np.random.default_rng(2)
    null = rng.normal(size=(200, 4)) + rng.normal(size=(200, 1))
    observed = np.array([2.0, 0.5, 1.2, 2.5])
    for kind in ("min_p", "max_t"):
        a = mt.westfall_young(observed, null, method="monte_carlo", kind=kind)
        b = mt.westfall_young(observed, np.vstack([observed, null]), method="exact", kind=kind)
        np.testing.assert_allclose(a, b)


def test_westfall_young_validation_messages():
    with pytest.raises(ValueError, match=r"`null` must have shape \(B, 2\)"):
        mt.westfall_young([1.0, 2.0], np.zeros((5, 3)), method="exact")
    with pytest.raises(ValueError, match=r"`kind` must be one of \{'min_p', 'max_t'\}; got 'maxT'"):
        mt.westfall_young([1.0], np.zeros((5, 1)), method="exact", kind="maxT")
    with pytest.raises(ValueError, match=r"`method` must be one of"):
        mt.westfall_young([1.0], np.zeros((5, 1)), method="random")
    with pytest.raises(DesignError, match="does not contain the observed assignment"):
        mt.westfall_young([9.0], np.zeros((5, 1)), method="exact")


# ---------------------------------------------------------------------------
# results.json section
# ---------------------------------------------------------------------------

OUTCOMES = (
    OutcomeSpec(column="a", label="A"),
    OutcomeSpec(column="b", label="B"),
    OutcomeSpec(column="c", label="C"),
    OutcomeSpec(column="d", label="D", family="secondary", statistic="rank_sum"),
    OutcomeSpec(column="e", label="E", family="secondary"),
)


def p_entry(outcome, p, statistic="mean_difference", null_effect=0.0):
    return {"outcome": outcome, "statistic": statistic, "alternative": "two-sided", "null_effect": null_effect,
            "observed": 1.0, "p_value": p, "method": "monte_carlo", "draws": 999, "mc_std_error": 0.001}


TESTS = [
    p_entry("a", 0.01), p_entry("b", 0.04), p_entry("c", 0.03),
    p_entry("a", 0.9, null_effect=1.5),              # test inversion: ignored
    p_entry("d", 0.02, statistic="rank_sum"), p_entry("d", 0.5),   # other statistic: ignored
    p_entry("e", 0.2),
]


def test_study_multiplicity_families_adjusted_separately():
    entries = mt.study_multiplicity(TESTS, OUTCOMES, lead="holm")
    json.dumps(entries, allow_nan=False)
    got = {(e["outcome"], e["method"]): e for e in entries}
    assert {e["method"] for e in entries} == {"holm", "bh"}
    # Reference: statsmodels multipletests within each family
    prim = multipletests([0.01, 0.04, 0.03], method="holm")[1]
    sec = multipletests([0.02, 0.2], method="fdr_bh")[1]
    assert [got[o, "holm"]["p_adjusted"] for o in "abc"] == pytest.approx(list(prim))
    assert [got[o, "bh"]["p_adjusted"] for o in "de"] == pytest.approx(list(sec))
    assert got["d", "holm"]["p_value"] == 0.02 and got["d", "holm"]["family"] == "secondary"
    assert got["a", "holm"]["lead"] is True and got["a", "bh"]["lead"] is False


def test_study_multiplicity_with_shared_null_adds_westfall_young():
    observed, null = exact_design_statistics()
    raw = (null >= observed).mean(axis=0)
    tests = [p_entry(o, float(p)) for o, p in zip("abc", raw)]
    shared = {"primary": {"outcomes": ["a", "b", "c"], "observed": observed, "null": null, "method": "exact"}}
    entries = mt.study_multiplicity(tests, OUTCOMES[:3], shared, lead="westfall_young")
    wy = {e["outcome"]: e["p_adjusted"] for e in entries if e["method"] == "westfall_young"}
    expected = brute_force_wy(observed, null, "min_p")
    assert [wy[o] for o in "abc"] == pytest.approx(expected)
    assert all(e["lead"] == (e["method"] == "westfall_young") for e in entries)


def test_study_multiplicity_missing_and_invalid_inputs():
    entries = mt.study_multiplicity([p_entry("a", 0.01), p_entry("b", 0.04)], OUTCOMES[:3])
    got = {(e["outcome"], e["method"]): e for e in entries}
    assert got["c", "holm"]["p_value"] is None and got["c", "holm"]["p_adjusted"] is None
    assert got["b", "holm"]["p_adjusted"] == pytest.approx(0.04)    # m = 2 tested outcomes
    with pytest.raises(ValueError, match="no shared null draws were given for family 'primary'"):
        mt.study_multiplicity(TESTS, OUTCOMES, lead="westfall_young")
    with pytest.raises(ValueError, match="`tests` has 2 entries for outcome 'a'"):
        mt.study_multiplicity([p_entry("a", 0.01), p_entry("a", 0.02)], OUTCOMES[:1])
    with pytest.raises(ValueError, match=r"`lead` must be one of"):
        mt.study_multiplicity(TESTS, OUTCOMES, lead="bonferroni")
    with pytest.raises(ValueError, match="shared null draws cover outcomes"):
        mt.study_multiplicity(TESTS, OUTCOMES, {"primary": {"outcomes": ["a"], "observed": [1.0],
                                                            "null": np.ones((3, 1)), "method": "exact"}})


def test_multiplicity_table_matches_a_pandas_pivot():
    """One row per outcome; reference: pandas.pivot_table of the same rows (general-purpose library)."""
    import pandas as pd

    from report_kit.inference.multiplicity import multiplicity_table

    entries = [
        {"outcome": "b", "family": "primary", "method": "holm", "p_value": 0.02, "p_adjusted": 0.04, "lead": True},
        {"outcome": "b", "family": "primary", "method": "bh", "p_value": 0.02, "p_adjusted": 0.03, "lead": False},
        {"outcome": "a", "family": "primary", "method": "holm", "p_value": 0.30, "p_adjusted": 0.30, "lead": True},
        {"outcome": "a", "family": "primary", "method": "bh", "p_value": 0.30, "p_adjusted": 0.30, "lead": False},
        {"outcome": "c", "family": "secondary", "method": "bh", "p_value": None, "p_adjusted": None, "lead": False},
    ]
    table = multiplicity_table(entries)
    wide = pd.DataFrame(entries).pivot_table(index=["outcome", "family"], columns="method", values="p_adjusted",
                                             aggfunc="first", sort=False)
    assert [r["outcome"] for r in table] == ["b", "a", "c"]
    for row in table[:2]:
        for method, value in row["adjusted"].items():
            assert value == wide.loc[(row["outcome"], row["family"]), method]
    assert table[0]["lead_method"] == "holm" and table[2]["lead_method"] is None
    assert list(table[0]["adjusted"]) == ["holm", "bh"] and table[2]["adjusted"] == {"bh": None}
    with pytest.raises(TypeError):
        multiplicity_table("holm")
