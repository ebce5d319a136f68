"""The catalogue of broken and hostile inputs: each gives its exit code and a clear message.

Every case is a small invented project changed in one way (see ``builder.py``).
The tool must answer with the documented exit code (1 invalid input, 2 usage),
one ``report-kit: error:`` line naming what and where, and never a traceback or
an "internal error". Cases cover the failures of issue 13 (resource exhaustion,
data read wrongly, archives, faults) and the ones already handled, so they stay
handled. A few valid-but-awkward inputs (ids ``NA``/``None``, declared missing
texts) must succeed.
"""

from __future__ import annotations

import errno
import io
import os
import zipfile
from pathlib import Path

import openpyxl
import pytest
from click.testing import CliRunner

from report_kit.cli import main
from tests.bad_inputs.builder import BASE_UNITS, DROP, Case, units_with

# --------------------------------------------------------------------------- file makers


def _xlsx(rows: list[list]) -> bytes:
    book = openpyxl.Workbook()
    for row in rows:
        book.active.append(row)
    out = io.BytesIO()
    book.save(out)
    return out.getvalue()


def _rows(text: str) -> list[list]:
    rows = [line.split(",") for line in text.strip().splitlines()]
    return [rows[0]] + [[r[0], int(r[1]), float(r[2]), float(r[3]), r[4]] for r in rows[1:]]


def _laughs(levels: int = 9) -> str:
    """A "billion laughs" YAML document: nine aliases of nine, under one kilobyte."""
    lines = ['a0: &a0 ["ha","ha","ha","ha","ha","ha","ha","ha","ha"]']
    lines += [f"a{i}: &a{i} [" + ",".join([f"*a{i - 1}"] * 9) + "]" for i in range(1, levels + 1)]
    return "\n".join(lines) + "\n"


def _symlink_outside(project: Path) -> None:
    outside = project.parent / "elsewhere.csv"
    outside.write_text(BASE_UNITS)
    (project / "data" / "units.csv").unlink()
    (project / "data" / "units.csv").symlink_to(outside)


def _runs_is_a_file(project: Path) -> None:
    (project / "runs").write_text("not a folder")


def _zip(path: Path, members: dict[str, bytes]) -> None:
    with zipfile.ZipFile(path, "w", zipfile.ZIP_DEFLATED) as zf:
        for name, data in members.items():
            zf.writestr(name, data)


GOOD_MEMBERS = {"p/runs/r/results.json": b"{}", "p/runs/r/manifest.json": b"{}"}

SPEC_TEXT = "spec_version: 1\ntitle: t\ndata: {units: data/units.csv, id: school}\n" \
            "design: {mechanism: complete, treatment: corner}\noutcomes: [{column: minutes}]\n"

CASES = [
    # ---- the design spec: shape and size (resource exhaustion) -------------------------------
    Case(name="spec-empty", code=1, words=("design spec is empty",), spec_text=""),
    Case(name="spec-top-level-list", code=1, words=("expected a mapping",), spec_text="- a\n- b\n"),
    Case(name="spec-tab-indent", code=1, words=("not valid YAML", "tabs"),
         spec_text="spec_version: 1\ndata:\n\tunits: x\n"),
    Case(name="spec-key-twice", code=1, words=("appears twice",), spec_text=SPEC_TEXT + "title: again\n"),
    Case(name="spec-billion-laughs", code=1, words=("expands to more than", "aliases"), spec_text=_laughs()),
    Case(name="spec-deep-nesting", code=1, words=("nests deeper than",),
         spec_text="a: " + "[" * 3000 + "]" * 3000 + "\n"),
    Case(name="spec-deep-mapping", code=1, words=("nests deeper than",),
         spec_text="".join(f"{'  ' * i}k{i}:\n" for i in range(60)) + "  " * 60 + "v: 1\n"),
    Case(name="spec-oversize", code=1, words=("the limit is", "bytes"),
         spec_text=SPEC_TEXT + "# " + "x" * (1 << 20) + "\n"),
    Case(name="spec-not-utf8", code=1, words=("is not UTF-8",), spec_text=b"title: caf\xe9\n"),
    Case(name="spec-python-tag", code=1, words=("not valid YAML",),
         spec_text="!!python/object/apply:os.system ['echo hacked']\n"),
    Case(name="spec-missing-title", code=1, words=("missing required key 'title'",), spec={"title": DROP}),
    Case(name="spec-unknown-key", code=1, words=("unknown key 'outcome'", "did you mean 'outcomes'"),
         spec={"outcome": "x"}),
    Case(name="spec-version-2", code=1, words=("spec_version", "expected 1"), spec={"spec_version": 2}),
    Case(name="spec-mechanism-typo", code=1, words=("design.mechanism", "did you mean 'blocked'"),
         spec={"design.mechanism": "blocekd"}),
    Case(name="spec-draws-unbounded", code=1, words=("analysis.randomizations", "<= 10000000"),
         spec={"analysis.randomizations": 10 ** 12}),
    Case(name="spec-draws-too-few", code=1, words=("analysis.randomizations", ">= 100"),
         spec={"analysis.randomizations": 5}),
    Case(name="spec-max-exact-unbounded", code=1, words=("analysis.max_exact", "<= 10000000"),
         spec={"analysis.max_exact": 10 ** 15}),
    Case(name="spec-seed-too-large", code=1, words=("analysis.seed", "<= 9223372036854775807"),
         spec={"analysis.seed": 2 ** 70}),
    Case(name="spec-seed-negative", code=1, words=("analysis.seed", ">= 0"), spec={"analysis.seed": -1}),
    Case(name="spec-alpha-nan", code=1, words=("analysis.alpha", "finite number"),
         spec_text=SPEC_TEXT + "analysis: {alpha: .nan}\n"),
    Case(name="spec-alpha-too-large", code=1, words=("analysis.alpha", "< 0.5"), spec={"analysis.alpha": 0.7}),
    Case(name="spec-too-many-outcomes", code=1, words=("outcomes: found 201 items", "at most 200"),
         spec={"outcomes": [{"column": f"y{i}"} for i in range(201)]}),
    Case(name="spec-title-too-long", code=1, words=("title: found text of 501 characters",),
         spec={"title": "t" * 501}),
    Case(name="spec-blocked-without-block", code=1, words=("design.block: missing",),
         spec={"design.mechanism": "blocked"}),
    Case(name="spec-treatment-is-id", code=1, words=("design.treatment", "also data.id"),
         spec={"design.treatment": "school"}),
    Case(name="spec-outcome-twice", code=1, words=("already outcomes[0]",),
         spec={"outcomes": [{"column": "minutes"}, {"column": "minutes"}]}),
    Case(name="spec-range-reversed", code=1, words=("min < max",),
         spec={"outcomes": [{"column": "minutes", "range": [5, 1]}]}),
    Case(name="spec-missing-values-not-text", code=1, words=("data.missing_values[0]", "expected text"),
         spec={"data.missing_values": [1]}),
    Case(name="spec-is-a-folder", code=1, words=("is a folder, not a file",), spec_text="",
         prepare=lambda p: ((p / "design.yaml").unlink(), (p / "design.yaml").mkdir())),
    Case(name="project-missing", code=1, words=("no such project folder",), command=("check", "{project}/nowhere")),
    # ---- paths and files ---------------------------------------------------------------------
    Case(name="path-traversal", code=1, words=("points outside the project folder",),
         spec={"data.units": "../../../etc/passwd"}),
    Case(name="path-symlink-outside", code=1, words=("points outside the project folder",),
         prepare=_symlink_outside),
    Case(name="file-unsupported-type", code=1, words=("unsupported file type '.txt'",),
         spec={"data.units": "data/units.txt"}, files={"data/units.txt": BASE_UNITS}),
    Case(name="file-missing", code=1, words=("file not found", "data.units"), spec={"data.units": "data/nope.csv"}),
    Case(name="file-is-folder", code=1, words=("is a folder, not a file",),
         spec={"data.units": "data/dir.csv"}, files={"data/dir.csv": None}),
    Case(name="csv-empty", code=1, words=("the file is empty",), units=""),
    Case(name="csv-header-only", code=1, words=("no data rows",), units="school,corner,books_before,minutes\n"),
    Case(name="csv-utf16", code=1, words=("UTF-16",), units=BASE_UNITS.encode("utf-16")),
    Case(name="csv-latin1", code=1, words=("is not UTF-8", "line 2"),
         units=BASE_UNITS.replace("north", "nörth").encode("latin-1")),
    Case(name="csv-nul-byte", code=1, words=("binary data", "NUL"), units=BASE_UNITS.encode() + b"\x00\x00"),
    Case(name="csv-is-xlsx", code=1, words=("looks like an Excel workbook",), units=_xlsx([["a"], [1]])),
    Case(name="csv-ragged", code=1, words=("line 3 has 6", "one value per column"),
         units=units_with(("S2,0,15,180,north", "S2,0,15,180,north,extra"))),
    Case(name="csv-semicolons", code=1, words=("separated by ';'",), units=BASE_UNITS.replace(",", ";")),
    Case(name="csv-duplicate-header", code=1, words=("duplicate column name", "minutes"),
         units=BASE_UNITS.replace("district", "minutes")),
    Case(name="parquet-is-text", code=1, words=("is not a Parquet file", "rename it to .csv"),
         spec={"data.units": "data/units.parquet"}, files={"data/units.parquet": BASE_UNITS}),
    Case(name="xlsx-is-old-excel", code=1, words=("old Excel 97-2003",),
         spec={"data.units": "data/units.xlsx"}, files={"data/units.xlsx": b"\xd0\xcf\x11\xe0" + b"\0" * 600}),
    # ---- ids and values: read as written ------------------------------------------------------
    Case(name="id-column-missing", code=1, words=("id column 'school' (data.id) not found",),
         units=BASE_UNITS.replace("school", "schoool")),
    Case(name="id-duplicated", code=1, words=("duplicated ids", "line 2", "line 3"),
         units=units_with(("S2,", "S1,"))),
    Case(name="id-blank", code=1, words=("missing id at line 3",), units=units_with(("S2,", ","))),
    Case(name="id-NA-and-None-are-labels", code=0, words=("ok:", "8 units"),
         units=units_with(("S1,", "NA,"), ("S2,", "None,"))),
    Case(name="treatment-not-binary", code=1, words=("must be exactly 0 or 1", "found 2 at line 3 (id 'S2')"),
         units=units_with(("S2,0,", "S2,2,"))),
    Case(name="treatment-one-arm", code=1, words=("both arms (0 and 1) must be present",),
         units=BASE_UNITS.replace(",1,", ",0,")),
    Case(name="outcome-text-NaN", code=1, words=("column 'minutes'", "must be numeric", "'NaN' at line 4"),
         units=units_with(("S3,1,9,240", "S3,1,9,NaN"))),
    Case(name="outcome-text-#N/A", code=1, words=("'#N/A' at line 4", "data.missing_values"),
         units=units_with(("S3,1,9,240", "S3,1,9,#N/A"))),
    Case(name="outcome-NA-declared-missing", code=0, words=("ok:",), spec={"data.missing_values": ["NA"]},
         units=units_with(("S3,1,9,240", "S3,1,9,NA"))),
    Case(name="outcome-infinite", code=1, words=("finite numbers", "found inf at line 4"),
         units=units_with(("S3,1,9,240", "S3,1,9,inf"))),
    Case(name="outcome-out-of-range", code=1, words=("outside its declared range", "minutes = 900"),
         units=units_with(("S3,1,9,240", "S3,1,9,900"))),
    Case(name="covariate-missing-with-adjustment", code=1, words=("books_before", "covariate-adjusted"),
         units=units_with(("S3,1,9,", "S3,1,,"))),
    Case(name="column-named-by-spec-missing", code=1, words=("column 'minute' (named by outcomes[0].column",
                                                            "did you mean 'minutes'"),
         spec={"outcomes": [{"column": "minute"}]}),
    Case(name="all-problems-in-one-pass", code=1,
         words=("the data has 3 problems", "'quiet'", "'NaN'", "'#N/A'"),
         units=units_with(("S2,0,", "S2,quiet,"), ("S3,1,9,240", "S3,1,9,NaN"), ("S4,0,11,", "S4,0,#N/A,"))),
    Case(name="xlsx-formula-without-value", code=1, words=("formula cell(s)", "no stored value", "D2"),
         spec={"data.units": "data/units.xlsx"},
         files={"data/units.xlsx": _xlsx([r if i != 1 else [*r[:3], "=B2*100", r[4]]
                                          for i, r in enumerate(_rows(BASE_UNITS))])}),
    Case(name="xlsx-error-cell", code=1, words=("spreadsheet error value", "D3 (#N/A)"),
         spec={"data.units": "data/units.xlsx"},
         files={"data/units.xlsx": _xlsx([r if i != 2 else [*r[:3], "#N/A", r[4]]
                                          for i, r in enumerate(_rows(BASE_UNITS))])}),
    Case(name="xlsx-valid", code=0, words=("ok:", "8 units"), spec={"data.units": "data/units.xlsx"},
         files={"data/units.xlsx": _xlsx(_rows(BASE_UNITS))}),
    # ---- design against data ------------------------------------------------------------------
    Case(name="cluster-split-across-arms", code=1, words=("clusters split across arms", "north"),
         spec={"design.mechanism": "cluster", "design.cluster": "district"}),
    Case(name="block-with-one-arm", code=1, words=("one arm only", "all treated"),
         spec={"design.mechanism": "blocked", "design.block": "district"},
         units=units_with(("S6,0,", "S6,1,"), ("S8,0,", "S8,1,"))),
    Case(name="pairs-of-three", code=1, words=("matched pairs need exactly two units",),
         spec={"design.mechanism": "matched_pairs", "design.block": "district"}),
    Case(name="merge-extra-ids", code=1, words=("ids not present in",),
         spec={"data.merge": ["data/extra.csv"]}, files={"data/extra.csv": "school,age\nS1,9\nS99,10\n"}),
    Case(name="merge-column-clash", code=1, words=("column 'minutes' also exists in",),
         spec={"data.merge": ["data/extra.csv"]}, files={"data/extra.csv": "school,minutes\nS1,9\n"}),
    Case(name="merge-is-units", code=1, words=("is data.units",), spec={"data.merge": ["data/units.csv"]}),
    # ---- commands and the run folder -----------------------------------------------------------
    Case(name="runs-is-a-file", code=1, words=("exists but is a file, not a folder",),
         command=("run", "{project}", "--no-pdf"), prepare=_runs_is_a_file),
    Case(name="compare-to-not-a-run", code=2, words=("--compare-to needs a run folder",),
         command=("run", "{project}", "--compare-to", "{project}/data")),
    Case(name="power-without-sd", code=2, words=("--sd is required",), command=("power", "{project}")),
    Case(name="verify-plain-file", code=2, words=("not a run folder or a .zip archive",),
         command=("verify", "{project}/data/units.csv")),
    Case(name="verify-zip-traversal", code=1, words=("leaves the extraction folder",),
         command=("verify", "{project}/bad.zip"),
         prepare=lambda p: _zip(p / "bad.zip", {**GOOD_MEMBERS, "p/../evil.txt": b"x"})),
    Case(name="verify-zip-bomb", code=1, words=("zip bomb",), command=("verify", "{project}/bomb.zip"),
         prepare=lambda p: _zip(p / "bomb.zip", {**GOOD_MEMBERS, "p/zeros.bin": b"\0" * (40 << 20)})),
    Case(name="verify-zip-two-tops", code=1, words=("expected one top folder",),
         command=("verify", "{project}/two.zip"),
         prepare=lambda p: _zip(p / "two.zip", {**GOOD_MEMBERS, "q/x.txt": b"x"})),
    Case(name="verify-not-a-zip", code=2, words=("not a run folder or a .zip archive",),
         command=("verify", "{project}/fake.zip"), files={"fake.zip": "plain text"}),
    Case(name="archive-not-a-run", code=2, words=("not a run folder",), command=("archive", "{project}/data")),
]


def _output(result) -> str:
    return result.output  # click >= 8.2: stdout and stderr together


@pytest.mark.parametrize("case", CASES, ids=[c.name for c in CASES])
def test_catalogue(case: Case, tmp_path):
    project = case.build(tmp_path)
    data_before = {p: p.read_bytes() for p in (project / "data").rglob("*") if p.is_file() and not p.is_symlink()}
    result = CliRunner().invoke(main, case.argv(project))
    text = _output(result)
    assert result.exit_code == case.code, text
    assert "Traceback" not in text and "internal error" not in text, text
    if case.code:
        assert "report-kit: error:" in text, text
    for word in case.words:
        assert word in text, f"{word!r} not in:\n{text}"
    assert data_before == {p: p.read_bytes() for p in data_before}, "data/ was written"
    assert not list(project.glob("runs/.partial-*")), "a partial run folder was left behind"


def test_the_catalogue_is_large_and_names_are_unique():
    assert len(CASES) >= 60
    assert len({c.name for c in CASES}) == len(CASES)


# --------------------------------------------------------------------------- faults while writing a run


@pytest.mark.parametrize("code, words", [
    (errno.ENOSPC, "the disk is full"),
    (errno.EACCES, "permission denied"),
    (errno.EROFS, "read-only file system"),
])
def test_os_errors_while_writing_a_run_are_sentences(tmp_path, monkeypatch, code, words):
    """A full disk or a read-only folder (simulated: the tests may run as root) names the path and what to do."""
    import report_kit.pipeline as pipeline

    def fail(run_dir, result):
        raise OSError(code, os.strerror(code), str(run_dir / "results.json"))

    monkeypatch.setattr(pipeline, "write_analysis", fail)
    project = CASES[0].__class__(name="ok", code=0, words=()).build(tmp_path)
    result = CliRunner().invoke(main, ["run", str(project), "--no-pdf"])
    text = _output(result)
    assert result.exit_code == 1, text
    assert words in text and "results.json" in text and "internal error" not in text, text
    assert [p.name for p in (project / "runs").iterdir()] == []


@pytest.mark.skipif(os.geteuid() == 0, reason="root writes into read-only folders")
def test_read_only_project_folder(tmp_path):
    project = Case(name="ok", code=0, words=()).build(tmp_path)
    project.chmod(0o555)
    try:
        result = CliRunner().invoke(main, ["run", str(project), "--no-pdf"])
    finally:
        project.chmod(0o755)
    assert result.exit_code == 1 and "permission denied" in _output(result), _output(result)
