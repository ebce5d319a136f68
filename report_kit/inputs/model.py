"""The validated, normalised inputs every analysis step receives.

``spec.load_spec`` builds a :class:`Spec`; ``data.load_study`` builds a
:class:`Study` (spec + merged frame + input fingerprints). Analysis steps take a
``Study`` and trust it: all validation has happened before.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

import pandas as pd

MECHANISMS = ("complete", "bernoulli", "blocked", "cluster", "blocked_cluster", "matched_pairs")
FAMILIES = ("primary", "secondary", "exploratory")
ALTERNATIVES = ("two-sided", "greater", "less")
STATISTICS = ("mean_difference", "rank_sum", "studentized", "ks")
MULTIPLICITY = ("none", "holm", "bh", "westfall_young")
DEFAULT_ARM_LABELS = ("control", "treated")   # words for the arms coded 0 and 1


@dataclass(frozen=True, kw_only=True)
class DataSpec:
    units: str
    id: str
    merge: tuple[str, ...] = ()


@dataclass(frozen=True, kw_only=True)
class DesignSpec:
    mechanism: str
    treatment: str
    block: str | None = None
    cluster: str | None = None
    probability: float | None = None
    seed: int | None = None
    arm_labels: tuple[str, str] = DEFAULT_ARM_LABELS   # (label of 0, label of 1)


@dataclass(frozen=True, kw_only=True)
class AnalysisSpec:
    alpha: float = 0.05
    covariates: tuple[str, ...] = ()
    adjust: bool = True
    randomizations: int = 10000
    max_exact: int = 200000
    seed: int = 5150
    multiplicity: str = "holm"
    std_effect: str = "hedges_g"


@dataclass(frozen=True, kw_only=True)
class OutcomeSpec:
    column: str
    label: str
    family: str = "primary"
    alternative: str = "two-sided"
    statistic: str = "mean_difference"
    range: tuple[float, float] | None = None
    unit: str = ""


@dataclass(frozen=True, kw_only=True)
class ComplianceSpec:
    received: str


@dataclass(frozen=True, kw_only=True)
class RegistrationSpec:
    id: str
    address: str = ""


@dataclass(frozen=True, kw_only=True)
class EnrolmentSpec:
    """Counts before randomization declared in the spec (CONSORT-style flow)."""

    assessed: int | None = None
    excluded: tuple[tuple[str, int], ...] = ()
    randomized: int | None = None


@dataclass(frozen=True, kw_only=True)
class Spec:
    path: Path
    spec_version: int
    title: str
    summary: str
    data: DataSpec
    design: DesignSpec
    analysis: AnalysisSpec
    outcomes: tuple[OutcomeSpec, ...]
    compliance: ComplianceSpec | None = None
    subgroups: tuple[str, ...] = ()
    registration: RegistrationSpec | None = None
    enrolment: EnrolmentSpec | None = None
    raw: dict = field(default_factory=dict, compare=False, repr=False)

    @property
    def project_dir(self) -> Path:
        return self.path.parent


@dataclass(frozen=True, kw_only=True)
class InputFile:
    path: str          # relative to the project folder, '/'-separated
    sha256: str
    rows: int

    def to_dict(self) -> dict:
        return {"path": self.path, "sha256": self.sha256, "rows": self.rows}


@dataclass(frozen=True, kw_only=True)
class Study:
    """A validated study: the spec plus one merged row per unit, sorted by id.

    ``frame`` has a fresh RangeIndex. The treatment column holds int 0/1;
    outcome and covariate columns are float (NaN = missing).
    """

    spec: Spec
    frame: pd.DataFrame
    inputs: tuple[InputFile, ...]

    @property
    def z(self):
        return self.frame[self.spec.design.treatment].to_numpy(dtype=int)

    @property
    def block(self):
        col = self.spec.design.block
        return None if col is None else self.frame[col].to_numpy()

    @property
    def cluster(self):
        col = self.spec.design.cluster
        return None if col is None else self.frame[col].to_numpy()

    @property
    def ids(self):
        return self.frame[self.spec.data.id].to_numpy()

    def outcome(self, column: str):
        return self.frame[column].to_numpy(dtype=float)
