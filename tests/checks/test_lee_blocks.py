"""Lee (2009) bounds: unequal arms, blocks, standard errors, omission without attrition.

Outside references: hand-worked examples (Lee 2009 trimming rule, computed on paper in
the comments), the bracketing property any block-combined bound must have (each block's
bounds contain its observed difference), and a sampling simulation for the standard
errors of Lee (2009), Proposition 3.
"""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
import pytest

from report_kit.checks import attrition
from report_kit.errors import ReportKitWarning
from report_kit.estimation.neyman import estimate_effects

NAN = np.nan


def test_lee_unequal_arms_trims_control_by_observed_shares_not_counts():
    # By hand: treated 6 of 10 observed (2, 4, 6, 8, 10, 12; mean 7; share 0.6); control
    # 4 of 5 observed (1, 2, 3, 4; share 0.8). More control units are observed as a
    # SHARE (0.8 > 0.6) although fewer as a COUNT (4 < 6): the control arm is trimmed,
    # q = 1 - 0.6/0.8 = 0.25, keep 3 of 4. lower = 7 - mean(2,3,4) = 4;
    # upper = 7 - mean(1,2,3) = 5.
    y = np.array([2, 4, 6, 8, 10, 12, NAN, NAN, NAN, NAN, 1, 2, 3, 4, NAN])
    z = np.array([1] * 10 + [0] * 5)
    res = attrition.lee_bounds(y, z)
    assert res["trimmed_arm"] == "control"
    assert res["trim_share"] == pytest.approx(0.25, rel=1e-12)
    assert (res["lower"], res["upper"]) == (pytest.approx(4.0, rel=1e-12), pytest.approx(5.0, rel=1e-12))


def test_lee_unequal_arms_fractional_control_trim():
    # By hand: control 5 of 5 observed (1..5); treated 7 of 10 observed (10..16, mean 13).
    # q = 1 - 0.7 = 0.3: keep 3.5 of 5 control values (boundary value with weight 1/2).
    # lowest 3.5: (1 + 2 + 3 + 0.5*4)/3.5 = 8/3.5; highest: (5 + 4 + 3 + 0.5*2)/3.5 = 13/3.5.
    # lower = 13 - 13/3.5; upper = 13 - 8/3.5.
    y = np.array([10, 11, 12, 13, 14, 15, 16, NAN, NAN, NAN, 1, 2, 3, 4, 5])
    z = np.array([1] * 10 + [0] * 5)
    res = attrition.lee_bounds(y, z)
    assert res["lower"] == pytest.approx(13 - 13 / 3.5, rel=1e-12)
    assert res["upper"] == pytest.approx(13 - 8 / 3.5, rel=1e-12)


def test_lee_within_blocks_hand_example_brackets_block_weighted_estimate():
    # By hand: block A, treated 3, 5, 7, 9 (all observed), control 1, 3 observed of 4:
    # shares 1 and 0.5, keep half of treated: [4 - 2, 8 - 2] = [2, 6]. Block B: all
    # observed, treated 10, 12, control 9, 9: [2, 2]. Weights = observed units, 6 and 4:
    # lower = 0.6*2 + 0.4*2 = 2.0; upper = 0.6*6 + 0.4*2 = 4.4. Pooling the blocks
    # instead would give other numbers.
    y = np.array([3, 5, 7, 9, 1, 3, NAN, NAN, 10, 12, 9, 9], dtype=float)
    z = np.array([1, 1, 1, 1, 0, 0, 0, 0, 1, 1, 0, 0])
    block = np.array(["A"] * 8 + ["B"] * 4)
    res = attrition.lee_bounds(y, z, block=block)
    assert (res["lower"], res["upper"]) == (pytest.approx(2.0, rel=1e-12), pytest.approx(4.4, rel=1e-12))
    assert res["n_blocks"] == 2 and res["trimmed_arm"] == "treated"
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ReportKitWarning)
        headline = estimate_effects(y, z, mechanism="blocked", block=block)[0].estimate
    assert headline == pytest.approx(3.2, rel=1e-12)     # 0.6*(6 - 2) + 0.4*(11 - 9)
    assert res["lower"] <= headline <= res["upper"]


@pytest.mark.parametrize("seed", range(10))
def test_lee_within_blocks_bracket_headline_on_random_blocked_designs(seed):
    # Property: per-block bounds contain the block's observed difference, so combined
    # with the headline's block weights they contain the block-weighted estimate.
    rng = np.random.default_rng(seed)
    block = np.repeat(np.arange(5), rng.integers(8, 20, size=5))
    z = np.concatenate([rng.permutation(np.arange(np.sum(block == b)) % 2) for b in range(5)])
    y = rng.normal(size=z.size) + 2 * z + block
    y[rng.random(z.size) < np.where(z == 1, 0.1, 0.3) * (1 + block / 5)] = NAN
    res = attrition.lee_bounds(y, z, block=block)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ReportKitWarning)
        headline = estimate_effects(y, z, mechanism="blocked", block=block)[0].estimate
    assert res["lower"] - 1e-12 <= headline <= res["upper"] + 1e-12


def test_lee_standard_errors_match_sampling_spread():
    # Lee (2009), Proposition 3: the standard errors must describe the spread of the
    # bounds over repeated samples. Invented population: outcome N(0, 1) plus 0.5 if
    # treated; observed with probability 0.9 (treated) and 0.7 (control), monotone.
    # 400 samples: the Monte Carlo SE of a standard deviation is about 3.5%.
    rng = np.random.default_rng(12)
    n = 300
    z = np.r_[np.ones(n, int), np.zeros(n, int)]
    lows, highs, se_low, se_high = [], [], [], []
    for _ in range(400):
        y = rng.normal(size=2 * n) + 0.5 * z
        y[rng.random(2 * n) > np.where(z == 1, 0.9, 0.7)] = NAN
        res = attrition.lee_bounds(y, z)
        lows.append(res["lower"])
        highs.append(res["upper"])
        se_low.append(res["std_error_lower"])
        se_high.append(res["std_error_upper"])
    assert np.mean(se_low) == pytest.approx(np.std(lows, ddof=1), rel=0.12)
    assert np.mean(se_high) == pytest.approx(np.std(highs, ddof=1), rel=0.12)


def _study(y, z, block=None):
    from pathlib import Path

    from report_kit.inputs.model import AnalysisSpec, DataSpec, DesignSpec, OutcomeSpec, Spec, Study

    frame = pd.DataFrame({"uid": range(len(z)), "z": z, "score": y})
    mechanism = "complete"
    if block is not None:
        frame["site"] = block
        mechanism = "blocked"
    spec = Spec(path=Path("/nonexistent/design.yaml"), spec_version=1, title="Invented study",
                summary="", data=DataSpec(units="data/units.csv", id="uid"),
                design=DesignSpec(mechanism=mechanism, treatment="z",
                                  block="site" if block is not None else None),
                analysis=AnalysisSpec(), outcomes=(OutcomeSpec(column="score", label="Score"),))
    return Study(spec=spec, frame=frame, inputs=())


def _all_assignments_of(z):
    return lambda: [np.array([z, 1 - np.asarray(z)], dtype=np.uint8)]


def test_study_omits_lee_bounds_without_attrition_and_says_why():
    z = [1, 0, 1, 0, 1, 0]
    section = attrition.study_attrition(_study([1.0, 2, 3, 4, 5, 6], z), _all_assignments_of(z), "exact")
    assert section["bounds"] == []
    assert len(section["bounds_notes"]) == 1 and "no outcome is missing" in section["bounds_notes"][0]


def test_study_lee_bounds_use_blocks_of_a_blocked_design():
    # Same data as the hand example above, as a blocked study: [2.0, 4.4].
    y = [3, 5, 7, 9, 1, 3, NAN, NAN, 10, 12, 9, 9]
    z = [1, 1, 1, 1, 0, 0, 0, 0, 1, 1, 0, 0]
    study = _study(y, z, block=["A"] * 8 + ["B"] * 4)
    section = attrition.study_attrition(study, _all_assignments_of(z), "exact")
    (lee,) = section["bounds"]
    assert (lee["lower"], lee["upper"]) == (pytest.approx(2.0, rel=1e-12), pytest.approx(4.4, rel=1e-12))
    assert lee["n_blocks"] == 2 and lee["std_error_lower"] > 0


def test_cluster_design_lee_bounds_have_no_unit_level_standard_errors():
    # Lee (2009) Proposition 3 assumes independent units; a cluster design is not.
    from pathlib import Path

    from report_kit.inputs.model import AnalysisSpec, DataSpec, DesignSpec, OutcomeSpec, Spec, Study

    y = [3.0, 5, 7, NAN, 1, 3, 2, 4]
    z = [1, 1, 1, 1, 0, 0, 0, 0]
    frame = pd.DataFrame({"uid": range(8), "z": z, "score": y, "school": [1, 1, 2, 2, 3, 3, 4, 4]})
    spec = Spec(path=Path("/nonexistent/design.yaml"), spec_version=1, title="Invented", summary="",
                data=DataSpec(units="data/units.csv", id="uid"),
                design=DesignSpec(mechanism="cluster", treatment="z", cluster="school"),
                analysis=AnalysisSpec(), outcomes=(OutcomeSpec(column="score", label="Score"),))
    section = attrition.study_attrition(Study(spec=spec, frame=frame, inputs=()),
                                        _all_assignments_of(z), "exact")
    (lee,) = section["bounds"]
    assert lee["lower"] is not None and lee["std_error_lower"] is None
    assert "treats units as independent" in section["bounds_notes"][0]
