"""Where the chunks of randomization draws are computed: in this process or on Dask.

Owns the Dask side of the engine's *chunk map* seam. A chunk map is a callable

    chunk_map(fn, tasks) -> iterable of fn(task), in task order

(:data:`report_kit.inference.engine.ChunkMap`; the engine calls
``partials = chunk_map(work, tasks)``). ``tasks`` are small picklable chunk
descriptions; ``fn`` is the engine's work object, which holds the large arrays
(the outcome matrix, the observed assignment). The engine derives each chunk's
random stream from ``numpy.random.SeedSequence(seed)`` spawned by chunk index,
so results do not depend on who computes which chunk.

* :func:`dask_chunk_map` - a context manager that starts a local cluster or
  connects to an existing scheduler and yields a chunk map. ``fn`` (with the
  arrays it holds) is sent to every worker **once** per call
  (:meth:`distributed.Client.scatter` with ``broadcast=True``; straight to the
  workers of a local cluster, whose scheduler would otherwise keep a second
  copy in this process); each task then carries only its chunk description. Results are collected as they complete
  and yielded in task order, so a reduction over them is the same
  floating-point sum as in one process.
* :func:`counting_chunk_map` - any chunk map (default: one chunk after another
  in this process) that reports each finished chunk, for the progress bar.

Dask is imported only inside :func:`dask_chunk_map`; nothing else in
report-kit imports it. Both take ``on_chunk(done, total)``, called after each
finished chunk (in completion order on Dask). See ``docs/scaling.md``.
"""

from __future__ import annotations

import contextlib
import os
from collections.abc import Callable, Iterable, Iterator
from typing import Any

from report_kit.errors import UsageError

__all__ = [
    "SCHEDULER_ENV",
    "OnChunk",
    "counting_chunk_map",
    "dask_chunk_map",
    "scheduler_address",
]

#: Environment variable naming an existing Dask scheduler (same as ``--scheduler``).
SCHEDULER_ENV = "REPORT_KIT_SCHEDULER"

OnChunk = Callable[[int, int], None]
#: ``chunk_map(fn, tasks)`` (the engine's ``ChunkMap``)
ChunkMapFn = Callable[[Callable[[Any], Any], Iterable[Any]], Iterable[Any]]


def _check_fn(fn) -> None:
    if not callable(fn):
        raise TypeError(f"`fn` must be callable; got {type(fn).__name__}")


def _check_on_chunk(on_chunk) -> None:
    if on_chunk is not None and not callable(on_chunk):
        raise TypeError(f"`on_chunk` must be callable or None; got {type(on_chunk).__name__}")


def counting_chunk_map(on_chunk: OnChunk, chunk_map: ChunkMapFn | None = None) -> ChunkMapFn:
    """A chunk map that calls ``on_chunk(done, total)`` after each chunk of ``chunk_map``.

    Parameters
    ----------
    on_chunk : callable
        ``on_chunk(done, total)``.
    chunk_map : callable or None
        ``chunk_map(fn, tasks)``; ``None``: the tasks one after another in this
        process (the engine's default).

    Returns
    -------
    callable
        ``chunk_map(fn, tasks)`` yielding the same results in the same order.
    """
    if not callable(on_chunk):
        raise TypeError(f"`on_chunk` must be callable; got {type(on_chunk).__name__}")
    inner = map if chunk_map is None else chunk_map

    def counted(fn: Callable[[Any], Any], tasks: Iterable[Any]) -> Iterator[Any]:
        _check_fn(fn)
        tasks = list(tasks)
        for done, result in enumerate(inner(fn, tasks), start=1):
            on_chunk(done, len(tasks))
            yield result

    return counted


def scheduler_address(address: str | None) -> str | None:
    """The scheduler to use: ``address`` if given, else ``$REPORT_KIT_SCHEDULER`` (empty = none)."""
    if address is None:
        address = os.environ.get(SCHEDULER_ENV) or None
    if address is not None and (not isinstance(address, str) or not address.strip()):
        raise UsageError(f"the scheduler address must be a non-empty string such as tcp://HOST:8786; "
                         f"got {address!r}")
    return None if address is None else address.strip()


def _check_workers(workers) -> int | None:
    if workers is None:
        return None
    if isinstance(workers, bool) or not isinstance(workers, int) or workers < 1:
        raise UsageError(f"--workers must be a whole number of at least 1; got {workers!r}")
    return workers


@contextlib.contextmanager
def dask_chunk_map(address: str | None = None, workers: int | None = None, *,
                   processes: bool = True, on_chunk: OnChunk | None = None) -> Iterator[ChunkMapFn]:
    """A chunk map that runs the chunks on a Dask cluster (imports ``dask.distributed`` here only).

    Parameters
    ----------
    address : str or None
        Address of an existing scheduler (e.g. ``tcp://10.0.0.5:8786``); when
        ``None``, ``$REPORT_KIT_SCHEDULER`` if set, else a local cluster.
    workers : int or None
        Number of worker processes of the local cluster (one thread each);
        ``None`` lets Dask choose. Ignored, with an error, when an address is
        also given: the cluster decides its own size.
    processes : bool, default True
        Local cluster only: worker processes (``True``) or threads of this
        process (``False``, cheaper to start; used by the tests).
    on_chunk : callable or None
        ``on_chunk(done, total)`` after each finished chunk.

    Yields
    ------
    callable
        ``chunk_map(fn, tasks)``: sends ``fn`` to every worker once, submits
        one task per chunk, collects them as they complete and yields the
        results in task order.

    Raises
    ------
    UsageError
        Bad ``workers``/``address``, both given, Dask not installed, or the
        scheduler cannot be reached.
    """
    address = scheduler_address(address)
    workers = _check_workers(workers)
    _check_on_chunk(on_chunk)
    if address is not None and workers is not None:
        raise UsageError("give either --workers (a local cluster) or --scheduler (an existing cluster), not both")
    try:
        from distributed import Client, LocalCluster
    except ImportError as err:  # pragma: no cover - dask is a test dependency
        raise UsageError("--workers and --scheduler need Dask: pip install 'report-kit[dask]'") from err
    with contextlib.ExitStack() as stack:
        if address is None:
            # dashboard_address ":0": any free port; the default 8787 may be held by another
            # cluster on this machine, and Dask then warns (an error under our test settings).
            cluster = stack.enter_context(LocalCluster(
                n_workers=workers, threads_per_worker=1, processes=processes,
                dashboard_address=":0", silence_logs=40))
            client = stack.enter_context(Client(cluster))
        else:
            try:
                client = stack.enter_context(Client(address, timeout="20s"))
            except (OSError, TimeoutError) as err:
                raise UsageError(f"cannot reach the Dask scheduler at {address}: {err}") from err
        # A local cluster's scheduler lives in this process: data scattered through it would
        # stay here as a second copy of the work object, so it goes straight to the workers.
        yield _DaskChunkMap(client, on_chunk, direct=True if address is None else None)


#: Batches of tasks per worker thread and pass: enough to balance the load, few enough that
#: Dask's per-task overhead (milliseconds) stays small against the chunks' work.
BATCHES_PER_THREAD = 4


def _call_batch(fn: Callable[[Any], Any], batch: list) -> list:
    """What a Dask task runs: the worker's copy of ``fn`` on a few consecutive chunk descriptions."""
    return [fn(task) for task in batch]


def _batches(tasks: list, threads: int) -> list[list]:
    """Consecutive runs of tasks, about ``BATCHES_PER_THREAD`` per worker thread."""
    size = max(1, -(-len(tasks) // max(1, threads * BATCHES_PER_THREAD)))
    return [tasks[i:i + size] for i in range(0, len(tasks), size)]


class _DaskChunkMap:
    """The chunk map of one Dask client (see :func:`dask_chunk_map`)."""

    def __init__(self, client, on_chunk: OnChunk | None, direct: bool | None = None) -> None:
        self._client = client
        self._on_chunk = on_chunk
        self._direct = direct

    def __call__(self, fn: Callable[[Any], Any], tasks: Iterable[Any]) -> Iterator[Any]:
        _check_fn(fn)
        return self._run(fn, list(tasks))

    def _run(self, fn, tasks: list) -> Iterator[Any]:
        from distributed import as_completed

        client = self._client
        # The work object holds the large arrays: one copy per worker, not one per task.
        (handle,) = client.scatter([fn], broadcast=True, hash=False, direct=self._direct)
        batches = _batches(tasks, sum(client.nthreads().values()))
        futures = [client.submit(_call_batch, handle, batch, pure=False) for batch in batches]
        index = {f.key: i for i, f in enumerate(futures)}
        ready: dict[int, list] = {}
        following = done = 0
        try:
            for future in as_completed(futures):
                i = index[future.key]
                ready[i] = future.result()
                future.release()
                done += len(batches[i])
                if self._on_chunk is not None:
                    self._on_chunk(done, len(tasks))
                while following in ready:
                    yield from ready.pop(following)
                    following += 1
        finally:
            for future in futures:
                future.release()
            handle.release()
