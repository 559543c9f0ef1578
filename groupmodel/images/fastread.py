"""Reading compressed NIfTI files whole, in threads: decompression (isal where installed, else zlib) releases
the GIL, so two images decompress at once.

The array is then made by nibabel from the decompressed bytes (``Nifti1Image.from_bytes``), so its values,
dtype and scaling are exactly those of ``np.asanyarray(nib.load(path).dataobj)``.  Only single 3-D volumes
in ``.nii.gz`` files take this road; ``.nii`` files (memory-mapped by nibabel), 4-D files and GIFTI do not.

Maps are written the same way round: nibabel makes the file's bytes (``to_bytes``), compressed in one call
(:func:`gzip_bytes`, level 1).

Set ``GROUPMODEL_NO_ISAL=1`` in the environment to decompress with zlib even when isal is installed.
"""

from __future__ import annotations

import os
import zlib
from collections import deque
from collections.abc import Callable, Iterator, Sequence
from concurrent.futures import Future, ThreadPoolExecutor
from pathlib import Path
from typing import Any, TypeVar

import nibabel as nib
import numpy as np

from ..runtime.cores import available_cores

try:  # optional: pip install "groupmodel[fast]"
    from isal import isal_zlib as _isal_zlib
except ImportError:  # pragma: no cover - depends on the installation
    _isal_zlib = None

#: Environment variable that turns isal off (zlib is used instead).
NO_ISAL_ENV = "GROUPMODEL_NO_ISAL"

#: Compression level of written .nii.gz files: isal's level 1 (its fastest that still matches zlib's sizes), and
#: zlib's level 1 (nibabel's default) when isal is absent.
WRITE_LEVEL_ISAL = 1
WRITE_LEVEL_ZLIB = 1

#: Threads that decompress images at most (each holds one image in flight; two already keep a 2-core machine
#: busy, and the working memory of :func:`..loading.load_masked` counts two images in flight).
MAX_READ_THREADS = 2

T = TypeVar("T")


def isal_available() -> bool:
    """True when isal is installed and not turned off by ``GROUPMODEL_NO_ISAL``."""
    return _isal_zlib is not None and os.environ.get(NO_ISAL_ENV, "") in ("", "0")


def gunzip(data: bytes, use_isal: bool | None = None) -> bytes:
    """Decompress a whole gzip stream (every member; CRC and length checked).

    ``use_isal`` None means :func:`isal_available`; False forces zlib (through :mod:`gzip`).
    """
    if use_isal is None:
        use_isal = isal_available()
    mod: Any = _isal_zlib if use_isal and _isal_zlib is not None else zlib
    parts: list[bytes] = []
    rest = data
    while True:
        # wbits=31: a gzip member, its CRC-32 and length checked by the decompressor
        d = mod.decompressobj(wbits=31)
        parts.append(d.decompress(rest))
        if not d.eof:
            raise EOFError("compressed file ended before the end-of-stream marker was reached")
        rest = d.unused_data
        if not rest.lstrip(b"\0"):  # trailing zero padding is allowed in gzip files
            break
    return parts[0] if len(parts) == 1 else b"".join(parts)


def gzip_bytes(raw: bytes, use_isal: bool | None = None) -> bytes:
    """One gzip member of ``raw`` (mtime 0), compressed in one call at the fast write level."""
    if use_isal is None:
        use_isal = isal_available()
    if use_isal and _isal_zlib is not None:
        return bytes(_isal_zlib.compress(raw, WRITE_LEVEL_ISAL, wbits=31))
    return zlib.compress(raw, WRITE_LEVEL_ZLIB, wbits=31)


def is_fast_path(path: Path) -> bool:
    """Files read whole and decompressed here: ``.nii.gz``."""
    return path.name.lower().endswith(".nii.gz")


def read_nifti_gz(path: Path, use_isal: bool | None = None) -> np.ndarray:
    """``np.asanyarray(nib.load(path).dataobj)`` of a ``.nii.gz`` file, decompressed in one call."""
    with open(path, "rb") as fh:
        compressed = fh.read()
    raw = gunzip(compressed, use_isal)
    del compressed
    # sizeof_hdr (first 4 bytes) is 348 for NIfTI-1 and 540 for NIfTI-2, in either byte order
    size = int.from_bytes(raw[:4], "little")
    if size not in (348, 540):
        size = int.from_bytes(raw[:4], "big")
    klass: Any = nib.Nifti2Image if size == 540 else nib.Nifti1Image
    img = klass.from_bytes(raw)
    return np.asanyarray(img.dataobj)


def read_threads(n_items: int) -> int:
    """Threads for reading ``n_items`` files: the cores this process may use, at most MAX_READ_THREADS."""
    return max(1, min(available_cores(), MAX_READ_THREADS, n_items))


def ordered_map(func: Callable[[Any], T], items: Sequence[Any], threads: int) -> Iterator[T]:
    """``func(item)`` for every item, in order, computed by ``threads`` threads with ``threads`` items in flight.

    A result is handed over before more work is queued, so at most ``threads + 1`` results exist at once
    (the one being used and those in flight).  Exceptions are raised where their item would be yielded.
    """
    if threads <= 1 or len(items) <= 1:
        for item in items:
            yield func(item)
        return
    pool = ThreadPoolExecutor(max_workers=threads, thread_name_prefix="groupmodel-read")
    pending: deque[Future[T]] = deque()
    try:
        it = iter(items)
        for item in it:
            pending.append(pool.submit(func, item))
            if len(pending) >= threads:
                break
        while pending:
            result = pending.popleft().result()
            nxt = next(it, None)
            if nxt is not None:
                pending.append(pool.submit(func, nxt))
            yield result
            del result
    finally:
        for fut in pending:
            fut.cancel()
        pool.shutdown(wait=True, cancel_futures=True)
