"""`report-kit assign` and the assignment check of `check` and `run`.

The drawn assignment is checked against a direct call of
``report_kit.design.draw.draw_assignment`` and, for ``complete`` and ``blocked``,
against the algorithm as written in docs/methods/randomization.md, computed
here with ``numpy.random.default_rng`` alone (units sorted by id; ``perm =
rng.permutation(n)``; the units at ``perm[:k]`` treated; blocks in label order).
"""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest
import yaml
from click.testing import CliRunner

from report_kit.design.assignment import check_assignment, write_assignment
from report_kit.cli import main
from report_kit.inputs.data import load_study, load_units_for_assignment
from report_kit.design.draw import draw_assignment
from report_kit.design.mechanism import number_treated
from report_kit.errors import DataError, DesignError, SpecError, UsageError
from report_kit.inputs.spec import load_spec

SEED = 8675309


def invoke(*args):
    return CliRunner().invoke(main, [str(a) for a in args])


def units_frame(mechanism: str) -> pd.DataFrame:
    """24 invented units in shuffled file order, with block and cluster labels fitting each design."""
    n = 24
    ids = [f"u{i:02d}" for i in range(n)]
    if mechanism == "matched_pairs":
        block = [f"p{i // 2:02d}" for i in range(n)]
    else:
        block = [["north", "south", "east"][i % 3] for i in range(n)]
    # clusters nested in blocks: two units per cluster, four clusters per block
    cluster = [f"{block[i]}-c{(i // 3) % 4}" for i in range(n)]
    frame = pd.DataFrame({"uid": ids, "blk": block, "cl": cluster,
                          "y": np.linspace(1.0, 2.0, n)})
    return frame.sample(frac=1.0, random_state=3).reset_index(drop=True)


DESIGNS = {
    "complete": {},
    "bernoulli": {"probability": 0.5},
    "blocked": {"block": "blk"},
    "cluster": {"cluster": "cl"},
    "blocked_cluster": {"block": "blk", "cluster": "cl"},
    "matched_pairs": {"block": "blk"},
}


def make_project(tmp_path, mechanism: str, *, merge_assignment: bool, seed=SEED):
    project = tmp_path / mechanism
    (project / "data").mkdir(parents=True)
    units_frame(mechanism).to_csv(project / "data" / "units.csv", index=False)
    design = {"mechanism": mechanism, "treatment": "z", **DESIGNS[mechanism]}
    if seed is not None:
        design["seed"] = seed
    data = {"units": "data/units.csv", "id": "uid"}
    if merge_assignment:
        data["merge"] = ["data/assignment.csv"]
    doc = {"spec_version": 1, "title": "invented", "data": data, "design": design,
           "analysis": {"adjust": False}, "outcomes": [{"column": "y"}]}
    (project / "design.yaml").write_text(yaml.safe_dump(doc, sort_keys=False), encoding="utf-8")
    return project


@pytest.mark.parametrize("mechanism", list(DESIGNS))
def test_assign_then_check_reproduces(tmp_path, mechanism):
    # The units table has no treatment column: assign must not need it.
    project = make_project(tmp_path, mechanism, merge_assignment=True)
    assert "z" not in pd.read_csv(project / "data" / "units.csv").columns
    done = invoke("assign", project)
    assert done.exit_code == 0, done.output
    assert (project / "data" / "assignment.csv").is_file()
    checked = invoke("check", project)
    assert checked.exit_code == 0, checked.output
    assert f"assignment reproduced from design.seed {SEED}" in checked.output


@pytest.mark.parametrize("mechanism", list(DESIGNS))
def test_drawn_assignment_is_the_documented_draw(tmp_path, mechanism):
    project = make_project(tmp_path, mechanism, merge_assignment=False)
    spec = load_spec(project)
    target = write_assignment(spec, load_units_for_assignment(spec))
    written = pd.read_csv(target)
    assert list(written.columns) == ["uid", "z"]
    assert list(written["uid"]) == sorted(written["uid"])  # rows in id order
    units = pd.read_csv(project / "data" / "units.csv")  # shuffled file order
    extra = DESIGNS[mechanism]
    direct = draw_assignment(mechanism, units["uid"].to_numpy(), seed=SEED,
                             block=units["blk"].to_numpy() if "block" in extra else None,
                             cluster=units["cl"].to_numpy() if "cluster" in extra else None,
                             probability=extra.get("probability"))
    by_id = dict(zip(units["uid"], direct.tolist()))
    assert written["z"].tolist() == [by_id[u] for u in written["uid"]]
    assert set(written["z"]) == {0, 1}


def test_complete_draw_follows_the_written_algorithm(tmp_path):
    # docs/methods/randomization.md: sort by id, perm = default_rng(seed).permutation(n), treat perm[:k],
    # k = floor(0.5 * n + 1/2).
    project = make_project(tmp_path, "complete", merge_assignment=False)
    spec = load_spec(project)
    written = pd.read_csv(write_assignment(spec, load_units_for_assignment(spec)))
    ids = sorted(pd.read_csv(project / "data" / "units.csv")["uid"])
    expected = np.zeros(len(ids), dtype=int)
    expected[np.random.default_rng(SEED).permutation(len(ids))[:12]] = 1
    assert written.set_index("uid").loc[ids, "z"].tolist() == expected.tolist()


def test_blocked_draw_follows_the_written_algorithm(tmp_path):
    # Same, block by block in ascending label order with one generator (docs/methods/randomization.md).
    project = make_project(tmp_path, "blocked", merge_assignment=False)
    spec = load_spec(project)
    written = pd.read_csv(write_assignment(spec, load_units_for_assignment(spec))).set_index("uid")
    units = pd.read_csv(project / "data" / "units.csv").sort_values("uid")
    rng = np.random.default_rng(SEED)
    for label in sorted(units["blk"].unique()):
        members = units.loc[units["blk"] == label, "uid"].tolist()
        expected = np.zeros(len(members), dtype=int)
        expected[rng.permutation(len(members))[:len(members) // 2]] = 1
        assert written.loc[members, "z"].tolist() == expected.tolist(), label


def test_flipping_one_unit_lists_exactly_that_id(project_copy):
    project = project_copy("quiet-hours")
    assert "assignment reproduced from design.seed" in invoke("check", project).output
    path = project / "data" / "branches.csv"
    frame = pd.read_csv(path)
    flipped = frame["branch"].iloc[4]
    frame.loc[4, "quiet_hour"] = 1 - frame.loc[4, "quiet_hour"]
    frame.to_csv(path, index=False)
    result = check_assignment(load_study(load_spec(project)))
    assert result.status == "mismatch" and result.differing_ids == (flipped,)
    done = invoke("check", project)
    assert done.exit_code == 1 and "Traceback" not in done.output
    assert f"differs for 1 unit(s): '{flipped}'" in done.output
    assert "does not reproduce column 'quiet_hour' (1 unit(s) differ)" in done.output


@pytest.fixture
def fast_run(monkeypatch):
    """`run` without executing notebooks or rendering: results.json is written before those steps."""
    from report_kit.report import notebooks
    from report_kit.report import render

    monkeypatch.setattr(notebooks, "execute_all", lambda *args, **kwargs: [])
    monkeypatch.setattr(render, "render_report", lambda *args, **kwargs: None)


def recorded_check(project) -> str:
    (run_dir,) = (project / "runs").iterdir()
    return json.loads((run_dir / "results.json").read_text())["design"]["assignment_check"]


def test_run_records_reproduced(project_copy, fast_run):
    project = project_copy("quiet-hours")
    done = invoke("run", project, "--no-pdf")
    assert done.exit_code == 0, done.output
    assert recorded_check(project) == "reproduced"


def test_run_records_mismatch(project_copy, fast_run):
    project = project_copy("quiet-hours")
    path = project / "data" / "branches.csv"
    frame = pd.read_csv(path)
    frame["quiet_hour"] = 1 - frame["quiet_hour"]
    frame.to_csv(path, index=False)
    done = invoke("run", project, "--no-pdf")
    assert done.exit_code == 0, done.output
    assert recorded_check(project) == "mismatch"


def test_run_records_not_checked_without_seed(example_runs):
    project, _, _ = example_runs["arrival-signs"]  # its design.yaml has no design.seed
    assert recorded_check(project) == "not_checked"


def test_assign_refuses_to_overwrite_without_force(tmp_path):
    project = make_project(tmp_path, "complete", merge_assignment=False)
    assert invoke("assign", project).exit_code == 0
    target = project / "data" / "assignment.csv"
    target.write_text("uid,z\nu00,1\n")
    again = invoke("assign", project)
    assert again.exit_code == 2 and "already exists; pass --force" in again.output
    assert target.read_text() == "uid,z\nu00,1\n"
    forced = invoke("assign", project, "--force")
    assert forced.exit_code == 0 and len(pd.read_csv(target)) == 24


def test_assign_force_never_replaces_a_data_table(tmp_path):
    project = make_project(tmp_path, "complete", merge_assignment=False)
    units = project / "data" / "units.csv"
    before = units.read_bytes()
    done = invoke("assign", project, "--force", "-o", units)
    assert done.exit_code == 2 and "is the units table" in done.output and units.read_bytes() == before
    other = project / "data" / "endline.csv"
    other.write_text("uid,score\nu00,3\n")
    done = invoke("assign", project, "--force", "-o", other)
    assert done.exit_code == 2 and "not an assignment file" in done.output
    assert other.read_text() == "uid,score\nu00,3\n"


def test_assign_never_writes_into_a_run(tmp_path):
    project = make_project(tmp_path, "complete", merge_assignment=False)
    run_dir = project / "runs" / "20260101T000000Z-00000000"
    run_dir.mkdir(parents=True)
    for name in ("manifest.json", "results.json"):
        (run_dir / name).write_text("{}")
    done = invoke("assign", project, "-o", run_dir / "assignment.csv")
    assert done.exit_code == 2 and "inside a run folder" in done.output
    assert sorted(p.name for p in run_dir.iterdir()) == ["manifest.json", "results.json"]
    elsewhere = tmp_path / "old-run"
    elsewhere.mkdir()
    (elsewhere / "manifest.json").write_text("{}")
    (elsewhere / "results.json").write_text("{}")
    done = invoke("assign", project, "-o", elsewhere / "tables" / "a.csv")
    assert done.exit_code == 2 and "inside a run folder" in done.output


def test_assign_without_seed_names_the_key(tmp_path):
    project = make_project(tmp_path, "complete", merge_assignment=False, seed=None)
    done = invoke("assign", project)
    assert done.exit_code == 1 and "design.seed: not set" in done.output and "Traceback" not in done.output
    assert not (project / "data" / "assignment.csv").exists()
    spec = load_spec(project)
    with pytest.raises(SpecError, match="design.seed: not set"):
        write_assignment(spec, load_units_for_assignment(spec))


def test_undrawable_design_names_the_spec(tmp_path):
    project = make_project(tmp_path, "complete", merge_assignment=False)
    spec_path = project / "design.yaml"
    doc = yaml.safe_load(spec_path.read_text())
    doc["design"]["probability"] = 0.01  # 0.01 * 24 rounds to 0 treated
    spec_path.write_text(yaml.safe_dump(doc))
    done = invoke("assign", project)
    assert done.exit_code == 1 and "Traceback" not in done.output
    assert ("units.csv: the study has 24 unit(s); drawing at share 0.01 from design.probability treats 0 of "
            "them, leaving an arm empty") in done.output
    assert not (project / "data" / "assignment.csv").exists()
    spec = load_spec(project)
    with pytest.raises(DataError, match="leaving an arm empty"):
        load_units_for_assignment(spec, treated_count=number_treated)
    # The draw itself (reached by `check` and `run`) names design.yaml and the seed.
    units = pd.read_csv(project / "data" / "units.csv").sort_values("uid").reset_index(drop=True)
    with pytest.raises(DesignError, match=r"design.yaml: design.seed 8675309: cannot draw a complete "
                                          r"assignment with design.probability 0.01 .*no treated unit"):
        write_assignment(spec, units)


def test_pairs_and_blocks_that_cannot_be_drawn_are_named(tmp_path):
    project = make_project(tmp_path, "matched_pairs", merge_assignment=False)
    path = project / "data" / "units.csv"
    frame = pd.read_csv(path)
    frame.loc[frame["uid"] == "u02", "blk"] = "p00"  # pair p00 now has three units, p01 one
    frame.to_csv(path, index=False)
    done = invoke("assign", project)
    out = done.output
    assert done.exit_code == 1 and "pair(s) in 'blk' that are not: p00 (3 unit(s)), p01 (1 unit(s))" in out
    line = 2 + frame.index[frame["uid"] == "u02"][0]
    assert f"line {line} (id 'u02')" in out
    project = make_project(tmp_path / "b", "blocked", merge_assignment=False)
    path = project / "data" / "units.csv"
    frame = pd.read_csv(path)
    frame.loc[frame["uid"] == "u00", "blk"] = "alone"
    frame.to_csv(path, index=False)
    done = invoke("assign", project)
    assert done.exit_code == 1
    assert "block alone has 1 unit(s); drawing at share 0.5 treats 1 of them, leaving an arm empty" in done.output


def test_assign_keeps_id_spelling_and_numeric_order(tmp_path):
    project = make_project(tmp_path, "complete", merge_assignment=False)
    path = project / "data" / "units.csv"
    frame = pd.read_csv(path)
    frame["uid"] = [f"{i:03d}" for i in range(24)]  # leading zeros: text ids
    frame.to_csv(path, index=False)
    spec = load_spec(project)
    text = (write_assignment(spec, load_units_for_assignment(spec))).read_text().splitlines()
    assert text[1].startswith("000,") and text[-1].startswith("023,")
    frame["uid"] = list(range(24, 0, -1))  # plain whole numbers: sorted as numbers (2 before 10)
    frame.to_csv(path, index=False)
    written = pd.read_csv(write_assignment(spec, load_units_for_assignment(spec), force=True))
    assert written["uid"].tolist() == list(range(1, 25))


def test_assign_output_must_be_csv(tmp_path):
    project = make_project(tmp_path, "complete", merge_assignment=False)
    spec = load_spec(project)
    with pytest.raises(UsageError, match="ending in .csv"):
        write_assignment(spec, load_units_for_assignment(spec), out=tmp_path / "a.xlsx")
