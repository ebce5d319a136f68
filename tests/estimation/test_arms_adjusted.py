"""Lin's adjustment with all arm indicators for blocked and cluster multi-arm designs.

Outside references: statsmodels OLS (HC2, and the cluster-robust CR0/CR1 covariance), an
independent matrix-form CR2 written out below from Bell & McCaffrey (2002), pandas group
means, and the two-arm estimator (identity with two arms).
"""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm

from report_kit.errors import DesignError, ReportKitWarning
from report_kit.estimation.adjustment import estimate_adjusted
from report_kit.estimation.arms import contrast_pairs, estimate_contrasts_adjusted
from report_kit.estimation.arms_adjusted import lin_all_arms

ARMS = ("usual", "short", "long")
PAIRS = contrast_pairs(ARMS, "pairwise")


def blocked_data(seed=4, sizes=(12, 15, 9), lone_arm_block=None):
    """Invented blocked 3-arm data; every block holds every arm (>= 2 units each) unless
    ``lone_arm_block`` names a block where arm "long" gets a single unit."""
    rng = np.random.default_rng(seed)
    block, arm = [], []
    for b, size in zip("pqr", sizes):
        labels = [ARMS[i % 3] for i in range(size)]
        if b == lone_arm_block:
            labels = ["long"] + [ARMS[i % 2] for i in range(size - 1)]
        block += [b] * size
        arm += list(rng.permutation(labels))
    block, arm = np.array(block), np.array(arm, dtype=object)
    n = arm.size
    X = rng.normal(size=(n, 2))
    shift = {"usual": 0.0, "short": 0.6, "long": 1.4}
    y = (np.array([shift[a] for a in arm]) + X @ [0.9, -0.4] + (block == "q") * 2.0
         + (arm == "long") * X[:, 0] * 0.7 + rng.normal(scale=np.where(arm == "short", 1.8, 1.0)))
    return y, arm, X, block


def dummies(values, levels):
    return np.column_stack([(values == v).astype(float) for v in levels])


def interacted_design(arm, X, block):
    """All arm indicators, arm x centred covariates, arm x centred block indicators (all but one)."""
    D = dummies(arm, ARMS)
    xc = X - X.mean(axis=0)
    cols = [D] + [D[:, [k]] * xc for k in range(3)]
    if block is not None:
        B = dummies(block, sorted(set(block)))[:, 1:]
        Bc = B - B.mean(axis=0)
        cols += [D[:, [k]] * Bc for k in range(3)]
    return np.column_stack(cols)


def contrast_vector(a, r, width):
    c = np.zeros(width)
    c[ARMS.index(a)], c[ARMS.index(r)] = 1.0, -1.0
    return c


def quiet(fn, *args, **kw):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ReportKitWarning)
        return fn(*args, **kw)


def test_blocked_interacted_equals_statsmodels_hc2():
    # Reference: statsmodels OLS with the full design matrix (Lin 2013 with all arms and
    # centred block indicators interacted with every arm), cov_type HC2; the contrast and
    # its SE from t_test on the full covariance matrix.
    y, arm, X, block = blocked_data()
    Z = interacted_design(arm, X, block)
    fit = sm.OLS(y, Z).fit(cov_type="HC2")
    rows = estimate_contrasts_adjusted(y, arm, X, arms=ARMS, contrasts="pairwise", mechanism="blocked",
                                       block=block)
    assert [(r.arm, r.reference) for r in rows] == PAIRS
    for row in rows:
        test = fit.t_test(contrast_vector(row.arm, row.reference, Z.shape[1]))
        assert row.estimate.estimate == pytest.approx(float(test.effect[0]), rel=1e-10)
        assert row.estimate.std_error == pytest.approx(float(test.sd[0, 0]), rel=1e-9)
        assert row.estimate.df == y.size - Z.shape[1]
        assert row.estimate.method == "lin_arms" and row.estimate.variance_rule == "hc2"
        assert row.estimate.n_treated == int((arm == row.arm).sum())


def test_blocked_additive_equals_statsmodels_hc2():
    # Reference: statsmodels OLS on all arm indicators, additive block dummies (all but one)
    # and arm x centred covariates, cov_type HC2. A block with one unit of an arm cannot
    # carry block-by-arm terms, so the blocks enter additively (as for two arms).
    y, arm, X, block = blocked_data(seed=9, lone_arm_block="p")
    D = dummies(arm, ARMS)
    xc = X - X.mean(axis=0)
    Z = np.column_stack([D, dummies(block, ["q", "r"])] + [D[:, [k]] * xc for k in range(3)])
    fit = sm.OLS(y, Z).fit(cov_type="HC2")
    with pytest.warns(ReportKitWarning, match="enter additively"):
        rows = estimate_contrasts_adjusted(y, arm, X, arms=ARMS, contrasts="pairwise", mechanism="blocked",
                                           block=block)
    for row in rows:
        test = fit.t_test(contrast_vector(row.arm, row.reference, Z.shape[1]))
        assert row.estimate.estimate == pytest.approx(float(test.effect[0]), rel=1e-10)
        assert row.estimate.std_error == pytest.approx(float(test.sd[0, 0]), rel=1e-9)
        assert row.estimate.df == y.size - Z.shape[1]


def test_blocked_without_covariate_information_is_block_share_weighted():
    # Reference: pandas group means. With a covariate constant within the units (dropped),
    # the interacted regression's contrast is sum_b (n_b / n) (ybar_ab - ybar_rb) with n_b the
    # block's units in ALL arms (the centring of the block indicators at all units). The arm
    # shares differ between blocks, so these weights differ from the two arms' own block sizes.
    y, arm, _, block = blocked_data(seed=2, sizes=(13, 17, 10))
    frame = pd.DataFrame({"y": y, "arm": arm, "block": block})
    means = frame.groupby(["block", "arm"])["y"].mean()
    weights = frame.groupby("block").size() / len(frame)
    rows = quiet(estimate_contrasts_adjusted, y, arm, np.ones(y.size), arms=ARMS, contrasts="pairwise",
                 mechanism="blocked", block=block)
    for row in rows:
        expected = sum(weights[b] * (means[(b, row.arm)] - means[(b, row.reference)]) for b in weights.index)
        assert row.estimate.estimate == pytest.approx(expected, rel=1e-12)


def cr2_reference(y, Z, cluster, c):
    """Matrix-form CR2 (Bell & McCaffrey 2002) of the contrast c' beta, and its df.

    V = (Z'Z)^-1 [sum_g Z_g' A_g e_g e_g' A_g Z_g] (Z'Z)^-1 with A_g = (I - H_gg)^(-1/2);
    df = tr(G'G)^2 / ||G'G||_F^2 with column g of G equal to (I - H)[:, g] A_g Z_g (Z'Z)^-1 c
    (Bell & McCaffrey 2002, Section 3; Imbens & Kolesar 2016, Section 4). ``adjust=False``
    in :func:`sandwich` gives the CR0 version checked against statsmodels.
    """
    bread = np.linalg.inv(Z.T @ Z)
    H = Z @ bread @ Z.T
    M = np.eye(y.size) - H
    e = M @ y
    meat = np.zeros((Z.shape[1], Z.shape[1]))
    G = []
    for g in np.unique(cluster):
        idx = np.flatnonzero(cluster == g)
        vals, vecs = np.linalg.eigh(np.eye(idx.size) - H[np.ix_(idx, idx)])
        A = vecs @ np.diag(1.0 / np.sqrt(vals)) @ vecs.T
        u = Z[idx].T @ A @ e[idx]
        meat += np.outer(u, u)
        G.append(M[:, idx] @ A @ Z[idx] @ bread @ c)
    V = bread @ meat @ bread
    G = np.column_stack(G)
    gtg = G.T @ G
    return float(c @ bread @ Z.T @ y), float(np.sqrt(c @ V @ c)), float(np.trace(gtg) ** 2 / np.sum(gtg ** 2))


def sandwich_cr0(y, Z, cluster):
    bread = np.linalg.inv(Z.T @ Z)
    e = y - Z @ (bread @ Z.T @ y)
    meat = sum(np.outer(Z[cluster == g].T @ e[cluster == g], Z[cluster == g].T @ e[cluster == g])
               for g in np.unique(cluster))
    return bread @ meat @ bread


def cluster_data(seed=6, blocks=False):
    """Invented 3-arm cluster data: 18 clusters of 2-5 units, 6 per arm (3 per arm per block)."""
    rng = np.random.default_rng(seed)
    sizes = rng.integers(2, 6, size=18)
    cluster_arm = np.array(ARMS * 6, dtype=object)
    cluster_block = np.repeat(["east", "west"], 9)
    cluster_arm = np.concatenate([rng.permutation(cluster_arm[:9]), rng.permutation(cluster_arm[9:])])
    cluster = np.repeat([f"c{j:02d}" for j in range(18)], sizes)
    arm = np.repeat(cluster_arm, sizes)
    block = np.repeat(cluster_block, sizes)
    X = rng.normal(size=(cluster.size, 1))
    effect = np.repeat(rng.normal(scale=0.7, size=18), sizes)
    y = X[:, 0] + (arm == "long") * 1.0 + (block == "west") * 0.8 + effect + rng.normal(size=cluster.size)
    return y, arm, X, cluster, (block if blocks else None)


def test_reference_sandwich_matches_statsmodels_cluster_covariance():
    # Check of the test's own matrix sandwich: without the CR2 adjustment it is statsmodels'
    # cluster-robust covariance (cov_type="cluster"), CR0 without and CR1 with its
    # G/(G-1) (n-1)/(n-k) small-sample factor.
    y, arm, X, cluster, _ = cluster_data()
    Z = interacted_design(arm, X, None)
    codes = pd.factorize(cluster)[0]
    cr0 = sandwich_cr0(y, Z, cluster)
    plain = sm.OLS(y, Z).fit(cov_type="cluster", cov_kwds={"groups": codes, "use_correction": False})
    np.testing.assert_allclose(plain.cov_params(), cr0, rtol=1e-9, atol=1e-14)
    corrected = sm.OLS(y, Z).fit(cov_type="cluster", cov_kwds={"groups": codes})
    G, n, k = 18, y.size, Z.shape[1]
    np.testing.assert_allclose(corrected.cov_params(), cr0 * G / (G - 1) * (n - 1) / (n - k), rtol=1e-9,
                               atol=1e-14)


@pytest.mark.parametrize("mechanism", ["cluster", "blocked_cluster"])
def test_cluster_contrasts_equal_matrix_cr2(mechanism):
    # Reference: the matrix-form CR2 and Bell-McCaffrey df above (Bell & McCaffrey 2002), on
    # the full design matrix; the estimate also equals statsmodels' OLS contrast.
    y, arm, X, cluster, block = cluster_data(blocks=mechanism == "blocked_cluster")
    Z = interacted_design(arm, X, block)
    fit = sm.OLS(y, Z).fit()
    rows = quiet(estimate_contrasts_adjusted, y, arm, X, arms=ARMS, contrasts="pairwise", mechanism=mechanism,
                 block=block, cluster=cluster)
    for row in rows:
        c = contrast_vector(row.arm, row.reference, Z.shape[1])
        est, se, df = cr2_reference(y, Z, cluster, c)
        assert row.estimate.estimate == pytest.approx(float(c @ fit.params), rel=1e-10)
        assert row.estimate.estimate == pytest.approx(est, rel=1e-10)
        assert row.estimate.std_error == pytest.approx(se, rel=1e-8)
        assert row.estimate.df == pytest.approx(df, rel=1e-8)
        assert row.estimate.method == "lin_arms_cr2" and row.estimate.variance_rule == "cr2"


@pytest.mark.parametrize("mechanism", ["blocked", "cluster", "blocked_cluster"])
@pytest.mark.parametrize("with_missing", [False, True])
def test_two_arms_equal_the_two_arm_lin_estimator(mechanism, with_missing):
    # Identity: with two arms the all-arms regression is the two-arm Lin regression
    # (estimate_adjusted), including missing outcomes and mean-imputed covariates.
    y, arm, X, cluster, block = cluster_data(seed=12, blocks=True)
    keep = arm != "short"
    y, arm, X, cluster, block = y[keep], arm[keep], X[keep], cluster[keep], block[keep]
    X = np.column_stack([X, np.random.default_rng(1).normal(size=y.size)])
    if with_missing:
        y[[0, 7]] = np.nan
        X[[3, 4, 20], 1] = np.nan
    kw = {"block": block if "blocked" in mechanism else None,
          "cluster": cluster if "cluster" in mechanism else None}
    z = (arm == "long").astype(int)
    expected = quiet(estimate_adjusted, y, z, X, mechanism=mechanism, **kw)
    (got,) = quiet(lin_all_arms, y, arm, X, arms=["usual", "long"], pairs=[("long", "usual")],
                   mechanism=mechanism, **kw)
    for field in ("estimate", "std_error", "ci_low", "ci_high", "df"):
        assert getattr(got, field) == pytest.approx(getattr(expected, field), rel=1e-9), field
    assert (got.n_treated, got.n_control, got.n_missing) == (expected.n_treated, expected.n_control,
                                                             expected.n_missing)
    assert got.variance_rule == expected.variance_rule


def test_too_few_units_of_an_arm_names_the_arm():
    y, arm, X, block = blocked_data()
    y = y.copy()
    y[arm == "short"] = np.nan
    y[np.flatnonzero(arm == "short")[:3]] = 1.0
    with pytest.raises(DesignError, match="the 'short' arm has 3 units"):
        quiet(estimate_contrasts_adjusted, y, arm, X, arms=ARMS, mechanism="blocked", block=block)


def test_validation_errors():
    y, arm, X, block = blocked_data()
    with pytest.raises(ValueError, match="`mechanism` must be one of"):
        lin_all_arms(y, arm, X, arms=ARMS, pairs=PAIRS, mechanism="complete")
    with pytest.raises(ValueError, match="not in `arms`"):
        lin_all_arms(y, arm, X, arms=ARMS[:2], pairs=PAIRS[:1], mechanism="blocked", block=block)
    with pytest.raises(ValueError, match="`pairs` must hold"):
        lin_all_arms(y, arm, X, arms=ARMS, pairs=[("short", "short")], mechanism="blocked", block=block)
    with pytest.raises(TypeError, match="`arm` must be an array"):
        lin_all_arms(y, "usual", X, arms=ARMS, pairs=PAIRS, mechanism="blocked", block=block)
    y2, arm2, X2, cluster, _ = cluster_data()
    arm2 = arm2.copy()
    arm2[0] = "long" if arm2[0] != "long" else "usual"
    with pytest.raises(DesignError, match="more than one arm"):
        lin_all_arms(y2, arm2, X2, arms=ARMS, pairs=PAIRS, mechanism="cluster", cluster=cluster)
