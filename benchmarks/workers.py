"""Benchmark of the chunk maps: draws per second in one process and on a local Dask cluster.

Not a test; prints figures. Each chunk is the work the engine does per chunk:
draw ``rows`` complete-design assignments from the chunk's own seed
(``numpy.random.SeedSequence(seed, spawn_key=(chunk,))``) and compute the
difference in means of every outcome under each draw, with the public
:func:`report_kit.inference.randomization.null_distribution`. The work object
holds the outcome matrix, which travels to each worker once. The same chunks
are run one after another in this process (``map``) and by
:func:`dask_chunk_map` with 2 worker processes; the null statistics must agree
bit for bit.

    .venv/bin/python benchmarks/workers.py                      # 100,000 units, 3 outcomes, 4,000 draws
    .venv/bin/python benchmarks/workers.py --units 1000000 --draws 2000 --workers 2
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from report_kit.design.mechanism import mechanism_from_arrays  # noqa: E402
from report_kit.inference.distributed import dask_chunk_map  # noqa: E402
from report_kit.inference.randomization import null_distribution  # noqa: E402


class ChunkNulls:
    """Null statistics of one chunk of draws, from the chunk's own seed stream (holds the data)."""

    def __init__(self, z, y):
        self.z, self.y = z, y

    def __call__(self, task):
        index, rows, seed = task
        mech = mechanism_from_arrays("complete", self.z)
        child = int(np.random.SeedSequence(seed, spawn_key=(index,)).generate_state(1)[0])
        source = mech.assignments(max_exact=0, draws=rows, seed=child)
        return null_distribution(self.y, mech, statistic="mean_difference", source=source).null


def data(n: int, m: int):
    rng = np.random.default_rng(1)
    z = np.zeros(n, dtype=np.uint8)
    z[rng.permutation(n)[: n // 2]] = 1
    return z, rng.normal(size=(n, m))


def timed(chunk_map, tasks, work):
    start = time.perf_counter()
    null = np.vstack(list(chunk_map(work, tasks)))
    return null, time.perf_counter() - start


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--units", type=int, default=100_000)
    parser.add_argument("--outcomes", type=int, default=3)
    parser.add_argument("--draws", type=int, default=4_000)
    parser.add_argument("--chunk", type=int, default=250, help="draws per chunk")
    parser.add_argument("--workers", type=int, default=2)
    args = parser.parse_args()
    z, y = data(args.units, args.outcomes)
    work = ChunkNulls(z, y)
    tasks = [(i, min(args.chunk, args.draws - lo), 5150) for i, lo in enumerate(range(0, args.draws, args.chunk))]
    print(f"{args.units:,} units x {args.outcomes} outcomes x {args.draws:,} draws in {len(tasks)} chunks")
    serial, t1 = timed(map, tasks, work)
    print(f"  1 process:            {t1:7.2f} s  {args.draws / t1:9.0f} draws/s")
    start = time.perf_counter()
    with dask_chunk_map(workers=args.workers) as chunk_map:
        started = time.perf_counter() - start
        spread, t2 = timed(chunk_map, tasks, work)
    print(f"  {args.workers} local workers:      {t2:7.2f} s  {args.draws / t2:9.0f} draws/s "
          f"(cluster start {started:.1f} s, not included)")
    print(f"  speed-up: {t1 / t2:.2f}x; null statistics identical: {np.array_equal(serial, spread)}")


if __name__ == "__main__":
    main()
