"""Cluster factorial runs end to end: an invented project folder through analyse_project."""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest
import yaml

from report_kit.pipeline import analyse_project

ARMS = ["none", "letter", "visit", "both"]


def cluster_factorial_project(tmp_path, mechanism: str):
    """Invented study: 16 reading circles (3-6 members) in 2 districts; a 2 x 2 of a letter and a visit."""
    from report_kit.design.arms import draw_arms

    rng = np.random.default_rng(17)
    sizes = rng.integers(3, 7, size=16)
    circle = np.repeat([f"rc{g:02d}" for g in range(16)], sizes)
    district = np.repeat(np.where(np.arange(16) < 8, "north", "south"), sizes)
    ids = [f"m{i:03d}" for i in range(circle.size)]
    codes = draw_arms(mechanism, 4, ids, seed=29, block=district if mechanism == "blocked_cluster" else None,
                      cluster=circle)
    arm = np.array(ARMS, dtype=object)[codes]
    letter, visit = np.isin(arm, ["letter", "both"]), np.isin(arm, ["visit", "both"])
    books = (2.0 + 0.8 * letter + 1.2 * visit + np.repeat(rng.normal(scale=0.6, size=16), sizes)
             + rng.normal(size=circle.size))
    books[[3, 40]] = np.nan
    frame = pd.DataFrame({"member": ids, "offer": arm, "circle": circle, "district": district, "books": books})
    (tmp_path / "data").mkdir()
    frame.to_csv(tmp_path / "data" / "members.csv", index=False)
    design = {"mechanism": mechanism, "treatment": "offer", "cluster": "circle", "arms": ARMS,
              "factors": {"letter": ["letter", "both"], "visit": ["visit", "both"]}}
    if mechanism == "blocked_cluster":
        design["block"] = "district"
    doc = {"spec_version": 1, "title": "Letters and visits for reading circles (invented)",
           "data": {"units": "data/members.csv", "id": "member"}, "design": design,
           "analysis": {"randomizations": 300, "seed": 8}, "outcomes": [{"column": "books"}]}
    (tmp_path / "design.yaml").write_text(yaml.safe_dump(doc, sort_keys=False), encoding="utf-8")
    return tmp_path, frame


@pytest.mark.parametrize("mechanism, method", [("cluster", "cluster_factorial_cr2"),
                                               ("blocked_cluster", "blocked_cluster_factorial_cr2")])
def test_cluster_factorial_project_end_to_end(tmp_path, mechanism, method):
    project, frame = cluster_factorial_project(tmp_path, mechanism)
    results = analyse_project(project)
    rows = {e["factor"]: e for e in results["estimates"] if e["factor"] is not None}
    assert list(rows) == ["letter", "visit", "letter:visit"]
    assert all(e["method"] == method and e["role"] == "lead" and e["std_error"] > 0 and e["df"] > 0
               for e in rows.values())
    assert not any("factorial" in n for n in results.get("notes") or [])
    # Reference: the definition of the main effect on plain pandas cell means of the data file
    # (Dasgupta, Pillai & Rubin 2015); with districts, weighted by their units with an outcome.
    seen = frame.dropna(subset=["books"])
    groups = [seen] if mechanism == "cluster" else [part for _, part in seen.groupby("district")]
    expected = 0.0
    for part in groups:
        m = part.groupby("offer")["books"].mean()
        expected += len(part) / len(seen) * ((m["letter"] + m["both"]) - (m["none"] + m["visit"])) / 2
    assert rows["letter"]["estimate"] == pytest.approx(expected, rel=1e-12)
    tests = [t for t in results["tests"] if t.get("factor") is not None]
    assert [(t["factor"], t["statistic"], t["arm"], t["reference"]) for t in tests] == [
        ("letter", "main_effect", None, None), ("visit", "main_effect", None, None)]
    assert tests[0]["observed"] == pytest.approx(expected, rel=1e-10)
    # every re-randomization of one factor's circles within the other factor's levels (and districts):
    # C(8, 4)^2 without districts, C(4, 2)^4 with them; few enough to list them all
    count = math.comb(8, 4) ** 2 if mechanism == "cluster" else math.comb(4, 2) ** 4
    assert all(0 < t["p_value"] <= 1 and t["method"] == "exact" and t["draws"] == count for t in tests)
    intervals = [i for i in results["intervals"] if i.get("factor") is not None]
    assert [i["factor"] for i in intervals] == ["letter", "visit"]
    assert not any(m.get("factor") for m in results["multiplicity"])
    assert results["inference_scope"]["main_effects"]["adjusted"] is False
