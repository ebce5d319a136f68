"""Where the chunks of randomization draws are computed: in this process or on Dask.

Owns the *chunk map* seam between the randomization engine and the machines
that do the work. A chunk map is a callable

    chunk_map(fn, tasks, *, shared=None) -> iterator of results, in task order

* ``tasks`` is an iterable of small picklable chunk descriptions (e.g. chunk
  index and row range); the engine derives each chunk's random stream from
  ``numpy.random.SeedSequence(seed)`` spawned by chunk index, so results do not
  depend on who computes which chunk.
* ``shared`` is ``None`` or a dict of large read-only objects (the outcome
  matrix, the observed assignment). Without ``shared`` each result is
  ``fn(task)``; with it, ``fn(task, shared)``. On Dask the dict is sent to every
  worker once (:meth:`distributed.Client.scatter` with ``broadcast=True``), not
  once per task.
* Results come back in task order whatever order the workers finish in, so a
  reduction over them is the same floating-point sum as in one process.

Two implementations: :func:`serial_chunk_map` (the default, no extra imports)
and :func:`dask_chunk_map` (a context manager that starts a local cluster or
connects to an existing scheduler). Dask is imported only inside
:func:`dask_chunk_map`; nothing else in report-kit imports it.

Each chunk map takes an optional ``on_chunk(done, total)`` callback, called
after each finished chunk (in completion order on Dask), which the command
line uses for its progress bar. See ``docs/scaling.md``.
"""

from __future__ import annotations

import contextlib
import os
from collections.abc import Callable, Iterable, Iterator, Mapping
from typing import Any, Protocol

from report_kit.errors import UsageError

__all__ = [
    "SCHEDULER_ENV",
    "ChunkMap",
    "OnChunk",
    "dask_chunk_map",
    "scheduler_address",
    "serial_chunk_map",
]

#: Environment variable naming an existing Dask scheduler (same as ``--scheduler``).
SCHEDULER_ENV = "REPORT_KIT_SCHEDULER"

OnChunk = Callable[[int, int], None]


class ChunkMap(Protocol):
    """``chunk_map(fn, tasks, *, shared=None)``: ``fn`` over ``tasks``, results in task order."""

    def __call__(self, fn: Callable[..., Any], tasks: Iterable[Any], *,
                 shared: Mapping[str, Any] | None = None) -> Iterator[Any]: ...


def _check_fn(fn, shared) -> None:
    if not callable(fn):
        raise TypeError(f"`fn` must be callable; got {type(fn).__name__}")
    if shared is not None and not isinstance(shared, Mapping):
        raise TypeError(f"`shared` must be a dict of arrays or None; got {type(shared).__name__}")


def _check_on_chunk(on_chunk) -> None:
    if on_chunk is not None and not callable(on_chunk):
        raise TypeError(f"`on_chunk` must be callable or None; got {type(on_chunk).__name__}")


def serial_chunk_map(fn: Callable[..., Any], tasks: Iterable[Any], *,
                     shared: Mapping[str, Any] | None = None,
                     on_chunk: OnChunk | None = None) -> Iterator[Any]:
    """The default chunk map: ``fn`` over ``tasks`` in this process, lazily, in order.

    Parameters
    ----------
    fn : callable
        ``fn(task)``, or ``fn(task, shared)`` when ``shared`` is given.
    tasks : iterable
        Chunk descriptions.
    shared : dict or None
        Large read-only objects every task needs (passed by reference here).
    on_chunk : callable or None
        ``on_chunk(done, total)`` after each chunk.

    Yields
    ------
    The result of each task, in task order.
    """
    _check_fn(fn, shared)
    _check_on_chunk(on_chunk)
    tasks = list(tasks)
    for done, task in enumerate(tasks, start=1):
        yield fn(task) if shared is None else fn(task, shared)
        if on_chunk is not None:
            on_chunk(done, len(tasks))


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
                   processes: bool = True, on_chunk: OnChunk | None = None) -> Iterator[ChunkMap]:
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
    ChunkMap
        ``chunk_map(fn, tasks, *, shared=None)``: submits one task per chunk,
        collects them as they complete and yields results in task order.
        ``shared`` is scattered to every worker once per call; ``fn`` receives
        the worker's copy.

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
            cluster = stack.enter_context(LocalCluster(
                n_workers=workers, threads_per_worker=1, processes=processes,
                dashboard_address=None, silence_logs=40))
            client = stack.enter_context(Client(cluster))
        else:
            try:
                client = stack.enter_context(Client(address, timeout="20s"))
            except (OSError, TimeoutError) as err:
                raise UsageError(f"cannot reach the Dask scheduler at {address}: {err}") from err
        yield _DaskChunkMap(client, on_chunk)


class _DaskChunkMap:
    """The chunk map of one Dask client (see :func:`dask_chunk_map`)."""

    def __init__(self, client, on_chunk: OnChunk | None) -> None:
        self._client = client
        self._on_chunk = on_chunk

    def __call__(self, fn: Callable[..., Any], tasks: Iterable[Any], *,
                 shared: Mapping[str, Any] | None = None) -> Iterator[Any]:
        _check_fn(fn, shared)
        return self._run(fn, list(tasks), shared)

    def _run(self, fn, tasks: list, shared) -> Iterator[Any]:
        from distributed import as_completed

        client = self._client
        extra = ()
        if shared is not None:
            # One future for the whole dict, copied to every worker once.
            (handle,) = client.scatter([dict(shared)], broadcast=True, hash=False)
            extra = (handle,)
        futures = [client.submit(fn, task, *extra, pure=False) for task in tasks]
        index = {f.key: i for i, f in enumerate(futures)}
        ready: dict[int, Any] = {}
        following = 0
        try:
            for done, future in enumerate(as_completed(futures), start=1):
                ready[index[future.key]] = future.result()
                future.release()
                if self._on_chunk is not None:
                    self._on_chunk(done, len(tasks))
                while following in ready:
                    yield ready.pop(following)
                    following += 1
        finally:
            for future in futures:
                future.release()
            for handle in extra:
                handle.release()
