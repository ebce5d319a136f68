"""design.yaml validation: every message names the file, the key path, what was found and expected."""

from __future__ import annotations

import json

import pytest
import yaml

from report_kit.errors import SpecError
from report_kit.inputs.spec import design_schema, load_spec

BASE = {
    "spec_version": 1,
    "title": "t",
    "data": {"units": "data/units.csv", "id": "uid"},
    "design": {"mechanism": "complete", "treatment": "z"},
    "outcomes": [{"column": "y"}],
}


def write(tmp_path, doc) -> str:
    path = tmp_path / "design.yaml"
    path.write_text(doc if isinstance(doc, str) else yaml.safe_dump(doc), encoding="utf-8")
    return str(tmp_path)


def message_for(tmp_path, doc) -> str:
    with pytest.raises(SpecError) as info:
        load_spec(write(tmp_path, doc))
    return str(info.value)


def patched(**changes):
    doc = json.loads(json.dumps(BASE))
    for dotted, value in changes.items():
        node = doc
        *parents, last = dotted.split("__")
        for key in parents:
            node = node[int(key)] if isinstance(node, list) else node[key]
        if value is ...:
            del node[last]
        else:
            node[last] = value
    return doc


def test_valid_spec_loads_with_defaults(tmp_path):
    spec = load_spec(write(tmp_path, BASE))
    assert spec.design.mechanism == "complete"
    assert spec.analysis.alpha == 0.05 and spec.analysis.multiplicity == "holm"
    assert spec.outcomes[0].label == "y" and spec.outcomes[0].alternative == "two-sided"


def test_unknown_top_level_key_suggests_closest(tmp_path):
    doc = dict(BASE)
    doc["outcomse"] = doc.pop("outcomes")
    msg = message_for(tmp_path, doc)
    assert "design.yaml" in msg
    assert "unknown key 'outcomse' — did you mean 'outcomes'?" in msg
    assert "missing required key 'outcomes'" in msg


def test_unknown_nested_key_names_path(tmp_path):
    msg = message_for(tmp_path, patched(design__mechansim="complete"))
    assert "design: unknown key 'mechansim' — did you mean 'mechanism'?" in msg


def test_bad_enum_lists_choices(tmp_path):
    msg = message_for(tmp_path, patched(outcomes__0__alternative="both"))
    assert "outcomes[0].alternative: found 'both' (text); expected one of 'two-sided', 'greater', 'less'" in msg


def test_enum_typo_suggests(tmp_path):
    msg = message_for(tmp_path, patched(design__mechanism="clustered"))
    assert "design.mechanism: found 'clustered'" in msg and "did you mean 'cluster'?" in msg


def test_wrong_type(tmp_path):
    msg = message_for(tmp_path, patched(analysis={"randomizations": "many"}))
    assert "analysis.randomizations: found 'many' (text); expected a whole number" in msg


def test_out_of_range(tmp_path):
    msg = message_for(tmp_path, patched(analysis={"alpha": 0.7}))
    assert "analysis.alpha: found 0.7 (a number); expected a value < 0.5" in msg


def test_missing_required_nested(tmp_path):
    msg = message_for(tmp_path, patched(data__id=...))
    assert "data.id: missing required key 'id'" in msg


def test_spec_version(tmp_path):
    msg = message_for(tmp_path, patched(spec_version=2))
    assert "spec_version: found 2 (a whole number); expected 1" in msg


def test_mechanism_needs_block(tmp_path):
    msg = message_for(tmp_path, patched(design__mechanism="blocked"))
    assert "design.block: missing; mechanism 'blocked' needs the block column" in msg


def test_cluster_on_complete_is_an_error(tmp_path):
    msg = message_for(tmp_path, patched(design__cluster="village"))
    assert "design.cluster: given, but mechanism 'complete' has no clusters" in msg


def test_duplicate_outcome(tmp_path):
    doc = patched()
    doc["outcomes"].append({"column": "y"})
    assert "outcomes[1].column: 'y' is already outcomes[0]" in message_for(tmp_path, doc)


def test_bad_range(tmp_path):
    msg = message_for(tmp_path, patched(outcomes__0__range=[5, 1]))
    assert "outcomes[0].range: found [5.0, 1.0]" in msg or "outcomes[0].range: found [5, 1]" in msg


def test_yaml_syntax_error_names_line(tmp_path):
    msg = message_for(tmp_path, "spec_version: 1\ntitle: [unclosed\n")
    assert "not valid YAML (line" in msg


def test_not_a_mapping(tmp_path):
    assert "expected a mapping" in message_for(tmp_path, "- a\n- b\n")


def test_unsafe_yaml_tag_refused(tmp_path):
    # yaml.safe_load refuses arbitrary Python objects (PyYAML documentation).
    msg = message_for(tmp_path, "spec_version: !!python/object/apply:os.system ['true']\n")
    assert "not valid YAML" in msg


def test_missing_file(tmp_path):
    with pytest.raises(SpecError, match="no design spec found"):
        load_spec(str(tmp_path))


def test_schema_is_valid_json_schema():
    # Checked against the draft 2020-12 metaschema shipped with the jsonschema package.
    import jsonschema

    jsonschema.Draft202012Validator.check_schema(design_schema())
    assert set(design_schema()["required"]) == {"spec_version", "title", "data", "design", "outcomes"}


# --------------------------------------------------------------------------- bug fixes


def test_duplicate_key_names_both_lines(tmp_path):
    text = yaml.safe_dump(BASE, sort_keys=False).replace("  treatment: z\n", "  treatment: z\n  mechanism: blocked\n")
    msg = message_for(tmp_path, text)
    first = 1 + text.splitlines().index("  mechanism: complete")
    assert f"the key 'mechanism' appears twice in one mapping (first on line {first})" in msg


def test_yaml_merge_key_is_not_a_duplicate(tmp_path):
    # A key given explicitly next to a YAML merge key ("<<") overrides the merged one (YAML 1.1 merge
    # key type); that is not a repeated key.
    text = ("spec_version: 1\ntitle: t\ndata: {units: data/units.csv, id: uid}\n"
            "design:\n  <<: {mechanism: complete, treatment: x}\n  treatment: z\noutcomes: [{column: y}]\n")
    spec = load_spec(write(tmp_path, text))
    assert spec.design.treatment == "z" and spec.design.mechanism == "complete"


@pytest.mark.parametrize(("dotted", "value", "where"), [
    ("analysis", {"alpha": float("nan")}, "analysis.alpha"),
    ("outcomes__0__range", [float("-inf"), 1.0], "outcomes[0].range[0]"),
    ("design__probability", float("inf"), "design.probability"),
])
def test_non_finite_numbers(tmp_path, dotted, value, where):
    msg = message_for(tmp_path, patched(**{dotted: value}))
    assert f"{where}: found" in msg and "expected a finite number" in msg


def test_number_as_key(tmp_path):
    assert "(top level): unknown key '1'" in message_for(tmp_path, yaml.safe_dump(BASE) + "1: 2\n")


def test_date_is_described_readably(tmp_path):
    msg = message_for(tmp_path, yaml.safe_dump(BASE).replace("title: t", "title: 2026-01-31"))
    assert "title: found 2026-01-31 (a date; put it in quotes to use it as text); expected text" in msg


@pytest.mark.parametrize("text", ["", "   \n", "# nothing yet\n"])
def test_empty_file(tmp_path, text):
    assert "the design spec is empty" in message_for(tmp_path, text)


def test_tab_indentation(tmp_path):
    msg = message_for(tmp_path, "spec_version: 1\ndesign:\n\tmechanism: complete\n")
    assert "not valid YAML (line 3" in msg and "not tabs" in msg


@pytest.mark.parametrize(("changes", "expected"), [
    ({"design__treatment": "uid"}, "design.treatment: 'uid' is also data.id"),
    ({"outcomes__0__column": "z"}, "outcomes[0].column: 'z' is also design.treatment"),
    ({"analysis": {"covariates": ["y"]}}, "analysis.covariates[0]: 'y' is also outcomes[0].column"),
    ({"analysis": {"covariates": ["x", "x"]}}, "analysis.covariates[1]: 'x' is already analysis.covariates[0]"),
    ({"design": {"mechanism": "blocked_cluster", "treatment": "z", "block": "s", "cluster": "s"}},
     "design.cluster: 's' is also design.block"),
    ({"data__merge": ["data/./units.csv"]}, "data.merge[0]: 'data/./units.csv' is data.units"),
    ({"subgroups": ["g", "g"]}, "subgroups[1]: 'g' is already subgroups[0]"),
    ({"compliance": {"received": "y"}}, "compliance.received: 'y' is also outcomes[0].column"),
])
def test_one_role_per_column(tmp_path, changes, expected):
    assert expected in message_for(tmp_path, patched(**changes))


def test_whole_number_seed_with_decimal_point_becomes_int(tmp_path):
    spec = load_spec(write(tmp_path, patched(design__seed=42.0)))
    assert spec.design.seed == 42 and isinstance(spec.design.seed, int)


def test_spec_that_is_a_folder(tmp_path):
    (tmp_path / "design.yaml").mkdir()
    with pytest.raises(SpecError, match="design.yaml: is a folder, not a file"):
        load_spec(str(tmp_path))


def test_spec_not_utf8_names_line(tmp_path):
    (tmp_path / "design.yaml").write_bytes(b"spec_version: 1\ntitle: caf\xe9\n")
    with pytest.raises(SpecError, match=r"is not UTF-8 text \(byte 0xe9 on line 2"):
        load_spec(str(tmp_path))


def test_byte_order_mark_accepted(tmp_path):
    (tmp_path / "design.yaml").write_bytes(b"\xef\xbb\xbf" + yaml.safe_dump(BASE).encode())
    assert load_spec(str(tmp_path)).title == "t"


def test_funder_keys_load(tmp_path):
    doc = patched(design__arm_labels={"control": "usual classes", "treated": "clubs"},
                  analysis={"std_effect": "glass_delta"}, outcomes__0__unit="points",
                  registration={"id": "RK-1", "address": "https://trials.example.org/RK-1"},
                  enrolment={"assessed": 30, "excluded": [{"reason": "moved", "n": 10}], "randomized": 20})
    spec = load_spec(write(tmp_path, doc))
    assert spec.design.arm_labels == ("usual classes", "clubs")
    assert spec.analysis.std_effect == "glass_delta" and spec.outcomes[0].unit == "points"
    assert spec.registration.id == "RK-1" and spec.enrolment.excluded == (("moved", 10),)


def test_funder_key_problems_are_named(tmp_path):
    same = message_for(tmp_path, patched(design__arm_labels={"control": "a", "treated": "a"}))
    assert "design.arm_labels: both arms are called 'a'" in same
    sums = message_for(tmp_path, patched(enrolment={"assessed": 31, "excluded": [{"reason": "moved", "n": 10}],
                                                    "randomized": 20}))
    assert "enrolment.assessed: found 31; expected excluded + randomized = 10 + 20 = 30" in sums
    typo = message_for(tmp_path, patched(registration={"id": "x", "adress": "y"}))
    assert "registration: unknown key 'adress' — did you mean 'address'?" in typo
    method = message_for(tmp_path, patched(analysis={"std_effect": "hedges"}))
    assert "analysis.std_effect: found 'hedges'" in method and "did you mean 'hedges_g'?" in method
