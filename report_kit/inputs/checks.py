"""The data checks: every problem of the tables against the spec, found in one pass.

Owns the checks that need the spec (columns present, treatment exactly 0/1,
numbers where numbers are expected, values for every unit, declared ranges,
clusters not split, both arms in every block) and how a problem is written:
the file, the column, the key of design.yaml, and the first offending rows by
line and id with a count of the rest. Each check returns its messages instead
of raising, so :func:`report_kit.inputs.data.load_study` reports all the
problems of a stage together.
"""

from __future__ import annotations

import difflib
import math

import numpy as np
import pandas as pd

from report_kit.errors import DataError
from report_kit.inputs.handling import handled_missing_columns
from report_kit.inputs.model import Spec
from report_kit.inputs.readers import _SHOW, Table



class _Problems:
    """The problems found so far; :meth:`raise_if_any` raises one :class:`DataError` listing them all."""

    def __init__(self) -> None:
        self.items: list[str] = []

    def add(self, message: str) -> None:
        if message not in self.items:
            self.items.append(message)

    def raise_if_any(self) -> None:
        if len(self.items) == 1:
            raise DataError(self.items[0])
        if self.items:
            listed = "\n".join(f"  - {m}" for m in self.items)
            raise DataError(f"the data has {len(self.items)} problems (all listed; fix them together, then run "
                            f"`report-kit check` again):\n{listed}")


def _plain(value):
    """A numpy scalar as the Python value it holds (for messages and normalising)."""
    return value.item() if isinstance(value, np.generic) else value


def _show(value) -> str:
    return "blank" if _is_missing(value) else repr(_plain(value))


def _is_missing(value) -> bool:
    value = _plain(value)
    return value is None or value is pd.NA or (isinstance(value, float) and math.isnan(value))


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
        self.units, self._id_col = units, id_col
        self._pos: dict | None = None

    def _position(self, ident) -> int | None:
        # Built on the first message only: a dict of every id is the size of the table many times over.
        if self._pos is None:
            self._pos = {v: i for i, v in enumerate(self.units.frame[self._id_col].tolist())}
        return self._pos.get(_plain(ident))

    def rows(self, ids, values=None, column: str | None = None) -> str:
        """``line 2 (id 'a')`` for each id (the first few), with ``column = value`` when given."""
        ids = list(ids)
        values = None if values is None else list(values)
        shown = []
        for k, ident in enumerate(ids[:_SHOW]):
            pos = self._position(ident)
            where = self.units.line(pos) if pos is not None else "row ?"
            value = "" if values is None else f", {column} = {_show(values[k])}"
            shown.append(f"{where} (id {_show(ident)}{value})")
        more = len(ids) - len(shown)
        return ", ".join(shown) + (f" and {more} more" if more > 0 else "")


def _close_hint(name: str, options: list[str]) -> str:
    close = difflib.get_close_matches(name, [str(o) for o in options], n=1)
    return f" — did you mean '{close[0]}'?" if close else ""


def _label_list(labels) -> str:
    labels = [str(_plain(v)) for v in labels]
    return ", ".join(labels[:_SHOW]) + (f" and {len(labels) - _SHOW} more" if len(labels) > _SHOW else "")


def _require_id_column(problems: _Problems, table: Table, id_col: str) -> None:
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
    problems.add(f"{table.path}: id column '{id_col}' (data.id) not found{hint}; columns are: "
                 f"{', '.join(columns)}")


def _check_id(problems: _Problems, table: Table, id_col: str) -> None:
    frame = table.frame
    missing = np.flatnonzero(frame[id_col].isna().to_numpy())
    if missing.size:
        problems.add(f"{table.path}: column '{id_col}': missing id at {_rows(table, missing)}")
    dup = np.flatnonzero(frame[id_col].duplicated(keep=False).to_numpy())
    if dup.size:
        problems.add(f"{table.path}: column '{id_col}': duplicated ids at {_rows(table, dup, id_col)}")


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
    need.update((c, k) for c, k in rerandomization_columns(spec).items() if c not in need)
    if spec.compliance:
        need.setdefault(spec.compliance.received, "compliance.received")
    for i, g in enumerate(spec.subgroups):
        need.setdefault(g, f"subgroups[{i}]")
    return need


def rerandomization_columns(spec: Spec) -> dict[str, str]:
    """Covariates of ``design.rerandomization`` and their key paths (numeric, a value for every unit)."""
    rer = spec.design.rerandomization
    if rer is None:
        return {}
    return {c: f"design.rerandomization.covariates[{i}]" for i, c in enumerate(rer.covariates)}


def _every_unit_columns(spec: Spec) -> dict[str, str]:
    """Columns that need a value for every unit (no missing values allowed)."""
    need = {spec.design.treatment: "design.treatment"}
    for col, key in rerandomization_columns(spec).items():
        need.setdefault(col, key)
    if spec.compliance:
        need.setdefault(spec.compliance.received, "compliance.received")
    if spec.design.block:
        need.setdefault(spec.design.block, "design.block")
    if spec.design.cluster:
        need.setdefault(spec.design.cluster, "design.cluster")
    for i, g in enumerate(spec.subgroups):
        need.setdefault(g, f"subgroups[{i}]")
    return need


def _check_columns(problems: _Problems, spec: Spec, origin: dict[str, Table]) -> None:
    files = ", ".join(sorted({str(t.path) for t in origin.values()}))
    for col, key in _required_columns(spec).items():
        if col not in origin:
            hint = _close_hint(col, list(origin))
            if key == "design.treatment" and spec.design.seed is not None:
                hint += ("; to draw it from design.seed run `report-kit assign` and list the file it "
                         "writes (data/assignment.csv) under data.merge")
            problems.add(f"{files}: column '{col}' (named by {key} in design.yaml) not found{hint}")
    if any(col not in origin for col in _required_columns(spec)):
        return
    id_col = spec.data.id
    if spec.design.arms is None:
        _check_binary(problems, origin[spec.design.treatment], spec.design.treatment, id_col, "design.treatment")
    if spec.compliance:
        _check_binary(problems, origin[spec.compliance.received], spec.compliance.received, id_col, "compliance.received")
    numeric = {o.column: f"outcomes[{i}].column" for i, o in enumerate(spec.outcomes)}
    for i, c in enumerate(spec.analysis.covariates):
        numeric.setdefault(c, f"analysis.covariates[{i}]")
    for col, key in rerandomization_columns(spec).items():
        numeric.setdefault(col, key)
    for col, key in numeric.items():
        _check_numeric(problems, origin[col], col, id_col, key)
    for col, key in _every_unit_columns(spec).items():
        if key not in ("design.treatment", "compliance.received") and col not in handled_missing_columns(spec):
            _check_no_missing(problems, origin[col], col, key, id_col)


def _check_no_missing(problems: _Problems, table: Table, col: str, key: str, id_col: str) -> None:
    missing = np.flatnonzero(table.frame[col].isna().to_numpy())
    if missing.size:
        hint = ("; to keep such units as their own level or leave them out of this subgroup analysis, declare "
                "analysis.subgroup_missing: own_level or drop" if key.startswith("subgroups[") else "")
        problems.add(f"{table.path}: column '{col}' ({key}): missing value at {_rows(table, missing, id_col)}{hint}")


def _check_merge_gaps(problems: _Problems, spec: Spec, frame: pd.DataFrame, units: Table, origin: dict[str, Table],
                      locate: _Locator) -> None:
    """A column every unit needs that comes from a merged table must have a row for every unit."""
    for col, key in _every_unit_columns(spec).items():
        table = origin[col]
        if table is units or col in handled_missing_columns(spec):
            continue
        gaps = frame[spec.data.id][frame[col].isna()].tolist()
        if gaps:
            problems.add(f"{table.path}: no row for {len(gaps)} unit(s) of {units.path}: {locate.rows(gaps)}; "
                         f"column '{col}' ({key}) needs a value for every unit")


def _check_binary(problems: _Problems, table: Table, col: str, id_col: str, key: str) -> None:
    values = pd.to_numeric(table.frame[col], errors="coerce")
    pos = np.flatnonzero((~values.isin([0, 1])).to_numpy())
    if pos.size:
        found = ", ".join(_show(v) for v in table.frame[col].iloc[pos[:_SHOW]])
        problems.add(f"{table.path}: column '{col}' ({key}) must be exactly 0 or 1; "
                     f"found {found} at {_rows(table, pos, id_col)}")


def _check_numeric(problems: _Problems, table: Table, col: str, id_col: str, key: str) -> None:
    series = table.frame[col]
    if pd.api.types.is_bool_dtype(series):
        return
    values = pd.to_numeric(series, errors="coerce")
    pos = np.flatnonzero((values.isna() & series.notna()).to_numpy())
    if pos.size:
        found = ", ".join(_show(v) for v in series.iloc[pos[:_SHOW]])
        problems.add(f"{table.path}: column '{col}' ({key}) must be numeric (a blank cell is missing; "
                     "to read a text such as NA as missing, list it under data.missing_values); "
                     f"found {found} at {_rows(table, pos, id_col)}")
    infinite = np.flatnonzero(np.isinf(values.to_numpy(dtype=float, na_value=np.nan)))
    if infinite.size:
        found = ", ".join(_show(v) for v in series.iloc[infinite[:_SHOW]])
        problems.add(f"{table.path}: column '{col}' ({key}) must hold finite numbers (blank for missing); "
                     f"found {found} at {_rows(table, infinite, id_col)}")


def _check_ranges(problems: _Problems, spec: Spec, frame: pd.DataFrame, origin: dict[str, Table], locate: _Locator) -> None:
    for i, o in enumerate(spec.outcomes):
        if o.range is None:
            continue
        lo, hi = o.range
        y = frame[o.column].to_numpy(dtype=float)
        outside = np.flatnonzero(~np.isnan(y) & ((y < lo) | (y > hi)))
        if outside.size:
            ids = frame[spec.data.id].iloc[outside].tolist()
            problems.add(f"{origin[o.column].path}: column '{o.column}' has value(s) outside its declared "
                         f"range [{lo:g}, {hi:g}] (outcomes[{i}].range in design.yaml) at "
                         f"{locate.rows(ids, y[outside], o.column)}")


def _check_adjustment_covariates(problems: _Problems, spec: Spec, frame: pd.DataFrame, origin: dict[str, Table],
                                 locate: _Locator) -> None:
    """The covariate-adjusted estimate needs every covariate of every unit with an observed outcome."""
    if not (spec.analysis.adjust and spec.analysis.covariates) or spec.analysis.missing_covariates == "mean_indicator":
        return
    observed = np.zeros(len(frame), dtype=bool)
    for o in spec.outcomes:
        observed |= frame[o.column].notna().to_numpy()
    for i, col in enumerate(spec.analysis.covariates):
        gaps = np.flatnonzero(observed & frame[col].isna().to_numpy())
        if gaps.size:
            ids = frame[spec.data.id].iloc[gaps].tolist()
            problems.add(f"{origin[col].path}: column '{col}' (analysis.covariates[{i}]) is missing for "
                         f"{gaps.size} unit(s) with an observed outcome: {locate.rows(ids)}; the "
                         "covariate-adjusted estimate (analysis.adjust: true) needs complete baseline "
                         "covariates — fill them in, remove the covariate, set analysis.adjust: false, or "
                         "declare analysis.missing_covariates: mean_indicator or drop_units")


def _check_design(problems: _Problems, spec: Spec, frame: pd.DataFrame, units: Table, locate: _Locator) -> None:
    z_col, id_col = spec.design.treatment, spec.data.id
    z = frame[z_col]
    where = f"{units.path}"
    if z.empty:
        problems.add(f"{where}: no unit is left once the data handling declared in design.yaml is applied "
                     "(analysis.missing_covariates, design.single_arm_blocks); check those options")
        return
    if z.nunique() < 2:
        problems.add(f"{where}: column '{z_col}': every unit has the value {z.iloc[0]}; "
                      "both arms (0 and 1) must be present")
        return
    mech = spec.design.mechanism
    if spec.design.cluster:
        cl = spec.design.cluster
        per_cluster = frame.groupby(cl, sort=True)[z_col].nunique()
        split = per_cluster[per_cluster > 1].index.tolist()
        if split:
            members = frame[frame[cl] == split[0]]
            first = [members[members[z_col] == arm][id_col].iloc[0] for arm in (1, 0)]
            problems.add(f"{where}: clusters split across arms (treatment must be constant within "
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
                problems.add(f"{where}: matched pairs need exactly two units, one treated, per pair; "
                             f"pair(s) in '{blk}' that are not: "
                             + ", ".join(f"{_plain(p)} ({int(r['count'])} unit(s), {int(r['sum'])} treated)"
                                         for p, r in list(bad.iterrows())[:_SHOW])
                             + (f" and {len(bad) - _SHOW} more" if len(bad) > _SHOW else "")
                             + f"; pair {_plain(bad.index[0])} is at "
                             f"{locate.rows(first[id_col].tolist(), first[z_col].tolist(), z_col)}")
        one_arm = counts[(counts["sum"] == 0) | (counts["sum"] == counts["count"])]
        if len(one_arm) and mech != "matched_pairs":
            first = frame[frame[blk] == one_arm.index[0]]
            described = ", ".join(
                f"{_plain(b)} ({int(r['count'])} unit(s), all {'treated' if r['sum'] else 'control'})"
                for b, r in list(one_arm.iterrows())[:_SHOW])
            more = f" and {len(one_arm) - _SHOW} more" if len(one_arm) > _SHOW else ""
            problems.add(f"{where}: every {label} needs treated and control units; "
                         f"{label}(s) with one arm only in '{blk}': {described}{more}; "
                         f"{label} {_plain(one_arm.index[0])} is at {locate.rows(first[id_col].tolist())}"
                         + ("" if label == "pair" else "; to leave such blocks out or pool them, declare "
                            "design.single_arm_blocks: drop or pool in design.yaml"))
        if spec.design.cluster:
            nested = frame.groupby(spec.design.cluster, sort=True)[blk].nunique()
            crossing = nested[nested > 1].index.tolist()
            if crossing:
                members = frame[frame[spec.design.cluster] == crossing[0]]
                problems.add(f"{where}: clusters must sit inside one block; cluster(s) spanning blocks: "
                             f"{_label_list(crossing)}; cluster {_show(crossing[0])} is in blocks "
                             f"{_label_list(sorted(members[blk].unique().tolist(), key=str))}")


def _check_drawable(problems: _Problems, spec: Spec, frame: pd.DataFrame, units: Table, treated_count=None) -> None:
    """Structure the draw needs, named by label and row: pairs of two, nested clusters, both arms per block.

    ``treated_count`` is the design's rounding rule (see ``load_units_for_assignment``); without it the
    both-arms-per-stratum check is skipped.
    """
    design, id_col = spec.design, spec.data.id
    mech, block, cluster = design.mechanism, design.block, design.cluster
    locate = _Locator(units, id_col)
    if mech == "matched_pairs":
        sizes = frame.groupby(block, sort=True).size()
        bad = sizes[sizes != 2]
        if len(bad):
            first = frame[frame[block] == bad.index[0]][id_col].tolist()
            listed = ", ".join(f"{_plain(p)} ({int(k)} unit(s))" for p, k in list(bad.items())[:_SHOW])
            problems.add(f"{units.path}: matched pairs need exactly two units per pair; pair(s) in "
                         f"'{block}' that are not: {listed}"
                         + (f" and {len(bad) - _SHOW} more" if len(bad) > _SHOW else "")
                         + f"; pair {_plain(bad.index[0])} is at {locate.rows(first)}")
    if block and cluster:
        nested = frame.groupby(cluster, sort=True)[block].nunique()
        crossing = nested[nested > 1].index.tolist()
        if crossing:
            members = frame[frame[cluster] == crossing[0]]
            problems.add(f"{units.path}: clusters must sit inside one block; cluster(s) spanning blocks: "
                         f"{_label_list(crossing)}; cluster {_show(crossing[0])} is in blocks "
                         f"{_label_list(sorted(members[block].unique().tolist(), key=str))}")
    if mech == "bernoulli" or design.multi_arm or problems.items or treated_count is None:
        return
    share = 0.5 if mech == "matched_pairs" or design.probability is None else float(design.probability)
    strata = frame.groupby(block, sort=True) if block else [(None, frame)]
    what = "cluster(s)" if cluster else "unit(s)"
    source = " from design.probability" if design.probability is not None and mech != "matched_pairs" else ""
    for label, members in strata:
        size = members[cluster].nunique() if cluster else len(members)
        treated = treated_count(share, size)
        if treated in (0, size):
            where = "the study" if label is None else f"{'pair' if mech == 'matched_pairs' else 'block'} {_plain(label)}"
            problems.add(f"{units.path}: {where} has {size} {what}; drawing at share {share:g}{source} "
                         f"treats {treated} of them, leaving an arm empty"
                         + ("" if label is None else f"; every block needs {what} in both arms ({where} is "
                                                     f"at {locate.rows(members[id_col].tolist())})"))
            return

