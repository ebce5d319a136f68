"""Factorial effects of cluster designs: statsmodels OLS, a matrix-form CR2 written from Bell & McCaffrey
(2002), and exact enumeration of the cluster assignments of a fixed potential-outcome table."""

from __future__ import annotations

import itertools
import math

import numpy as np
import pytest
import statsmodels.api as sm

from report_kit.errors import DesignError, ReportKitWarning
from report_kit.estimation.factorial import estimate_factorial

CELLS = ("none", "text", "call", "both")
FACTORS = (("text", ("text", "both")), ("call", ("call", "both")))
ON = {"text": np.array([0, 1, 0, 1]), "call": np.array([0, 0, 1, 1])}
# +-1 codes of each effect per cell (Dasgupta, Pillai & Rubin 2015)
SIGNS = {"text": np.array([-1, 1, -1, 1]), "call": np.array([-1, -1, 1, 1]), "text:call": np.array([1, -1, -1, 1])}


def cluster_data(seed=3, blocks=1):
    """Invented data: per block 14 clusters of 2-7 units, 3 or 4 clusters per cell; cluster-level noise."""
    rng = np.random.default_rng(seed)
    cell_of, block_of, cluster_of, y = [], [], [], []
    for b in range(blocks):
        per_cell = (3, 4, 3, 4) if b == 0 else (4, 3, 4, 3)
        g = 0
        for c, count in enumerate(per_cell):
            for _ in range(count):
                size = int(rng.integers(2, 8))
                shock = rng.normal(scale=0.7)
                cell_of += [c] * size
                block_of += [b] * size
                cluster_of += [f"b{b}c{g:02d}"] * size
                y += list(0.5 * c + b + shock + rng.normal(size=size) * (1 + 0.3 * c))
                g += 1
    return (np.array(y), np.array(CELLS, dtype=object)[cell_of], np.array(block_of),
            np.array(cluster_of, dtype=object))


def matrix_cr(X, y, groups, L, *, adjust: bool):
    """CR2 (``adjust``) or CR0 variance of ``L' beta_OLS`` and the Bell-McCaffrey df, by the matrix formulas.

    Bell & McCaffrey (2002): ``V = sum_g (L' (X'X)^-1 X_g' A_g e_g)^2`` with ``A_g = (I - H_gg)^(-1/2)``
    (symmetric square root; CR0: ``A_g = I``); df ``tr(G'G)^2 / ||G'G||_F^2`` with the columns
    ``G_g = (I - H)_{., g} A_g X_g (X'X)^-1 L`` (working model Var(y) = sigma^2 I). Written here directly with
    numpy, independent of the estimator under test.
    """
    bread = np.linalg.inv(X.T @ X)
    H = X @ bread @ X.T
    resid = y - H @ y
    M = np.eye(y.size) - H
    total, columns = 0.0, []
    for g in np.unique(groups):
        idx = np.flatnonzero(groups == g)
        if adjust:
            vals, vecs = np.linalg.eigh(np.eye(idx.size) - H[np.ix_(idx, idx)])
            A = vecs @ np.diag(vals ** -0.5) @ vecs.T
        else:
            A = np.eye(idx.size)
        a = A @ X[idx] @ bread @ L
        total += float(a @ resid[idx]) ** 2
        columns.append(M[:, idx] @ a)
    G = np.column_stack(columns)
    GG = G.T @ G
    return total, float(np.trace(GG) ** 2 / np.sum(GG * GG))


def pm1_design(arm):
    codes = np.array([CELLS.index(a) for a in arm])
    g_text, g_call = SIGNS["text"][codes], SIGNS["call"][codes]
    return np.column_stack([np.ones(arm.size), g_text, g_call, g_text * g_call]).astype(float)


def test_cluster_factorial_against_statsmodels_and_matrix_cr2():
    y, arm, _, cluster = cluster_data()
    X = pm1_design(arm)
    # Reference 1: statsmodels OLS on the +-1 codes (saturated): each effect is twice the coefficient.
    fit = sm.OLS(y, X).fit()
    # Reference 2: CR0 analogue = statsmodels cov_type='cluster' without the small-sample correction;
    # this validates the matrix formulas below, which then give the CR2 reference.
    crude = sm.OLS(y, X).fit(cov_type="cluster", cov_kwds={"groups": np.unique(cluster, return_inverse=True)[1],
                                                          "use_correction": False})
    effects = estimate_factorial(y, arm, arms=CELLS, factors=FACTORS, cluster=cluster)
    assert [e.factor for e in effects] == ["text", "call", "text:call"]
    for k, effect in enumerate(effects, start=1):
        L = np.zeros(4)
        L[k] = 2.0
        cr0, _ = matrix_cr(X, y, cluster, L, adjust=False)
        assert cr0 == pytest.approx(4 * crude.cov_params()[k, k], rel=1e-10)
        cr2, df = matrix_cr(X, y, cluster, L, adjust=True)
        est = effect.estimate
        assert est.estimate == pytest.approx(2 * fit.params[k], rel=1e-10)
        assert est.std_error == pytest.approx(math.sqrt(cr2), rel=1e-10)
        assert est.df == pytest.approx(df, rel=1e-8)
        assert est.method == "cluster_factorial_cr2" and est.variance_rule == "cr2"
        assert cr2 > cr0   # CR2 inflates every cluster's residual (Bell & McCaffrey 2002)
        assert est.ci_low < est.estimate < est.ci_high


def test_blocked_cluster_factorial_against_interacted_regression():
    # Reference: the fully interacted (block x cell) cell-means regression, contrast
    # L_{b,c} = (n_b / n) g_S(c) / 2 on its coefficients (the block-weighted factorial effect),
    # with the matrix-form CR2 and CR0 above; CR0 checked against statsmodels cov_type='cluster'.
    y, arm, block, cluster = cluster_data(seed=8, blocks=2)
    y[[0, 7, 30]] = np.nan
    keep = ~np.isnan(y)
    codes = np.array([CELLS.index(a) for a in arm])
    X = np.zeros((y.size, 8))
    X[np.arange(y.size), block * 4 + codes] = 1.0
    share = np.bincount(block[keep]) / keep.sum()
    crude = sm.OLS(y[keep], X[keep]).fit(cov_type="cluster", cov_kwds={
        "groups": np.unique(cluster[keep], return_inverse=True)[1], "use_correction": False})
    effects = estimate_factorial(y, arm, arms=CELLS, factors=FACTORS, block=block, cluster=cluster)
    for effect in effects:
        L = np.concatenate([share[b] * SIGNS[effect.factor] / 2.0 for b in (0, 1)])
        cr0, _ = matrix_cr(X[keep], y[keep], cluster[keep], L, adjust=False)
        assert cr0 == pytest.approx(float(L @ crude.cov_params() @ L), rel=1e-10)
        cr2, df = matrix_cr(X[keep], y[keep], cluster[keep], L, adjust=True)
        est = effect.estimate
        assert est.estimate == pytest.approx(float(L @ crude.params), rel=1e-10)
        assert est.std_error == pytest.approx(math.sqrt(cr2), rel=1e-10)
        assert est.df == pytest.approx(df, rel=1e-8)
        assert est.method == "blocked_cluster_factorial_cr2"
        assert est.n_treated + est.n_control == keep.sum()


def assignments_of_clusters(n_clusters, per_cell):
    """Every assignment of clusters to the 4 cells with ``per_cell`` clusters each (written out here)."""
    out = []
    for perm in itertools.permutations(range(n_clusters)):
        cells = np.empty(n_clusters, dtype=int)
        for c in range(4):
            cells[list(perm[c * per_cell:(c + 1) * per_cell])] = c
        out.append(tuple(cells))
    return [np.array(a) for a in dict.fromkeys(out)]


def potential_outcomes(additive: bool, n_clusters=8, size=2, seed=4):
    rng = np.random.default_rng(seed)
    base = rng.normal(size=(n_clusters, size)) + rng.normal(size=(n_clusters, 1))
    table = base[:, :, None] + np.array([0.0, 0.6, 1.1, 2.4])[None, None, :]
    if not additive:
        table = table + rng.normal(scale=0.9, size=(n_clusters, 1, 4))
    return table


@pytest.mark.parametrize("additive", [False, True])
def test_cluster_factorial_by_exact_enumeration(additive):
    # Reference: exact enumeration identity. 8 clusters of 2 units, 2 clusters per cell: all
    # 8! / (2!)^4 = 2520 assignments. The estimator's mean over them equals the true factorial
    # effect of the table (unbiased with equal cluster sizes); with equal sizes CR2 is the Neyman
    # bound on cluster means, whose mean is at least the true variance, equal to it when the
    # cluster-level effects are additive (Neyman 1923; Dasgupta, Pillai & Rubin 2015).
    table = potential_outcomes(additive)
    truth = {name: float(np.mean(table.reshape(-1, 4) @ s) / 2) for name, s in SIGNS.items()}
    cluster = np.repeat([f"k{g}" for g in range(8)], 2).astype(object)
    orders = assignments_of_clusters(8, 2)
    assert len(orders) == 2520
    draws = {name: [] for name in SIGNS}
    for cells in orders:
        y = table[np.arange(8), :, cells].ravel()
        arm = np.array(CELLS, dtype=object)[np.repeat(cells, 2)]
        for e in estimate_factorial(y, arm, arms=CELLS, factors=FACTORS, cluster=cluster):
            draws[e.factor].append((e.estimate.estimate, e.estimate.std_error ** 2))
    for name, values in draws.items():
        est, var = np.array(values).T
        assert est.mean() == pytest.approx(truth[name], abs=1e-12)
        if additive:
            assert var.mean() == pytest.approx(est.var(), rel=1e-10)
        else:
            assert var.mean() > est.var()


def test_blocked_cluster_factorial_by_exact_enumeration():
    # Reference: exact enumeration identity. Two blocks of 4 clusters (sizes 2 and 3), one cluster
    # per cell in each block: 4! x 4! = 576 assignments; the mean of the block-weighted estimate is
    # the true factorial effect of the table. One cluster per cell leaves no CR2 standard error.
    rng = np.random.default_rng(6)
    sizes = np.array([2, 2, 2, 2, 3, 3, 3, 3])
    table = [rng.normal(size=(s, 1)) + np.array([0.0, 0.4, 1.3, 2.0]) + rng.normal(scale=0.5, size=(s, 4))
             for s in sizes]
    units = np.vstack(table)
    truth = {name: float(np.mean(units @ s) / 2) for name, s in SIGNS.items()}
    cluster = np.repeat([f"k{g}" for g in range(8)], sizes).astype(object)
    block = np.repeat([0, 0, 0, 0, 1, 1, 1, 1], sizes)
    means = {name: [] for name in SIGNS}
    with pytest.warns(ReportKitWarning, match="fewer than two clusters"):
        for first, second in itertools.product(itertools.permutations(range(4)), repeat=2):
            cells = np.array(first + second)
            y = np.concatenate([table[g][:, cells[g]] for g in range(8)])
            arm = np.array(CELLS, dtype=object)[np.repeat(cells, sizes)]
            for e in estimate_factorial(y, arm, arms=CELLS, factors=FACTORS, block=block, cluster=cluster):
                assert e.estimate.std_error is None
                means[e.factor].append(e.estimate.estimate)
    for name, values in means.items():
        assert len(values) == 576
        assert np.mean(values) == pytest.approx(truth[name], abs=1e-12)


def test_cluster_factorial_rejects_split_clusters():
    y, arm, block, cluster = cluster_data(seed=2, blocks=2)
    broken = cluster.copy()
    broken[arm == "text"] = "b0c00"
    with pytest.raises(DesignError, match="cluster 'b0c00' spans more than one arm"):
        estimate_factorial(y, arm, arms=CELLS, factors=FACTORS, cluster=broken)
    moved = cluster.copy()
    moved[(block == 1) & (arm == "none")] = "b0c00"
    with pytest.raises(DesignError, match="spans more than one block"):
        estimate_factorial(y, arm, arms=CELLS, factors=FACTORS, block=block, cluster=moved)
    with pytest.raises(ValueError, match="`cluster` must be an array"):
        estimate_factorial(y, arm, arms=CELLS, factors=FACTORS, cluster=cluster[:-1])
