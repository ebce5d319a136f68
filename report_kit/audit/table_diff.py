"""What changed between two copies of an input table: rows and cells, matched by unit id.

Owns :func:`diff_tables` and :class:`TableDiff`. Part of :mod:`report_kit.audit.compare`.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from report_kit.errors import DataError, UsageError
from report_kit.validate import Record, to_json_value

__all__ = ["CELL_LIMIT", "TableDiff", "diff_tables"]

#: At most this many changed cells and added/removed ids are kept per table.
CELL_LIMIT = 1000


# -------------------------------------------------------------------- table diff

def _natural_key(value):
    try:
        return (0, float(value), str(value))
    except (TypeError, ValueError):
        return (1, 0.0, str(value))


def _plain_value(value):
    try:
        return to_json_value(value)
    except UsageError:
        return str(value)


def _read_table(path: Path) -> pd.DataFrame:
    suffix = path.suffix.lower()
    try:
        if suffix == ".csv":
            return pd.read_csv(path, dtype=str, keep_default_na=False)
        if suffix == ".parquet":
            return pd.read_parquet(path)
        if suffix == ".xlsx":
            return pd.read_excel(path)
        if suffix == ".dta":
            return pd.read_stata(path)
    except (OSError, ValueError, ImportError) as err:
        raise DataError(f"{path}: cannot read the table ({err})") from err
    raise DataError(f"{path}: no row-level diff for '{suffix}' files; "
                    "expected one of {'.csv', '.parquet', '.xlsx', '.dta'}")


def _indexed(frame: pd.DataFrame, id_column: str, path: Path) -> pd.DataFrame:
    if id_column not in frame.columns:
        raise DataError(f"{path}: no id column '{id_column}'")
    ids = frame[id_column]
    if ids.isna().any() or ids.duplicated().any():
        raise DataError(f"{path}: id column '{id_column}' is missing or repeated in some rows")
    return frame.set_index(id_column)


def _same(x: np.ndarray, y: np.ndarray) -> np.ndarray:
    na_x, na_y = pd.isna(x), pd.isna(y)
    both = ~na_x & ~na_y
    eq = np.zeros(len(x), dtype=bool)
    if both.any():
        eq[both] = np.array([u == v for u, v in zip(x[both], y[both])], dtype=bool)
    return (na_x & na_y) | eq


@dataclass(frozen=True, kw_only=True)
class TableDiff(Record):
    """Row-level differences of one input table, keyed by the unit id.

    ``units_added``/``units_removed`` and ``cells`` keep at most ``limit``
    entries (``truncated`` tells); the ``n_*`` counts and
    ``changed_by_column`` are always complete.
    """

    id_column: str
    rows_a: int
    rows_b: int
    columns_added: tuple[str, ...]
    columns_removed: tuple[str, ...]
    n_units_added: int
    n_units_removed: int
    units_added: tuple
    units_removed: tuple
    n_changed_cells: int
    changed_by_column: dict = field(compare=False)
    cells: tuple[dict, ...]
    truncated: bool


def diff_tables(path_a: Path | str, path_b: Path | str, id_column: str, *,
                limit: int = CELL_LIMIT) -> TableDiff:
    """Units added and removed and cells changed between two versions of a table.

    Rows are matched by ``id_column``; cells are compared for the ids and
    columns the two versions share. CSV files are compared as text (``"1"``
    and ``"1.0"`` differ, as they do in the file); other formats as typed
    values (1 equals 1.0; two missing values are equal). Ids are ordered
    numerically when they look like numbers, else as text.
    """
    if not isinstance(limit, int) or isinstance(limit, bool) or limit < 0:
        raise ValueError(f"`limit` must be an integer >= 0; got {limit!r}")
    path_a, path_b = Path(path_a), Path(path_b)
    frame_a, frame_b = _read_table(path_a), _read_table(path_b)
    ia, ib = _indexed(frame_a, id_column, path_a), _indexed(frame_b, id_column, path_b)
    ids_a, ids_b = set(ia.index), set(ib.index)
    added = sorted(ids_b - ids_a, key=_natural_key)
    removed = sorted(ids_a - ids_b, key=_natural_key)
    common = sorted(ids_a & ids_b, key=_natural_key)
    columns = [c for c in ib.columns if c in ia.columns]
    by_column, hits = {}, []
    for j, col in enumerate(columns):
        x = ia[col].reindex(common).to_numpy(dtype=object)
        y = ib[col].reindex(common).to_numpy(dtype=object)
        rows = np.flatnonzero(~_same(x, y))
        if rows.size:
            by_column[str(col)] = int(rows.size)
            hits.append((rows, np.full(rows.size, j)))
    n_cells = sum(by_column.values())
    cells = []
    if hits:
        rows = np.concatenate([h[0] for h in hits])
        cols = np.concatenate([h[1] for h in hits])
        order = np.lexsort((cols, rows))[:limit]
        for r, c in zip(rows[order], cols[order]):
            unit, col = common[r], columns[c]
            cells.append({"id": _plain_value(unit), "column": str(col),
                          "old": _plain_value(ia.at[unit, col]), "new": _plain_value(ib.at[unit, col])})
    return TableDiff(
        id_column=id_column, rows_a=len(frame_a), rows_b=len(frame_b),
        columns_added=tuple(str(c) for c in ib.columns if c not in ia.columns),
        columns_removed=tuple(str(c) for c in ia.columns if c not in ib.columns),
        n_units_added=len(added), n_units_removed=len(removed),
        units_added=tuple(_plain_value(u) for u in added[:limit]),
        units_removed=tuple(_plain_value(u) for u in removed[:limit]),
        n_changed_cells=n_cells, changed_by_column=by_column, cells=tuple(cells),
        truncated=n_cells > limit or len(added) > limit or len(removed) > limit,
    )
