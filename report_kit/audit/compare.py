"""What changed between two runs: inputs (row by row, by unit id), results, conclusions.

Owns :func:`compare_runs` (the structured diff behind ``report-kit diff`` and
the report's "Changes since the previous run"), :func:`format_diff_text`, the
row-level table diff :func:`diff_tables`, the result diff :func:`diff_results`
(also used by :mod:`report_kit.audit.verify`) and :func:`conclusion_changes`.

A run folder for this module is a folder holding ``results.json``;
``manifest.json`` and the input copies under ``inputs/`` are used when present.
The rules are written out in ``docs/provenance.md``.
"""

from __future__ import annotations

import math
from collections import Counter
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd
import yaml

from report_kit.validate import tolerance
from report_kit.errors import DataError, UsageError
from report_kit.audit.planlock import diff_specs
from report_kit.audit.provenance import (
    INPUTS_DIR, MANIFEST_NAME, RESULTS_NAME, SPEC_NAME, check_relative_path,
    load_json_file, sha256_file, to_json_value,
)

__all__ = [
    "RECORD_KEYS", "ResultChange", "ResultRecord", "ResultsDiff", "TableDiff", "InputChange",
    "RunDiff", "compare_runs", "diff_results", "diff_tables", "conclusion_changes",
    "format_diff_text",
]

DIFF_SCHEMA = "report-kit/diff/1"
#: Results that differ by less than this (relative, or absolute near zero) are not
#: reported as moved: floating-point noise from a different summation order. Same
#: tolerance as `report-kit verify`.
RESULT_RTOL = 1e-9
RESULT_ATOL = 1e-12
DEFAULT_ALPHA = 0.05
#: At most this many changed cells and added/removed ids are kept per table.
CELL_LIMIT = 1000

#: Fields that identify one entry of a list in results.json, by section.
RECORD_KEYS = {
    "estimates": ("outcome", "estimand", "estimator", "subgroup", "method"),
    "tests": ("outcome", "statistic", "null_effect"),
    "intervals": ("outcome", "method", "level"),
    "multiplicity": ("outcome", "family", "method"),
    "balance.covariates": ("name",),
    "attrition.bounds": ("outcome", "method"),
    "inputs": ("path",),
}

#: Fields that also identify an entry of a multi-arm run, when set (contrast, factorial effect).
ARM_KEYS = ("arm", "reference", "factor")

#: Conclusion rules: p-values compared with alpha, intervals compared with zero, signs.
P_VALUE_FIELDS = {"tests": "p_value", "multiplicity": "p_adjusted",
                  "balance.omnibus": "p_value", "attrition": "p_value"}
INTERVAL_FIELDS = {"estimates": ("ci_low", "ci_high"), "intervals": ("ci_low", "ci_high"),
                   "attrition.bounds": ("lower", "upper")}
SIGN_FIELDS = {"estimates": "estimate", "intervals": "hodges_lehmann"}

Key = tuple  # tuple of (field name, value) pairs


# ------------------------------------------------------------------ result records

def _hashable(value):
    if isinstance(value, list):
        return tuple(_hashable(v) for v in value)
    if isinstance(value, dict):
        return tuple((k, _hashable(v)) for k, v in value.items())
    return value


def _flat_fields(node: dict, prefix: str = "") -> dict:
    out = {}
    for name, value in node.items():
        path = f"{prefix}{name}"
        if isinstance(value, dict):
            out.update(_flat_fields(value, f"{path}."))
        elif isinstance(value, list) and value and all(isinstance(v, dict) for v in value):
            for i, item in enumerate(value):
                out.update(_flat_fields(item, f"{path}[{i}]."))
        else:
            out[path] = value
    return out


def _walk(node: dict, section: str, out: dict) -> None:
    fields, children = {}, []
    for name, value in node.items():
        path = f"{section}.{name}" if section else name
        if isinstance(value, dict):
            children.append((_walk, value, path))
        elif isinstance(value, list) and (path in RECORD_KEYS or (value and all(isinstance(v, dict) for v in value))):
            children.append((_walk_list, value, path))
        else:
            fields[name] = value
    if fields:
        out[(section, ())] = fields
    for func, value, path in children:
        func(value, path, out)


def _walk_list(items: list, section: str, out: dict) -> None:
    key_fields = RECORD_KEYS.get(section)
    seen: Counter = Counter()
    for i, item in enumerate(items):
        if not isinstance(item, dict):
            item = {"value": item}
        key = tuple((k, _hashable(item.get(k))) for k in key_fields) if key_fields else (("#", i),)
        if key_fields:
            key += tuple((k, _hashable(item[k])) for k in ARM_KEYS if item.get(k) is not None)
        seen[key] += 1
        if seen[key] > 1:
            key = key + (("#", seen[key]),)
        out[(section, key)] = _flat_fields(item)


def _records(results: dict) -> dict:
    """results.json as {(section, key): {field: value}} in document order."""
    out: dict = {}
    _walk(results, "", out)
    return out


def _label(section: str, key: Key) -> str:
    parts = [f"{k}={v}" for k, v in key if v is not None]
    name = section or "(top level)"
    return f"{name}[{', '.join(parts)}]" if parts else name


def _is_number(value) -> bool:
    return isinstance(value, (int, float)) and not isinstance(value, bool)


def _equal(a, b, rel_tol: float, abs_tol: float) -> bool:
    if _is_number(a) and _is_number(b):
        return a == b or math.isclose(a, b, rel_tol=rel_tol, abs_tol=abs_tol)
    if isinstance(a, list) and isinstance(b, list):
        return len(a) == len(b) and all(_equal(x, y, rel_tol, abs_tol) for x, y in zip(a, b))
    if isinstance(a, bool) or isinstance(b, bool):
        return type(a) is type(b) and a == b
    return a == b


@dataclass(frozen=True, kw_only=True)
class ResultChange:
    """One value of results.json that differs between two runs."""

    section: str
    key: Key
    field: str
    old: object
    new: object

    @property
    def label(self) -> str:
        return _label(self.section, self.key)

    @property
    def difference(self) -> float | None:
        """``new - old`` when both are numbers."""
        if _is_number(self.old) and _is_number(self.new):
            return self.new - self.old
        return None

    @property
    def relative_difference(self) -> float | None:
        """``(new - old) / |old|`` when both are numbers and ``old != 0``."""
        diff = self.difference
        return None if diff is None or self.old == 0 else diff / abs(self.old)

    def to_dict(self) -> dict:
        return {"section": self.section, "key": dict(self.key), "label": self.label,
                "field": self.field, "old": self.old, "new": self.new,
                "difference": self.difference, "relative_difference": self.relative_difference}


@dataclass(frozen=True, kw_only=True)
class ResultRecord:
    """An entry of results.json present in only one of two runs."""

    section: str
    key: Key
    values: dict = field(compare=False)

    @property
    def label(self) -> str:
        return _label(self.section, self.key)

    def to_dict(self) -> dict:
        return {"section": self.section, "key": dict(self.key), "label": self.label,
                "values": self.values}


@dataclass(frozen=True, kw_only=True)
class ResultsDiff:
    """Differences between two results dicts: changed values, added and removed entries."""

    changed: tuple[ResultChange, ...]
    added: tuple[ResultRecord, ...]
    removed: tuple[ResultRecord, ...]

    @property
    def identical(self) -> bool:
        return not (self.changed or self.added or self.removed)

    def to_dict(self) -> dict:
        return {"changed": [c.to_dict() for c in self.changed],
                "added": [r.to_dict() for r in self.added],
                "removed": [r.to_dict() for r in self.removed]}



def diff_results(results_a: dict, results_b: dict, *, rel_tol: float = 0.0,
                 abs_tol: float = 0.0) -> ResultsDiff:
    """Compare two results dicts entry by entry.

    List entries are matched by the fields in :data:`RECORD_KEYS` (estimates by
    outcome, estimand, estimator, subgroup, method; tests by outcome, statistic,
    null_effect; ...), other lists by position. Two numbers ``a``, ``b`` are
    equal when::

        a == b   or   |a - b| <= max(rel_tol * max(|a|, |b|), abs_tol),

    the rule of :func:`math.isclose`; other values (text, null, booleans) must
    be equal exactly, and a boolean never equals a number. Inputs are converted
    with :func:`~report_kit.audit.provenance.to_json_value` first, so numpy values
    and NaN compare as they would be stored.

    Parameters
    ----------
    results_a, results_b : dict
        The earlier (recorded) and later (re-run) results.
    rel_tol, abs_tol : float, default 0
        Tolerances; 0 means exact equality.

    Returns
    -------
    ResultsDiff
        ``changed`` values (with ``difference = new - old`` and
        ``relative_difference = (new - old) / |old|``), entries ``added`` in B
        and ``removed`` from A.

    References
    ----------
    Peters, C. (2015). PEP 485 -- A Function for testing approximate equality
    (the symmetric relative test used by :func:`math.isclose`).
    """
    rel_tol = tolerance("rel_tol", rel_tol)
    abs_tol = tolerance("abs_tol", abs_tol)
    for name, value in (("results_a", results_a), ("results_b", results_b)):
        if not isinstance(value, dict):
            raise UsageError(f"`{name}` must be a dict; got {type(value).__name__}")
    rec_a, rec_b = _records(to_json_value(results_a)), _records(to_json_value(results_b))
    changed = []
    for ident, fields_a in rec_a.items():
        fields_b = rec_b.get(ident)
        if fields_b is None:
            continue
        for name in list(fields_a) + [f for f in fields_b if f not in fields_a]:
            old, new = fields_a.get(name), fields_b.get(name)
            if not _equal(old, new, rel_tol, abs_tol) or (name in fields_a) != (name in fields_b):
                changed.append(ResultChange(section=ident[0], key=ident[1], field=name, old=old, new=new))
    added = [ResultRecord(section=s, key=k, values=v) for (s, k), v in rec_b.items() if (s, k) not in rec_a]
    removed = [ResultRecord(section=s, key=k, values=v) for (s, k), v in rec_a.items() if (s, k) not in rec_b]
    return ResultsDiff(changed=tuple(changed), added=tuple(added), removed=tuple(removed))


# -------------------------------------------------------------------- conclusions

def _fmt(value) -> str:
    if value is None:
        return "NA"
    if isinstance(value, float):
        return f"{value:.6g}"
    if isinstance(value, str):
        return value if value else '""'
    if isinstance(value, (list, tuple)):
        return "[" + ", ".join(_fmt(v) for v in value) + "]"
    return str(value)


def _sign(x: float) -> int:
    return (x > 0) - (x < 0)


def _significance(label, section, key, name, p_a, p_b, alpha) -> dict | None:
    sig_a, sig_b = p_a <= alpha, p_b <= alpha
    if sig_a == sig_b:
        return None
    word = {True: "significant", False: "not significant"}
    return {"kind": "significance", "section": section, "key": dict(key), "label": label,
            "field": name, "old": p_a, "new": p_b,
            "message": (f"{label}: {name} {_fmt(p_a)} -> {_fmt(p_b)}; was {word[sig_a]}, "
                        f"now {word[sig_b]} at alpha = {_fmt(alpha)}")}


def _zero_in(low, high) -> bool:
    return low <= 0 <= high


def _interval(label, section, key, names, fa, fb) -> dict | None:
    lo, hi = names
    vals = (fa.get(lo), fa.get(hi), fb.get(lo), fb.get(hi))
    if not all(_is_number(v) for v in vals):
        return None
    in_a, in_b = _zero_in(vals[0], vals[1]), _zero_in(vals[2], vals[3])
    if in_a == in_b:
        return None
    word = {True: "includes zero", False: "excludes zero"}
    old, new = [vals[0], vals[1]], [vals[2], vals[3]]
    return {"kind": "interval_zero", "section": section, "key": dict(key), "label": label,
            "field": f"{lo}/{hi}", "old": old, "new": new,
            "message": f"{label}: interval {_fmt(old)} {word[in_a]}; now {_fmt(new)} {word[in_b]}"}


def _sign_change(label, section, key, name, a, b) -> dict | None:
    if _sign(a) == _sign(b):
        return None
    return {"kind": "sign", "section": section, "key": dict(key), "label": label,
            "field": name, "old": a, "new": b,
            "message": f"{label}: {name} changed sign: {_fmt(a)} -> {_fmt(b)}"}


def conclusion_changes(results_a: dict, results_b: dict, alpha: float) -> list[dict]:
    """Conclusions that differ between two results dicts.

    Three rules, applied to entries present in both (matched as in
    :func:`diff_results`):

    * significance: a p-value (``tests.p_value``, ``multiplicity.p_adjusted``,
      ``balance.omnibus.p_value``, ``attrition.p_value``) is significant when
      ``p <= alpha``; a change of that verdict is reported;
    * interval_zero: an interval (``estimates`` and ``intervals`` ci_low/ci_high,
      ``attrition.bounds`` lower/upper) includes zero when ``low <= 0 <= high``;
      a change is reported;
    * sign: ``estimates.estimate`` or ``intervals.hodges_lehmann`` changed sign
      (zero counts as its own sign).

    Entries with a missing (null) value on either side are skipped.

    Parameters
    ----------
    results_a, results_b : dict
        Earlier and later results.
    alpha : float
        Significance level, in (0, 1).

    Returns
    -------
    list of dict
        ``{kind, section, key, label, field, old, new, message}`` per change,
        in the order of ``results_a``.

    Notes
    -----
    ``p <= alpha`` is the usual rejection rule of a level-alpha test based on
    a p-value (Lehmann & Romano, 2005, *Testing Statistical Hypotheses*, 3rd
    ed., section 3.3); a confidence interval excludes zero exactly when the
    corresponding test rejects a zero effect (the duality of tests and
    intervals, ibid., section 3.5).
    """
    if not _is_number(alpha) or not 0 < alpha < 1:
        raise UsageError(f"`alpha` must be a number in (0, 1); got {alpha!r}")
    diff_inputs = [to_json_value(results_a), to_json_value(results_b)]
    for name, value in zip(("results_a", "results_b"), diff_inputs):
        if not isinstance(value, dict):
            raise UsageError(f"`{name}` must be a dict; got {type(value).__name__}")
    rec_a, rec_b = (_records(r) for r in diff_inputs)
    out = []
    for (section, key), fa in rec_a.items():
        fb = rec_b.get((section, key))
        if fb is None:
            continue
        label = _label(section, key)
        p_name = P_VALUE_FIELDS.get(section)
        if p_name and _is_number(fa.get(p_name)) and _is_number(fb.get(p_name)):
            out.append(_significance(label, section, key, p_name, fa[p_name], fb[p_name], alpha))
        if section in INTERVAL_FIELDS:
            out.append(_interval(label, section, key, INTERVAL_FIELDS[section], fa, fb))
        s_name = SIGN_FIELDS.get(section)
        if s_name and _is_number(fa.get(s_name)) and _is_number(fb.get(s_name)):
            out.append(_sign_change(label, section, key, s_name, fa[s_name], fb[s_name]))
    return [c for c in out if c is not None]


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
class TableDiff:
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

    def to_dict(self) -> dict:
        return {
            "id_column": self.id_column, "rows_a": self.rows_a, "rows_b": self.rows_b,
            "columns_added": list(self.columns_added), "columns_removed": list(self.columns_removed),
            "n_units_added": self.n_units_added, "n_units_removed": self.n_units_removed,
            "units_added": list(self.units_added), "units_removed": list(self.units_removed),
            "n_changed_cells": self.n_changed_cells, "changed_by_column": dict(self.changed_by_column),
            "cells": [dict(c) for c in self.cells], "truncated": self.truncated,
        }


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
        raise UsageError(f"`limit` must be an integer >= 0; got {limit!r}")
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


# ---------------------------------------------------------------------- run diff

@dataclass(frozen=True, kw_only=True)
class _Run:
    path: Path
    run_id: str
    results: dict
    inputs: dict          # path -> {"sha256", "rows"}
    design_sha256: str | None
    design: dict | None
    id_column: str | None


def _load_design_copy(run_dir: Path) -> dict | None:
    copy = run_dir / INPUTS_DIR / SPEC_NAME
    if not copy.is_file():
        return None
    try:
        value = yaml.safe_load(copy.read_text(encoding="utf-8"))
    except (yaml.YAMLError, UnicodeDecodeError):
        return None
    return value if isinstance(value, dict) else None


def _input_entries(raw) -> dict:
    out = {}
    for entry in raw if isinstance(raw, list) else []:
        if isinstance(entry, dict) and isinstance(entry.get("path"), str):
            check_relative_path(entry["path"], what="recorded input path")
            out[entry["path"]] = {"sha256": entry.get("sha256"), "rows": entry.get("rows")}
    return out


def _load_run(path: Path | str, name: str) -> _Run:
    run_dir = Path(path)
    if not run_dir.is_dir() or not (run_dir / RESULTS_NAME).is_file():
        raise UsageError(f"{path}: {name} is not a run folder (no {RESULTS_NAME} inside); "
                         "give a folder under <project>/runs/")
    results = load_json_file(run_dir / RESULTS_NAME, what="results file")
    manifest = (load_json_file(run_dir / MANIFEST_NAME, what="manifest")
                if (run_dir / MANIFEST_NAME).is_file() else {})
    design = _load_design_copy(run_dir)
    design_sha = (manifest.get("design") or {}).get("sha256")
    copy = run_dir / INPUTS_DIR / SPEC_NAME
    if design_sha is None and copy.is_file():
        design_sha = sha256_file(copy)
    id_column = manifest.get("id_column")
    if id_column is None and design is not None:
        id_column = (design.get("data") or {}).get("id")
    return _Run(path=run_dir, run_id=str(manifest.get("run_id") or run_dir.name), results=results,
                inputs=_input_entries(manifest.get("inputs", results.get("inputs"))),
                design_sha256=design_sha, design=design,
                id_column=id_column if isinstance(id_column, str) else None)


@dataclass(frozen=True, kw_only=True)
class InputChange:
    """How one input file (``design.yaml`` or a data table) differs between two runs.

    ``status`` is ``"unchanged"``, ``"changed"``, ``"added"`` or ``"removed"``.
    ``table`` holds the row-level diff of a changed table when both runs kept
    a copy; otherwise ``note`` says why there is none.
    """

    path: str
    status: str
    sha256_a: str | None
    sha256_b: str | None
    rows_a: int | None
    rows_b: int | None
    table: TableDiff | None = None
    note: str | None = None

    def to_dict(self) -> dict:
        return {"path": self.path, "status": self.status, "sha256_a": self.sha256_a,
                "sha256_b": self.sha256_b, "rows_a": self.rows_a, "rows_b": self.rows_b,
                "table": None if self.table is None else self.table.to_dict(), "note": self.note}


def _status(sha_a, sha_b, in_a: bool, in_b: bool) -> str:
    if not in_a:
        return "added"
    if not in_b:
        return "removed"
    return "unchanged" if sha_a is not None and sha_a == sha_b else "changed"


def _table_change(run_a: _Run, run_b: _Run, rel: str) -> InputChange:
    ea, eb = run_a.inputs.get(rel, {}), run_b.inputs.get(rel, {})
    status = _status(ea.get("sha256"), eb.get("sha256"), rel in run_a.inputs, rel in run_b.inputs)
    base = {"path": rel, "status": status, "sha256_a": ea.get("sha256"), "sha256_b": eb.get("sha256"),
            "rows_a": ea.get("rows"), "rows_b": eb.get("rows")}
    if status != "changed":
        return InputChange(**base)
    copy_a, copy_b = (r.path / INPUTS_DIR / rel for r in (run_a, run_b))
    if not (copy_a.is_file() and copy_b.is_file()):
        return InputChange(**base, note="no row-level diff: a run folder holds no copy of this file")
    id_column = run_b.id_column or run_a.id_column
    if id_column is None:
        return InputChange(**base, note="no row-level diff: the unit id column is not recorded")
    try:
        table = diff_tables(copy_a, copy_b, id_column)
    except DataError as err:
        return InputChange(**base, note=f"no row-level diff: {err}")
    return InputChange(**base, table=table)


def _design_change(run_a: _Run, run_b: _Run) -> tuple[InputChange, tuple[dict, ...]]:
    status = _status(run_a.design_sha256, run_b.design_sha256, True, True)
    change = {"path": SPEC_NAME, "status": status, "sha256_a": run_a.design_sha256,
              "sha256_b": run_b.design_sha256, "rows_a": None, "rows_b": None}
    if status != "changed":
        return InputChange(**change), ()
    if run_a.design is None or run_b.design is None:
        return InputChange(**change, note="no key-level diff: a run folder holds no copy of design.yaml"), ()
    keys = tuple(diff_specs(run_a.design, run_b.design))
    note = None if keys else "only comments or layout changed"
    return InputChange(**change, note=note), keys


def _without_inputs(results: dict) -> dict:
    """results.json minus its ``inputs`` list, which the input diff already covers."""
    return {k: v for k, v in results.items() if k != "inputs"}


def _alpha_of(run: _Run) -> float | None:
    value = ((run.design or {}).get("analysis") or {}).get("alpha")
    return float(value) if _is_number(value) and 0 < value < 1 else None


@dataclass(frozen=True, kw_only=True)
class RunDiff:
    """Everything that changed from run A (earlier) to run B (later)."""

    run_a: str
    run_b: str
    alpha: float
    inputs: tuple[InputChange, ...]
    design_changes: tuple[dict, ...]
    results: ResultsDiff
    conclusions: tuple[dict, ...]

    @property
    def inputs_changed(self) -> tuple[InputChange, ...]:
        return tuple(c for c in self.inputs if c.status != "unchanged")

    @property
    def identical(self) -> bool:
        return not self.inputs_changed and self.results.identical

    def to_dict(self) -> dict:
        return {
            "schema": DIFF_SCHEMA, "run_a": self.run_a, "run_b": self.run_b, "alpha": self.alpha,
            "summary": {
                "identical": self.identical,
                "inputs_changed": [c.path for c in self.inputs_changed],
                "results_changed": len(self.results.changed),
                "results_added": len(self.results.added),
                "results_removed": len(self.results.removed),
                "conclusions_changed": len(self.conclusions),
            },
            "conclusions": [dict(c) for c in self.conclusions],
            "inputs": [c.to_dict() for c in self.inputs],
            "design_changes": [dict(c) for c in self.design_changes],
            "results": self.results.to_dict(),
        }


def compare_runs(run_a: Path | str, run_b: Path | str, *, alpha: float | None = None) -> RunDiff:
    """The structured diff from run folder ``run_a`` (earlier) to ``run_b`` (later).

    Inputs come from ``manifest.json`` (or the ``inputs`` list of results.json
    when a run has no manifest yet); row-level table diffs need the copies in
    ``inputs/`` of both runs and the unit id column (``manifest["id_column"]``,
    else ``data.id`` of the design copy). ``alpha`` defaults to
    ``analysis.alpha`` of run B's design copy, then run A's, then 0.05.
    The ``inputs`` list of results.json is left out of the result diff (the
    input diff reports those files in detail).
    """
    if alpha is not None and (not _is_number(alpha) or not 0 < alpha < 1):
        raise UsageError(f"`alpha` must be a number in (0, 1); got {alpha!r}")
    a, b = _load_run(run_a, "RUN_A"), _load_run(run_b, "RUN_B")
    if alpha is None:
        alpha = _alpha_of(b) or _alpha_of(a) or DEFAULT_ALPHA
    design, design_keys = _design_change(a, b)
    paths = list(a.inputs) + [p for p in b.inputs if p not in a.inputs]
    inputs = (design, *(_table_change(a, b, p) for p in paths))
    return RunDiff(
        run_a=a.run_id, run_b=b.run_id, alpha=float(alpha), inputs=inputs,
        design_changes=design_keys,
        results=diff_results(_without_inputs(a.results), _without_inputs(b.results),
                             rel_tol=RESULT_RTOL, abs_tol=RESULT_ATOL),
        conclusions=tuple(conclusion_changes(a.results, b.results, alpha)),
    )


# ---------------------------------------------------------------------- text form

def _more(lines: list[str], total: int, shown: int, indent: str) -> None:
    if total > shown:
        lines.append(f"{indent}... and {total - shown} more (see the JSON output)")


def _table_lines(table: TableDiff, max_items: int) -> list[str]:
    pad = "      "
    lines = []
    for word, n, units in (("added", table.n_units_added, table.units_added),
                           ("removed", table.n_units_removed, table.units_removed)):
        if n:
            shown = [_fmt(u) for u in units[:max_items]]
            extra = f", ... and {n - len(shown)} more" if n > len(shown) else ""
            lines.append(f"{pad}units {word} ({n}): {', '.join(shown)}{extra}")
    if table.columns_added:
        lines.append(f"{pad}columns added: {', '.join(table.columns_added)}")
    if table.columns_removed:
        lines.append(f"{pad}columns removed: {', '.join(table.columns_removed)}")
    if table.n_changed_cells:
        per = ", ".join(f"{c} {n}" for c, n in table.changed_by_column.items())
        lines.append(f"{pad}cells changed ({table.n_changed_cells}; by column: {per}):")
        for cell in table.cells[:max_items]:
            lines.append(f"{pad}  {table.id_column}={_fmt(cell['id'])}  {cell['column']}: "
                         f"{_fmt(cell['old'])} -> {_fmt(cell['new'])}")
        _more(lines, table.n_changed_cells, min(max_items, len(table.cells)), pad + "  ")
    if not lines:
        lines.append(f"{pad}same units and cells (only formatting or row order changed)")
    return lines


def _input_lines(diff: RunDiff, max_items: int) -> list[str]:
    lines = ["Inputs"]
    for change in diff.inputs:
        rows = ""
        if change.status == "changed" and change.rows_a is not None and change.rows_b is not None:
            rows = f" ({change.rows_a} -> {change.rows_b} rows)"
        lines.append(f"  {change.path}: {change.status}{rows}")
        if change.path == SPEC_NAME:
            for item in diff.design_changes[:max_items]:
                lines.append(f"      {item['key']}: {_fmt(item['old'])} -> {_fmt(item['new'])}")
            _more(lines, len(diff.design_changes), max_items, "      ")
        if change.table is not None:
            lines.extend(_table_lines(change.table, max_items))
        if change.note:
            lines.append(f"      ({change.note})")
    return lines


def _change_line(change: ResultChange) -> str:
    line = f"    {change.label} {change.field}: {_fmt(change.old)} -> {_fmt(change.new)}"
    diff, rel = change.difference, change.relative_difference
    if diff is not None:
        line += f" ({diff:+.4g}" + (f", {100 * rel:+.3g}%" if rel is not None else "") + ")"
    return line


def _result_lines(results: ResultsDiff, max_items: int) -> list[str]:
    lines = ["Results"]
    if results.identical:
        return lines + ["  no result changed"]
    lines.append(f"  values changed: {len(results.changed)}; entries added: {len(results.added)}; "
                 f"entries removed: {len(results.removed)}")
    lines.extend(_change_line(c) for c in results.changed[:max_items])
    _more(lines, len(results.changed), max_items, "    ")
    for word, records in (("added", results.added), ("removed", results.removed)):
        for record in records[:max_items]:
            lines.append(f"    {word}: {record.label}")
        _more(lines, len(records), max_items, "    ")
    return lines


def format_diff_text(diff: RunDiff, *, max_items: int = 20) -> str:
    """The diff as readable plain text; conclusions that changed come first, marked ``!!``.

    Long lists are cut at ``max_items`` entries with a count of the rest.
    """
    if not isinstance(diff, RunDiff):
        raise UsageError(f"`diff` must be a RunDiff; got {type(diff).__name__}")
    if not isinstance(max_items, int) or isinstance(max_items, bool) or max_items < 1:
        raise UsageError(f"`max_items` must be an integer >= 1; got {max_items!r}")
    lines = [f"Run A: {diff.run_a}", f"Run B: {diff.run_b}", ""]
    if diff.identical:
        lines.append("No differences: same inputs, same results.")
        return "\n".join(lines) + "\n"
    if diff.conclusions:
        lines.append(f"!! CONCLUSIONS THAT CHANGED (alpha = {_fmt(diff.alpha)}): {len(diff.conclusions)} !!")
        lines.extend(f"  !! {c['message']}" for c in diff.conclusions)
    else:
        lines.append(f"Conclusions: none changed (alpha = {_fmt(diff.alpha)}).")
    lines.append("")
    lines.extend(_input_lines(diff, max_items))
    lines.append("")
    lines.extend(_result_lines(diff.results, max_items))
    return "\n".join(lines) + "\n"
