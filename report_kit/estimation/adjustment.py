"""Covariate-adjusted average effects: Lin's (2013) interacted regression.

Owns :func:`estimate_adjusted` and its regression machinery: absorbed block
(or block-by-arm) intercepts, dropping constant and collinear regressors, and
the HC2 / CR2 variance contributions of the effect. Built on
:mod:`report_kit.estimation.core`; also importable from
:mod:`report_kit.estimation.neyman`. Formulas and citations:
``docs/methods/estimation.md``.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import linalg

from report_kit.estimation.core import (
    _CLUSTER,
    _UNIT,
    Estimate,
    _Fit,
    _groups,
    _keys,
    _sample,
    _Sample,
    _bm_df,
    _bm_terms,
    _to_estimate,
    _undefined_fit,
    _validate,
    _warn,
)
from report_kit.errors import DataError, DesignError
from report_kit.validate import mean_impute_with_indicators

__all__ = ["MISSING_COVARIATES", "estimate_adjusted"]

#: Above this many regressor cells (units x dense regressors; 2,000,000 is 16 MB of
#: float64) the HC2 fit runs over row blocks of ``_BLOCK_ROWS`` units
#: (:func:`_blockwise_hc2_fits`), so that it never holds n x q temporaries; at or below it the whole-matrix fit
#: keeps its results to the last bit. Cluster designs (CR2) always use the whole matrix.
_BLOCKWISE_CELLS = 2_000_000
_BLOCK_ROWS = 65_536


# ---------------------------------------------------------------------------
# Public: covariate adjustment (Lin 2013)
# ---------------------------------------------------------------------------


#: Ways to handle missing baseline covariates in the adjustment.
MISSING_COVARIATES = ("mean_indicator", "refuse")


def estimate_adjusted(y, z, X, *, mechanism: str, block=None, cluster=None,
                      alpha: float = 0.05, missing_covariates: str = "mean_indicator",
                      names=None) -> Estimate:
    """Covariate-adjusted ATE: Lin's (2013) interacted regression.

    OLS of ``y`` on ``1, z, Xc, z * Xc`` where ``Xc`` are the covariates centred
    at their mean over the units used; the coefficient on ``z`` is the estimate.
    Standard error: HC2 (MacKinnon & White 1985), or CR2 (Bell & McCaffrey 2002)
    for cluster designs. Blocked designs add block indicators: centred and
    interacted with ``z`` when every block has at least two units (clusters) in
    each arm — so with no covariates the estimate equals the blocked difference
    in means — otherwise as additive fixed effects.

    Degrees of freedom: ``n - p`` (p regressors) without clusters; for CR2 the
    Bell & McCaffrey (2002) df of the effect contrast (Imbens & Kolesár 2016),
    ``tr(G'G)^2 / ||G'G||_F^2`` as in ``docs/methods/estimation.md``.

    Rows with a missing outcome are dropped. Missing covariate values among the
    kept rows: with ``missing_covariates="mean_indicator"`` (default) they are
    filled with the covariate's mean over the kept rows and a missingness
    indicator is added, the same rule as the balance check
    (:func:`report_kit.validate.mean_impute_with_indicators`); with ``"refuse"``
    they raise :class:`DesignError`. ``names`` (optional) label the covariates
    in messages. Covariates constant among the kept rows, and regressors that
    are linear combinations of others (or of the block indicators), are dropped
    with a warning; that leaves the fitted values unchanged.

    Too few units for the covariates: with ``k`` covariate columns (after
    imputation and dropping constant ones), each arm must have at least
    ``k + 2`` units (clusters in cluster designs) — an intercept and ``k``
    slopes per arm plus one residual degree of freedom — otherwise
    :class:`DesignError`; so does a unit with leverage 1 in the HC2 variance,
    whose residual is zero by construction and would shrink the standard error.
    """
    y, design = _validate(y, z, mechanism, block, cluster, alpha)
    if missing_covariates not in MISSING_COVARIATES:
        raise ValueError(f"`missing_covariates` must be one of {MISSING_COVARIATES}; "
                         f"got {missing_covariates!r}")
    X = _covariates(X, design.n)
    names = tuple(names) if names is not None else tuple(f"x{j + 1}" for j in range(X.shape[1]))
    if len(names) != X.shape[1]:
        raise ValueError(f"`names` must have one entry per covariate ({X.shape[1]}); got {len(names)}")
    s = _sample(design, y, np.ones(design.n, dtype=bool))
    Xs = X[s.pos]
    missing = np.isnan(Xs).any(axis=1)
    if missing.any():
        if missing_covariates == "refuse":
            bad = [n for n, m in zip(names, np.isnan(Xs).any(axis=0)) if m]
            raise DesignError(f"covariate(s) {bad} have missing values in {int(missing.sum())} of "
                              f"the {s.pos.size} units with an observed outcome; impute or drop "
                              "them before adjustment")
        Xs = _singleton_indicators_out(mean_impute_with_indicators(Xs, names, user="the adjustment"),
                                       Xs.shape[1] - int(np.isnan(Xs).all(axis=0).sum()), (s.z, ~s.z))
    _check_units_per_covariate(Xs, ((s.z, "treated"), (~s.z, "control")), s.cluster)
    fit = _lin_fit(s, Xs)   # Xs is a copy (fancy indexing); the fit centres it in place
    return _to_estimate(fit, design.alpha, estimand="ATE", estimator="adjusted",
                        n_missing=s.n_missing)


def _singleton_indicators_out(X: np.ndarray, n_values: int, arms) -> np.ndarray:
    """Drop missingness indicators that flag exactly one unit of an arm.

    ``arms`` holds one boolean membership mask per arm. In the interacted
    regression such an indicator fits that unit exactly (leverage 1); the
    imputed mean stays in its covariate column.
    """
    keep = np.ones(X.shape[1], dtype=bool)
    for j in range(n_values, X.shape[1]):
        flagged = X[:, j] > 0
        if any(int((flagged & member).sum()) == 1 for member in arms):
            keep[j] = False
    if not keep.all():
        _warn(f"{int((~keep).sum())} missingness indicator(s) flag a single unit of an arm and are "
              "left out of the adjustment (the mean imputation stays)")
    return X[:, keep]


def _check_units_per_covariate(X: np.ndarray, arms, cluster: np.ndarray | None) -> None:
    """``k + 2`` units (clusters) in each arm; ``arms`` holds ``(mask, label)`` pairs."""
    k = int(np.sum(np.ptp(X, axis=0) > 0)) if X.size else 0
    kind = "units" if cluster is None else "clusters"
    for arm, label in arms:
        count = int(arm.sum()) if cluster is None else int(np.unique(cluster[arm]).size)
        if count < k + 2:
            raise DesignError(f"the {label} arm has {count} {kind} with an observed outcome, fewer "
                              f"than the {k + 2} needed to adjust for {k} covariate column(s) "
                              "(k + 2 per arm)")


def _covariates(X, n: int) -> np.ndarray:
    try:
        arr = np.asarray(X, dtype=float)
    except (TypeError, ValueError) as err:
        raise DataError(f"`X` must be numeric; {err}") from err
    if arr.ndim == 1:
        arr = arr[:, None]
    if arr.ndim != 2 or arr.shape[0] != n:
        raise ValueError(f"`X` must have shape (n, k) with n = {n}; got shape {arr.shape}")
    return arr


@dataclass(frozen=True, kw_only=True)
class _Regressors:
    """Lin's dense regressors, built on demand for a slice of rows (``[:]`` for all).

    Interacted: ``[z xc, (1 - z) xc]``; additive: ``[z, xc, z xc]``. Holding
    ``z`` and ``xc`` instead of the matrix keeps a large fit from storing all
    ``n x q`` regressors; ``W[:]`` equals the matrix built in one go.
    """

    z: np.ndarray                # bool, (n,)
    xc: np.ndarray               # centred covariates, (n, k)
    interacted: bool

    @property
    def shape(self) -> tuple[int, int]:
        k = self.xc.shape[1]
        return self.z.size, (2 * k if self.interacted else 2 * k + 1)

    def __getitem__(self, rows: slice) -> np.ndarray:
        zf = self.z[rows].astype(float)[:, None]
        x = self.xc[rows]
        if self.interacted:
            return np.column_stack([zf * x, (1.0 - zf) * x])
        return np.column_stack([zf, x, zf * x])


@dataclass(frozen=True, kw_only=True)
class _LinLayout:
    """Lin's regression as absorbed groups plus a few dense regressors.

    Fitted model: ``y = alpha_{group} + W beta``; each target is
    ``theta = sum_g c_g alpha_g + c_W' beta`` with ``(c_groups, c_w)`` one
    entry of ``targets`` (one for the two-arm effect, one per contrast with
    several arms).
    """

    groups: np.ndarray           # int codes 0..G-1, one per unit
    W: np.ndarray | _Regressors  # (n, q) dense regressors (``W[rows]`` gives a row block)
    targets: tuple[tuple[np.ndarray, np.ndarray], ...]   # (c_groups (G,), c_w (q,)) per target
    required: int = 0            # leading columns of W that must stay (the treatment indicators)


def _lin_fit(s: _Sample, X: np.ndarray) -> _Fit:
    """Lin (2013) regression with HC2/CR2 contributions for the effect.

    The regression ``y ~ 1 + z + Xc + z Xc (+ block terms)`` is fitted in an
    equivalent form with absorbed group intercepts (Frisch–Waugh–Lovell):
    interacted designs absorb block-by-arm cells and keep arm-specific slopes
    ``z Xc, (1 - z) Xc``, and the effect is ``sum_b w_b (alpha_1b - alpha_0b)``
    (``w_b = n_b / n``), which equals the coefficient on ``z`` of the centred,
    interacted parametrisation; additive designs absorb blocks and keep
    ``z, Xc, z Xc``, and the effect is the coefficient on ``z``. Writing the
    effect as ``sum_i r_i y_i`` and the hat matrix as
    ``H = P_groups + W~ (W~'W~)^{-1} W~'`` (W~ demeaned within groups):

    HC2: ``c_i = r_i e_i / sqrt(1 - h_ii)`` (MacKinnon & White 1985).
    CR2: ``c_g = r_g' (I - H_gg)^{-1/2} e_g`` (Bell & McCaffrey 2002), with a
    generalised inverse square root where ``I - H_gg`` is singular
    (Pustejovsky & Tipton 2018). Clusters never straddle absorbed groups
    (a cluster lies in one block and one arm), so
    ``H_gg = J / n_group + W~_g (W~'W~)^{-1} W~_g'``.
    """
    if not s.z.any() or s.z.all():
        return _undefined_fit("lin_cr2" if s.cluster is not None else "lin_hc2", s)
    # X is the caller's copy; a design large enough for the block-wise fit centres it in place
    layout = _lin_layout(s, _drop_constant(X, in_place=2 * X.size > _BLOCKWISE_CELLS))
    (fit,) = _layout_fits(s.y, layout, cluster=s.cluster, pos=s.pos,
                          counts=((int(s.z.sum()), int((~s.z).sum())),),
                          methods=("lin_hc2", "lin_cr2"))
    return fit


def _layout_fits(y: np.ndarray, layout: _LinLayout, *, cluster: np.ndarray | None, pos: np.ndarray,
                 counts, methods: tuple[str, str]) -> list[_Fit]:
    """Fit the regression of ``layout`` once; one :class:`_Fit` per target.

    Each target ``theta = r' y`` gets its own HC2 (or CR2) contributions from
    the same hat matrix and residuals, so its variance is ``c' V c`` of the
    full sandwich covariance ``V`` (not a sum of separate pieces). ``counts``
    holds ``(n_treated, n_control)`` per target, ``methods`` the method names
    without and with clusters.
    """
    n = y.size
    if cluster is None and n * layout.W.shape[1] > _BLOCKWISE_CELLS:
        return _blockwise_hc2_fits(y, layout, pos=pos, counts=counts, method=methods[0])
    W = layout.W[:]
    sizes = np.bincount(layout.groups).astype(float)
    w_mean = _group_means(W, layout.groups, sizes)
    kept = _independent_columns(W, W - w_mean[layout.groups], layout.required)
    w_mean = w_mean[:, kept]
    w_dm = W[:, kept] - w_mean[layout.groups]
    del W
    n_par = sizes.size + kept.size
    _check_parameters(n, n_par)
    y_mean = _group_means(y[:, None], layout.groups, sizes)[:, 0]
    qmat, r_mat = np.linalg.qr(w_dm)
    r_inv = linalg.solve_triangular(r_mat, np.eye(kept.size))
    beta = r_inv @ (qmat.T @ y)
    resid = y - y_mean[layout.groups] - w_dm @ beta
    group_share = 1.0 / sizes[layout.groups]
    lev = None if cluster is not None else group_share + np.sum(qmat ** 2, axis=1)
    fits = []
    for (c_groups, c_w), (n_treated, n_control) in zip(layout.targets, counts):
        v = c_w[kept] - c_groups @ w_mean
        estimate = float(c_groups @ y_mean + v @ beta)
        r = c_groups[layout.groups] / sizes[layout.groups] + qmat @ (r_inv.T @ v)
        if cluster is None:
            contrib, keys = _hc2_contributions(lev, r, resid, pos)
            df, method, rule = float(n - n_par), methods[0], "hc2"
        else:
            contrib, keys, df = _cr2_contributions(qmat, group_share, r, resid, cluster,
                                                   layout.groups)
            method, rule = methods[1], "cr2"
        if df < 1:
            _warn(f"the adjusted estimate has {df:g} degrees of freedom; no interval is reported")
        fits.append(_Fit(estimate=estimate, contrib=contrib, keys=keys,
                         components=((float(np.sum(contrib ** 2)), df),),
                         n_treated=n_treated, n_control=n_control,
                         method=method, variance_rule=rule, se_ok=True))
    return fits


def _blockwise_hc2_fits(y: np.ndarray, layout: _LinLayout, *, pos: np.ndarray, counts,
                        method: str) -> list[_Fit]:
    """:func:`_layout_fits` without clusters, over row blocks: no n x q temporaries.

    The same regression and HC2 contributions in three passes over blocks of
    ``_BLOCK_ROWS`` rows: (1) group means of ``W`` and ``y``; (2) the R factor
    of the demeaned ``[W~ y~]`` by a tall-skinny QR (TSQR: the R of the
    stacked ``[R_previous; block]``, Demmel et al. 2012), whose last column
    holds ``Q'y``, so the coefficients come from triangular solves as in a
    whole-matrix QR; the regressors kept (:func:`_independent_columns`) are
    chosen on R, which has the columns' inner products of W~; (3) per block,
    ``Q = W~ R^-1``, leverages ``h_i = 1/n_group + ||q_i||^2``, residuals and
    contributions, written into one n-vector per target.
    """
    n, q = y.size, layout.W.shape[1]
    groups = layout.groups
    sizes = np.bincount(groups).astype(float)
    w_mean, y_mean, raw_norm = _blockwise_means(y, layout.W, groups, sizes)
    r_aug = np.zeros((0, q + 1))
    for rows in _row_blocks(n):
        g = groups[rows]
        block = np.empty((g.size, q + 1))
        np.subtract(layout.W[rows], w_mean[g], out=block[:, :q])
        np.subtract(y[rows], y_mean[g], out=block[:, q])
        r_aug = np.linalg.qr(np.vstack([r_aug, block]), mode="r")
    kept = _independent_columns(raw_norm[None, :], r_aug[:, :q], layout.required)
    w_mean = w_mean[:, kept]
    _check_parameters(n, sizes.size + kept.size)
    r_kept = np.linalg.qr(r_aug[:, np.append(kept, q)], mode="r")
    r_mat, qy = r_kept[:kept.size, :kept.size], r_kept[:kept.size, kept.size]
    r_inv = linalg.solve_triangular(r_mat, np.eye(kept.size))
    beta = r_inv @ qy
    vs = [c_w[kept] - c_groups @ w_mean for c_groups, c_w in layout.targets]
    directions = np.column_stack([r_inv @ (r_inv.T @ v) for v in vs])   # (k, targets)
    unit_weight = np.column_stack([c_groups / sizes for c_groups, _ in layout.targets])
    contrib = np.empty((len(vs), n))
    at_one = 0
    for rows in _row_blocks(n):
        g = groups[rows]
        w_dm = layout.W[rows][:, kept] - w_mean[g]
        lev = 1.0 / sizes[g] + np.sum((w_dm @ r_inv) ** 2, axis=1)
        resid = y[rows] - y_mean[g] - w_dm @ beta
        one = lev > 1.0 - 1e-10
        at_one += int(one.sum())
        scale = resid / np.sqrt(np.where(one, 1.0, 1.0 - lev))
        contrib[:, rows] = ((unit_weight[g] + w_dm @ directions) * scale[:, None]).T
    if at_one:
        raise DesignError(_leverage_one_message(at_one))
    keys = _keys(_UNIT, pos)
    df = float(n - sizes.size - kept.size)
    fits = []
    for (c_groups, _), v, c, (n_treated, n_control) in zip(layout.targets, vs, contrib, counts):
        fits.append(_Fit(estimate=float(c_groups @ y_mean + v @ beta), contrib=c, keys=keys,
                         components=((float(c @ c), df),), n_treated=n_treated,
                         n_control=n_control, method=method, variance_rule="hc2", se_ok=True))
    if df < 1:
        _warn(f"the adjusted estimate has {df:g} degrees of freedom; no interval is reported")
    return fits


def _blockwise_means(y, W, groups, sizes) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Group means of ``W`` (G, q) and ``y`` (G,), and the columns' norms of ``W``, by row blocks."""
    q = W.shape[1]
    w_sum = np.zeros((sizes.size, q))
    raw_sq = np.zeros(q)
    for rows in _row_blocks(y.size):
        g, wb = groups[rows], W[rows]
        for j in range(q):
            w_sum[:, j] += np.bincount(g, weights=wb[:, j], minlength=sizes.size)
        raw_sq += np.einsum("ij,ij->j", wb, wb)
    y_mean = np.bincount(groups, weights=y, minlength=sizes.size) / sizes
    return w_sum / sizes[:, None], y_mean, np.sqrt(raw_sq)


def _row_blocks(n: int):
    return (slice(start, min(start + _BLOCK_ROWS, n)) for start in range(0, n, _BLOCK_ROWS))


def _leverage_one_message(count: int) -> str:
    return (f"{count} unit(s) have leverage 1 in the adjusted regression (their residual is 0 "
            "by construction), so its HC2 standard error would be too small")


def _check_parameters(n: int, n_par: int) -> None:
    if n <= n_par:
        raise DesignError(f"the adjusted regression has {n_par} coefficients but only {n} "
                          "units; use fewer covariates")


def _drop_constant(X: np.ndarray, *, in_place: bool = False) -> np.ndarray:
    """Covariates without the constant ones, centred; ``in_place`` may overwrite ``X``.

    Without ``in_place`` the copy ``X[:, ~constant]`` is column-major, which
    sets the order of the sums in the means; so ``in_place`` (no copy when no
    column is constant) is for large designs only, which do not promise the
    last bits of the whole-matrix fit anyway.
    """
    constant = np.ptp(X, axis=0) == 0
    if constant.any():
        _warn(f"{int(constant.sum())} covariate(s) are constant among the units used and are "
              "left out of the adjustment")
    if not in_place or constant.any():
        X = X[:, ~constant]
    X -= X.mean(axis=0)
    return X


def _lin_layout(s: _Sample, xc: np.ndarray) -> _LinLayout:
    """Interacted cells when every block has >= 2 units (clusters) per arm, else additive."""
    n = s.y.size
    if _blocks_splittable(s):
        key = s.z.astype(np.int64) if s.block is None else s.block * 2 + s.z
        cell_codes, cells = _dense_codes(key)
        del key
        if s.block is None:
            labels, counts = np.zeros(1, dtype=np.int64), np.array([n])
        else:
            labels, counts = np.unique(s.block, return_counts=True)
        share = counts[np.searchsorted(labels, cell_codes // 2)] / n
        c_groups = np.where(cell_codes % 2 == 1, 1.0, -1.0) * share
        return _LinLayout(groups=cells, W=_Regressors(z=s.z, xc=xc, interacted=True),
                          targets=((c_groups, np.zeros(2 * xc.shape[1])),))
    _, blocks = _dense_codes(np.zeros(n, dtype=np.int64) if s.block is None else s.block)
    shares = np.bincount(blocks, weights=s.z) / np.bincount(blocks)
    if np.ptp(shares) > 1e-12:
        _warn("some blocks have fewer than two units (clusters) in an arm, so block indicators "
              "enter additively; as the share of treated units varies across blocks, the "
              "adjusted estimate weights blocks by precision rather than size")
    W = _Regressors(z=s.z, xc=xc, interacted=False)
    c_w = np.zeros(W.shape[1])
    c_w[0] = 1.0
    return _LinLayout(groups=blocks, W=W, targets=((np.zeros(int(blocks.max()) + 1), c_w),),
                      required=1)


def _dense_codes(key: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """``np.unique(key, return_inverse=True)`` for non-negative int keys, in O(n).

    The codes come in the narrowest unsigned type that holds them (a byte per
    unit for up to 256 groups), so a large sample does not carry 8 bytes per unit.
    """
    present = np.bincount(key) > 0
    values = np.flatnonzero(present)
    rank = (np.cumsum(present) - 1).astype(np.min_scalar_type(max(values.size - 1, 0)))
    return values, rank[key]


def _blocks_splittable(s: _Sample) -> bool:
    if s.block is None:
        return True
    for _, m in _groups(s.block):
        for arm in (s.z[m], ~s.z[m]):
            units = s.cluster[m][arm] if s.cluster is not None else np.flatnonzero(arm)
            if np.unique(units).size < 2:
                return False
    return True


def _group_means(values: np.ndarray, groups: np.ndarray, sizes: np.ndarray) -> np.ndarray:
    sums = np.zeros((sizes.size, values.shape[1]))
    np.add.at(sums, groups, values)
    return sums / sizes[:, None]


def _independent_columns(raw: np.ndarray, demeaned: np.ndarray, required: int) -> np.ndarray:
    """Indices of a maximal set of linearly independent columns (pivoted QR).

    Columns that vanish after removing the group intercepts, or that are linear
    combinations of others, leave the fitted values unchanged and are dropped
    with a warning. The first ``required`` columns (the treatment indicator)
    must stay; if they are redundant the effect is not identified.
    """
    q = demeaned.shape[1]
    if q == 0:
        return np.zeros(0, dtype=int)
    raw_norm = np.linalg.norm(raw, axis=0)
    norm = np.linalg.norm(demeaned, axis=0)
    alive = norm > 1e-9 * np.where(raw_norm > 0, raw_norm, 1.0)
    if not alive[:required].all():
        raise DesignError("the treatment indicator is constant within every block; the "
                          "adjusted effect is not identified")
    unit = demeaned[:, alive] / norm[alive]
    head = unit[:, :required]
    if required > 1 and np.linalg.matrix_rank(head) < required:
        raise DesignError("the arm indicators are collinear with the block indicators; the "
                          "adjusted contrasts are not identified")
    rest_index = np.flatnonzero(alive)[required:]
    rest = unit[:, required:]
    if required:
        rest = rest - head @ np.linalg.lstsq(head, rest, rcond=None)[0]
    kept = []
    if rest.shape[1]:
        _, r_mat, piv = linalg.qr(rest, mode="economic", pivoting=True)
        rank = int(np.sum(np.abs(np.diag(r_mat)) > 1e-9))
        kept = sorted(rest_index[piv[:rank]].tolist())
    dropped = q - required - len(kept) - int(np.sum(raw_norm[required:] == 0))
    if dropped:
        _warn(f"{dropped} regressor(s) of the adjusted regression are collinear with other "
              "covariates or with block indicators and are left out (fitted values are "
              "unchanged)")
    return np.array(list(range(required)) + kept, dtype=int)


def _hc2_contributions(lev, r, resid, pos) -> tuple[np.ndarray, np.ndarray]:
    one = lev > 1.0 - 1e-10
    if one.any():
        raise DesignError(_leverage_one_message(int(one.sum())))
    contrib = r * resid / np.sqrt(1.0 - lev)
    return contrib, _keys(_UNIT, pos)


def _cr2_contributions(qmat, group_share, r, resid, cluster, groups
                       ) -> tuple[np.ndarray, np.ndarray, float]:
    """CR2 contributions per cluster and the Bell–McCaffrey df of the effect.

    Clusters are processed in batches of equal size: for each size ``m`` the
    matrices ``I - H_gg`` of all clusters with ``m`` units are stacked and
    decomposed by one batched ``eigh`` call.
    """
    order = np.argsort(cluster, kind="stable")
    codes, starts, counts = np.unique(cluster[order], return_index=True, return_counts=True)
    contrib = np.empty(codes.size)
    u_d = np.empty(codes.size)
    u_t = np.empty(codes.size)
    B = np.empty((codes.size, qmat.shape[1]))
    singular = False
    for size in np.unique(counts):
        which = np.flatnonzero(counts == size)
        idx = order[starts[which][:, None] + np.arange(size)]          # (m, size)
        qg = qmat[idx]                                                  # (m, size, k)
        hat = group_share[idx[:, 0]][:, None, None] + qg @ np.swapaxes(qg, 1, 2)
        adjust, sing = _inv_sqrt_psd(np.eye(size) - hat)
        singular |= sing
        u = np.einsum("mij,mj->mi", adjust, r[idx])                     # A_g r_g
        contrib[which] = np.einsum("mi,mi->m", u, resid[idx])
        u_d[which] = np.einsum("mi,mi->m", u, u)
        u_t[which] = u.sum(axis=1)
        B[which] = np.einsum("mik,mi->mk", qg, u)
    if singular:
        _warn("I - H_gg is singular for some cluster (e.g. alone in its block and arm); CR2 "
              "uses the generalised inverse square root there")
    cell = groups[order[starts]]
    cell_size = 1.0 / group_share[order[starts]]
    df = _bm_df(*_bm_terms(u_d, u_t, cell, cell_size, B))
    return contrib, _keys(_CLUSTER, codes), df


def _inv_sqrt_psd(m: np.ndarray) -> tuple[np.ndarray, bool]:
    """Symmetric (generalised) inverse square root of PSD matrices via (batched) eigh."""
    vals, vecs = np.linalg.eigh(m)
    top = np.maximum(1.0, vals.max(axis=-1, initial=0.0))[..., None]
    ok = vals > 1e-10 * top
    inv = np.where(ok, 1.0 / np.sqrt(np.where(ok, vals, 1.0)), 0.0)
    return (vecs * inv[..., None, :]) @ np.swapaxes(vecs, -1, -2), bool((~ok).any())
