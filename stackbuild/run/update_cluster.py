"""Where an update runs: in this process when it is small, else on a Dask cluster.

Starting worker processes costs seconds; a small update (a few re-imaged tiles: a few
pairs, a few shards, the report's changed sections) is done sooner in this process.
:func:`in_process` decides, :func:`update_mappers` and :func:`inset_mappers` give the
mappers and progress bars of the steps (:class:`StepMappers`) for that choice.
"""
from __future__ import annotations

import contextlib

from .update_plan import UpdatePlan

#: An update replacing or adding at most this many tiles runs in this process ...
IN_PROCESS_TILES = 16
#: ... and re-stitching reads at most this many tiles (the new ones and the tiles they overlap).
IN_PROCESS_SECTION_TILES = 100
#: Appended sections of at most this many tile pixels in all also run in this process. Measured with
#: tests/benchmarks/bench_update.py: 2 sections of 3 x 3 tiles of 384 px (2.7 MP) appended to 20 took
#: 8.0 s in this process against 16.5 s on a 2-worker cluster (5.2 s of it starting the workers; one
#: run each on a loaded machine).
IN_PROCESS_APPENDED_PIXELS = 8_000_000


class StepMappers:
    """Mappers and progress bars for an update's steps: on a Dask cluster, or in this process.

    ``mappers(name)`` returns a mapper whose progress shows as ``name`` (none without a name);
    ``mappers.bar(name)`` a progress bar. ``where`` says which, for the summary.
    """

    def __init__(self, client, show: bool):
        self.client, self.show = client, show
        self.where = "in this process" if client is None else "on the Dask cluster"

    def bar(self, name: str):
        from .progress import ProgressBar

        return ProgressBar(name, self.show)

    def __call__(self, name: str | None = None):
        from .cluster import client_mapper, serial_mapper

        bar = self.bar(name) if name else None
        return serial_mapper(bar) if self.client is None else client_mapper(self.client, bar)


def in_process(plan: UpdatePlan, scheduler) -> bool:
    """Return True if the update is small enough to run in this process (no cluster is started).

    Small: at most :data:`IN_PROCESS_TILES` replaced or added tiles, at most
    :data:`IN_PROCESS_SECTION_TILES` tiles read to register their pairs again (the new tiles and
    those they overlap) and appended sections of at most :data:`IN_PROCESS_APPENDED_PIXELS` tile
    pixels, so its work (those pairs, a few sections stitched and aligned, a few shards, the report's
    changed sections) takes less time than starting worker processes. A given ``scheduler`` is always used.
    """
    appended = plan.facts.get("appended_pixels", None if plan.added else 0)
    return scheduler is None and appended is not None and appended <= IN_PROCESS_APPENDED_PIXELS and \
        sum(len(v) for v in plan.replaced.values()) <= IN_PROCESS_TILES and \
        plan.facts.get("restitched_tiles", 0) <= IN_PROCESS_SECTION_TILES


@contextlib.contextmanager
def _mappers(local: bool, workers, scheduler, show: bool):
    """Yield :class:`StepMappers` for this process when ``local``, else for a Dask cluster."""
    from .cluster import dask_client

    if local:
        yield StepMappers(None, show)
        return
    with dask_client(workers, scheduler) as client:
        yield StepMappers(client, show)


def update_mappers(plan: UpdatePlan, workers, scheduler, show: bool):
    """Return the context of an update's :class:`StepMappers`: this process when it is small, else a cluster."""
    return _mappers(in_process(plan, scheduler), workers, scheduler, show)


def inset_mappers(n_tiles: int, workers, scheduler, show: bool):
    """Return the context of an inset's :class:`StepMappers` for ``n_tiles`` tiles: this process when it has at
    most :data:`IN_PROCESS_TILES` tiles and no scheduler is given, else a Dask cluster."""
    return _mappers(scheduler is None and n_tiles <= IN_PROCESS_TILES, workers, scheduler, show)
