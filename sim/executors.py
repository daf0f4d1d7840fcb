"""Where ``routerd sweep`` runs its grid: a local process pool or a Dask cluster.

Owns: starting and stopping the executor behind one ``concurrent.futures.Executor``
interface (``ProcessPoolExecutor`` here; ``distributed.Client.get_executor()`` for Dask,
whose futures are ``concurrent.futures.Future`` objects too), the progress channel a
worker reports simulated time on, and the message for a missing ``dask``.

Progress channel: each run puts ``(index, fraction of its simulated time)`` at most
twice a second.  Local pool: a ``multiprocessing`` queue handed to every worker at start
(workers ignore SIGINT, so a Ctrl-C reaches the caller only, which then stops them).
Dask: a ``distributed.Queue`` that lives on the scheduler, so it reaches workers on other
hosts; the caller drains it between futures.  What travels to a worker is the spec (plain
values with the inputs inline, see :mod:`routerd.sim.commands_sweep`) and the channel;
what comes back is one plain row.

Must not import at module level: dask / distributed (the optional ``routerd[cluster]``
extra); the simulator.
"""
from __future__ import annotations

import multiprocessing as mp
import queue as _queue
import signal
from collections.abc import Callable
from concurrent.futures import Executor, ProcessPoolExecutor
from typing import Any

__all__ = ["EXECUTORS", "MissingDask", "Pool", "open_pool", "worker_sink"]

EXECUTORS = ("local", "dask")

#: workers of the LocalCluster that ``--executor dask`` starts with no ``--scheduler``
LOCAL_CLUSTER_WORKERS = 2

MISSING_DASK = ("--executor dask (or sim.executor: dask) needs Dask's distributed scheduler, "
                "which is not installed "
                "({err}); install the cluster extra: pip install 'routerd[cluster]'")

#: the queue a local pool worker reports progress on (set by the pool's initializer)
_WORKER_SINK: Any = None


class MissingDask(RuntimeError):
    """``--executor dask`` without ``dask[distributed]`` installed (the message says which
    extra brings it)."""


class Pool:
    """An executor plus its progress channel.  ``sink`` is what a task gets to ``put``
    progress on (None: the local pool worker's own queue, :func:`worker_sink`)."""

    def __init__(self, executor: Executor, kind: str, workers: int, where: str,
                 sink: Any = None, drain: Callable[[], list[Any]] = list,
                 close: Callable[[bool], None] | None = None):
        self.executor = executor
        self.kind = kind
        self.workers = workers
        self.where = where
        self.sink = sink
        self._drain = drain
        self._close = close

    def drain(self) -> list[Any]:
        """Progress items reported since the last call; never raises (progress is never
        worth failing a sweep for)."""
        try:
            return list(self._drain())
        except Exception:  # noqa: BLE001
            return []

    def close(self, interrupted: bool = False) -> None:
        """Stop the workers; ``interrupted``: do not wait for running runs."""
        if self._close is not None:
            self._close(interrupted)


def worker_sink() -> Any:
    """The progress queue of this local pool worker (None outside one)."""
    return _WORKER_SINK


def _init_local_worker(q: Any) -> None:
    global _WORKER_SINK
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    _WORKER_SINK = q


def _local(jobs: int) -> Pool:
    ctx = mp.get_context()
    q = ctx.Queue()
    ex = ProcessPoolExecutor(max_workers=jobs, mp_context=ctx, initializer=_init_local_worker,
                             initargs=(q,))

    def drain() -> list[Any]:
        out = []
        while True:
            try:
                out.append(q.get_nowait())
            except _queue.Empty:
                return out

    def close(interrupted: bool) -> None:
        if interrupted:
            # a running run cannot be cancelled through the executor: stop its process
            # (the workers ignore SIGINT, so nothing else would)
            procs = list(getattr(ex, "_processes", {}).values())
            ex.shutdown(wait=False, cancel_futures=True)
            for p in procs:
                if p.is_alive():
                    p.terminate()
            for p in procs:
                p.join(5)
        else:
            ex.shutdown(wait=True)
        q.close()
        q.cancel_join_thread()

    return Pool(ex, "local", jobs, f"{jobs} local process(es)", None, drain, close)


def dask_setup(worker: Any) -> None:
    """Run by each worker of the LocalCluster we start (``preload``): a Ctrl-C on the
    terminal reaches the whole process group, and the caller alone should act on it
    (stop the cluster, write what finished), as with the local pool's workers."""
    signal.signal(signal.SIGINT, signal.SIG_IGN)


def import_distributed() -> Any:
    """``distributed``, or :class:`MissingDask` naming the extra."""
    try:
        import distributed
    except ImportError as e:
        raise MissingDask(MISSING_DASK.format(err=e)) from None
    return distributed


def _dask(scheduler: str | None, jobs: int | None, timeout_s: float) -> Pool:
    distributed = import_distributed()
    cluster = None
    if scheduler is None:
        n = jobs or LOCAL_CLUSTER_WORKERS
        # processes on this host, loopback only: the same path as a real cluster (specs
        # and rows pickled across processes), small enough for a laptop.  The scheduler's
        # HTTP server gets a free port: with none asked for it takes 8787 and warns when
        # another cluster holds it
        cluster = distributed.LocalCluster(n_workers=n, threads_per_worker=1, processes=True,
                                           host="127.0.0.1", dashboard_address="127.0.0.1:0",
                                           silence_logs=40, preload=[__name__])
        client = distributed.Client(cluster, timeout=timeout_s)
        where = f"a Dask LocalCluster of {n} worker process(es)"
    else:
        client = distributed.Client(scheduler, timeout=timeout_s)
        n = len(client.scheduler_info().get("workers", {}))
        where = f"the Dask scheduler {scheduler} ({n} worker(s) now)"
    q = distributed.Queue(client=client)

    def drain() -> list[Any]:
        got = q.get(batch=True, timeout=1)
        return list(got or [])

    def close(interrupted: bool) -> None:
        try:
            ex.shutdown(wait=not interrupted)
        finally:
            client.close()
            if cluster is not None:
                cluster.close()

    ex = client.get_executor()
    return Pool(ex, "dask", n, where, q, drain, close)


def open_pool(kind: str, jobs: int, scheduler: str | None = None,
              timeout_s: float = 10.0) -> Pool:
    """Start an executor.  ``local``: ``jobs`` worker processes.  ``dask``: a client of
    ``scheduler`` (an address like ``tcp://HOST:8786``), or a LocalCluster of ``jobs``
    (default 2) single-threaded worker processes when there is none.  Raises
    :class:`MissingDask`, or OSError/TimeoutError when the scheduler cannot be reached."""
    if kind == "local":
        return _local(jobs)
    if kind == "dask":
        return _dask(scheduler, jobs, timeout_s)
    raise ValueError(f"unknown executor {kind!r}")
