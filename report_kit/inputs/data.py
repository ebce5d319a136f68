"""Read the input tables of a project and validate them against the spec.

Owns: reading .csv/.parquet/.xlsx/.dta, keeping data paths inside the project
folder, joining ``merge`` tables on the id, and every data check (file readable
and well formed, id unique and present, treatment exactly 0/1, design columns
present, clusters not split, both arms in every block, numeric and finite
outcomes and covariates). Errors name the file, the column, and the first
offending rows by id and line number. The result is a
:class:`report_kit.inputs.model.Study`; ``data/`` is only ever read.

Normalisation (documented in ``docs/spec.md``): ids are compared as whole
numbers when every id in every table is one (``7``, not ``007`` or ``7.5``),
otherwise as text with surrounding spaces removed; block, cluster and subgroup
labels lose surrounding spaces, and a label column that mixes numbers and text
is read as text.
"""

from __future__ import annotations

import csv
import difflib
import hashlib
import io
import math
import warnings
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from report_kit.errors import DataError
from report_kit.inputs.ids import _as_text, _is_missing, _plain, normalise_ids
from report_kit.inputs.model import InputFile, Spec, Study

SUFFIXES = (".csv", ".parquet", ".xlsx", ".dta")
_SHOW = 5  # offending rows listed per problem


@dataclass(frozen=True, kw_only=True)
class Table:
    """One input table as read, with where its rows came from.

    ``lines`` holds, for a CSV file, the line in the file where each row
    starts (header = line 1); it is empty for the other formats.
    """

    relpath: str
    path: Path
    frame: pd.DataFrame
    sha256: str
    lines: tuple[int, ...] = ()

    def line(self, pos: int) -> str:
        """Human locator of a row: line number for text files, row number otherwise."""
        suffix = self.path.suffix.lower()
        if suffix == ".csv":
            return f"line {self.lines[pos] if self.lines else pos + 2}"
        if suffix == ".xlsx":
            return f"sheet row {pos + 2}"
        return f"row {pos + 1}"


# --------------------------------------------------------------------------- loading


def load_study(spec: Spec) -> Study:
    """Read, merge and validate the data a spec names; return a :class:`Study`."""
    project, id_col = spec.project_dir, spec.data.id
    tables = [read_table(project, spec.data.units, "data.units", id_col=id_col)]
    tables += [read_table(project, rel, f"data.merge[{i}]", id_col=id_col) for i, rel in enumerate(spec.data.merge)]
    for table in tables:
        _require_id_column(table, id_col)
    tables = normalise_ids(tables, id_col)
    for table in tables:
        _check_id(table, id_col)
    units, merged = tables[0], tables[1:]
    origin = _column_origin(units, merged, id_col)
    _check_columns(spec, origin)
    frame = _merge(units, merged, id_col)
    locate = _Locator(units, id_col)
    _check_merge_gaps(spec, frame, units, origin, locate)
    frame = _normalise_labels(frame, [c for c in (spec.design.block, spec.design.cluster, *spec.subgroups) if c])
    frame = frame.sort_values(id_col, kind="mergesort").reset_index(drop=True)
    frame = _coerce(spec, frame)
    _check_ranges(spec, frame, origin, locate)
    _check_adjustment_covariates(spec, frame, origin, locate)
    _check_design(spec, frame, units, locate)
    inputs = tuple(InputFile(path=t.relpath, sha256=t.sha256, rows=len(t.frame)) for t in tables)
    return Study(spec=spec, frame=frame, inputs=inputs)


def load_units_for_assignment(spec: Spec) -> pd.DataFrame:
    """The units table for ``assign``: id and design columns checked, treatment not needed.

    Rows are sorted by id; ids and labels are normalised as in :func:`load_study`,
    so the assignment drawn here is the one ``check`` re-draws.
    """
    id_col = spec.data.id
    units = read_table(spec.project_dir, spec.data.units, "data.units", id_col=id_col)
    _require_id_column(units, id_col)
    (units,) = normalise_ids([units], id_col)
    _check_id(units, id_col)
    labels = []
    for col, key in ((spec.design.block, "design.block"), (spec.design.cluster, "design.cluster")):
        if not col:
            continue
        if col not in units.frame.columns:
            raise DataError(f"{units.path}: column '{col}' (named by {key} in design.yaml) not found"
                            f"{_close_hint(col, list(units.frame.columns))}; drawing the assignment needs it "
                            "in the units table")
        _check_no_missing(units, col, key, id_col)
        labels.append(col)
    frame = _normalise_labels(units.frame, labels)
    _check_drawable(spec, frame, units)
    return frame.sort_values(id_col, kind="mergesort").reset_index(drop=True)


def _check_drawable(spec: Spec, frame: pd.DataFrame, units: Table) -> None:
    """Structure the draw needs, named by label and row: pairs of two, nested clusters, both arms per block."""
    from report_kit.design.mechanism import number_treated

    design, id_col = spec.design, spec.data.id
    mech, block, cluster = design.mechanism, design.block, design.cluster
    locate = _Locator(units, id_col)
    if mech == "matched_pairs":
        sizes = frame.groupby(block, sort=True).size()
        bad = sizes[sizes != 2]
        if len(bad):
            first = frame[frame[block] == bad.index[0]][id_col].tolist()
            listed = ", ".join(f"{_plain(p)} ({int(k)} unit(s))" for p, k in list(bad.items())[:_SHOW])
            raise DataError(f"{units.path}: matched pairs need exactly two units per pair; pair(s) in "
                            f"'{block}' that are not: {listed}"
                            + (f" and {len(bad) - _SHOW} more" if len(bad) > _SHOW else "")
                            + f"; pair {_plain(bad.index[0])} is at {locate.rows(first)}")
    if block and cluster:
        nested = frame.groupby(cluster, sort=True)[block].nunique()
        crossing = nested[nested > 1].index.tolist()
        if crossing:
            members = frame[frame[cluster] == crossing[0]]
            raise DataError(f"{units.path}: clusters must sit inside one block; cluster(s) spanning blocks: "
                            f"{_label_list(crossing)}; cluster {_show(crossing[0])} is in blocks "
                            f"{_label_list(sorted(members[block].unique().tolist(), key=str))}")
    if mech == "bernoulli":
        return
    share = 0.5 if mech == "matched_pairs" or design.probability is None else float(design.probability)
    strata = frame.groupby(block, sort=True) if block else [(None, frame)]
    what = "cluster(s)" if cluster else "unit(s)"
    source = " from design.probability" if design.probability is not None and mech != "matched_pairs" else ""
    for label, members in strata:
        size = members[cluster].nunique() if cluster else len(members)
        treated = number_treated(share, size)
        if treated in (0, size):
            where = "the study" if label is None else f"{'pair' if mech == 'matched_pairs' else 'block'} {_plain(label)}"
            raise DataError(f"{units.path}: {where} has {size} {what}; drawing at share {share:g}{source} "
                            f"treats {treated} of them, leaving an arm empty"
                            + ("" if label is None else f"; every block needs {what} in both arms ({where} is "
                                                        f"at {locate.rows(members[id_col].tolist())})"))


def resolve_inside(project: Path, rel: str, key: str) -> Path:
    """Resolve a data path and refuse one that leaves the project folder."""
    project = Path(project).resolve()
    path = (project / rel).resolve()
    if not path.is_relative_to(project):
        raise DataError(f"{project / 'design.yaml'}: {key}: '{rel}' points outside the project folder; "
                        "keep data files inside it (e.g. data/units.csv)")
    return path


# --------------------------------------------------------------------------- reading one table


def read_table(project: Path, rel: str, key: str, *, id_col: str | None = None) -> Table:
    """Read one input table; every failure becomes a :class:`DataError` naming the file.

    ``id_col``, when given, is read as text from CSV files so that ids such as
    ``007`` keep their leading zeros (see :func:`normalise_ids`).
    """
    path = resolve_inside(project, rel, key)
    if not path.exists():
        raise DataError(f"{path}: file not found (named by {key} in design.yaml)")
    if path.is_dir():
        raise DataError(f"{path}: is a folder, not a file (named by {key} in design.yaml); "
                        f"expected a table file ({', '.join(SUFFIXES)})")
    if not path.is_file():
        raise DataError(f"{path}: is not a regular file (named by {key} in design.yaml)")
    suffix = path.suffix.lower()
    if suffix not in SUFFIXES:
        raise DataError(f"{path}: unsupported file type '{path.suffix}'; expected one of {', '.join(SUFFIXES)}")
    try:
        raw = path.read_bytes()
    except OSError as err:
        reason = "permission denied" if isinstance(err, PermissionError) else (err.strerror or str(err))
        raise DataError(f"{path}: cannot read the file ({reason}; named by {key} in design.yaml)") from err
    if not raw.strip():
        raise DataError(f"{path}: the file is empty; expected a header line naming the columns, "
                        "then one row per unit")
    lines: tuple[int, ...] = ()
    if suffix == ".csv":
        frame, header, lines = _read_csv(path, raw, id_col)
    else:
        frame, header = _read_binary(path, raw, suffix)
    _check_header(path, header, frame)
    frame.columns = [str(c).strip() for c in frame.columns]
    if len(frame) == 0:
        raise DataError(f"{path}: has a header ({', '.join(frame.columns)}) but no data rows; "
                        "expected one row per unit")
    return Table(relpath=Path(rel).as_posix(), path=path, frame=frame,
                 sha256=hashlib.sha256(raw).hexdigest(), lines=lines)


def _decode_csv(path: Path, raw: bytes) -> str:
    if raw.startswith((b"\xff\xfe", b"\xfe\xff")):
        raise DataError(f"{path}: is UTF-16 text; save it as UTF-8 (for example 'CSV UTF-8' in a "
                        "spreadsheet program)")
    if raw.startswith(b"PK\x03\x04"):
        raise DataError(f"{path}: looks like an Excel workbook (.xlsx) with a .csv name; rename it to "
                        ".xlsx or export it as CSV")
    if raw.startswith(b"PAR1"):
        raise DataError(f"{path}: looks like a Parquet file with a .csv name; rename it to .parquet")
    nul = raw.find(b"\x00")
    if nul >= 0:
        line = raw[:nul].count(b"\n") + 1
        raise DataError(f"{path}: contains binary data (a NUL byte on line {line}); it is not a CSV text file")
    try:
        return raw.decode("utf-8-sig")
    except UnicodeDecodeError as err:
        line = raw[:err.start].count(b"\n") + 1
        raise DataError(f"{path}: is not UTF-8 text (byte 0x{raw[err.start]:02x} on line {line} is not valid "
                        "UTF-8; the file may be saved as Latin-1 or Windows-1252); save it as UTF-8, for "
                        "example 'CSV UTF-8' in a spreadsheet program") from err


def _csv_records(path: Path, text: str) -> tuple[list[str], list[int]]:
    """The header and the starting line of every data record; ragged rows are an error."""
    if '"' not in text and "\r" not in text:
        header, starts, ragged = _plain_csv_records(text)
    else:
        header, starts, ragged = _quoted_csv_records(path, text)
    if header is None:
        raise DataError(f"{path}: the file is empty; expected a header line naming the columns, "
                        "then one row per unit")
    if ragged:
        shown = ", ".join(f"line {ln} has {k}" for ln, k in ragged[:_SHOW])
        more = f" and {len(ragged) - _SHOW} more" if len(ragged) > _SHOW else ""
        hint = ("; is there a title line above the header? The first line must name the columns"
                if len(header) == 1 and len(ragged) == len(starts) else " (a comma inside a value needs quotes)")
        raise DataError(f"{path}: the header (line 1) names {len(header)} column(s) but {shown}{more} "
                        f"value(s); every line needs one value per column{hint}")
    return header, starts


def _plain_csv_records(text: str) -> tuple[list[str] | None, list[int], list[tuple[int, int]]]:
    """:func:`_quoted_csv_records` for text without quotes or carriage returns: one record per non-empty line."""
    lines = text.split("\n")
    numbers = [i for i, line in enumerate(lines, start=1) if line]
    if not numbers:
        return None, [], []
    header = lines[numbers[0] - 1].split(",")
    width = len(header) - 1
    starts = numbers[1:]
    ragged = [(i, lines[i - 1].count(",") + 1) for i in starts if lines[i - 1].count(",") != width]
    return header, starts, ragged


def _quoted_csv_records(path: Path, text: str) -> tuple[list[str] | None, list[int], list[tuple[int, int]]]:
    """The header, the starting line of every data record and the ragged records, by the csv module."""
    reader = csv.reader(io.StringIO(text, newline=""))
    header: list[str] | None = None
    starts: list[int] = []
    ragged: list[tuple[int, int]] = []
    previous = 0
    try:
        for record in reader:
            start, previous = previous + 1, reader.line_num
            if not record:
                continue
            if header is None:
                header = record
                continue
            starts.append(start)
            if len(record) != len(header):
                ragged.append((start, len(record)))
    except csv.Error as err:
        raise DataError(f"{path}: not a well-formed CSV file near line {reader.line_num}: {err}") from err
    return header, starts, ragged


def _read_csv(path: Path, raw: bytes, id_col: str | None) -> tuple[pd.DataFrame, list, tuple[int, ...]]:
    text = _decode_csv(path, raw)
    header, starts = _csv_records(path, text)
    dtype = {name: str for name in header if id_col is not None and name.strip() == id_col}
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            # From the bytes (already checked to be UTF-8): a StringIO of the text would hold
            # four bytes per character, 1.4 GB for a 350 MB file of 10 million units.
            frame = pd.read_csv(io.BytesIO(raw), encoding="utf-8-sig", keep_default_na=True, index_col=False,
                                skip_blank_lines=True, dtype=dtype or None)
    except Exception as err:  # noqa: BLE001 - any parser failure is a data problem
        raise DataError(f"{path}: cannot read the table as CSV: {err}") from err
    lines = tuple(starts) if len(starts) == len(frame) else ()
    return frame, header, lines


_MAGIC = {".xlsx": (b"PK\x03\x04", "an Excel .xlsx workbook"),
          ".parquet": (b"PAR1", "a Parquet file"),
          ".dta": (b"", "a Stata .dta file")}


def _looks_like_text(raw: bytes) -> bool:
    head = raw[:4096]
    if b"\x00" in head:
        return False
    try:
        head.decode("utf-8")
    except UnicodeDecodeError as err:
        return err.start > len(head) - 4  # a character cut at the end of the sample
    return True


def _read_binary(path: Path, raw: bytes, suffix: str) -> tuple[pd.DataFrame, list | None]:
    magic, what = _MAGIC[suffix]
    if suffix == ".xlsx" and raw.startswith(b"\xd0\xcf\x11\xe0"):
        raise DataError(f"{path}: is an old Excel 97-2003 workbook (.xls) or a password-protected one; "
                        "save it as .xlsx (or CSV) without a password")
    if not raw.startswith(magic) or (suffix == ".dta" and _looks_like_text(raw)):
        hint = " (it looks like text, perhaps CSV: rename it to .csv)" if _looks_like_text(raw) else ""
        raise DataError(f"{path}: is not {what}{hint}")
    header = None
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            if suffix == ".xlsx":
                frame = pd.read_excel(path, engine="openpyxl")
                first = pd.read_excel(path, engine="openpyxl", header=None, nrows=1)
                header = [] if first.empty else first.iloc[0].tolist()
            elif suffix == ".parquet":
                frame = pd.read_parquet(path)
            else:
                frame = pd.read_stata(path)
    except DataError:
        raise
    except Exception as err:  # noqa: BLE001 - any reader failure is a data problem
        raise DataError(f"{path}: cannot read the table as {what}: {err}") from err
    return frame, header


def _check_header(path: Path, header: list | None, frame: pd.DataFrame) -> None:
    if len(frame.columns) == 0:
        raise DataError(f"{path}: the table has no columns; expected a header naming the columns, "
                        "then one row per unit")
    names = [str(c).strip() for c in (header if header is not None else frame.columns)
             if not (isinstance(c, float) and math.isnan(c))]
    dupes = sorted({c for c in names if c and names.count(c) > 1})
    if dupes:
        raise DataError(f"{path}: duplicate column name(s) in the header: {', '.join(dupes)}; "
                        "each column needs its own name")


# --------------------------------------------------------------------------- ids and labels


def _show(value) -> str:
    return "blank" if _is_missing(value) else repr(_plain(value))


def _require_id_column(table: Table, id_col: str) -> None:
    columns = list(table.frame.columns)
    if id_col in columns:
        return
    hint = _close_hint(id_col, columns)
    if sum(str(c).startswith("Unnamed:") for c in columns) * 2 > len(columns):
        hint += "; the first row must name the columns (is there a title row above the header?)"
    if len(columns) == 1 and any(sep in columns[0] for sep in (";", "\t", "|")):
        sep = next(s for s in (";", "\t", "|") if s in columns[0])
        hint = (f"; the header looks separated by {sep!r} — report-kit reads comma-separated files, so "
                "export the table as CSV with commas")
    raise DataError(f"{table.path}: id column '{id_col}' (data.id) not found{hint}; columns are: "
                    f"{', '.join(columns)}")


def _normalise_labels(frame: pd.DataFrame, columns: list[str]) -> pd.DataFrame:
    """Block, cluster and subgroup labels: trim spaces; a mixture of numbers and text becomes text."""
    frame = frame.copy()
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


def _rows(table: Table, positions, id_col: str | None = None) -> str:
    shown = []
    for pos in list(positions)[:_SHOW]:
        ident = "" if id_col is None else f" (id {_show(table.frame[id_col].iloc[pos])})"
        shown.append(f"{table.line(pos)}{ident}")
    more = len(positions) - len(shown)
    return ", ".join(shown) + (f" and {more} more" if more > 0 else "")


class _Locator:
    """Finds the line of a unit in the units table from its id (for rows of the merged frame)."""

    def __init__(self, units: Table, id_col: str):
        self.units = units
        self._pos = {v: i for i, v in enumerate(units.frame[id_col].tolist())}

    def rows(self, ids, values=None, column: str | None = None) -> str:
        """``line 2 (id 'a')`` for each id (the first few), with ``column = value`` when given."""
        ids = list(ids)
        values = None if values is None else list(values)
        shown = []
        for k, ident in enumerate(ids[:_SHOW]):
            pos = self._pos.get(_plain(ident))
            where = self.units.line(pos) if pos is not None else "row ?"
            value = "" if values is None else f", {column} = {_show(values[k])}"
            shown.append(f"{where} (id {_show(ident)}{value})")
        more = len(ids) - len(shown)
        return ", ".join(shown) + (f" and {more} more" if more > 0 else "")


def _close_hint(name: str, options: list[str]) -> str:
    close = difflib.get_close_matches(name, [str(o) for o in options], n=1)
    return f" — did you mean '{close[0]}'?" if close else ""


def _check_id(table: Table, id_col: str) -> None:
    frame = table.frame
    missing = np.flatnonzero(frame[id_col].isna().to_numpy())
    if missing.size:
        raise DataError(f"{table.path}: column '{id_col}': missing id at {_rows(table, missing)}")
    dup = np.flatnonzero(frame[id_col].duplicated(keep=False).to_numpy())
    if dup.size:
        raise DataError(f"{table.path}: column '{id_col}': duplicated ids at {_rows(table, dup, id_col)}")


# --------------------------------------------------------------------------- merging


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
    known = set(frame[id_col].tolist())
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


def _every_unit_columns(spec: Spec) -> dict[str, str]:
    """Columns that need a value for every unit (no missing values allowed)."""
    need = {spec.design.treatment: "design.treatment"}
    if spec.compliance:
        need.setdefault(spec.compliance.received, "compliance.received")
    if spec.design.block:
        need.setdefault(spec.design.block, "design.block")
    if spec.design.cluster:
        need.setdefault(spec.design.cluster, "design.cluster")
    for i, g in enumerate(spec.subgroups):
        need.setdefault(g, f"subgroups[{i}]")
    return need


def _check_columns(spec: Spec, origin: dict[str, Table]) -> None:
    files = ", ".join(sorted({str(t.path) for t in origin.values()}))
    for col, key in _required_columns(spec).items():
        if col not in origin:
            hint = _close_hint(col, list(origin))
            if key == "design.treatment" and spec.design.seed is not None:
                hint += ("; to draw it from design.seed run `report-kit assign` and list the file it "
                         "writes (data/assignment.csv) under data.merge")
            raise DataError(f"{files}: column '{col}' (named by {key} in design.yaml) not found{hint}")
    id_col = spec.data.id
    _check_binary(origin[spec.design.treatment], spec.design.treatment, id_col, "design.treatment")
    if spec.compliance:
        _check_binary(origin[spec.compliance.received], spec.compliance.received, id_col, "compliance.received")
    numeric = {o.column: f"outcomes[{i}].column" for i, o in enumerate(spec.outcomes)}
    for i, c in enumerate(spec.analysis.covariates):
        numeric.setdefault(c, f"analysis.covariates[{i}]")
    for col, key in numeric.items():
        _check_numeric(origin[col], col, id_col, key)
    for col, key in _every_unit_columns(spec).items():
        if key not in ("design.treatment", "compliance.received"):
            _check_no_missing(origin[col], col, key, id_col)


def _check_no_missing(table: Table, col: str, key: str, id_col: str) -> None:
    missing = np.flatnonzero(table.frame[col].isna().to_numpy())
    if missing.size:
        raise DataError(f"{table.path}: column '{col}' ({key}): missing value at {_rows(table, missing, id_col)}")


def _check_merge_gaps(spec: Spec, frame: pd.DataFrame, units: Table, origin: dict[str, Table],
                      locate: _Locator) -> None:
    """A column every unit needs that comes from a merged table must have a row for every unit."""
    for col, key in _every_unit_columns(spec).items():
        table = origin[col]
        if table is units:
            continue
        gaps = frame[spec.data.id][frame[col].isna()].tolist()
        if gaps:
            raise DataError(f"{table.path}: no row for {len(gaps)} unit(s) of {units.path}: {locate.rows(gaps)}; "
                            f"column '{col}' ({key}) needs a value for every unit")


def _check_binary(table: Table, col: str, id_col: str, key: str) -> None:
    values = pd.to_numeric(table.frame[col], errors="coerce")
    pos = np.flatnonzero((~values.isin([0, 1])).to_numpy())
    if pos.size:
        found = ", ".join(_show(v) for v in table.frame[col].iloc[pos[:_SHOW]])
        raise DataError(f"{table.path}: column '{col}' ({key}) must be exactly 0 or 1; "
                        f"found {found} at {_rows(table, pos, id_col)}")


def _check_numeric(table: Table, col: str, id_col: str, key: str) -> None:
    series = table.frame[col]
    if pd.api.types.is_bool_dtype(series):
        return
    values = pd.to_numeric(series, errors="coerce")
    pos = np.flatnonzero((values.isna() & series.notna()).to_numpy())
    if pos.size:
        found = ", ".join(_show(v) for v in series.iloc[pos[:_SHOW]])
        raise DataError(f"{table.path}: column '{col}' ({key}) must be numeric (blank for missing); "
                        f"found {found} at {_rows(table, pos, id_col)}")
    infinite = np.flatnonzero(np.isinf(values.to_numpy(dtype=float, na_value=np.nan)))
    if infinite.size:
        found = ", ".join(_show(v) for v in series.iloc[infinite[:_SHOW]])
        raise DataError(f"{table.path}: column '{col}' ({key}) must hold finite numbers (blank for missing); "
                        f"found {found} at {_rows(table, infinite, id_col)}")


def _coerce(spec: Spec, frame: pd.DataFrame) -> pd.DataFrame:
    frame = frame.copy()
    frame[spec.design.treatment] = pd.to_numeric(frame[spec.design.treatment]).astype(int)
    if spec.compliance:
        frame[spec.compliance.received] = pd.to_numeric(frame[spec.compliance.received]).astype(int)
    for col in [o.column for o in spec.outcomes] + list(spec.analysis.covariates):
        frame[col] = pd.to_numeric(frame[col], errors="coerce").astype(float)
    return frame


# --------------------------------------------------------------------------- checks on the merged frame


def _check_ranges(spec: Spec, frame: pd.DataFrame, origin: dict[str, Table], locate: _Locator) -> None:
    for i, o in enumerate(spec.outcomes):
        if o.range is None:
            continue
        lo, hi = o.range
        y = frame[o.column].to_numpy(dtype=float)
        outside = np.flatnonzero(~np.isnan(y) & ((y < lo) | (y > hi)))
        if outside.size:
            ids = frame[spec.data.id].iloc[outside].tolist()
            raise DataError(f"{origin[o.column].path}: column '{o.column}' has value(s) outside its declared "
                            f"range [{lo:g}, {hi:g}] (outcomes[{i}].range in design.yaml) at "
                            f"{locate.rows(ids, y[outside], o.column)}")


def _check_adjustment_covariates(spec: Spec, frame: pd.DataFrame, origin: dict[str, Table],
                                 locate: _Locator) -> None:
    """The covariate-adjusted estimate needs every covariate of every unit with an observed outcome."""
    if not (spec.analysis.adjust and spec.analysis.covariates):
        return
    observed = np.zeros(len(frame), dtype=bool)
    for o in spec.outcomes:
        observed |= frame[o.column].notna().to_numpy()
    for i, col in enumerate(spec.analysis.covariates):
        gaps = np.flatnonzero(observed & frame[col].isna().to_numpy())
        if gaps.size:
            ids = frame[spec.data.id].iloc[gaps].tolist()
            raise DataError(f"{origin[col].path}: column '{col}' (analysis.covariates[{i}]) is missing for "
                            f"{gaps.size} unit(s) with an observed outcome: {locate.rows(ids)}; the "
                            "covariate-adjusted estimate (analysis.adjust: true) needs complete baseline "
                            "covariates — fill them in, remove the covariate, or set analysis.adjust: false")


def _label_list(labels) -> str:
    labels = [str(_plain(v)) for v in labels]
    return ", ".join(labels[:_SHOW]) + (f" and {len(labels) - _SHOW} more" if len(labels) > _SHOW else "")


def _check_design(spec: Spec, frame: pd.DataFrame, units: Table, locate: _Locator) -> None:
    z_col, id_col = spec.design.treatment, spec.data.id
    z = frame[z_col]
    where = f"{units.path}"
    if z.nunique() < 2:
        raise DataError(f"{where}: column '{z_col}': every unit has the value {z.iloc[0]}; "
                        "both arms (0 and 1) must be present")
    mech = spec.design.mechanism
    if spec.design.cluster:
        cl = spec.design.cluster
        per_cluster = frame.groupby(cl, sort=True)[z_col].nunique()
        split = per_cluster[per_cluster > 1].index.tolist()
        if split:
            members = frame[frame[cl] == split[0]]
            first = [members[members[z_col] == arm][id_col].iloc[0] for arm in (1, 0)]
            raise DataError(f"{where}: clusters split across arms (treatment must be constant within "
                            f"'{cl}'): {_label_list(split)}; e.g. cluster {_show(split[0])} has "
                            f"{z_col} = 1 at {locate.rows(first[:1])} and 0 at {locate.rows(first[1:])}")
    if spec.design.block:
        blk = spec.design.block
        counts = frame.groupby(blk, sort=True)[z_col].agg(["sum", "count"])
        label = "pair" if mech == "matched_pairs" else "block"
        if mech == "matched_pairs":
            bad = counts[(counts["count"] != 2) | (counts["sum"] != 1)]
            if len(bad):
                first = frame[frame[blk] == bad.index[0]]
                raise DataError(f"{where}: matched pairs need exactly two units, one treated, per pair; "
                                f"pair(s) in '{blk}' that are not: "
                                + ", ".join(f"{_plain(p)} ({int(r['count'])} unit(s), {int(r['sum'])} treated)"
                                            for p, r in list(bad.iterrows())[:_SHOW])
                                + (f" and {len(bad) - _SHOW} more" if len(bad) > _SHOW else "")
                                + f"; pair {_plain(bad.index[0])} is at "
                                f"{locate.rows(first[id_col].tolist(), first[z_col].tolist(), z_col)}")
        one_arm = counts[(counts["sum"] == 0) | (counts["sum"] == counts["count"])]
        if len(one_arm):
            first = frame[frame[blk] == one_arm.index[0]]
            described = ", ".join(
                f"{_plain(b)} ({int(r['count'])} unit(s), all {'treated' if r['sum'] else 'control'})"
                for b, r in list(one_arm.iterrows())[:_SHOW])
            more = f" and {len(one_arm) - _SHOW} more" if len(one_arm) > _SHOW else ""
            raise DataError(f"{where}: every {label} needs treated and control units; "
                            f"{label}(s) with one arm only in '{blk}': {described}{more}; "
                            f"{label} {_plain(one_arm.index[0])} is at {locate.rows(first[id_col].tolist())}")
        if spec.design.cluster:
            nested = frame.groupby(spec.design.cluster, sort=True)[blk].nunique()
            crossing = nested[nested > 1].index.tolist()
            if crossing:
                members = frame[frame[spec.design.cluster] == crossing[0]]
                raise DataError(f"{where}: clusters must sit inside one block; cluster(s) spanning blocks: "
                                f"{_label_list(crossing)}; cluster {_show(crossing[0])} is in blocks "
                                f"{_label_list(sorted(members[blk].unique().tolist(), key=str))}")
