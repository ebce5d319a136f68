"""Where the chunks run: in this process or on a Dask cluster (report_kit.inference.distributed).

The Dask tests use a LocalCluster of 2 workers as threads of the test process
(``processes=False``): the same scheduler, scatter and as_completed code as
process workers, without the cost of starting two interpreters on this machine.
"""

from __future__ import annotations

import subprocess
import sys
import textwrap
import time

import numpy as np
import pytest

from report_kit.audit.provenance import canonical_json_bytes
from report_kit.errors import UsageError
from report_kit.inference.distributed import (
    SCHEDULER_ENV,
    counting_chunk_map,
    dask_chunk_map,
    scheduler_address,
)
from report_kit.pipeline import RunOptions, chunk_map_for, load_project, run_analysis

from tests.conftest import ROOT


class SumOfSquares:
    """A work object holding a large array, as the engine's is: ``fn(task)`` for a slice."""

    def __init__(self, y):
        self.y = y

    def __call__(self, task):
        lo, hi = task
        return float(np.sum(self.y[lo:hi] ** 2))


def late_first(task):
    # The first tasks finish last, so completion order is the reverse of task order.
    time.sleep(0.05 * (4 - task))
    return task * 10


@pytest.fixture(scope="module")
def cluster_map():
    calls = []
    with dask_chunk_map(workers=2, processes=False, on_chunk=lambda d, t: calls.append((d, t))) as chunk_map:
        yield chunk_map, calls


def test_counting_map_reports_each_chunk_and_keeps_results():
    calls = []
    chunk_map = counting_chunk_map(lambda d, t: calls.append((d, t)))
    # Reference: the sums of squares written out by hand (0+1+4+9+16, 25+36+49+64+81).
    assert list(chunk_map(SumOfSquares(np.arange(10.0)), [(0, 5), (5, 10)])) == [30.0, 255.0]
    assert calls == [(1, 2), (2, 2)]
    reversed_map = counting_chunk_map(lambda d, t: None, lambda fn, tasks: [fn(t) for t in tasks])
    assert list(reversed_map(lambda t: t + 1, [3, 1, 2])) == [4, 2, 3]


def test_dask_toy_computation_matches_one_process(cluster_map):
    chunk_map, calls = cluster_map
    calls.clear()
    y = np.random.default_rng(7).normal(size=20_000)
    tasks = [(lo, lo + 1_000) for lo in range(0, 20_000, 1_000)]
    got = list(chunk_map(SumOfSquares(y), tasks))
    # Reference: numpy's own sum of squares of each slice, computed here without any chunk map.
    assert got == [float(np.sum(y[lo:hi] ** 2)) for lo, hi in tasks]
    # Progress counts chunks (tasks) done, in batches: increasing, ending at the total.
    done = [d for d, _ in calls]
    assert done == sorted(done) and done[-1] == 20 and {t for _, t in calls} == {20}


def test_dask_results_come_back_in_task_order(cluster_map):
    chunk_map, _ = cluster_map
    assert list(chunk_map(late_first, range(5))) == [0, 10, 20, 30, 40]


def test_results_json_identical_with_and_without_workers(example_runs, cluster_map):
    chunk_map, _ = cluster_map
    project, run_dir, _ = example_runs["quiet-hours"]
    with_workers = run_analysis(load_project(project), chunk_map=chunk_map).results
    assert canonical_json_bytes(with_workers) == (run_dir / "results.json").read_bytes()


def test_multi_arm_results_identical_with_and_without_workers(cluster_map):
    # three arms within blocks, Monte Carlo draws of the full mechanism made chunk by chunk on the workers
    chunk_map, _ = cluster_map
    study = load_project(ROOT / "projects" / "water-letters")
    alone = run_analysis(study).results
    assert alone["design"]["inference_method"] == "monte_carlo"
    with_workers = run_analysis(study, chunk_map=chunk_map).results
    assert canonical_json_bytes(with_workers) == canonical_json_bytes(alone)


def test_dask_option_errors():
    with pytest.raises(UsageError, match="not both"):
        with dask_chunk_map("tcp://127.0.0.1:8786", 2):
            pass
    with pytest.raises(UsageError, match="--workers"):
        with dask_chunk_map(None, 0):
            pass
    with pytest.raises(TypeError, match="callable"):
        list(counting_chunk_map(lambda d, t: None)("not a function", [1]))
    with pytest.raises(TypeError, match="on_chunk"):
        counting_chunk_map("not a function")


def test_scheduler_address_from_environment(monkeypatch):
    monkeypatch.delenv(SCHEDULER_ENV, raising=False)
    assert scheduler_address(None) is None
    monkeypatch.setenv(SCHEDULER_ENV, " tcp://10.1.2.3:8786 ")
    assert scheduler_address(None) == "tcp://10.1.2.3:8786"
    assert scheduler_address("tcp://elsewhere:1") == "tcp://elsewhere:1"
    monkeypatch.setenv(SCHEDULER_ENV, "")
    assert scheduler_address(None) is None


def test_plain_run_uses_the_default_chunk_map(monkeypatch):
    monkeypatch.delenv(SCHEDULER_ENV, raising=False)
    with chunk_map_for(RunOptions()) as chunk_map:
        assert chunk_map is None


def test_nothing_imports_dask_without_the_options(tmp_path):
    script = textwrap.dedent(f"""
        import os, sys
        os.environ.pop({SCHEDULER_ENV!r}, None)
        import report_kit, report_kit.cli, report_kit.pipeline, report_kit.analysis
        import report_kit.inference.distributed
        from report_kit.pipeline import analyse_project
        analyse_project({str(ROOT / "projects" / "quiet-hours")!r})
        loaded = sorted(m for m in sys.modules if m.split(".")[0] in ("dask", "distributed"))
        print("loaded:", loaded)
        sys.exit(1 if loaded else 0)
    """)
    done = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True, cwd=tmp_path)
    assert done.returncode == 0, done.stdout + done.stderr


def test_cli_rejects_both_workers_and_scheduler(project_copy):
    from click.testing import CliRunner

    from report_kit.cli import main

    project = project_copy("quiet-hours")
    result = CliRunner().invoke(main, ["run", str(project), "--no-pdf", "--workers", "2",
                                       "--scheduler", "tcp://127.0.0.1:8786"])
    assert result.exit_code == 2 and "not both" in result.output
    assert "Traceback" not in result.output
    assert not (project / "runs").exists() or not any((project / "runs").iterdir())
    assert CliRunner().invoke(main, ["run", str(project), "--workers", "0"]).exit_code == 2


def test_batches_keep_every_task_once_in_order():
    from report_kit.inference.distributed import _batches

    tasks = list(range(23))
    for threads in (1, 2, 3, 50):
        batches = _batches(tasks, threads)
        assert [t for b in batches for t in b] == tasks and all(batches)


def test_local_cluster_starts_quietly_when_the_usual_dashboard_port_is_taken():
    # Port 8787 is Dask's default; another cluster on this machine may hold it. Starting
    # ours must not warn (warnings are errors here) nor fail.
    import socket

    with socket.socket() as held:
        held.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
        try:
            held.bind(("0.0.0.0", 8787))
            held.listen()
        except OSError:
            pass  # already held by someone else: the situation under test
        with dask_chunk_map(workers=2, processes=False) as chunk_map:
            assert list(chunk_map(abs, [-1, -2, 3])) == [1, 2, 3]


class ChunkNulls:
    """The engine's work for one chunk of draws (complete design, difference in means), holding the data."""

    def __init__(self, z, y):
        self.z, self.y = z, y

    def __call__(self, task):
        from report_kit.design.mechanism import mechanism_from_arrays
        from report_kit.inference.randomization import null_distribution

        index, rows = task
        mech = mechanism_from_arrays("complete", self.z)
        child = int(np.random.SeedSequence(5150, spawn_key=(index,)).generate_state(1)[0])
        source = mech.assignments(max_exact=0, draws=rows, seed=child)
        return null_distribution(self.y, mech, statistic="mean_difference", source=source).null


def test_worker_processes_give_the_null_statistics_bit_for_bit():
    """Every product of the engine runs on one BLAS thread, in this process and in worker processes alike.

    At 300,000 units a product summed on two BLAS threads (this process's default) adds in
    another order than on one (a Dask worker's: the nanny sets OPENBLAS_NUM_THREADS=1); the
    kernels' totals were computed outside the one-thread limit and differed in the last bits.
    """
    rng = np.random.default_rng(11)
    n = 300_000
    z = np.zeros(n, dtype=np.uint8)
    z[rng.permutation(n)[: n // 2]] = 1
    work = ChunkNulls(z, rng.normal(size=(n, 1)))
    tasks = [(0, 10), (1, 10)]
    serial = np.vstack([work(t) for t in tasks])
    with dask_chunk_map(workers=2, processes=True) as chunk_map:
        spread = np.vstack(list(chunk_map(work, tasks)))
    assert np.array_equal(serial, spread)
