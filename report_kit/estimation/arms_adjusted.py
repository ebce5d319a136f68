"""Lin's (2013) adjustment with all arm indicators in one regression, for blocked and cluster designs.

Owns :func:`lin_all_arms`: the covariate-adjusted contrasts of a multi-arm
trial whose arms were randomized within blocks, or by cluster, or both. One
regression on every arm's units; each contrast is the difference of two arm
coefficients, with the HC2 (or CR2) variance of that difference taken from the
full sandwich covariance. Built on the regression machinery of
:mod:`report_kit.estimation.adjustment` (absorbed block-by-arm intercepts,
dropped collinear regressors, HC2/CR2 contributions, Bell–McCaffrey df).
Formulas and sources: ``docs/methods/arms.md``. Pure numpy, no I/O.
"""

from __future__ import annotations

import numpy as np

from report_kit.errors import DesignError
from report_kit.estimation.adjustment import (
    _check_units_per_covariate,
    _covariates,
    _drop_constant,
    _layout_fits,
    _LinLayout,
    _singleton_indicators_out,
)
from report_kit.estimation.core import (BLOCKED, CLUSTERED, Estimate, _check_alpha, _groups, _labels, _to_estimate,
                                         _warn)
from report_kit.validate import mean_impute_with_indicators

__all__ = ["LIN_ARMS_MECHANISMS", "lin_all_arms"]

#: The designs whose adjusted contrasts come from :func:`lin_all_arms`.
LIN_ARMS_MECHANISMS = ("blocked", "cluster", "blocked_cluster")

#: Method names without and with clusters.
_METHODS = ("lin_arms", "lin_arms_cr2")


def lin_all_arms(y, arm, X, *, arms, pairs, mechanism: str, block=None, cluster=None,
                 alpha: float = 0.05, names=None) -> list[Estimate]:
    """Covariate-adjusted contrasts from one regression on all arm indicators (Lin 2013).

    With arm indicators ``d_ik = 1[arm_i = k]`` and covariates centred at the
    mean of all units analysed, ``xc_i = x_i - xbar``, the regression is

    ``y_i = sum_k d_ik (alpha_k + xc_i' beta_k + bc_i' gamma_k) + e_i``

    where ``bc_i`` are the block indicators (all but one block) centred at
    their means over all units analysed, so that ``alpha_k = sum_b (n_b / n)
    alpha_kb`` weights blocks by their share of all units. The block terms are
    interacted with every arm indicator when every block has at least two
    units (clusters) of every arm; otherwise they enter additively,
    ``y_i = sum_k d_ik (alpha_k + xc_i' beta_k) + block_b(i) + e_i``, and the
    contrast weights blocks by precision. The contrast ``a`` vs ``r`` is
    ``alpha_a - alpha_r``; its variance is ``c' V c`` with ``V`` the HC2
    sandwich (MacKinnon & White 1985), or the CR2 sandwich clustered by
    cluster (Bell & McCaffrey 2002) for cluster designs, ``c`` the contrast
    vector. Degrees of freedom as for two arms: ``n - p`` (HC2, ``p`` the
    coefficients), the Bell–McCaffrey df of the contrast (CR2). With two arms
    this is :func:`~report_kit.estimation.adjustment.estimate_adjusted`.

    Parameters
    ----------
    y : array_like, shape (n,)
        Outcome; units with NaN are dropped.
    arm : array_like, shape (n,)
        Arm label of each unit (every label in ``arms``).
    X : array_like, shape (n,) or (n, p)
        Baseline covariates. Missing values among the units analysed are
        mean-imputed with missingness indicators (as for two arms).
    arms : sequence of str
        The arm labels, reference first (the order of the regression's columns).
    pairs : sequence of (str, str)
        The contrasts ``(a, r)``.
    mechanism : {'blocked', 'cluster', 'blocked_cluster'}
    block, cluster : array_like, optional
        One label per unit, as the mechanism needs.
    alpha : float
    names : sequence of str, optional
        Covariate names for messages.

    Returns
    -------
    list of Estimate
        One per pair, in order; ``n_treated``/``n_control`` count the units of
        ``a``/``r`` analysed, ``method`` is ``lin_arms`` (HC2) or
        ``lin_arms_cr2``.

    Raises
    ------
    DesignError
        Too few units (clusters) of an arm for the covariates (``k + 2`` per
        arm), a unit with leverage 1, or contrasts not identified.
    """
    arms = [str(a) for a in arms]
    codes, y, X, block, cluster = _validate(y, arm, X, arms, mechanism, block, cluster, alpha)
    pairs = _pair_positions(pairs, arms)
    n_arms = len(arms)
    names = tuple(names) if names is not None else tuple(f"x{j + 1}" for j in range(X.shape[1]))
    if len(names) != X.shape[1]:
        raise ValueError(f"`names` must have one entry per covariate ({X.shape[1]}); got {len(names)}")
    keep = ~np.isnan(y)
    missing_by_arm = np.bincount(codes[~keep], minlength=n_arms)
    y, codes, X = y[keep], codes[keep], X[keep]
    block = None if block is None else block[keep]
    cluster = None if cluster is None else cluster[keep]
    members = tuple(codes == k for k in range(n_arms))
    if np.isnan(X).any():
        n_values = X.shape[1] - int(np.isnan(X).all(axis=0).sum())
        X = _singleton_indicators_out(mean_impute_with_indicators(X, names, user="the adjustment"),
                                      n_values, members)
    _check_units_per_covariate(X, tuple((m, repr(a)) for m, a in zip(members, arms)), cluster)
    layout = _arm_layout(codes, n_arms, pairs, block, cluster, _drop_constant(X))
    counts = tuple((int(members[a].sum()), int(members[r].sum())) for a, r in pairs)
    fits = _layout_fits(y, layout, cluster=cluster, pos=np.flatnonzero(keep), counts=counts, methods=_METHODS)
    return [_to_estimate(fit, alpha, estimand="ATE", estimator="adjusted",
                         n_missing=int(missing_by_arm[a] + missing_by_arm[r]))
            for fit, (a, r) in zip(fits, pairs)]


def _validate(y, arm, X, arms, mechanism, block, cluster, alpha):
    if mechanism not in LIN_ARMS_MECHANISMS:
        raise ValueError(f"`mechanism` must be one of {set(LIN_ARMS_MECHANISMS)}; got {mechanism!r}")
    _check_alpha(alpha)
    if len(arms) < 2 or len(set(arms)) != len(arms):
        raise ValueError(f"`arms` must list at least two distinct arm labels; got {arms}")
    if isinstance(arm, (str, bytes)) or not hasattr(arm, "__len__"):
        raise TypeError(f"`arm` must be an array of arm labels; got {type(arm).__name__}")
    position = {a: k for k, a in enumerate(arms)}
    labels = [str(a) for a in arm]
    unknown = sorted(set(labels) - set(arms))
    if unknown:
        raise ValueError(f"`arm` holds label(s) not in `arms` {arms}: {unknown[:5]}")
    codes = np.array([position[a] for a in labels], dtype=np.int64)
    n = codes.size
    y = np.asarray(y, dtype=float)
    if y.shape != (n,):
        raise ValueError(f"`y` must have one value per unit ({n}); got shape {y.shape}")
    block_codes = _labels(block, "block", mechanism, BLOCKED, n)
    cluster_codes = _labels(cluster, "cluster", mechanism, CLUSTERED, n)
    if cluster_codes is not None:
        _check_clusters(codes, cluster_codes, block_codes, cluster)
    return codes, y, _covariates(X, n), block_codes, cluster_codes


def _pair_positions(pairs, arms) -> list[tuple[int, int]]:
    position = {a: k for k, a in enumerate(arms)}
    out = []
    for pair in pairs:
        a, r = (str(v) for v in pair)
        if a not in position or r not in position or a == r:
            raise ValueError(f"`pairs` must hold two different labels of `arms` {arms}; got {tuple(pair)}")
        out.append((position[a], position[r]))
    return out


def _check_clusters(codes, cluster_codes, block_codes, labels) -> None:
    labels = np.asarray(labels, dtype=object)
    for _, m in _groups(cluster_codes):
        if np.unique(codes[m]).size > 1:
            raise DesignError(f"cluster {labels[m[0]]!r} has units of more than one arm; the arm must "
                              "be constant within a cluster")
        if block_codes is not None and np.unique(block_codes[m]).size > 1:
            raise DesignError(f"cluster {labels[m[0]]!r} spans several blocks; each cluster must lie "
                              "within one block")


def _arm_layout(codes, n_arms, pairs, block, cluster, xc) -> _LinLayout:
    """Block-by-arm cells when every block has >= 2 units (clusters) of every arm, else additive blocks."""
    n = codes.size
    D = np.eye(n_arms)[codes]
    blk = np.zeros(n, dtype=np.int64) if block is None else block
    if _cells_splittable(codes, n_arms, blk, cluster):
        cell_codes, cells = np.unique(blk * n_arms + codes, return_inverse=True)
        labels, counts = np.unique(blk, return_counts=True)
        share = counts[np.searchsorted(labels, cell_codes // n_arms)] / n
        cell_arm = cell_codes % n_arms
        W = np.column_stack([D[:, [k]] * xc for k in range(n_arms)])
        targets = tuple((np.where(cell_arm == a, share, 0.0) - np.where(cell_arm == r, share, 0.0),
                         np.zeros(W.shape[1])) for a, r in pairs)
        return _LinLayout(groups=cells, W=W, targets=targets)
    _, blocks = np.unique(blk, return_inverse=True)
    shares = np.stack([np.bincount(blocks, weights=D[:, k]) for k in range(n_arms)]) / np.bincount(blocks)
    if np.ptp(shares, axis=1).max() > 1e-12:
        _warn("some blocks have fewer than two units (clusters) of an arm, so block indicators enter "
              "additively; as the arms' shares vary across blocks, the adjusted contrasts weight blocks "
              "by precision rather than size")
    others = D[:, 1:]
    W = np.column_stack([others, xc] + [others[:, [k]] * xc for k in range(n_arms - 1)])
    targets = []
    for a, r in pairs:
        c_w = np.zeros(W.shape[1])
        if a > 0:
            c_w[a - 1] += 1.0
        if r > 0:
            c_w[r - 1] -= 1.0
        targets.append((np.zeros(int(blocks.max()) + 1), c_w))
    return _LinLayout(groups=blocks, W=W, targets=tuple(targets), required=n_arms - 1)


def _cells_splittable(codes, n_arms, block, cluster) -> bool:
    for _, m in _groups(block):
        for k in range(n_arms):
            inside = m[codes[m] == k]
            units = inside if cluster is None else cluster[inside]
            if np.unique(units).size < 2:
                return False
    return True
