"""The validated, normalised inputs every analysis step receives.

``spec.load_spec`` builds a :class:`Spec`; ``data.load_study`` builds a
:class:`Study` (spec + merged frame + input fingerprints). Analysis steps take a
``Study`` and trust it: all validation has happened before.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

import pandas as pd

from report_kit.validate import ALTERNATIVES, MECHANISMS, STATISTICS  # noqa: F401  (re-exported)
from report_kit.validate import Record

FAMILIES = ("primary", "secondary", "exploratory")
MULTIPLICITY = ("none", "holm", "bh", "westfall_young")
DEFAULT_ARM_LABELS = ("control", "treated")   # words for the arms coded 0 and 1


@dataclass(frozen=True, kw_only=True)
class DataSpec:
    units: str
    id: str
    merge: tuple[str, ...] = ()
    missing_values: tuple[str, ...] = ()   # texts read as missing besides a blank (never in the id)


@dataclass(frozen=True, kw_only=True)
class RerandomizationSpec:
    covariates: tuple[str, ...]
    max_distance: float


@dataclass(frozen=True, kw_only=True)
class DesignSpec:
    mechanism: str
    treatment: str
    block: str | None = None
    cluster: str | None = None
    probability: float | None = None
    seed: int | None = None
    arms: tuple[str, ...] | None = None          # multi-arm: arm labels, reference first
    contrasts: str = "reference"                 # reference | pairwise
    factors: tuple[tuple[str, tuple[str, ...]], ...] | None = None  # factorial: (factor, arms where on)
    arm_display: tuple[tuple[str, str], ...] = ()  # multi-arm: display label of each arm (optional)
    arm_probabilities: tuple[float, ...] | None = None  # multi-arm Bernoulli: probability of each arm, arms order
    single_arm_blocks: str = "error"     # error | drop | pool (blocks holding one arm only)
    rerandomization: RerandomizationSpec | None = None
    arm_labels: tuple[str, str] = DEFAULT_ARM_LABELS   # (label of 0, label of 1)

    @property
    def multi_arm(self) -> bool:
        """True when the study needs the multi-arm analysis (more than two arms, or a factorial)."""
        return self.arms is not None and (len(self.arms) > 2 or self.factors is not None)

    def arm_label(self, arm: str) -> str:
        """The display label of an arm (the arm itself when none is given)."""
        return dict(self.arm_display).get(arm, arm)


@dataclass(frozen=True, kw_only=True)
class AnalysisSpec:
    alpha: float = 0.05
    covariates: tuple[str, ...] = ()
    adjust: bool = True
    randomizations: int = 10000
    max_exact: int = 200000
    seed: int = 5150
    multiplicity: str = "holm"
    missing_covariates: str = "error"    # error | drop_units (a unit lacking a baseline covariate)
    subgroup_missing: str = "error"      # error | own_level | drop (a unit lacking its subgroup value)
    std_effect: str = "hedges_g"


@dataclass(frozen=True, kw_only=True)
class OutcomeSpec:
    column: str
    label: str
    family: str = "primary"
    alternative: str = "two-sided"
    statistic: str = "mean_difference"
    range: tuple[float, float] | None = None
    resolution: float | None = None
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
class InputFile(Record):
    path: str          # relative to the project folder, '/'-separated
    sha256: str
    rows: int


@dataclass(frozen=True, kw_only=True)
class Study:
    """A validated study: the spec plus one merged row per unit, sorted by id.

    ``frame`` has a fresh RangeIndex. The treatment column holds int 0/1, or,
    when ``design.arms`` is given, the arm labels as text; :attr:`z` then holds
    each unit's arm position in ``design.arms`` (0 = reference), so a two-arm
    labelled study reads exactly like a 0/1 one. Outcome and covariate columns
    are float (NaN = missing).
    """

    spec: Spec
    frame: pd.DataFrame
    inputs: tuple[InputFile, ...]
    handling: tuple[dict, ...] = ()      # what the declared data handling did (results.json data_handling)
    as_randomized: pd.DataFrame | None = field(default=None, compare=False, repr=False)  # before handling

    @property
    def randomized_frame(self) -> pd.DataFrame:
        """Every unit as randomized (before a declared handling left some out or pooled blocks)."""
        return self.frame if self.as_randomized is None else self.as_randomized

    @property
    def z(self):
        return self.arm_codes(self.frame)

    def arm_codes(self, frame: pd.DataFrame):
        """The treatment column of ``frame`` as int codes: 0/1, or positions in ``design.arms``."""
        arms = self.spec.design.arms
        column = frame[self.spec.design.treatment]
        if arms is None:
            return column.to_numpy(dtype=int)
        position = {arm: k for k, arm in enumerate(arms)}
        return column.map(position).to_numpy(dtype=int)

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
