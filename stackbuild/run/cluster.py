"""Dask set-up: a local cluster of worker processes, or an existing scheduler.

Scale-out goes through Dask distributed only. On a Slurm cluster start the
scheduler and workers with dask-jobqueue (see README, "Running on a cluster")
and pass its address or scheduler file with ``--scheduler``.
"""
from __future__ import annotations

import contextlib
import logging
import os
from pathlib import Path
from typing import Callable, Iterable

from ..errors import InputError

log = logging.getLogger(__name__)


@contextlib.contextmanager
def dask_client(workers: int | None = None, scheduler: str | None = None,
                memory_limit: str = "auto"):
    """Yield a ``distributed.Client``: to ``scheduler`` if given, else a new local cluster.

    Parameters
    ----------
    workers : int, optional
        Worker processes of the local cluster (default: the number of cores).
    scheduler : str, optional
        A scheduler address (``tcp://host:8786``) or the path of a scheduler
        file written by ``dask scheduler --scheduler-file`` or dask-jobqueue.
    memory_limit : str
        Memory limit per local worker (dask syntax, e.g. ``"4GiB"``).
    """
    from distributed import Client, LocalCluster

    if scheduler:
        try:
            if Path(scheduler).is_file():
                client = Client(scheduler_file=scheduler, timeout="30s")
            else:
                client = Client(scheduler, timeout="30s")
        except OSError as exc:
            raise InputError(f"cannot reach the Dask scheduler {scheduler!r} ({exc})") from None
        try:
            yield client
        finally:
            client.close()
        return
    n = workers or os.cpu_count() or 1
    if n < 1:
        raise InputError(f"--workers must be >= 1, got {n}")
    cluster = LocalCluster(n_workers=n, threads_per_worker=1, processes=True,
                           memory_limit=memory_limit, dashboard_address=None,
                           silence_logs=logging.ERROR)
    client = Client(cluster)
    try:
        yield client
    finally:
        client.close()
        cluster.close()


def client_mapper(client, progress: Callable[[int, int], None] | None = None):
    """Return ``mapper(fn, items)``: run ``fn`` on every item on the cluster, results in order.

    Task inputs should be small (paths, numbers, settings); each task reads
    its own data. The first task error is re-raised in the caller.
    """
    from distributed import as_completed

    def mapper(fn: Callable, items: Iterable) -> list:
        items = list(items)
        if not items:
            return []
        futures = client.map(fn, items, pure=False)
        index = {f.key: i for i, f in enumerate(futures)}
        results = [None] * len(futures)
        done = 0
        for fut in as_completed(futures):
            results[index[fut.key]] = fut.result()
            done += 1
            if progress:
                progress(done, len(futures))
        return results

    return mapper


def serial_mapper(progress: Callable[[int, int], None] | None = None):
    """Return a mapper that runs in this process (for tests and debugging)."""
    def mapper(fn: Callable, items: Iterable) -> list:
        items = list(items)
        out = []
        for i, item in enumerate(items, 1):
            out.append(fn(item))
            if progress:
                progress(i, len(items))
        return out

    return mapper
