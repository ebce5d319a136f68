"""Benchmark of exact p-values found without listing assignments (not a test; prints figures).

Run from the repository root:

    .venv/bin/python benchmarks/exact.py            # full sizes
    .venv/bin/python benchmarks/exact.py --quick    # one repeat, for a smoke run

Cases (complete randomization, seeded invented data):

* 10,000 units, half treated, 0/1 outcome (hypergeometric law);
* 2,000 units, half treated, outcome on 0..100 (characteristic-function FFT law).

For each, ``exact_law_test`` (two-sided difference in means) is timed and its
peak traced memory (``tracemalloc``, numpy buffers included) measured, against
references measured in the same run: a Monte Carlo test of 10,000 draws by the
engine (``randomization_test``) and, for the 0/1 case, scipy's hypergeometric
tail (``scipy.stats.hypergeom``). Times are the best of the repeats; the ratio
is exact / reference. The exact and Monte Carlo p-values are printed side by
side (they should agree within a few Monte Carlo standard errors).
"""

from __future__ import annotations

import argparse
import os
import platform
import sys
import time
import tracemalloc
from pathlib import Path

import numpy as np
from scipy import stats

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from report_kit.design.mechanism import mechanism_from_arrays  # noqa: E402
from report_kit.inference.exact_tests import exact_law_test  # noqa: E402
from report_kit.inference.randomization import randomization_test  # noqa: E402

MC_DRAWS = 10_000


def binary_case():
    rng = np.random.default_rng(1)
    z = np.zeros(10_000, dtype=np.uint8)
    z[rng.permutation(10_000)[:5_000]] = 1
    y = (rng.random(10_000) < np.where(z == 1, 0.32, 0.30)).astype(float)
    return "10,000 units, 0/1 outcome", y, z


def score_case():
    rng = np.random.default_rng(2)
    z = np.zeros(2_000, dtype=np.uint8)
    z[rng.permutation(2_000)[:1_000]] = 1
    y = np.clip(np.round(rng.normal(50 + 1.5 * z, 20)), 0, 100)
    return "2,000 units, outcome on 0..100", y, z


def measure(fn, repeats: int):
    """Best time over ``repeats`` and the peak traced memory of one call."""
    best = float("inf")
    for _ in range(repeats):
        start = time.perf_counter()
        value = fn()
        best = min(best, time.perf_counter() - start)
    tracemalloc.start()
    fn()
    peak = tracemalloc.get_traced_memory()[1]
    tracemalloc.stop()
    return value, best, peak


def hypergeom_reference(y, z):
    n, k, m = z.size, int(z.sum()), int(y.sum())
    x = int(y[z == 1].sum())
    support = np.arange(max(0, k - (n - m)), min(k, m) + 1)
    mean = k * m / n
    pmf = stats.hypergeom.pmf(support, n, m, k)
    return float(pmf[np.abs(support - mean) >= abs(x - mean)].sum())


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true")
    repeats = 1 if parser.parse_args().quick else 3
    print(f"python {platform.python_version()}, numpy {np.__version__}, {os.cpu_count()} cpu(s)")
    for label, y, z in (binary_case(), score_case()):
        mech = mechanism_from_arrays("complete", z)
        exact, t_exact, m_exact = measure(lambda: exact_law_test(y, mech), repeats)
        mc, t_mc, m_mc = measure(lambda: randomization_test(
            y, mech, source=mech.assignments(max_exact=0, draws=MC_DRAWS, seed=5150))[0], repeats)
        print(f"\n{label}: {exact.detail}")
        print(f"  exact p = {exact.p_value:.6g}; Monte Carlo p = {mc.p_value:.6g} (se {mc.mc_std_error:.2g})")
        print(f"  exact          {t_exact:9.3f} s   peak {m_exact / 2**20:8.1f} MiB")
        print(f"  Monte Carlo    {t_mc:9.3f} s   peak {m_mc / 2**20:8.1f} MiB   "
              f"time ratio exact/MC {t_exact / t_mc:.3g}, memory ratio {m_exact / max(m_mc, 1):.3g}")
        if set(np.unique(y)) <= {0.0, 1.0}:
            ref, t_ref, m_ref = measure(lambda: hypergeom_reference(y, z), repeats)
            print(f"  scipy hypergeom {t_ref:8.3f} s   peak {m_ref / 2**20:8.1f} MiB   "
                  f"time ratio exact/scipy {t_exact / t_ref:.3g}; scipy p = {ref:.6g}")


if __name__ == "__main__":
    main()
