"""Exact randomization tests from lattice laws, for designs too large to enumerate.

Owns the step from a study's statistic and design to an exact p-value found
without listing assignments (laws from :mod:`report_kit.inference.exact`):

* :func:`exact_law_test` - one outcome: the difference in means of an
  integer-valued outcome (or one on a declared resolution; 0/1 outcomes give
  Fisher's exact test) and the Wilcoxon rank sum (mid-ranks, ties allowed),
  in complete, blocked and matched-pair designs;
* :func:`upgrade_tests` - the narrow hook used by
  :func:`report_kit.inference.randomization.study_randomization`: Monte Carlo
  test rows become exact where a lattice law applies; the others say why not.

Both statistics are increasing affine functions of ``U = sum_b g_b sum_{i in b}
Z_i q_i`` with integer scores ``q`` and integer block multipliers ``g``, so
p-values compare lattice points with exact rational arithmetic (see
``docs/methods/exact.md``).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from fractions import Fraction

import numpy as np

from report_kit.design.mechanism import Mechanism
from report_kit.inference.engine import ALTERNATIVES, _check_choice, _check_null_effect
from report_kit.inference.exact import (
    DEFAULT_MAX_CELLS,
    LatticeLaw,
    LatticeTooLarge,
    treated_sum_law,
    weighted_block_law,
)
from report_kit.inference.kernels import _rank_scores

__all__ = ["EXACT_STATISTICS", "ExactTest", "NoExactLaw", "exact_interval", "exact_law_test", "upgrade_tests"]

EXACT_STATISTICS = ("mean_difference", "rank_sum")
_KINDS = ("complete", "blocked", "matched_pairs")
#: Relative distance from an integer multiple of the resolution still counted as on the lattice.
LATTICE_RTOL = 1e-9


class NoExactLaw(ValueError):
    """No exact lattice law applies (or it would be too large); the message says why."""


@dataclass(frozen=True, kw_only=True)
class ExactTest:
    """An exact p-value from a lattice law.

    Attributes
    ----------
    statistic, alternative : str
    null_effect : float
    p_value : float
    observed_lattice : int
        ``U`` under the observed assignment.
    centre : Fraction
        Null expectation of ``U`` (the two-sided centre).
    law : LatticeLaw
    detail : str
        The algorithm, for the ``detail`` field of ``results.json``.
    """

    __test__ = False

    statistic: str
    alternative: str
    null_effect: float
    p_value: float
    observed_lattice: int
    centre: Fraction
    law: LatticeLaw
    detail: str


@dataclass(frozen=True)
class _Lattice:
    scores: np.ndarray       # integer q_i
    multipliers: tuple       # integer g_b per block
    blocks: list             # unit indices per block
    treated: tuple           # k_b per block
    note: str


def exact_law_test(y, mechanism: Mechanism, *, statistic: str = "mean_difference",
                   alternative: str = "two-sided", null_effect: float = 0.0,
                   resolution: float | None = None, max_cells: int = DEFAULT_MAX_CELLS) -> ExactTest:
    """Exact randomization p-value of one outcome from the law of a lattice statistic.

    Under the sharp null ``Y_i(1) = Y_i(0) + tau0`` the control outcomes
    ``Y0 = Y - tau0 Z_obs`` are fixed (Fisher 1935). With ``k_b`` of ``n_b``
    units treated in block ``b``:

    * ``mean_difference`` (no missing outcome): ``q_i = (Y0_i - min Y0) / r`` must
      be integers (``r`` the declared ``resolution``, or 1 for integer-valued
      outcomes; relative tolerance :data:`LATTICE_RTOL`). The block-weighted
      difference ``T = sum_b (n_b / n) (S1_b / k_b - S0_b / (n_b - k_b))`` equals
      ``r lambda U + const`` with ``U = sum_b g_b U_b``, ``U_b = sum_{i in b} Z_i q_i`` and
      integers ``g_b`` proportional to ``n_b^2 / (k_b (n_b - k_b))``, a fixed
      linear function of the block sums (Imbens & Rubin 2015, ch. 9).
    * ``rank_sum``: ``T = sum_i Z_i R_i`` with mid-ranks ``R`` (of block-aligned
      outcomes when blocked; 0 for a missing outcome), so ``q = 2 R`` and ``g_b = 1``.

    The law of ``U`` is the convolution of the block laws of
    :func:`~report_kit.inference.exact.treated_sum_law`. p-values:
    ``greater`` ``P(U >= u)``, ``less`` ``P(U <= u)``, ``two-sided``
    ``P(|U - E U| >= |u - E U|)`` with ``E U`` exact (a fraction) - the
    engine's rule ``|T - c| >= |t - c|`` with ``c`` the null mean. Lattice
    points are compared exactly; the engine's relative tie tolerance
    (1e-12) merges no two lattice points while ``U`` spans fewer than
    ``1e11`` points, which :func:`weighted_block_law` guarantees.

    Raises
    ------
    NoExactLaw
        With the reason: a design with clusters or a random number treated, a
        statistic without a lattice law, missing outcomes with the difference
        in means, values off the lattice, or a law too large (``max_cells``).
    """
    statistic = _check_choice("statistic", statistic, EXACT_STATISTICS + ("studentized", "ks"))
    alternative = _check_choice("alternative", alternative, ALTERNATIVES)
    if not isinstance(mechanism, Mechanism):
        raise TypeError(f"`mechanism` must be a Mechanism; got {type(mechanism).__name__}")
    tau = _check_null_effect(null_effect)
    y = np.asarray(y, dtype=np.float64)
    if y.shape != (mechanism.n,):
        raise ValueError(f"`y` must have shape ({mechanism.n},); got {y.shape}")
    lattice = _lattice(y - tau * mechanism.z, mechanism, statistic, resolution)
    z = mechanism.z.astype(np.int64)
    try:
        laws = [treated_sum_law(lattice.scores[idx], k, max_cells=max_cells)
                for idx, k in zip(lattice.blocks, lattice.treated)]
        law = weighted_block_law(laws, lattice.multipliers)
    except LatticeTooLarge as err:
        raise NoExactLaw(f"the exact law is too large: {err}") from err
    observed = sum(g * int(z[idx] @ lattice.scores[idx]) for g, idx in zip(lattice.multipliers, lattice.blocks))
    centre = sum((Fraction(g * k * int(lattice.scores[idx].sum()), idx.size)
                  for g, k, idx in zip(lattice.multipliers, lattice.treated, lattice.blocks)), Fraction(0))
    p = _tail(law, observed, centre, alternative)
    detail = f"exact null law without listing assignments: {law.algorithm}{lattice.note}"
    return ExactTest(statistic=statistic, alternative=alternative, null_effect=tau, p_value=p,
                     observed_lattice=int(observed), centre=centre, law=law, detail=detail)


def _tail(law: LatticeLaw, observed: int, centre: Fraction, alternative: str) -> float:
    """Probability of the lattice points at least as extreme as ``observed``."""
    pmf, lo = law.pmf, law.offset

    def at_least(v: int) -> float:
        return float(pmf[max(v - lo, 0):].sum()) if v - lo < pmf.size else 0.0

    def at_most(v: int) -> float:
        return float(pmf[:v - lo + 1].sum()) if v >= lo else 0.0

    if alternative == "greater":
        p = at_least(observed)
    elif alternative == "less":
        p = at_most(observed)
    else:
        gap = abs(observed - centre)
        p = at_least(math.ceil(centre + gap)) + at_most(math.floor(centre - gap))
        if gap == 0:
            p = 1.0
    return min(max(p, 0.0), 1.0)


# =========================================================================== lattice of a statistic


def _lattice(y0: np.ndarray, mechanism: Mechanism, statistic: str, resolution) -> _Lattice:
    if mechanism.kind not in _KINDS:
        why = ("the number treated is random" if mechanism.kind == "bernoulli"
               else "clusters make the arm sizes and weights depend on the assignment")
        raise NoExactLaw(f"no lattice law for a {mechanism.kind} design ({why})")
    if statistic not in EXACT_STATISTICS:
        raise NoExactLaw(f"the {statistic} statistic is not a fixed linear function of the treated sums")
    strata = np.asarray(mechanism.group_stratum)[mechanism.unit_group]
    if not np.array_equal(strata, mechanism.unit_block):
        raise NoExactLaw("the blocks of the statistic differ from the randomization strata")
    blocks = [np.flatnonzero(mechanism.unit_block == b) for b in range(mechanism.n_blocks)]
    treated = tuple(int(k) for k in mechanism.stratum_treated)
    if statistic == "rank_sum":
        doubled = 2.0 * _rank_scores(y0[:, None], mechanism)[:, 0]
        return _Lattice(scores=_reduced(np.round(doubled).astype(np.int64)), multipliers=(1,) * len(blocks),
                        blocks=blocks, treated=treated, note=" (mid-ranks doubled to integers)")
    if np.isnan(y0).any():
        raise NoExactLaw("missing outcomes make the per-arm counts depend on the assignment")
    scores, note = _integer_scores(y0, resolution)
    weights = [Fraction(idx.size * idx.size, k * (idx.size - k)) for idx, k in zip(blocks, treated)]
    scale = math.lcm(*(w.denominator for w in weights))
    mult = [int(w * scale) for w in weights]
    common = math.gcd(*mult)
    return _Lattice(scores=_reduced(scores), multipliers=tuple(g // common for g in mult), blocks=blocks,
                    treated=treated, note=note)


def _reduced(q: np.ndarray) -> np.ndarray:
    """``(q - min q) / d`` with ``d`` the greatest common divisor of ``q - min q``.

    Every statistic here is an increasing affine function of ``U``, and so of
    the ``U`` of the reduced scores: the p-values are unchanged, the lattice shorter.
    """
    shifted = q - q.min()
    divisor = int(np.gcd.reduce(shifted)) if shifted.any() else 1
    return shifted // divisor


#: A detected step finer than the outcome's range over this is no lattice worth using.
MAX_LATTICE_STEPS = 10**8


def _common_step(y0: np.ndarray) -> float:
    """The largest step ``s`` with every value ``min + k s`` (``k`` integer), up to a relative tolerance.

    Euclid's algorithm on the distinct differences, with remainders below
    ``LATTICE_RTOL * range`` counted as zero, so the rule does not depend on the
    outcome's units: integer data give their greatest common divisor, the same
    data times ``1e-9`` give that divisor times ``1e-9``. Raises
    :class:`NoExactLaw` when no step coarser than ``range / MAX_LATTICE_STEPS`` fits.
    """
    values = np.unique(y0)
    span = float(values[-1] - values[0]) if values.size else 0.0
    if span == 0.0:
        return 1.0
    floor, tol = span / MAX_LATTICE_STEPS, LATTICE_RTOL * span
    step = 0.0
    for d in np.diff(values):
        a, b = max(step, float(d)), min(step, float(d))
        while b > tol:
            a, b = b, math.fmod(a, b)
        step = a
        if step < floor:
            raise NoExactLaw("the outcome values are not on a lattice (declare a resolution)")
    return step


def _integer_scores(y0: np.ndarray, resolution) -> tuple[np.ndarray, str]:
    """``(y0 - min y0) / r`` as integers, or :class:`NoExactLaw` when off the lattice."""
    if resolution is not None:
        if isinstance(resolution, bool) or not isinstance(resolution, (int, float)) or not resolution > 0 \
                or not math.isfinite(resolution):
            raise ValueError(f"`resolution` must be a positive finite number; got {resolution!r}")
        step, note = float(resolution), f" (outcome on a resolution of {resolution:g})"
    else:
        step, note = _common_step(y0), ""
    scaled = (y0 - y0.min()) / step
    q = np.round(scaled)
    if np.any(np.abs(scaled - q) > LATTICE_RTOL * np.maximum(1.0, np.abs(scaled))):
        where = "the declared resolution" if resolution is not None else "integers (declare a resolution)"
        raise NoExactLaw(f"the outcome values are not on a lattice of {where}")
    return q.astype(np.int64), note


# =========================================================================== study hook


def upgrade_tests(tests: list[dict], y: np.ndarray, names, mechanism: Mechanism, *,
                  resolutions: dict | None = None) -> list[dict]:
    """Study test rows with Monte Carlo p-values replaced by exact lattice p-values where possible.

    Rows already exact (enumerated) are returned unchanged. A replaced row gets
    ``method = "exact"``, ``draws = 0`` (no assignment was listed or drawn),
    ``mc_std_error = None`` and ``detail`` naming the algorithm; a row left to
    Monte Carlo gets ``detail`` saying why no exact law applied.
    """
    resolutions = resolutions or {}
    column = {name: j for j, name in enumerate(names)}
    out = []
    for row in tests:
        if row["method"] == "exact" or row["outcome"] not in column:
            out.append(row)
            continue
        try:
            res = exact_law_test(y[:, column[row["outcome"]]], mechanism, statistic=row["statistic"],
                                 alternative=row["alternative"], null_effect=row["null_effect"],
                                 resolution=resolutions.get(row["outcome"]))
        except NoExactLaw as err:
            out.append({**row, "detail": f"monte carlo: {err}"})
            continue
        out.append({**row, "p_value": res.p_value, "method": "exact", "draws": 0, "mc_std_error": None,
                    "detail": res.detail})
    return out


# =========================================================================== exact test-inversion intervals

#: Most exact p-values computed for the two ends of one interval.
MAX_INTERVAL_EVALUATIONS = 80
#: Grid points beyond each end confirmed rejected (``p(tau)`` need not be monotone).
CONFIRM_STEPS = 2


def exact_interval(row: dict, y, mechanism: Mechanism, *, resolution: float | None = None,
                   max_evaluations: int = MAX_INTERVAL_EVALUATIONS, max_cells: int = DEFAULT_MAX_CELLS) -> dict:
    """A two-sided difference-in-means test-inversion interval made exact on the lattice of effects.

    ``row`` is a Monte Carlo ``intervals`` entry (``ci_low``, ``ci_high``,
    ``level``). Under the sharp null ``Y0 = Y - tau Z_obs`` stays on the lattice
    of step ``r`` (the declared ``resolution`` or the common step of ``Y``) only
    for ``tau = j r``, ``j`` integer; there the exact two-sided p-value
    ``p(j)`` of :func:`exact_law_test` is available. The interval is
    ``{j r : p(j) > alpha}`` (Fisher 1935; Imbens & Rubin 2015, ch. 5), reported by its
    smallest and largest accepted grid values. From each Monte Carlo end the
    search gallops (steps 1, 2, 4, ...) outward while accepted (inward while
    rejected) and bisects the last bracket to an accepted point whose outer
    neighbour is rejected; since ``p(j)`` need not be monotone, the
    :data:`CONFIRM_STEPS` grid points beyond each end must be rejected too,
    otherwise the search goes on from there. At most ``max_evaluations``
    p-values are computed.

    Returns the row (its ``method`` stays ``"test_inversion"``, the contract of
    ``results.json``) with the exact ends and a ``detail`` that starts with
    ``"exact"`` and names the algorithm and the grid step; the Hodges-Lehmann estimate stays
    the Monte Carlo one. When no exact law applies (0/1 outcomes, whose
    constant-effect null exists only for ``tau`` in {-1, 0, 1}; values off the
    lattice; a law too large; an unbounded Monte Carlo interval; the budget
    spent) the row is returned with ``detail`` saying why it stays Monte Carlo.
    """
    y = np.asarray(y, dtype=np.float64)
    if row.get("ci_low") is None or row.get("ci_high") is None:
        return {**row, "detail": "monte carlo: the Monte Carlo interval is unbounded"}
    values = np.unique(y[~np.isnan(y)])
    if values.size and np.isin(values, (0.0, 1.0)).all():
        return {**row, "detail": "monte carlo: for a 0/1 outcome the sharp null of a constant effect is only "
                                 "defined for tau in {-1, 0, 1}"}
    alpha = 1.0 - row["level"]
    cache: dict[int, bool] = {}
    try:
        step = float(resolution) if resolution is not None else _common_step(values)

        def accepted(j: int) -> bool:
            if j not in cache:
                if len(cache) >= max_evaluations:
                    raise NoExactLaw(f"the search used its {max_evaluations} exact p-values")
                cache[j] = exact_law_test(y, mechanism, null_effect=j * step, resolution=step,
                                          max_cells=max_cells).p_value > alpha
            return cache[j]

        low = _grid_end(accepted, round(row["ci_low"] / step), -1)
        high = _grid_end(accepted, round(row["ci_high"] / step), +1)
    except NoExactLaw as err:
        return {**row, "detail": f"monte carlo: {err}"}
    if low is None or high is None or low > high:
        return {**row, "detail": "monte carlo: no grid effect near the Monte Carlo interval is accepted"}
    return {**row, "ci_low": low * step, "ci_high": high * step,
            "detail": f"exact test inversion on the grid tau = k * {step:g} (galloping and bisection from "
                      f"the Monte Carlo ends, {len(cache)} exact p-values); Hodges-Lehmann from Monte Carlo"}


def _grid_end(accepted, start: int, outward: int, max_moves: int = 64) -> int | None:
    """The outermost accepted grid index found from ``start`` in direction ``outward`` (see :func:`exact_interval`)."""
    j = start
    if not accepted(j):  # gallop inward to an accepted point, bracketing a rejected one outside it
        gap = 1
        while not accepted(j - outward * gap):
            gap *= 2
            if gap > 2 ** max_moves:
                return None
        inside, outside = j - outward * gap, j - outward * (gap // 2)
    else:
        inside, outside = j, None
    for _ in range(max_moves):
        if outside is None:  # gallop outward from an accepted point to a rejected one
            gap = 1
            while accepted(inside + outward * gap):
                inside += outward * gap
                gap *= 2
            outside = inside + outward * gap
        while abs(outside - inside) > 1:
            mid = (inside + outside) // 2
            if accepted(mid):
                inside = mid
            else:
                outside = mid
        beyond = [outside + outward * s for s in range(1, CONFIRM_STEPS + 1)]
        again = next((b for b in beyond if accepted(b)), None)
        if again is None:
            return inside
        inside, outside = again, None
    return None
