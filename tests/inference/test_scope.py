"""The inference_scope section: which null each p-value tests.

Reference: Wu & Ding (2021), Theorem 1 and Section 4: only the studentized difference
in means (with a variance estimator that matches the design) makes the Fisher test
asymptotically valid for the weak null of zero average effect; a unit-level variance
does not match a cluster design. Also checked by a small simulation below (exact
enumeration): with unequal arms and unequal variances the plain difference in means
rejects a true weak null more often than its level.
"""

from __future__ import annotations

import itertools
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

import report_kit
from report_kit.inference.scope import inference_scope
from report_kit.inputs.model import AnalysisSpec, DataSpec, DesignSpec, OutcomeSpec, Spec, Study


def _study(mechanism, statistics, subgroups=()):
    frame = pd.DataFrame({"uid": range(4), "z": [1, 0, 1, 0], "c": [1, 1, 2, 2]})
    spec = Spec(path=Path("/nonexistent/design.yaml"), spec_version=1, title="Invented", summary="",
                data=DataSpec(units="data/units.csv", id="uid"),
                design=DesignSpec(mechanism=mechanism, treatment="z",
                                  cluster="c" if "cluster" in mechanism else None),
                analysis=AnalysisSpec(),
                outcomes=tuple(OutcomeSpec(column=f"y{i}", label="Y", statistic=s)
                               for i, s in enumerate(statistics)),
                subgroups=tuple(subgroups))
    return Study(spec=spec, frame=frame, inputs=())


def test_only_studentized_without_clusters_covers_the_average_effect():
    scope = inference_scope(_study("complete", ["mean_difference", "studentized", "rank_sum"]))
    assert [t["valid_for_average_effect"] for t in scope["tests"]] == [False, True, False]
    assert all(t["null"] == "sharp" for t in scope["tests"])
    assert scope["subgroups"] is None
    clustered = inference_scope(_study("cluster", ["studentized"], subgroups=["c"]))
    assert clustered["tests"][0]["valid_for_average_effect"] is False
    assert "not a cluster-level studentization" in clustered["tests"][0]["note"]
    assert clustered["subgroups"]["label"] == "exploratory" and clustered["subgroups"]["adjusted"] is False


def test_plain_difference_test_can_reject_a_true_weak_null():
    # Why the wording matters (Wu & Ding 2021, the unequal-arms pattern): 3 of 10 units
    # treated; treated potential outcomes -9 or 9 (mean 0), control outcomes all 0, so
    # the average effect is 0 but the effect is not constant. Exact enumeration of all
    # C(10, 3) assignments: the share whose exact sharp-null p-value is <= 0.05 exceeds
    # 0.05, so such a rejection says nothing about the average effect.
    n, n1 = 10, 3
    y1 = np.array([-9.0, 9.0] * 5)
    y0 = np.zeros(n)
    assert y1.mean() == y0.mean()
    assignments = [np.isin(np.arange(n), c) for c in itertools.combinations(range(n), n1)]
    rejections = 0
    for z in assignments:
        y = np.where(z, y1, y0)
        stats_ = np.array([y[a].mean() - y[~a].mean() for a in assignments])
        observed = y[z].mean() - y[~z].mean()
        p = np.mean(np.abs(stats_) >= abs(observed) - 1e-12)
        rejections += p <= 0.05
    assert rejections / len(assignments) > 0.05
    assert "inference_scope" in report_kit.__all__
