"""Blocked factorial effects: exact enumeration of within-block assignments and statsmodels OLS."""

from __future__ import annotations

import itertools

import numpy as np
import pytest
import statsmodels.api as sm

from report_kit.estimation.factorial import estimate_factorial

CELLS = ("none", "text", "call", "both")
FACTORS = (("text", ("text", "both")), ("call", ("call", "both")))
# +-1 codes of each effect per cell (Dasgupta, Pillai & Rubin 2015)
SIGNS = {"text": np.array([-1, 1, -1, 1]), "call": np.array([-1, -1, 1, 1]), "text:call": np.array([1, -1, -1, 1])}
SIZES = ((2, 2, 2, 2), (3, 2, 2, 2))  # cell sizes in block A (8 units) and block B (9 units)


def orders(sizes):
    """Every within-block assignment with the given cell sizes (independent of the code under test)."""
    n = sum(sizes)
    out = []

    def place(free, k, current):
        if k == len(sizes):
            out.append(current.copy())
            return
        for chosen in itertools.combinations(free, sizes[k]):
            current[list(chosen)] = k
            place([i for i in free if i not in chosen], k + 1, current)

    place(list(range(n)), 0, np.zeros(n, dtype=int))
    return out


def potential_outcomes(additive: bool):
    rng = np.random.default_rng(20)
    n = sum(SIZES[0]) + sum(SIZES[1])
    base = rng.normal(size=n) + np.r_[np.zeros(sum(SIZES[0])), np.full(sum(SIZES[1]), 2.0)]
    shift = np.array([0.0, 0.5, 1.0, 2.0])
    if additive:
        return base[:, None] + shift[None, :]
    return base[:, None] + shift[None, :] + rng.normal(scale=0.8, size=(n, 4))


def run(table, codes):
    block = np.r_[np.zeros(sum(SIZES[0]), dtype=int), np.ones(sum(SIZES[1]), dtype=int)]
    y = table[np.arange(codes.size), codes]
    arm = np.array(CELLS, dtype=object)[codes]
    effects = estimate_factorial(y, arm, arms=CELLS, factors=FACTORS, block=block)
    return {e.factor: (e.estimate.estimate, e.estimate.std_error ** 2) for e in effects}


@pytest.mark.parametrize("additive", [False, True])
def test_blocked_factorial_by_exact_enumeration(additive):
    # Reference: exact enumeration of every within-block assignment with the cells' sizes
    # fixed (blocks randomized independently). The estimate and the variance estimate are
    # sums of block terms, checked below on draws from the full product; the product's mean
    # and variance then follow exactly from the two blocks' enumerations. Identities:
    # E[tau_hat] = tau (unbiasedness), E[V_hat] >= Var(tau_hat), with equality for
    # additive effects (Neyman 1923; Dasgupta, Pillai & Rubin 2015).
    table = potential_outcomes(additive)
    truth = {name: float(np.mean(table @ s) / 2) for name, s in SIGNS.items()}
    first, second = orders(SIZES[0]), orders(SIZES[1])
    a0, b0 = first[0], second[0]
    base = run(table, np.r_[a0, b0])
    over_a = [run(table, np.r_[a, b0]) for a in first]
    over_b = [run(table, np.r_[a0, b]) for b in second]
    rng = np.random.default_rng(5)
    for _ in range(40):  # additivity over blocks, on draws from the full product
        i, j = rng.integers(len(first)), rng.integers(len(second))
        both = run(table, np.r_[first[i], second[j]])
        for name in SIGNS:
            for k in (0, 1):
                assert both[name][k] == pytest.approx(over_a[i][name][k] + over_b[j][name][k] - base[name][k],
                                                      abs=1e-10)
    for name in SIGNS:
        est_a = np.array([r[name][0] for r in over_a])
        est_b = np.array([r[name][0] for r in over_b])
        mean = est_a.mean() + est_b.mean() - base[name][0]
        variance = est_a.var() + est_b.var()
        expected_v = (np.mean([r[name][1] for r in over_a]) + np.mean([r[name][1] for r in over_b])
                      - base[name][1])
        assert mean == pytest.approx(truth[name], abs=1e-10)
        if additive:
            assert expected_v == pytest.approx(variance, rel=1e-9)
        else:
            assert expected_v >= variance - 1e-12
            assert variance > 0


def test_blocked_factorial_equals_ols_with_block_dummies():
    # Reference: statsmodels OLS of y on the +-1 factor codes, their product and block
    # dummies; with equal blocks and equal cell shares the design is orthogonal, so each
    # blocked effect is twice the OLS coefficient (Dasgupta, Pillai & Rubin 2015).
    rng = np.random.default_rng(8)
    block = np.repeat([0, 1, 2], 12)
    arm = np.concatenate([rng.permutation(np.repeat(CELLS, 3)) for _ in range(3)])
    g_text = np.where(np.isin(arm, ["text", "both"]), 1.0, -1.0)
    g_call = np.where(np.isin(arm, ["call", "both"]), 1.0, -1.0)
    y = 0.4 * g_text - 0.3 * g_call + 0.2 * g_text * g_call + block * 1.5 + rng.normal(size=block.size)
    X = np.column_stack([g_text, g_call, g_text * g_call, block == 0, block == 1, block == 2]).astype(float)
    fit = sm.OLS(y, X).fit()
    effects = estimate_factorial(y, arm, arms=CELLS, factors=FACTORS, block=block)
    assert [e.factor for e in effects] == ["text", "call", "text:call"]
    for k, effect in enumerate(effects):
        assert effect.estimate.estimate == pytest.approx(2 * fit.params[k], rel=1e-10)
        assert effect.estimate.method == "blocked_factorial_neyman"


def test_blocked_factorial_errors():
    arm = np.tile(CELLS, 4)
    with pytest.raises(ValueError, match="`block` must be an array"):
        estimate_factorial(np.ones(16), arm, arms=CELLS, factors=FACTORS, block=np.zeros(3))
