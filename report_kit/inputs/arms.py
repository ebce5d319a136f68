"""Multi-arm and factorial designs: the spec rules and the data checks for arm labels.

Owns the cross-field rules of ``design.arms``, ``design.contrasts``,
``design.factors`` and ``design.arm_labels`` (which :mod:`report_kit.inputs.spec`
calls), and the checks of a treatment column that holds arm labels (which
:mod:`report_kit.inputs.data` calls): every value is a listed arm, every arm has
units, clusters sit in one arm, every block holds every arm. Arm labels are
compared as text (``1`` and ``"1"`` are the same arm; surrounding spaces are
removed). See ``docs/spec.md`` ("Multi-arm and factorial trials").
"""

from __future__ import annotations

import itertools

import pandas as pd

from report_kit.errors import DataError
from report_kit.inputs.checks import _is_missing, _label_list, _Locator, _show
from report_kit.inputs.ids import _as_text
from report_kit.inputs.readers import Table
from report_kit.inputs.model import Spec

__all__ = ["arm_text", "arm_spec_problems", "factor_grid", "normalise_arm_column", "check_arms"]

# Mechanisms whose design can carry more than two arms (matched pairs stay two-arm).
ARM_MECHANISMS = ("complete", "bernoulli", "blocked", "cluster", "blocked_cluster")


def arm_text(value) -> str:
    """An arm label as the text it is compared by (``1.0`` -> ``"1"``, spaces trimmed)."""
    return _as_text(value)


def factor_grid(arms, factors) -> dict[str, tuple[int, ...]]:
    """The on/off pattern (1 = on) of each arm over the factors, in factor order."""
    return {arm: tuple(int(arm in on) for _, on in factors) for arm in arms}


def arm_spec_problems(design: dict) -> list[str]:
    """Problems of the multi-arm keys of ``design`` (a parsed, schema-valid mapping)."""
    arms = design.get("arms")
    if arms is None:
        return [f"design.{key}: given without design.arms; list the arm labels (reference first) in "
                "design.arms" for key in ("contrasts", "factors") if key in design] + (
            ["design.probability: a mapping of arm probabilities needs design.arms (more than two arms); "
             "for two arms give one number"] if isinstance(design.get("probability"), dict) else [])
    labels = [arm_text(a) for a in arms]
    problems = []
    first: dict[str, int] = {}
    for i, arm in enumerate(labels):
        if arm in first:
            problems.append(f"design.arms[{i}]: '{arm}' is already design.arms[{first[arm]}]; list each arm once")
        first.setdefault(arm, i)
    mech = design["mechanism"]
    if mech not in ARM_MECHANISMS:
        problems.append(f"design.arms: mechanism '{mech}' has two arms only; multi-arm designs use one of "
                        f"{', '.join(ARM_MECHANISMS)}")
    problems += _probability_problems(design, labels, mech)
    if design.get("single_arm_blocks", "error") != "error":
        problems.append(f"design.single_arm_blocks: '{design['single_arm_blocks']}' is for 0/1 treatment columns; "
                        "with design.arms every block must hold every arm (remove the key)")
    if "rerandomization" in design and (len(labels) > 2 or "factors" in design):
        problems.append("design.rerandomization: given for a multi-arm design; rerandomized designs have two "
                        "arms (remove the key or list two arms)")
    for key in design.get("arm_labels", {}):
        if arm_text(key) not in first:
            problems.append(f"design.arm_labels.{key}: '{key}' is not one of design.arms ({', '.join(labels)})")
    return problems + _factor_problems(design.get("factors"), labels)


def _probability_problems(design: dict, labels: list[str], mech: str) -> list[str]:
    """``design.probability`` of a multi-arm design: a mapping arm -> probability (Bernoulli only)."""
    if "probability" not in design:
        return []
    value = design["probability"]
    multi = len(labels) > 2 or "factors" in design
    if not isinstance(value, dict):
        if multi:
            return ["design.probability: a single number is for two arms; for a multi-arm Bernoulli design give "
                    "each arm's probability (arm: probability, summing to 1), otherwise remove the key"]
        return []
    if not multi:
        return ["design.probability: a mapping of arm probabilities is for designs with more than two arms; "
                "for two arms give one number"]
    if mech != "bernoulli":
        return [f"design.probability: arm probabilities are for bernoulli designs; mechanism '{mech}' draws "
                "equal arm shares (remove the key)"]
    problems = [f"design.probability.{key}: '{key}' is not one of design.arms ({', '.join(labels)})"
                for key in value if arm_text(key) not in labels]
    given = {arm_text(k) for k in value}
    lacking = [arm for arm in labels if arm not in given]
    if lacking:
        problems.append(f"design.probability: no probability for arm(s) {', '.join(lacking)}; give every arm "
                        "of design.arms one")
    total = sum(float(v) for v in value.values())
    if not problems and abs(total - 1.0) > 1e-9:
        problems.append(f"design.probability: the arm probabilities sum to {total:.10g}, not 1")
    return problems


def _factor_problems(factors: dict | None, labels: list[str]) -> list[str]:
    if factors is None:
        return []
    problems = []
    known = set(labels)
    for name, on in factors.items():
        if ":" in str(name):
            problems.append(f"design.factors.{name}: a factor name may not contain ':' (it joins the factors "
                            "of an interaction)")
        for i, arm in enumerate(on):
            if arm_text(arm) not in known:
                problems.append(f"design.factors.{name}[{i}]: '{arm}' is not one of design.arms "
                                f"({', '.join(labels)})")
    if problems:
        return problems
    pairs = [(str(name), {arm_text(a) for a in on}) for name, on in factors.items()]
    grid = factor_grid(labels, pairs)
    cells: dict[tuple[int, ...], list[str]] = {}
    for arm, cell in grid.items():
        cells.setdefault(cell, []).append(arm)
    full = set(itertools.product((0, 1), repeat=len(pairs)))
    missing = sorted(full - set(cells))
    shared = [arms for arms in cells.values() if len(arms) > 1]
    if missing or shared or len(labels) != len(full):
        names = [name for name, _ in pairs]
        what = []
        if shared:
            what.append("arms " + " and ".join(f"'{a}'" for a in shared[0]) + " have the same factors on")
        if missing:
            what.append("no arm has " + ", ".join(f"{n} {'on' if v else 'off'}" for n, v in zip(names, missing[0])))
        problems.append(f"design.factors: the arms must form the full grid of {len(names)} factor(s) "
                        f"({len(full)} arms, one per on/off combination of {', '.join(names)}); "
                        + "; ".join(what))
    return problems


def normalise_arm_column(frame: pd.DataFrame, column: str) -> pd.DataFrame:
    """The treatment column as arm text (missing values stay missing)."""
    frame = frame.copy()
    frame[column] = pd.Series([None if _is_missing(v) else arm_text(v) for v in frame[column].tolist()],
                              index=frame.index, dtype=object)
    return frame


def check_arms(spec: Spec, frame: pd.DataFrame, units: Table) -> None:
    """Arm labels of a merged, id-sorted frame: listed arms only, every arm used, per block and cluster."""
    design, id_col = spec.design, spec.data.id
    column, arms = design.treatment, design.arms
    locate = _Locator(units, id_col)
    values = frame[column]
    missing = values.isna().to_numpy()
    if missing.any():
        raise DataError(f"{units.path}: column '{column}' (design.treatment): missing arm at "
                        f"{locate.rows(frame[id_col][missing].tolist())}")
    unknown = ~values.isin(arms).to_numpy()
    if unknown.any():
        found = sorted(set(values[unknown].tolist()), key=str)
        raise DataError(f"{units.path}: column '{column}' (design.treatment) holds arm label(s) not listed in "
                        f"design.arms ({', '.join(arms)}): {_label_list(found)}; first at "
                        f"{locate.rows(frame[id_col][unknown].tolist(), values[unknown].tolist(), column)}")
    counts = values.value_counts()
    empty = [arm for arm in arms if counts.get(arm, 0) == 0]
    if empty:
        raise DataError(f"{units.path}: column '{column}' (design.treatment): arm(s) {_label_list(empty)} of "
                        "design.arms have no units; every listed arm needs at least one unit (remove the arm "
                        "from design.arms or check the column)")
    if design.cluster:
        _check_clusters(frame, column, design.cluster, id_col, units, locate)
    if design.block:
        _check_blocks(frame, column, design.block, arms, units)


def _check_clusters(frame, column, cluster, id_col, units, locate) -> None:
    per_cluster = frame.groupby(cluster, sort=True)[column].nunique()
    split = per_cluster[per_cluster > 1].index.tolist()
    if split:
        members = frame[frame[cluster] == split[0]]
        shown = members.drop_duplicates(column)
        raise DataError(f"{units.path}: clusters split across arms (the arm must be constant within "
                        f"'{cluster}'): {_label_list(split)}; e.g. cluster {_show(split[0])} has "
                        f"{locate.rows(shown[id_col].tolist(), shown[column].tolist(), column)}")


def _check_blocks(frame, column, block, arms, units) -> None:
    present = frame.groupby(block, sort=True)[column].agg(lambda s: set(s.tolist()))
    for label, found in present.items():
        lacking = [arm for arm in arms if arm not in found]
        if lacking:
            raise DataError(f"{units.path}: every block needs units in every arm; block {_show(label)} of "
                            f"'{block}' has none in arm(s) {_label_list(lacking)}")

