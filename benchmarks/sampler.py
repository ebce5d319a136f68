"""Benchmark of the one-stratum Monte Carlo sampler (not a test; prints figures).

Run from the repository root:

    .venv/bin/python benchmarks/sampler.py            # full sizes
    .venv/bin/python benchmarks/sampler.py --quick    # fewer repeats, for a smoke run

Times ``Mechanism.sample_chunks`` (complete randomization, half the units
treated unless noted, default chunk size, all chunks consumed) against the previous
algorithm, whose per-row correction ran in a Python loop. The previous
algorithm is the frozen copy kept in ``tests/test_designs.py``
(``previous_sample_chunks``), measured in the same run; each case first checks
that both return bit-identical chunks. Each time is the best of several
alternating repeats; the ratio is previous / current. The time of the
16-bit key step alone (random words, threshold, counts: unchanged, and the
floor for both) is printed alongside, since it dominates for many units.
"""

from __future__ import annotations

import argparse
import math
import os
import platform
import sys
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from report_kit.design.mechanism import CHUNK_CELLS, mechanism_from_arrays  # noqa: E402
from tests.test_designs import previous_sample_chunks  # noqa: E402

#: (label, units, treated, draws); the last two show a small study at the draws of one power
#: check, and a design whose correction often needs extra candidates (one treated in 1,000).
CASES = (
    ("n=12, 10,000 draws", 12, 6, 10_000),
    ("n=10,000, 10,000 draws", 10_000, 5_000, 10_000),
    ("n=12, 500 draws", 12, 6, 500),
    ("n=1,000 with k=1, 10,000 draws", 1_000, 1, 10_000),
)
SEED = 5150


def complete(n: int, k: int):
    z = np.zeros(n, dtype=np.uint8)
    z[np.random.default_rng(1).permutation(n)[:k]] = 1
    return mechanism_from_arrays("complete", z)


def consume(chunks) -> int:
    return sum(chunk.shape[0] for chunk in chunks)


def same_chunks(mech, draws: int) -> bool:
    got = list(mech.sample_chunks(draws, SEED))
    old = list(previous_sample_chunks(mech, draws, SEED))
    return len(got) == len(old) and all(
        a.dtype == b.dtype and a.shape == b.shape and a.tobytes() == b.tobytes() for a, b in zip(got, old))


def best_times(mech, draws: int, repeats: int) -> tuple[float, float]:
    new, old = [], []
    for _ in range(repeats):
        start = time.perf_counter()
        consume(mech.sample_chunks(draws, SEED))
        new.append(time.perf_counter() - start)
        start = time.perf_counter()
        consume(previous_sample_chunks(mech, draws, SEED))
        old.append(time.perf_counter() - start)
    return min(new), min(old)


def key_step_seconds(mech, draws: int, repeats: int) -> float:
    """Best time of the provisional 16-bit key step alone, with the sampler's chunking."""
    size, treated = mech.n_groups, mech.stratum_treated[0]
    rows_per_chunk = max(1, min(draws, CHUNK_CELLS // mech.n))
    best = math.inf
    for _ in range(repeats):
        keys = np.random.Generator(np.random.PCG64(np.random.SeedSequence(SEED).spawn(2)[0]))
        start = time.perf_counter()
        for first in range(0, draws, rows_per_chunk):
            raw = keys.bit_generator.random_raw((min(rows_per_chunk, draws - first), -(-size // 4)))
            provisional = raw.view("<u2")[:, :size] < min(65535, max(1, round(65536 * treated / size)))
            np.count_nonzero(provisional, axis=1)
        best = min(best, time.perf_counter() - start)
    return best


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="fewer repeats (smoke run)")
    args = parser.parse_args(argv)
    print(f"machine: {platform.machine()}, {os.cpu_count()} CPU(s), Python {platform.python_version()}, "
          f"numpy {np.__version__}")
    print("[sampler] Mechanism.sample_chunks, complete randomization, seed 5150, default chunks")
    for label, n, k, draws in CASES:
        mech = complete(n, k)
        identical = same_chunks(mech, draws)
        repeats = 1 if args.quick else (3 if n * draws > 10**7 else 7)
        new, old = best_times(mech, draws, repeats)
        floor = key_step_seconds(mech, draws, repeats)
        print(f"  {label}: previous {old * 1e3:.2f} ms, current {new * 1e3:.2f} ms, "
              f"ratio previous / current {old / new:.1f}x; bit-identical: {'yes' if identical else 'NO'}; "
              f"key step alone {floor * 1e3:.2f} ms")
        if not identical:
            return 1
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
