"""Read one input table (.csv .parquet .xlsx .dta) exactly as written, or say why not.

Owns: keeping data paths inside the project folder, decoding and parsing each
format, and the problems of a file as a file (empty, binary, wrong type, ragged
lines, duplicate header names, xlsx formulas without a stored value). Only a
blank cell is missing; text such as ``NA``, ``NaN`` or ``#N/A`` stays text
(so an id ``NA`` is a label, and ``NaN`` in an outcome is reported) unless the
spec lists it under ``data.missing_values``.
"""

from __future__ import annotations

import csv
import hashlib
import io
import math
import warnings
from array import array
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from report_kit.errors import DataError

__all__ = ["SUFFIXES", "Table", "read_table", "resolve_inside"]

SUFFIXES = (".csv", ".parquet", ".xlsx", ".dta")
_SHOW = 5  # offending rows listed per problem
#: bytes of a CSV file checked at a time (cut at a line end), so no check holds a copy of the whole file
_WINDOW = 1 << 22
_BOM = b"\xef\xbb\xbf"


@dataclass(frozen=True, kw_only=True, eq=False)
class Table:
    """One input table as read, with where its rows came from.

    ``lines`` holds, for a CSV file whose rows do not simply follow the
    header line by line (blank lines, values spanning lines), the line in the
    file where each row starts (header = line 1), as a compact integer array;
    ``None`` when row ``i`` is on line ``i + 2``, and for the other formats.
    """

    relpath: str
    path: Path
    frame: pd.DataFrame
    sha256: str
    lines: np.ndarray | None = None

    def line(self, pos: int) -> str:
        """Human locator of a row: line number for text files, row number otherwise."""
        suffix = self.path.suffix.lower()
        if suffix == ".csv":
            return f"line {int(self.lines[pos]) if self.lines is not None else pos + 2}"
        if suffix == ".xlsx":
            return f"sheet row {pos + 2}"
        return f"row {pos + 1}"


def resolve_inside(project: Path, rel: str, key: str) -> Path:
    """Resolve a data path and refuse one that leaves the project folder."""
    project = Path(project).resolve()
    path = (project / rel).resolve()
    if not path.is_relative_to(project):
        raise DataError(f"{project / 'design.yaml'}: {key}: '{rel}' points outside the project folder; "
                        "keep data files inside it (e.g. data/units.csv)")
    return path


def read_table(project: Path, rel: str, key: str, *, id_col: str | None = None,
               missing_values: tuple[str, ...] = ()) -> Table:
    """Read one input table; every failure becomes a :class:`DataError` naming the file.

    ``id_col``, when given, is read as text from CSV files so that ids such as
    ``007`` keep their leading zeros (see :func:`report_kit.inputs.data.normalise_ids`).
    Only a blank cell is missing, plus the texts in ``missing_values``
    (``data.missing_values`` of the spec) in columns other than the id.
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
    if not raw or raw.isspace():  # not raw.strip(): that copies the whole file
        raise DataError(f"{path}: the file is empty; expected a header line naming the columns, "
                        "then one row per unit")
    lines = None
    if suffix == ".csv":
        frame, header, lines = _read_csv(path, raw, id_col, missing_values)
    else:
        frame, header = _read_binary(path, raw, suffix, id_col, missing_values)
    _check_header(path, header, frame)
    frame.columns = [str(c).strip() for c in frame.columns]
    if len(frame) == 0:
        raise DataError(f"{path}: has a header ({', '.join(frame.columns)}) but no data rows; "
                        "expected one row per unit")
    return Table(relpath=Path(rel).as_posix(), path=path, frame=frame,
                 sha256=hashlib.sha256(raw).hexdigest(), lines=lines)


def _windows(raw: bytes, start: int) -> Iterator[tuple[int, int]]:
    """``(a, b)`` cuts of ``raw[start:]`` of about :data:`_WINDOW` bytes, each ending at a line end (or the end)."""
    a, size = start, len(raw)
    while a < size:
        cut = raw.find(b"\n", min(a + _WINDOW, size))
        b = size if cut < 0 else cut + 1
        yield a, b
        a = b


def _check_csv_bytes(path: Path, raw: bytes) -> None:
    """The file is UTF-8 text (a UTF-8 byte-order mark allowed), or a :class:`DataError` says what it is.

    Decoded window by window (a line end never falls inside a character), so
    the text of the whole file is never held.
    """
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
        line = raw.count(b"\n", 0, nul) + 1
        raise DataError(f"{path}: contains binary data (a NUL byte on line {line}); it is not a CSV text file")
    view = memoryview(raw)
    for a, b in _windows(raw, len(_BOM) if raw.startswith(_BOM) else 0):
        try:
            str(view[a:b], "utf-8")
        except UnicodeDecodeError as err:
            at = a + err.start
            line = raw.count(b"\n", 0, at) + 1
            raise DataError(f"{path}: is not UTF-8 text (byte 0x{raw[at]:02x} on line {line} is not valid "
                            "UTF-8; the file may be saved as Latin-1 or Windows-1252); save it as UTF-8, for "
                            "example 'CSV UTF-8' in a spreadsheet program") from err


def _csv_records(path: Path, raw: bytes) -> tuple[list[str], np.ndarray]:
    """The header and the starting line of every data record; ragged rows are an error."""
    if b'"' not in raw and b"\r" not in raw:
        header, starts, ragged = _scan_plain(raw)
    else:
        stream = io.TextIOWrapper(io.BytesIO(raw), encoding="utf-8-sig", newline="")
        header, starts, ragged = _scan_quoted(path, stream)
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


def _scan_plain(raw: bytes) -> tuple[list[str] | None, np.ndarray, list[tuple[int, int]]]:
    """Header, starting lines (``int64``) and ragged records of UTF-8 bytes without quotes or carriage returns.

    Line ends and commas are found with numpy, window by window: no list of
    lines and no Python integer per line.
    """
    view = memoryview(raw)
    header: list[str] | None = None
    width = 0
    parts: list[np.ndarray] = []
    ragged: list[tuple[int, int]] = []
    number = 1  # line number of the first line of the window
    for a, b in _windows(raw, len(_BOM) if raw.startswith(_BOM) else 0):
        arr = np.frombuffer(view[a:b], dtype=np.uint8)
        ends = np.flatnonzero(arr == ord("\n"))
        starts = np.concatenate(([0], ends + 1))
        ends = np.append(ends, arr.size)
        if arr[-1] == ord("\n"):  # the line after the last line end starts in the next window
            starts, ends = starts[:-1], ends[:-1]
        numbers = np.arange(number, number + starts.size, dtype=np.int64)
        number += starts.size
        filled = ends > starts
        if header is None:
            first = np.flatnonzero(filled)
            if not first.size:
                continue
            h = first[0]
            header = str(view[a + starts[h]:a + ends[h]], "utf-8").split(",")
            width = len(header) - 1
            filled[:h + 1] = False
        commas = np.flatnonzero(arr == ord(","))
        counts = np.searchsorted(commas, ends) - np.searchsorted(commas, starts)
        bad = filled & (counts != width)
        ragged += zip(numbers[bad].tolist(), (counts[bad] + 1).tolist())
        parts.append(numbers[filled])
    starts = np.concatenate(parts) if parts else np.empty(0, dtype=np.int64)
    return header, starts, ragged


def _scan_quoted(path: Path, stream) -> tuple[list[str] | None, np.ndarray, list[tuple[int, int]]]:
    """Header, starting line (``int64``) of every data record and ragged records of a text stream, by the csv module.

    The path for files with quotes or carriage returns, and the reference :func:`_scan_plain` is tested against.
    """
    reader = csv.reader(stream)
    header: list[str] | None = None
    starts = array("q")
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
    return header, np.frombuffer(starts, dtype=np.int64) if starts else np.empty(0, dtype=np.int64), ragged


def _compact_lines(starts: np.ndarray) -> np.ndarray | None:
    """``None`` when row ``i`` starts on line ``i + 2`` (no blank line, no value over two lines), else the lines."""
    if starts.size and starts[0] == 2 and starts[-1] == starts.size + 1 and (np.diff(starts) == 1).all():
        return None
    return starts.astype(np.uint32) if starts.size and starts[-1] < 2 ** 32 else starts


def _missing_markers(header, id_col: str | None, missing_values: tuple[str, ...]) -> dict:
    """``na_values`` per column: a blank everywhere, the declared texts except in the id column."""
    return {name: [""] if id_col is not None and str(name).strip() == id_col else ["", *missing_values]
            for name in header}


#: an id that reads as the same whole number whichever way it is parsed: no sign other than a minus,
#: no leading zero, no surrounding space, at most 18 digits (always inside int64); the same
#: rule as the whole numbers of :mod:`report_kit.inputs.ids`
_PLAIN_WHOLE = r"-?(0|[1-9][0-9]{0,17})"


def _id_dtype(raw: bytes, name: str) -> type | str:
    """How to parse the id column: ``int64`` when every id is a plain whole number, else text.

    Ids are read as text so that ``007`` keeps its zeros; but a column of
    text holds every id as a string, several times the memory of the whole
    table's numbers. So the id column alone is read first, 262,144 rows at
    a time; when every id is a plain whole number (:data:`_PLAIN_WHOLE`)
    parsing it as ``int64`` gives the very numbers that normalising the text
    gives (:func:`report_kit.inputs.ids.normalise_ids`).
    """
    try:
        chunks = pd.read_csv(io.BytesIO(raw), encoding="utf-8-sig", usecols=[name], dtype={name: str},
                             keep_default_na=False, na_values={name: [""]}, index_col=False,
                             skip_blank_lines=True, chunksize=1 << 18)
        for chunk in chunks:
            ids = chunk[name]
            if ids.isna().any() or not ids.str.fullmatch(_PLAIN_WHOLE).all():
                return str
    except Exception:  # noqa: BLE001 - the full read reports any problem of the file
        return str
    return "int64"


def _read_csv(path: Path, raw: bytes, id_col: str | None,
              missing_values: tuple[str, ...]) -> tuple[pd.DataFrame, list, np.ndarray | None]:
    _check_csv_bytes(path, raw)
    header, starts = _csv_records(path, raw)
    names = [name for name in header if id_col is not None and name.strip() == id_col]
    dtype = {names[0]: _id_dtype(raw, names[0])} if len(names) == 1 else {name: str for name in names}
    try:
        with warnings.catch_warnings():
            # expected here: mixed types in a column and parser notices (the checks report the values)
            warnings.simplefilter("ignore", pd.errors.DtypeWarning)
            warnings.simplefilter("ignore", pd.errors.ParserWarning)
            # From the bytes (already checked to be UTF-8): a StringIO of the text would hold
            # four bytes per character, 1.4 GB for a 350 MB file of 10 million units.
            frame = pd.read_csv(io.BytesIO(raw), encoding="utf-8-sig", keep_default_na=False,
                                na_values=_missing_markers(header, id_col, missing_values), index_col=False,
                                skip_blank_lines=True, dtype=dtype or None)
    except Exception as err:  # noqa: BLE001 - any parser failure is a data problem
        raise DataError(f"{path}: cannot read the table as CSV: {err}") from err
    lines = _compact_lines(starts) if len(starts) == len(frame) else None
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


def _read_binary(path: Path, raw: bytes, suffix: str, id_col: str | None,
                 missing_values: tuple[str, ...]) -> tuple[pd.DataFrame, list | None]:
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
            # expected here: openpyxl's notices about workbook features it does not read (styles,
            # data validation) and pandas' notices while reading Stata files
            warnings.filterwarnings("ignore", category=UserWarning, module=r"openpyxl(\.|$)")
            warnings.filterwarnings("ignore", module=r"pandas\.io\.stata")
            if suffix == ".xlsx":
                first = pd.read_excel(path, engine="openpyxl", header=None, nrows=1)
                header = [] if first.empty else first.iloc[0].tolist()
                frame = pd.read_excel(path, engine="openpyxl", keep_default_na=False,
                                      na_values=_missing_markers(header, id_col, missing_values))
                _check_workbook_cells(path, missing_values)
            elif suffix == ".parquet":
                frame = pd.read_parquet(path)
            else:
                frame = pd.read_stata(path)
    except DataError:
        raise
    except Exception as err:  # noqa: BLE001 - any reader failure is a data problem
        raise DataError(f"{path}: cannot read the table as {what}: {err}") from err
    return frame, header


def _first_sheet_cells(path: Path, *, data_only: bool) -> tuple[str, list[tuple[str, str, object]]]:
    """(sheet name, [(cell, data type, value)]) of the first sheet, read-only."""
    import openpyxl

    book = openpyxl.load_workbook(path, read_only=True, data_only=data_only)
    try:
        sheet = book.worksheets[0]
        cells = [(c.coordinate, getattr(c, "data_type", None), c.value) for row in sheet.iter_rows() for c in row
                 if getattr(c, "coordinate", None)]
        return sheet.title, cells
    finally:
        book.close()


def _check_workbook_cells(path: Path, missing_values: tuple[str, ...]) -> None:
    """Cells pandas would read as missing without a word are an error naming the cells.

    A formula cell with no stored result (the workbook was never calculated,
    or saved with manual calculation) and an error cell such as ``#N/A`` or
    ``#DIV/0!`` (unless that text is listed in ``data.missing_values``).
    """
    name, stored = _first_sheet_cells(path, data_only=True)
    errors = [(ref, v) for ref, kind, v in stored if kind == "e" and str(v) not in missing_values]
    _, written = _first_sheet_cells(path, data_only=False)
    value_of = {ref: v for ref, _, v in stored}
    empty = [ref for ref, kind, _ in written if kind == "f" and value_of.get(ref) is None]
    problems = []
    if empty:
        problems.append(f"{len(empty)} formula cell(s) on sheet '{name}' have no stored value: "
                        f"{_listed(empty)}; open the workbook in a spreadsheet program, let it calculate, and "
                        "save it (or replace the formulas by their values)")
    if errors:
        problems.append(f"{len(errors)} cell(s) on sheet '{name}' hold a spreadsheet error value: "
                        f"{_listed([f'{ref} ({v})' for ref, v in errors])}; correct them, leave them blank for "
                        "missing, or list the text under data.missing_values")
    if problems:
        raise DataError(f"{path}: " + "; and ".join(problems))


def _listed(items: list[str]) -> str:
    return ", ".join(items[:_SHOW]) + (f" and {len(items) - _SHOW} more" if len(items) > _SHOW else "")


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

