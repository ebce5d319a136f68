"""Factorial effects of a 2^F factorial trial (Dasgupta, Pillai & Rubin 2015).

Owns the main effects and interactions of factors declared in
``design.factors``: Neyman-type estimators as contrasts of the cell (arm)
means, with the conservative Neyman variance (the CR2 variance when the
cells are assigned to whole clusters). Formulas and sources in
``docs/methods/arms.md``. Pure numpy, no I/O.
"""

from __future__ import annotations

import itertools
import math
import warnings
from dataclasses import dataclass

import numpy as np

from report_kit.errors import DesignError, ReportKitWarning
from report_kit.estimation.arms import check_arm_labels
from report_kit.estimation.core import Estimate, _bm_df, _bm_terms, _check_alpha, _interval, _satterthwaite
from report_kit.validate import Record

__all__ = ["FactorialEffect", "factorial_terms", "estimate_factorial"]


@dataclass(frozen=True, kw_only=True)
class FactorialEffect(Record):
    """A main effect (``factor`` = one name) or interaction (names joined by ':').

    In ``results.json`` the estimate's entries follow ``factor`` in one dict.
    """

    record_merged = ("estimate",)

    factor: str
    estimate: Estimate


def factorial_terms(factors) -> list[tuple[str, tuple[int, ...]]]:
    """Every factorial effect: the main effects, then interactions by order.

    Returns ``(name, members)`` with ``members`` the positions of the factors the
    effect involves (``"text:call"`` -> ``(0, 1)``).
    """
    names = [name for name, _ in factors]
    terms = []
    for order in range(1, len(names) + 1):
        for members in itertools.combinations(range(len(names)), order):
            terms.append((":".join(names[m] for m in members), members))
    return terms


def _check_factors(factors, arms) -> dict[str, tuple[int, ...]]:
    factors = [(str(name), tuple(str(a) for a in on)) for name, on in factors]
    if len(factors) < 2:
        raise ValueError(f"`factors` must declare at least two factors; got {len(factors)}")
    cells = {a: tuple(int(a in on) for _, on in factors) for a in (str(x) for x in arms)}
    if sorted(cells.values()) != sorted(itertools.product((0, 1), repeat=len(factors))):
        raise ValueError("the arms must form the full grid of on/off combinations of `factors`, one arm each")
    return cells


_METHODS = {(False, False): "factorial_neyman", (True, False): "blocked_factorial_neyman",
            (False, True): "cluster_factorial_cr2", (True, True): "blocked_cluster_factorial_cr2"}


@dataclass(frozen=True)
class _Cell:
    """One cell of one block: observed units, mean and the pieces of its variance.

    ``var`` is the sample variance ``s_c^2`` (Neyman; ``None`` with fewer than
    two units). With clusters, ``parts`` are the cell's CR2 contributions before
    the effect's weight, ``E_g f_g`` per cluster with ``f_g = 1 / (N_c sqrt(1 -
    n_g / N_c))`` (``None`` with fewer than two clusters), ``sizes`` the
    clusters' units ``n_g`` and ``factor`` the ``f_g``.
    """

    n: int
    mean: float | None
    var: float | None = None
    parts: np.ndarray | None = None
    sizes: np.ndarray | None = None
    factor: np.ndarray | None = None


def estimate_factorial(y, arm, *, arms, factors, block=None, cluster=None,
                       alpha: float = 0.05) -> list[FactorialEffect]:
    """Main effects and interactions of a 2^F factorial design, optionally within blocks or by clusters.

    With cells (arms) ``c``, coding ``g_f(c) = +1`` where factor ``f`` is on and
    ``-1`` where it is off, and ``g_S(c) = prod_{f in S} g_f(c)`` for an
    interaction of the factors ``S``, the effect and its Neyman-type variance are

    ``tau_S = 2^{-(F-1)} sum_c g_S(c) ybar_c``,
    ``Var_hat(tau_S) = 4^{-(F-1)} sum_c s_c^2 / n_c``

    (Dasgupta, Pillai & Rubin 2015; conservative, exact when
    effects are additive). A main effect is the average over the other factors'
    levels of the effect of turning the factor on. It equals twice the OLS
    coefficient of ``g_f`` in the saturated regression on the ±1 codes, whose
    HC2 variance equals the Neyman variance. df: Welch–Satterthwaite over the
    cells. Units with a missing outcome are dropped. Effects are ``None`` when
    a cell has no observed unit; standard errors when one has a single unit.
    Method ``factorial_neyman``.

    With ``cluster`` (the cells assigned to whole clusters) the estimate is the
    same contrast of unit-level cell means, ``L' beta`` of the saturated
    cell-means regression ``y_i = sum_c beta_c 1[cell_i = c]`` with
    ``L_c = g_S(c) / 2^{F-1}``, and the variance its CR2 variance clustered by
    cluster (Bell & McCaffrey 2002), the rule of the two-arm ``cluster`` design
    (:func:`report_kit.estimation.neyman.estimate_effects`). The clusters are
    nested in the cells, so ``H_gg = J / N_c`` and cluster ``g`` of cell ``c``
    contributes ``L_c E_g / (N_c sqrt(1 - n_g / N_c))`` (``E_g`` the sum of its
    residuals ``y_i - ybar_c``, ``n_g`` its units, ``N_c`` the cell's);
    ``Var_hat = sum_g contribution_g^2``. df: Bell & McCaffrey (2002),
    ``tr(G'G)^2 / ||G'G||_F^2``. Every cell needs two clusters for a standard
    error. Method ``cluster_factorial_cr2``.

    With ``block`` (the cells randomized within each block) the effect is the
    block-size-weighted combination of the within-block effects and the
    variance the weighted sum of the per-block variances,

    ``tau_S = sum_b (n_b / n) tau_Sb``,
    ``Var_hat(tau_S) = sum_b (n_b / n)^2 Var_hat(tau_Sb)``

    with ``n_b`` the block's units with an observed outcome (the blocked
    estimator of Imbens & Rubin 2015, ch. 9, applied to the factorial contrast;
    blocks are independent experiments, so the variances add). df:
    Welch–Satterthwaite over every cell of every block (method
    ``blocked_factorial_neyman``); with clusters the Bell–McCaffrey df of the
    weighted sum, whose ``G'G`` is block-diagonal (method
    ``blocked_cluster_factorial_cr2``).
    """
    _check_alpha(alpha)
    labels = check_arm_labels(arm, arms)
    cells = _check_factors(factors, arms)
    y = np.asarray(y, dtype=float)
    if y.shape != labels.shape:
        raise ValueError(f"`y` and `arm` must have the same length; got {y.size} and {labels.size}")
    block_codes = np.zeros(labels.size, dtype=np.intp) if block is None else _codes(block, "block", labels.size)
    cluster_codes = None if cluster is None else _codes(cluster, "cluster", labels.size)
    if cluster_codes is not None:
        _check_nesting(cluster, cluster_codes, labels, block_codes)
    seen = ~np.isnan(y)
    total = int(seen.sum())
    blocks = []
    for b in range(int(block_codes.max()) + 1):
        members = seen & (block_codes == b)
        if members.any():
            stats = {a: _cell(y, members & (labels == a), cluster_codes) for a in cells}
            blocks.append((members.sum() / total, stats))
    if not blocks:
        blocks = [(1.0, {a: _Cell(0, None) for a in cells})]
    if cluster_codes is not None and any(c.mean is not None and c.parts is None for _, st in blocks
                                         for c in st.values()):
        warnings.warn("a factorial cell has fewer than two clusters with an observed outcome"
                      f"{' in a block' if block is not None else ''}; the CR2 standard errors of the factorial "
                      "effects are undefined", ReportKitWarning, stacklevel=2)
    scale = 2.0 ** (len(factors) - 1)
    method = _METHODS[(block is not None, cluster is not None)]
    names = [(str(n), ()) for n, _ in factors]
    return [_effect(name, members, cells, blocks, scale, alpha, method)
            for name, members in factorial_terms(names)]


def _codes(values, name: str, n: int) -> np.ndarray:
    if isinstance(values, (str, bytes)) or not hasattr(values, "__len__") or len(values) != n:
        raise ValueError(f"`{name}` must be an array of {name} labels of length {n}")
    return np.unique(np.asarray([str(v) for v in values], dtype=object), return_inverse=True)[1].ravel()


def _check_nesting(cluster, codes: np.ndarray, labels: np.ndarray, block_codes: np.ndarray) -> None:
    """Every cluster lies in one cell (arm) and one block, else a :class:`DesignError` naming it."""
    arm_codes = np.unique(labels, return_inverse=True)[1].ravel()
    for what, other in (("arm", arm_codes), ("block", block_codes)):
        high = np.full(int(codes.max()) + 1, -1)
        low = np.full(int(codes.max()) + 1, int(other.max()) + 1)
        np.maximum.at(high, codes, other)
        np.minimum.at(low, codes, other)
        split = np.flatnonzero(high != low)
        if split.size:
            label = np.asarray(cluster, dtype=object)[codes == split[0]][0]
            raise DesignError(f"cluster {str(label)!r} spans more than one {what}; a cluster is assigned as a "
                              f"whole{' within one block' if what == 'block' else ''}")


def _cell(y: np.ndarray, mask: np.ndarray, cluster_codes: np.ndarray | None) -> _Cell:
    vals = y[mask]
    n = int(vals.size)
    if n == 0:
        return _Cell(0, None)
    mean = float(vals.mean())
    var = float(vals.var(ddof=1)) if n > 1 else None
    if cluster_codes is None:
        return _Cell(n, mean, var)
    codes, inverse = np.unique(cluster_codes[mask], return_inverse=True)
    if codes.size < 2:
        return _Cell(n, mean, var)
    sizes = np.bincount(inverse).astype(float)
    factor = 1.0 / (n * np.sqrt(1.0 - sizes / n))
    return _Cell(n, mean, var, np.bincount(inverse, weights=vals - mean) * factor, sizes, factor)


def _effect(name, members, cells, blocks, scale, alpha, method) -> FactorialEffect:
    sign = {a: math.prod(1 if cell[m] else -1 for m in members) for a, cell in cells.items()}
    n_on = sum(stats[a].n for _, stats in blocks for a in cells if sign[a] > 0)
    n_off = sum(stats[a].n for _, stats in blocks for a in cells if sign[a] < 0)
    estimand = "main effect" if len(members) == 1 else "interaction"
    clustered = method.endswith("cr2")
    est = se = df = None
    if all(stats[a].mean is not None for _, stats in blocks for a in cells):
        est = sum(w * sum(sign[a] * stats[a].mean for a in cells) / scale for w, stats in blocks)
        if clustered and all(stats[a].parts is not None for _, stats in blocks for a in cells):
            se = math.sqrt(sum(float(np.sum((w * sign[a] / scale * stats[a].parts) ** 2))
                               for w, stats in blocks for a in cells))
            df = _cr2_df(blocks, cells, sign, scale)
        elif not clustered and all(stats[a].var is not None for _, stats in blocks for a in cells):
            comps = [(w ** 2 * stats[a].var / stats[a].n / scale ** 2, stats[a].n - 1) for w, stats in blocks
                     for a in cells]
            se = math.sqrt(sum(v for v, _ in comps))
            df = _satterthwaite(comps)
    low, high = _interval(est, se, df, alpha)
    estimate = Estimate(estimand=estimand, estimator="unadjusted", estimate=est, std_error=se, ci_low=low,
                        ci_high=high, df=df, n_treated=n_on, n_control=n_off, method=method,
                        variance_rule="cr2" if clustered else "neyman")
    return FactorialEffect(factor=name, estimate=estimate)


def _cr2_df(blocks, cells, sign, scale) -> float:
    """Bell–McCaffrey df of the weighted CR2 contrast, summing the blocks' ``G'G`` traces and norms.

    Within a block the CR2 vector of cluster ``g`` in cell ``c`` is ``u_g = s_g 1``
    with ``s_g = L_c f_g``, so ``d_g = s_g^2 n_g`` and ``t_g = s_g n_g`` enter
    :func:`report_kit.estimation.core._bm_terms` (cells as the absorbed groups).
    The block weight ``w_b`` scales the block's ``G'G`` by ``w_b^2``.
    """
    trace = frob = 0.0
    for w, stats in blocks:
        s = [sign[a] / scale * stats[a].factor for a in cells]
        sizes = [stats[a].sizes for a in cells]
        d = np.concatenate([v * v * m for v, m in zip(s, sizes)])
        t = np.concatenate([v * m for v, m in zip(s, sizes)])
        cell = np.repeat(np.arange(len(sizes)), [m.size for m in sizes])
        cell_size = np.concatenate([np.full(m.size, stats[a].n, dtype=float) for a, m in zip(cells, sizes)])
        tr_b, frob_b = _bm_terms(d, t, cell, cell_size, None)
        trace += w ** 2 * tr_b
        frob += w ** 4 * frob_b
    return _bm_df(trace, frob)
