"""Read the input tables of a project and validate them against the spec.

Owns: reading .csv/.parquet/.xlsx/.dta, keeping data paths inside the project
folder, joining ``merge`` tables on the id, and every data check (id unique and
present, treatment exactly 0/1, design columns present, clusters not split,
both arms in every block, numeric outcomes and covariates). Errors name the
file, the column, and the first offending rows by id and line number.
The result is a :class:`report_kit.model.Study`; ``data/`` is only ever read.
"""

from __future__ import annotations

import difflib
import hashlib
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from .errors import DataError
from .model import InputFile, Spec, Study

READERS = {
    ".csv": lambda p: pd.read_csv(p, keep_default_na=True),
    ".parquet": pd.read_parquet,
    ".xlsx": lambda p: pd.read_excel(p, engine="openpyxl"),
    ".dta": pd.read_stata,
}
_SHOW = 5  # offending rows listed per problem


@dataclass(frozen=True, kw_only=True)
class Table:
    """One input table as read, with where its rows came from."""

    relpath: str
    path: Path
    frame: pd.DataFrame
    sha256: str

    def line(self, pos: int) -> str:
        """Human locator of a row: line number for text files, row number otherwise."""
        if self.path.suffix.lower() == ".csv":
            return f"line {pos + 2}"
        return f"row {pos + 1}"


def load_study(spec: Spec) -> Study:
    """Read, merge and validate the data a spec names; return a :class:`Study`."""
    project = spec.project_dir
    units = read_table(project, spec.data.units, "data.units")
    merged = [read_table(project, rel, f"data.merge[{i}]") for i, rel in enumerate(spec.data.merge)]
    for table in (units, *merged):
        _check_id(table, spec.data.id)
    origin = _column_origin(units, merged, spec.data.id)
    _check_columns(spec, origin)
    frame = _merge(units, merged, spec.data.id)
    frame = frame.sort_values(spec.data.id, kind="mergesort").reset_index(drop=True)
    frame = _coerce(spec, frame)
    _check_design(spec, frame, units)
    inputs = tuple(InputFile(path=t.relpath, sha256=t.sha256, rows=len(t.frame)) for t in (units, *merged))
    return Study(spec=spec, frame=frame, inputs=inputs)


def resolve_inside(project: Path, rel: str, key: str) -> Path:
    """Resolve a data path and refuse one that leaves the project folder."""
    project = Path(project).resolve()
    path = (project / rel).resolve()
    if not path.is_relative_to(project):
        raise DataError(f"{project / 'design.yaml'}: {key}: '{rel}' points outside the project folder; "
                        "keep data files inside it (e.g. data/units.csv)")
    return path


def read_table(project: Path, rel: str, key: str) -> Table:
    """Read one input table; every failure becomes a :class:`DataError` naming the file."""
    path = resolve_inside(project, rel, key)
    if not path.is_file():
        raise DataError(f"{path}: file not found (named by {key} in design.yaml)")
    reader = READERS.get(path.suffix.lower())
    if reader is None:
        raise DataError(f"{path}: unsupported file type '{path.suffix}'; expected one of {', '.join(READERS)}")
    raw = path.read_bytes()
    try:
        frame = reader(path)
    except Exception as err:  # noqa: BLE001 - any reader failure is a data problem
        raise DataError(f"{path}: cannot read the table: {err}") from err
    frame.columns = [str(c).strip() for c in frame.columns]
    dupes = sorted({c for c in frame.columns if list(frame.columns).count(c) > 1})
    if dupes:
        raise DataError(f"{path}: duplicate column name(s): {', '.join(dupes)}")
    return Table(relpath=Path(rel).as_posix(), path=path, frame=frame,
                 sha256=hashlib.sha256(raw).hexdigest())


def _rows(table: Table, positions, id_col: str | None = None) -> str:
    shown = []
    for pos in list(positions)[:_SHOW]:
        ident = "" if id_col is None else f" (id {table.frame[id_col].iloc[pos]!r})"
        shown.append(f"{table.line(pos)}{ident}")
    more = len(positions) - len(shown)
    return ", ".join(shown) + (f" and {more} more" if more > 0 else "")


def _check_id(table: Table, id_col: str) -> None:
    frame = table.frame
    if id_col not in frame.columns:
        raise DataError(f"{table.path}: id column '{id_col}' (data.id) not found; columns are: "
                        f"{', '.join(frame.columns)}")
    missing = np.flatnonzero(frame[id_col].isna().to_numpy())
    if missing.size:
        raise DataError(f"{table.path}: column '{id_col}': missing id at {_rows(table, missing)}")
    dup = np.flatnonzero(frame[id_col].duplicated(keep=False).to_numpy())
    if dup.size:
        raise DataError(f"{table.path}: column '{id_col}': duplicated ids at {_rows(table, dup, id_col)}")


def _column_origin(units: Table, merged: list[Table], id_col: str) -> dict[str, Table]:
    origin = {c: units for c in units.frame.columns}
    for table in merged:
        for col in table.frame.columns:
            if col == id_col:
                continue
            if col in origin:
                raise DataError(f"{table.path}: column '{col}' also exists in {origin[col].path}; "
                                "a merged table may only add new columns")
            origin[col] = table
    return origin


def _merge(units: Table, merged: list[Table], id_col: str) -> pd.DataFrame:
    frame = units.frame
    known = set(frame[id_col])
    for table in merged:
        extra = np.flatnonzero(~table.frame[id_col].isin(known).to_numpy())
        if extra.size:
            raise DataError(f"{table.path}: ids not present in {units.path}: {_rows(table, extra, id_col)}")
        frame = frame.merge(table.frame, on=id_col, how="left", validate="one_to_one")
    return frame


def _required_columns(spec: Spec) -> dict[str, str]:
    need = {spec.design.treatment: "design.treatment"}
    if spec.design.block:
        need[spec.design.block] = "design.block"
    if spec.design.cluster:
        need[spec.design.cluster] = "design.cluster"
    for i, o in enumerate(spec.outcomes):
        need.setdefault(o.column, f"outcomes[{i}].column")
    for i, c in enumerate(spec.analysis.covariates):
        need.setdefault(c, f"analysis.covariates[{i}]")
    if spec.compliance:
        need.setdefault(spec.compliance.received, "compliance.received")
    for i, g in enumerate(spec.subgroups):
        need.setdefault(g, f"subgroups[{i}]")
    return need


def _check_columns(spec: Spec, origin: dict[str, Table]) -> None:
    files = ", ".join(sorted({str(t.path) for t in origin.values()}))
    for col, key in _required_columns(spec).items():
        if col not in origin:

            close = difflib.get_close_matches(col, list(origin), n=1)
            hint = f" — did you mean '{close[0]}'?" if close else ""
            raise DataError(f"{files}: column '{col}' (named by {key} in design.yaml) not found{hint}")
    id_col = spec.data.id
    _check_binary(origin[spec.design.treatment], spec.design.treatment, id_col, "design.treatment", allow_missing=False)
    if spec.compliance:
        _check_binary(origin[spec.compliance.received], spec.compliance.received, id_col, "compliance.received",
                      allow_missing=False)
    numeric = [o.column for o in spec.outcomes] + list(spec.analysis.covariates)
    for col in numeric:
        _check_numeric(origin[col], col, id_col)
    for col, key in ((spec.design.block, "design.block"), (spec.design.cluster, "design.cluster"), *[(g, "subgroups") for g in spec.subgroups]):
        if col:
            table = origin[col]
            missing = np.flatnonzero(table.frame[col].isna().to_numpy())
            if missing.size:
                raise DataError(f"{table.path}: column '{col}' ({key}): missing value at {_rows(table, missing, id_col)}")


def _check_binary(table: Table, col: str, id_col: str, key: str, *, allow_missing: bool) -> None:
    values = pd.to_numeric(table.frame[col], errors="coerce")
    bad = ~values.isin([0, 1])
    if allow_missing:
        bad &= table.frame[col].notna()
    pos = np.flatnonzero(bad.to_numpy())
    if pos.size:
        found = ", ".join(repr(v) for v in table.frame[col].iloc[pos[:_SHOW]])
        raise DataError(f"{table.path}: column '{col}' ({key}) must be exactly 0 or 1; "
                        f"found {found} at {_rows(table, pos, id_col)}")


def _check_numeric(table: Table, col: str, id_col: str) -> None:
    series = table.frame[col]
    if pd.api.types.is_bool_dtype(series):
        return
    values = pd.to_numeric(series, errors="coerce")
    pos = np.flatnonzero((values.isna() & series.notna()).to_numpy())
    if pos.size:
        found = ", ".join(repr(v) for v in series.iloc[pos[:_SHOW]])
        raise DataError(f"{table.path}: column '{col}' must be numeric (blank for missing); "
                        f"found {found} at {_rows(table, pos, id_col)}")


def _coerce(spec: Spec, frame: pd.DataFrame) -> pd.DataFrame:
    frame = frame.copy()
    frame[spec.design.treatment] = pd.to_numeric(frame[spec.design.treatment]).astype(int)
    if spec.compliance:
        frame[spec.compliance.received] = pd.to_numeric(frame[spec.compliance.received]).astype(int)
    for col in [o.column for o in spec.outcomes] + list(spec.analysis.covariates):
        frame[col] = pd.to_numeric(frame[col], errors="coerce").astype(float)
    return frame


def _check_design(spec: Spec, frame: pd.DataFrame, units: Table) -> None:
    z_col, id_col = spec.design.treatment, spec.data.id
    z = frame[z_col]
    where = f"{units.path}"
    if z.nunique() < 2:
        raise DataError(f"{where}: column '{z_col}': every unit has the value {z.iloc[0]}; "
                        "both arms (0 and 1) must be present")
    mech = spec.design.mechanism
    if spec.design.cluster:
        per_cluster = frame.groupby(spec.design.cluster, sort=True)[z_col].nunique()
        split = per_cluster[per_cluster > 1].index.tolist()
        if split:
            raise DataError(f"{where}: clusters split across arms (treatment must be constant within "
                            f"'{spec.design.cluster}'): {', '.join(map(str, split[:_SHOW]))}"
                            + (f" and {len(split) - _SHOW} more" if len(split) > _SHOW else ""))
    if spec.design.block:
        counts = frame.groupby(spec.design.block, sort=True)[z_col].agg(["sum", "count"])
        one_arm = counts[(counts["sum"] == 0) | (counts["sum"] == counts["count"])].index.tolist()
        label = "pair" if mech == "matched_pairs" else "block"
        if one_arm:
            raise DataError(f"{where}: every {label} needs treated and control units; "
                            f"{label}(s) with one arm only in '{spec.design.block}': "
                            f"{', '.join(map(str, one_arm[:_SHOW]))}")
        if mech == "matched_pairs":
            bad = counts[(counts["count"] != 2) | (counts["sum"] != 1)].index.tolist()
            if bad:
                raise DataError(f"{where}: matched pairs need exactly two units, one treated, per pair; "
                                f"pair(s) in '{spec.design.block}' that are not: {', '.join(map(str, bad[:_SHOW]))}")
        if spec.design.cluster:
            nested = frame.groupby(spec.design.cluster, sort=True)[spec.design.block].nunique()
            crossing = nested[nested > 1].index.tolist()
            if crossing:
                raise DataError(f"{where}: clusters must sit inside one block; cluster(s) spanning blocks: "
                                f"{', '.join(map(str, crossing[:_SHOW]))}")


def load_units_for_assignment(spec: Spec) -> pd.DataFrame:
    """The units table for ``assign``: id and design columns checked, treatment not needed."""
    units = read_table(spec.project_dir, spec.data.units, "data.units")
    _check_id(units, spec.data.id)
    for col, key in ((spec.design.block, "design.block"), (spec.design.cluster, "design.cluster")):
        if col and col not in units.frame.columns:
            raise DataError(f"{units.path}: column '{col}' (named by {key} in design.yaml) not found")
    return units.frame.sort_values(spec.data.id, kind="mergesort").reset_index(drop=True)
