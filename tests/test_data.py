"""Data validation: each error names the file, the column and the offending rows by id and line."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import yaml

from report_kit.data import load_study
from report_kit.errors import DataError
from report_kit.spec import load_spec


def make_project(tmp_path, frame: pd.DataFrame, *, design=None, extra=None, units="data/units.csv"):
    (tmp_path / "data").mkdir(exist_ok=True)
    if units.endswith(".csv"):
        frame.to_csv(tmp_path / units, index=False)
    doc = {
        "spec_version": 1, "title": "t",
        "data": {"units": units, "id": "uid"},
        "design": design or {"mechanism": "complete", "treatment": "z"},
        "outcomes": [{"column": "y"}],
    }
    doc.update(extra or {})
    (tmp_path / "design.yaml").write_text(yaml.safe_dump(doc), encoding="utf-8")
    return load_spec(str(tmp_path))


def frame(n=8, **cols):
    base = pd.DataFrame({"uid": [f"u{i}" for i in range(n)], "z": [0, 1] * (n // 2),
                         "y": np.arange(n, dtype=float), "blk": ["a"] * (n // 2) + ["b"] * (n // 2)})
    for k, v in cols.items():
        base[k] = v
    return base


def error_of(spec) -> str:
    with pytest.raises(DataError) as info:
        load_study(spec)
    return str(info.value)


def test_valid_data_sorted_by_id(tmp_path):
    f = frame().iloc[::-1]
    study = load_study(make_project(tmp_path, f))
    assert list(study.frame["uid"]) == sorted(f["uid"])
    assert study.inputs[0].rows == 8 and len(study.inputs[0].sha256) == 64


def test_duplicate_ids_named_with_lines(tmp_path):
    f = frame(uid=["u0", "u1", "u2", "u2", "u4", "u5", "u6", "u7"])
    msg = error_of(make_project(tmp_path, f))
    assert "units.csv: column 'uid': duplicated ids at line 4 (id 'u2'), line 5 (id 'u2')" in msg


def test_missing_id(tmp_path):
    f = frame(uid=["u0", None, "u2", "u3", "u4", "u5", "u6", "u7"])
    assert "column 'uid': missing id at line 3" in error_of(make_project(tmp_path, f))


def test_treatment_not_binary(tmp_path):
    f = frame(z=[0, 1, 2, 1, 0, "yes", 0, 1])
    msg = error_of(make_project(tmp_path, f))
    assert "column 'z' (design.treatment) must be exactly 0 or 1" in msg
    assert "line 4 (id 'u2')" in msg and "line 7 (id 'u5')" in msg


def test_missing_column_suggests(tmp_path):
    spec = make_project(tmp_path, frame(), design={"mechanism": "complete", "treatment": "zz"})
    assert "column 'zz' (named by design.treatment in design.yaml) not found — did you mean 'z'?" in error_of(spec)


def test_non_numeric_outcome(tmp_path):
    f = frame(y=["1", "2", "three", "4", "", "6", "n/a?", "8"])
    msg = error_of(make_project(tmp_path, f))
    assert "column 'y' must be numeric" in msg
    assert "line 4 (id 'u2')" in msg and "line 8 (id 'u6')" in msg


def test_block_with_one_arm(tmp_path):
    f = frame(z=[1, 1, 1, 1, 0, 1, 0, 1])
    spec = make_project(tmp_path, f, design={"mechanism": "blocked", "treatment": "z", "block": "blk"})
    assert "every block needs treated and control units" in error_of(spec) and ": a" in error_of(spec)


def test_cluster_split_across_arms(tmp_path):
    f = frame(cl=["c1", "c1", "c2", "c2", "c3", "c3", "c4", "c4"])
    spec = make_project(tmp_path, f, design={"mechanism": "cluster", "treatment": "z", "cluster": "cl"})
    assert "clusters split across arms" in error_of(spec) and "c1" in error_of(spec)


def test_pairs_need_two_units(tmp_path):
    f = frame(pr=["p1", "p1", "p1", "p2", "p2", "p3", "p3", "p4"], z=[0, 1, 0, 1, 0, 1, 0, 1])
    spec = make_project(tmp_path, f, design={"mechanism": "matched_pairs", "treatment": "z", "block": "pr"})
    assert "matched pairs need exactly two units" in error_of(spec) or "one arm only" in error_of(spec)


def test_path_outside_project_refused(tmp_path):
    (tmp_path / "proj").mkdir()
    frame().to_csv(tmp_path / "outside.csv", index=False)
    spec = make_project(tmp_path / "proj", frame(), units="../outside.csv")
    assert "points outside the project folder" in error_of(spec)


def test_missing_file(tmp_path):
    spec = make_project(tmp_path, frame())
    (tmp_path / "data" / "units.csv").unlink()
    assert "file not found (named by data.units" in error_of(spec)


def test_unsupported_type(tmp_path):
    spec = make_project(tmp_path, frame(), units="data/units.txt")
    (tmp_path / "data" / "units.txt").write_text("x")
    assert "unsupported file type '.txt'" in error_of(spec)


def test_merge_joins_on_id_and_rejects_unknown_ids(tmp_path):
    f = frame().drop(columns="y")
    (tmp_path / "data").mkdir()
    pd.DataFrame({"uid": [f"u{i}" for i in range(8)], "y": np.arange(8.0)}).to_csv(tmp_path / "data/end.csv", index=False)
    spec = make_project(tmp_path, f, extra={"data": {"units": "data/units.csv", "id": "uid", "merge": ["data/end.csv"]}})
    study = load_study(spec)
    assert study.frame["y"].tolist() == list(np.arange(8.0))
    pd.DataFrame({"uid": ["u0", "zz"], "y": [1.0, 2.0]}).to_csv(tmp_path / "data/end.csv", index=False)
    assert "ids not present in" in error_of(spec) and "zz" in error_of(spec)


@pytest.mark.parametrize("ext", [".parquet", ".xlsx", ".dta"])
def test_other_formats_read_like_csv(tmp_path, ext):
    f = frame().drop(columns="blk")
    spec_csv = make_project(tmp_path, f)
    path = tmp_path / "data" / f"units{ext}"
    {".parquet": lambda: f.to_parquet(path), ".xlsx": lambda: f.to_excel(path, index=False),
     ".dta": lambda: f.to_stata(path, write_index=False)}[ext]()
    spec = make_project(tmp_path, f, units=f"data/units{ext}")
    a, b = load_study(spec_csv).frame, load_study(spec).frame
    assert a["y"].tolist() == b["y"].tolist() and a["z"].tolist() == b["z"].tolist()
