"""The id column of the input tables: one comparable type across every table.

Owns :func:`normalise_ids` and the per-value rules it applies (documented in
``docs/spec.md``): ids are whole numbers when every id in every table is one
(written without leading zeros), numbers when they are all numbers, text
otherwise (surrounding spaces removed). Missing ids stay missing (the id check
in :mod:`report_kit.inputs.data` reports them).

The common columns (integers, floats, text read from a CSV file) are
classified and converted with whole-column operations; any other column goes
value by value through the same rules, so both paths give the same result.
"""

from __future__ import annotations

import dataclasses
import math
import re

import numpy as np
import pandas as pd

from report_kit.inputs.checks import _is_missing, _plain

_INT_TEXT = re.compile(r"-?(0|[1-9][0-9]*)")
_INT64 = (-(2 ** 63), 2 ** 63 - 1)
#: digits that always fit in int64 (19 digits may not)
_SAFE_DIGITS = 18


def _id_kind(value) -> str:
    """'missing', 'int', 'float' or 'text' for one id value."""
    if _is_missing(value):
        return "missing"
    value = _plain(value)
    if isinstance(value, bool):
        return "text"
    if isinstance(value, int):
        return "int" if _INT64[0] <= value <= _INT64[1] else "text"
    if isinstance(value, float):
        if not math.isfinite(value):
            return "text"
        return "int" if value.is_integer() and abs(value) < 2 ** 53 else "float"
    if isinstance(value, str):
        text = value.strip()
        if _INT_TEXT.fullmatch(text) and _INT64[0] <= int(text) <= _INT64[1]:
            return "int"
        return "text"
    return "text"


def _as_text(value) -> str:
    value = _plain(value)
    if isinstance(value, float) and value.is_integer():
        return str(int(value))
    return str(value).strip()


def _layout(column: pd.Series) -> str:
    """'int', 'float' or 'text' for a column the whole-column path handles, else 'values'."""
    dtype = column.dtype
    if dtype.kind == "i" or (dtype.kind == "u" and dtype.itemsize < 8):
        return "int"
    if dtype.kind == "f":
        return "float"
    if dtype.kind in "OU" or pd.api.types.is_string_dtype(dtype):
        if len(column) and pd.api.types.infer_dtype(column, skipna=True) == "string":
            return "text"
    return "values"


def _kinds_of_text(column: pd.Series) -> set[str]:
    text = column[column.notna()].str.strip()
    whole = text.str.fullmatch(_INT_TEXT.pattern).to_numpy(dtype=bool)
    kinds = {"text"} if not whole.all() else set()
    digits = text[whole].str.len().to_numpy() - text[whole].str.startswith("-").to_numpy(dtype=int)
    long = digits > _SAFE_DIGITS
    if (~long).any():
        kinds.add("int")
    kinds.update(_id_kind(v) for v in text[whole][long].tolist())
    return kinds


def _column_kinds(column: pd.Series) -> set[str]:
    """The set of :func:`_id_kind` values of a column ('missing' included)."""
    layout = _layout(column)
    kinds = {"missing"} if layout != "values" and column.isna().any() else set()
    if layout == "int":
        return kinds | {"int"}
    if layout == "float":
        x = column.to_numpy()
        x = x[~np.isnan(x)]
        finite = np.isfinite(x)
        whole = finite & (x == np.floor(np.where(finite, x, 0.0))) & (np.abs(x) < 2.0 ** 53)
        for kind, mask in (("text", ~finite), ("int", whole), ("float", finite & ~whole)):
            if mask.any():
                kinds.add(kind)
        return kinds
    if layout == "text":
        return kinds | _kinds_of_text(column)
    return {_id_kind(v) for v in column.tolist()}


def _converted(column: pd.Series, target: str, kinds: set[str]) -> pd.Series:
    """The id column in the common type ``target`` ('int', 'float' or 'text')."""
    layout = _layout(column)
    if not column.isna().any():
        if target == "int" and layout in ("int", "float"):
            return column.astype("int64")
        if target == "int" and layout == "text":
            return column.str.strip().astype("int64")
        if target == "float" and layout in ("int", "float"):
            return column.astype("float64")
        if target == "text" and layout == "text":
            return pd.Series(column.str.strip().to_numpy(dtype=object), index=column.index, dtype=object)
    return _converted_by_value(column, target, kinds)


def _converted_by_value(column: pd.Series, target: str, kinds: set[str]) -> pd.Series:
    if target == "int":
        convert = lambda v: int(str(_plain(v)).strip()) if isinstance(_plain(v), str) else int(_plain(v))  # noqa: E731
    elif target == "float":
        convert = lambda v: float(str(_plain(v)).strip()) if isinstance(_plain(v), str) else float(_plain(v))  # noqa: E731
    else:
        convert = _as_text
    values = [None if _is_missing(v) else convert(v) for v in column.tolist()]
    if any(v is None for v in values) or target == "text":
        return pd.Series(values, index=column.index, dtype=object)
    return pd.Series(values, index=column.index, dtype="int64" if target == "int" else "float64")


def normalise_ids(tables: list, id_col: str) -> list:
    """Give the id column of every table one comparable type.

    Whole numbers when every id in every table is a whole number (written
    without leading zeros), numbers when they are all numbers, text otherwise
    (numbers written as text, surrounding spaces removed). Missing ids stay
    missing (and are reported by the id check). ``tables`` are
    :class:`report_kit.inputs.data.Table` objects; new ones are returned.
    """
    kinds: set[str] = set()
    for table in tables:
        kinds |= _column_kinds(table.frame[id_col])
    kinds.discard("missing")
    target = "int" if kinds <= {"int"} else "float" if kinds <= {"int", "float"} else "text"
    out = []
    for table in tables:
        frame = table.frame.copy(deep=False)  # only the id column is replaced
        frame[id_col] = _converted(table.frame[id_col], target, kinds)
        out.append(dataclasses.replace(table, frame=frame))
    return out
