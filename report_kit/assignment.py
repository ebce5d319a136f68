"""Drawing and re-checking the real assignment from ``design.seed``.

Owns: ``report-kit assign`` (write the drawn assignment beside the data) and
the assignment check of ``check``/``run`` (re-draw it and list the ids that
differ). The drawing algorithm itself lives in :mod:`report_kit.designs`.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from .errors import UsageError
from .model import Spec, Study


@dataclass(frozen=True, kw_only=True)
class AssignmentCheck:
    status: str                     # "reproduced" | "mismatch" | "not_checked"
    differing_ids: tuple = ()

    def describe(self) -> str:
        if self.status == "not_checked":
            return "assignment not checked (no design.seed in the spec)"
        if self.status == "reproduced":
            return "assignment reproduced from design.seed"
        ids = ", ".join(map(str, self.differing_ids[:10]))
        more = len(self.differing_ids) - 10
        return (f"assignment MISMATCH: re-drawing from design.seed differs for {len(self.differing_ids)} "
                f"unit(s): {ids}" + (f" and {more} more" if more > 0 else ""))


def redraw(spec: Spec, frame: pd.DataFrame) -> np.ndarray:
    """Draw the assignment the spec's seed implies, in the row order of ``frame``."""
    from .designs import draw_assignment

    design = spec.design
    return draw_assignment(
        design.mechanism, frame[spec.data.id].to_numpy(), seed=design.seed,
        block=None if design.block is None else frame[design.block].to_numpy(),
        cluster=None if design.cluster is None else frame[design.cluster].to_numpy(),
        probability=design.probability,
    )


def check_assignment(study: Study) -> AssignmentCheck:
    """Compare the treatment column with the assignment re-drawn from ``design.seed``."""
    if study.spec.design.seed is None:
        return AssignmentCheck(status="not_checked")
    drawn = redraw(study.spec, study.frame)
    differ = np.flatnonzero(drawn != study.z)
    if differ.size == 0:
        return AssignmentCheck(status="reproduced")
    return AssignmentCheck(status="mismatch", differing_ids=tuple(study.ids[differ].tolist()))


def assignment_check_status(study: Study) -> str:
    return check_assignment(study).status


def write_assignment(spec: Spec, frame: pd.DataFrame, *, out: Path | None = None, force: bool = False) -> Path:
    """Write ``<id>,<treatment>`` drawn from design.seed to ``data/assignment.csv`` (or ``out``)."""
    if spec.design.seed is None:
        raise UsageError(f"{spec.path}: design.seed is not set; add a seed to draw the assignment from")
    target = Path(out) if out else spec.project_dir / "data" / "assignment.csv"
    if target.exists() and not force:
        raise UsageError(f"{target}: already exists; pass --force to overwrite or -o to write elsewhere")
    drawn = redraw(spec, frame)
    table = pd.DataFrame({spec.data.id: frame[spec.data.id].to_numpy(), spec.design.treatment: drawn})
    target.parent.mkdir(parents=True, exist_ok=True)
    tmp = target.with_name(f".{target.name}.tmp")
    table.to_csv(tmp, index=False)
    tmp.replace(target)
    return target
