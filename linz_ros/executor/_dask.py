"""Tasks on a Dask cluster (``dask.distributed``): the shipment scattered once, tasks retried when a worker dies.

The scheduler reschedules a task whose worker died on its own (up to its
``distributed.scheduler.allowed-failures``, 3 by default, which the client cannot set for a
cluster it did not start) and then fails it with ``KilledWorker``; any failure of the future
itself (not of the task, whose errors come back as values) counts as one of our attempts, and
the task is submitted again under a new key until ``attempts`` is reached. So on Dask a task
runs at most ``attempts`` x (allowed-failures + 1) times, and ``TaskOutcome.attempts`` counts
our submissions. Keys carry a nonce of the run, so two runs on one scheduler never share a
result. The workers need the same linz_ros installed; they need no shared files.
"""

from __future__ import annotations

from typing import Any, Callable, Sequence

from linz_ros import __version__
from linz_ros.errors import ConfigError
from linz_ros.executor import Execution, ExecutorSettings, Shipment, ShipmentError, TaskOutcome, call_task

__all__ = ["run_on_dask", "CONNECT_SECONDS"]

#: Seconds to reach the scheduler before giving up with one line.
CONNECT_SECONDS = 20.0


def _reachable(address: str) -> None:
    """A TCP scheduler address that answers a connection, else one line (before a client is made: a
    client that cannot connect leaves a traceback behind when it is collected)."""
    import socket
    from urllib.parse import urlsplit

    parts = urlsplit(address if "://" in address else f"tcp://{address}")
    if parts.scheme not in ("tcp", "tls"):
        return                     # another comm (inproc, ucx): left to dask
    try:
        host, port = parts.hostname, parts.port
    except ValueError:
        host = port = None
    if not host or not port:
        raise ConfigError("--scheduler", f"expected an address such as tcp://host:8786, got {address[:120]!r}")
    try:
        socket.create_connection((host, port), timeout=CONNECT_SECONDS).close()
    except OSError as err:
        raise ConfigError("--scheduler", f"cannot reach the Dask scheduler at {address[:120]}: "
                                         f"{err.strerror or type(err).__name__}") from None


def _client(address: str) -> Any:
    try:
        from distributed import Client
    except ImportError:
        raise ConfigError("--scheduler", "dask.distributed is not installed; install the 'cluster' extra "
                                         "(pip install 'linz_ros[cluster]')") from None
    _reachable(address)
    try:
        return Client(address, timeout=CONNECT_SECONDS, set_as_default=False)
    except (OSError, TimeoutError, ValueError, TypeError) as err:
        raise ConfigError("--scheduler", f"cannot reach the Dask scheduler at {address}: "
                                         f"{' '.join(str(err).split())[:200] or type(err).__name__}") from None


def dask_task(prepare: Callable[[str], Any], task: Callable[[Any, Any], Any], shipment: Shipment, item: Any,
              version: str) -> tuple[str, Any]:
    """One task on a Dask worker (see :func:`linz_ros.executor.call_task`), refused on another linz_ros version.

    Parameters
    ----------
    prepare, task : callable
    shipment : Shipment
    item : Any
    version : str
        The client's linz_ros version.

    Returns
    -------
    tuple of (str, Any)
    """
    if version != __version__:
        return "shipment", f"the worker runs linz_ros {__version__}, the client {version}: install the same on both"
    try:
        return call_task(prepare, task, shipment, item)
    except ShipmentError as err:
        return "shipment", str(err)


def _workers(client: Any) -> int:
    try:
        return len(client.scheduler_info().get("workers", {}))
    except Exception:  # noqa: BLE001 - only said in the report
        return 0


def run_on_dask(address: str, prepare: Callable[[str], Any], task: Callable[[Any, Any], Any], shipment: Shipment,
                items: Sequence[Any], settings: ExecutorSettings, book: Any) -> Execution:
    """Run the tasks on the Dask scheduler at ``address`` (see :func:`linz_ros.executor.run_tasks`).

    Parameters
    ----------
    address : str
    prepare, task : callable
    shipment : Shipment
    items : sequence
    settings : ExecutorSettings
    book : object
        Takes each outcome as it arrives (the value to keep, the progress to say).

    Returns
    -------
    Execution

    Raises
    ------
    ConfigError
        dask.distributed missing or the scheduler unreachable.
    ShipmentError
        The shipment arrived changed, or a worker runs another linz_ros version.
    """
    from distributed import as_completed

    import uuid

    client = _client(address)
    try:
        client.wait_for_workers(1, timeout=CONNECT_SECONDS)
    except Exception:  # noqa: BLE001 - a timeout, whatever dask names it
        client.close()
        raise ConfigError("--scheduler", f"the Dask scheduler at {address[:120]} has no workers "
                                         f"(none joined within {CONNECT_SECONDS:g} s)") from None
    execution = Execution(where=f"dask scheduler {address}", workers=_workers(client))
    run = uuid.uuid4().hex[:12]       # keys of this run only: another run on the scheduler never shares them
    attempts = [0] * len(items)
    futures: dict[Any, int] = {}
    shared: list[Any] = []

    def shipped() -> Any:
        # every worker holds a copy; when the workers holding it all died the scheduler forgets it
        # (and cancels the tasks that needed it): send it again before the next submission
        if not shared or shared[0].status != "finished":
            try:
                shared[:] = [client.scatter(shipment, broadcast=True, hash=False, timeout=CONNECT_SECONDS)]
            except Exception as err:  # noqa: BLE001 - no worker left to hold it
                raise _NoWorkers(f"{type(err).__name__}: {str(err)[:160]}") from None
        return shared[0]

    try:
        def submit(index: int) -> Any:
            attempts[index] += 1
            future = client.submit(dask_task, prepare, task, shipped(), items[index], __version__, pure=False,
                                   key=f"linz-task-{run}-{index}-{attempts[index]}")
            futures[future] = index
            return future

        pending = as_completed([submit(k) for k in range(len(items))], loop=client.loop)
        for future in pending:
            index = futures.pop(future)
            try:
                status, value = future.result()
            except Exception as err:  # noqa: BLE001 - the worker or the connection failed, not the task
                if attempts[index] < settings.attempts:
                    pending.add(submit(index))
                    continue
                book.enter(execution, TaskOutcome(index, lost=f"failed on the cluster on each of {attempts[index]} "
                                                              f"attempt(s) (last: {type(err).__name__}: "
                                                              f"{str(err)[:160]})", attempts=attempts[index]))
            else:
                if status == "shipment":
                    raise ShipmentError(value)
                book.enter(execution, TaskOutcome.of(index, status, value, attempts[index]))
    except KeyboardInterrupt:
        execution.interrupted = True
    except _NoWorkers as why:          # every task not finished is lost, and said so; the finished ones are kept
        for index in range(len(items)):
            if index not in execution.outcomes:
                book.enter(execution, TaskOutcome(index, lost=f"the cluster had no worker left to run it ({why})",
                                                  attempts=attempts[index]))
    finally:
        if futures:
            client.cancel(list(futures))
        client.close()
    return execution


class _NoWorkers(Exception):
    """The shipment could not be placed on any worker."""
