"""Where pure tasks run: one small interface (submit / map / close) over inline, thread and process pools.

Every task the engine hands out is a pure function of picklable inputs, so an executor only decides *where*
it runs; results never depend on it.  A cluster backend (e.g. Dask's ``Client``, whose ``submit`` returns
futures with ``result()``) fits the same interface as one more executor.
"""

from __future__ import annotations

import multiprocessing
import os
import signal
import sys
import threading
import time
from collections.abc import Callable, Iterable, Iterator
from concurrent.futures import Future, ProcessPoolExecutor, ThreadPoolExecutor
from contextlib import contextmanager
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


def _quiet_worker(initializer: Callable[..., None] | None, *initargs: Any) -> None:
    """First thing in a worker process: ignore Ctrl-C (the parent handles it and shuts the pool down), then
    let signals through again and run the caller's initializer."""
    signal.signal(signal.SIGINT, signal.SIG_IGN)  # also discards a Ctrl-C held back while the worker started
    if hasattr(signal, "pthread_sigmask"):
        signal.pthread_sigmask(signal.SIG_UNBLOCK, _HELD_SIGNALS)
    threading.Thread(target=_exit_with_parent, args=(os.getppid(),), name="groupmodel-parent", daemon=True).start()
    if initializer is not None:
        initializer(*initargs)


def _exit_with_parent(parent: int) -> None:
    """End this worker when its parent is gone (killed, say): the pool would never tell it to stop."""
    while os.getppid() == parent:
        time.sleep(0.5)
    os._exit(0)


def _noop() -> None:
    return None


#: Signals held back while worker processes start: Ctrl-C, and SIGTERM (a batch system's time limit).
_HELD_SIGNALS = {signal.SIGINT, signal.SIGTERM}


@contextmanager
def _sigint_held() -> Iterator[None]:
    """Ctrl-C and SIGTERM held back (blocked, not lost) in this thread while worker processes start.

    A child inherits the blocked signals through fork and exec, so a Ctrl-C while it imports cannot print a
    traceback there; :func:`_quiet_worker` then ignores Ctrl-C for good and lets SIGTERM through again.  In the
    parent a signal stays pending (or reaches another thread) and raises as usual once it is let through: it
    can no longer cut short the data the parent writes to a starting worker (which then failed with a
    traceback, "pickle data was truncated").
    """
    if not hasattr(signal, "pthread_sigmask"):  # Windows: no signal masks (and no process-group Ctrl-C)
        yield
        return
    previous = signal.pthread_sigmask(signal.SIG_BLOCK, _HELD_SIGNALS)
    try:
        yield
    finally:
        signal.pthread_sigmask(signal.SIG_SETMASK, previous)


@contextmanager
def _main_hidden() -> Iterator[None]:
    """The caller's main module hidden from worker processes while they start.

    A "spawn" worker first re-runs the parent's main script (as ``__mp_main__``) unless it is told nothing about
    it.  A script without an ``if __name__ == "__main__":`` guard would then start the whole analysis again in
    every worker (which fails, and the parent waited forever), and a script read from standard input cannot be
    re-run at all.  The workers run only groupmodel's own functions, so they need nothing from the main module:
    its ``__spec__`` and ``__file__`` are hidden while the processes start (the only moment ``multiprocessing``
    reads them) and put back at once.
    """
    main = sys.modules.get("__main__")
    if main is None:
        yield
        return
    saved = {name: main.__dict__[name] for name in ("__spec__", "__file__") if name in main.__dict__}
    main.__dict__["__spec__"] = None
    main.__dict__.pop("__file__", None)
    try:
        yield
    finally:
        main.__dict__.pop("__spec__", None)
        main.__dict__.update(saved)


class ProcessExecutor(_Base):
    """A pool of fresh worker processes ("spawn": no inherited state, safe with threads and BLAS).

    Scripts that use it need no ``if __name__ == "__main__":`` guard, and may be read from standard input: the
    workers are started without the caller's main module (:func:`_main_hidden`).

    The workers ignore Ctrl-C (SIGINT, which a terminal sends to the whole process group): the parent gets
    it, and closing the executor shuts them down; they start at once, with Ctrl-C held back in the
    parent while they are created.

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
            initializer=_quiet_worker,
            initargs=(initializer, *initargs),
        )
        try:
            with _sigint_held(), _main_hidden():  # the pool starts one worker per task submitted while none is idle
                for _ in range(self.workers):
                    self._pool.submit(_noop)
                self._start_all()
        except BaseException:  # Ctrl-C while they start: stop the ones started
            self._pool.shutdown(wait=True, cancel_futures=True)
            raise

    def _start_all(self) -> None:
        """Start every worker now, while the main module is hidden.

        A worker that finished its start-up task before the next one was submitted takes that task too, and the
        pool would start the missing workers only later, with the main module visible again (a script without
        a main guard would then be re-run in them).  The pool's own start-up step is used for the rest; on a
        Python whose pool lacks it, the start-up tasks above are all there is.
        """
        spawn = getattr(self._pool, "_spawn_process", None)
        processes = getattr(self._pool, "_processes", None)
        lock = getattr(self._pool, "_shutdown_lock", None)
        if spawn is None or processes is None or lock is None:
            return
        with lock:
            while len(processes) < self.workers:
                spawn()

    def submit(self, fn: Callable[..., T], /, *args: Any) -> Future[T]:
        return self._pool.submit(fn, *args)

    def close(self, cancel: bool = False) -> None:
        self._pool.shutdown(wait=True, cancel_futures=cancel)


def thread_executor(workers: int, name: str = "groupmodel") -> InlineExecutor | ThreadExecutor:
    """Threads for ``workers > 1``, else the calling thread."""
    return ThreadExecutor(workers, name) if workers > 1 else InlineExecutor()
