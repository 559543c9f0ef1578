"""Where pure tasks run: one small interface (submit / map / close) over inline, thread and process pools.

Every task the engine hands out is a pure function of picklable inputs, so an executor only decides *where*
it runs; results never depend on it.  A cluster backend (e.g. Dask's ``Client``, whose ``submit`` returns
futures with ``result()``) fits the same interface as one more executor.
"""

from __future__ import annotations

import multiprocessing
from collections.abc import Callable, Iterable
from concurrent.futures import Future, ProcessPoolExecutor, ThreadPoolExecutor
from typing import Any, Protocol, TypeVar

__all__ = ["Executor", "InlineExecutor", "ProcessExecutor", "ThreadExecutor", "thread_executor"]

T = TypeVar("T")


class Executor(Protocol):
    """What the engine needs of a place to run tasks."""

    @property
    def workers(self) -> int:
        """Tasks that may run at once."""
        ...

    def submit(self, fn: Callable[..., T], /, *args: Any) -> Future[T]: ...

    def map(self, fn: Callable[..., T], *iterables: Iterable[Any]) -> list[T]: ...

    def close(self, cancel: bool = False) -> None: ...


class _Base:
    """``map`` (results in order) and the context-manager protocol, on top of ``submit`` and ``close``."""

    def submit(self, fn: Callable[..., T], /, *args: Any) -> Future[T]:
        raise NotImplementedError

    def close(self, cancel: bool = False) -> None:
        raise NotImplementedError

    def map(self, fn: Callable[..., T], *iterables: Iterable[Any]) -> list[T]:
        """``fn`` over the zipped iterables; the results in order (the first failure is raised)."""
        futures = [self.submit(fn, *args) for args in zip(*iterables, strict=True)]
        return [f.result() for f in futures]

    def __enter__(self) -> Any:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close(cancel=exc[0] is not None)


class InlineExecutor(_Base):
    """Runs each task at once in the calling thread (one worker); ``submit`` returns a finished future."""

    workers = 1

    def submit(self, fn: Callable[..., T], /, *args: Any) -> Future[T]:
        future: Future[T] = Future()
        try:
            future.set_result(fn(*args))
        except BaseException as error:  # handed to the caller through result(), as a pool would
            future.set_exception(error)
        return future

    def close(self, cancel: bool = False) -> None:
        return None


class ThreadExecutor(_Base):
    """A pool of threads (numpy and BLAS release the GIL, so threads share the cores)."""

    def __init__(self, workers: int, name: str = "groupmodel") -> None:
        self.workers = int(workers)
        self._pool = ThreadPoolExecutor(self.workers, thread_name_prefix=name)

    def submit(self, fn: Callable[..., T], /, *args: Any) -> Future[T]:
        return self._pool.submit(fn, *args)

    def close(self, cancel: bool = False) -> None:
        self._pool.shutdown(wait=True, cancel_futures=cancel)


class ProcessExecutor(_Base):
    """A pool of fresh worker processes ("spawn": no inherited state, safe with threads and BLAS).

    Parameters
    ----------
    workers : int
    initializer : callable, optional
        Run once in each worker, with ``initargs`` (e.g. to install data every task needs, shipped once).
    initargs : tuple
    """

    def __init__(self, workers: int, initializer: Callable[..., None] | None = None, initargs: tuple = ()) -> None:
        self.workers = int(workers)
        self._pool = ProcessPoolExecutor(
            max_workers=self.workers,
            mp_context=multiprocessing.get_context("spawn"),
            initializer=initializer,
            initargs=initargs,
        )

    def submit(self, fn: Callable[..., T], /, *args: Any) -> Future[T]:
        return self._pool.submit(fn, *args)

    def close(self, cancel: bool = False) -> None:
        self._pool.shutdown(wait=True, cancel_futures=cancel)


def thread_executor(workers: int, name: str = "groupmodel") -> InlineExecutor | ThreadExecutor:
    """Threads for ``workers > 1``, else the calling thread."""
    return ThreadExecutor(workers, name) if workers > 1 else InlineExecutor()
