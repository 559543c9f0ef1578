"""A Dask cluster as one more executor: the same interface (``workers``, ``submit``, ``map``, ``close``).

Dask (``dask.distributed``) is an optional extra (``pip install "groupmodel[cluster]"``); it is imported
only here, and only when a scheduler is asked for, so a run without one never loads it.  The scheduler
decides where each task runs and reruns the tasks of a worker that is lost; the tasks the engine hands out
are pure functions of their inputs, so a rerun returns the same result.
"""

from __future__ import annotations

import logging
import warnings
from collections.abc import Callable, Iterable, Iterator
from typing import Any, TypeVar

from ..errors import InputError
from .executors import _Base

__all__ = ["CONNECT_TIMEOUT", "DaskExecutor", "dask_executor", "open_scheduler"]

T = TypeVar("T")

#: Seconds to wait for a scheduler to answer.
CONNECT_TIMEOUT = 20.0
#: The one line for a scheduler asked for without Dask installed.
NO_DASK = ('--scheduler needs Dask, which is not installed; install it with pip install "groupmodel[cluster]" '
           "(dask[distributed]), or leave out --scheduler to run on this machine")


def _distributed() -> Any:
    try:
        import distributed
    except ImportError:
        raise InputError(NO_DASK) from None
    return distributed


class DaskExecutor(_Base):
    """Tasks on the workers of a ``dask.distributed.Client``.

    Parameters
    ----------
    client : distributed.Client
    owned : object, optional
        A cluster started for this executor (closed with it, as is then the client).
    asked : str, optional
        The ``--scheduler`` value it was opened with (for the run record).
    """

    def __init__(self, client: Any, owned: Any = None, asked: str | None = None) -> None:
        self.client, self._owned, self.asked = client, owned, asked

    def record(self) -> dict[str, Any]:
        """The scheduler as asked for (``local:N`` or an address), its address and its workers now."""
        info = self.client.scheduler_info(n_workers=-1)
        workers = info.get("workers", {})
        return {"asked": self.asked, "address": str(info.get("address", "")), "workers": len(workers),
                "worker_threads": sum(int(w.get("nthreads", 1)) for w in workers.values())}

    @property
    def workers(self) -> int:
        """Threads of all workers now connected (at least 1)."""
        info = self.client.scheduler_info(n_workers=-1)["workers"]
        return max(1, sum(int(w.get("nthreads", 1)) for w in info.values()))

    def submit(self, fn: Callable[..., T], /, *args: Any, near: str | None = None) -> Any:
        """A ``distributed.Future`` (its ``result()`` as with concurrent.futures); futures among ``args`` are
        passed to the task as their results, worker to worker.  ``near``: a worker address the task should
        preferably run on (where its data may be cached); any other worker may take it."""
        if near is None:
            return self.client.submit(fn, *args, pure=False)
        return self.client.submit(fn, *args, pure=False, workers=[near], allow_other_workers=True)

    def addresses(self) -> list[str]:
        """The addresses of the workers now connected, sorted."""
        return sorted(self.client.scheduler_info(n_workers=-1)["workers"])

    def put(self, value: Any) -> Any:
        """A future holding ``value``, to pass to many tasks instead of the value (sent once to the cluster,
        then worker to worker).  It is a task, not scattered data: the scheduler keeps the value and makes
        it again on another worker when the worker holding it is lost."""
        with warnings.catch_warnings():  # "large object in task graph": meant, it is sent once
            warnings.simplefilter("ignore", UserWarning)
            return self.client.submit(_value, value, pure=False)

    def first_done(self, futures: list[Any]) -> list[Any]:
        """Waits until one of ``futures`` is finished; those finished so far, in the order of ``futures`` (so
        that a task is taken before the tasks submitted after it that finished with it)."""
        done, _ = _distributed().wait(futures, return_when="FIRST_COMPLETED")
        return [f for f in futures if f in done]

    def cancel(self, futures: list[Any]) -> None:
        self.client.cancel(futures)

    def on_every_worker(self, fn: Callable[..., T], *args: Any) -> dict[str, T]:
        """``fn(*args)`` on every worker: worker address -> result."""
        return self.client.run(fn, *args)

    def completed(self, futures: Iterable[Any]) -> Iterator[Any]:
        """The futures as they finish."""
        return iter(_distributed().as_completed(list(futures)))

    def close(self, cancel: bool = False) -> None:
        if self._owned is not None:
            self.client.close()
            self._owned.close()
            self._owned = None


def _value(value: T) -> T:
    return value


def dask_executor(client: Any) -> DaskExecutor:
    """A :class:`DaskExecutor` on a user's ``distributed.Client`` (left open), or the executor itself."""
    return client if isinstance(client, DaskExecutor) else DaskExecutor(client)


def open_scheduler(address: str, timeout: float | None = None) -> DaskExecutor:
    """Connect to ``tcp://host:port`` (any Dask address), or start ``local:N``, a LocalCluster of N worker
    processes with one thread each.  Close the executor when done.

    Raises
    ------
    InputError
        Dask is not installed, the address is malformed, or no scheduler answered within ``timeout``.
    """
    distributed = _distributed()
    timeout = CONNECT_TIMEOUT if timeout is None else timeout
    if address.startswith("local:"):
        count = address.removeprefix("local:")
        if not count.isdigit() or int(count) < 1:
            raise InputError(f"--scheduler {address}: expected local:N with N >= 1 worker processes, e.g. local:4")
        import dask

        # Dask's sampling profiler (a thread looking at the task's stack every 10 ms) slows the many small
        # numpy calls of the tasks on a busy machine; the workers started here go without it.
        with dask.config.set({"distributed.worker.profile.enabled": False}):
            cluster = distributed.LocalCluster(n_workers=int(count), threads_per_worker=1, processes=True,
                                               dashboard_address=":0", silence_logs=logging.ERROR)
        return DaskExecutor(distributed.Client(cluster), owned=cluster, asked=address)
    if "://" not in address:
        raise InputError(f"--scheduler {address}: expected a scheduler address such as tcp://host:8786, or local:N")
    try:
        client = distributed.Client(address, timeout=timeout)
    except (OSError, TimeoutError, ValueError) as exc:
        raise InputError(f"--scheduler {address}: no Dask scheduler answered within {timeout:g} s "
                         f"({type(exc).__name__}); start one (dask scheduler) or fix the address") from None
    return DaskExecutor(client, owned=_ClientOnly(client), asked=address)


class _ClientOnly:
    """What an executor connected to a running scheduler owns: only its client."""

    def __init__(self, client: Any) -> None:
        self.client = client

    def close(self) -> None:
        return None
