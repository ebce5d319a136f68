"""Line numbers of CSV records: the line-splitting path agrees with Python's csv module."""

from __future__ import annotations

from pathlib import Path

from hypothesis import given, settings
from hypothesis import strategies as st

from report_kit.inputs.readers import _plain_csv_records, _quoted_csv_records


@settings(max_examples=150, deadline=None)
@given(st.text(alphabet="ab ,\n1", max_size=60))
def test_plain_path_matches_the_csv_module(text):
    # Reference: the csv module of the Python standard library, record by record.
    assert _plain_csv_records(text) == _quoted_csv_records(Path("t.csv"), text)


def test_line_numbers_written_out():
    # Expected values written by hand: header on line 2 after a blank line, a blank line 4, a ragged line 6.
    text = "\nid,x\n1,2\n\n3,4\n5\n"
    header, starts, ragged = _plain_csv_records(text)
    assert header == ["id", "x"] and starts == [3, 5, 6] and ragged == [(6, 1)]
