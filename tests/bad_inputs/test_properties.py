"""Property: random specs and random tables give a result or report-kit's own input error, nothing else.

Hypothesis builds design specs (the valid base with random keys set to random
values, or random YAML text) and units tables (random columns and cells drawn
from awkward texts: blanks, ``NA``, ``NaN``, ``#N/A``, ``inf``, quotes, commas,
non-ASCII). Loading and analysing must either succeed or raise a
:class:`report_kit.errors.ReportKitError`; any other exception is a bug.
No wall-clock limit: hypothesis' ``deadline`` is off, the example count is fixed.
"""

from __future__ import annotations

import csv
import io
import tempfile
from pathlib import Path

import yaml
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from report_kit.errors import ReportKitError
from report_kit.pipeline import load_project, run_analysis
from tests.bad_inputs.builder import BASE_UNITS, Case

KEYS = ["spec_version", "title", "summary", "data.units", "data.id", "data.merge", "data.missing_values",
        "design.mechanism", "design.treatment", "design.block", "design.cluster", "design.probability",
        "design.seed", "analysis.alpha", "analysis.covariates", "analysis.adjust", "analysis.randomizations",
        "analysis.max_exact", "analysis.seed", "analysis.multiplicity", "outcomes", "compliance",
        "subgroups", "unknown_key"]
COLUMNS = ["school", "corner", "books_before", "minutes", "district", "extra"]
CELLS = ["", "NA", "None", "NaN", "#N/A", "0", "1", "2", "-3.5", "1e308", "inf", "S1", "S2", "north",
         "x,y", 'say "hi"', "ü", " 1 ", "007", "0.5", "true"]

scalars = st.one_of(st.none(), st.booleans(), st.integers(-10, 10 ** 7), st.floats(allow_nan=True),
                    st.sampled_from(COLUMNS + ["complete", "blocked", "cluster", "holm", "data/units.csv"]),
                    st.text(max_size=12))
values = st.recursive(scalars, lambda inner: st.lists(inner, max_size=4)
                      | st.dictionaries(st.sampled_from(["column", "label", "family", "range", "received", "x"]),
                                        inner, max_size=3), max_leaves=8)
spec_changes = st.dictionaries(st.sampled_from(KEYS), values, max_size=3)
yaml_texts = st.text(alphabet=st.sampled_from(list("abc: -[]{}&*!|>'\"#\n\t 01.")), max_size=80)


@st.composite
def tables(draw) -> str:
    header = draw(st.lists(st.sampled_from(COLUMNS), min_size=1, max_size=6, unique=True))
    rows = draw(st.lists(st.lists(st.sampled_from(CELLS), min_size=len(header), max_size=len(header)),
                         min_size=0, max_size=9))
    out = io.StringIO()
    writer = csv.writer(out, lineterminator="\n")
    writer.writerow(header)
    writer.writerows(rows)
    return out.getvalue()


def _outcome_of(case: Case) -> str:
    """'ok' or 'input error'; anything else propagates and fails the property."""
    with tempfile.TemporaryDirectory() as tmp:
        project = case.build(Path(tmp))
        try:
            study = load_project(project)
            run_analysis(study)
        except ReportKitError:
            return "input error"
    return "ok"


SETTINGS = settings(max_examples=60, deadline=None, derandomize=True, database=None,
                    suppress_health_check=[HealthCheck.too_slow])


@SETTINGS
@given(changes=spec_changes, table=st.one_of(st.just(BASE_UNITS), tables()))
def test_random_specs_and_tables_give_a_result_or_an_input_error(changes, table):
    case = Case(name="random", code=0, words=(), spec=changes, units=table)
    assert _outcome_of(case) in ("ok", "input error")


@SETTINGS
@given(text=yaml_texts)
def test_random_yaml_text_gives_an_input_error(text):
    case = Case(name="random-yaml", code=1, words=(), spec_text=text)
    assert _outcome_of(case) == "input error"


def test_the_base_project_is_valid(tmp_path):
    """The property is not vacuous: the unchanged base project loads and is analysed."""
    assert _outcome_of(Case(name="base", code=0, words=())) == "ok"
    written = Case(name="base", code=0, words=()).build(tmp_path) / "design.yaml"
    assert yaml.safe_load(written.read_text())["title"].startswith("Invented")
