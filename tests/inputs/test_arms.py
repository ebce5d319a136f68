"""Multi-arm and factorial keys of design.yaml and arm-label data checks: clear errors naming key and rows."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import yaml

from report_kit.errors import DataError, SpecError
from report_kit.inputs.data import load_study
from report_kit.inputs.spec import load_spec


def project(tmp_path, design: dict, arms_column, *, extra_cols=None):
    (tmp_path / "data").mkdir(parents=True, exist_ok=True)
    n = len(arms_column)
    frame = pd.DataFrame({"uid": [f"u{i}" for i in range(n)], "arm": arms_column,
                          "y": np.arange(n, dtype=float)})
    for key, values in (extra_cols or {}).items():
        frame[key] = values
    frame.to_csv(tmp_path / "data" / "units.csv", index=False)
    doc = {"spec_version": 1, "title": "t", "data": {"units": "data/units.csv", "id": "uid"},
           "design": {"mechanism": "complete", "treatment": "arm", **design},
           "outcomes": [{"column": "y"}]}
    (tmp_path / "design.yaml").write_text(yaml.safe_dump(doc, sort_keys=False), encoding="utf-8")
    return str(tmp_path)


def spec_error(path) -> str:
    with pytest.raises(SpecError) as info:
        load_spec(path)
    return str(info.value)


def data_error(path) -> str:
    with pytest.raises(DataError) as info:
        load_study(load_spec(path))
    return str(info.value)


THREE = ["usual", "short", "long"]


def test_three_arms_load_with_reference_first(tmp_path):
    path = project(tmp_path, {"arms": THREE, "arm_labels": {"short": "Short version"}},
                   ["long", "usual", " short", "usual", "short", "long"])
    study = load_study(load_spec(path))
    assert study.spec.design.arms == ("usual", "short", "long")
    assert study.spec.design.contrasts == "reference" and study.spec.design.multi_arm
    assert study.spec.design.arm_label("short") == "Short version"
    assert study.spec.design.arm_label("long") == "long"
    assert study.z.tolist() == [2, 0, 1, 0, 1, 2]


def test_two_labelled_arms_read_as_zero_one(tmp_path):
    path = project(tmp_path, {"arms": ["off", "on"]}, ["on", "off", "off", "on"])
    study = load_study(load_spec(path))
    assert not study.spec.design.multi_arm
    assert study.z.tolist() == [1, 0, 0, 1]


def test_numeric_arm_labels_compare_as_text(tmp_path):
    path = project(tmp_path, {"arms": [0, 1, 2]}, [2, 1, 0, 0, 1, 2])
    assert load_study(load_spec(path)).z.tolist() == [2, 1, 0, 0, 1, 2]


def test_label_missing_from_arms_names_rows(tmp_path):
    path = project(tmp_path, {"arms": THREE}, ["usual", "short", "long", "medium", "usual", "short"])
    msg = data_error(path)
    assert "units.csv" in msg and "'arm'" in msg and "not listed in design.arms" in msg
    assert "medium" in msg and "line 5 (id 'u3'" in msg


def test_arm_with_no_units(tmp_path):
    path = project(tmp_path, {"arms": THREE}, ["usual", "short", "usual", "short"])
    msg = data_error(path)
    assert "arm(s) long of design.arms have no units" in msg


def test_missing_arm_value(tmp_path):
    path = project(tmp_path, {"arms": THREE}, ["usual", "short", None, "long"])
    assert "missing arm at line 4 (id 'u2')" in data_error(path)


def test_cluster_split_across_arms(tmp_path):
    path = project(tmp_path, {"arms": THREE, "mechanism": "cluster", "cluster": "c"},
                   ["usual", "short", "long", "long", "usual", "short"],
                   extra_cols={"c": ["a", "a", "b", "b", "c", "c"]})
    msg = data_error(path)
    assert "clusters split across arms" in msg and "'a'" in msg


def test_block_lacking_an_arm(tmp_path):
    path = project(tmp_path, {"arms": THREE, "mechanism": "blocked", "block": "b"},
                   ["usual", "short", "long", "usual", "short", "short"],
                   extra_cols={"b": ["x", "x", "x", "w", "w", "w"]})
    msg = data_error(path)
    assert "block 'w'" in msg and "none in arm(s) long" in msg


def test_factors_naming_unknown_arm(tmp_path):
    msg = spec_error(project(tmp_path, {"arms": ["none", "a", "b", "ab"],
                                        "factors": {"fa": ["a", "ab"], "fb": ["b", "abc"]}},
                             ["none", "a", "b", "ab"]))
    assert "design.factors.fb[1]: 'abc' is not one of design.arms" in msg


def test_factorial_not_a_full_grid(tmp_path):
    msg = spec_error(project(tmp_path, {"arms": ["none", "a", "b"],
                                        "factors": {"fa": ["a"], "fb": ["b"]}},
                             ["none", "a", "b"]))
    assert "design.factors: the arms must form the full grid" in msg and "no arm has fa on, fb on" in msg


def test_factorial_two_arms_same_cell(tmp_path):
    msg = spec_error(project(tmp_path, {"arms": ["none", "a", "b", "ab"],
                                        "factors": {"fa": ["a", "ab"], "fb": ["ab"]}},
                             ["none", "a", "b", "ab"]))
    assert "arms 'none' and 'b' have the same factors on" in msg


def test_arm_probabilities_load_in_arm_order(tmp_path):
    path = project(tmp_path, {"mechanism": "bernoulli", "arms": THREE,
                              "probability": {"long": 0.2, "usual": 0.5, "short": 0.3}}, THREE * 2)
    design = load_spec(path).design
    assert design.arm_probabilities == (0.5, 0.3, 0.2) and design.probability is None


def test_full_factorial_loads(tmp_path):
    path = project(tmp_path, {"arms": ["none", "a", "b", "ab"], "factors": {"fa": ["a", "ab"], "fb": ["b", "ab"]}},
                   ["none", "a", "b", "ab"] * 2)
    spec = load_spec(path)
    assert spec.design.factors == (("fa", ("a", "ab")), ("fb", ("b", "ab")))


@pytest.mark.parametrize("design, expected", [
    ({"arms": ["a", "a", "b"]}, "design.arms[1]: 'a' is already design.arms[0]"),
    ({"contrasts": "pairwise"}, "design.contrasts: given without design.arms"),
    ({"arms": ["a", "b", "c"], "contrasts": "all"}, "design.contrasts: found 'all'"),
    ({"arms": ["a", "b", "c"], "arm_labels": {"d": "D"}}, "design.arm_labels.d: 'd' is not one of design.arms"),
    ({"arms": ["a"]}, "design.arms: found an empty value; expected at least 2 item(s)"),
    ({"arms": ["a", "b", "c"], "mechanism": "matched_pairs", "block": "p"}, "mechanism 'matched_pairs' has two arms only"),
    ({"arms": ["a", "b", "c"], "factors": {"x": ["b"]}}, "design.factors: found 1 key(s); expected at least 2"),
    ({"arms": ["a", "b", "c"], "mechanism": "bernoulli", "probability": {"a": 0.5, "b": 0.3, "d": 0.2}},
     "design.probability.d: 'd' is not one of design.arms"),
    ({"arms": ["a", "b", "c"], "mechanism": "bernoulli", "probability": {"a": 0.5, "b": 0.5}},
     "design.probability: no probability for arm(s) c"),
    ({"arms": ["a", "b", "c"], "mechanism": "bernoulli", "probability": {"a": 0.5, "b": 0.3, "c": 0.1}},
     "design.probability: the arm probabilities sum to 0.9, not 1"),
    ({"arms": ["a", "b", "c"], "probability": {"a": 0.5, "b": 0.3, "c": 0.2}},
     "design.probability: arm probabilities are for bernoulli designs"),
    ({"arms": ["a", "b", "c"], "mechanism": "bernoulli", "probability": 0.3},
     "design.probability: a single number is for two arms"),
    ({"probability": {"a": 0.5, "b": 0.5}}, "design.probability: a mapping of arm probabilities needs design.arms"),
])
def test_spec_messages(tmp_path, design, expected):
    assert expected in spec_error(project(tmp_path, design, ["a", "b", "c"]))


def test_check_command_reports_arm_problems_without_traceback(tmp_path):
    from click.testing import CliRunner

    from report_kit.cli import main

    path = project(tmp_path, {"arms": THREE}, ["usual", "short", "long", "medium"])
    result = CliRunner().invoke(main, ["check", path])
    assert result.exit_code == 1
    assert "not listed in design.arms" in result.output and "Traceback" not in result.output
    bad = project(tmp_path / "f", {"arms": ["none", "a", "b"], "factors": {"fa": ["a"], "fb": ["c"]}},
                  ["none", "a", "b"])
    result = CliRunner().invoke(main, ["check", bad])
    assert result.exit_code == 1 and "design.factors.fb[0]: 'c' is not one of design.arms" in result.output


def test_single_arm_blocks_handling_is_refused_with_arms(tmp_path):
    # design.single_arm_blocks drops or pools blocks of a 0/1 column; with design.arms every block needs every arm.
    path = project(tmp_path, {"mechanism": "blocked", "block": "site", "arms": THREE, "single_arm_blocks": "drop"},
                   THREE * 2, extra_cols={"site": ["a"] * 3 + ["b"] * 3})
    message = spec_error(path)
    assert "design.single_arm_blocks" in message and "every block must hold every arm" in message


def test_arm_lists_are_bounded(tmp_path):
    # Bounded specs: at most 50 arms, arm labels of at most 200 characters.
    message = spec_error(project(tmp_path, {"arms": [f"a{i}" for i in range(51)]}, THREE * 2))
    assert "design.arms" in message and "at most 50" in message
    message = spec_error(project(tmp_path, {"arms": ["usual", "x" * 201]}, THREE * 2))
    assert "at most 200" in message


def test_rerandomization_is_refused_for_more_than_two_arms(tmp_path):
    # Rerandomized designs (Morgan & Rubin 2012) are drawn for two arms; the multi-arm draw has no acceptance rule.
    path = project(tmp_path, {"arms": THREE, "rerandomization": {"covariates": ["y"], "max_distance": 1.0}},
                   THREE * 2)
    message = spec_error(path)
    assert "design.rerandomization" in message and "multi-arm" in message
