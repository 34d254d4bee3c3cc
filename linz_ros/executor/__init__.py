"""Run many independent tasks on local worker processes or on a Dask cluster, losing none.

One call, :func:`run_tasks`, whatever runs them:

- **local** (the default): one worker process per core, each given one task at a time, so
  the parent always knows which task a worker held when it died;
- **dask**: a ``dask.distributed`` scheduler named by address (``--scheduler`` or the
  environment variable :data:`SCHEDULER_ENV`); optional (the ``cluster`` extra).

What every task needs in common (an artifact's text) is shipped by content once and checked
by its SHA-256 on the worker before use: no shared file system is assumed. A task that
raises a :class:`~linz_ros.errors.LinzError` was refused for its input (not retried: it
would be refused again); a task whose worker died is retried, at most ``attempts`` times in
all, and then reported lost with why. Ctrl-C stops the run and keeps what finished. The
outcomes are keyed by the task's index, so they never depend on the executor, the number of
workers or the order of completion.
"""

from __future__ import annotations

import hashlib
import os
from dataclasses import dataclass, field
from typing import Any, Callable, Sequence

from linz_ros.errors import ConfigError, LinzError

__all__ = ["ExecutorSettings", "Shipment", "TaskOutcome", "Execution", "run_tasks", "SCHEDULER_ENV",
           "DEFAULT_ATTEMPTS", "MAX_ATTEMPTS", "MAX_WORKERS", "ShipmentError", "scheduler_address"]

#: The environment variable naming a Dask scheduler (``tcp://host:8786``) when no option does.
SCHEDULER_ENV = "LINZ_DASK_SCHEDULER"
#: Attempts per task (the first run and the retries after a worker died).
DEFAULT_ATTEMPTS = 3
MAX_ATTEMPTS = 20
MAX_WORKERS = 512

#: Called with (finished, total): finished counts done, refused and lost tasks.
Progress = Callable[[int, int], None]
#: Called in this process with each finished task's outcome as it arrives; its return value is kept
#: as the outcome's value (write a large result out, keep a small one).
Keep = Callable[["TaskOutcome"], Any]


class ShipmentError(LinzError):
    """A worker received shared content whose hash differs from the one it was sent with."""


@dataclass(frozen=True)
class ExecutorSettings:
    """Where tasks run.

    Attributes
    ----------
    workers : int, optional
        Local worker processes (default: the cores of this machine). Ignored on Dask.
    scheduler : str, optional
        A Dask scheduler address; None: :data:`SCHEDULER_ENV` if set, else local processes.
    attempts : int
        Runs of one task at most, counting retries after a worker died.
    """

    workers: int | None = None
    scheduler: str | None = None
    attempts: int = DEFAULT_ATTEMPTS

    def __post_init__(self) -> None:
        if self.workers is not None and not (isinstance(self.workers, int) and 1 <= self.workers <= MAX_WORKERS):
            raise ConfigError("--workers", f"expected a whole number from 1 to {MAX_WORKERS}, got {self.workers}")
        if not (isinstance(self.attempts, int) and 1 <= self.attempts <= MAX_ATTEMPTS):
            raise ConfigError("--attempts", f"expected a whole number from 1 to {MAX_ATTEMPTS}, got {self.attempts}")
        if self.scheduler is not None and not self.scheduler.strip():
            raise ConfigError("--scheduler", "expected a scheduler address such as tcp://host:8786, got an empty one")


@dataclass(frozen=True)
class Shipment:
    """Content every task needs, sent once to each worker and checked there by its hash.

    Attributes
    ----------
    text : str
    sha256 : str
        Of ``text`` (UTF-8).
    """

    text: str
    sha256: str

    @classmethod
    def of(cls, text: str) -> "Shipment":
        """A shipment of ``text`` with its hash.

        Parameters
        ----------
        text : str

        Returns
        -------
        Shipment
        """
        return cls(text, hashlib.sha256(text.encode("utf-8", "surrogatepass")).hexdigest())

    def checked(self) -> str:
        """The text, after checking it against the hash it was sent with.

        Returns
        -------
        str

        Raises
        ------
        ShipmentError
        """
        found = hashlib.sha256(self.text.encode("utf-8", "surrogatepass")).hexdigest()
        if found != self.sha256:
            raise ShipmentError(f"shipped content arrived with SHA-256 {found[:12]}..., sent as "
                                f"{self.sha256[:12]}...: refused")
        return self.text


@dataclass
class TaskOutcome:
    """What became of one task.

    Attributes
    ----------
    index : int
    value : Any
        The task's result (None unless it finished).
    refused : str, optional
        The one line of the ``LinzError`` the task raised for its input.
    error : str, optional
        An unexpected exception of the task (a fault, not the input's): its type and message.
    lost : str, optional
        Why the task was given up after its worker died on every attempt.
    attempts : int
    """

    index: int
    value: Any = None
    refused: str | None = None
    lost: str | None = None
    attempts: int = 1
    error: str | None = None

    @classmethod
    def of(cls, index: int, status: str, value: Any, attempts: int) -> "TaskOutcome":
        """The outcome of a task that came back with ``call_task``'s status and value.

        Parameters
        ----------
        index : int
        status : {"ok", "refused", "error"}
        value : Any
        attempts : int

        Returns
        -------
        TaskOutcome
        """
        if status == "ok":
            return cls(index, value=value, attempts=attempts)
        if status == "refused":
            return cls(index, refused=value, attempts=attempts)
        return cls(index, error=value, attempts=attempts)


@dataclass
class Execution:
    """The outcomes of a run of tasks.

    Attributes
    ----------
    outcomes : dict of int -> TaskOutcome
        Finished, refused and lost tasks; tasks never started (interrupted) are absent.
    interrupted : bool
    where : str
        Said in reports (``2 local processes``, ``dask scheduler tcp://...``).
    workers : int
    """

    outcomes: dict[int, TaskOutcome] = field(default_factory=dict)
    interrupted: bool = False
    where: str = ""
    workers: int = 1


def scheduler_address(settings: ExecutorSettings) -> str | None:
    """The Dask scheduler to use: the option, else :data:`SCHEDULER_ENV`, else None (local).

    Parameters
    ----------
    settings : ExecutorSettings

    Returns
    -------
    str or None
    """
    if settings.scheduler is not None:
        return settings.scheduler.strip()
    address = os.environ.get(SCHEDULER_ENV, "").strip()
    return address or None


def run_tasks(prepare: Callable[[str], Any], task: Callable[[Any, Any], Any], shipment: Shipment,
              items: Sequence[Any], settings: ExecutorSettings | None = None,
              progress: Progress | None = None, keep: Keep | None = None) -> Execution:
    """Run ``task(prepare(shipment.text), item)`` for every item, on local processes or Dask.

    Parameters
    ----------
    prepare : callable
        A module-level function, called once per worker with the checked shipped text; its
        result is given to every task on that worker.
    task : callable
        A module-level function ``task(prepared, item) -> value`` (value and item picklable).
    shipment : Shipment
    items : sequence
        Task ``k`` takes ``items[k]``.
    settings : ExecutorSettings, optional
    progress : callable, optional
        Called with (finished, total) as tasks end.
    keep : callable, optional
        Called with each outcome that has a value, as it arrives; what it returns replaces the
        value (so a large result can be written out and dropped before the next one arrives).

    Returns
    -------
    Execution

    Raises
    ------
    ConfigError
        Dask asked for but not installed, or its scheduler not reachable.
    ShipmentError
        The shipped content arrived changed.
    """
    settings = settings or ExecutorSettings()
    address = scheduler_address(settings)
    if address is not None:
        from linz_ros.executor._dask import run_on_dask

        return run_on_dask(address, prepare, task, shipment, items, settings, _Book(progress, keep, len(items)))
    from linz_ros.executor._local import run_locally

    return run_locally(prepare, task, shipment, items, settings, _Book(progress, keep, len(items)))


class _Book:
    """Where both executors put each outcome as it arrives: the value kept, the progress said."""

    def __init__(self, progress: Progress | None, keep: Keep | None, total: int) -> None:
        self.progress, self.keep, self.total = progress, keep, total

    def enter(self, execution: Execution, outcome: TaskOutcome) -> None:
        if self.keep is not None and outcome.lost is None and outcome.refused is None and outcome.error is None:
            outcome.value = self.keep(outcome)
        execution.outcomes[outcome.index] = outcome
        if self.progress is not None:
            self.progress(len(execution.outcomes), self.total)


# ---------------------------------------------------------------- what a worker does with one task

_PREPARED: dict[tuple[str, str], Any] = {}


def call_task(prepare: Callable[[str], Any], task: Callable[[Any, Any], Any], shipment: Shipment,
              item: Any) -> tuple[str, Any]:
    """Run one task on a worker: ``("ok", value)``, ``("refused", line)`` or ``("error", line)``.

    The prepared context is kept per worker process, keyed by the shipment's hash.

    Parameters
    ----------
    prepare, task : callable
    shipment : Shipment
    item : Any

    Returns
    -------
    tuple of (str, Any)

    Raises
    ------
    ShipmentError
        Shipped content that does not match its hash.
    """
    key = (f"{prepare.__module__}.{prepare.__qualname__}", shipment.sha256)
    try:
        if key not in _PREPARED:
            _PREPARED.clear()                  # one campaign's context at a time
            _PREPARED[key] = prepare(shipment.checked())
        return "ok", task(_PREPARED[key], item)
    except ShipmentError:
        raise
    except LinzError as err:
        return "refused", str(err)
    except Exception as err:  # noqa: BLE001 - a fault of this task only, reported with it, never hidden
        return "error", f"{type(err).__name__}: {err}"
