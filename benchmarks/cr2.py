"""Benchmark of the batched CR2 variance of the covariate-adjusted estimate (not a test).

Run from the repository root:

    .venv/bin/python benchmarks/cr2.py                 # compare with the code on `main`
    .venv/bin/python benchmarks/cr2.py --old REF --units 200000

The reference ("old") is the same public function, ``estimate_adjusted``, from another
git revision (default ``main``, extracted with ``git archive`` into a temporary folder),
run in a subprocess on the same invented blocked cluster design. Prints both times, the
old/new ratio, and the largest relative difference of the point estimate and standard
error (the batched form must agree to 1e-10).
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tarfile
import tempfile
import io
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]

CHILD = r"""
import json, sys, time, warnings
import numpy as np
from report_kit.estimation.adjustment import estimate_adjusted
units, seed = int(sys.argv[1]), int(sys.argv[2])
rng = np.random.default_rng(seed)
sizes = rng.integers(1, 13, size=units // 6)
cluster = np.repeat(np.arange(sizes.size), sizes)
block = cluster % 50
zc = rng.integers(0, 2, sizes.size)
z = zc[cluster]
X = rng.normal(size=(cluster.size, 3))
y = rng.normal(size=sizes.size)[cluster] + X @ [0.5, -0.2, 0.1] + 0.3 * z + rng.normal(size=cluster.size)
with warnings.catch_warnings():
    warnings.simplefilter("ignore")
    t = time.perf_counter()
    est = estimate_adjusted(y, z, X, mechanism="blocked_cluster", block=block, cluster=cluster)
    seconds = time.perf_counter() - t
print(json.dumps({"seconds": seconds, "estimate": est.estimate, "std_error": est.std_error,
                  "clusters": int(sizes.size), "units": int(cluster.size)}))
"""


def run(path: Path, units: int, seed: int) -> dict:
    env = dict(os.environ, PYTHONPATH=str(path), OMP_NUM_THREADS="1", OPENBLAS_NUM_THREADS="1")
    out = subprocess.run([sys.executable, "-c", CHILD, str(units), str(seed)], env=env, cwd=path,
                         check=True, capture_output=True, text=True).stdout
    return json.loads(out.strip().splitlines()[-1])


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--old", default="main", help="git revision of the reference code")
    parser.add_argument("--units", type=int, default=60_000)
    parser.add_argument("--seed", type=int, default=1)
    args = parser.parse_args()
    archive = subprocess.run(["git", "-C", str(ROOT), "archive", args.old, "report_kit"],
                             check=True, capture_output=True).stdout
    with tempfile.TemporaryDirectory() as tmp:
        with tarfile.open(fileobj=io.BytesIO(archive)) as tar:
            tar.extractall(tmp, filter="data")
        old = run(Path(tmp), args.units, args.seed)
    new = run(ROOT, args.units, args.seed)
    rel = lambda a, b: abs(a - b) / max(abs(b), 1e-300)  # noqa: E731
    print(f"units {new['units']:,}, clusters {new['clusters']:,} (blocked cluster design, 3 covariates)")
    print(f"old ({args.old}): {old['seconds']:.3f} s   new: {new['seconds']:.3f} s   "
          f"ratio old/new: {old['seconds'] / new['seconds']:.1f}")
    print(f"relative difference: estimate {rel(new['estimate'], old['estimate']):.1e}, "
          f"std_error {rel(new['std_error'], old['std_error']):.1e}")


if __name__ == "__main__":
    main()
