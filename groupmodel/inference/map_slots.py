"""Batches of statistic maps carried to worker processes through files in shared memory, not pickles.

A batch of maps for TFCE or cluster nulls is about 92 MB (50 maps of 230,591 float64 values).  Sent as an
argument, it is copied, pickled, written to a pipe, read and unpickled: four copies into fresh memory per
batch.  :class:`MapSlots` keeps a few reusable files in ``/dev/shm`` (memory, not disk), mapped by the
main process and by the workers: a batch is copied once into a free slot and the worker reads it in place.
The values are the same bits, so the results are the same.

Where there is no ``/dev/shm`` (or it cannot be written, or a batch does not fit the slots), the maps go
as pickles as before.  The files are removed when the workers are closed (also after an error or Ctrl-C);
only a process killed outright leaves them behind (``/dev/shm/groupmodel-maps-*``).
"""

from __future__ import annotations

import os
import shutil
import tempfile
import threading
from dataclasses import dataclass
from typing import Any

import numpy as np

from .map_tasks import MapSpec, worker_nulls

__all__ = ["MapSlots", "SlotRef", "slot_nulls"]

#: Where the slot files are made (memory-backed on Linux).
SHARED_DIR = "/dev/shm"


@dataclass(frozen=True)
class SlotRef:
    """A batch of maps in a slot file: the file, its capacity (rows, cols) and the rows used."""

    path: str
    capacity: int
    cols: int
    rows: int


class MapSlots:
    """Reusable slot files of ``capacity`` maps of ``cols`` values each, at most ``limit`` of them; a slot is
    taken by :meth:`put` and given back by :meth:`release` (when its task is done)."""

    def __init__(self, folder: str, capacity: int, cols: int, limit: int) -> None:
        self.folder, self.capacity, self.cols, self.limit = folder, capacity, cols, limit
        self._arrays: dict[str, np.ndarray] = {}
        self._free: list[str] = []
        self._cond = threading.Condition()

    @classmethod
    def create(cls, capacity: int, cols: int, limit: int) -> MapSlots | None:
        """Slots in ``/dev/shm``, or None where it is not available."""
        if not os.path.isdir(SHARED_DIR) or not os.access(SHARED_DIR, os.W_OK):
            return None
        try:
            folder = tempfile.mkdtemp(prefix="groupmodel-maps-", dir=SHARED_DIR)
        except OSError:
            return None
        return cls(folder, capacity, cols, limit)

    def fits(self, maps: np.ndarray) -> bool:
        return maps.ndim == 2 and maps.shape[0] <= self.capacity and maps.shape[1] == self.cols

    def put(self, maps: np.ndarray) -> SlotRef | None:
        """Copy the maps into a free slot (waiting for one when all are taken); None when a new slot file
        cannot be made (no space): the caller sends the maps as a pickle."""
        with self._cond:
            while not self._free and len(self._arrays) >= self.limit:
                self._cond.wait()
            path = self._free.pop() if self._free else self._new()
        if path is None:
            return None
        self._arrays[path][: maps.shape[0]] = maps
        return SlotRef(path, self.capacity, self.cols, int(maps.shape[0]))

    def _new(self) -> str | None:
        path = os.path.join(self.folder, f"slot{len(self._arrays)}")
        nbytes = 8 * self.capacity * self.cols
        try:
            fd = os.open(path, os.O_RDWR | os.O_CREAT | os.O_EXCL, 0o600)
            try:
                # Reserve the memory now: a full /dev/shm fails here (ENOSPC), not later at a page touch.
                os.posix_fallocate(fd, 0, nbytes)
            finally:
                os.close(fd)
            array = np.memmap(path, dtype=np.float64, mode="r+", shape=(self.capacity, self.cols))
        except (OSError, AttributeError):  # AttributeError: no posix_fallocate on this system
            return None
        self._arrays[path] = array
        return path

    def release(self, ref: SlotRef, *_: Any) -> None:
        with self._cond:
            self._free.append(ref.path)
            self._cond.notify()

    def close(self) -> None:
        """Remove the files (after the workers are done with them)."""
        self._arrays.clear()
        self._free.clear()
        shutil.rmtree(self.folder, ignore_errors=True)


_OPEN: dict[str, np.ndarray] = {}


def _read(ref: SlotRef) -> np.ndarray:
    """The maps of a slot, read in place (each file is mapped once per worker)."""
    array = _OPEN.get(ref.path)
    if array is None:
        array = _OPEN[ref.path] = np.memmap(ref.path, dtype=np.float64, mode="r", shape=(ref.capacity, ref.cols))
    return array[: ref.rows]


def slot_nulls(ref: SlotRef, spec: MapSpec) -> tuple[np.ndarray, np.ndarray]:
    """:func:`~groupmodel.inference.map_tasks.worker_nulls` on maps carried in a slot."""
    return worker_nulls(_read(ref), spec)
