"""Attrition: missing outcomes, whether they differ by arm, and bounds on the effect.

Owns: attrition rates by arm, WHAT the randomization test of differential
attrition computes per assignment (:func:`attrition_statistic`; draws,
counting and p-values are the engine's, :mod:`report_kit.inference.engine`),
Lee (2009) trimming bounds and Manski (1990) worst-case bounds. A unit whose
outcome is missing counts as attrited for that outcome.
"""

from __future__ import annotations

from collections.abc import Callable, Iterable, Sequence
from dataclasses import dataclass

import numpy as np

from report_kit.checks.balance import ChunkSource, WeightFn, _check_assignment, _num
from report_kit.checks.bounds import (  # noqa: F401  (lee_bounds, manski_bounds re-exported)
    EffectBounds, _check_outcome, _check_range, _lee, _lee_blocked, _manski, lee_bounds, manski_bounds,
)
from report_kit.errors import DataError
from report_kit.inference.engine import StoredDraws, drawn_statistics
from report_kit.inference.pvalues import DrawnStatistics
from report_kit.validate import Record, METHODS, check_choice

__all__ = [
    "AttritionCheck",
    "AttritionTest",
    "EffectBounds",
    "attrition_statistic",
    "attrition_test",
    "lee_bounds",
    "manski_bounds",
    "study_attrition",
    "study_attrition_check",
]


# ---------------------------------------------------------------------------
# differential attrition test
# ---------------------------------------------------------------------------


@dataclass(frozen=True, kw_only=True)
class AttritionTest(Record):
    """Attrition rates by arm and the randomization test of their difference, per indicator."""

    labels: tuple[str, ...]
    missing_treated: tuple[int, ...]
    missing_control: tuple[int, ...]
    rate_treated: tuple[float, ...]
    rate_control: tuple[float, ...]
    p_value: tuple[float, ...]
    mc_std_error: tuple[float, ...] | None
    method: str
    draws: int

    def rows(self) -> list[dict]:
        """One dict per indicator: the ``per_outcome`` entries of ``results.json``."""
        out = []
        for i, label in enumerate(self.labels):
            out.append({
                "outcome": label,
                "missing_treated": self.missing_treated[i],
                "missing_control": self.missing_control[i],
                "rate_treated": self.rate_treated[i],
                "rate_control": self.rate_control[i],
                "difference": self.rate_treated[i] - self.rate_control[i],
                "p_value": self.p_value[i],
                "method": self.method,
                "draws": self.draws,
                "mc_std_error": None if self.mc_std_error is None else self.mc_std_error[i],
            })
        return out

    @property
    def per_outcome(self) -> list[dict]:
        return self.rows()

    record_keys = ("per_outcome",)


def attrition_statistic(R: np.ndarray) -> Callable[[np.ndarray], np.ndarray]:
    """Per-assignment statistic for the engine: ``|r1 - r0|`` for each indicator column of ``R`` (n, q).

    Maps a float block of assignments ``(rows, n)`` to ``(rows, q)``; NaN for
    an assignment with an empty arm (undefined; the engine sets it aside).
    """
    R = np.asarray(R, dtype=float)
    n = R.shape[0]
    total = R.sum(axis=0)

    def statistic(block: np.ndarray) -> np.ndarray:
        c1 = block @ R
        n1 = block.sum(axis=1)[:, None]
        with np.errstate(divide="ignore", invalid="ignore"):
            gap = np.abs(c1 / n1 - (total - c1) / (n - n1))
        return np.where((n1 > 0) & (n1 < n), gap, np.nan)
    return statistic


def attrition_test(missing, z, chunks: ChunkSource, method: str,
                   labels: Sequence[str] | None = None, *,
                   weights: WeightFn | None = None) -> AttritionTest:
    r"""Randomization test of differential attrition for one or more missingness indicators.

    Parameters
    ----------
    missing : array_like, shape (n,) or (n, q)
        1 where the outcome is missing (attrited), 0 where observed.
    z : array_like, shape (n,)
        Observed assignment (0/1).
    chunks : iterable or callable
        Assignment draws under the real mechanism (see :mod:`report_kit.checks.balance`).
    method : {'exact', 'monte_carlo'}
        How the draws were produced.
    labels : sequence of str, optional
        One label per indicator.
    weights : callable, optional
        ``chunk -> probabilities or None`` for exact enumerations whose
        assignments are not equally likely (see :mod:`report_kit.checks.balance`).

    Notes
    -----
    The statistic is :math:`T = |r_1 - r_0|`, the absolute difference of the
    attrition rates by arm. Under the sharp null that assignment changes no
    unit's missingness, the indicators are fixed and :math:`T` is recomputed
    for every drawn assignment (Fisher 1935; Imbens & Rubin 2015, ch. 5).
    The p-value is the share of draws with :math:`T` at least the observed
    value (exact) or :math:`(1 + \#)/(1 + D)` (Monte Carlo, the +1 rule).
    Under complete randomization with exact enumeration this is the
    two-sided hypergeometric test ordered by distance from the mean.
    """
    zb = _check_assignment(z)
    check_choice("method", method, METHODS)
    R, labels = _check_indicators(missing, zb, labels)
    draws = StoredDraws.from_arrays(chunks, zb.size, method, weights)
    return _test_from_draws(R, zb, labels, drawn_statistics(draws, [attrition_statistic(R)], zb)[0])


def _check_indicators(missing, zb: np.ndarray, labels) -> tuple[np.ndarray, tuple[str, ...]]:
    R = np.asarray(missing, dtype=float)
    if R.ndim == 1:
        R = R[:, None]
    if R.ndim != 2 or R.shape[0] != zb.size or not np.isin(R, (0, 1)).all():
        raise DataError(
            f"`missing` must be 0/1 with shape (n,) or (n, q), n = {zb.size}; got {np.shape(missing)}"
        )
    labels = tuple(labels) if labels is not None else tuple(f"indicator {j + 1}" for j in range(R.shape[1]))
    if len(labels) != R.shape[1]:
        raise ValueError(f"`labels` must have {R.shape[1]} entries; got {len(labels)}")
    return R, labels


def _test_from_draws(R: np.ndarray, zb: np.ndarray, labels, drawn: DrawnStatistics) -> AttritionTest:
    p, se, defined = drawn.p_values()
    m1, m0 = R[zb].sum(axis=0), R[~zb].sum(axis=0)
    return AttritionTest(
        labels=labels,
        missing_treated=tuple(int(v) for v in m1),
        missing_control=tuple(int(v) for v in m0),
        rate_treated=tuple(float(v) for v in m1 / zb.sum()),
        rate_control=tuple(float(v) for v in m0 / (~zb).sum()),
        p_value=tuple(_num(v) for v in p),
        mc_std_error=None if drawn.method == "exact" else tuple(_num(v) for v in se),
        method=drawn.method,
        draws=int(defined[0]),
    )


# ---------------------------------------------------------------------------
# study-level entry point
# ---------------------------------------------------------------------------


def _overall_columns(outcomes) -> tuple[str, ...]:
    primary = tuple(o.column for o in outcomes if o.family == "primary")
    return primary or tuple(o.column for o in outcomes)


def _outcome_bounds(study, spec, zb: np.ndarray, notes: list[str]) -> list[dict]:
    y = study.outcome(spec.column)
    arms = _check_outcome(y, zb.astype(int), None)
    entries = []
    observed = ~np.isnan(y)
    if observed.all():
        notes.append(f"No Lee bounds for {spec.column!r}: no outcome is missing, so there is "
                     "nothing to trim and the bounds would equal the estimate.")
    else:
        block = study.block if study.spec.design.block is not None else None
        lee = _lee(arms) if block is None else _lee_blocked(y, zb, observed, block)
        se_lower, se_upper = lee.std_error_lower, lee.std_error_upper
        if study.spec.design.cluster is not None:
            se_lower = se_upper = None
            notes.append(f"Lee bounds for {spec.column!r} have no standard errors: the formula of "
                         "Lee (2009) treats units as independent, which a cluster design is not.")
        entries.append({"outcome": spec.column, "method": "lee", "lower": lee.lower,
                        "upper": lee.upper, "std_error_lower": se_lower,
                        "std_error_upper": se_upper, "trimmed_arm": lee.trimmed_arm,
                        "n_blocks": lee.n_blocks})
    if spec.range is not None:
        lo, hi = _check_range(*spec.range)
        obs = y[~np.isnan(y)]
        if obs.size and (obs.min() < lo or obs.max() > hi):
            raise DataError(
                f"outcome {spec.column!r} has observed values outside its declared range "
                f"[{lo}, {hi}] (from {obs.min()} to {obs.max()})"
            )
        manski = _manski(arms, lo, hi)
        entries.append({"outcome": spec.column, "method": "manski",
                        "lower": manski.lower, "upper": manski.upper})
    return entries


@dataclass(frozen=True, kw_only=True, eq=False)
class AttritionCheck:
    """A study's attrition section waiting for the engine's draws of its statistic.

    ``statistic`` is handed to the engine's shared pass; :meth:`section`
    builds the ``results.json`` entry from what the pass drew.
    """

    indicators: np.ndarray
    labels: tuple[str, ...]
    assignment: np.ndarray
    overall_columns: tuple[str, ...]
    bounds: list
    bounds_notes: list

    @property
    def statistic(self) -> Callable[[np.ndarray], np.ndarray]:
        return attrition_statistic(self.indicators)

    def section(self, drawn: DrawnStatistics) -> dict:
        """The attrition section of ``results.json`` (see :func:`study_attrition`)."""
        rows = _test_from_draws(self.indicators, self.assignment, self.labels, drawn).rows()
        head = rows[0]
        return {
            "rate_treated": head["rate_treated"],
            "rate_control": head["rate_control"],
            "p_value": head["p_value"],
            "method": drawn.method,
            "draws": head["draws"],
            "mc_std_error": head["mc_std_error"],
            "attrited_if_missing": list(self.overall_columns),
            "bounds": self.bounds,
            "bounds_notes": self.bounds_notes,
            "per_outcome": rows[1:],
        }


def study_attrition_check(study) -> AttritionCheck:
    """The study's missingness indicators (overall first, then one per outcome) and its bounds."""
    zb = _check_assignment(study.z)
    outcomes = study.spec.outcomes
    missing = np.column_stack([np.isnan(study.outcome(o.column)) for o in outcomes]).astype(float)
    overall_cols = _overall_columns(outcomes)
    idx = [i for i, o in enumerate(outcomes) if o.column in overall_cols]
    overall = missing[:, idx].max(axis=1)
    notes: list[str] = []
    bounds = [entry for o in outcomes for entry in _outcome_bounds(study, o, zb, notes)]
    return AttritionCheck(indicators=np.column_stack([overall, missing]),
                          labels=("overall",) + tuple(o.column for o in outcomes),
                          assignment=zb, overall_columns=overall_cols, bounds=bounds, bounds_notes=notes)


def study_attrition(study, chunks_factory: Callable[[], Iterable[np.ndarray]], method: str,
                    *, weights: WeightFn | None = None) -> dict:
    """Attrition section of ``results.json``.

    Returns
    -------
    dict
        ``rate_treated, rate_control, p_value, method, draws, mc_std_error``
        for the overall indicator (a unit is attrited when any primary outcome
        is missing; any outcome when the spec has no primary outcome; the
        columns used are listed in ``attrited_if_missing``), ``bounds`` (Lee
        bounds, with standard errors and computed within blocks in blocked
        designs, for every outcome with a missing value; Manski bounds for
        outcomes with a declared ``range``), ``bounds_notes`` (a sentence for
        each outcome whose Lee bounds are omitted because nothing is missing,
        or have no standard errors because the design is clustered) and ``per_outcome`` (rates and test per outcome; see
        :meth:`AttritionTest.rows`).

    ``chunks_factory()`` returns a fresh iterator of assignment chunks drawn
    under the study's mechanism; all indicators share one pass over the draws.
    ``weights`` as in :func:`attrition_test`. (The analysis itself uses
    :func:`study_attrition_check` on the engine's shared pass.)
    """
    check_choice("method", method, METHODS)
    check = study_attrition_check(study)
    draws = StoredDraws.from_arrays(chunks_factory, check.assignment.size, method, weights)
    return check.section(drawn_statistics(draws, [check.statistic], check.assignment)[0])
