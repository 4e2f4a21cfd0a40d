"""Run independent tasks (frames, replicates) in parallel with Dask.

By default a local cluster of worker processes is started on the loopback
interface only (nothing listens on the network, no dashboard); with a
scheduler address the tasks go to an existing Dask cluster instead, whose
workers must have the same twinray installed.

Each task is a picklable top-level function applied to one item plus shared
keyword arguments. Tasks run with one numba thread each, so a task computes
exactly the same numbers whichever worker runs it and however many workers
there are; the results come back in the order of the items.
"""

from __future__ import annotations

import contextlib
import os
import re

from .errors import TwinrayInputError

_ADDRESS = re.compile(r"^(tcp|tls|inproc|ucx|ws|wss)://[^\s/]+(:\d+)?/?$|^[\w.-]+:\d+$")


def default_workers() -> int:
    """Worker processes of the local cluster when not told: the usable CPU cores."""
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except AttributeError:  # not on Linux
        return max(1, os.cpu_count() or 1)


def _run_single_threaded(func, item, shared):
    """Run one task with one numba thread (identical numbers on every worker)."""
    import numba

    previous = numba.get_num_threads()
    numba.set_num_threads(1)
    try:
        return func(item, **shared)
    finally:
        numba.set_num_threads(previous)


@contextlib.contextmanager
def dask_client(workers: int | None = None, scheduler: str | None = None, connect_timeout_s: float = 10.0):
    """A Dask client on a fresh loopback cluster or on an existing scheduler.

    Parameters
    ----------
    workers : int, optional
        Worker processes of the local cluster (default :func:`default_workers`).
    scheduler : str, optional
        Address of a running scheduler, e.g. ``tcp://10.0.0.5:8786``; no local
        cluster is started then.
    connect_timeout_s : float
        How long to try to reach ``scheduler``, s.

    Yields
    ------
    distributed.Client
    """
    from distributed import Client, LocalCluster

    if scheduler is not None:
        if not _ADDRESS.match(scheduler.strip()):
            raise TwinrayInputError(f"--scheduler '{scheduler}' is not a Dask address like tcp://HOST:PORT")
        try:
            client = Client(scheduler.strip(), timeout=f"{float(connect_timeout_s)}s",
                            set_as_default=False)
        except (OSError, TimeoutError) as exc:
            raise TwinrayInputError(f"cannot reach the Dask scheduler at {scheduler} "
                                    f"({' '.join(str(exc).split())[:100]})") from None
        try:
            yield client
        finally:
            client.close()
        return
    n = default_workers() if workers is None else int(workers)
    if n < 1:
        raise TwinrayInputError(f"--workers must be >= 1, got {workers}")
    # Everything on loopback (its HTTP endpoint too, on a free port rather than
    # the fixed 8787); one thread per worker process: the tasks are numba code,
    # and processes avoid contention for the GIL.
    cluster = LocalCluster(n_workers=n, threads_per_worker=1, processes=True, host="127.0.0.1",
                           dashboard_address="127.0.0.1:0", silence_logs=50)
    try:
        client = Client(cluster, set_as_default=False)
        try:
            yield client
        finally:
            client.close()
    finally:
        cluster.close()


def map_tasks(func, items, shared: dict | None = None, *, workers: int | None = None,
              scheduler: str | None = None, client=None, on_done=None) -> list:
    """Apply ``func(item, **shared)`` to every item, in parallel; results in item order.

    Parameters
    ----------
    func : callable
        A top-level (picklable) function.
    items : sequence
        One task per item (e.g. one frame's sinograms).
    shared : dict, optional
        Keyword arguments common to every task (sent to each worker once).
    workers : int, optional
        Local worker processes; ``0`` runs the tasks one after the other in
        this process without Dask (same numbers). Default: one per core, or
        in this process when there is a single task (a cluster would only
        add its start-up time).
    scheduler : str, optional
        Address of an existing Dask scheduler.
    client : distributed.Client, optional
        Use this client (e.g. to reuse one cluster for several maps).
    on_done : callable, optional
        Called with no argument after each task finishes (progress bars).

    Returns
    -------
    list
        ``[func(items[0], **shared), func(items[1], **shared), ...]``.
    """
    items = list(items)
    shared = dict(shared or {})
    if not items:
        return []
    if client is None and scheduler is None and (workers == 0 or (workers is None and len(items) == 1)):
        out = []
        for item in items:
            out.append(_run_single_threaded(func, item, shared))
            if on_done is not None:
                on_done()
        return out
    if client is None:
        with dask_client(workers, scheduler) as own:
            return map_tasks(func, items, shared, client=own, on_done=on_done)
    from distributed import as_completed

    # scatter([v]) keeps a dict value whole (scatter(dict) would split it by key).
    # hash=False: unique keys, so equal items of two maps in a row never share
    # (and race to release) one piece of scattered data.
    shared_futures = {k: client.scatter([v], broadcast=True, hash=False)[0] for k, v in shared.items()}
    item_futures = client.scatter(items, hash=False)
    futures = [client.submit(_run_single_threaded, func, f, shared_futures, pure=False) for f in item_futures]
    index = {f.key: i for i, f in enumerate(futures)}
    results = [None] * len(futures)
    try:
        for fut in as_completed(futures, loop=client.loop):
            # .result() re-raises a task's exception here (e.g. TwinrayInputError).
            results[index[fut.key]] = fut.result()
            if on_done is not None:
                on_done()
    except BaseException:
        for f in futures:
            f.cancel()
        raise
    return results
