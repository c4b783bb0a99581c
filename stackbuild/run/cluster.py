"""Dask set-up: a local cluster of worker processes, or an existing scheduler.

Scale-out goes through Dask distributed only. On a Slurm cluster start the
scheduler and workers with dask-jobqueue (see README, "Running on a cluster")
and pass its address or scheduler file with ``--scheduler``.
"""
from __future__ import annotations

import contextlib
import itertools
import logging
import os
import threading
import time
import warnings
from pathlib import Path
from typing import Callable, Iterable

from ..errors import InputError
from ..render.pyramid import compute_locally
from .progress import announce

log = logging.getLogger(__name__)


#: One thread per library inside each worker process: Dask already runs one
#: task per core, and nested BLAS/OpenCV pools on top of that oversubscribe the
#: cores (tiny matrix products in sub-pixel refinement slowed ~100x).
SINGLE_THREAD_ENV = {"OMP_NUM_THREADS": "1", "OPENBLAS_NUM_THREADS": "1", "MKL_NUM_THREADS": "1"}


def _single_threaded_opencv() -> None:
    import cv2

    cv2.setNumThreads(1)


def _pin_worker_threads(client) -> None:
    """Make every worker, now and later, run OpenCV single-threaded."""
    from distributed.diagnostics.plugin import WorkerPlugin

    class _OneThread(WorkerPlugin):
        name = "stackbuild-one-thread"

        def setup(self, worker):
            _single_threaded_opencv()

    client.register_plugin(_OneThread())


def _refuse_closed_port(address: str) -> None:
    """Raise at once when nothing listens at a ``tcp://host:port`` address.

    A refused connection is final, so the client's 10 s of retries would only
    delay the error; an address that does not answer at all (a firewall, a
    scheduler still starting) is left to the client and its timeout.
    """
    import socket
    from urllib.parse import urlsplit

    parts = urlsplit(address if "://" in address else f"tcp://{address}")
    try:
        host, port = parts.hostname, parts.port
    except ValueError:
        return
    if parts.scheme != "tcp" or not host or not port:
        return
    try:
        socket.create_connection((host, port), timeout=10).close()
    except ConnectionRefusedError as exc:
        raise InputError(f"cannot reach the Dask scheduler {address!r} (nothing listens there: {exc})") from None
    except OSError:
        pass


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
        When neither this nor ``workers`` is given, Dask's own setting
        ``scheduler-address`` (environment variable ``DASK_SCHEDULER_ADDRESS``)
        is used if set, as ``distributed.Client()`` does; otherwise a local
        cluster is started.
    memory_limit : str
        Memory limit per local worker (dask syntax, e.g. ``"4GiB"``).
    """
    import dask
    from distributed import Client, LocalCluster

    if scheduler is None and workers is None:
        scheduler = dask.config.get("scheduler-address", None) or None

    quiet = not logging.getLogger().isEnabledFor(logging.DEBUG)
    if quiet:
        # Importing distributed configures its loggers at INFO; its start/stop chatter is not news, and
        # a failed task's traceback or a lost worker is said once, in our words (the CLI's error line,
        # WorkerWatch), not as a multi-line dump before it. --debug shows everything.
        for name in ("distributed", "tornado"):
            logging.getLogger(name).setLevel(logging.CRITICAL)

    cluster = None
    if scheduler:
        try:
            if Path(scheduler).is_file():
                client = Client(scheduler_file=scheduler, timeout="10s")
            else:
                _refuse_closed_port(scheduler)
                client = Client(scheduler, timeout="10s")
        except OSError as exc:
            raise InputError(f"cannot reach the Dask scheduler {scheduler!r} ({exc})") from None
    else:
        n = workers or os.cpu_count() or 1
        if n < 1:
            raise InputError(f"--workers must be >= 1, got {n}")
        with dask.config.set({"distributed.nanny.pre-spawn-environ": SINGLE_THREAD_ENV}), \
                warnings.catch_warnings():
            # Another Dask process on this machine holds the default HTTP port; ours takes a free one.
            warnings.filterwarnings("ignore", message="Port .* is already in use")
            cluster = LocalCluster(n_workers=n, threads_per_worker=1, processes=True,
                                   memory_limit=memory_limit, dashboard_address=None,
                                   silence_logs=logging.CRITICAL if quiet else logging.INFO)
        client = Client(cluster)
    _pin_worker_threads(client)
    watch = WorkerWatch(client)  # a scheduler's workers, or local ones, that all die are worth a word
    try:
        yield client
    finally:
        watch.stop()
        client.close()
        if cluster is not None:
            cluster.close()


class WorkerWatch:
    """Warn (through :mod:`logging`) while a scheduler has had no workers for ``patience`` seconds.

    Tasks on a scheduler without workers simply wait, which is right while a cluster's job
    scheduler brings new workers (see ``pipelines/slurm_workers.py``), but looks like a hang
    to whoever watches the build. The warning says so, once per outage.

    A worker that leaves (killed, out of memory, its node lost, its job's walltime over) is
    one warning line naming it: Dask runs its unfinished tasks again on the others, so the
    stage carries on; Dask's own multi-line report of it is silenced (see :func:`dask_client`).
    """

    def __init__(self, client, patience: float = 60.0, every: float = 5.0):
        self._client, self._patience, self._every = client, patience, every
        self._stop = threading.Event()
        self.warnings = 0
        self.lost: list[str] = []
        self._thread = threading.Thread(target=self._run, name="stackbuild-worker-watch", daemon=True)
        self._thread.start()

    def _run(self) -> None:
        empty_since = None
        warned = False
        known: set[str] | None = None
        while not self._stop.wait(self._every):
            try:
                workers = set(self._client.scheduler_info().get("workers", {}))
            except Exception:  # the client is closing, or the scheduler is gone: nothing to say here
                continue
            for address in sorted((known or set()) - workers):
                if self._stop.is_set():
                    break
                log.warning("Dask worker %s left or was lost; Dask runs its unfinished tasks again on the "
                            "other workers", address)
                self.lost.append(address)
            known = workers
            n = len(workers)
            if n:
                empty_since, warned = None, False
                continue
            empty_since = empty_since or time.monotonic()
            if not warned and time.monotonic() - empty_since >= self._patience:
                log.warning("no Dask workers have been connected for %.0f s; the build is waiting for "
                            "workers (is the cluster job still queued or running?)", self._patience)
                warned = True
                self.warnings += 1

    def stop(self) -> None:
        """End the watch."""
        self._stop.set()
        self._thread.join(timeout=2 * self._every)


#: Tasks of one ``mapper`` call on the cluster at once. A production align round has about 180,000
#: region tasks of some 50 kB pickled each (every section's field cut to its block): all at once
#: they would hold about 9 GB in this process and as many scheduler states; 10,000 in flight keep
#: about 20 queued per core of a 512-core cluster (each task's overhead in the scheduler is 200 us
#: to 1 ms, Dask Best Practices) and bound what the driver holds (the align stage's plan,
#: align/budget.py: IN_FLIGHT_TASKS, counts the same number).
IN_FLIGHT = 10_000


def client_mapper(client, progress: Callable[[int, int], None] | None = None, in_flight: int = IN_FLIGHT):
    """Return ``mapper(fn, items)``: run ``fn`` on every item on the cluster, results in order.

    Task inputs should be small (paths, numbers, settings); each task reads
    its own data. ``items`` may be a generator: it is read as tasks are
    submitted, at most ``in_flight`` of them on the cluster at once. The first
    task error is re-raised in the caller.
    """
    from distributed import as_completed

    def mapper(fn: Callable, items: Iterable) -> list:
        total = len(items) if hasattr(items, "__len__") else None
        items = iter(items)
        announce(progress, fn)
        results: dict[int, object] = {}
        index: dict = {}
        running = as_completed(loop=client.loop)
        batch = max(1, min(1000, in_flight // 4))

        def submit() -> bool:
            chunk = list(itertools.islice(items, batch))
            if not chunk:
                return False
            for i, fut in enumerate(client.map(fn, chunk, pure=False), len(index)):
                index[fut.key] = i
                running.add(fut)
            return True

        more = True
        while more and running.count() < in_flight - batch:
            more = submit()
        for fut in running:
            results[index[fut.key]] = fut.result()
            fut.release()
            if progress:
                progress(len(results), total if total is not None else len(index))
            while more and running.count() < in_flight - batch:
                more = submit()
        return [results[i] for i in range(len(results))]

    # Dask collections (the render's pyramid graph) go to the same client.
    mapper.compute_each = lambda items, on_done: _compute_on(client, items, on_done)
    mapper.compute_stream = lambda groups, on_done: _stream_on(client, groups, on_done)
    return mapper


def serial_mapper(progress: Callable[[int, int], None] | None = None):
    """Return a mapper that runs in this process (for tests and debugging)."""
    def mapper(fn: Callable, items: Iterable) -> list:
        items = list(items)
        announce(progress, fn)
        out = []
        for i, item in enumerate(items, 1):
            out.append(fn(item))
            if progress:
                progress(i, len(items))
        return out

    mapper.compute_each = compute_locally
    return mapper


def compute_each(items: list, on_done: Callable[[int], None]) -> None:
    """Compute dask collections ``items``, calling ``on_done(i)`` as soon as item ``i`` is finished.

    On the running ``distributed`` client if there is one, else on the local
    scheduler. Stages do not call this: they use their mapper's ``compute_each``
    (:func:`client_mapper`), so the cluster is a parameter; it remains for callers
    outside a stage.
    """
    try:
        from distributed import default_client

        client = default_client()
    except (ImportError, ValueError):  # no distributed, or no client: the local scheduler
        client = None
    import dask

    if client is not None and dask.config.get("scheduler", None) in (None, "dask.distributed"):
        _compute_on(client, items, on_done)
    else:
        compute_locally(items, on_done)


def _stream_on(client, groups: Iterable[list], on_done: Callable[[int, int], None], ahead: int = 1) -> None:
    """Compute groups of dask collections on ``client``, ``ahead`` groups beyond the oldest unfinished one in flight.

    ``on_done(g, i)`` is called in this thread as item ``i`` of group ``g`` finishes. A group is
    built (``groups`` may be a generator) and submitted as soon as one before it is finished, so
    the workers start on it while the last tasks of the group before run (no idle tail between
    groups, as computing them one after the other would leave), and at most ``ahead + 1``
    groups' graphs are held at once. Earlier groups are submitted first, so the scheduler runs
    their tasks first. The first task error is re-raised in the caller.
    """
    from distributed import as_completed

    groups = iter(groups)
    running = as_completed()
    where: dict = {}
    left: dict[int, int] = {}

    def submit() -> bool:
        items = next(groups, None)
        if items is None:
            return False
        g = len(left)
        futures = client.compute(list(items))
        left[g] = len(futures)
        for i, fut in enumerate(futures):
            where[fut.key] = (g, i)
            running.add(fut)
        return True

    def fill() -> None:
        # Submit while the next group is at most ``ahead`` beyond the oldest unfinished one
        # (a later group finishing first must not let a third group in).
        oldest = next((g for g, n in left.items() if n), len(left))
        while len(left) <= oldest + ahead and submit():
            pass

    fill()
    for fut in running:
        fut.result()
        g, i = where.pop(fut.key)
        on_done(g, i)
        left[g] -= 1
        if left[g] == 0:
            fill()


def _compute_on(client, items: list, on_done: Callable[[int], None]) -> None:
    """Compute ``items`` on ``client``, calling ``on_done(i)`` in this thread as each one finishes (one group of :func:`_stream_on`)."""
    _stream_on(client, [items], lambda _group, i: on_done(i))
