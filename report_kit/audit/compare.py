"""What changed between two runs: inputs (row by row, by unit id), results, conclusions.

Owns :func:`compare_runs` (the structured diff behind ``report-kit diff`` and
the report's "Changes since the previous run") and :func:`format_diff_text`;
the row-level table diff lives in :mod:`report_kit.audit.table_diff` and the
result diff and :func:`conclusion_changes` in :mod:`report_kit.audit.results_diff`
(both re-exported here).

A run folder for this module is a folder holding ``results.json``;
``manifest.json`` and the input copies under ``inputs/`` are used when present.
The rules are written out in ``docs/provenance.md``.
"""

from dataclasses import dataclass, field
from pathlib import Path

import yaml

from report_kit.errors import DataError, UsageError
from report_kit.audit.planlock import diff_specs
from report_kit.audit.results_diff import (
    DEFAULT_ALPHA, RECORD_KEYS, RESULT_ATOL, RESULT_RTOL, ResultChange, ResultRecord, ResultsDiff, _fmt,
    _is_number, conclusion_changes, diff_results,
)
from report_kit.audit.table_diff import TableDiff, diff_tables
from report_kit.audit.provenance import (
    INPUTS_DIR, MANIFEST_NAME, RESULTS_NAME, SPEC_NAME, check_relative_path, load_json_file, sha256_file,
)
from report_kit.validate import Record, open_unit_interval

__all__ = [
    "RECORD_KEYS", "ResultChange", "ResultRecord", "ResultsDiff", "TableDiff", "InputChange",
    "RunDiff", "compare_runs", "diff_results", "diff_tables", "conclusion_changes",
    "format_diff_text", "CHANGES_NAME",
]

DIFF_SCHEMA = "report-kit/diff/1"
#: A run made with ``--compare-to`` keeps its diff from the compared run here, beside results.json.
CHANGES_NAME = "changes.json"


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
class InputChange(Record):
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
class RunDiff(Record):
    """Everything that changed from run A (earlier) to run B (later).

    Its dict (``changes.json``, ``report-kit diff --json``) starts with the
    ``schema`` name and a ``summary`` of the counts.
    """

    record_keys = ("schema", "run_a", "run_b", "alpha", "summary", "conclusions", "inputs", "design_changes",
                   "results")
    schema = DIFF_SCHEMA

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

    @property
    def summary(self) -> dict:
        """Whether the runs are identical, the changed input paths and the number of each kind of change."""
        return {
            "identical": self.identical,
            "inputs_changed": [c.path for c in self.inputs_changed],
            "results_changed": len(self.results.changed),
            "results_added": len(self.results.added),
            "results_removed": len(self.results.removed),
            "conclusions_changed": len(self.conclusions),
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
    if alpha is not None:
        open_unit_interval("alpha", alpha)
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
        raise TypeError(f"`diff` must be a RunDiff; got {type(diff).__name__}")
    if not isinstance(max_items, int) or isinstance(max_items, bool) or max_items < 1:
        raise ValueError(f"`max_items` must be an integer >= 1; got {max_items!r}")
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
