"""Drawing and re-checking the real assignment from ``design.seed``.

Owns: ``report-kit assign`` (write the drawn assignment beside the data) and
the assignment check of ``check``/``run`` (re-draw it and list the ids that
differ). The drawing algorithm itself lives in :func:`report_kit.design.draw.draw_assignment`
(documented in ``docs/methods/randomization.md``); this module only feeds it
the units sorted and normalised exactly as :mod:`report_kit.inputs.data` reads them,
so ``assign`` and ``check`` always see the same ids in the same order.
"""

from __future__ import annotations

import csv
import os
import tempfile
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from report_kit.errors import DesignError, ReportKitError, SpecError, UsageError
from report_kit.files import share_like_umask
from report_kit.inputs.model import Spec, Study
from report_kit.validate import Record

ASSIGNMENT_FILE = "data/assignment.csv"
_LISTED = 10  # differing ids shown by describe()


@dataclass(frozen=True, kw_only=True)
class AssignmentCheck(Record):
    """Outcome of re-drawing the assignment from ``design.seed``.

    ``status`` is ``"reproduced"``, ``"mismatch"`` or ``"not_checked"`` (no
    seed); for a mismatch, ``differing_ids`` lists every unit whose recorded
    treatment differs from the drawn one and ``recorded`` its value in the data.
    ``results.json`` stores ``status``, ``seed`` and ``differing_ids``.
    """

    record_keys = ("status", "seed", "differing_ids")

    status: str
    differing_ids: tuple = ()
    recorded: tuple = ()
    seed: int | None = None
    treatment: str = "treatment"

    def describe(self) -> str:
        if self.status == "not_checked":
            return "assignment not checked (no design.seed in the spec)"
        if self.status == "reproduced":
            return f"assignment reproduced from design.seed {self.seed}"
        shown = ", ".join(f"{ident!r} ({self.treatment} {rec} in the data, {1 - rec} drawn)"
                          for ident, rec in zip(self.differing_ids[:_LISTED], self.recorded[:_LISTED]))
        more = len(self.differing_ids) - _LISTED
        return (f"assignment MISMATCH: re-drawing from design.seed {self.seed} differs for "
                f"{len(self.differing_ids)} unit(s): {shown}" + (f" and {more} more" if more > 0 else ""))


def redraw(spec: Spec, frame: pd.DataFrame) -> np.ndarray:
    """Draw the assignment the spec's seed implies, in the row order of ``frame``.

    Raises
    ------
    SpecError
        ``design.seed`` is not set.
    DesignError
        The units cannot carry the drawn design (e.g. a pair that is not two
        units, or a share that treats nobody); the message names design.yaml.
    """
    from report_kit.design.draw import draw_assignment
    from report_kit.design.rerandomization import draw_rerandomized

    design = spec.design
    if design.seed is None:
        raise SpecError(f"{spec.path}: design.seed: not set; the assignment is drawn from it — add a line "
                        "such as `seed: 20261201` under design:")
    if design.multi_arm:
        return _redraw_arms(spec, frame)
    labels = dict(block=None if design.block is None else frame[design.block].to_numpy(),
                  cluster=None if design.cluster is None else frame[design.cluster].to_numpy(),
                  probability=design.probability)
    ids = frame[spec.data.id].to_numpy()
    try:
        if design.rerandomization is not None:
            return draw_rerandomized(design.mechanism, ids, study_criterion(spec, frame), seed=design.seed,
                                     **labels)[0]
        return draw_assignment(design.mechanism, ids, seed=design.seed, **labels)
    except ReportKitError as err:
        share = "" if design.probability is None else f" with design.probability {design.probability:g}"
        raise DesignError(f"{spec.path}: design.seed {design.seed}: cannot draw a {design.mechanism} "
                          f"assignment{share} for {spec.project_dir / spec.data.units}: {err}") from err


def _redraw_arms(spec: Spec, frame: pd.DataFrame) -> np.ndarray:
    """Arm codes (positions in design.arms) drawn from design.seed (``docs/methods/arms.md``)."""
    from report_kit.design.arms import draw_arms

    design = spec.design
    try:
        return draw_arms(design.mechanism, len(design.arms), frame[spec.data.id].to_numpy(), seed=design.seed,
                         block=None if design.block is None else frame[design.block].to_numpy(),
                         cluster=None if design.cluster is None else frame[design.cluster].to_numpy(),
                         probabilities=design.arm_probabilities)
    except DesignError as err:
        raise DesignError(f"{spec.path}: design.seed {design.seed}: cannot draw a {design.mechanism} assignment "
                          f"of {len(design.arms)} arms for {spec.project_dir / spec.data.units}: {err}") from err
def study_criterion(spec: Spec, frame: pd.DataFrame):
    """The :class:`~report_kit.design.rerandomization.Rerandomization` of ``design.rerandomization``, or None.

    Covariates are taken from ``frame`` in its row order.
    """
    from report_kit.design.rerandomization import Rerandomization

    rer = spec.design.rerandomization
    if rer is None:
        return None
    x = np.column_stack([pd.to_numeric(frame[c]).to_numpy(dtype=float) for c in rer.covariates])
    return Rerandomization.from_arrays(x, rer.max_distance, rer.covariates)


def check_assignment(study: Study) -> AssignmentCheck:
    """Compare the treatment column with the assignment re-drawn from ``design.seed``."""
    spec = study.spec
    seed, treatment = spec.design.seed, spec.design.treatment
    if seed is None:
        return AssignmentCheck(status="not_checked", treatment=treatment)
    frame = study.randomized_frame  # every unit as randomized, before any declared data handling
    drawn = redraw(spec, frame).astype(int)
    z = study.arm_codes(frame)
    differ = np.flatnonzero(drawn != z)
    if differ.size == 0:
        return AssignmentCheck(status="reproduced", seed=seed, treatment=treatment)
    ids = tuple(v.item() if isinstance(v, np.generic) else v for v in frame[spec.data.id].to_numpy()[differ].tolist())
    return AssignmentCheck(status="mismatch", differing_ids=ids, recorded=tuple(int(v) for v in z[differ]),
                           seed=seed, treatment=treatment)


def assignment_check_status(study: Study) -> str:
    """``results.json`` ``design.assignment_check``: "reproduced", "mismatch" or "not_checked"."""
    return check_assignment(study).status


def default_target(spec: Spec) -> Path:
    """Where ``assign`` writes by default: ``data/assignment.csv`` in the project folder."""
    return spec.project_dir / ASSIGNMENT_FILE


def write_assignment(spec: Spec, frame: pd.DataFrame, *, out: Path | None = None, force: bool = False) -> Path:
    """Write ``<id>,<treatment>`` drawn from design.seed to ``data/assignment.csv`` (or ``out``).

    ``frame`` is the units table from :func:`report_kit.inputs.data.load_units_for_assignment`
    (sorted by id); rows are written in that order. Refuses to replace an
    existing file unless ``force``; even then it only replaces an earlier
    assignment file (columns exactly id and treatment), never a data table,
    and never writes inside a run folder. The file is written to a temporary
    name and renamed into place.
    """
    drawn_target = Path(out) if out is not None else default_target(spec)
    target = drawn_target.resolve()
    _refuse_run_folder(spec, target)
    if target.suffix.lower() != ".csv":
        raise UsageError(f"{drawn_target}: the assignment is written as CSV; give a file name ending in .csv")
    if target.is_dir():
        raise UsageError(f"{drawn_target}: is a folder; give a file name such as {ASSIGNMENT_FILE}")
    units = (spec.project_dir / spec.data.units).resolve()
    if target == units:
        raise UsageError(f"{drawn_target}: is the units table (data.units); report-kit never overwrites input "
                         f"data — write the assignment to {ASSIGNMENT_FILE} and list it under data.merge")
    if target.exists():
        if not force:
            raise UsageError(f"{drawn_target}: already exists; pass --force to replace it or -o to write elsewhere")
        _require_assignment_file(spec, target, drawn_target)
    if out is not None and not target.parent.is_dir():
        raise UsageError(f"{drawn_target.parent}: no such folder")
    drawn = redraw(spec, frame)
    values = drawn.astype(int) if spec.design.arms is None else np.asarray(spec.design.arms, dtype=object)[drawn]
    table = pd.DataFrame({spec.data.id: frame[spec.data.id].to_numpy(), spec.design.treatment: values})
    _write_atomically(table, target, drawn_target)
    return target


def _refuse_run_folder(spec: Spec, target: Path) -> None:
    runs = (spec.project_dir / "runs").resolve()
    inside = target.is_relative_to(runs)
    for parent in target.parents:
        if (parent / "manifest.json").is_file() and (parent / "results.json").is_file():
            inside = True
            break
    if inside:
        raise UsageError(f"{target}: is inside a run folder; runs are never modified — write the assignment "
                         f"beside the data (default {ASSIGNMENT_FILE})")


def _require_assignment_file(spec: Spec, target: Path, shown: Path) -> None:
    expected = [spec.data.id, spec.design.treatment]
    try:
        with open(target, newline="", encoding="utf-8-sig") as fh:
            header = next(csv.reader(fh), [])
    except (OSError, UnicodeDecodeError, csv.Error):
        header = None
    if header is None or [h.strip() for h in header] != expected:
        found = "an unreadable header" if header is None else f"columns {', '.join(header) or '(none)'}"
        raise UsageError(f"{shown}: has {found}, not {', '.join(expected)}; it is not an assignment file, so "
                         "--force will not replace it — choose another file with -o")


def _write_atomically(table: pd.DataFrame, target: Path, shown: Path) -> None:
    tmp = None
    try:
        target.parent.mkdir(parents=True, exist_ok=True)
        fd, tmp = tempfile.mkstemp(prefix=f".{target.name}.", suffix=".tmp", dir=target.parent)
        with os.fdopen(fd, "w", encoding="utf-8", newline="") as fh:
            table.to_csv(fh, index=False, lineterminator="\n")
        share_like_umask(tmp)
        os.replace(tmp, target)
    except OSError as err:
        if tmp is not None:
            Path(tmp).unlink(missing_ok=True)
        reason = "permission denied" if isinstance(err, PermissionError) else (err.strerror or str(err))
        raise UsageError(f"{shown}: cannot write the assignment ({reason})") from err
    except BaseException:
        if tmp is not None:
            Path(tmp).unlink(missing_ok=True)
        raise
