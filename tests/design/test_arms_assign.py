"""Multi-arm assignment: the documented draw (numpy alone), `assign` writing labels, `check` re-verifying."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import yaml
from click.testing import CliRunner

from report_kit.cli import main
from report_kit.design.arms import draw_arms
from report_kit.errors import DesignError

SEED = 424242
ARMS = ["usual", "short", "long"]


def invoke(*args):
    return CliRunner().invoke(main, [str(a) for a in args])


def test_complete_draw_follows_the_written_algorithm():
    # Reference: the algorithm as written in docs/methods/arms.md with numpy alone: units sorted
    # by id receive the labels [0, 1, 2, 0, ...] permuted by rng.permutation(n).
    ids = np.array([f"u{i:02d}" for i in (7, 3, 11, 0, 5, 9, 1, 10, 2, 8, 6, 4, 12)], dtype=object)
    drawn = draw_arms("complete", 3, ids, seed=SEED)
    order = np.argsort(ids, kind="stable")
    labels = (np.arange(13) % 3)[np.random.default_rng(SEED).permutation(13)]
    expected = np.empty(13, dtype=int)
    expected[order] = labels
    assert drawn.tolist() == expected.tolist()
    assert np.bincount(drawn).tolist() == [5, 4, 4]


def test_blocked_and_cluster_draws_keep_structure():
    ids = np.arange(30)
    block = np.repeat(["b", "a"], 15)
    drawn = draw_arms("blocked", 3, ids, seed=1, block=block)
    for b in ("a", "b"):
        assert np.bincount(drawn[block == b], minlength=3).tolist() == [5, 5, 5]
    cluster = np.repeat(np.arange(10), 3)
    drawn = draw_arms("cluster", 3, ids, seed=2, cluster=cluster)
    assert all(len(set(drawn[cluster == c])) == 1 for c in range(10))
    assert sorted(np.bincount(drawn[::3], minlength=3).tolist()) == [3, 3, 4]
    assert draw_arms("bernoulli", 3, ids, seed=3).tolist() == draw_arms("bernoulli", 3, ids, seed=3).tolist()


def test_stratum_smaller_than_arms_is_an_error():
    with pytest.raises(DesignError, match="fewer than the 3 arms"):
        draw_arms("blocked", 3, np.arange(5), seed=1, block=["a", "a", "a", "b", "b"])


def write_project(tmp_path, *, with_assignment: bool):
    (tmp_path / "data").mkdir()
    rng = np.random.default_rng(0)
    pd.DataFrame({"uid": [f"u{i:02d}" for i in range(18)], "y": rng.normal(size=18)}).to_csv(
        tmp_path / "data" / "units.csv", index=False)
    doc = {"spec_version": 1, "title": "t", "data": {"units": "data/units.csv", "id": "uid"},
           "design": {"mechanism": "complete", "treatment": "arm", "seed": SEED, "arms": ARMS},
           "outcomes": [{"column": "y"}]}
    if with_assignment:
        doc["data"]["merge"] = ["data/assignment.csv"]
    (tmp_path / "design.yaml").write_text(yaml.safe_dump(doc), encoding="utf-8")


def test_assign_writes_labels_and_check_reproduces(tmp_path):
    write_project(tmp_path, with_assignment=False)
    result = invoke("assign", tmp_path)
    assert result.exit_code == 0, result.output
    table = pd.read_csv(tmp_path / "data" / "assignment.csv")
    assert list(table.columns) == ["uid", "arm"]
    assert sorted(table["arm"].value_counts().tolist()) == [6, 6, 6]
    expected = np.asarray(ARMS, dtype=object)[draw_arms("complete", 3, table["uid"].to_numpy(), seed=SEED)]
    assert table["arm"].tolist() == expected.tolist()
    doc = yaml.safe_load((tmp_path / "design.yaml").read_text())
    doc["data"]["merge"] = ["data/assignment.csv"]
    (tmp_path / "design.yaml").write_text(yaml.safe_dump(doc), encoding="utf-8")
    check = invoke("check", tmp_path)
    assert check.exit_code == 0, check.output
    assert "assignment reproduced" in check.output and "6 usual, 6 short, 6 long" in check.output
    table.loc[3, "arm"] = "long" if table.loc[3, "arm"] != "long" else "short"
    table.to_csv(tmp_path / "data" / "assignment.csv", index=False)
    check = invoke("check", tmp_path)
    assert check.exit_code == 1 and "MISMATCH" in check.output and "u03" in check.output


PROBS = [0.5, 0.3, 0.2]


def test_bernoulli_probabilities_follow_the_written_algorithm():
    # Reference: the algorithm as written in docs/methods/arms.md with numpy alone: units sorted
    # by id, u = rng.random(n), arm = first k with u < p_0 + ... + p_k.
    ids = np.array([f"u{i:03d}" for i in np.random.default_rng(9).permutation(200)], dtype=object)
    drawn = draw_arms("bernoulli", 3, ids, seed=SEED, probabilities=PROBS)
    u = np.random.default_rng(SEED).random(200)
    by_sorted = np.where(u < 0.5, 0, np.where(u < 0.8, 1, 2))
    expected = np.empty(200, dtype=int)
    expected[np.argsort(ids, kind="stable")] = by_sorted
    assert drawn.tolist() == expected.tolist()
    cluster = np.repeat(np.arange(50), 4)
    clustered = draw_arms("bernoulli", 3, np.arange(200), seed=SEED, cluster=cluster, probabilities=PROBS)
    assert all(len(set(clustered[cluster == c])) == 1 for c in range(50))


def test_bernoulli_probabilities_realised_shares():
    # Common practice: each realised share within 4 binomial standard errors sqrt(p (1 - p) / n).
    n = 200_000
    drawn = draw_arms("bernoulli", 3, np.arange(n), seed=77, probabilities=PROBS)
    shares = np.bincount(drawn, minlength=3) / n
    for share, p in zip(shares, PROBS):
        assert abs(share - p) <= 4 * np.sqrt(p * (1 - p) / n)


def test_bernoulli_probabilities_misuse():
    with pytest.raises(ValueError, match="summing to 1"):
        draw_arms("bernoulli", 3, np.arange(10), seed=1, probabilities=[0.5, 0.3, 0.3])
    with pytest.raises(ValueError, match="for a bernoulli design"):
        draw_arms("complete", 3, np.arange(10), seed=1, probabilities=PROBS)


def test_assign_and_check_with_arm_probabilities(tmp_path):
    write_project(tmp_path, with_assignment=False)
    doc = yaml.safe_load((tmp_path / "design.yaml").read_text())
    doc["design"].update(mechanism="bernoulli", probability=dict(zip(ARMS, PROBS)))
    (tmp_path / "design.yaml").write_text(yaml.safe_dump(doc), encoding="utf-8")
    result = invoke("assign", tmp_path)
    assert result.exit_code == 0, result.output
    table = pd.read_csv(tmp_path / "data" / "assignment.csv")
    expected = np.asarray(ARMS, dtype=object)[draw_arms("bernoulli", 3, table["uid"].to_numpy(), seed=SEED,
                                                        probabilities=PROBS)]
    assert table["arm"].tolist() == expected.tolist()
    doc["data"]["merge"] = ["data/assignment.csv"]
    (tmp_path / "design.yaml").write_text(yaml.safe_dump(doc), encoding="utf-8")
    check = invoke("check", tmp_path)
    assert check.exit_code == 0, check.output
    assert "assignment reproduced" in check.output
