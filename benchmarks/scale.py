"""Benchmark of a whole `report-kit run` at scale (not a test; prints figures).

Generates invented complete-design projects in a temporary folder (never
committed), runs each through :func:`report_kit.pipeline.run_project` in this
process and prints, per step, the time and the peak resident memory, and the
ratio of the whole run to its randomization step (target: at most 2).

    .venv/bin/python benchmarks/scale.py                    # 20,000 units (make bench), a few minutes
    .venv/bin/python benchmarks/scale.py --units 1000000    # the 1M figures (3 outcomes)
    .venv/bin/python benchmarks/scale.py --units 10000000 --outcomes 1 --workers 2
    .venv/bin/python benchmarks/scale.py --units 1000000 --profile /tmp/scale.prof   # cProfile of the run
    .venv/bin/python benchmarks/scale.py --units 1000000 --arms 3 --outcomes 1 --workers 2   # a three-arm trial

Steps are timed from the run's own log messages (``estimates``, ``randomization
tests``, ``balance, flow, attrition``, ``multiplicity and power``) and progress
messages (notebooks, rendering, provenance). Peak memory of each step is
``VmHWM`` of ``/proc/self/status`` after resetting it (``/proc/self/clear_refs``)
at the start of the step. Child processes (the notebook kernel, Dask workers)
are watched by a thread that reads their ``VmHWM`` twice a second; their peaks
are printed per process. (``ru_maxrss`` of ``RUSAGE_CHILDREN`` is not used: on
Linux it counts the parent's memory at the time of the fork.) The project is
generated in a child process, so that its arrays do not count in the run's.
"""

from __future__ import annotations

import argparse
import logging
import multiprocessing
import os
import resource
import shutil
import sys
import tempfile
import threading
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from report_kit.pipeline import RunOptions, run_project  # noqa: E402

SPEC = """\
# Invented benchmark scenario: a reminder message randomized over {n} members of a made-up club.
spec_version: 1
title: "Benchmark: {n} units, complete randomization{arms_title}"
data:
  units: data/units.csv
  id: unit_id
design:
  mechanism: complete
  treatment: assigned
{arms_line}analysis:
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


def make_project(folder: Path, n: int, m: int, draws: int, seed: int = 20261202, arms: int = 2) -> Path:
    """An invented complete-design project: n units, m outcomes (2% missing), two covariates.

    ``arms`` > 2: the treatment column holds the labels ``arm0`` (the reference) to
    ``arm{arms-1}`` in equal numbers, declared in ``design.arms``.
    """
    rng = np.random.default_rng(seed)
    project = folder / f"bench-{n}"
    (project / "data").mkdir(parents=True)
    if arms > 2:
        z = rng.permutation(np.arange(n) % arms).astype(np.int8)
        assigned = np.array([f"arm{k}" for k in range(arms)], dtype=object)[z]
    else:
        z = np.zeros(n, dtype=np.int8)
        z[rng.permutation(n)[: n // 2]] = 1
        assigned = z
    columns = {
        "unit_id": np.arange(1, n + 1),
        "assigned": assigned,
        "age": rng.integers(18, 80, size=n),
        "baseline": np.round(rng.normal(50, 10, size=n), 2),
    }
    for j in range(1, m + 1):
        y = np.round(columns["baseline"] * 0.5 + rng.normal(0, 8, size=n) + 0.3 * z, 2)
        y[rng.random(n) < 0.02] = np.nan
        columns[f"y{j}"] = y
    _write_csv(project / "data" / "units.csv", columns)
    outcomes = "".join(OUTCOME.format(j=j, family="primary" if j == 1 else "secondary") for j in range(1, m + 1))
    arms_line = "" if arms <= 2 else "  arms: [" + ", ".join(f"arm{k}" for k in range(arms)) + "]\n"
    (project / "design.yaml").write_text(SPEC.format(n=n, draws=draws, outcomes=outcomes, arms_line=arms_line,
                                                     arms_title="" if arms <= 2 else f", {arms} arms"))
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


def _status_kb(pid: int | str, key: str) -> int | None:
    try:
        for line in Path(f"/proc/{pid}/status").read_text().splitlines():
            if line.startswith(key):
                return int(line.split()[1])
    except OSError:
        pass
    return None


def _descendants(root: int) -> list[int]:
    parents = {}
    for entry in Path("/proc").iterdir():
        if entry.name.isdigit():
            try:
                fields = (entry / "stat").read_text().rsplit(")", 1)[1].split()
            except OSError:
                continue
            parents[int(entry.name)] = int(fields[1])
    found, frontier = [], [root]
    while frontier:
        parent = frontier.pop()
        children = [pid for pid, ppid in parents.items() if ppid == parent]
        found += children
        frontier += children
    return found


def _role(pid: int) -> str:
    try:
        argv = Path(f"/proc/{pid}/cmdline").read_bytes().replace(b"\0", b" ").decode(errors="replace")
    except OSError:
        return "?"
    if argv == Path("/proc/self/cmdline").read_bytes().replace(b"\0", b" ").decode(errors="replace"):
        return "fork of this process, sharing its pages"
    if "ipykernel" in argv:
        return "notebook kernel"
    if "multiprocessing" in argv:
        return "Dask worker" if "spawn_main" in argv else "helper (multiprocessing)"
    return argv[:60]


class ChildPeaks(threading.Thread):
    """Peak resident memory (``VmHWM``) of every descendant process, sampled twice a second."""

    def __init__(self) -> None:
        super().__init__(daemon=True)
        self.peaks: dict[int, tuple[str, float]] = {}
        self._halt = threading.Event()

    def run(self) -> None:
        while not self._halt.is_set():
            self.sample()
            self._halt.wait(0.5)

    def sample(self) -> None:
        for pid in _descendants(os.getpid()):
            kb = _status_kb(pid, "VmHWM:")
            if kb is None:
                continue
            role = self.peaks.get(pid, (None, 0.0))[0] or _role(pid)
            self.peaks[pid] = (role, max(kb / 1024**2, self.peaks.get(pid, (role, 0.0))[1]))

    def stop(self) -> dict[int, tuple[str, float]]:
        self._halt.set()
        self.join()
        return self.peaks


class Steps(logging.Handler):
    """Times the run's steps from its log and progress messages; peak memory per step."""

    def __init__(self) -> None:
        super().__init__(logging.INFO)
        self.rows: list[tuple[str, float, float]] = []
        self._name = "load and validate"
        self._start = time.perf_counter()
        self.baseline = (_status_kb("self", "VmRSS:") or 0) / 1024**2  # the libraries, before the run
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

    children = ChildPeaks()
    children.start()
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
        peaks = children.stop()
    steps.mark("end")
    return {"rows": steps.rows, "total": time.perf_counter() - started, "children": peaks,
            "baseline": steps.baseline}


def report(n: int, m: int, draws: int, figures: dict, arms: int = 2) -> None:
    rows, total = figures["rows"], figures["total"]
    print(f"\n{n:,} units x {m} outcome(s) x {draws:,} draws, complete design, {arms} arms")
    print(f"  {'step':<34} {'seconds':>9} {'peak GB':>8}")
    for name, seconds, peak in rows:
        print(f"  {name.split(':')[0]:<34} {seconds:9.2f} {peak:8.2f}")
    # The pass over the draws: "randomization tests" (then balance and attrition after it,
    # before the one engine pass) or "randomization tests, balance and attrition: one pass".
    rand = sum(s for name, s, _ in rows if name.startswith("randomization tests"))
    peak = max(p for _, _, p in rows)
    print(f"  {'whole run':<34} {total:9.2f} {peak:8.2f}  (this process)")
    print(f"  resident memory before the run (libraries): {figures['baseline']:.2f} GB; "
          f"peak above it: {(peak - figures['baseline']) / (n / 1e6):.3f} GB per million units")
    for pid, (role, peak) in sorted(figures["children"].items()):
        if peak > 0.05:
            print(f"  peak of child process {pid} ({role}): {peak:.2f} GB")
    print(f"  ratio whole run / randomization step: {total / rand:.2f} (target <= 2)")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--units", type=int, nargs="+", default=[20_000])
    parser.add_argument("--outcomes", type=int, default=3)
    parser.add_argument("--draws", type=int, default=10_000)
    parser.add_argument("--workers", type=int, default=None)
    parser.add_argument("--arms", type=int, default=2, help="arms of the generated trial (3 or more: multi-arm)")
    parser.add_argument("--no-pdf", action="store_true")
    parser.add_argument("--profile", help="write a cProfile of the (last) run to this file")
    parser.add_argument("--keep", action="store_true", help="keep the generated projects (prints where)")
    args = parser.parse_args()
    folder = Path(tempfile.mkdtemp(prefix="report-kit-scale-"))
    try:
        for n in args.units:
            start = time.perf_counter()
            with multiprocessing.get_context("spawn").Pool(1) as pool:
                project = pool.apply(make_project, (folder, n, args.outcomes, args.draws, 20261202, args.arms))
            print(f"generated {project.name} in {time.perf_counter() - start:.1f} s "
                  f"({(project / 'data' / 'units.csv').stat().st_size / 1e6:.0f} MB of CSV)")
            figures = run_one(project, args.workers, not args.no_pdf, args.profile)
            report(n, args.outcomes, args.draws, figures, args.arms)
    finally:
        if args.keep:
            print(f"projects kept in {folder}")
        else:
            shutil.rmtree(folder, ignore_errors=True)


if __name__ == "__main__":
    main()
