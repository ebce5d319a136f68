"""Data validation: each error names the file, the column and the offending rows by id and line."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import yaml

from report_kit.inputs.data import load_study
from report_kit.errors import DataError
from report_kit.inputs.spec import load_spec


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
    assert "column 'y' (outcomes[0].column) must be numeric" in msg
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


# --------------------------------------------------------------------------- reading and normalising (bug fixes)


def test_leading_zero_ids_stay_text_and_whole_numbers_sort_as_numbers(tmp_path):
    f = frame(uid=["007", "010", "002", "1", "3", "4", "5", "6"])
    study = load_study(make_project(tmp_path, f))
    assert study.frame["uid"].tolist() == sorted(["007", "010", "002", "1", "3", "4", "5", "6"])
    f = frame(uid=[10, 9, 8, 7, 6, 5, 4, 30])
    study = load_study(make_project(tmp_path, f))
    assert study.frame["uid"].tolist() == [4, 5, 6, 7, 8, 9, 10, 30]  # 9 before 10: compared as numbers


def test_merge_matches_whole_number_ids_written_as_decimals(tmp_path):
    # an .xlsx/.dta id column with a blank becomes 1.0, 2.0, ...; it still matches the CSV ids 1, 2, ...
    f = frame(uid=list(range(1, 9))).drop(columns="y")
    (tmp_path / "data").mkdir()
    pd.DataFrame({"uid": [float(i) for i in range(1, 9)], "y": np.arange(8.0)}).to_parquet(tmp_path / "data/end.parquet")
    spec = make_project(tmp_path, f, extra={"data": {"units": "data/units.csv", "id": "uid",
                                                     "merge": ["data/end.parquet"]}})
    study = load_study(spec)
    assert study.frame["uid"].tolist() == list(range(1, 9)) and study.frame["y"].tolist() == list(np.arange(8.0))


def test_block_labels_lose_surrounding_spaces(tmp_path):
    f = frame(blk=["a", "a ", " a", "a", "b", "b", "b ", "b"])
    spec = make_project(tmp_path, f, design={"mechanism": "blocked", "treatment": "z", "block": "blk"})
    assert sorted(set(load_study(spec).frame["blk"])) == ["a", "b"]


def test_csv_line_numbers_count_blank_lines_and_multiline_values(tmp_path):
    spec = make_project(tmp_path, frame())
    (tmp_path / "data" / "units.csv").write_text(
        'uid,z,y,blk\nu0,0,1,"two\nlines"\n\nu1,1,2,a\nu1,0,3,a\nu3,1,4,a\n')
    assert "duplicated ids at line 5 (id 'u1'), line 6 (id 'u1')" in error_of(spec)


def test_unreadable_file(tmp_path, monkeypatch):
    # Running as root ignores file modes, so the denial is simulated at the read call.
    spec = make_project(tmp_path, frame())
    real = type(tmp_path).read_bytes

    def denied(self):
        if self.name == "units.csv":
            raise PermissionError(13, "Permission denied", str(self))
        return real(self)

    monkeypatch.setattr(type(tmp_path), "read_bytes", denied)
    assert "units.csv: cannot read the file (permission denied; named by data.units" in error_of(spec)


def test_header_only_merge_table(tmp_path):
    f = frame().drop(columns="y")
    (tmp_path / "data").mkdir()
    (tmp_path / "data" / "end.csv").write_text("uid,y\n")
    spec = make_project(tmp_path, f, extra={"data": {"units": "data/units.csv", "id": "uid", "merge": ["data/end.csv"]}})
    assert "end.csv: has a header (uid, y) but no data rows" in error_of(spec)


def test_excel_rows_are_sheet_rows(tmp_path):
    f = frame(uid=["u0", "u1", "u2", "u2", "u4", "u5", "u6", "u7"])
    spec = make_project(tmp_path, f, units="data/units.xlsx")
    f.to_excel(tmp_path / "data" / "units.xlsx", index=False)
    # the header is sheet row 1, so the 3rd and 4th units sit on sheet rows 4 and 5
    assert "duplicated ids at sheet row 4 (id 'u2'), sheet row 5 (id 'u2')" in error_of(spec)


def test_parquet_that_is_not_parquet(tmp_path):
    spec = make_project(tmp_path, frame(), units="data/units.parquet")
    (tmp_path / "data" / "units.parquet").write_bytes(b"PK\x03\x04 not parquet")
    assert "units.parquet: is not a Parquet file" in error_of(spec)


def test_duplicate_header_in_excel(tmp_path):
    spec = make_project(tmp_path, frame(), units="data/units.xlsx")
    f = frame()
    f.columns = ["uid", "z", "y", "y"]
    f.to_excel(tmp_path / "data" / "units.xlsx", index=False)
    assert "duplicate column name(s) in the header: y" in error_of(spec)


def test_cluster_split_names_rows(tmp_path):
    f = frame(cl=["c1", "c1", "c2", "c2", "c3", "c3", "c4", "c4"])
    spec = make_project(tmp_path, f, design={"mechanism": "cluster", "treatment": "z", "cluster": "cl"})
    assert "cluster 'c1' has z = 1 at line 3 (id 'u1') and 0 at line 2 (id 'u0')" in error_of(spec)
