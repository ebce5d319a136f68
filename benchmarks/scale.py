"""Benchmark of a whole `report-kit run` at scale (not a test; prints figures).

Generates invented complete-design projects in a temporary folder (never
committed), runs each through :func:`report_kit.pipeline.run_project` in this
process and prints, per step, the time and the peak resident memory, and the
ratio of the whole run to its randomization step (target: at most 2).

    .venv/bin/python benchmarks/scale.py                    # 20,000 units (make bench), a few minutes
    .venv/bin/python benchmarks/scale.py --units 1000000    # the 1M figures (3 outcomes)
    .venv/bin/python benchmarks/scale.py --units 10000000 --outcomes 1 --workers 2
    .venv/bin/python benchmarks/scale.py --units 1000000 --profile /tmp/scale.prof   # cProfile of the run

Steps are timed from the run's own log messages (``estimates``, ``randomization
tests``, ``balance, flow, attrition``, ``multiplicity and power``) and progress
messages (notebooks, rendering, provenance). Peak memory of each step is
``VmHWM`` of ``/proc/self/status`` after resetting it (``/proc/self/clear_refs``)
at the start of the step; the notebook kernel is a child process, whose peak
is ``ru_maxrss`` of ``RUSAGE_CHILDREN``.
"""

from __future__ import annotations

import argparse
import logging
import resource
import shutil
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from report_kit.pipeline import RunOptions, run_project  # noqa: E402

SPEC = """\
# Invented benchmark scenario: a reminder message randomized over {n} members of a made-up club.
spec_version: 1
title: "Benchmark: {n} units, complete randomization"
data:
  units: data/units.csv
  id: unit_id
design:
  mechanism: complete
  treatment: assigned
analysis:
  alpha: 0.05
  covariates: [age, baseline]
  adjust: true
  randomizations: {draws}
  seed: 5150
  multiplicity: holm
outcomes:
{outcomes}"""

OUTCOME = """\
  - column: y{j}
    label: "Outcome {j}"
    family: {family}
    statistic: mean_difference
"""


def make_project(folder: Path, n: int, m: int, draws: int, seed: int = 20261202) -> Path:
    """An invented complete-design project: n units, m outcomes (2% missing), two covariates."""
    rng = np.random.default_rng(seed)
    project = folder / f"bench-{n}"
    (project / "data").mkdir(parents=True)
    z = np.zeros(n, dtype=np.int8)
    z[rng.permutation(n)[: n // 2]] = 1
    columns = {
        "unit_id": np.arange(1, n + 1),
        "assigned": z,
        "age": rng.integers(18, 80, size=n),
        "baseline": np.round(rng.normal(50, 10, size=n), 2),
    }
    for j in range(1, m + 1):
        y = np.round(columns["baseline"] * 0.5 + rng.normal(0, 8, size=n) + 0.3 * z, 2)
        y[rng.random(n) < 0.02] = np.nan
        columns[f"y{j}"] = y
    _write_csv(project / "data" / "units.csv", columns)
    outcomes = "".join(OUTCOME.format(j=j, family="primary" if j == 1 else "secondary") for j in range(1, m + 1))
    (project / "design.yaml").write_text(SPEC.format(n=n, draws=draws, outcomes=outcomes))
    return project


def _write_csv(path: Path, columns: dict) -> None:
    import pandas as pd

    pd.DataFrame(columns).to_csv(path, index=False, na_rep="", float_format="%.2f")


def _peak_self() -> float:
    for line in Path("/proc/self/status").read_text().splitlines():
        if line.startswith("VmHWM:"):
            return int(line.split()[1]) / 1024**2
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024**2


def _reset_peak() -> None:
    try:
        Path("/proc/self/clear_refs").write_text("5")
    except OSError:
        pass


class Steps(logging.Handler):
    """Times the run's steps from its log and progress messages; peak memory per step."""

    def __init__(self) -> None:
        super().__init__(logging.INFO)
        self.rows: list[tuple[str, float, float]] = []
        self._name = "load and validate"
        self._start = time.perf_counter()
        _reset_peak()

    def emit(self, record: logging.LogRecord) -> None:
        if record.name.startswith("report_kit.analysis"):
            self.mark(record.getMessage())

    def mark(self, name: str) -> None:
        now = time.perf_counter()
        self.rows.append((self._name, now - self._start, _peak_self()))
        print(f"    done: {self._name} ({now - self._start:.1f} s)", flush=True)
        self._name, self._start = name, now
        _reset_peak()


def run_one(project: Path, workers: int | None, pdf: bool, profile: str | None) -> dict:
    steps = Steps()
    logger = logging.getLogger("report_kit")
    logger.addHandler(steps)
    logger.setLevel(logging.INFO)
    started = time.perf_counter()
    options = RunOptions(workers=workers, pdf=pdf)

    def progress(message: str) -> None:
        if not message.startswith(("design spec", "analysing")):
            steps.mark(message.split(" (")[0])

    try:
        if profile:
            import cProfile

            cProfile.runctx("run_project(project, options, progress=progress)", globals(),
                            {"run_project": run_project, "project": project, "options": options,
                             "progress": progress}, profile)
        else:
            run_project(project, options, progress=progress)
    finally:
        logger.removeHandler(steps)
    steps.mark("end")
    return {"rows": steps.rows, "total": time.perf_counter() - started,
            "kernel_peak": resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss / 1024**2}


def report(n: int, m: int, draws: int, figures: dict) -> None:
    rows, total = figures["rows"], figures["total"]
    print(f"\n{n:,} units x {m} outcome(s) x {draws:,} draws, complete design")
    print(f"  {'step':<34} {'seconds':>9} {'peak GB':>8}")
    for name, seconds, peak in rows:
        print(f"  {name.split(':')[0]:<34} {seconds:9.2f} {peak:8.2f}")
    # The pass over the draws: "randomization tests" (then balance and attrition after it,
    # before the one engine pass) or "randomization tests, balance and attrition: one pass".
    rand = sum(s for name, s, _ in rows if name.startswith("randomization tests"))
    peak = max(p for _, _, p in rows)
    print(f"  {'whole run':<34} {total:9.2f} {peak:8.2f}  (this process)")
    print(f"  notebook kernel peak (child process): {figures['kernel_peak']:.2f} GB")
    print(f"  ratio whole run / randomization step: {total / rand:.2f} (target <= 2)")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--units", type=int, nargs="+", default=[20_000])
    parser.add_argument("--outcomes", type=int, default=3)
    parser.add_argument("--draws", type=int, default=10_000)
    parser.add_argument("--workers", type=int, default=None)
    parser.add_argument("--no-pdf", action="store_true")
    parser.add_argument("--profile", help="write a cProfile of the (last) run to this file")
    parser.add_argument("--keep", action="store_true", help="keep the generated projects (prints where)")
    args = parser.parse_args()
    folder = Path(tempfile.mkdtemp(prefix="report-kit-scale-"))
    try:
        for n in args.units:
            start = time.perf_counter()
            project = make_project(folder, n, args.outcomes, args.draws)
            print(f"generated {project.name} in {time.perf_counter() - start:.1f} s "
                  f"({(project / 'data' / 'units.csv').stat().st_size / 1e6:.0f} MB of CSV)")
            figures = run_one(project, args.workers, not args.no_pdf, args.profile)
            report(n, args.outcomes, args.draws, figures)
    finally:
        if args.keep:
            print(f"projects kept in {folder}")
        else:
            shutil.rmtree(folder, ignore_errors=True)


if __name__ == "__main__":
    main()
