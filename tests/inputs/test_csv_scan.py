"""The CSV checks that work on the file's bytes: windows, line starts, UTF-8, plain whole-number ids."""

from __future__ import annotations

import io
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from report_kit.errors import DataError
from report_kit.inputs import readers
from report_kit.inputs.ids import normalise_ids
from report_kit.inputs.readers import Table, read_table


def csv_module_records(text: str) -> tuple[list[str] | None, list[int], list[tuple[int, int]]]:
    """Reference: header, record start lines and ragged records, by the csv module of the standard library.

    The reader's own csv-module path (used for files with quotes or carriage returns) is that reference.
    """
    header, starts, ragged = readers._scan_quoted(Path("reference.csv"), io.StringIO(text, newline=""))
    return header, starts.tolist(), ragged


@settings(max_examples=150, deadline=None)
@given(st.text(alphabet="ab ,\n1é", max_size=80), st.integers(1, 12))
def test_scan_in_small_windows_matches_the_csv_module(text, window):
    # Windows of a few bytes: every line end may fall at a window's edge.
    with pytest.MonkeyPatch.context() as patch:
        patch.setattr(readers, "_WINDOW", window)
        header, starts, ragged = readers._scan_plain(text.encode("utf-8"))
    assert (header, starts.tolist(), ragged) == csv_module_records(text)


def test_byte_order_mark_is_not_part_of_the_header():
    header, starts, _ = readers._scan_plain(b"\xef\xbb\xbfid,x\n1,2\n")
    assert header == ["id", "x"] and starts.tolist() == [2]


def test_line_starts_kept_only_when_rows_do_not_follow_the_header():
    # Written by hand: rows on lines 2, 3, 4 need no table; a blank line 3 shifts the rest.
    assert readers._compact_lines(np.array([2, 3, 4])) is None
    kept = readers._compact_lines(np.array([2, 4, 5]))
    assert kept.tolist() == [2, 4, 5] and kept.dtype == np.uint32


def write(tmp_path: Path, text: bytes) -> Path:
    (tmp_path / "data").mkdir(exist_ok=True)
    (tmp_path / "data" / "units.csv").write_bytes(text)
    return tmp_path


def test_line_named_after_a_blank_line(tmp_path):
    project = write(tmp_path, b"id,x\n1,2\n\n3,4\n")
    table = read_table(project, "data/units.csv", "data.units", id_col="id")
    assert isinstance(table, Table)
    assert [table.line(0), table.line(1)] == ["line 2", "line 4"]


@pytest.mark.parametrize("window", [3, 1 << 22])
def test_latin1_byte_named_by_line_in_any_window(tmp_path, monkeypatch, window):
    monkeypatch.setattr(readers, "_WINDOW", window)
    project = write(tmp_path, "id,name\n1,a\n2,caf\u00e9\n".encode("latin-1"))
    with pytest.raises(DataError, match=r"byte 0xe9 on line 3 is not valid UTF-8"):
        read_table(project, "data/units.csv", "data.units", id_col="id")


@settings(max_examples=80, deadline=None)
@given(st.lists(st.one_of(st.integers(-10 ** 20, 10 ** 20).map(str),
                          st.text(" 0123456789-+x.e", min_size=1, max_size=7).filter(lambda t: "," not in t)),
                min_size=1, max_size=10))
def test_ids_read_as_int64_only_when_the_text_gives_the_same_numbers(values):
    # Reference: the same ids read as text and normalised by the rules of inputs.ids.
    raw = ("id,x\n" + "".join(f"{v},1\n" for v in values)).encode()
    if any(not v.strip() for v in values):
        return  # a blank id is a missing id: reported by the id check either way
    as_text = pd.read_csv(io.BytesIO(raw), dtype={"id": str}, keep_default_na=False, na_values={"id": [""]})
    kind = readers._id_dtype(raw, "id")
    parsed = pd.read_csv(io.BytesIO(raw), dtype={"id": kind}, keep_default_na=False, na_values={"id": [""]})
    tables = [Table(relpath="u.csv", path=Path("u.csv"), frame=f, sha256="") for f in (as_text, parsed)]
    expected, got = (normalise_ids([t], "id")[0].frame["id"] for t in tables)
    assert got.dtype == expected.dtype and got.tolist() == expected.tolist()


def test_plain_whole_numbers_are_parsed_as_int64_and_zeros_kept_as_text():
    assert readers._id_dtype(b"id\n1\n-20\n0\n", "id") == "int64"
    for text in (b"id\n007\n", b"id\n 7\n", b"id\n+7\n", b"id\n1234567890123456789\n", b"id\n7.0\n"):
        assert readers._id_dtype(text, "id") is str


def test_line_numbers_written_out():
    # Expected values written by hand: header on line 2 after a blank line, a blank line 4, a ragged line 6.
    text = "\nid,x\n1,2\n\n3,4\n5\n"
    header, starts, ragged = readers._scan_plain(text.encode("utf-8"))
    assert header == ["id", "x"] and starts.tolist() == [3, 5, 6] and ragged == [(6, 1)]
    assert csv_module_records(text) == (header, starts.tolist(), ragged)
