"""Regenerate the invented example projects' data (deterministic).

Every scenario, place and number here is invented. Run from the repository root:
``python projects/generate_examples.py [project ...]`` (default: all; each
project has its own generator seed, so regenerating one leaves the others'
bytes unchanged). The committed CSV files are the output;
report-kit never writes into ``data/``.
"""

from __future__ import annotations

import sys
from pathlib import Path

import numpy as np
import pandas as pd

ROOT = Path(__file__).resolve().parent


def tutoring_clubs(rng: np.random.Generator) -> None:
    """Blocked cluster trial: after-school tutoring clubs, schools randomized within districts."""
    districts = ["Ashvale", "Brindle", "Corran", "Dunmere"]
    rows, ends = [], []
    pid = 1000
    for d_idx, district in enumerate(districts):
        schools = [f"{district[:3].upper()}-{k + 1:02d}" for k in range(6)]
        treated = set(rng.choice(schools, size=3, replace=False))
        district_effect = rng.normal(0, 4)
        for school in schools:
            z = int(school in treated)
            school_effect = rng.normal(0, 3)
            for _ in range(int(rng.integers(11, 17))):
                pid += 1
                gender = rng.choice(["F", "M"])
                age = int(rng.integers(110, 135))
                base = 50 + district_effect + school_effect + rng.normal(0, 9)
                attended = int(rng.random() < (0.72 if z else 0.04))
                gain = 4.5 * attended + (1.0 if gender == "F" and attended else 0.0)
                reading = base * 0.8 + 12 + gain + rng.normal(0, 6)
                maths = base * 0.6 + 20 + 0.5 * gain + rng.normal(0, 7)
                passed = int(reading + rng.normal(0, 5) > 57)
                rows.append(dict(pupil_id=f"P{pid}", district=district, school=school, assigned=z,
                                 gender=gender, age_months=age, reading_baseline=round(base, 1)))
                lost = rng.random() < (0.05 if z else 0.09)
                ends.append(dict(pupil_id=f"P{pid}", attended=attended,
                                 reading_endline=None if lost else round(reading, 1),
                                 maths_endline=None if lost or rng.random() < 0.02 else round(maths, 1),
                                 passed_exam=None if lost else passed))
    out = ROOT / "tutoring-clubs" / "data"
    out.mkdir(parents=True, exist_ok=True)
    pd.DataFrame(rows).to_csv(out / "pupils.csv", index=False)
    endline = pd.DataFrame(ends)
    endline["passed_exam"] = endline["passed_exam"].astype("Int64")
    endline.to_csv(out / "endline.csv", index=False)


#: ``design.seed`` of projects/quiet-hours: the seed that drew its assignment.
QUIET_HOURS_SEED = 20261109


def quiet_hours(rng: np.random.Generator) -> None:
    """Small complete randomization: 12 library branches, 6 given a weekly quiet hour.

    The assignment is drawn by report-kit's own documented algorithm from
    ``QUIET_HOURS_SEED`` (``design.seed`` in the spec), so ``report-kit check``
    re-draws it and finds the ``quiet_hour`` column reproduced.
    """
    from report_kit.design.draw import draw_assignment

    names = ["Alder", "Birchgate", "Cobble", "Dovecote", "Elmstead", "Fennick",
             "Gorse", "Hollin", "Ivybank", "Juniper", "Kestrel", "Larchmont"]
    z = draw_assignment("complete", names, seed=QUIET_HOURS_SEED).astype(int)
    base = rng.normal(420, 60, size=12).round()
    visits = (base * 1.02 + 35 * z + rng.normal(0, 25, size=12)).round()
    satisfaction = np.clip(3.4 + 0.35 * z + rng.normal(0, 0.4, size=12), 1, 5).round(2)
    pd.DataFrame(dict(branch=names, quiet_hour=z, visits_before=base, visits_after=visits,
                      satisfaction=satisfaction)).to_csv(ROOT / "quiet-hours" / "data" / "branches.csv", index=False)


def arrival_signs(rng: np.random.Generator) -> None:
    """Matched pairs: 14 pairs of similar bus routes; one route per pair gets live arrival signs."""
    rows = []
    for pair in range(1, 15):
        base = rng.normal(900, 200)
        treat_first = int(rng.random() < 0.5)
        for k in range(2):
            z = int(k == 0) if treat_first else int(k == 1)
            riders = base + rng.normal(0, 40) + 45 * z
            complaints = max(0, int(rng.poisson(12 - 3 * z)))
            rows.append(dict(route=f"R{pair:02d}{'ab'[k]}", pair=f"pair-{pair:02d}", signs=z,
                             riders_before=round(base + rng.normal(0, 30)), weekly_riders=round(riders),
                             complaints=complaints))
    pd.DataFrame(rows).to_csv(ROOT / "arrival-signs" / "data" / "routes.csv", index=False)


#: ``design.seed`` of projects/water-letters: the seed that drew its three-arm assignment.
WATER_LETTERS_SEED = 20261202


def water_letters(rng: np.random.Generator) -> None:
    """Three arms, blocked: 96 households in four neighbourhoods get no letter, a plain letter,
    or a letter comparing their use with similar homes; the arms are drawn from ``WATER_LETTERS_SEED``."""
    from report_kit.design.arms import draw_arms

    arms = np.array(["none", "plain", "compare"], dtype=object)
    areas = ["Eastfold", "Millbrook", "Northcote", "Wyndham"]
    ids = [f"H{k:03d}" for k in range(1, 97)]
    area = [areas[k // 24] for k in range(96)]
    arm = arms[draw_arms("blocked", 3, ids, seed=WATER_LETTERS_SEED, block=area)]
    shift = {"none": 0.0, "plain": -6.0, "compare": -14.0}
    prior = rng.normal(310, 55, size=96).round()
    use = prior * 0.9 + 25 + np.array([shift[a] for a in arm]) + rng.normal(0, 20, size=96)
    lost = rng.random(96) < np.where(arm == "none", 0.06, 0.04)
    signup = (rng.random(96) < np.where(arm == "compare", 0.30, np.where(arm == "plain", 0.2, 0.12))).astype(float)
    frame = pd.DataFrame(dict(household=ids, area=area, letter=arm, use_before=prior,
                              use_after=np.where(lost, np.nan, use.round(1)), tips_signup=signup))
    frame.to_csv(ROOT / "water-letters" / "data" / "households.csv", index=False)


#: ``design.seed`` of projects/renewal-nudges: the seed that drew its 2x2 factorial assignment.
RENEWAL_NUDGES_SEED = 20261203


def renewal_nudges(rng: np.random.Generator) -> None:
    """A 2x2 factorial: 160 lapsed members of a (fictional) science museum get a text reminder,
    a phone call, both, or neither; arms drawn by complete randomization from ``RENEWAL_NUDGES_SEED``."""
    from report_kit.design.arms import draw_arms

    arms = np.array(["neither", "text", "call", "both"], dtype=object)
    ids = [f"M{k:04d}" for k in range(1, 161)]
    arm = arms[draw_arms("complete", 4, ids, seed=RENEWAL_NUDGES_SEED)]
    text = np.isin(arm, ["text", "both"])
    call = np.isin(arm, ["call", "both"])
    visits_before = rng.poisson(3, size=160).astype(float)
    propensity = -0.8 + 0.5 * text + 0.9 * call - 0.3 * (text & call) + 0.15 * visits_before
    renewed = (rng.random(160) < 1 / (1 + np.exp(-propensity))).astype(float)
    visits = rng.poisson(np.clip(1.5 + 0.4 * text + 0.8 * call + 0.5 * visits_before, 0.1, None)).astype(float)
    pd.DataFrame(dict(member=ids, nudge=arm, visits_before=visits_before, renewed=renewed,
                      visits_after=visits)).to_csv(ROOT / "renewal-nudges" / "data" / "members.csv", index=False)


#: ``design.seed`` of projects/collection-postcards: the seed that drew its assignment.
COLLECTION_POSTCARDS_SEED = 20261202


def collection_postcards(rng: np.random.Generator) -> None:
    """Large complete randomization with a 0/1 outcome: 8,000 households, half sent a postcard.

    An invented town's postcard announcing a free bulky-waste collection; the
    primary outcome is whether the household booked a collection (0/1), the
    secondary one the number of items it set out (0..8). With C(8000, 4000)
    assignments nothing can be listed; the tests are exact through their
    lattice laws (hypergeometric for the 0/1 outcome, the FFT law for the counts).
    """
    from report_kit.design.draw import draw_assignment

    n = 8000
    ids = [f"H{k:05d}" for k in range(1, n + 1)]
    z = draw_assignment("complete", ids, seed=COLLECTION_POSTCARDS_SEED).astype(int)
    size = rng.integers(1, 7, size=n)
    booked = (rng.random(n) < 0.17 + 0.015 * z + 0.01 * (size - 3)).astype(int)
    items = np.where(booked == 1, np.clip(rng.poisson(2.5 + 0.2 * z + 0.3 * size), 1, 8), 0)
    pd.DataFrame(dict(household=ids, postcard=z, household_size=size, booked=booked,
                      items_set_out=items)).to_csv(ROOT / "collection-postcards" / "data" / "households.csv",
                                                   index=False)


#: ``design.seed`` of projects/rooftop-shade: the seed that drew its (rerandomized) assignment.
ROOFTOP_SHADE_SEED = 20261203


def rooftop_shade(rng: np.random.Generator) -> None:
    """Rerandomized trial: 20 invented apartment blocks, 10 given rooftop shade sails.

    The assignment was redrawn from ``ROOFTOP_SHADE_SEED`` until the
    Mahalanobis distance of the means of last summer's electricity use and the
    number of floors was at most 0.5 (``design.rerandomization`` in the spec),
    with report-kit's own documented algorithm, so ``report-kit check``
    reproduces it.
    """
    from report_kit.design.rerandomization import Rerandomization, draw_rerandomized

    names = [f"Block {c}" for c in "ABCDEFGHIJKLMNOPQRST"]
    floors = rng.integers(3, 13, size=20)
    last_summer = (180 + 22 * floors + rng.normal(0, 40, size=20)).round()
    criterion = Rerandomization.from_arrays(np.column_stack([last_summer, floors]), 0.5)
    z = draw_rerandomized("complete", names, criterion, seed=ROOFTOP_SHADE_SEED)[0].astype(int)
    this_summer = (last_summer * 1.04 - 18 * z + rng.normal(0, 15, size=20)).round()
    pd.DataFrame(dict(building=names, shade=z, floors=floors, kwh_last_summer=last_summer,
                      kwh_this_summer=this_summer)).to_csv(ROOT / "rooftop-shade" / "data" / "buildings.csv",
                                                           index=False)


GENERATORS = {
    "tutoring-clubs": lambda: tutoring_clubs(np.random.default_rng(20261201)),
    "quiet-hours": lambda: quiet_hours(np.random.default_rng(7)),
    "arrival-signs": lambda: arrival_signs(np.random.default_rng(11)),
    "water-letters": lambda: water_letters(np.random.default_rng(31)),
    "renewal-nudges": lambda: renewal_nudges(np.random.default_rng(47)),
    "collection-postcards": lambda: collection_postcards(np.random.default_rng(23)),
    "rooftop-shade": lambda: rooftop_shade(np.random.default_rng(29)),
}


def main(names: list[str] | None = None) -> None:
    """Regenerate the named example projects (default: all); each has its own generator seed."""
    names = list(GENERATORS) if not names else names
    unknown = [n for n in names if n not in GENERATORS]
    if unknown:
        raise SystemExit(f"unknown example project(s) {unknown}; choose from {list(GENERATORS)}")
    for name in names:
        (ROOT / name / "data").mkdir(parents=True, exist_ok=True)
        GENERATORS[name]()


if __name__ == "__main__":
    main(sys.argv[1:])
