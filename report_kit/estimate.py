"""Design-based estimators of average treatment effects.

Owns: point estimates, standard errors, degrees of freedom and confidence
intervals for every supported assignment mechanism; the covariate-adjusted
estimate (Lin 2013); noncompliance (ITT, ITT on take-up, CACE); pre-specified
subgroups; and the ``estimates`` list of ``results.json``. Pure numpy/scipy, no
I/O. The formulas, the rule that picks among them, the degrees-of-freedom rules
and the citations are written out in ``docs/methods/estimation.md``.

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
from dataclasses import asdict, dataclass

import numpy as np
import pandas as pd
from scipy import linalg, stats

from .errors import DataError, DesignError, ReportKitWarning, UsageError
from .model import MECHANISMS

__all__ = [
    "ESTIMATE_KEYS",
    "Estimate",
    "Noncompliance",
    "SubgroupDifference",
    "SubgroupResult",
    "neyman_difference",
    "estimate_adjusted",
    "estimate_effects",
    "estimate_noncompliance",
    "estimate_subgroups",
    "study_estimates",
    "study_subgroup_differences",
]

BLOCKED = ("blocked", "blocked_cluster", "matched_pairs")
CLUSTERED = ("cluster", "blocked_cluster")
ESTIMATE_KEYS = (
    "outcome", "estimand", "estimator", "subgroup", "estimate", "std_error",
    "ci_low", "ci_high", "df", "n_treated", "n_control", "method",
)
#: First-stage strength below which a warning is issued (F = t^2 < 10;
#: common practice, after Staiger & Stock 1997).
WEAK_FIRST_STAGE_F = 10.0

# Contribution keys are int64 codes ``4 * code + kind`` so that two estimates can
# be matched on the clusters (or blocks) they share.
_UNIT, _CLUSTER, _BLOCK = 0, 1, 2


# ---------------------------------------------------------------------------
# Result objects
# ---------------------------------------------------------------------------


@dataclass(frozen=True, kw_only=True)
class Estimate:
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

    def to_dict(self) -> dict:
        return {key: _json_value(value) for key, value in asdict(self).items()}


@dataclass(frozen=True, kw_only=True)
class Noncompliance:
    """ITT on the outcome, ITT on take-up, and the CACE (Wald ratio).

    ``rate_treated``/``rate_control`` are the shares of units that received
    treatment in each assigned arm, over the units used for the CACE.
    """

    itt: Estimate
    itt_takeup: Estimate
    cace: Estimate
    rate_treated: float | None
    rate_control: float | None

    def to_dict(self) -> dict:
        return {
            "itt": self.itt.to_dict(),
            "itt_takeup": self.itt_takeup.to_dict(),
            "cace": self.cace.to_dict(),
            "rate_treated": _json_value(self.rate_treated),
            "rate_control": _json_value(self.rate_control),
        }


@dataclass(frozen=True, kw_only=True)
class SubgroupDifference:
    """Effect in subgroup ``level`` minus the effect in subgroup ``reference``."""

    level: str
    reference: str
    estimate: float | None
    std_error: float | None
    ci_low: float | None
    ci_high: float | None
    df: float | None

    def to_dict(self) -> dict:
        return {key: _json_value(value) for key, value in asdict(self).items()}


@dataclass(frozen=True, kw_only=True)
class SubgroupResult:
    """Effects within each level of a pre-specified subgroup variable.

    ``levels`` are sorted; ``estimates[i]`` belongs to ``levels[i]``;
    ``differences`` compare every other level with ``levels[0]``.
    ``n_missing_group`` counts units without a subgroup label (left out).
    """

    levels: tuple[str, ...]
    estimates: tuple[Estimate, ...]
    differences: tuple[SubgroupDifference, ...]
    n_missing_group: int = 0

    def to_dict(self) -> dict:
        return {
            "levels": list(self.levels),
            "estimates": [
                {"subgroup": level, **est.to_dict()}
                for level, est in zip(self.levels, self.estimates)
            ],
            "differences": [diff.to_dict() for diff in self.differences],
            "n_missing_group": int(self.n_missing_group),
        }


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


def _validate(y, z, mechanism, block, cluster, alpha) -> tuple[np.ndarray, _Design]:
    if mechanism not in MECHANISMS:
        raise UsageError(f"`mechanism` must be one of {set(MECHANISMS)}; got {mechanism!r}")
    if isinstance(alpha, bool) or not isinstance(alpha, (int, float)) or not 0 < alpha < 1:
        raise UsageError(f"`alpha` must be a number strictly between 0 and 1; got {alpha!r}")
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
        raise UsageError(f"`{name}` must be a 1-d array of length {n} (one value per unit); "
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
        raise UsageError(f"`{name}` applies only to mechanisms {set(mechanisms)}; "
                         f"got mechanism {mechanism!r}")
    series = pd.Series(np.asarray(values, dtype=object))
    if series.size != n:
        raise UsageError(f"`{name}` must have one label per unit ({n}); got {series.size}")
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
    return np.asarray(codes, dtype=np.int64) * 4 + kind


def _neyman_piece(y, z, cluster, pos, label) -> _Piece:
    """Difference in means with Neyman's variance ``s1^2/n1 + s0^2/n0`` (Neyman 1923).

    Contribution of unit i in arm a: ``(y_i - ybar_a) / sqrt(n_a (n_a - 1))``
    (sign - for control), whose squares sum to ``s_a^2 / n_a``. Each arm is a
    Welch–Satterthwaite component with ``n_a - 1`` df.
    """
    n1, n0 = int(z.sum()), int((~z).sum())
    est = float(y[z].mean() - y[~z].mean())
    if n1 < 2 or n0 < 2:
        return _small_piece(label, y.size, est, n1, n0)
    contrib = np.empty(y.size)
    contrib[z] = (y[z] - y[z].mean()) / math.sqrt(n1 * (n1 - 1))
    contrib[~z] = -(y[~z] - y[~z].mean()) / math.sqrt(n0 * (n0 - 1))
    comps = ((float(np.sum(contrib[z] ** 2)), n1 - 1.0), (float(np.sum(contrib[~z] ** 2)), n0 - 1.0))
    return _Piece(label=label, weight=float(y.size), estimate=est, contrib=contrib,
                  keys=_keys(_UNIT, pos), components=comps, small=False, n_treated=n1, n_control=n0)


def _cr2_piece(y, z, cluster, pos, label) -> _Piece:
    """Unit-level difference in means with the CR2 variance (Bell & McCaffrey 2002).

    For OLS of y on (1, z) the CR2 adjustment ``A_g = (I - H_gg)^{-1/2}`` has the
    closed form ``H_gg = J / N_a`` (J all ones, N_a units in the cluster's arm),
    so the contribution of cluster g in arm a is
    ``+-E_g / (N_a sqrt(1 - n_g / N_a))`` with ``E_g`` the sum of the cluster's
    residuals ``y_i - ybar_a``. One component with ``G - 2`` df.
    """
    n1, n0 = int(z.sum()), int((~z).sum())
    est = float(y[z].mean() - y[~z].mean())
    contrib, keys = [], []
    for arm, sign in ((z, 1.0), (~z, -1.0)):
        codes, inverse = np.unique(cluster[arm], return_inverse=True)
        if codes.size < 2:
            return _small_piece(label, y.size, est, n1, n0)
        resid_sum = np.bincount(inverse, weights=y[arm] - y[arm].mean())
        sizes = np.bincount(inverse).astype(float)
        total = float(arm.sum())
        contrib.append(sign * resid_sum / (total * np.sqrt(1.0 - sizes / total)))
        keys.append(_keys(_CLUSTER, codes))
    contrib = np.concatenate(contrib)
    n_clusters = sum(k.size for k in keys)
    comps = ((float(np.sum(contrib ** 2)), n_clusters - 2.0),)
    return _Piece(label=label, weight=float(y.size), estimate=est, contrib=contrib,
                  keys=np.concatenate(keys), components=comps, small=False,
                  n_treated=n1, n_control=n0)


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
    labels = np.zeros(s.y.size, dtype=np.int64) if s.block is None else s.block
    pieces, empty = [], []
    for label, m in _groups(labels):
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
    can be estimated contribute ``w_b^2 V_b``. Blocks with a single treated or
    single control unit (matched pairs among them) enter together through the
    paired-design estimator (Imai 2008; weighted form of Imai, King & Nall 2009):
    with ``a_j = w_j tau_j`` over those J blocks,
    ``V = J / (J - 1) sum_j (a_j - mean(a))^2`` (df ``J - 1``). If only one block
    is small, the paired estimator is applied to all blocks.
    """
    weights = np.array([p.weight for p in pieces])
    w = weights / weights.sum()
    est = float(np.dot(w, [p.estimate for p in pieces]))
    n1 = sum(p.n_treated for p in pieces)
    n0 = sum(p.n_control for p in pieces)
    small = [i for i, p in enumerate(pieces) if p.small]
    if len(small) == 1:
        if len(pieces) == 1:
            _warn(f"an arm has a single unit (or {'cluster' if rule != 'neyman' else 'unit'}) "
                  "so its variance cannot be estimated; the standard error is undefined")
            return _Fit(estimate=est, contrib=np.zeros(0), keys=np.zeros(0, dtype=np.int64),
                        components=(), n_treated=n1, n_control=n0, method=method,
                        variance_rule=rule, se_ok=False)
        _warn("exactly one block has a single treated or single control unit; the paired "
              "(between-block) variance estimator is used for all blocks")
        small = list(range(len(pieces)))
    small_set = set(small)
    large = [i for i in range(len(pieces)) if i not in small_set]
    contrib = [w[i] * pieces[i].contrib for i in large]
    keys = [pieces[i].keys for i in large]
    comps = [(w[i] ** 2 * v, d) for i in large for v, d in pieces[i].components]
    if small:
        a = np.array([w[i] * pieces[i].estimate for i in small])
        c = math.sqrt(a.size / (a.size - 1)) * (a - a.mean())
        contrib.append(c)
        keys.append(_keys(_BLOCK, [pieces[i].label for i in small]))
        comps.append((float(np.sum(c ** 2)), a.size - 1.0))
    variance_rule = "paired" if not large else (rule + "+paired" if small else rule)
    if blocked and not large and method == "blocked_neyman":
        method = "paired"
    fit = _Fit(estimate=est, contrib=np.concatenate(contrib), keys=np.concatenate(keys),
               components=tuple(comps), n_treated=n1, n_control=n0, method=method,
               variance_rule=variance_rule, se_ok=True)
    if warn_zero and fit.variance == 0.0:
        _warn("the estimated variance is zero (the outcome does not vary within arms, or "
              "the paired block effects are all equal); the standard error is 0 and the "
              "interval has zero width")
    return fit


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


def _json_value(value):
    """Plain Python numbers for JSON: ints stay ints, NaN/inf become None."""
    if value is None or isinstance(value, str):
        return value
    if isinstance(value, (bool, np.bool_)):
        return bool(value)
    if isinstance(value, (int, np.integer)):
        return int(value)
    if isinstance(value, (float, np.floating)):
        return float(value) if math.isfinite(value) else None
    return value


def _warn(message: str) -> None:
    warnings.warn(message, ReportKitWarning, stacklevel=3)


# ---------------------------------------------------------------------------
# Public: unadjusted estimates
# ---------------------------------------------------------------------------


def neyman_difference(y, z, *, alpha: float = 0.05) -> Estimate:
    """Difference in means with Neyman's conservative variance (complete randomization).

    ``tau_hat = mean(y | z=1) - mean(y | z=0)``;
    ``Var_hat = s1^2/n1 + s0^2/n0`` (Neyman 1923). The interval uses a t
    reference with Welch–Satterthwaite degrees of freedom (Welch 1947).
    Units with a missing outcome are dropped. Same as
    ``estimate_effects(y, z, mechanism="complete", alpha=alpha)[0]``.
    """
    return estimate_effects(y, z, mechanism="complete", alpha=alpha)[0]


def estimate_effects(y, z, *, mechanism: str, block=None, cluster=None,
                     alpha: float = 0.05) -> list[Estimate]:
    """Design-appropriate unadjusted estimates of the ATE.

    Parameters
    ----------
    y : array_like, shape (n,)
        Outcome; NaN marks a missing outcome (that unit is dropped).
    z : array_like, shape (n,)
        Assignment, 0/1.
    mechanism : str
        One of ``complete``, ``bernoulli``, ``blocked``, ``cluster``,
        ``blocked_cluster``, ``matched_pairs``.
    block, cluster : array_like, optional
        Block (pair) and cluster labels, required exactly for the mechanisms that
        use them.
    alpha : float
        Two-sided interval level is ``1 - alpha``.

    Returns
    -------
    list of Estimate
        ``complete``/``bernoulli``: difference in means, Neyman variance
        ``s1^2/n1 + s0^2/n0`` (Neyman 1923), Welch–Satterthwaite df.
        ``blocked``/``matched_pairs``: block-size-weighted average of within-block
        differences; variance ``sum_b w_b^2 (s1b^2/n1b + s0b^2/n0b)``, with blocks
        holding a single treated or control unit in the paired formula (Imai 2008).
        ``cluster``/``blocked_cluster``: two estimates, the unit-level difference in
        means with CR2 standard error (Bell & McCaffrey 2002; df = clusters - 2)
        and the Horvitz–Thompson difference in totals (Middleton & Aronow 2015).
    """
    y, design = _validate(y, z, mechanism, block, cluster, alpha)
    s = _sample(design, y, np.ones(design.n, dtype=bool))
    return [
        _to_estimate(_unadjusted(s, rule), design.alpha, estimand="ATE",
                     estimator="unadjusted", n_missing=s.n_missing)
        for rule in _unadjusted_rules(mechanism)
    ]


# ---------------------------------------------------------------------------
# Public: covariate adjustment (Lin 2013)
# ---------------------------------------------------------------------------


def estimate_adjusted(y, z, X, *, mechanism: str, block=None, cluster=None,
                      alpha: float = 0.05) -> Estimate:
    """Covariate-adjusted ATE: Lin's (2013) interacted regression.

    OLS of ``y`` on ``1, z, Xc, z * Xc`` where ``Xc`` are the covariates centred
    at their mean over the units used; the coefficient on ``z`` is the estimate.
    Standard error: HC2 (MacKinnon & White 1985), or CR2 (Bell & McCaffrey 2002)
    for cluster designs. Blocked designs add block indicators: centred and
    interacted with ``z`` when every block has at least two units (clusters) in
    each arm — so with no covariates the estimate equals the blocked difference
    in means — otherwise as additive fixed effects.

    Degrees of freedom: ``n - p`` (p regressors) without clusters; ``G - B - 1``
    with G clusters and B blocks (B = 1 if unblocked) for CR2 (common practice).

    Rows with a missing outcome are dropped. A missing covariate value among the
    kept rows raises :class:`DesignError` (no imputation). Covariates constant
    among the kept rows, and regressors that are linear combinations of others
    (or of the block indicators), are dropped with a warning; that leaves the
    fitted values unchanged.
    """
    y, design = _validate(y, z, mechanism, block, cluster, alpha)
    X = _covariates(X, design.n)
    s = _sample(design, y, np.ones(design.n, dtype=bool))
    missing = np.isnan(X[s.pos]).any(axis=1)
    if missing.any():
        raise DesignError(f"covariates have missing values in {int(missing.sum())} of the "
                          f"{s.pos.size} units with an observed outcome; impute or drop "
                          "them before adjustment")
    fit = _lin_fit(s, X[s.pos])
    return _to_estimate(fit, design.alpha, estimand="ATE", estimator="adjusted",
                        n_missing=s.n_missing)


def _covariates(X, n: int) -> np.ndarray:
    try:
        arr = np.asarray(X, dtype=float)
    except (TypeError, ValueError) as err:
        raise DataError(f"`X` must be numeric; {err}") from err
    if arr.ndim == 1:
        arr = arr[:, None]
    if arr.ndim != 2 or arr.shape[0] != n:
        raise UsageError(f"`X` must have shape (n, k) with n = {n}; got shape {arr.shape}")
    return arr


@dataclass(frozen=True, kw_only=True)
class _LinLayout:
    """Lin's regression as absorbed groups plus a few dense regressors.

    Fitted model: ``y = alpha_{group} + W beta``; the target is
    ``theta = sum_g c_g alpha_g + c_W' beta``.
    """

    groups: np.ndarray           # int codes 0..G-1, one per unit
    W: np.ndarray                # (n, q) dense regressors
    c_groups: np.ndarray         # (G,) target weights on group intercepts
    c_w: np.ndarray              # (q,) target weights on beta
    required: int = 0            # leading columns of W that must stay (the treatment)


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
    layout = _lin_layout(s, _drop_constant(X))
    n = s.y.size
    sizes = np.bincount(layout.groups).astype(float)
    w_mean = _group_means(layout.W, layout.groups, sizes)
    kept = _independent_columns(layout.W, layout.W - w_mean[layout.groups], layout.required)
    w_mean = w_mean[:, kept]
    w_dm = layout.W[:, kept] - w_mean[layout.groups]
    n_par = sizes.size + kept.size
    if n <= n_par:
        raise DesignError(f"the adjusted regression has {n_par} coefficients but only {n} "
                          "units; use fewer covariates")
    y_mean = _group_means(s.y[:, None], layout.groups, sizes)[:, 0]
    qmat, r_mat = np.linalg.qr(w_dm)
    r_inv = linalg.solve_triangular(r_mat, np.eye(kept.size))
    beta = r_inv @ (qmat.T @ s.y)
    resid = s.y - y_mean[layout.groups] - w_dm @ beta
    v = layout.c_w[kept] - layout.c_groups @ w_mean
    estimate = float(layout.c_groups @ y_mean + v @ beta)
    r = layout.c_groups[layout.groups] / sizes[layout.groups] + qmat @ (r_inv.T @ v)
    group_share = 1.0 / sizes[layout.groups]
    if s.cluster is None:
        contrib, keys = _hc2_contributions(group_share + np.sum(qmat ** 2, axis=1), r, resid, s.pos)
        df, method, rule = float(n - n_par), "lin_hc2", "hc2"
    else:
        contrib, keys = _cr2_contributions(qmat, group_share, r, resid, s.cluster)
        n_blocks = 1 if s.block is None else np.unique(s.block).size
        df = float(np.unique(s.cluster).size - n_blocks - 1)
        method, rule = "lin_cr2", "cr2"
    if df < 1:
        _warn(f"the adjusted estimate has {df:g} degrees of freedom; no interval is reported")
    return _Fit(estimate=estimate, contrib=contrib, keys=keys,
                components=((float(np.sum(contrib ** 2)), df),),
                n_treated=int(s.z.sum()), n_control=int((~s.z).sum()),
                method=method, variance_rule=rule, se_ok=True)


def _drop_constant(X: np.ndarray) -> np.ndarray:
    constant = np.ptp(X, axis=0) == 0
    if constant.any():
        _warn(f"{int(constant.sum())} covariate(s) are constant among the units used and are "
              "left out of the adjustment")
    X = X[:, ~constant]
    return X - X.mean(axis=0)


def _lin_layout(s: _Sample, xc: np.ndarray) -> _LinLayout:
    """Interacted cells when every block has >= 2 units (clusters) per arm, else additive."""
    zf = s.z.astype(float)[:, None]
    block = np.zeros(s.y.size, dtype=np.int64) if s.block is None else s.block
    if _blocks_splittable(s):
        cell_codes, cells = np.unique(block * 2 + s.z, return_inverse=True)
        labels, counts = np.unique(block, return_counts=True)
        share = counts[np.searchsorted(labels, cell_codes // 2)] / s.y.size
        c_groups = np.where(cell_codes % 2 == 1, 1.0, -1.0) * share
        return _LinLayout(groups=cells, W=np.column_stack([zf * xc, (1.0 - zf) * xc]),
                          c_groups=c_groups, c_w=np.zeros(2 * xc.shape[1]))
    _, blocks = np.unique(block, return_inverse=True)
    shares = np.bincount(blocks, weights=s.z) / np.bincount(blocks)
    if np.ptp(shares) > 1e-12:
        _warn("some blocks have fewer than two units (clusters) in an arm, so block indicators "
              "enter additively; as the share of treated units varies across blocks, the "
              "adjusted estimate weights blocks by precision rather than size")
    W = np.column_stack([zf, xc, zf * xc])
    c_w = np.zeros(W.shape[1])
    c_w[0] = 1.0
    return _LinLayout(groups=blocks, W=W, c_groups=np.zeros(int(blocks.max()) + 1), c_w=c_w,
                      required=1)


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
    rest_index = np.flatnonzero(alive)[required:]
    rest = unit[:, required:]
    if required:
        rest = rest - head @ np.linalg.lstsq(head, rest, rcond=None)[0]
    kept = []
    if rest.shape[1]:
        _, r_mat, piv = linalg.qr(rest, mode="economic", pivoting=True)
        rank = int(np.sum(np.abs(np.diag(r_mat)) > 1e-9))
        kept = sorted(rest_index[piv[:rank]].tolist())
    dropped = q - required - len(kept)
    if dropped:
        _warn(f"{dropped} regressor(s) of the adjusted regression are collinear with other "
              "covariates or with block indicators and are left out (fitted values are "
              "unchanged)")
    return np.array(list(range(required)) + kept, dtype=int)


def _hc2_contributions(lev, r, resid, pos) -> tuple[np.ndarray, np.ndarray]:
    one = lev > 1.0 - 1e-10
    if one.any():
        _warn(f"{int(one.sum())} unit(s) have leverage 1 (their residual is 0 by construction); "
              "HC2 treats their contribution as 0, so the standard error may be too small")
    contrib = np.where(one, 0.0, r * resid / np.sqrt(np.where(one, 1.0, 1.0 - lev)))
    return contrib, _keys(_UNIT, pos)


def _cr2_contributions(qmat, group_share, r, resid, cluster) -> tuple[np.ndarray, np.ndarray]:
    groups = _groups(cluster)
    codes = np.array([code for code, _ in groups], dtype=np.int64)
    contrib = np.empty(codes.size)
    singular = False
    for j, (_, idx) in enumerate(groups):
        qg = qmat[idx]
        hat = np.full((idx.size, idx.size), group_share[idx[0]]) + qg @ qg.T
        adjust, sing = _inv_sqrt_psd(np.eye(idx.size) - hat)
        singular |= sing
        contrib[j] = r[idx] @ (adjust @ resid[idx])
    if singular:
        _warn("I - H_gg is singular for some cluster (e.g. alone in its block and arm); CR2 "
              "uses the generalised inverse square root there")
    return contrib, _keys(_CLUSTER, codes)


def _inv_sqrt_psd(m: np.ndarray) -> tuple[np.ndarray, bool]:
    """Symmetric (generalised) inverse square root of a PSD matrix via eigh."""
    vals, vecs = np.linalg.eigh(m)
    ok = vals > 1e-10 * max(1.0, float(vals.max(initial=0.0)))
    inv = np.where(ok, 1.0 / np.sqrt(np.where(ok, vals, 1.0)), 0.0)
    return (vecs * inv) @ vecs.T, bool((~ok).any())
# Public: noncompliance
# ---------------------------------------------------------------------------


def estimate_noncompliance(y, z, d, *, mechanism: str, block=None, cluster=None,
                           alpha: float = 0.05) -> Noncompliance:
    """ITT on the outcome and on take-up, and the CACE (Angrist, Imbens & Rubin 1996).

    ``CACE = ITT_y / ITT_d`` (Wald ratio) with the design's primary unadjusted
    estimator for both ITTs (difference in means; CR2 for cluster designs).
    Delta-method variance: the ITTs are linear in the outcome, so
    ``Var(ITT_y - c ITT_d)`` is the design variance of ``u = y - c d`` at
    ``c = CACE``, and ``SE(CACE) = SE_design(u) / |ITT_d|``. For complete
    randomization this equals the 2SLS sandwich variance with HC2 leverages
    taken from the instruments. df: those of the design rule applied to ``u``.

    Units with a missing outcome or missing take-up are dropped (both ITTs use
    the same units). A zero take-up difference leaves the CACE undefined
    (warning); a first stage with ``(ITT_d / SE)^2 < 10`` warns as weak
    (common practice).
    """
    y, design = _validate(y, z, mechanism, block, cluster, alpha)
    d = _binary(d, "d", allow_missing=True, n=design.n)
    keep = ~np.isnan(d)
    rule = _primary_rule(mechanism)
    s_y = _sample(design, y, keep)
    s_d = _sample(design, d, ~np.isnan(y))
    n_missing = design.n - s_y.y.size
    fit_y, fit_d = _unadjusted(s_y, rule), _unadjusted(s_d, rule, warn_zero=False)
    itt = _to_estimate(fit_y, design.alpha, estimand="ITT", estimator="unadjusted",
                       n_missing=n_missing)
    takeup = _to_estimate(fit_d, design.alpha, estimand="ITT", estimator="unadjusted",
                          n_missing=n_missing)
    cace = _cace(design, y, d, keep, fit_y, takeup, n_missing)
    used_d, used_z = s_d.y, s_d.z
    rate_t = float(used_d[used_z].mean()) if used_z.any() else None
    rate_c = float(used_d[~used_z].mean()) if (~used_z).any() else None
    return Noncompliance(itt=itt, itt_takeup=takeup, cace=cace,
                         rate_treated=rate_t, rate_control=rate_c)


def _cace(design, y, d, keep, fit_y, takeup: Estimate, n_missing) -> Estimate:
    undefined = Estimate(estimand="CACE", estimator="unadjusted", estimate=None,
                         std_error=None, ci_low=None, ci_high=None, df=None,
                         n_treated=fit_y.n_treated, n_control=fit_y.n_control,
                         method="wald_delta", n_missing=n_missing, variance_rule="delta")
    if fit_y.estimate is None or takeup.estimate is None:
        return undefined
    if abs(takeup.estimate) <= 1e-12:
        _warn("assignment does not change take-up (ITT on take-up is 0); the CACE is undefined")
        return undefined
    if takeup.std_error is not None and takeup.std_error > 0:
        f_stat = (takeup.estimate / takeup.std_error) ** 2
        if f_stat < WEAK_FIRST_STAGE_F:
            _warn(f"weak first stage: (ITT on take-up / SE)^2 = {f_stat:.2f} < "
                  f"{WEAK_FIRST_STAGE_F:g}; the CACE interval may be unreliable")
    ratio = fit_y.estimate / takeup.estimate
    fit_u = _unadjusted(_sample(design, y - ratio * d, keep), _primary_rule(design.mechanism))
    se = None if fit_u.variance is None else math.sqrt(fit_u.variance) / abs(takeup.estimate)
    df = fit_u.df
    low, high = _interval(ratio, se, df, design.alpha)
    return Estimate(estimand="CACE", estimator="unadjusted", estimate=float(ratio),
                    std_error=se, ci_low=low, ci_high=high, df=df,
                    n_treated=fit_y.n_treated, n_control=fit_y.n_control,
                    method="wald_delta", n_missing=n_missing, variance_rule="delta")


# ---------------------------------------------------------------------------
# Public: subgroups
# ---------------------------------------------------------------------------


def estimate_subgroups(y, z, g, *, mechanism: str, block=None, cluster=None,
                       alpha: float = 0.05) -> SubgroupResult:
    """Effect within each level of a pre-specified subgroup variable.

    Each level gets the design's primary unadjusted estimate computed on its own
    units (Neyman / blocked / paired; CR2 for cluster designs). The difference
    between level l and the first level (sorted) has variance
    ``V_l + V_0 - 2 C``, where ``C = 0`` unless clusters (or cluster blocks)
    hold units of both levels, in which case ``C = sum_g c_g^(l) c_g^(0)`` over
    the shared clusters (the cross term of the CR2 sandwich). df:
    Welch–Satterthwaite combination ``(V_l + V_0)^2 / (V_l^2/df_l + V_0^2/df_0)``.
    Units with a missing label (None/NaN) are left out and counted.
    """
    y, design = _validate(y, z, mechanism, block, cluster, alpha)
    codes, labels = _group_codes(g, design.n)
    rule = _primary_rule(mechanism)
    samples = [_sample(design, y, codes == k) for k in range(len(labels))]
    fits = [_unadjusted(s, rule) for s in samples]
    estimates = tuple(
        _to_estimate(fit, design.alpha, estimand="subgroup ATE", estimator="unadjusted",
                     n_missing=s.n_missing)
        for s, fit in zip(samples, fits)
    )
    shared = mechanism in CLUSTERED
    differences = tuple(
        _difference(fits[k], fits[0], labels[k], labels[0], design.alpha, shared)
        for k in range(1, len(labels))
    )
    return SubgroupResult(levels=tuple(labels), estimates=estimates, differences=differences,
                          n_missing_group=int(np.sum(codes < 0)))


def _group_codes(g, n: int) -> tuple[np.ndarray, list[str]]:
    series = pd.Series(np.asarray(g, dtype=object))
    if series.size != n:
        raise UsageError(f"`g` must have one label per unit ({n}); got {series.size}")
    try:
        codes, uniques = pd.factorize(series, sort=True)
    except TypeError:
        codes, uniques = pd.factorize(series, sort=False)
    if len(uniques) == 0:
        raise DataError("`g` has no non-missing labels; a subgroup analysis needs at least one")
    return codes, [_level_label(v) for v in uniques]


def _level_label(value) -> str:
    if isinstance(value, (float, np.floating)) and float(value).is_integer():
        return str(int(value))
    return str(value)


def _difference(fit: _Fit, ref: _Fit, level: str, reference: str, alpha: float,
                shared: bool) -> SubgroupDifference:
    if fit.estimate is None or ref.estimate is None:
        return SubgroupDifference(level=level, reference=reference, estimate=None,
                                  std_error=None, ci_low=None, ci_high=None, df=None)
    est = fit.estimate - ref.estimate
    se = df = None
    if fit.se_ok and ref.se_ok:
        cov = _shared_covariance(fit, ref) if shared else 0.0
        variance = max(fit.variance + ref.variance - 2.0 * cov, 0.0)
        se = math.sqrt(variance)
        df = _satterthwaite(((fit.variance, fit.df or 0.0), (ref.variance, ref.df or 0.0)))
    low, high = _interval(est, se, df, alpha)
    return SubgroupDifference(level=level, reference=reference, estimate=est, std_error=se,
                              ci_low=low, ci_high=high, df=df)


def _shared_covariance(a: _Fit, b: _Fit) -> float:
    common, ia, ib = np.intersect1d(a.keys, b.keys, assume_unique=True, return_indices=True)
    return float(np.dot(a.contrib[ia], b.contrib[ib])) if common.size else 0.0


# ---------------------------------------------------------------------------
# Public: the results.json ``estimates`` list
# ---------------------------------------------------------------------------


def study_estimates(study) -> list[dict]:
    """The ``estimates`` list of ``results.json`` for a validated study.

    For each outcome (in spec order): the unadjusted estimate(s) (two for
    cluster designs: CR2 then Horvitz–Thompson), the Lin estimate when
    ``analysis.adjust`` is true and covariates are listed, and the CACE when
    ``compliance`` is set. With ``compliance`` set the unadjusted and adjusted
    rows carry estimand ``"ITT"`` (the effect of assignment) instead of
    ``"ATE"``, and one ``"ITT"`` row on take-up (outcome = the received column,
    all units with observed take-up) follows the outcomes. Then one
    ``"subgroup ATE"`` row per outcome, subgroup variable and level
    (``subgroup = "col=value"``). Each dict has exactly :data:`ESTIMATE_KEYS`.
    """
    spec = study.spec
    kw = _study_design(study)
    z = study.z
    compliance = spec.compliance
    effect = "ITT" if compliance is not None else "ATE"
    covariates = spec.analysis.covariates if spec.analysis.adjust else ()
    X = study.frame[list(covariates)].to_numpy(dtype=float) if covariates else None
    rows: list[dict] = []
    for outcome in spec.outcomes:
        y = study.outcome(outcome.column)
        rows += [_row(outcome.column, est, effect) for est in estimate_effects(y, z, **kw)]
        if X is not None:
            _check_covariates(study, outcome.column, covariates, y, X)
            adjusted = _adjusted_or_note(outcome.column, y, z, X, kw)
            if adjusted is not None:
                rows.append(_row(outcome.column, adjusted, effect))
        if compliance is not None:
            d = study.frame[compliance.received].to_numpy(dtype=float)
            cace = estimate_noncompliance(y, z, d, **kw).cace
            rows.append(_row(outcome.column, cace, "CACE"))
    if compliance is not None:
        rows.append(_row(compliance.received, _takeup(study, compliance.received, kw), "ITT"))
    for column in spec.subgroups:
        g = study.frame[column].to_numpy(dtype=object)
        for outcome in spec.outcomes:
            result = estimate_subgroups(study.outcome(outcome.column), z, g, **kw)
            rows += [_row(outcome.column, est, "subgroup ATE", subgroup=f"{column}={level}")
                     for level, est in zip(result.levels, result.estimates)]
    return rows


def study_subgroup_differences(study) -> list[dict]:
    """Subgroup contrasts for every outcome and subgroup variable of a study.

    One dict per (outcome, subgroup variable, level other than the first):
    ``{outcome, subgroup: "col=level", reference: "col=first", estimate,
    std_error, ci_low, ci_high, df}``. Not part of the ``results.json`` schema 1
    ``estimates`` list; offered for a report table.
    """
    spec = study.spec
    kw = _study_design(study)
    rows = []
    for column in spec.subgroups:
        g = study.frame[column].to_numpy(dtype=object)
        for outcome in spec.outcomes:
            result = estimate_subgroups(study.outcome(outcome.column), study.z, g, **kw)
            for diff in result.differences:
                item = diff.to_dict()
                rows.append({"outcome": outcome.column,
                             "subgroup": f"{column}={item.pop('level')}",
                             "reference": f"{column}={item.pop('reference')}", **item})
    return rows


def _adjusted_or_note(column: str, y, z, X, kw: dict) -> Estimate | None:
    """The Lin estimate, or None with a warning when the design cannot carry the regression.

    Too many covariates for the units (or a degenerate design) must not cost the
    report its unadjusted estimates, which are the primary analysis.
    """
    try:
        return estimate_adjusted(y, z, X, **kw)
    except DesignError as err:
        warnings.warn(f"outcome '{column}': no covariate-adjusted estimate ({err}); "
                      "reduce analysis.covariates or set analysis.adjust: false", ReportKitWarning, stacklevel=3)
        return None


def _study_design(study) -> dict:
    mechanism = study.spec.design.mechanism
    return dict(mechanism=mechanism,
                block=study.block if mechanism in BLOCKED else None,
                cluster=study.cluster if mechanism in CLUSTERED else None,
                alpha=study.spec.analysis.alpha)


def _takeup(study, received: str, kw: dict) -> Estimate:
    d = _binary(study.frame[received].to_numpy(dtype=float), received, allow_missing=True)
    y, design = _validate(d, study.z, kw["mechanism"], kw["block"], kw["cluster"], kw["alpha"])
    s = _sample(design, y, np.ones(design.n, dtype=bool))
    fit = _unadjusted(s, _primary_rule(design.mechanism), warn_zero=False)
    return _to_estimate(fit, design.alpha, estimand="ITT", estimator="unadjusted",
                        n_missing=s.n_missing)


def _check_covariates(study, outcome, covariates, y, X) -> None:
    missing = np.isnan(X[~np.isnan(y)]).any(axis=0)
    if missing.any():
        names = [c for c, bad in zip(covariates, missing) if bad]
        raise DesignError(f"covariate(s) {names} have missing values among units with an "
                          f"observed {outcome!r}; the adjusted estimate needs complete "
                          "baseline covariates")


def _row(outcome: str, est: Estimate, estimand: str, *, subgroup: str | None = None) -> dict:
    values = est.to_dict()
    row = {"outcome": outcome, "estimand": estimand, "estimator": est.estimator,
           "subgroup": subgroup}
    row.update({key: values[key] for key in ESTIMATE_KEYS if key not in row})
    return row


def compliance_rates(z, d) -> dict:
    """Share of each arm that received the treatment (units with known take-up).

    ``rate_treated = mean(d | z = 1)`` is the take-up among those assigned to
    treatment; ``rate_control = mean(d | z = 0)`` the crossover among controls.
    Their difference is the ITT on take-up, the denominator of the Wald CACE
    (Angrist, Imbens & Rubin 1996).
    """
    z = np.asarray(z, dtype=float)
    d = np.asarray(d, dtype=float)
    if z.shape != d.shape:
        raise DesignError(f"`z` and `d` must have the same length; got {z.size} and {d.size}")
    known = ~np.isnan(d)
    treated, control = known & (z == 1), known & (z == 0)
    return {
        "rate_treated": float(d[treated].mean()) if treated.any() else None,
        "rate_control": float(d[control].mean()) if control.any() else None,
        "n_treated": int(treated.sum()),
        "n_control": int(control.sum()),
    }


def study_compliance(study) -> dict | None:
    """The ``compliance`` section (extension): take-up by arm, or None without a compliance column."""
    if study.spec.compliance is None:
        return None
    column = study.spec.compliance.received
    return {"received": column, **compliance_rates(study.z, study.frame[column].to_numpy(dtype=float))}
