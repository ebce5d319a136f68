"""Shared machinery of the design-based estimators (private).

Owns what :mod:`report_kit.estimation.neyman`, :mod:`report_kit.estimation.adjustment`,
:mod:`report_kit.estimation.noncompliance` and :mod:`report_kit.estimation.subgroups` all build on:
the :class:`Estimate` result, input validation, the per-block pieces
(Neyman, CR2, Horvitz–Thompson), their combination (blocked and paired
variance), Welch–Satterthwaite degrees of freedom, intervals and the
conversion to :class:`Estimate`. ``Estimate`` is public through
:mod:`report_kit.estimation.neyman`; the formulas are in ``docs/methods/estimation.md``.

Every variance estimator here is a sum of squared *contributions*, one per
independently randomized piece of the design (a unit, a cluster, or a block
entering the paired formula)::

    Var_hat = sum_u c_u**2

Neyman's ``s^2/n`` is ``sum_i ((y_i - ybar) / sqrt(n (n - 1)))**2``, CR2 is a
sum over clusters, the paired formula a sum over blocks. Keeping the
contributions lets covariances between two estimates on the same clusters be
estimated as ``sum_u c_u c'_u`` (used for subgroup differences).
"""

from __future__ import annotations

import math
import warnings
from collections.abc import Callable, Sequence
from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy import stats

from report_kit.errors import DataError, DesignError, ReportKitWarning
from report_kit.inputs.model import MECHANISMS
from report_kit.validate import Record


BLOCKED = ("blocked", "blocked_cluster", "matched_pairs")
CLUSTERED = ("cluster", "blocked_cluster")

# Contribution keys are int64 codes ``4 * code + kind`` so that two estimates can
# be matched on the clusters (or blocks) they share.
_UNIT, _CLUSTER, _BLOCK = 0, 1, 2


# ---------------------------------------------------------------------------
# Result object
# ---------------------------------------------------------------------------


@dataclass(frozen=True, kw_only=True)
class Estimate(Record):
    """One estimate of an average effect.

    Field names match the ``estimates`` entries of ``results.json``. Numbers are
    ``None`` where undefined (e.g. no standard error with a single unit in an
    arm). ``n_treated``/``n_control`` count the units actually used (outcome
    observed); ``n_missing`` counts the units dropped for a missing outcome.
    ``variance_rule`` names the variance formula that applied (``neyman``,
    ``neyman+paired``, ``paired``, ``cr2``, ``cr2+paired``, ``ht``,
    ``ht+paired``, ``hc2``, ``delta``); see ``docs/methods/estimation.md``.
    """

    estimand: str
    estimator: str
    estimate: float | None
    std_error: float | None
    ci_low: float | None
    ci_high: float | None
    df: float | None
    n_treated: int
    n_control: int
    method: str
    n_missing: int = 0
    variance_rule: str = ""


# ---------------------------------------------------------------------------
# Validated inputs
# ---------------------------------------------------------------------------


@dataclass(frozen=True, kw_only=True)
class _Design:
    """Normalised design: assignment, block and cluster codes for all units."""

    mechanism: str
    alpha: float
    z: np.ndarray                  # bool, (n,)
    block: np.ndarray | None       # int codes (sorted labels), (n,)
    cluster: np.ndarray | None     # int codes (sorted labels), (n,)

    @property
    def n(self) -> int:
        return int(self.z.size)


@dataclass(frozen=True, kw_only=True)
class _Sample:
    """The units one estimate uses (outcome observed), with their design codes."""

    mechanism: str
    y: np.ndarray
    z: np.ndarray
    block: np.ndarray | None
    cluster: np.ndarray | None
    pos: np.ndarray                # positions in the caller's arrays
    n_missing: int


def _check_alpha(alpha) -> None:
    """ValueError unless ``alpha`` is a real number (not bool) strictly between 0 and 1 (every estimator's rule)."""
    if isinstance(alpha, bool) or not isinstance(alpha, (int, float)) or not 0 < alpha < 1:
        raise ValueError(f"`alpha` must be a number strictly between 0 and 1; got {alpha!r}")


def _validate(y, z, mechanism, block, cluster, alpha) -> tuple[np.ndarray, _Design]:
    if mechanism not in MECHANISMS:
        raise ValueError(f"`mechanism` must be one of {set(MECHANISMS)}; got {mechanism!r}")
    _check_alpha(alpha)
    z = _binary(z, "z", allow_missing=False)
    y = _vector(y, "y", z.size)
    block_codes = _labels(block, "block", mechanism, BLOCKED, z.size)
    cluster_codes = _labels(cluster, "cluster", mechanism, CLUSTERED, z.size)
    if cluster_codes is not None:
        _check_clusters(z, cluster_codes, cluster, block_codes)
    design = _Design(mechanism=mechanism, alpha=float(alpha), z=z.astype(bool),
                     block=block_codes, cluster=cluster_codes)
    return y, design


def _vector(values, name: str, n: int) -> np.ndarray:
    try:
        arr = np.asarray(values, dtype=float)
    except (TypeError, ValueError) as err:
        raise DataError(f"`{name}` must be numeric; {err}") from err
    if arr.ndim != 1 or arr.size != n:
        raise ValueError(f"`{name}` must be a 1-d array of length {n} (one value per unit); "
                         f"got shape {arr.shape}")
    return arr


def _binary(values, name: str, *, allow_missing: bool, n: int | None = None) -> np.ndarray:
    arr = _vector(values, name, n if n is not None else np.asarray(values).size)
    seen = arr[~np.isnan(arr)] if allow_missing else arr
    bad = seen[(seen != 0) & (seen != 1)]
    if bad.size:
        extra = "" if allow_missing else " (no missing values)"
        raise DataError(f"`{name}` must hold only 0 and 1{extra}; got {float(bad[0])!r}")
    return arr if allow_missing else arr.astype(int)


def _labels(values, name, mechanism, mechanisms, n) -> np.ndarray | None:
    if values is None:
        if mechanism in mechanisms:
            raise DesignError(f"mechanism {mechanism!r} needs `{name}` (one label per unit); got None")
        return None
    if mechanism not in mechanisms:
        raise ValueError(f"`{name}` applies only to mechanisms {set(mechanisms)}; "
                         f"got mechanism {mechanism!r}")
    series = pd.Series(np.asarray(values, dtype=object))
    if series.size != n:
        raise ValueError(f"`{name}` must have one label per unit ({n}); got {series.size}")
    try:
        codes, _ = pd.factorize(series, sort=True)
    except TypeError:  # labels of mixed types cannot be sorted: keep data order
        codes, _ = pd.factorize(series, sort=False)
    if (codes < 0).any():
        raise DesignError(f"`{name}` has {int((codes < 0).sum())} missing labels; "
                          "every unit needs one")
    return codes.astype(np.int64)


def _check_clusters(z, cluster_codes, cluster_labels, block_codes) -> None:
    labels = np.asarray(cluster_labels, dtype=object)
    frame = pd.DataFrame({"cluster": cluster_codes, "z": z})
    spread = frame.groupby("cluster")["z"].agg(["min", "max"])
    mixed = spread.index[spread["min"] != spread["max"]]
    if len(mixed):
        label = labels[cluster_codes == mixed[0]][0]
        raise DesignError(f"cluster {label!r} has both treated and control units; "
                          "treatment must be constant within a cluster")
    if block_codes is not None:
        frame["block"] = block_codes
        spans = frame.groupby("cluster")["block"].nunique()
        split = spans.index[spans > 1]
        if len(split):
            label = labels[cluster_codes == split[0]][0]
            raise DesignError(f"cluster {label!r} spans several blocks; "
                              "each cluster must lie within one block")


def _groups(codes: np.ndarray) -> list[tuple[int, np.ndarray]]:
    """``(code, positions)`` for each distinct code, codes ascending, positions in order."""
    order = np.argsort(codes, kind="stable")
    uniq, starts = np.unique(codes[order], return_index=True)
    return list(zip(uniq.tolist(), np.split(order, starts[1:])))


def _sample(design: _Design, y: np.ndarray, keep: np.ndarray) -> _Sample:
    n_missing = int(np.sum(keep & np.isnan(y)))
    keep = keep & ~np.isnan(y)
    return _Sample(
        mechanism=design.mechanism, y=y[keep], z=design.z[keep],
        block=None if design.block is None else design.block[keep],
        cluster=None if design.cluster is None else design.cluster[keep],
        pos=np.flatnonzero(keep), n_missing=n_missing,
    )


# ---------------------------------------------------------------------------
# Building blocks: per-block pieces and their combination
# ---------------------------------------------------------------------------


@dataclass(frozen=True, kw_only=True)
class _Piece:
    """One block's estimate; ``small`` = its variance is not estimable within it."""

    label: int
    weight: float
    estimate: float
    contrib: np.ndarray
    keys: np.ndarray
    components: tuple[tuple[float, float], ...]
    small: bool
    n_treated: int
    n_control: int
    bm: tuple[float, float] | None = None   # (trace, squared Frobenius norm) of G'G, CR2 only


@dataclass(frozen=True, kw_only=True)
class _Fit:
    """An estimate with its variance contributions, before the interval."""

    estimate: float | None
    contrib: np.ndarray
    keys: np.ndarray
    components: tuple[tuple[float, float], ...]
    n_treated: int
    n_control: int
    method: str
    variance_rule: str
    se_ok: bool

    @property
    def variance(self) -> float | None:
        return float(np.sum(self.contrib ** 2)) if self.se_ok else None

    @property
    def df(self) -> float | None:
        return _satterthwaite(self.components) if self.se_ok else None


def _keys(kind: int, codes) -> np.ndarray:
    keys = np.asarray(codes, dtype=np.int64) * 4
    keys += kind
    return keys


def _neyman_piece(y, z, cluster, pos, label) -> _Piece:
    """Difference in means with Neyman's variance ``s1^2/n1 + s0^2/n0`` (Neyman 1923).

    Contribution of unit i in arm a: ``(y_i - ybar_a) / sqrt(n_a (n_a - 1))``
    (sign - for control), whose squares sum to ``s_a^2 / n_a``. Each arm is a
    Welch–Satterthwaite component with ``n_a - 1`` df.
    """
    n1, n0 = int(z.sum()), int((~z).sum())
    y1, y0 = y[z], y[~z]
    est = float(y1.mean() - y0.mean())
    if n1 < 2 or n0 < 2:
        return _small_piece(label, y.size, est, n1, n0)
    contrib = np.empty(y.size)
    y1 -= y1.mean()
    y1 /= math.sqrt(n1 * (n1 - 1))
    y0 -= y0.mean()
    y0 /= -math.sqrt(n0 * (n0 - 1))
    contrib[z], contrib[~z] = y1, y0
    comps = ((float(np.sum(y1 ** 2)), n1 - 1.0), (float(np.sum(y0 ** 2)), n0 - 1.0))
    return _Piece(label=label, weight=float(y.size), estimate=est, contrib=contrib,
                  keys=_keys(_UNIT, pos), components=comps, small=False, n_treated=n1, n_control=n0)


def _cr2_piece(y, z, cluster, pos, label) -> _Piece:
    """Unit-level difference in means with the CR2 variance (Bell & McCaffrey 2002).

    For OLS of y on (1, z) the CR2 adjustment ``A_g = (I - H_gg)^{-1/2}`` has the
    closed form ``H_gg = J / N_a`` (J all ones, N_a units in the cluster's arm),
    so the contribution of cluster g in arm a is
    ``+-E_g / (N_a sqrt(1 - n_g / N_a))`` with ``E_g`` the sum of the cluster's
    residuals ``y_i - ybar_a``. Degrees of freedom: Bell & McCaffrey (2002),
    see :func:`_bm_terms` (the piece keeps the trace and squared Frobenius norm
    so that blocks can be combined).
    """
    n1, n0 = int(z.sum()), int((~z).sum())
    est = float(y[z].mean() - y[~z].mean())
    contrib, keys, parts = [], [], []
    for arm, sign in ((z, 1.0), (~z, -1.0)):
        codes, inverse = np.unique(cluster[arm], return_inverse=True)
        if codes.size < 2:
            return _small_piece(label, y.size, est, n1, n0)
        resid_sum = np.bincount(inverse, weights=y[arm] - y[arm].mean())
        sizes = np.bincount(inverse).astype(float)
        total = float(arm.sum())
        scale = sign / (total * np.sqrt(1.0 - sizes / total))
        contrib.append(scale * resid_sum)
        keys.append(_keys(_CLUSTER, codes))
        # A_g a_g = scale_g * 1 on the cluster's units: d_g = scale^2 n_g, t_g = scale n_g
        parts.append((scale ** 2 * sizes, scale * sizes, np.full(codes.size, total)))
    contrib = np.concatenate(contrib)
    d, t, cell_size = (np.concatenate(p) for p in zip(*parts))
    cell = np.repeat([0, 1], [parts[0][0].size, parts[1][0].size])
    bm = _bm_terms(d, t, cell, cell_size, None)
    comps = ((float(np.sum(contrib ** 2)), _bm_df(*bm)),)
    return _Piece(label=label, weight=float(y.size), estimate=est, contrib=contrib,
                  keys=np.concatenate(keys), components=comps, small=False,
                  n_treated=n1, n_control=n0, bm=bm)


def _bm_terms(d, t, cell, cell_size, B) -> tuple[float, float]:
    """Trace and squared Frobenius norm of ``G'G`` for the Bell–McCaffrey df.

    A CR2 contrast is ``V = sum_g (g_g' y)^2`` with ``g_g = M_{.,g} A_g a_g``
    (``M = I - H``, ``a`` the contrast's weights on the units, ``A_g`` the CR2
    adjustment). Under the working model ``Var(y) = sigma^2 I`` Bell & McCaffrey
    (2002, eq. 7 ff.; Imbens & Kolesár 2016, Section 4) match V to a scaled
    chi-square: ``df = (sum lambda)^2 / sum lambda^2 = tr(G'G)^2 / ||G'G||_F^2``.
    Writing ``u_g = A_g a_g`` and ``M = I - P - Q Q'`` (P the projection on the
    absorbed group intercepts, Q an orthonormal basis of the remaining demeaned
    regressors), ``(G'G)_{gh} = u_g' M_{gh} u_h``
    ``= delta_gh d_g - [same group] t_g t_h / n_cell - b_g' b_h`` with
    ``d_g = u_g'u_g``, ``t_g = 1'u_g``, ``b_g = Q_g'u_g`` (rows of ``B``). Both
    sums are computed from these pieces in O(G k), never forming G'G.
    """
    d = np.asarray(d, dtype=float)
    t = np.asarray(t, dtype=float)
    tt = t * t / cell_size
    trace = float(d.sum() - tt.sum())
    # ||S||^2 with S = block-diagonal sum_c t_c t_c' / n_c
    cell_t2 = np.bincount(cell, weights=t * t)
    cell_n = np.zeros(cell_t2.size)
    cell_n[cell] = cell_size
    s_norm = float(np.sum((cell_t2 / cell_n) ** 2))
    frob = float(np.sum(d * d)) + s_norm - 2.0 * float(np.sum(d * tt))
    if B is not None and B.shape[1]:
        trace -= float(np.sum(B * B))
        bb = np.sum(B * B, axis=1)
        gram = B.T @ B
        tb = np.zeros((cell_t2.size, B.shape[1]))
        np.add.at(tb, cell, t[:, None] * B)
        frob += (float(np.sum(gram * gram)) - 2.0 * float(np.sum(d * bb))
                 + 2.0 * float(np.sum(np.sum(tb * tb, axis=1) / cell_n)))
    return trace, frob


def _bm_df(trace: float, frob: float) -> float:
    """``tr(G'G)^2 / ||G'G||_F^2`` (Bell & McCaffrey 2002); 0 when undefined."""
    return float(trace * trace / frob) if frob > 0 else 0.0


def _ht_piece(y, z, cluster, pos, label) -> _Piece:
    """Horvitz–Thompson difference in totals (Middleton & Aronow 2015).

    With M clusters of which m are treated by complete randomization, N units
    and cluster totals T_j: ``tau_HT = (M/N) (mean_{treated} T_j - mean_{control} T_j)``,
    unbiased for the unit-level ATE whatever the cluster sizes. Variance: the
    Neyman bound on scaled totals, ``(M/N)^2 (s_T1^2/m + s_T0^2/(M-m))``;
    Welch–Satterthwaite components with ``m - 1`` and ``M - m - 1`` df.
    """
    codes, inverse = np.unique(cluster, return_inverse=True)
    totals = np.bincount(inverse, weights=y)
    treated = np.zeros(codes.size, dtype=bool)
    treated[inverse[z]] = True
    m1, m0 = int(treated.sum()), int((~treated).sum())
    scale = codes.size / y.size
    est = float(scale * (totals[treated].mean() - totals[~treated].mean()))
    n1, n0 = int(z.sum()), int((~z).sum())
    if m1 < 2 or m0 < 2:
        return _small_piece(label, y.size, est, n1, n0)
    contrib = np.empty(codes.size)
    for arm, sign, m in ((treated, 1.0, m1), (~treated, -1.0, m0)):
        contrib[arm] = sign * scale * (totals[arm] - totals[arm].mean()) / math.sqrt(m * (m - 1))
    comps = ((float(np.sum(contrib[treated] ** 2)), m1 - 1.0),
             (float(np.sum(contrib[~treated] ** 2)), m0 - 1.0))
    return _Piece(label=label, weight=float(y.size), estimate=est, contrib=contrib,
                  keys=_keys(_CLUSTER, codes), components=comps, small=False,
                  n_treated=n1, n_control=n0)


def _small_piece(label, weight, est, n1, n0) -> _Piece:
    return _Piece(label=label, weight=float(weight), estimate=est, contrib=np.zeros(0),
                  keys=np.zeros(0, dtype=np.int64), components=(), small=True,
                  n_treated=n1, n_control=n0)


_PIECE_BUILDERS: dict[str, Callable[..., _Piece]] = {
    "neyman": _neyman_piece, "cr2": _cr2_piece, "ht": _ht_piece,
}


def _pieces(s: _Sample, rule: str) -> list[_Piece]:
    """One piece per block (a single piece for unblocked designs).

    A block with no treated or no control unit (after dropping missing outcomes)
    cannot contribute and is left out with a warning.
    """
    builder = _PIECE_BUILDERS[rule]
    if s.block is None:   # one piece of all units, in their order (no index copies)
        if s.z.all() or not s.z.any():
            return []
        return [builder(s.y, s.z, s.cluster, s.pos, 0)]
    pieces, empty = [], []
    for label, m in _groups(s.block):
        zb = s.z[m]
        if zb.all() or not zb.any():
            empty.append(label)
            continue
        cluster = None if s.cluster is None else s.cluster[m]
        pieces.append(builder(s.y[m], zb, cluster, s.pos[m], label))
    if empty and s.block is not None:
        _warn(f"{len(empty)} block(s) have no treated or no control unit with an observed "
              "outcome and are left out; the estimate covers the remaining blocks")
    return pieces


def _combine(pieces: list[_Piece], *, rule: str, method: str, blocked: bool,
             warn_zero: bool) -> _Fit:
    """Block-size-weighted average of block estimates and its variance.

    ``tau = sum_b w_b tau_b`` with ``w_b = n_b / n``. Blocks where both arms
    can be estimated (large blocks) contribute ``w_b^2 V_b``. Blocks with a
    single treated or single control unit (matched pairs among them) enter
    together through the small-block estimator of :func:`_small_block_variance`
    (Pashley & Miratrix 2021), which does not change when a constant is added to
    every treated outcome. If the small blocks cannot carry that estimator on
    their own (one small block, or one holding half or more of their units), it
    is applied to all blocks.
    """
    weights = np.array([p.weight for p in pieces])
    w = weights / weights.sum()
    est = float(np.dot(w, [p.estimate for p in pieces]))
    n1 = sum(p.n_treated for p in pieces)
    n0 = sum(p.n_control for p in pieces)
    small = [i for i, p in enumerate(pieces) if p.small]
    if small and _small_block_coefficients(w[small]) is None:
        small = list(range(len(pieces)))
        if _small_block_coefficients(w) is None:
            _warn(f"an arm has a single unit (or {'cluster' if rule != 'neyman' else 'unit'}) "
                  "in too many blocks, so the variance cannot be estimated; the standard "
                  "error is undefined")
            return _Fit(estimate=est, contrib=np.zeros(0), keys=np.zeros(0, dtype=np.int64),
                        components=(), n_treated=n1, n_control=n0, method=method,
                        variance_rule=rule, se_ok=False)
        _warn("the blocks with a single treated or single control unit are too few (or one "
              "of them too large) for the small-block variance on their own; it is used for "
              "all blocks")
    small_set = set(small)
    large = [i for i in range(len(pieces)) if i not in small_set]
    # a weight of exactly 1 (one block) leaves the contributions as they are: no copy
    contrib = [pieces[i].contrib if w[i] == 1.0 else w[i] * pieces[i].contrib for i in large]
    keys = [pieces[i].keys for i in large]
    if large and all(pieces[i].bm is not None for i in large):
        # CR2 blocks: one component, Bell–McCaffrey df of the weighted sum of the blocks
        trace = sum(w[i] ** 2 * pieces[i].bm[0] for i in large)
        frob = sum(w[i] ** 4 * pieces[i].bm[1] for i in large)
        comps = [(sum(w[i] ** 2 * v for i in large for v, _ in pieces[i].components),
                  _bm_df(trace, frob))]
    else:
        comps = [(w[i] ** 2 * v, d) for i in large for v, d in pieces[i].components]
    if small:
        c = _small_block_variance(w[small], np.array([pieces[i].estimate for i in small]))
        contrib.append(c)
        keys.append(_keys(_BLOCK, [pieces[i].label for i in small]))
        comps.append((float(np.sum(c ** 2)), len(small) - 1.0))
    variance_rule = "paired" if not large else (rule + "+paired" if small else rule)
    if blocked and not large and method == "blocked_neyman":
        method = "paired"
    fit = _Fit(estimate=est, contrib=_joined(contrib), keys=_joined(keys),
               components=tuple(comps), n_treated=n1, n_control=n0, method=method,
               variance_rule=variance_rule, se_ok=True)
    if warn_zero and fit.variance == 0.0:
        _warn("the estimated variance is zero (the outcome does not vary within arms, or "
              "the small-block effects are all equal); the standard error is 0 and the "
              "interval has zero width")
    return fit


def _joined(parts: list[np.ndarray]) -> np.ndarray:
    return parts[0] if len(parts) == 1 else np.concatenate(parts)


def _small_block_coefficients(w: np.ndarray) -> np.ndarray | None:
    """Coefficients ``c_k`` of the small-block variance, or None where it is undefined.

    With ``v_k = w_k / sum_j w_j`` (the block's share among the small blocks) and
    ``A = sum_j v_j^2 / (1 - 2 v_j)``: ``c_k = v_k^2 / ((1 - 2 v_k)(1 + A))``
    (Pashley & Miratrix 2021, the small-block estimator with unequal block sizes;
    in counts ``n_k^2 / ((N - 2 n_k)(N + sum_j n_j^2 / (N - 2 n_j)))``). Needs
    at least two blocks and every ``v_k < 1/2``; with equal shares (including two
    blocks) ``c_k = 1 / (J (J - 1))``, the classic paired formula.
    """
    if w.size < 2:
        return None
    v = w / w.sum()
    if np.ptp(v) <= 1e-12 * v.max():
        return np.full(v.size, 1.0 / (v.size * (v.size - 1)))
    if v.max() >= 0.5:
        return None
    a = float(np.sum(v * v / (1.0 - 2.0 * v)))
    return v * v / ((1.0 - 2.0 * v) * (1.0 + a))


def _small_block_variance(w: np.ndarray, tau: np.ndarray) -> np.ndarray:
    """Contributions of the small blocks: ``W_S sqrt(c_k) (tau_k - tau_S)``.

    ``tau_S = sum_k v_k tau_k`` is their weighted effect and ``W_S = sum_k w_k``
    their share of all units, so the squares sum to ``W_S^2 sum_k c_k (tau_k -
    tau_S)^2``, the variance of their part of the estimate. Its expectation is
    at least the true variance, with equality when the effect is the same in
    every small block (Pashley & Miratrix 2021). Centring at ``tau_S`` (not at
    the mean of ``w_k tau_k``) makes it invariant to a constant added to every
    treated outcome.
    """
    coef = _small_block_coefficients(w)
    v = w / w.sum()
    return w.sum() * np.sqrt(coef) * (tau - float(np.dot(v, tau)))


def _undefined_fit(method: str, s: _Sample) -> _Fit:
    _warn("no treated or no control unit with an observed outcome; the effect is undefined")
    return _Fit(estimate=None, contrib=np.zeros(0), keys=np.zeros(0, dtype=np.int64),
                components=(), n_treated=int(s.z.sum()), n_control=int((~s.z).sum()),
                method=method, variance_rule="", se_ok=False)


def _satterthwaite(components: Sequence[tuple[float, float]]) -> float | None:
    """Welch–Satterthwaite df ``(sum V_k)^2 / sum (V_k^2 / df_k)`` (Satterthwaite 1946).

    With zero total variance the df fall back to ``sum df_k``.
    """
    comps = [(v, d) for v, d in components if d > 0]
    if not comps:
        return None
    total = sum(v for v, _ in comps)
    denom = sum(v * v / d for v, d in comps)
    if denom > 0:
        return float(total * total / denom)
    return float(sum(d for _, d in comps))


def _unadjusted(s: _Sample, rule: str, *, warn_zero: bool = True) -> _Fit:
    blocked = s.block is not None
    if rule == "neyman":
        method = "blocked_neyman" if blocked else "neyman"
    else:
        method = {"cr2": "cr2", "ht": "horvitz_thompson"}[rule]
    pieces = _pieces(s, rule)
    if not pieces:
        return _undefined_fit(method, s)
    return _combine(pieces, rule=rule, method=method, blocked=blocked, warn_zero=warn_zero)


def _primary_rule(mechanism: str) -> str:
    return "cr2" if mechanism in CLUSTERED else "neyman"


def _unadjusted_rules(mechanism: str) -> tuple[str, ...]:
    return ("cr2", "ht") if mechanism in CLUSTERED else ("neyman",)


# ---------------------------------------------------------------------------
# Intervals and conversion
# ---------------------------------------------------------------------------


def _interval(est, se, df, alpha) -> tuple[float | None, float | None]:
    """``est -+ t_{1-alpha/2, df} * se``; undefined without a standard error or df."""
    if est is None or se is None or df is None or not df > 0:
        return None, None
    q = float(stats.t.ppf(1.0 - alpha / 2.0, df))
    return est - q * se, est + q * se


def _to_estimate(fit: _Fit, alpha: float, *, estimand: str, estimator: str,
                 n_missing: int) -> Estimate:
    variance = fit.variance
    se = None if variance is None else math.sqrt(variance)
    df = fit.df
    low, high = _interval(fit.estimate, se, df, alpha)
    return Estimate(estimand=estimand, estimator=estimator, estimate=fit.estimate,
                    std_error=se, ci_low=low, ci_high=high, df=df,
                    n_treated=fit.n_treated, n_control=fit.n_control, method=fit.method,
                    n_missing=n_missing, variance_rule=fit.variance_rule)


def _warn(message: str) -> None:
    warnings.warn(message, ReportKitWarning, stacklevel=3)
