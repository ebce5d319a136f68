"""Id normalisation: the whole-column path agrees with the value-by-value rules."""

from __future__ import annotations

import io

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from report_kit.inputs.ids import _column_kinds, _converted, _converted_by_value, _id_kind


def target_of(kinds):
    kinds = set(kinds) - {"missing"}
    return "int" if kinds <= {"int"} else "float" if kinds <= {"int", "float"} else "text"


def check_paths_agree(column: pd.Series) -> None:
    # Reference: the per-value rules (_id_kind, then int()/float()/str.strip() of each value).
    kinds = _column_kinds(column)
    assert kinds == {_id_kind(v) for v in column.tolist()}
    target = target_of(kinds)
    fast, slow = _converted(column, target, kinds), _converted_by_value(column, target, kinds)
    assert fast.dtype == slow.dtype and fast.tolist() == slow.tolist()


@pytest.mark.parametrize("column", [
    pd.Series([3, 1, 2]), pd.Series(np.array([1, 2], dtype=np.uint8)), pd.Series(np.array([1, 2], dtype=np.uint64)),
    pd.Series([1.0, 2.5, np.nan]), pd.Series([1.0, 2.0]), pd.Series([np.inf, 1.0]), pd.Series([2.0 ** 53]),
    pd.Series(["7", "-0", "12"], dtype=object), pd.Series(["7", None, "x"], dtype=object),
    pd.Series(["9223372036854775807", "9223372036854775808", "-9223372036854775809"], dtype="str"),
    pd.Series([True, False]), pd.Series(["a ", " b"]),
    pd.read_csv(io.StringIO("a\n007\n 8\n\n12\n"), dtype={"a": str}, skip_blank_lines=False)["a"],
])
def test_whole_column_path_matches_value_rules(column):
    check_paths_agree(column)


def test_examples_written_out():
    # Expected values written by hand from the rules in docs/spec.md.
    ids = pd.Series([" 12", "3", "40 "], dtype="str")
    assert _converted(ids, "int", {"int"}).tolist() == [12, 3, 40]
    zeros = pd.Series(["007", " 8"], dtype="str")
    assert _column_kinds(zeros) == {"text", "int"}
    assert _converted(zeros, "text", {"text", "int"}).tolist() == ["007", "8"]
    assert _converted(pd.Series([4.0, 5.0]), "int", {"int"}).dtype == np.int64


@settings(max_examples=60, deadline=None)
@given(st.lists(st.one_of(st.integers(-10**20, 10**20).map(str), st.text(" 0123456789-ax", max_size=6)),
                min_size=1, max_size=12))
def test_text_ids_agree(values):
    check_paths_agree(pd.Series(values, dtype="str"))


@settings(max_examples=60, deadline=None)
@given(st.lists(st.floats(allow_nan=True, allow_infinity=True), min_size=1, max_size=12))
def test_float_ids_agree(values):
    check_paths_agree(pd.Series(values, dtype="float64"))
