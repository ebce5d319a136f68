"""Declared handling of awkward data: missing covariates, missing subgroup values, one-arm blocks.

Owns the three pre-specifiable options of the spec and what they do to the
merged frame before the design checks run:

* ``analysis.missing_covariates``: ``error`` (default: a unit without a
  baseline covariate stops the covariate-adjusted analysis), ``drop_units``
  (such units are left out of every analysis) or ``mean_indicator`` (every unit
  stays; the balance check and the Lin adjustment fill a gap with the
  covariate's mean and add a missingness indicator);
* ``analysis.subgroup_missing``: ``error`` (default), ``own_level`` (the unit
  joins a subgroup level named ``(missing)``) or ``drop`` (the unit is left out
  of that subgroup analysis only);
* ``design.single_arm_blocks``: ``error`` (default), ``drop`` (units of blocks
  holding one arm only are left out) or ``pool`` (those blocks become one block
  named ``(pooled)``, which must then hold both arms).

Each option that is set gives one record for ``results.json`` (``data_handling``):
the key, the value, how many units it touched, which labels, and a sentence for
the report's methods text. A record with ``changes_plan: true`` touched units,
so the report lists it among the deviations from the plan.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from report_kit.inputs.model import Spec

__all__ = ["MISSING_LEVEL", "POOLED_BLOCK", "apply_handling", "handled_missing_columns"]

MISSING_LEVEL = "(missing)"
POOLED_BLOCK = "(pooled)"
_IDS_KEPT = 20


def handled_missing_columns(spec: Spec) -> set[str]:
    """Columns whose missing values an option handles (so they are not a data error)."""
    return set(spec.subgroups) if spec.analysis.subgroup_missing != "error" else set()


def apply_handling(spec: Spec, frame: pd.DataFrame) -> tuple[pd.DataFrame, tuple[dict, ...]]:
    """Apply the declared options to the merged, coerced frame; return it and the records."""
    records = []
    for step in (_missing_covariates, _subgroup_missing, _single_arm_blocks):
        frame, record = step(spec, frame)
        if record is not None:
            records.append(record)
    return frame.reset_index(drop=True), tuple(records)


def _record(key: str, value: str, ids, statement: str, **extra) -> dict:
    ids = [v.item() if isinstance(v, np.generic) else v for v in ids]
    record = {"key": key, "value": value, "n_units": len(ids), "ids": ids[:_IDS_KEPT], **extra}
    record.setdefault("changes_plan", bool(ids))   # a record that left units out changes the plan
    record["statement"] = statement
    return record


def _missing_covariates(spec: Spec, frame: pd.DataFrame):
    option, covariates = spec.analysis.missing_covariates, list(spec.analysis.covariates)
    if option == "error" or not covariates:
        return frame, None
    gaps = frame[covariates].isna().any(axis=1).to_numpy()
    ids = frame[spec.data.id][gaps].tolist()
    if option == "mean_indicator":   # every unit stays; the balance check and Lin adjustment fill the gaps
        statement = (f"As the plan declares (analysis.missing_covariates: mean_indicator), a missing baseline "
                     f"covariate is replaced by the covariate's mean and a missingness indicator is added, in the "
                     f"balance check and the covariate-adjusted estimate: {len(ids)} unit(s) have a gap.")
        return frame, _record("analysis.missing_covariates", option, ids, statement, changes_plan=False)
    statement = (f"As the plan declares (analysis.missing_covariates: drop_units), units without a value of a "
                 f"baseline covariate are left out of every analysis: {len(ids)} unit(s).")
    return frame[~gaps], _record("analysis.missing_covariates", option, ids, statement)


def _subgroup_missing(spec: Spec, frame: pd.DataFrame):
    option = spec.analysis.subgroup_missing
    if option == "error" or not spec.subgroups:
        return frame, None
    frame = frame.copy()
    touched: dict[str, int] = {}
    ids = []
    for col in dict.fromkeys(spec.subgroups):
        gaps = frame[col].isna().to_numpy()
        touched[col] = int(gaps.sum())
        ids += frame[spec.data.id][gaps].tolist()
        if option == "own_level" and gaps.any():
            frame[col] = pd.Series([MISSING_LEVEL if g else v for v, g in zip(frame[col].tolist(), gaps)],
                                   index=frame.index, dtype=object)
    ids = list(dict.fromkeys(ids))
    what = (f"join a subgroup level named '{MISSING_LEVEL}'" if option == "own_level"
            else "are left out of that subgroup analysis (and kept in every other analysis)")
    statement = (f"As the plan declares (analysis.subgroup_missing: {option}), units without a subgroup value "
                 f"{what}: " + ", ".join(f"{n} in '{col}'" for col, n in touched.items()) + ".")
    return frame, _record("analysis.subgroup_missing", option, ids, statement, columns=touched)


def _single_arm_blocks(spec: Spec, frame: pd.DataFrame):
    option, block, z_col = spec.design.single_arm_blocks, spec.design.block, spec.design.treatment
    if option == "error" or block is None:
        return frame, None
    counts = frame.groupby(block, sort=True)[z_col].agg(["sum", "count"])
    one_arm = counts[(counts["sum"] == 0) | (counts["sum"] == counts["count"])].index.tolist()
    members = frame[block].isin(one_arm).to_numpy()
    ids = frame[spec.data.id][members].tolist()
    labels = [_text(v) for v in one_arm]
    if option == "drop":
        statement = (f"As the plan declares (design.single_arm_blocks: drop), blocks holding one arm only are "
                     f"left out: {len(labels)} block(s), {len(ids)} unit(s).")
        frame = frame[~members]
    else:
        statement = (f"As the plan declares (design.single_arm_blocks: pool), blocks holding one arm only are "
                     f"pooled into one block named '{POOLED_BLOCK}': {len(labels)} block(s), {len(ids)} unit(s).")
        if labels:
            frame = frame.copy()
            frame[block] = pd.Series([POOLED_BLOCK if m else _text(v) for v, m in zip(frame[block].tolist(), members)],
                                     index=frame.index, dtype=object)
    return frame, _record("design.single_arm_blocks", option, ids, statement, blocks=labels)


def _text(value) -> str:
    value = value.item() if isinstance(value, np.generic) else value
    if isinstance(value, float) and value.is_integer():
        return str(int(value))
    return str(value)
