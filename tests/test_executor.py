"""The executor: local worker processes and a Dask cluster give the same outcomes, losing no task."""

from __future__ import annotations

import os
import signal
import threading
import time

import pytest

from linz_ros.errors import ConfigError
from linz_ros.executor import (SCHEDULER_ENV, ExecutorSettings, Shipment, ShipmentError, call_task, run_tasks,
                               scheduler_address)
from support import executor_prepare, executor_task


def test_every_task_comes_back_under_its_index_with_the_shipped_context():
    execution = run_tasks(executor_prepare, executor_task, Shipment.of("arm"), list(range(7)),
                          ExecutorSettings(workers=2))
    assert execution.where == "2 local processes" and not execution.interrupted
    assert {k: o.value for k, o in execution.outcomes.items()} == {k: ("ARM", k) for k in range(7)}


def test_a_user_error_is_refused_once_and_a_dying_worker_is_retried_then_lost():
    execution = run_tasks(executor_prepare, executor_task, Shipment.of("x"), [1, -1, -2, 3],
                          ExecutorSettings(workers=2, attempts=2))
    refused, lost = execution.outcomes[1], execution.outcomes[2]
    assert refused.refused == "item: refused for its input" and refused.attempts == 1
    assert lost.value is None and lost.attempts == 2
    assert lost.lost == "its worker process died on each of 2 attempt(s) (last: exit code 7)"
    assert execution.outcomes[0].value == ("X", 1) and execution.outcomes[3].value == ("X", 3)


def test_a_worker_killed_while_holding_a_task_loses_nothing(tmp_path):
    """kill -9 of the worker holding task 0: the task runs again on a new worker and finishes."""
    release = tmp_path / "release"
    items = [("wait", str(release))] + list(range(1, 6))
    holders: list[int] = []

    def kill_the_holder_then_release() -> None:
        deadline = time.monotonic() + 60
        while time.monotonic() < deadline and len(holders) < 2:
            found = sorted(int(p.name.split(".")[1]) for p in tmp_path.glob("release.*.pid"))
            new = [pid for pid in found if pid not in holders]
            if new and not holders:
                os.kill(new[0], signal.SIGKILL)      # the worker holding task 0, mid-task
                holders.append(new[0])
            elif new:
                holders.append(new[0])               # task 0 again, on a new worker
            time.sleep(0.02)
        release.touch()

    killer = threading.Thread(target=kill_the_holder_then_release)
    killer.start()
    execution = run_tasks(executor_prepare, executor_task, Shipment.of("k"), items, ExecutorSettings(workers=2))
    killer.join()
    assert len(holders) == 2, holders
    assert sorted(execution.outcomes) == list(range(6))
    assert all(o.lost is None and o.refused is None for o in execution.outcomes.values())
    assert execution.outcomes[0].attempts == 2
    assert execution.outcomes[0].value == ("K", str(release), holders[1])
    assert [execution.outcomes[k].value for k in range(1, 6)] == [("K", k) for k in range(1, 6)]


def test_each_result_is_handed_over_as_it_arrives_and_what_is_kept_replaces_it():
    seen = []

    def keep(outcome):
        seen.append(outcome.index)
        return len(outcome.value[0])          # the large value written out, a small one kept

    execution = run_tasks(executor_prepare, executor_task, Shipment.of("abc"), [1, -1, 2], ExecutorSettings(workers=2),
                          keep=keep)
    assert sorted(seen) == [0, 2]             # the refused task has no value to keep
    assert execution.outcomes[0].value == 3 and execution.outcomes[1].refused and execution.outcomes[2].value == 3


def test_an_unexpected_error_of_a_task_is_an_error_not_a_refusal():
    execution = run_tasks(executor_prepare, executor_task, Shipment.of("x"), [1, "boom"], ExecutorSettings(workers=1))
    boom = execution.outcomes[1]
    assert boom.refused is None and boom.value is None and boom.error.startswith("TypeError: ")
    assert execution.outcomes[0].value == ("X", 1)


def test_changed_content_is_refused_by_its_hash():
    forged = Shipment("the text", Shipment.of("another text").sha256)
    with pytest.raises(ShipmentError, match="arrived with SHA-256"):
        call_task(executor_prepare, executor_task, forged, 1)
    with pytest.raises(ShipmentError):
        run_tasks(executor_prepare, executor_task, forged, [1, 2], ExecutorSettings(workers=1))


def test_settings_are_checked_and_the_scheduler_comes_from_the_option_or_the_environment(monkeypatch):
    with pytest.raises(ConfigError, match="--workers"):
        ExecutorSettings(workers=0)
    with pytest.raises(ConfigError, match="--attempts"):
        ExecutorSettings(attempts=0)
    with pytest.raises(ConfigError, match="--scheduler"):
        ExecutorSettings(scheduler=" ")
    monkeypatch.setenv(SCHEDULER_ENV, "tcp://10.0.0.5:8786")
    assert scheduler_address(ExecutorSettings()) == "tcp://10.0.0.5:8786"
    assert scheduler_address(ExecutorSettings(scheduler="tcp://h:1")) == "tcp://h:1"
    monkeypatch.delenv(SCHEDULER_ENV)
    assert scheduler_address(ExecutorSettings()) is None


def test_an_unreachable_scheduler_is_one_line():
    pytest.importorskip("distributed")
    from linz_ros.executor import _dask

    previous, _dask.CONNECT_SECONDS = _dask.CONNECT_SECONDS, 1.0
    try:
        with pytest.raises(ConfigError, match="cannot reach the Dask scheduler at tcp://127.0.0.1:9: Connection refused"):
            run_tasks(executor_prepare, executor_task, Shipment.of("x"), [1], ExecutorSettings(scheduler="tcp://127.0.0.1:9"))
    finally:
        _dask.CONNECT_SECONDS = previous


def test_a_scheduler_without_workers_is_one_line():
    distributed = pytest.importorskip("distributed")
    from linz_ros.executor import _dask

    previous, _dask.CONNECT_SECONDS = _dask.CONNECT_SECONDS, 1.0
    try:
        with distributed.LocalCluster(n_workers=0, processes=False, dashboard_address=None,
                                      silence_logs=50) as empty:
            with pytest.raises(ConfigError, match="has no workers"):
                run_tasks(executor_prepare, executor_task, Shipment.of("x"), [1],
                          ExecutorSettings(scheduler=empty.scheduler_address))
    finally:
        _dask.CONNECT_SECONDS = previous


@pytest.fixture(scope="module")
def cluster():
    distributed = pytest.importorskip("distributed")
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True, dashboard_address=None,
                                  silence_logs=50) as running:
        yield running


def test_a_dask_cluster_gives_the_same_outcomes_as_local_processes(cluster):
    items = [1, -1, 2, 3, 4]
    local = run_tasks(executor_prepare, executor_task, Shipment.of("same"), items, ExecutorSettings(workers=2))
    remote = run_tasks(executor_prepare, executor_task, Shipment.of("same"), items,
                       ExecutorSettings(scheduler=cluster.scheduler_address))
    assert remote.where == f"dask scheduler {cluster.scheduler_address}" and remote.workers == 2
    assert {k: (o.value, o.refused) for k, o in remote.outcomes.items()} == \
        {k: (o.value, o.refused) for k, o in local.outcomes.items()}


def test_two_runs_at_once_on_one_scheduler_each_get_their_own_results(cluster):
    """Same shipment, same indices, different items: results never cross between runs."""
    outcomes = {}

    def run(name, items):
        outcomes[name] = run_tasks(executor_prepare, executor_task, Shipment.of("same"), items,
                                   ExecutorSettings(scheduler=cluster.scheduler_address))

    threads = [threading.Thread(target=run, args=(name, items)) for name, items in
               (("a", [10, 11, 12, 13]), ("b", [20, 21, 22, 23]))]
    for thread in threads:
        thread.start()
    for thread in threads:
        thread.join()
    assert [outcomes["a"].outcomes[k].value for k in range(4)] == [("SAME", 10 + k) for k in range(4)]
    assert [outcomes["b"].outcomes[k].value for k in range(4)] == [("SAME", 20 + k) for k in range(4)]


def test_a_task_that_kills_every_dask_worker_is_reported_lost(cluster):
    """Alone on the cluster (a task queued beside it on a dying worker shares its fate in Dask's count of
    suspicious tasks): given up after the scheduler's own retries and our one attempt (KilledWorker, or
    cancelled when every worker holding the shipment died); the cluster works on, the shipment sent again."""
    execution = run_tasks(executor_prepare, executor_task, Shipment.of("d"), [-2],
                          ExecutorSettings(scheduler=cluster.scheduler_address, attempts=1))
    assert execution.outcomes[0].lost.startswith("failed on the cluster on each of 1 attempt(s) (last: ")
    after = run_tasks(executor_prepare, executor_task, Shipment.of("d"), [1, 2],
                      ExecutorSettings(scheduler=cluster.scheduler_address))
    assert [after.outcomes[k].value for k in range(2)] == [("D", 1), ("D", 2)]
