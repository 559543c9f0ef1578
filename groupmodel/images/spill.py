"""The spill file: the data matrix on disk when it does not fit the memory budget.

A spill is a temporary folder with one preallocated file of values (:func:`_new_spill`), written through a
numpy memmap whose resident pages are dropped as the work goes (:func:`release_pages`), compacted in place
to the mask (:func:`_compact`, :mod:`.packed`), and read back in column blocks by plain file reads
(:class:`SpillReader`).

Each spill folder holds an owner record (process id, host, process start time; :mod:`groupmodel.runtime.owner`).
A run killed outright (``kill -9``) cannot remove its spill; the next run that spills into the same folder, or
calls :func:`remove_stale_spills`, removes the spill folders whose process is gone.  Folders of live runs, of
other hosts, or without an owner record are left alone.
"""

from __future__ import annotations

import mmap
import os
import shutil
import tempfile
from pathlib import Path

import numpy as np

from ..errors import InputError
from ..runtime.owner import StaleFolder, remove_stale_folders_of, write_owner
from .packed import PackedRows, compact_packed

_SPILL_NAME = "data.f32"
#: Prefix of every spill folder (in the work folder, by default TMPDIR).
SPILL_PREFIX = "groupmodel-spill-"


def remove_stale_spills(workdir: Path | str | None = None) -> tuple[StaleFolder, ...]:
    """Remove the spill folders in ``workdir`` (default: the temporary folder, TMPDIR) of killed runs of this
    host, recognised by their owner record; returns those removed."""
    where = Path(tempfile.gettempdir() if workdir is None else workdir)
    try:
        candidates = sorted(p for p in where.glob(f"{SPILL_PREFIX}*") if p.is_dir())
    except OSError:
        return ()
    return remove_stale_folders_of(candidates)


def _new_spill(workdir: Path | str | None, n_values: int, dtype: type = np.float32) -> tuple[Path, np.memmap]:
    """A temporary folder with a preallocated memmap of ``n_values`` values of ``dtype``."""
    nbytes = n_values * np.dtype(dtype).itemsize
    remove_stale_spills(workdir)  # space left by killed runs first
    try:
        d = Path(tempfile.mkdtemp(prefix=SPILL_PREFIX, dir=None if workdir is None else str(workdir)))
        write_owner(d)
    except OSError as exc:
        raise InputError(
            f"expected a writable folder for spilling data to disk; found {exc.strerror}: "
            f"{workdir or tempfile.gettempdir()}; choose another work folder or raise the memory limit"
        ) from exc
    path = d / _SPILL_NAME
    try:
        with open(path, "wb") as fh:
            # reserve the space now: a memmap write into a sparse file on a full disk would crash the process
            if hasattr(os, "posix_fallocate"):
                os.posix_fallocate(fh.fileno(), 0, nbytes)
            else:  # pragma: no cover - not Linux
                fh.truncate(nbytes)
        mm = np.memmap(path, dtype=dtype, mode="r+", shape=(n_values,))
    except OSError as exc:
        shutil.rmtree(d, ignore_errors=True)
        raise InputError(
            f"expected {nbytes / 2**20:.1f} MiB of free disk space for spilling data; found "
            f"{exc.strerror}: {d}; free some space, choose another work folder or raise the memory limit"
        ) from exc
    return d, mm


def _compact(buf: np.ndarray, plan: PackedRows, memory_bytes: int,
             spill_dir: Path | None) -> tuple[np.ndarray, Path | None]:
    """Turn the packed rows of the flat ``buf`` into the ``(n, n_keep)`` matrix, without a second full copy."""
    n, n_keep = plan.n, plan.n_keep
    if spill_dir is None:
        compact_packed(buf, plan)
        # shrink the allocation in place (realloc) rather than copying into a smaller array
        buf.resize(n * n_keep, refcheck=False)
        return buf.reshape(n, n_keep), None

    path = spill_dir / _SPILL_NAME
    itemsize = buf.dtype.itemsize
    if n * n_keep * itemsize <= memory_bytes:
        # the compacted matrix fits the budget: bring it into RAM row by row and remove the spill
        out = np.empty((n, n_keep), dtype=buf.dtype)
        for s in range(n):
            off, length = int(plan.offsets[s]), int(plan.lengths[s])
            out[plan.row_of[s]] = plan.expand(s, buf[off : off + length])
            if s % 16 == 15:
                release_pages(buf)
        del buf
        shutil.rmtree(spill_dir, ignore_errors=True)
        return out, None
    compact_packed(buf, plan, release=lambda b=buf: release_pages(b))
    assert isinstance(buf, np.memmap)
    dtype = buf.dtype
    buf.flush()
    del buf
    os.truncate(path, n * n_keep * itemsize)
    data = np.memmap(path, dtype=dtype, mode="r", shape=(n, n_keep))
    return data, spill_dir


class SpillReader:
    """Column blocks of a spilled ``(n, V)`` row-major matrix by plain file reads: ``reader[:, a:b]``.

    Reading a short run of every row through a memory map makes the kernel map most of the file, which counts
    in the process's resident memory; plain reads go through the page cache instead.  Picklable (a path and
    a shape), so it can be shipped to workers.
    """

    def __init__(self, path: Path, dtype: np.dtype, shape: tuple[int, int]) -> None:
        self.path = Path(path)
        self.dtype = np.dtype(dtype)
        self.shape = (int(shape[0]), int(shape[1]))

    def __getitem__(self, key: tuple[slice, slice]) -> np.ndarray:
        rows, cols = key
        if rows != slice(None) or not isinstance(cols, slice) or cols.step not in (None, 1):
            raise TypeError("SpillReader supports [:, a:b] only")
        n, total = self.shape
        start, stop, _ = cols.indices(total)
        out = np.empty((n, max(stop - start, 0)), dtype=self.dtype)
        if out.size:
            with open(self.path, "rb", buffering=0) as fh:
                for i in range(n):
                    fh.seek((i * total + start) * self.dtype.itemsize)
                    view = memoryview(out[i]).cast("B")
                    got = fh.readinto(view)
                    if got != view.nbytes:
                        raise OSError(f"short read from the spill file {self.path} (row {i})")
        return out


def release_pages(array: np.ndarray) -> None:
    """Write back and drop the resident pages of a file-backed memmap (no-op for arrays in RAM).

    A spilled data matrix is read and written through a memory map; the kernel keeps every page touched
    resident (counted in the process's RSS) until memory runs short.  Dropping them after each block keeps
    the resident set within the budget; they are read back from disk when touched again.
    """
    base = getattr(array, "_mmap", None)
    if isinstance(array, np.memmap) and base is not None and hasattr(base, "madvise"):
        base.flush()
        base.madvise(mmap.MADV_DONTNEED)
