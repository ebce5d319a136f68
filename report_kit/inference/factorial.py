"""Randomization tests and test-inversion intervals of factorial main effects.

Owns :func:`factor_mechanism` (the conditional mechanism that re-randomizes one
factor, holding every unit's levels of the other factors) and
:func:`main_effect_tests` (per factor: the test of the sharp null that the
factor changes no unit's outcome, whatever the other factors' levels, with the
main-effect estimate as statistic, and the interval of constant additive
effects of the factor that the test does not reject). Interactions have no
sharp-null test (see ``docs/methods/arms.md``). The draws, counting rules and
inversion are the engine's (:mod:`report_kit.inference.randomization`,
:mod:`report_kit.inference.inversion`).
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass

import numpy as np

from report_kit.design.mechanism import Mechanism, mechanism_from_arrays
from report_kit.errors import ReportKitWarning
from report_kit.inference.engine import ALTERNATIVES, _check_choice, _check_rtol
from report_kit.inference.inversion import _check_level, _interval, _LinearInversion
from report_kit.inference.pvalues import DEFAULT_RTOL
from report_kit.inference.randomization import TestResult, null_distribution
from report_kit.inputs.arms import factor_grid

__all__ = ["MAIN_EFFECT", "FactorTest", "factor_mechanism", "main_effect_tests"]

#: The ``statistic`` of a main-effect test row: the factorial main-effect estimate.
MAIN_EFFECT = "main_effect"

# The two-arm kind that re-randomizes one factor within the strata of the other factors' levels.
_CONDITIONAL_KIND = {"complete": "blocked", "bernoulli": "blocked", "blocked": "blocked",
                     "cluster": "blocked_cluster", "blocked_cluster": "blocked_cluster"}


@dataclass(frozen=True, kw_only=True)
class FactorTest:
    """A main effect's randomization test and test-inversion interval (rows carry ``factor``)."""

    factor: str
    test: TestResult
    interval: dict | None = None

    def test_row(self) -> dict:
        return {"outcome": self.test.outcome, "arm": None, "reference": None, "factor": self.factor,
                **self.test.to_dict()}

    def interval_row(self) -> dict | None:
        if self.interval is None:
            return None
        return {"outcome": self.interval["outcome"], "arm": None, "reference": None, "factor": self.factor,
                **self.interval}


@dataclass(frozen=True, kw_only=True)
class _Strata:
    """Units split by (block, levels of the other factors), with the factor's on/off and the labels."""

    on: np.ndarray        # 0/1, the factor's level of each unit
    code: np.ndarray      # stratum code of each unit
    labels: np.ndarray    # readable stratum label of each unit ("block / call=off")


def _strata(arm, *, arms, factors, factor: str, block=None) -> _Strata:
    factors = [(str(name), tuple(str(a) for a in on)) for name, on in factors]
    names = [name for name, _ in factors]
    if factor not in names:
        raise ValueError(f"`factor` must be one of {names}; got {factor!r}")
    if isinstance(arm, (str, bytes)) or not hasattr(arm, "__len__"):
        raise TypeError(f"`arm` must be an array of arm labels; got {type(arm).__name__}")
    labels = np.asarray([str(a) for a in arm], dtype=object)
    grid = factor_grid([str(a) for a in arms], factors)
    unknown = sorted(set(labels.tolist()) - set(grid))
    if unknown:
        raise ValueError(f"`arm` holds label(s) not in `arms` {list(grid)}: {unknown[:5]}")
    if block is not None and (isinstance(block, (str, bytes)) or len(block) != labels.size):
        raise ValueError(f"`block` must be an array of block labels of length {labels.size}")
    f = names.index(factor)
    on = np.array([grid[a][f] for a in labels], dtype=int)
    others = [" ".join(f"{n}={'on' if grid[a][k] else 'off'}" for k, n in enumerate(names) if k != f)
              for a in labels]
    text = others if block is None else [f"{b} / {o}" for b, o in zip((str(b) for b in block), others)]
    text = np.asarray(text, dtype=object)
    return _Strata(on=on, code=np.unique(text, return_inverse=True)[1].ravel(), labels=text)


def factor_mechanism(arm, *, arms, factors, factor: str, kind: str, block=None, cluster=None) -> Mechanism:
    """The mechanism that re-randomizes ``factor`` only, holding the other factors' levels of every unit.

    Its treatment is the factor's level (1 = on). Units are stratified by the
    levels of the other factors (and the block, in blocked designs); within a
    stratum the factor's on/off labels are permuted among the randomization
    units (units, or whole clusters), holding the number on. This is the
    conditional distribution of the factor's assignment given the other
    factors' assignments and the cell sizes (per block) under a complete,
    blocked, cluster or blocked-cluster factorial design; a Bernoulli design is
    analysed conditionally on its realised cell sizes. Kind ``blocked`` (units)
    or ``blocked_cluster`` (clusters) with those strata as blocks.
    """
    if kind not in _CONDITIONAL_KIND:
        raise ValueError(f"`kind` must be one of {set(_CONDITIONAL_KIND)} for a factorial design; got {kind!r}")
    strata = _strata(arm, arms=arms, factors=factors, factor=factor, block=block)
    if kind in ("cluster", "blocked_cluster") and cluster is None:
        raise ValueError(f"`cluster` is required for mechanism {kind!r}")
    return mechanism_from_arrays(_CONDITIONAL_KIND[kind], strata.on, block=strata.labels,
                                 cluster=cluster if kind in ("cluster", "blocked_cluster") else None)


def _scales(y: np.ndarray, strata: _Strata, block, n_factors: int) -> np.ndarray | None:
    """Per-unit factor ``c`` that turns the engine's block-weighted difference into the main effect.

    The engine weights stratum ``s`` by its observed units ``n_s / N``; the main
    effect weights it by ``W_s = (n_b / N) / 2^(F-1)`` (``n_b`` the observed
    units of its block; one block without blocks). Scaling the stratum's
    outcomes by ``c_s = W_s N / n_s`` makes the two equal. ``None`` when a
    stratum has no observed unit on or off (the main effect is undefined).
    """
    seen = ~np.isnan(y)
    size = np.bincount(strata.code[seen], minlength=int(strata.code.max()) + 1).astype(float)
    on = np.bincount(strata.code[seen & (strata.on == 1)], minlength=size.size)
    if np.any(on == 0) or np.any(on == size):
        return None
    if block is None:
        block_size = np.full(y.size, float(seen.sum()))
    else:
        codes = np.unique(np.asarray([str(b) for b in block], dtype=object), return_inverse=True)[1].ravel()
        block_size = np.bincount(codes[seen], minlength=int(codes.max()) + 1).astype(float)[codes]
    return block_size / (2.0 ** (n_factors - 1) * size[strata.code])


def main_effect_tests(y, arm, *, arms, factors, kind: str, block=None, cluster=None,
                      alternative: str = "two-sided", level: float = 0.95, max_exact: int = 200000,
                      draws: int = 10000, seed: int = 5150, outcome: str = "y",
                      rtol: float = DEFAULT_RTOL) -> list[FactorTest]:
    """Randomization test and test-inversion interval of each factor's main effect.

    Sharp null for factor ``f``: ``Y_i(f on, x) = Y_i(f off, x) + tau0`` for every
    unit ``i`` and every level ``x`` of the other factors (``tau0 = 0`` for the
    test). Under it the outcomes under every re-randomization of ``f`` that
    holds the other factors' levels are known, so the conditional randomization
    distribution is that of :func:`factor_mechanism`. Statistic: the
    main-effect estimate ``2^-(F-1) sum_c g_f(c) ybar_c`` (block-size weighted
    with blocks, as :func:`report_kit.estimation.factorial.estimate_factorial`),
    computed by the engine's block-weighted difference in means on outcomes
    scaled per stratum (see :func:`_scales`), which is linear in the outcomes:
    the interval inverts the two-sided test by the engine's linear inversion
    (common random numbers). p-values (exact share, or Phipson & Smyth 2010
    for draws), the tie rule, the two-sided centre and the Monte Carlo error
    are those of :func:`report_kit.inference.randomization.randomization_test`.
    A factor whose main effect is undefined (a stratum without an observed unit
    on or off) is left out with a warning.
    """
    alternative = _check_choice("alternative", alternative, ALTERNATIVES)
    level = _check_level(level)
    rtol = _check_rtol(rtol)
    y = np.asarray(y, dtype=float)
    out = []
    for name in [str(n) for n, _ in factors]:
        strata = _strata(arm, arms=arms, factors=factors, factor=name, block=block)
        if y.shape != strata.on.shape:
            raise ValueError(f"`y` and `arm` must have the same length; got {y.size} and {strata.on.size}")
        scale = _scales(y, strata, block, len(factors))
        if scale is None:
            warnings.warn(f"outcome {outcome!r}: no randomization test of the main effect of {name!r} (a cell has "
                          "no observed outcome)", ReportKitWarning, stacklevel=2)
            continue
        mech = factor_mechanism(arm, arms=arms, factors=factors, factor=name, kind=kind, block=block,
                                cluster=cluster)
        source = mech.assignments(max_exact=max_exact, draws=draws, seed=seed)
        z = np.where(np.isnan(y), np.nan, mech.z.astype(float))
        dist = null_distribution(np.column_stack([scale * y, scale * z]), mech, statistic="mean_difference",
                                 source=source)
        out.append(FactorTest(factor=name, test=_test_result(dist, alternative, rtol, outcome),
                              interval=_inverted(dist, mech, rtol, level, outcome)))
    return out


def _test_result(dist, alternative: str, rtol: float, outcome: str) -> TestResult:
    column = dist.column(0)
    p, se, defined = column.p_values(alternative, rtol)
    observed = float(column.observed[0])
    return TestResult(outcome=outcome, statistic=MAIN_EFFECT, alternative=alternative, null_effect=0.0,
                      observed=observed if np.isfinite(observed) else None,
                      p_value=float(p[0]) if np.isfinite(p[0]) else None, method=dist.method,
                      draws=int(defined[0]), mc_std_error=float(se[0]) if np.isfinite(se[0]) else None)


def _inverted(dist, mech: Mechanism, rtol: float, level: float, outcome: str) -> dict:
    inv = _LinearInversion(dist, rtol, mech.fixed_arms_within_blocks)
    return _interval(inv, inv.hodges_lehmann(), inv.scale(), "two-sided", level, outcome).to_dict()
