"""``report-kit new``: a fresh project folder with a commented design spec and a sample table."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd

from report_kit.errors import UsageError
from report_kit.inputs.spec import SPEC_FILENAME

DESIGN_TEMPLATE = """\
# design.yaml: the pre-analysis plan of this study, read by report-kit.
# Every key is documented in the report-kit docs (docs/spec.md); `report-kit schema` prints the JSON Schema.
spec_version: 1
title: "{title}"
summary: >
  One paragraph for the funder: what was randomized, to whom, and what is measured.
data:
  units: data/units.csv        # one row per unit (.csv .parquet .xlsx .dta)
  id: unit_id                  # unique, non-missing unit id
  # merge: [data/endline.csv]  # further tables joined on the id
design:
  mechanism: complete          # complete | bernoulli | blocked | cluster | blocked_cluster | matched_pairs
  treatment: assigned          # 0/1 column: assignment as randomized
  # block: site                # blocked, blocked_cluster, matched_pairs (pair id)
  # cluster: household         # cluster, blocked_cluster
  # seed: 1234                 # seed that drew the assignment (checked by `report-kit check`)
  # arm_labels: {{control: "usual service", treated: "new service"}}   # words for the arms coded 0 and 1
  # arms: [usual, text, call, both]  # more than two arms: the labels in the treatment column, reference first
  # contrasts: reference       # reference (each arm vs the first) | pairwise
  # factors:                   # a factorial design: each factor and the arms where it is on
  #   text: [text, both]
  #   call: [call, both]
analysis:
  alpha: 0.05
  covariates: [baseline]       # pre-specified baseline covariates
  adjust: true                 # also report the covariate-adjusted (Lin) estimate
  randomizations: 10000        # Monte Carlo draws when exact enumeration is too large
  max_exact: 200000            # enumerate every assignment when there are at most this many
  seed: 20261201               # seed of the randomization-inference draws
  multiplicity: holm           # none | holm | bh | westfall_young
  # std_effect: hedges_g       # effect in SD units: hedges_g | cohen_d | glass_delta
outcomes:
  - column: outcome
    label: "Main outcome"
    family: primary            # primary | secondary | exploratory
    alternative: two-sided     # two-sided | greater | less
    statistic: mean_difference # mean_difference | rank_sum | studentized | ks
    # unit: points             # printed after the outcome's numbers in the headline
# compliance:
#   received: took_up          # 0/1 column: treatment actually received -> CACE
# subgroups: [sex]             # pre-specified subgroup analyses
# registration:                # shown on page 1; the address is shown as text, never fetched
#   id: "REGISTRY-ID"
#   address: "address of the registry entry"
# enrolment:                   # counts before randomization, for the participant-flow diagram
#   assessed: 30
#   excluded: [{{reason: "not eligible", n: 10}}]
#   randomized: 20
"""


def new_project(path: Path, *, title: str | None = None) -> Path:
    """Create ``path`` with design.yaml and a small invented sample table to replace."""
    path = Path(path)
    if path.exists() and any(path.iterdir()):
        raise UsageError(f"{path}: already exists and is not empty; choose a new folder")
    (path / "data").mkdir(parents=True, exist_ok=True)
    (path / SPEC_FILENAME).write_text(DESIGN_TEMPLATE.format(title=title or path.name), encoding="utf-8")
    rng = np.random.default_rng(1)
    n = 20
    assigned = np.zeros(n, dtype=int)
    assigned[rng.choice(n, n // 2, replace=False)] = 1
    baseline = rng.normal(50, 10, n).round(1)
    sample = pd.DataFrame({"unit_id": [f"u{i:03d}" for i in range(1, n + 1)], "assigned": assigned,
                           "baseline": baseline,
                           "outcome": (baseline + 3 * assigned + rng.normal(0, 5, n)).round(1)})
    sample.to_csv(path / "data" / "units.csv", index=False)
    (path / "README.md").write_text(
        "# Project folder\n\n`design.yaml` is the analysis plan; `data/` holds the inputs "
        "(report-kit never writes there; `data/units.csv` is an invented sample to replace); "
        "`runs/` receives one folder per `report-kit run`.\n", encoding="utf-8")
    return path
