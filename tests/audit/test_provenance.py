"""Tests of report_kit.audit.provenance: hashes, canonical results.json, manifest, RO-Crate."""

from __future__ import annotations

import hashlib
import json
import os
import platform
import shutil
import subprocess
from pathlib import Path

import numpy as np
import pytest

from report_kit.errors import UsageError
from report_kit.inputs.model import InputFile
from report_kit.audit.provenance import (
    RunRecord, git_commit, sha256_file, software_versions, write_manifest, write_results_json,
    write_ro_crate,
)

# FIPS 180-2, Appendix B.1-B.3 (SHA-256 examples), from memory; the same digests
# come out of OpenSSL through hashlib.
FIPS_ABC = "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad"
FIPS_TWO_BLOCK = "248d6a61d20638b8e5c026930c3e6039a33ce45964ff2167f6ecedd419db06c1"
FIPS_MILLION_A = "cdc76e5c9914fb9281a1c7e284d73e67f1809a48a497200e046d39ccc7112cd0"
# SHA-256 of the empty string (the widely published digest; from memory).
EMPTY = "e3b0c44298fc1c149afbf4c8996fb92427ae41e4649b934ca495991b7852b855"


def _hash(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


# ----------------------------------------------------------------------- hashing

@pytest.mark.parametrize("content, digest", [
    (b"abc", FIPS_ABC),
    (b"abcdbcdecdefdefgefghfghighijhijkijkljklmklmnlmnomnopnopq", FIPS_TWO_BLOCK),
    (b"a" * 1_000_000, FIPS_MILLION_A),
    (b"", EMPTY),
])
def test_sha256_file_matches_fips_examples(tmp_path, content, digest):
    path = tmp_path / "f.bin"
    path.write_bytes(content)
    assert sha256_file(path) == digest


def test_sha256_file_reads_across_chunks(tmp_path):
    # 3 MiB + 7 bytes crosses the 1 MiB read size; reference: hashlib over the whole bytes.
    data = np.random.default_rng(1).integers(0, 256, size=3 * 2**20 + 7, dtype=np.uint8).tobytes()
    path = tmp_path / "big.bin"
    path.write_bytes(data)
    assert sha256_file(path) == hashlib.sha256(data).hexdigest()


def test_sha256_file_missing_file_is_a_usage_error(tmp_path):
    with pytest.raises(UsageError, match="cannot hash .*nope.csv: no such file"):
        sha256_file(tmp_path / "nope.csv")


# ------------------------------------------------------------------ results.json

def test_write_results_json_exact_bytes(tmp_path):
    results = {
        "schema": "report-kit/results/1",
        "zeta": np.int64(3),
        "alpha": [np.float64(0.1), np.nan, np.bool_(True), None, -0.0, float("inf"), np.float32(0.5)],
        "nested": {"b": (1, 2), "a": "é"},
    }
    sha = write_results_json(tmp_path / "results.json", results)
    expected = (
        '{\n'
        '  "schema": "report-kit/results/1",\n'
        '  "zeta": 3,\n'
        '  "alpha": [\n'
        '    0.1,\n'
        '    null,\n'
        '    true,\n'
        '    null,\n'
        '    0.0,\n'
        '    null,\n'
        '    0.5\n'
        '  ],\n'
        '  "nested": {\n'
        '    "b": [\n'
        '      1,\n'
        '      2\n'
        '    ],\n'
        '    "a": "é"\n'
        '  }\n'
        '}\n'
    ).encode("utf-8")
    data = (tmp_path / "results.json").read_bytes()
    assert data == expected
    assert sha == hashlib.sha256(expected).hexdigest()
    assert [p.name for p in tmp_path.iterdir()] == ["results.json"]   # no temporary file left


def test_write_results_json_floats_round_trip_exactly(tmp_path):
    # Python's float repr is the shortest string that reads back to the same
    # double (Python docs, "Floating Point Arithmetic: Issues and Limitations").
    values = np.random.default_rng(7).standard_normal(500) * 10.0 ** np.arange(-250, 250)
    write_results_json(tmp_path / "r.json", {"x": values})
    back = json.loads((tmp_path / "r.json").read_text(encoding="utf-8"))["x"]
    assert back == values.tolist()


def test_write_results_json_is_byte_identical_and_keeps_key_order(tmp_path):
    results = {"schema": "s", "tests": [{"z": 1 / 3, "a": 2.5e-300}], "design": {"n_units": 10}}
    sha1 = write_results_json(tmp_path / "a.json", results)
    sha2 = write_results_json(tmp_path / "b.json", dict(results))
    assert sha1 == sha2
    assert (tmp_path / "a.json").read_bytes() == (tmp_path / "b.json").read_bytes()
    assert list(json.loads((tmp_path / "a.json").read_text())) == ["schema", "tests", "design"]
    assert list(json.loads((tmp_path / "a.json").read_text())["tests"][0]) == ["z", "a"]


def test_write_results_json_uses_to_dict_of_result_objects(tmp_path):
    class Result:
        def to_dict(self):
            return {"estimate": np.float64(1.5)}

    write_results_json(tmp_path / "r.json", {"estimates": [Result()]})
    assert json.loads((tmp_path / "r.json").read_text()) == {"estimates": [{"estimate": 1.5}]}


def test_write_results_json_rejects_what_json_cannot_hold(tmp_path):
    with pytest.raises(TypeError, match=r"cannot store a value of type PosixPath in JSON at \$\.design\.where"):
        write_results_json(tmp_path / "r.json", {"design": {"where": Path("/x")}})
    with pytest.raises(TypeError, match=r"JSON keys must be strings; got 1 at \$\.tests"):
        write_results_json(tmp_path / "r.json", {"tests": {1: 2}})
    with pytest.raises(TypeError, match="`results` must be a dict; got list"):
        write_results_json(tmp_path / "r.json", [1])
    assert not (tmp_path / "r.json").exists()


# ----------------------------------------------------------------- fake run folder

UNITS = "unit_id,assigned,score\n1,1,10\n2,0,8\n3,1,12\n"
DESIGN = "spec_version: 1\ntitle: Invented tutoring pilot\ndata:\n  units: data/units.csv\n  id: unit_id\n"


def _run_folder(tmp_path: Path, *, copies: bool = True) -> tuple[Path, RunRecord]:
    project = tmp_path / "tutoring-pilot"
    (project / "data").mkdir(parents=True)
    (project / "design.yaml").write_text(DESIGN)
    (project / "data" / "units.csv").write_text(UNITS)
    run = project / "runs" / "20261201T000000Z-abcd1234"
    (run / "tables").mkdir(parents=True)
    write_results_json(run / "results.json", {"schema": "report-kit/results/1", "estimates": []})
    (run / "tables" / "balance.csv").write_text("name,std_diff\nscore,0.1\n")
    (run / "report.html").write_text("<html></html>")
    if copies:
        (run / "inputs" / "data").mkdir(parents=True)
        shutil.copy(project / "design.yaml", run / "inputs" / "design.yaml")
        shutil.copy(project / "data" / "units.csv", run / "inputs" / "data" / "units.csv")
    record = RunRecord(
        project_dir=project, run_id=run.name, spec_sha256=_hash(project / "design.yaml"),
        inputs=(InputFile(path="data/units.csv", sha256=_hash(project / "data" / "units.csv"), rows=3),),
        id_column="unit_id", seeds={"design": 20261201, "analysis": 5150},
        argv=("report-kit", "run", "tutoring-pilot"), started="2026-12-01T00:00:00Z",
        ended="2026-12-01T00:00:09Z", renderer="builtin",
    )
    return run, record


def test_manifest_records_hashes_versions_and_run_facts(tmp_path):
    run, record = _run_folder(tmp_path)
    path = write_manifest(run, record)
    manifest = json.loads(path.read_text())
    assert path == run / "manifest.json"
    assert manifest["schema"] == "report-kit/manifest/1"
    assert manifest["run_id"] == run.name
    assert manifest["design"] == {"path": "design.yaml", "sha256": _hash(run.parent.parent / "design.yaml")}
    assert manifest["inputs"] == [{"path": "data/units.csv", "sha256": _hash(run / "inputs/data/units.csv"),
                                   "rows": 3}]
    assert manifest["id_column"] == "unit_id"
    assert manifest["seeds"] == {"design": 20261201, "analysis": 5150}
    assert manifest["command"] == ["report-kit", "run", "tutoring-pilot"]
    assert (manifest["started"], manifest["ended"]) == ("2026-12-01T00:00:00Z", "2026-12-01T00:00:09Z")
    assert manifest["results"] == {"path": "results.json", "sha256": _hash(run / "results.json")}
    expected_files = ["inputs/data/units.csv", "inputs/design.yaml", "report.html", "results.json",
                      "tables/balance.csv"]
    assert [o["path"] for o in manifest["outputs"]] == expected_files
    for entry in manifest["outputs"]:
        assert entry["sha256"] == _hash(run / entry["path"])
        assert entry["bytes"] == len((run / entry["path"]).read_bytes())
    assert manifest["software"]["numpy"] == np.__version__
    assert manifest["python"]["version"] == "{}.{}.{}".format(*platform.python_version_tuple())
    assert manifest["platform"]["machine"] == platform.machine()
    assert manifest["project"]["name"] == "tutoring-pilot"
    assert str(tmp_path) not in path.read_text()   # no absolute paths of this machine


def test_manifest_skips_itself_and_the_crate(tmp_path):
    run, record = _run_folder(tmp_path)
    write_ro_crate(run, record)
    write_manifest(run, record)
    write_manifest(run, record)   # a second write must not hash the first manifest
    paths = [o["path"] for o in json.loads((run / "manifest.json").read_text())["outputs"]]
    assert "manifest.json" not in paths and "ro-crate-metadata.json" not in paths


def test_manifest_validates_the_record(tmp_path):
    run, record = _run_folder(tmp_path)
    bad = RunRecord(**{**record.__dict__, "spec_sha256": "abc"})
    with pytest.raises(ValueError, match="`spec_sha256` must be 64 lower-case hex digits; got 'abc'"):
        write_manifest(run, bad)
    escaping = RunRecord(**{**record.__dict__, "inputs": (InputFile(path="../x.csv", sha256=EMPTY, rows=0),)})
    with pytest.raises(UsageError, match="input path must stay inside its folder; got '../x.csv'"):
        write_manifest(run, escaping)
    with pytest.raises(UsageError, match="not a folder"):
        write_manifest(tmp_path / "missing", record)


def test_software_versions_lists_python_and_libraries():
    versions = software_versions()
    assert versions["python"] == platform.python_version()
    assert versions["numpy"] == np.__version__
    assert versions["pandas"] == __import__("pandas").__version__
    assert "report-kit" in versions


# --------------------------------------------------------------------------- git

def test_git_commit_outside_a_repository_is_none(tmp_path):
    assert git_commit(tmp_path) is None


@pytest.mark.skipif(shutil.which("git") is None, reason="git is not installed")
def test_git_commit_reads_head_of_a_scratch_repository(tmp_path):
    repo = tmp_path / "scratch"
    repo.mkdir()
    env = {**os.environ, "GIT_CONFIG_GLOBAL": os.devnull, "GIT_CONFIG_SYSTEM": os.devnull,
           "GIT_AUTHOR_NAME": "Test", "GIT_AUTHOR_EMAIL": "test@example.invalid",
           "GIT_COMMITTER_NAME": "Test", "GIT_COMMITTER_EMAIL": "test@example.invalid"}
    (repo / "f.txt").write_text("x\n")
    for args in (["init", "-q", "-b", "main"], ["add", "f.txt"], ["commit", "-q", "-m", "first"]):
        subprocess.run(["git", "-C", str(repo), *args], check=True, env=env, capture_output=True)
    # Reference: the branch file git itself wrote, read without git.
    head = (repo / ".git" / "HEAD").read_text().strip()
    assert head == "ref: refs/heads/main"
    expected = (repo / ".git" / "refs" / "heads" / "main").read_text().strip()
    assert git_commit(repo) == expected
    assert git_commit(repo / "f.txt") == expected


# ---------------------------------------------------------------------- RO-Crate

def test_ro_crate_reads_back_with_the_rocrate_library(tmp_path):
    from rocrate.rocrate import ROCrate

    run, record = _run_folder(tmp_path)
    write_manifest(run, record)
    path = write_ro_crate(run, record)
    assert path == run / "ro-crate-metadata.json"
    crate = ROCrate(run)
    assert crate.root_dataset.type == "Dataset"
    assert crate.root_dataset["identifier"] == record.run_id
    assert crate.version == "1.1"
    raw = json.loads(path.read_text())
    assert raw["@context"] == "https://w3id.org/ro/crate/1.1/context"
    assert raw["@graph"][0]["conformsTo"] == {"@id": "https://w3id.org/ro/crate/1.1"}
    data_ids = sorted(e.id for e in crate.data_entities)
    assert data_ids == ["inputs/data/units.csv", "inputs/design.yaml", "manifest.json", "report.html",
                        "results.json", "tables/balance.csv"]
    for entity in crate.data_entities:
        assert entity.type == "File"
        assert entity["sha256"] == _hash(run / entity.id)
        assert entity["contentSize"] == str((run / entity.id).stat().st_size)
    actions = crate.get_by_type("CreateAction")
    assert len(actions) == 1
    action = actions[0]
    assert sorted(e.id for e in action["object"]) == ["inputs/data/units.csv", "inputs/design.yaml"]
    assert sorted(e.id for e in action["result"]) == ["manifest.json", "report.html", "results.json",
                                                      "tables/balance.csv"]
    assert action["instrument"]["name"] == "report-kit"
    assert (action["startTime"], action["endTime"]) == (record.started, record.ended)
    numpy_entity = next(e for e in action["instrument"]["softwareRequirements"] if e["name"] == "numpy")
    assert numpy_entity["version"] == np.__version__


def test_ro_crate_without_input_copies_names_inputs_as_contextual_entities(tmp_path):
    from rocrate.rocrate import ROCrate

    run, record = _run_folder(tmp_path, copies=False)
    write_ro_crate(run, record)
    crate = ROCrate(run)
    action = crate.get_by_type("CreateAction")[0]
    objects = {e.id: e for e in action["object"]}
    assert set(objects) == {"#input/design.yaml", "#input/data/units.csv"}
    assert objects["#input/data/units.csv"]["sha256"] == record.inputs[0].sha256
    assert objects["#input/data/units.csv"].type == "CreativeWork"
