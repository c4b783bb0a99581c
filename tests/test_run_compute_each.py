"""compute_each: one graph, a callback per finished item, locally and on a distributed client."""
from __future__ import annotations

import time

import dask
import pytest

from stackbuild.run.cluster import compute_each


def _slow(i: int) -> int:
    time.sleep(0.05 * (3 - i))  # item 2 finishes first when run in parallel
    return i


def _items():
    return [dask.delayed(_slow)(i, dask_key_name=f"item-{i}") for i in range(3)]


@pytest.mark.parametrize("scheduler", ["sync", "threads"])
def test_every_item_is_reported_once_locally(scheduler):
    seen = []
    with dask.config.set(scheduler=scheduler):
        compute_each(_items(), seen.append)
    assert sorted(seen) == [0, 1, 2]


def test_items_are_reported_as_they_finish_on_a_client():
    from distributed import Client, LocalCluster

    with LocalCluster(n_workers=1, threads_per_worker=3, processes=False, dashboard_address=None) as cluster, \
            Client(cluster):
        seen = []
        compute_each(_items(), seen.append)
    assert sorted(seen) == [0, 1, 2] and seen[0] == 2


def test_a_task_error_reaches_the_caller():
    def boom():
        raise ValueError("bad tile")

    with dask.config.set(scheduler="sync"), pytest.raises(ValueError, match="bad tile"):
        compute_each([dask.delayed(boom)()], lambda i: None)


def test_a_scheduler_without_workers_is_reported(caplog):
    from distributed import Client, LocalCluster

    from stackbuild.run.cluster import WorkerWatch

    with LocalCluster(n_workers=0, processes=False, dashboard_address=None) as cluster, Client(cluster) as client:
        with caplog.at_level("WARNING", logger="stackbuild.run.cluster"):
            watch = WorkerWatch(client, patience=0.3, every=0.1)
            time.sleep(1.0)
            watch.stop()
    assert watch.warnings == 1  # once per outage, not every check
    assert "no Dask workers have been connected" in caplog.text


def test_a_scheduler_with_workers_is_not_reported():
    from distributed import Client, LocalCluster

    from stackbuild.run.cluster import WorkerWatch

    with LocalCluster(n_workers=1, processes=False, dashboard_address=None) as cluster, Client(cluster) as client:
        watch = WorkerWatch(client, patience=0.2, every=0.1)
        time.sleep(0.6)
        watch.stop()
    assert watch.warnings == 0


def test_groups_stream_through_a_client_with_one_group_ahead():
    from distributed import Client, LocalCluster

    from stackbuild.run.cluster import client_mapper

    built = []

    def groups():
        for g in range(4):
            built.append(g)
            yield [dask.delayed(_slow)(i, dask_key_name=f"group-{g}-item-{i}") for i in range(3)]

    seen = []
    with LocalCluster(n_workers=1, threads_per_worker=3, processes=False, dashboard_address=None) as cluster, \
            Client(cluster) as client:
        client_mapper(client).compute_stream(groups(), lambda g, i: seen.append((g, i, len(built))))
    assert sorted((g, i) for g, i, _ in seen) == [(g, i) for g in range(4) for i in range(3)]
    # The next group is built and submitted while one runs, never more than one ahead.
    assert all(n <= g + 2 for g, _, n in seen) and any(n == g + 2 for g, _, n in seen if g < 2)


def _sleep(seconds: float) -> float:
    time.sleep(seconds)
    return seconds


def test_a_later_group_finishing_first_lets_no_third_group_in():
    """Group 1 finishes while group 0 still runs: group 2 waits for group 0 (seen as a flaky failure under load)."""
    from distributed import Client, LocalCluster

    from stackbuild.run.cluster import client_mapper

    built = []

    def groups():
        for g, seconds in enumerate((0.6, 0.01, 0.01)):
            built.append(g)
            yield [dask.delayed(_sleep)(seconds, dask_key_name=f"late-{g}")]

    seen = []
    with LocalCluster(n_workers=1, threads_per_worker=2, processes=False, dashboard_address=None) as cluster, \
            Client(cluster) as client:
        client_mapper(client).compute_stream(groups(), lambda g, i: seen.append((g, len(built))))
    assert [g for g, _ in seen] == [1, 0, 2]
    assert dict(seen)[1] == 2  # when group 1 finished, group 0 was still running: nothing more was built


def test_a_task_error_in_a_streamed_group_reaches_the_caller():
    from distributed import Client, LocalCluster

    from stackbuild.run.cluster import client_mapper

    def boom():
        raise ValueError("bad tile")

    groups = [[dask.delayed(_slow)(0, dask_key_name="fine")], [dask.delayed(boom)(dask_key_name="boom")]]
    with LocalCluster(n_workers=1, threads_per_worker=1, processes=False, dashboard_address=None) as cluster, \
            Client(cluster) as client, pytest.raises(ValueError, match="bad tile"):
        client_mapper(client).compute_stream(iter(groups), lambda g, i: None)


def _square(x: int) -> int:
    return x * x


def test_client_mapper_reads_a_generator_with_a_bounded_number_of_tasks_in_flight():
    """Results come back in order, and no more than ``in_flight`` items are drawn ahead of the results
    (a production align round has about 180,000 tasks: all at once they would not fit the driver)."""
    from distributed import Client, LocalCluster

    from stackbuild.run.cluster import client_mapper

    drawn, ahead = [], []

    def items():
        for i in range(40):
            drawn.append(i)
            yield i

    with LocalCluster(n_workers=1, threads_per_worker=2, processes=False, dashboard_address=None) as cluster, \
            Client(cluster) as client:
        mapper = client_mapper(client, lambda done, total: ahead.append(len(drawn) - done), in_flight=6)
        assert mapper(_square, items()) == [i * i for i in range(40)]
        assert mapper(_square, []) == []
    assert len(ahead) == 40 and max(ahead) <= 6
