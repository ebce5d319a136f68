"""Fisher randomization inference: null distributions, p-values and test-inversion intervals.

Owns the randomization tests of report-kit. Given outcomes ``Y`` (n units x m
outcomes, NaN = missing), an assignment :class:`~report_kit.design.mechanism.Mechanism`
and an :class:`~report_kit.design.mechanism.AssignmentSource` (every assignment, or
seeded random ones), it computes a test statistic for the observed assignment
and for every assignment of the source, all outcomes at once, chunk by chunk:

* :func:`null_distribution` - observed statistics ``(m,)`` and null statistics ``(B, m)``;
* :func:`randomization_test` - p-values (exact or Monte Carlo) as :class:`TestResult`;
* :func:`invert_test` - confidence interval by test inversion and the
  Hodges-Lehmann estimate, as :class:`Interval`;
* :func:`study_randomization` - everything above for a validated
  :class:`~report_kit.inputs.model.Study`, on one shared set of draws.

Definitions (statistics, sharp null, p-value rules, tie tolerance, centre of
the two-sided rule) are in the docstrings below and in
``docs/methods/randomization.md``.

The test statistics are in :mod:`report_kit.inference.kernels`, the shared
engine (validation, :class:`NullDistribution`, the pass over the draws) in
:mod:`report_kit.inference.engine`, and test inversion with the
Hodges-Lehmann estimate in :mod:`report_kit.inference.inversion`; their public names
are importable from here too.
"""

from __future__ import annotations

import warnings
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from report_kit.inference.engine import (
    ALTERNATIVES,
    STATISTICS,
    ChunkMap,
    NullDistribution,
    _check_alternatives,
    _check_choice,
    _check_names,
    _check_null_effect,
    _check_outcomes,
    _check_rtol,
    _check_source,
    _num,
    _Request,
    _run,
)
from report_kit.design.assignment import study_criterion
from report_kit.design.mechanism import AssignmentSource, Mechanism, mechanism_from_arrays
from report_kit.design.rerandomization import RerandomizedSource, rerandomized_assignments
from report_kit.errors import ReportKitWarning
from report_kit.inference.exact_tests import exact_interval, upgrade_tests
from report_kit.inference.inversion import Interval, _interval, _LinearInversion, invert_test
from report_kit.inference.kernels import Kernel  # noqa: F401
from report_kit.inference.pvalues import DEFAULT_RTOL, DrawnStatistics
from report_kit.validate import Record

__all__ = [
    "ALTERNATIVES",
    "DEFAULT_RTOL",
    "STATISTICS",
    "Interval",
    "JointNull",
    "NullDistribution",
    "StudyRandomization",
    "TestResult",
    "invert_test",
    "null_distribution",
    "randomization_test",
    "study_randomization",
]


def null_distribution(y, mechanism: Mechanism, *, statistic: str, source: AssignmentSource,
                      null_effect: float = 0.0, alternative: str = "two-sided") -> NullDistribution:
    """Randomization distribution of a statistic under the sharp null ``Y_i(1) = Y_i(0) + tau0``.

    Under the sharp null the control outcomes are known: ``Y0 = Y - tau0 *
    Z_obs`` (Fisher 1935; Imbens & Rubin 2015, ch. 5). The statistic is
    computed on ``Y0`` under the observed assignment and under every
    assignment of ``source``; all outcomes share the same draws.

    Parameters
    ----------
    y : array_like, shape (n,) or (n, m)
        Outcomes; NaN marks a missing outcome, which leaves that unit out of
        that outcome's statistic only.
    mechanism : Mechanism
    statistic : {"mean_difference", "rank_sum", "studentized", "ks"}
    source : AssignmentSource
        From ``mechanism.assignments(...)``.
    null_effect : float, default 0.0
        ``tau0``.
    alternative : str, default "two-sided"
        Only used by ``ks``, whose distance depends on the direction.

    Returns
    -------
    NullDistribution
        ``centre`` is the exact null expectation where known in closed form
        (0 for differences in means without clusters; ``sum pi_i R_i`` for rank
        sums), otherwise the mean over all assignments (exact) or over the
        draws and the observed value (Monte Carlo).
    """
    statistic = _check_choice("statistic", statistic, STATISTICS)
    alternative = _check_choice("alternative", alternative, ALTERNATIVES)
    source = _check_source(source, mechanism)
    y = _check_outcomes(y, mechanism.n)
    tau = _check_null_effect(null_effect)
    direction = alternative if statistic == "ks" else None
    return _run([_Request(statistic, direction, y)], mechanism, source, tau)[0]


# =========================================================================== tests


@dataclass(frozen=True, kw_only=True)
class TestResult(Record):
    """One randomization test; fields are the ``tests`` entries of ``results.json``."""

    __test__ = False  # not a pytest class

    outcome: str
    statistic: str
    alternative: str
    null_effect: float
    observed: float | None
    p_value: float | None
    method: str
    draws: int
    mc_std_error: float | None


def _results(dist: NullDistribution, names, alternatives, rtol) -> list[TestResult]:
    p, se, defined = dist.p_values(alternatives, rtol)
    out = []
    for j, (name, alt) in enumerate(zip(names, alternatives)):
        if not np.isfinite(dist.observed[j]):
            warnings.warn(f"the {dist.statistic} statistic of outcome {name!r} is undefined for the observed "
                          "assignment (an arm without usable outcomes, or zero variance); p-value left empty",
                          ReportKitWarning, stacklevel=3)
        out.append(TestResult(outcome=name, statistic=dist.statistic, alternative=alt,
                              null_effect=dist.null_effect, observed=_num(dist.observed[j]),
                              p_value=_num(p[j]), method=dist.method, draws=int(defined[j]),
                              mc_std_error=_num(se[j])))
    return out


def randomization_test(y, mechanism: Mechanism, *, source: AssignmentSource, statistic: str = "mean_difference",
                       alternative="two-sided", null_effect: float = 0.0, outcomes=None,
                       rtol: float = DEFAULT_RTOL, chunk_map: ChunkMap | None = None) -> list[TestResult]:
    """Fisher randomization test of the sharp null ``Y_i(1) = Y_i(0) + tau0`` for each outcome.

    p-values (see :meth:`NullDistribution.p_values`): exact when the source
    enumerates every assignment, ``sum 1{T_b >= t} / count``; otherwise the
    Monte Carlo ``(1 + #{T_b >= t}) / (1 + B)`` (Phipson & Smyth 2010) with its
    standard error. One-sided: ``greater`` counts ``T_b >= t``, ``less`` counts
    ``T_b <= t``; two-sided counts ``|T_b - c| >= |t - c|`` with ``c`` the null
    expectation of the statistic (the distance from the null mean). ``ks`` is
    always upper-tailed, in the distance matching the alternative. Ties are
    within ``rtol`` (relative, :func:`_tolerance`).

    Parameters
    ----------
    y : array_like, shape (n,) or (n, m)
    mechanism : Mechanism
    source : AssignmentSource
    statistic : str, default "mean_difference"
    alternative : str or sequence of str, default "two-sided"
        One for all outcomes or one per outcome.
    null_effect : float, default 0.0
    outcomes : sequence of str, optional
        Names for the ``outcome`` field (default ``y0, y1, ...``).
    rtol : float, default 1e-12
    chunk_map : ChunkMap, optional
        Runs the chunks of the pass (e.g. on Dask workers); results do not depend on it.

    Returns
    -------
    list of TestResult
        ``draws`` counts the assignments with a defined statistic;
        ``mc_std_error`` is ``None`` for exact p-values.
    """
    statistic = _check_choice("statistic", statistic, STATISTICS)
    source = _check_source(source, mechanism)
    y = _check_outcomes(y, mechanism.n)
    m = y.shape[1]
    alts = _check_alternatives(alternative, m)
    names = _check_names(outcomes, m)
    tau = _check_null_effect(null_effect)
    rtol = _check_rtol(rtol)
    groups = _groups(statistic, alts)
    dists = _run([_Request(statistic, d, y[:, idx]) for d, idx in groups], mechanism, source, tau,
                 chunk_map=chunk_map)
    by_column: dict[int, TestResult] = {}
    for (direction, idx), dist in zip(groups, dists):
        res = _results(dist, [names[j] for j in idx], [alts[j] for j in idx], rtol)
        by_column.update(zip(idx, res))
    return [by_column[j] for j in range(m)]


def _groups(statistic: str, alts: Sequence[str]) -> list[tuple[str | None, list[int]]]:
    """Columns sharing one computation: all of them, or (ks) those with the same alternative."""
    if statistic != "ks":
        return [(None, list(range(len(alts))))]
    return [(a, [j for j, b in enumerate(alts) if b == a]) for a in ALTERNATIVES if a in alts]


# =========================================================================== study level


@dataclass(frozen=True, kw_only=True, eq=False)
class JointNull:
    """Null statistics of several outcomes on the same draws, oriented so that larger = more extreme.

    Input for joint procedures such as Westfall-Young (1993) max-T.

    Attributes
    ----------
    outcomes : tuple of str
    observed : ndarray, shape (m,)
    null : ndarray, shape (B, m)
        Row ``b`` holds every outcome's statistic under the same assignment ``b``
        (NaN where undefined).
    tolerance : ndarray, shape (m,)
        Tie tolerance of each outcome (same rule as the p-values).
    method : {"exact", "monte_carlo"}
    weights : ndarray, shape (B,), or None
    """

    outcomes: tuple[str, ...]
    observed: np.ndarray
    null: np.ndarray
    tolerance: np.ndarray
    method: str
    weights: np.ndarray | None = None


@dataclass(frozen=True, kw_only=True, eq=False)
class StudyRandomization(Record):
    """Randomization inference for a study: tests, intervals and the null distributions behind them.

    Attributes
    ----------
    tests : list of dict
        ``results.json`` ``tests`` entries (one per outcome, ``tau0 = 0``).
    intervals : list of dict
        ``results.json`` ``intervals`` entries (difference in means, two-sided,
        level ``1 - alpha``).
    n_assignments : str or None
        Exact number of possible assignments, as decimal digits; ``None`` when it
        has more than 20 digits (see ``Mechanism.log10_count``).
    method : {"exact", "monte_carlo"}
    draws : int
        Assignments in every null distribution.
    distributions : dict of str to NullDistribution
        Per outcome column (one column each): observed and null statistics, for
        plots and joint procedures.
    alternatives : dict of str to str
    extra : tuple of DrawnStatistics
        The ``extra`` statistics of :func:`study_randomization`, on the same draws.
    rerandomization : dict or None
        Criterion, observed distance and acceptance rate of a rerandomized design.

    ``to_dict()`` stores ``tests``, ``intervals``, ``n_assignments``, ``method``
    and ``draws`` (the null distributions stay in memory).
    """

    record_keys = ("tests", "intervals", "n_assignments", "method", "draws")

    tests: list
    intervals: list
    n_assignments: str | None
    method: str
    draws: int
    distributions: dict
    alternatives: dict
    extra: tuple[DrawnStatistics, ...] = ()
    rerandomization: dict | None = None

    def joint_null(self, outcomes: Sequence[str] | None = None, rtol: float = DEFAULT_RTOL) -> JointNull:
        """Oriented ``(B, m)`` null matrix of ``outcomes`` (default: all), each by its own alternative."""
        names = tuple(self.distributions) if outcomes is None else tuple(outcomes)
        unknown = [o for o in names if o not in self.distributions]
        if unknown:
            raise ValueError(f"`outcomes` must be among {sorted(self.distributions)}; got {unknown[0]!r}")
        cols = [self.distributions[o].oriented(self.alternatives[o], rtol) for o in names]
        first = self.distributions[names[0]] if names else None
        return JointNull(
            outcomes=names,
            observed=np.array([c[0][0] for c in cols]),
            null=np.column_stack([c[1][:, 0] for c in cols]) if cols else np.empty((self.draws, 0)),
            tolerance=np.array([c[2][0] for c in cols]),
            method=self.method,
            weights=None if first is None else first.weights,
        )


def study_assignments(study) -> tuple[Mechanism, AssignmentSource]:
    """The study's assignment mechanism and the one set of assignments every procedure shares.

    Built from ``study.spec.design`` and the observed assignment; enumerated
    when there are at most ``analysis.max_exact`` assignments, otherwise
    ``analysis.randomizations`` draws seeded by ``analysis.seed``. A
    rerandomized design (``design.rerandomization``) keeps only the acceptable
    assignments (:func:`~report_kit.design.rerandomization.rerandomized_assignments`).
    """
    design, analysis = study.spec.design, study.spec.analysis
    mechanism = mechanism_from_arrays(
        design.mechanism, study.z, block=study.block, cluster=study.cluster,
        probability=design.probability if design.mechanism == "bernoulli" else None,
    )
    criterion = study_criterion(study.spec, study.frame)
    if criterion is not None:
        return mechanism, rerandomized_assignments(mechanism, criterion, max_exact=analysis.max_exact,
                                                   draws=analysis.randomizations, seed=analysis.seed)
    source = mechanism.assignments(max_exact=analysis.max_exact, draws=analysis.randomizations,
                                   seed=analysis.seed)
    return mechanism, source


def study_randomization(study, assignments: tuple[Mechanism, AssignmentSource] | None = None, *,
                        extra: Sequence = (), chunk_map: ChunkMap | None = None) -> StudyRandomization:
    """Randomization tests and intervals for every outcome of a validated study.

    Builds the mechanism from ``study.spec.design`` and the study's assignment,
    blocks and clusters; draws (or enumerates) assignments once with
    ``analysis.max_exact``, ``analysis.randomizations`` and ``analysis.seed``;
    tests each outcome with its own ``statistic`` and ``alternative`` (sharp
    null of no effect) and inverts the two-sided difference-in-means test at
    level ``1 - analysis.alpha``. All outcomes use the same assignments.
    ``assignments`` is what :func:`study_assignments` returns, when the caller
    already built it to share it with other procedures.

    ``extra`` statistics (callables from a float block of assignments
    ``(rows, n)`` to ``(rows, q)``, larger = more extreme, NaN = undefined;
    e.g. the balance omnibus and the differential-attrition statistics) are
    evaluated on the same pass over the draws; their
    :class:`~report_kit.inference.pvalues.DrawnStatistics` are in ``extra`` of
    the result, in the order given. ``chunk_map`` runs the chunks of the pass
    (default: one after another in this process; see
    :func:`~report_kit.inference.engine.run_pass`).
    """
    spec = study.spec
    analysis = spec.analysis
    mechanism, source = study_assignments(study) if assignments is None else assignments
    names = [o.column for o in spec.outcomes]
    y = np.column_stack([study.outcome(c) for c in names]) if names else np.empty((mechanism.n, 0))
    stats = {o.column: o.statistic for o in spec.outcomes}
    alts = {o.column: o.alternative for o in spec.outcomes}
    requests, slots = _study_requests(y, names, stats, alts, mechanism)
    results = _run(requests, mechanism, source, 0.0, extra=extra, chunk_map=chunk_map)
    dists, drawn = results[:len(requests)], tuple(results[len(requests):])
    per_outcome = {name: dists[r].column(j) for name, (r, j) in slots.items()}
    level = 1.0 - analysis.alpha
    tests, intervals = [], []
    for k, name in enumerate(names):
        tests.extend(t.to_dict() for t in _results(per_outcome[name], [name], [alts[name]], DEFAULT_RTOL))
        pair = NullDistribution(
            statistic="mean_difference", direction=None, null_effect=0.0,
            observed=dists[0].observed[[k, len(names) + k]], null=dists[0].null[:, [k, len(names) + k]],
            centre=dists[0].centre[[k, len(names) + k]], method=source.method, weights=dists[0].weights)
        inv = _LinearInversion(pair, DEFAULT_RTOL, mechanism.fixed_arms_within_blocks)
        intervals.append(_interval(inv, inv.hodges_lehmann(), inv.scale(), "two-sided", level, name).to_dict())
    rerandomized = isinstance(source, RerandomizedSource)
    if source.method != "exact" and not rerandomized:
        resolutions = {o.column: o.resolution for o in spec.outcomes}
        tests = upgrade_tests(tests, y, names, mechanism, resolutions=resolutions)
        intervals = [exact_interval(row, y[:, k], mechanism, resolution=resolutions[name])
                     for k, (name, row) in enumerate(zip(names, intervals))]
    if rerandomized:  # the acceptable assignments: counted only when they were all listed
        n_text = str(source.draws) if source.method == "exact" else None
    else:
        n_text = mechanism.count_text()
    return StudyRandomization(
        tests=tests, intervals=intervals, n_assignments=n_text,
        method=source.method, draws=source.draws, distributions=per_outcome, alternatives=alts, extra=drawn,
        rerandomization=_rerandomization_summary(source, mechanism) if rerandomized else None,
    )


def _rerandomization_summary(source: RerandomizedSource, mechanism: Mechanism) -> dict:
    """``design.rerandomization`` of ``results.json``; also notes that Neyman intervals are conservative."""
    warnings.warn("the assignment was rerandomized: the randomization tests and test-inversion intervals "
                  "condition on acceptance, while the Neyman standard errors and intervals ignore it and are "
                  "conservative (Li, Ding & Rubin 2018)", ReportKitWarning, stacklevel=3)
    crit = source.criterion
    return {
        "covariates": list(crit.covariates), "max_distance": crit.max_distance,
        "observed_distance": _num(float(crit.distances(mechanism.z[None, :])[0])),
        "acceptance_rate": source.acceptance_rate, "acceptance_rate_method": source.method,
        "candidates": str(int(source.candidates)),
    }


def _study_requests(y, names, stats, alts, mechanism):
    """One mean-difference request on ``[Y, Z_obs masked per outcome]`` plus one per other statistic."""
    m = len(names)
    zmask = np.where(np.isnan(y), np.nan, mechanism.z.astype(np.float64)[:, None])
    requests = [_Request("mean_difference", None, np.hstack([y, zmask]))]
    slots: dict[str, tuple[int, int]] = {}
    keys: dict[tuple[str, str | None], list[int]] = {}
    for j, name in enumerate(names):
        if stats[name] == "mean_difference":
            slots[name] = (0, j)
        else:
            key = (stats[name], alts[name] if stats[name] == "ks" else None)
            keys.setdefault(key, []).append(j)
    for (stat, direction), cols in keys.items():
        requests.append(_Request(stat, direction, y[:, cols]))
        for pos, j in enumerate(cols):
            slots[names[j]] = (len(requests) - 1, pos)
    assert len(slots) == m
    return requests, slots
