"""Factorial effects of a 2^F factorial trial (Dasgupta, Pillai & Rubin 2015).

Owns the main effects and interactions of factors declared in
``design.factors``: Neyman-type estimators as contrasts of the cell (arm)
means, with the conservative Neyman variance. Formulas and sources in
``docs/methods/arms.md``. Pure numpy, no I/O.
"""

from __future__ import annotations

import itertools
import math
from dataclasses import dataclass

import numpy as np

from report_kit.estimation.arms import check_arm_labels
from report_kit.estimation.core import Estimate, _interval, _satterthwaite
from report_kit.validate import Record

__all__ = ["FactorialEffect", "factorial_terms", "estimate_factorial"]

FACTORIAL_MECHANISMS = ("complete", "bernoulli", "blocked")


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


def estimate_factorial(y, arm, *, arms, factors, block=None, alpha: float = 0.05) -> list[FactorialEffect]:
    """Main effects and interactions of a 2^F factorial design, optionally within blocks.

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

    With ``block`` (a blocked factorial design, the cells randomized within
    each block) the effect is the block-size-weighted combination of the
    within-block effects and the variance the weighted sum of the per-block
    Neyman variances,

    ``tau_S = sum_b (n_b / n) tau_Sb``,
    ``Var_hat(tau_S) = sum_b (n_b / n)^2 Var_hat(tau_Sb)``

    with ``n_b`` the block's units with an observed outcome (the blocked
    estimator of Imbens & Rubin 2015, ch. 9, applied to the factorial contrast;
    blocks are independent experiments, so the variances add). df:
    Welch–Satterthwaite over every cell of every block. Method
    ``blocked_factorial_neyman``.
    """
    if isinstance(alpha, bool) or not isinstance(alpha, (int, float)) or not 0 < alpha < 1:
        raise ValueError(f"`alpha` must be a number strictly between 0 and 1; got {alpha!r}")
    labels = check_arm_labels(arm, arms)
    cells = _check_factors(factors, arms)
    y = np.asarray(y, dtype=float)
    if y.shape != labels.shape:
        raise ValueError(f"`y` and `arm` must have the same length; got {y.size} and {labels.size}")
    seen = ~np.isnan(y)
    if block is None:
        groups = [seen]
    else:
        if isinstance(block, (str, bytes)) or not hasattr(block, "__len__") or len(block) != labels.size:
            raise ValueError(f"`block` must be an array of block labels of length {labels.size}")
        codes = np.unique(np.asarray([str(b) for b in block], dtype=object), return_inverse=True)[1].ravel()
        groups = [seen & (codes == b) for b in range(int(codes.max()) + 1)]
    total = int(seen.sum())
    blocks = []
    for members in groups:
        if not members.any():
            continue
        stats = {}
        for a in cells:
            vals = y[members & (labels == a)]
            stats[a] = (vals.size, float(vals.mean()) if vals.size else None,
                        float(vals.var(ddof=1)) if vals.size > 1 else None)
        blocks.append((members.sum() / total if total else 1.0, stats))
    if not blocks:
        blocks = [(1.0, {a: (0, None, None) for a in cells})]
    scale = 2.0 ** (len(factors) - 1)
    method = "factorial_neyman" if block is None else "blocked_factorial_neyman"
    names = [(str(n), ()) for n, _ in factors]
    return [_effect(name, members, cells, blocks, scale, alpha, method)
            for name, members in factorial_terms(names)]


def _effect(name, members, cells, blocks, scale, alpha, method) -> FactorialEffect:
    sign = {a: math.prod(1 if cell[m] else -1 for m in members) for a, cell in cells.items()}
    n_on = sum(stats[a][0] for _, stats in blocks for a in cells if sign[a] > 0)
    n_off = sum(stats[a][0] for _, stats in blocks for a in cells if sign[a] < 0)
    estimand = "main effect" if len(members) == 1 else "interaction"
    if any(stats[a][1] is None for _, stats in blocks for a in cells):
        est = se = df = None
    else:
        est = sum(w * sum(sign[a] * stats[a][1] for a in cells) / scale for w, stats in blocks)
        comps = None if any(stats[a][2] is None for _, stats in blocks for a in cells) else [
            (w ** 2 * stats[a][2] / stats[a][0] / scale ** 2, stats[a][0] - 1) for w, stats in blocks for a in cells]
        se = None if comps is None else math.sqrt(sum(v for v, _ in comps))
        df = None if comps is None else _satterthwaite(comps)
    low, high = _interval(est, se, df, alpha)
    estimate = Estimate(estimand=estimand, estimator="unadjusted", estimate=est, std_error=se, ci_low=low,
                        ci_high=high, df=df, n_treated=n_on, n_control=n_off, method=method,
                        variance_rule="neyman")
    return FactorialEffect(factor=name, estimate=estimate)
