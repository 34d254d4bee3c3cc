"""Local worker processes, one task each at a time; a worker that dies has its task retried."""

from __future__ import annotations

import multiprocessing
import os
import signal
from collections import deque
from multiprocessing.connection import Connection, wait
from typing import Any, Callable, Sequence

from linz_ros.executor import Execution, ExecutorSettings, Shipment, ShipmentError, TaskOutcome, call_task

__all__ = ["run_locally", "local_workers"]

#: Seconds a worker may take to leave after being told to stop.
_JOIN_SECONDS = 5.0


def local_workers(settings: ExecutorSettings, tasks: int) -> int:
    """The worker processes to start: as set, else one per core; never more than tasks.

    Parameters
    ----------
    settings : ExecutorSettings
    tasks : int

    Returns
    -------
    int
    """
    cores = len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else (os.cpu_count() or 1)
    return max(1, min(settings.workers or cores, tasks))


def _worker_main(conn: Connection, prepare: Callable[[str], Any], task: Callable[[Any, Any], Any],
                 shipment: Shipment) -> None:
    """A worker: take (index, item), send back (index, status, value) until told to stop."""
    signal.signal(signal.SIGINT, signal.SIG_IGN)      # Ctrl-C is the parent's to handle
    while True:
        try:
            message = conn.recv()
        except EOFError:
            return
        if message is None:
            return
        index, item = message
        try:
            status, value = call_task(prepare, task, shipment, item)
        except ShipmentError as err:
            status, value = "shipment", str(err)
        conn.send((index, status, value))


class _Worker:
    def __init__(self, context: Any, prepare: Callable, task: Callable, shipment: Shipment) -> None:
        self.conn, child = context.Pipe()
        self.process = context.Process(target=_worker_main, args=(child, prepare, task, shipment), daemon=True)
        self.process.start()
        child.close()
        self.index: int | None = None

    def give(self, index: int, item: Any) -> None:
        self.index = index
        self.conn.send((index, item))

    def stop(self) -> None:
        try:
            self.conn.send(None)
        except (OSError, ValueError):
            pass
        self.process.join(_JOIN_SECONDS)
        if self.process.is_alive():
            self.process.kill()
            self.process.join()
        self.conn.close()


class _Run:
    """The parent's book-keeping: pending indices, attempts, outcomes."""

    def __init__(self, items: Sequence[Any], settings: ExecutorSettings, book: Any) -> None:
        self.items = items
        self.settings = settings
        self.book = book
        self.pending: deque[int] = deque(range(len(items)))
        self.attempts = [0] * len(items)
        self.execution = Execution()
        self.started = 0          # worker processes started, replacements included

    def finish(self, outcome: TaskOutcome) -> None:
        self.book.enter(self.execution, outcome)

    def take_result(self, worker: _Worker, index: int, status: str, value: Any) -> None:
        worker.index = None
        if status == "shipment":
            raise ShipmentError(value)
        self.finish(TaskOutcome.of(index, status, value, self.attempts[index]))

    def worker_died(self, worker: _Worker) -> None:
        index, worker.index = worker.index, None
        if index is None:
            return
        code = worker.process.exitcode
        why = f"signal {-code}" if code is not None and code < 0 else f"exit code {code}"
        if self.attempts[index] >= self.settings.attempts:
            self.finish(TaskOutcome(index, lost=f"its worker process died on each of {self.attempts[index]} "
                                                f"attempt(s) (last: {why})", attempts=self.attempts[index]))
        else:
            self.pending.appendleft(index)      # retried first, on another worker

    def next_for(self, worker: _Worker) -> bool:
        if not self.pending:
            return False
        index = self.pending.popleft()
        try:
            worker.give(index, self.items[index])
        except (OSError, ValueError):         # died since it was last seen alive: the task waits for another
            worker.index = None
            self.pending.appendleft(index)
            return False
        self.attempts[index] += 1
        return True


def run_locally(prepare: Callable[[str], Any], task: Callable[[Any, Any], Any], shipment: Shipment,
                items: Sequence[Any], settings: ExecutorSettings, book: Any) -> Execution:
    """Run the tasks on local worker processes (see :func:`linz_ros.executor.run_tasks`).

    Parameters
    ----------
    prepare, task : callable
    shipment : Shipment
    items : sequence
    settings : ExecutorSettings
    book : object
        Takes each outcome as it arrives (the value to keep, the progress to say).

    Returns
    -------
    Execution
    """
    run = _Run(items, settings, book)
    count = local_workers(settings, len(items)) if items else 1
    run.execution.where, run.execution.workers = f"{count} local process{'es' if count > 1 else ''}", count
    if not items:
        return run.execution
    # spawn: a clean interpreter per worker, safe beside threads (a Dask client or a field-log writer)
    context = multiprocessing.get_context("spawn")
    workers: list[_Worker] = []
    try:
        for _ in range(count):
            worker = _Worker(context, prepare, task, shipment)
            workers.append(worker)
            run.started += 1
            run.next_for(worker)
        while run.pending or any(w.index is not None for w in workers):
            _serve(run, workers, lambda: _Worker(context, prepare, task, shipment))
    except KeyboardInterrupt:
        run.execution.interrupted = True
    finally:
        for worker in workers:
            if run.execution.interrupted or worker.index is not None:
                worker.process.kill()
            worker.stop()
    return run.execution


def _serve(run: _Run, workers: list[_Worker], new_worker: Callable[[], _Worker]) -> None:
    """Wait for the next results or deaths; hand out the next tasks; replace dead workers."""
    busy = [w for w in workers if w.index is not None]
    ready = wait([w.conn for w in busy] + [w.process.sentinel for w in busy], timeout=1.0)
    for worker in busy:
        if worker.conn in ready or (worker.process.sentinel in ready and worker.conn.poll()):
            try:
                index, status, value = worker.conn.recv()
            except (EOFError, OSError):          # died while sending
                continue
            run.take_result(worker, index, status, value)
    for worker in list(workers):
        if not worker.process.is_alive():
            run.worker_died(worker)              # its task (if any) retried or lost
            worker.stop()
            workers.remove(worker)
    while len(workers) < run.execution.workers and run.pending:
        if run.started >= run.execution.workers + run.settings.attempts * len(run.items):
            # more deaths than every task's every attempt: the processes die before taking any task
            while run.pending:
                index = run.pending.popleft()
                run.finish(TaskOutcome(index, lost="worker processes kept dying before taking a task",
                                       attempts=run.attempts[index]))
            break
        workers.append(new_worker())
        run.started += 1
    for worker in workers:
        if worker.index is None and worker.process.is_alive() and not run.next_for(worker):
            break
