"""Benchmark of the randomization-inference engine (not a test; prints figures).

Run from the repository root:

    .venv/bin/python benchmarks/randomization.py            # everything
    .venv/bin/python benchmarks/randomization.py --quick    # smaller sizes, for a smoke run

Three measurements, each against a reference taken in the same run:

1. Speed: complete randomization, 10,000 units, 10 outcomes, 10,000 Monte Carlo
   draws, one-sided difference in means. report-kit (one call, all outcomes on
   shared draws) against two references: ``scipy.stats.permutation_test(vectorized=True)``
   run once per outcome, and a plain numpy loop (one ``rng.permutation`` of the
   assignment per draw, the difference in means of all outcomes by boolean
   indexing, as one would write it by hand). Prints the times, both ratios, and
   the largest p-value difference in standard errors of the difference.
2. Memory: 1,000,000 units, 1 outcome, 10,000 draws, measured as the peak
   resident set size (``VmHWM`` of ``/proc/self/status``; ``resource.getrusage``
   elsewhere) of a fresh subprocess, next to the peak of a subprocess that only
   imports the libraries and builds the data.
3. Exact enumeration rate: all C(20, 10) = 184,756 assignments, assignments per second
   (enumeration alone, and enumeration plus a 10-outcome difference-in-means test).
"""

from __future__ import annotations

import argparse
import json
import math
import os
import platform
import subprocess
import sys
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from report_kit.design.mechanism import mechanism_from_arrays  # noqa: E402
from report_kit.inference.randomization import randomization_test  # noqa: E402


def complete_data(n: int, m: int, seed: int = 1):
    rng = np.random.default_rng(seed)
    z = np.zeros(n, dtype=np.uint8)
    z[rng.permutation(n)[: n // 2]] = 1
    effects = np.linspace(0.0, 0.05, m)
    y = rng.normal(size=(n, m)) + np.outer(z, effects)
    return z, y


def speed(n: int, m: int, draws: int) -> dict:
    from scipy import stats

    z, y = complete_data(n, m)
    start = time.perf_counter()
    mech = mechanism_from_arrays("complete", z)
    source = mech.assignments(max_exact=0, draws=draws, seed=5150)
    ours = randomization_test(y, mech, source=source, alternative="greater")
    t_ours = time.perf_counter() - start

    def diff(a, b, axis):
        return a.mean(axis=axis) - b.mean(axis=axis)

    start = time.perf_counter()
    ref = [stats.permutation_test((y[z == 1, j], y[z == 0, j]), diff, vectorized=True, n_resamples=draws,
                                  alternative="greater", permutation_type="independent", random_state=j)
           for j in range(m)]
    t_ref = time.perf_counter() - start
    start = time.perf_counter()
    loop_p = numpy_loop(y, z, draws)
    t_loop = time.perf_counter() - start
    gaps = []
    for mine, theirs in zip(ours, ref):
        se = math.hypot(mine.mc_std_error, math.sqrt(theirs.pvalue * (1 - theirs.pvalue) / draws))
        gaps.append(abs(mine.p_value - theirs.pvalue) / se if se > 0 else 0.0)
    for mine, theirs in zip(ours, loop_p):
        se = math.hypot(mine.mc_std_error, math.sqrt(theirs * (1 - theirs) / draws))
        gaps.append(abs(mine.p_value - theirs) / se if se > 0 else 0.0)
    return {"units": n, "outcomes": m, "draws": draws, "report_kit_s": t_ours, "scipy_s": t_ref,
            "ratio": t_ref / t_ours, "loop_s": t_loop, "loop_ratio": t_loop / t_ours, "max_p_gap_in_se": max(gaps),
            "p_values": [[r.p_value, float(s.pvalue)] for r, s in zip(ours, ref)]}


def numpy_loop(y: np.ndarray, z: np.ndarray, draws: int, seed: int = 7) -> np.ndarray:
    """One-sided Monte Carlo p-values of the difference in means, one draw at a time (the plain reference)."""
    rng = np.random.default_rng(seed)
    treated = z == 1
    observed = y[treated].mean(axis=0) - y[~treated].mean(axis=0)
    hits = np.zeros(y.shape[1])
    for _ in range(draws):
        t = rng.permutation(treated)
        hits += (y[t].mean(axis=0) - y[~t].mean(axis=0)) >= observed
    return (1 + hits) / (1 + draws)


_CHILD = r"""
import resource, sys, time, json
sys.path.insert(0, {root!r})
import numpy as np
from report_kit.design.mechanism import mechanism_from_arrays
from report_kit.inference.randomization import randomization_test
n, draws, run = {n}, {draws}, {run}
rng = np.random.default_rng(2)
z = np.zeros(n, dtype=np.uint8); z[rng.permutation(n)[: n // 2]] = 1
y = rng.normal(size=n)
start = time.perf_counter()
if run:
    mech = mechanism_from_arrays("complete", z)
    res = randomization_test(y, mech, source=mech.assignments(max_exact=0, draws=draws, seed=1))[0]
    p = res.p_value
else:
    p = None
elapsed = time.perf_counter() - start
peak = None
try:  # VmHWM: peak resident set of this process image (ru_maxrss can carry the parent's peak over exec)
    with open("/proc/self/status") as fh:
        peak = next(int(line.split()[1]) * 1024 for line in fh if line.startswith("VmHWM:"))
except (OSError, StopIteration):
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * (1 if sys.platform == "darwin" else 1024)
print(json.dumps({{"peak_bytes": peak, "seconds": elapsed, "p_value": p}}))
"""


def memory(n: int, draws: int) -> dict:
    out = {}
    for label, run in (("baseline", False), ("test", True)):
        code = _CHILD.format(root=str(ROOT), n=n, draws=draws, run=run)
        proc = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
        out[label] = json.loads(proc.stdout.strip().splitlines()[-1])
    return {"units": n, "outcomes": 1, "draws": draws,
            "peak_gb": out["test"]["peak_bytes"] / 1e9, "baseline_gb": out["baseline"]["peak_bytes"] / 1e9,
            "seconds": out["test"]["seconds"], "p_value": out["test"]["p_value"]}


def enumeration(n: int, k: int, m: int) -> dict:
    z = np.zeros(n, dtype=np.uint8)
    z[:k] = 1
    mech = mechanism_from_arrays("complete", z)
    total = math.comb(n, k)
    start = time.perf_counter()
    rows = sum(chunk.shape[0] for chunk in mech.enumerate_chunks())
    t_enum = time.perf_counter() - start
    y = np.random.default_rng(3).normal(size=(n, m))
    start = time.perf_counter()
    res = randomization_test(y, mech, source=mech.assignments(max_exact=total, draws=1, seed=1))
    t_test = time.perf_counter() - start
    assert rows == total and res[0].method == "exact" and res[0].draws == total
    return {"assignments": total, "enumerate_per_s": total / t_enum, "test_per_s": total / t_test,
            "test_outcomes": m}


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="smaller sizes (smoke run)")
    args = parser.parse_args(argv)
    if args.quick:
        sizes = dict(speed=(2000, 10, 2000), memory=(100_000, 1000), enum=(16, 8, 10))
    else:
        sizes = dict(speed=(10_000, 10, 10_000), memory=(1_000_000, 10_000), enum=(20, 10, 10))
    print(f"machine: {platform.machine()}, {os.cpu_count()} CPU(s), Python {platform.python_version()}, "
          f"numpy {np.__version__}")
    s = speed(*sizes["speed"])
    print(f"[speed] complete randomization, {s['units']} units x {s['outcomes']} outcomes x {s['draws']} draws")
    print(f"  report-kit randomization_test (all outcomes, shared draws): {s['report_kit_s']:.2f} s")
    print(f"  scipy.stats.permutation_test(vectorized=True), once per outcome: {s['scipy_s']:.2f} s")
    print(f"  plain numpy loop (one permutation per draw): {s['loop_s']:.2f} s")
    print(f"  ratio scipy / report-kit: {s['ratio']:.1f}x  (target >= 20x)")
    print(f"  ratio numpy loop / report-kit: {s['loop_ratio']:.1f}x")
    print(f"  largest p-value difference (against either reference): {s['max_p_gap_in_se']:.2f} standard errors "
          "of the difference")
    e = enumeration(*sizes["enum"])
    print(f"[exact] C({sizes['enum'][0]}, {sizes['enum'][1]}) = {e['assignments']} assignments")
    print(f"  enumeration alone: {e['enumerate_per_s']:,.0f} assignments/s")
    print(f"  enumeration + exact test of {e['test_outcomes']} outcomes: {e['test_per_s']:,.0f} assignments/s")
    mem = memory(*sizes["memory"])
    print(f"[memory] {mem['units']} units x 1 outcome x {mem['draws']} draws (fresh subprocess)")
    print(f"  peak resident memory: {mem['peak_gb']:.2f} GB (data + libraries alone: {mem['baseline_gb']:.2f} GB;"
          f" limit 2 GB); run time {mem['seconds']:.1f} s")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
