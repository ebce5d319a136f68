"""Load the study: read the tables a spec names, join them on the id, check them.

Owns the recipe of :func:`load_study`: reading each table
(:mod:`report_kit.inputs.readers`), normalising ids and labels, joining
``merge`` tables on the id, and running the checks of
:mod:`report_kit.inputs.checks` stage by stage, so that every problem of a
stage is reported together (file, column, first rows by line and id, counts).
The result is a :class:`report_kit.inputs.model.Study`; ``data/`` is only ever read.

Normalisation (documented in ``docs/spec.md``): ids are compared as whole
numbers when every id in every table is one (``7``, not ``007`` or ``7.5``),
otherwise as text with surrounding spaces removed; block, cluster and subgroup
labels lose surrounding spaces, and a label column that mixes numbers and text
is read as text.
"""


from __future__ import annotations


import numpy as np
import pandas as pd

from report_kit.errors import DataError
from report_kit.inputs.checks import (
    _Locator, _Problems, _check_adjustment_covariates, _check_columns, _check_design, _check_drawable, _check_id,
    _check_merge_gaps, _check_no_missing, _check_ranges, _close_hint, _is_missing, _plain,
    _check_numeric, _require_id_column, _rows, rerandomization_columns,
)
from report_kit.inputs.handling import apply_handling, handled_missing_columns
from report_kit.inputs.ids import _as_text, normalise_ids
from report_kit.inputs.model import InputFile, Spec, Study
from report_kit.inputs.readers import SUFFIXES, Table, read_table, resolve_inside

__all__ = ["SUFFIXES", "Table", "load_study", "load_units_for_assignment", "normalise_ids", "read_table",
           "resolve_inside"]



def load_study(spec: Spec) -> Study:
    """Read, merge and validate the data a spec names; return a :class:`Study`.

    Problems are reported by stage, each stage listing all it found in one
    :class:`DataError`: the files themselves, then the ids, then the columns
    and their values, then the design (blocks, clusters, ranges).
    """
    project, id_col = spec.project_dir, spec.data.id
    problems = _Problems()
    keys = [(spec.data.units, "data.units")] + [(rel, f"data.merge[{i}]") for i, rel in enumerate(spec.data.merge)]
    tables = []
    for rel, key in keys:
        try:
            tables.append(read_table(project, rel, key, id_col=id_col, missing_values=spec.data.missing_values))
        except DataError as err:
            problems.add(str(err))
    problems.raise_if_any()
    for table in tables:
        _require_id_column(problems, table, id_col)
    problems.raise_if_any()
    tables = normalise_ids(tables, id_col)
    for table in tables:
        _check_id(problems, table, id_col)
    units, merged = tables[0], tables[1:]
    origin = _column_origin(problems, units, merged, id_col)
    _check_columns(problems, spec, origin)
    problems.raise_if_any()
    frame = _merge(problems, units, merged, id_col)
    locate = _Locator(units, id_col)
    _check_merge_gaps(problems, spec, frame, units, origin, locate)
    problems.raise_if_any()
    frame = _normalise_labels(frame, [c for c in (spec.design.block, spec.design.cluster, *spec.subgroups) if c])
    frame = _sorted_by_id(frame, id_col)
    frame = as_randomized = _coerce(spec, frame)
    frame, handling = apply_handling(spec, frame)
    frame = _normalise_labels(frame, list(handled_missing_columns(spec)))
    _check_ranges(problems, spec, frame, origin, locate)
    _check_adjustment_covariates(problems, spec, frame, origin, locate)
    if spec.design.arms is None:
        _check_design(problems, spec, frame, units, locate)
    problems.raise_if_any()
    if spec.design.arms is not None:
        from report_kit.inputs.arms import check_arms
        check_arms(spec, frame, origin[spec.design.treatment])
    inputs = tuple(InputFile(path=t.relpath, sha256=t.sha256, rows=len(t.frame)) for t in tables)
    return Study(spec=spec, frame=frame, inputs=inputs, handling=handling,
                 as_randomized=as_randomized if handling else None)


def _has_draw_column(problems: _Problems, units: Table, col: str, key: str, needed_by: str) -> bool:
    """Whether the units table has ``col``; otherwise note a problem naming the key and what needs it."""
    if col in units.frame.columns:
        return True
    problems.add(f"{units.path}: column '{col}' (named by {key} in design.yaml) not found"
                 f"{_close_hint(col, list(units.frame.columns))}; {needed_by} needs it in the units table")
    return False


def load_units_for_assignment(spec: Spec, *, treated_count=None) -> pd.DataFrame:
    """The units table for ``assign``: id and design columns checked, treatment not needed.

    ``treated_count(share, size)`` is the design's rule for the number of units
    (clusters) a stratum treats (:func:`report_kit.design.mechanism.number_treated`,
    passed in because ``design`` sits above ``inputs``); with it, a stratum whose
    draw would leave an arm empty is an error naming its rows.

    Rows are sorted by id; ids and labels are normalised as in :func:`load_study`,
    so the assignment drawn here is the one ``check`` re-draws.
    """
    id_col = spec.data.id
    units = read_table(spec.project_dir, spec.data.units, "data.units", id_col=id_col,
                       missing_values=spec.data.missing_values)
    problems = _Problems()
    _require_id_column(problems, units, id_col)
    problems.raise_if_any()
    (units,) = normalise_ids([units], id_col)
    _check_id(problems, units, id_col)
    labels = []
    for col, key in ((spec.design.block, "design.block"), (spec.design.cluster, "design.cluster")):
        if col and _has_draw_column(problems, units, col, key, "drawing the assignment"):
            _check_no_missing(problems, units, col, key, id_col)
            labels.append(col)
    for col, key in rerandomization_columns(spec).items():
        if _has_draw_column(problems, units, col, key, "the rerandomized draw"):
            _check_numeric(problems, units, col, id_col, key)
            _check_no_missing(problems, units, col, key, id_col)
    problems.raise_if_any()
    frame = _normalise_labels(units.frame, labels)
    _check_drawable(problems, spec, frame, units, treated_count)
    problems.raise_if_any()
    return _sorted_by_id(frame, id_col)


def _sorted_by_id(frame: pd.DataFrame, id_col: str) -> pd.DataFrame:
    """Rows in id order (stable); a table already in that order is kept as it is, not copied."""
    if not frame[id_col].is_monotonic_increasing:
        frame = frame.sort_values(id_col, kind="mergesort")
    return frame.reset_index(drop=True)


def _normalise_labels(frame: pd.DataFrame, columns: list[str]) -> pd.DataFrame:
    """Block, cluster and subgroup labels: trim spaces; a mixture of numbers and text becomes text."""
    frame = frame.copy(deep=False)  # columns are replaced, never changed in place
    for col in dict.fromkeys(columns):
        series = frame[col]
        if pd.api.types.is_numeric_dtype(series) or pd.api.types.is_bool_dtype(series):
            continue
        values = [_plain(v) for v in series.tolist()]
        present = [v for v in values if not _is_missing(v)]
        if not present:
            continue
        if all(isinstance(v, str) for v in present):
            if all(v == v.strip() for v in present):
                continue
            frame[col] = pd.Series([None if _is_missing(v) else v.strip() for v in values],
                                   index=frame.index, dtype=object)
        elif any(isinstance(v, str) for v in present):
            frame[col] = pd.Series([None if _is_missing(v) else _as_text(v) for v in values],
                                   index=frame.index, dtype=object)
    return frame


def _column_origin(problems: _Problems, units: Table, merged: list[Table], id_col: str) -> dict[str, Table]:
    origin = {c: units for c in units.frame.columns}
    for table in merged:
        for col in table.frame.columns:
            if col == id_col:
                continue
            if col in origin:
                problems.add(f"{table.path}: column '{col}' also exists in {origin[col].path}; "
                             "a merged table may only add new columns")
                continue
            origin[col] = table
    return origin


def _merge(problems: _Problems, units: Table, merged: list[Table], id_col: str) -> pd.DataFrame:
    frame = units.frame
    for table in merged:
        extra = np.flatnonzero(~table.frame[id_col].isin(units.frame[id_col]).to_numpy())
        if extra.size:
            problems.add(f"{table.path}: ids not present in {units.path}: {_rows(table, extra, id_col)}")
        frame = frame.merge(table.frame, on=id_col, how="left", validate="one_to_one")
    return frame


def _coerce(spec: Spec, frame: pd.DataFrame) -> pd.DataFrame:
    frame = frame.copy(deep=False)  # columns are replaced, never changed in place
    if spec.design.arms is None:
        frame[spec.design.treatment] = pd.to_numeric(frame[spec.design.treatment]).astype(int)
    else:
        from report_kit.inputs.arms import normalise_arm_column
        frame = normalise_arm_column(frame, spec.design.treatment)
    if spec.compliance:
        frame[spec.compliance.received] = pd.to_numeric(frame[spec.compliance.received]).astype(int)
    columns = [o.column for o in spec.outcomes] + list(spec.analysis.covariates) + list(rerandomization_columns(spec))
    for col in columns:
        frame[col] = pd.to_numeric(frame[col], errors="coerce").astype(float)
    return frame

