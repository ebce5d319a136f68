"""Benchmark: ``report-kit run`` of a small project against the floor of its tool chain.

Run from the repository root (``make bench`` runs it):

    .venv/bin/python benchmarks/floor.py             # best of 3 alternating repeats
    .venv/bin/python benchmarks/floor.py --repeats 1 # a smoke run

The floor is what any report made this way costs, measured in the same run on
the same machine: a fresh Python process that starts a kernel and executes a
one-cell notebook with papermill, converts it to HTML with nbconvert, and
prints the report.html of the measured run to PDF with weasyprint. The run is
``report-kit run projects/quiet-hours`` (12 units, exact tests) in a fresh
process on a copy of the project. Both are timed from process start to exit;
each figure is the best of alternating repeats; the target is a ratio within 2.
"""

from __future__ import annotations

import argparse
import os
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
PROJECT = ROOT / "projects" / "quiet-hours"
TARGET = 2.0

FLOOR_SCRIPT = r"""
import sys
from pathlib import Path

import nbformat
import papermill
import weasyprint
from nbconvert import HTMLExporter

work, report_html = Path(sys.argv[1]), Path(sys.argv[2])
nb = nbformat.v4.new_notebook(metadata={"kernelspec": {"name": "python3", "display_name": "Python 3",
                                                       "language": "python"}})
nb.cells.append(nbformat.v4.new_code_cell("print(1)"))
nbformat.write(nb, work / "one.ipynb")
papermill.execute_notebook(str(work / "one.ipynb"), str(work / "one.out.ipynb"), kernel_name="python3",
                           progress_bar=False, log_output=False)
body, _ = HTMLExporter(template_name="basic").from_notebook_node(nbformat.read(work / "one.out.ipynb", 4))
(work / "one.html").write_text(body, encoding="utf-8")
weasyprint.HTML(filename=str(report_html)).write_pdf(str(work / "floor.pdf"))
"""


def _env() -> dict:
    env = dict(os.environ)
    env["PYTHONPATH"] = os.pathsep.join([str(ROOT), *filter(None, [env.get("PYTHONPATH")])])
    return env


def _timed(args: list[str], cwd: Path) -> float:
    start = time.perf_counter()
    done = subprocess.run(args, cwd=cwd, env=_env(), capture_output=True, text=True, check=False)
    elapsed = time.perf_counter() - start
    if done.returncode != 0:
        sys.exit(f"benchmark step failed: {' '.join(args[:4])}\n{done.stderr[-3000:]}")
    return elapsed


def time_run(work: Path, k: int) -> tuple[float, Path]:
    project = shutil.copytree(PROJECT, work / f"run{k}", ignore=shutil.ignore_patterns("runs"))
    cli = [sys.executable, "-c", "from report_kit.cli import main; main()", "run", str(project)]
    elapsed = _timed(cli, work)
    (run_dir,) = (project / "runs").iterdir()
    return elapsed, run_dir / "report.html"


def time_floor(work: Path, report_html: Path, k: int) -> float:
    folder = work / f"floor{k}"
    folder.mkdir()
    script = folder / "floor.py"
    script.write_text(FLOOR_SCRIPT, encoding="utf-8")
    return _timed([sys.executable, str(script), str(folder), str(report_html)], folder)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--repeats", type=int, default=3)
    args = parser.parse_args()
    runs, floors = [], []
    with tempfile.TemporaryDirectory(prefix="report-kit-floor-") as tmp:
        work = Path(tmp)
        for k in range(args.repeats):
            elapsed, report_html = time_run(work, k)
            runs.append(elapsed)
            floors.append(time_floor(work, report_html, k))
    run, floor = min(runs), min(floors)
    print(f"floor (kernel + one-cell papermill + nbconvert HTML + weasyprint PDF): {floor:6.2f} s "
          f"(best of {len(floors)}: {', '.join(f'{t:.2f}' for t in floors)})")
    print(f"report-kit run projects/quiet-hours:                                  {run:6.2f} s "
          f"(best of {len(runs)}: {', '.join(f'{t:.2f}' for t in runs)})")
    print(f"ratio run / floor: {run / floor:.2f} (target <= {TARGET:.1f}: {'met' if run / floor <= TARGET else 'NOT met'})")


if __name__ == "__main__":
    main()
