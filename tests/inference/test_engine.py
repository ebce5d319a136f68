"""Tests of the single randomization engine (report_kit.inference.engine and .pvalues).

Outside references used here: exact enumeration identities (every assignment
listed with itertools and the statistic recomputed directly with numpy), the
Monte Carlo p-value rule of Phipson & Smyth (2010) with hits counted by hand,
the binomial standard error of a share of B independent draws, and numpy's
own SeedSequence.spawn for the chunk streams.
"""

from __future__ import annotations

import dataclasses
import itertools
import pickle
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

import numpy as np
import pytest

from report_kit.analysis import analyse
from report_kit.checks.balance import mahalanobis_balance_test
from report_kit.design.mechanism import mechanism_from_arrays
from report_kit.errors import DesignError
from report_kit.inference.engine import (
    ChunkTask,
    MechanismDraws,
    StoredDraws,
    chunk_rows,
    run_pass,
    serial_chunk_map,
)
from report_kit.inference.multiplicity import westfall_young
from report_kit.inference.pvalues import null_centre, tail_p_values, tie_tolerance
from report_kit.inference.randomization import invert_test, null_distribution, randomization_test
from report_kit.pipeline import load_project

PROJECTS = Path(__file__).resolve().parents[2] / "projects"


def diff_in_means(y: np.ndarray, z: np.ndarray) -> float:
    """Plain difference in means, written out directly (reference implementation)."""
    return float(y[z == 1].mean() - y[z == 0].mean())


def all_draws(draws) -> np.ndarray:
    return np.vstack([draws.chunk(i)[0] for i in range(draws.n_chunks)])


# --------------------------------------------------------------------------- one rule for all consumers


@pytest.mark.parametrize("method", ["exact", "monte_carlo"])
def test_fisher_balance_and_westfall_young_agree_on_the_same_draws(method):
    # With one covariate x and complete randomization, the Mahalanobis balance
    # statistic is (x1 - x0)^2 / ((1/n1 + 1/n0) s^2), a monotone function of
    # |x1 - x0|, so the balance omnibus, the two-sided Fisher test of x and a
    # one-outcome Westfall-Young family must give identical p-values on the
    # same draws. Exact case: also equal to the share of the C(12, 5) = 792
    # assignments listed with itertools whose |difference| reaches the observed one.
    rng = np.random.default_rng(11)
    x = rng.gamma(2.0, size=12)
    z = np.array([1, 0, 0, 1, 0, 1, 0, 0, 1, 0, 1, 0])
    mech = mechanism_from_arrays("complete", z)
    max_exact = 10_000 if method == "exact" else 10
    source = mech.assignments(max_exact=max_exact, draws=499, seed=7)
    assert source.method == method
    (fisher,) = randomization_test(x, mech, source=source)
    Z = all_draws(MechanismDraws(source))
    balance = mahalanobis_balance_test(x, z, [Z], method)
    dist = null_distribution(x, mech, statistic="mean_difference", source=source)
    obs, null, tol = dist.oriented("two-sided")
    (wy,) = westfall_young(obs, null, method=method, tolerance=tol)
    assert fisher.p_value == balance.p_value == wy
    if method == "exact":
        t = abs(diff_in_means(x, z))
        listed = []
        for treated in itertools.combinations(range(12), 5):
            row = np.zeros(12, dtype=int)
            row[list(treated)] = 1
            listed.append(abs(diff_in_means(x, row)) >= t * (1 - 1e-12))
        assert fisher.p_value == pytest.approx(np.mean(listed), abs=1e-15)


def scaled_study(study, factor: float, *, monte_carlo: bool):
    """The study with every outcome and covariate multiplied by ``factor`` (ranges dropped)."""
    spec = study.spec
    columns = [o.column for o in spec.outcomes] + list(spec.analysis.covariates)
    frame = study.frame.copy()
    frame[columns] = frame[columns].astype(float) * factor
    analysis = spec.analysis
    if monte_carlo:
        analysis = dataclasses.replace(analysis, max_exact=10, randomizations=299)
    outcomes = tuple(dataclasses.replace(o, range=None) for o in spec.outcomes)
    spec = dataclasses.replace(spec, analysis=analysis, outcomes=outcomes)
    return dataclasses.replace(study, spec=spec, frame=frame)


def p_values(node, path=""):
    """Every p-value in a results dict, by its path."""
    found = {}
    if isinstance(node, dict):
        for key, value in node.items():
            if key in ("p_value", "p_adjusted"):
                found[f"{path}/{key}"] = value
            else:
                found.update(p_values(value, f"{path}/{key}"))
    elif isinstance(node, list):
        for i, value in enumerate(node):
            found.update(p_values(value, f"{path}[{i}]"))
    return found


@pytest.mark.parametrize("project", ["quiet-hours", "arrival-signs"])
@pytest.mark.parametrize("monte_carlo", [False, True])
def test_scaling_outcomes_and_covariates_changes_no_p_value(project, monte_carlo):
    # Property any scale-free rule must have: multiplying every outcome and
    # covariate by a positive constant multiplies each statistic and its tie
    # tolerance alike, so no count and no p-value in results.json moves.
    study = load_project(PROJECTS / project)
    base = p_values(analyse(scaled_study(study, 1.0, monte_carlo=monte_carlo)).results)
    assert len(base) > 10 and any(v is not None and v < 1 for v in base.values())
    for factor in (1e-9, 1e9):
        assert p_values(analyse(scaled_study(study, factor, monte_carlo=monte_carlo)).results) == base


# --------------------------------------------------------------------------- the rules, pinned exactly


def test_monte_carlo_p_value_counts_the_observed_draw():
    # Phipson & Smyth (2010): p = (1 + #{T_b >= t}) / (1 + B). Five draws,
    # hits counted by hand: 3.0, 2.0 (a tie) and 5.0 reach t = 2.0 -> 3 hits.
    null = np.array([[3.0], [1.0], [2.0], [0.5], [5.0]])
    p, se, defined = tail_p_values([2.0], null, method="monte_carlo", tolerance=[0.0])
    assert p[0] == 4 / 6
    # one Monte Carlo SE: sqrt(p (1 - p) / B) with the reported p and B = 5 draws
    assert se[0] == pytest.approx(np.sqrt((4 / 6) * (2 / 6) / 5), rel=1e-15)
    assert defined[0] == 5
    # an undefined draw (NaN) is set aside: B = 4, hits 3 -> p = 4/5
    p, se, defined = tail_p_values([2.0], np.vstack([null[:4], [[np.nan]], null[4:]]),
                                   method="monte_carlo", tolerance=[0.0])
    assert (p[0], defined[0]) == (4 / 6, 5)
    p, _, defined = tail_p_values([2.0], np.array([[3.0], [np.nan], [1.0], [2.0], [0.5]]),
                                  method="monte_carlo", tolerance=[0.0])
    assert (p[0], defined[0]) == (3 / 5, 4)


def test_exact_p_value_is_a_share_and_needs_the_observed_assignment():
    null = np.array([[3.0], [1.0], [2.0], [0.5]])
    p, se, _ = tail_p_values([2.0], null, method="exact", tolerance=[0.0])
    assert p[0] == 2 / 4 and np.isnan(se[0])
    # weighted (unequal probabilities): mass of the hits over the total mass, by hand
    p, _, _ = tail_p_values([2.0], null, method="exact", tolerance=[0.0], weights=[0.1, 0.2, 0.3, 0.4])
    assert p[0] == pytest.approx(0.4 / 1.0, rel=1e-15)
    with pytest.raises(DesignError, match="does not contain the observed assignment"):
        tail_p_values([9.0], null, method="exact", tolerance=[0.0])


def test_monte_carlo_p_value_of_a_real_design_by_hand():
    # Reference: the draws of the engine's own stream, the difference in
    # means recomputed directly for each, hits counted here.
    rng = np.random.default_rng(3)
    z = np.array([1] * 9 + [0] * 11)
    y = rng.normal(size=20) + 0.4 * z
    mech = mechanism_from_arrays("complete", z)
    source = mech.assignments(max_exact=10, draws=39, seed=2026)
    (res,) = randomization_test(y, mech, source=source)
    Z = all_draws(MechanismDraws(source))
    t = abs(diff_in_means(y, z))
    hits = sum(abs(diff_in_means(y, row)) >= t * (1 - 1e-12) for row in Z)
    assert res.p_value == (1 + hits) / (1 + 39)
    assert res.mc_std_error == pytest.approx(np.sqrt(res.p_value * (1 - res.p_value) / 39), rel=1e-15)


def test_tie_rule_is_relative_to_the_statistics_involved():
    obs, null, centre = np.array([2.0]), np.array([[-7.0], [3.0]]), np.array([0.5])
    assert tie_tolerance(obs, null, centre, 1e-12)[0] == 7.0 * 1e-12
    assert tie_tolerance(obs * 1e-9, null * 1e-9, centre * 1e-9, 1e-12)[0] == pytest.approx(7e-21, rel=1e-15)
    assert tie_tolerance(obs, null, np.array([-20.0]), 1e-12)[0] == 20.0 * 1e-12


def test_monte_carlo_centre_includes_the_observed_value():
    values = np.array([1.0, 2.0, 4.0])
    # (1 + 2 + 4 + 9) / 4 = 4: the observed 9 counts as one more draw
    assert null_centre(9.0, values, None, "monte_carlo") == 4.0
    assert null_centre(9.0, values, None, "exact") == 7.0 / 3.0


def test_inversion_uses_the_monte_carlo_centre_with_the_observed_value():
    # Cluster design: the null mean of the difference in means is not 0, so
    # the two-sided rule measures |T - c| from c = (sum_b T_b + t) / (B + 1).
    # Reference: the p-value of tau recomputed here from the draws (plain
    # differences in means, linear in tau); the interval's upper end must be
    # the last tau whose p-value exceeds alpha.
    rng = np.random.default_rng(8)
    cluster = np.repeat(np.arange(10), [1, 2, 3, 1, 4, 2, 1, 3, 2, 1])
    zc = np.array([1, 0, 1, 0, 0, 1, 1, 0, 0, 1])
    z = zc[cluster]
    y = rng.normal(size=z.size) + z
    mech = mechanism_from_arrays("cluster", z, cluster=cluster)
    source = mech.assignments(max_exact=10, draws=199, seed=99)
    assert source.method == "monte_carlo" and not mech.fixed_arms_within_blocks
    interval = invert_test(y, mech, source=source, level=0.9)
    Z = all_draws(MechanismDraws(source))
    A = np.array([diff_in_means(y, row) for row in Z])
    C = np.array([diff_in_means(z.astype(float), row) for row in Z])
    a, c = diff_in_means(y, z), 1.0

    def p(tau):
        values, obs = A - tau * C, a - tau * c
        centre = (values.sum() + obs) / (values.size + 1)
        tol = 1e-12 * max(abs(obs), np.abs(values).max(), abs(centre))
        return (1 + np.sum(np.abs(values - centre) >= abs(obs - centre) - tol)) / (1 + values.size)

    high, low = interval.ci_high, interval.ci_low
    step = 1e-7 * (high - low)
    assert p(high) > 0.1 >= p(high + step)
    assert p(low) > 0.1 >= p(low - step)


# --------------------------------------------------------------------------- the chunk seam


def reversed_map(fn, tasks):
    """A chunk map that computes the tasks in reverse order (results still returned in task order)."""
    done = {i: fn(t) for i, t in reversed(list(enumerate(tasks)))}
    return (done[i] for i in range(len(tasks)))


def threaded_map(fn, tasks):
    with ThreadPoolExecutor(max_workers=2) as pool:
        return list(pool.map(fn, tasks))


def pickling_map(fn, tasks):
    """A chunk map that ships the work and each task through cloudpickle, as a process pool or Dask would."""
    cloudpickle = pytest.importorskip("cloudpickle")
    remote = cloudpickle.loads(cloudpickle.dumps(fn))
    return [remote(cloudpickle.loads(cloudpickle.dumps(task))) for task in tasks]


def test_monte_carlo_chunk_i_comes_from_child_i_of_the_seed_sequence():
    z = np.array([1] * 30 + [0] * 40)
    mech = mechanism_from_arrays("complete", z)
    source = mech.assignments(max_exact=10, draws=5000, seed=31)
    draws = MechanismDraws(source)
    assert draws.rows == chunk_rows(70) == 1024 and draws.n_chunks == 5
    children = np.random.SeedSequence(31).spawn(draws.n_chunks)   # numpy's own derivation
    for i in (4, 0, 2):
        got, weights = draws.chunk(i)
        assert weights is None
        assert np.array_equal(got, mech.sample_block(got.shape[0], children[i]))
    assert draws.chunk(4)[0].shape == (5000 - 4 * 1024, 70)
    assert (all_draws(draws).sum(axis=1) == 30).all()


def test_pass_does_not_depend_on_chunk_map_or_task_size():
    rng = np.random.default_rng(4)
    z = np.array([1] * 6 + [0] * 7)
    x = rng.normal(size=(13, 2))
    mech = mechanism_from_arrays("complete", z)
    source = mech.assignments(max_exact=10, draws=3000, seed=5)
    draws = MechanismDraws(source)
    statistics = [lambda b: b @ x, lambda b: b.sum(axis=1, keepdims=True)]
    reference, _ = run_pass(draws, statistics)
    assert reference[0].shape == (3000, 2)
    for chunk_map in (serial_chunk_map, reversed_map, threaded_map):
        for per_task in (1, 2, 5):
            got, _ = run_pass(draws, statistics, chunk_map=chunk_map, chunks_per_task=per_task)
            assert all(np.array_equal(g, r) for g, r in zip(got, reference))
    assert [t.count for t in draws.tasks(2)] == [2, 1]
    assert pickle.loads(pickle.dumps(draws.tasks(2))) == [ChunkTask(0, 2), ChunkTask(2, 1)]


def test_stored_draws_do_not_depend_on_how_the_arrays_were_split():
    rng = np.random.default_rng(9)
    Z = (rng.random((2500, 5)) < 0.5).astype(np.uint8)
    one = StoredDraws.from_arrays([Z], 5, "monte_carlo")
    many = StoredDraws.from_arrays([Z[i:i + 333] for i in range(0, 2500, 333)], 5, "monte_carlo")
    stat = [lambda b: b[:, :1] - b[:, 1:2]]
    assert np.array_equal(run_pass(one, stat)[0][0], run_pass(many, stat)[0][0])


def test_analysis_results_do_not_depend_on_the_chunk_map():
    study = scaled_study(load_project(PROJECTS / "quiet-hours"), 1.0, monte_carlo=True)
    reference = analyse(study).results
    assert reference["design"]["inference_method"] == "monte_carlo"
    assert analyse(study, chunk_map=reversed_map).results == reference
    assert analyse(study, chunk_map=threaded_map).results == reference
    assert analyse(study, chunk_map=pickling_map).results == reference


def test_chunk_map_must_be_callable():
    study = load_project(PROJECTS / "quiet-hours")
    with pytest.raises(TypeError, match="chunk_map"):
        analyse(study, chunk_map="dask")
