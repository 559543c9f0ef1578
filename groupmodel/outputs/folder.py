"""Atomic writing of output folders: TSV tables, JSON sidecars, images.

All files of one run are written into a hidden temporary folder beside the
requested one and renamed into place only when every file has been written,
so an interrupted or failed run leaves nothing half-written.  An existing,
non-empty output folder is refused unless ``force`` is set.

A run killed outright (``kill -9``, a power cut) cannot clean up: its hidden
folder stays.  Each hidden folder therefore holds a small owner file (process
id, host, process start time), and the next run into the same place removes
those whose process is gone; a folder of a live run, or of another host, is
never touched.

This module knows nothing about statistics.
"""

from __future__ import annotations

import json
import math
import os
import shutil
import sys
import tempfile
import time
from collections.abc import Iterable
from dataclasses import dataclass
from pathlib import Path
from types import TracebackType
from typing import Any

import numpy as np
import pandas as pd

from ..errors import OutputError
from ..runtime.owner import OWNER_FILE, StaleFolder, owner_alive_here, owner_record, remove_stale_folders_of
from .target import OUTPUT_RECORD, check_target, output_record

#: Text written for a missing value in every TSV groupmodel writes (BIDS convention).
NA = "n/a"


def _jsonable(value: Any) -> Any:
    """Convert numpy scalars/arrays and non-finite floats into plain JSON values."""
    if isinstance(value, dict):
        return {str(k): _jsonable(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [_jsonable(v) for v in value]
    if isinstance(value, np.ndarray):
        return [_jsonable(v) for v in value.tolist()]
    if isinstance(value, np.generic):
        return _jsonable(value.item())
    if isinstance(value, float) and not math.isfinite(value):
        return None if math.isnan(value) else ("inf" if value > 0 else "-inf")
    if isinstance(value, Path):
        return str(value)
    return value


def readable_text(text: str) -> str:
    """``text`` with paths decoded under a non-UTF-8 locale (surrogate escapes) restored to their UTF-8 names;
    bytes that are not UTF-8 at all become U+FFFD, so the file is always valid UTF-8."""
    try:
        text.encode("utf-8")
        return text
    except UnicodeEncodeError:
        return text.encode("utf-8", "surrogateescape").decode("utf-8", "replace")


def dumps_json(obj: Any) -> str:
    """JSON text with 2-space indents, numpy values converted, non-finite floats made explicit."""
    return json.dumps(_jsonable(obj), indent=2, ensure_ascii=False) + "\n"


def format_tsv(frame: pd.DataFrame, float_format: str | None = None) -> str:
    """Tab-separated text with ``n/a`` for missing values and shortest round-trip floats."""
    return frame.to_csv(sep="\t", index=False, na_rep=NA, float_format=float_format, lineterminator="\n")


#: Prefixes of the hidden folders beside ``--out`` (after ``.<name>``): files being written, a replaced folder.
HIDDEN_KINDS = (".partial-", ".old-")


#: The lock file beside ``--out`` (``.<name>.lock``) held by the run writing there.
LOCK_SUFFIX = ".lock"


@dataclass(frozen=True)
class StaleLock:
    """The lock of a killed run into the same ``--out``, replaced by this run."""

    path: Path
    pid: int


class OutputLock:
    """A lock file beside ``--out`` held while one run works towards it, so that a second run into the same
    place is refused at once instead of replacing the first one's results (or failing hours later).

    The file ``.<name>.lock`` is created atomically (``O_CREAT | O_EXCL``) and holds the owner record of the
    hidden folders (process id, host, process start time) plus the wall-clock start and the command line.
    A lock whose process is gone (same host) is replaced and reported in :attr:`stale`; a live one, or one of
    another host, refuses the run with an :class:`~groupmodel.errors.OutputError` (exit code 2).  Use as a
    context manager; the lock is released on exit, whatever the outcome.
    """

    def __init__(self, target: Path | str) -> None:
        self.target = Path(target)
        parent = self.target.parent if str(self.target.parent) else Path(".")
        self.path = parent / f".{self.target.name}{LOCK_SUFFIX}"
        self.stale: StaleLock | None = None
        self._created: list[Path] = []
        self._held = False

    def __enter__(self) -> OutputLock:
        check_parent(self.target)
        self._make_parent()
        record = {**owner_record(), "started": time.strftime("%Y-%m-%dT%H:%M:%S%z"), "command": sys.argv}
        for _ in range(3):
            try:
                fd = os.open(self.path, os.O_CREAT | os.O_EXCL | os.O_WRONLY, 0o666)
            except FileExistsError:
                self._judge_existing()
                continue
            except OSError as exc:
                self._remove_created()
                raise OutputError(
                    f"--out {self.target}: cannot create the lock file {self.path} ({exc.strerror}); "
                    "choose another path"
                ) from exc
            try:
                with os.fdopen(fd, "w", encoding="utf-8") as handle:
                    handle.write(json.dumps(record))  # ASCII: a path undecodable in the locale stays writable
            except BaseException:
                self.path.unlink(missing_ok=True)
                raise
            self._held = True
            return self
        raise OutputError(f"--out {self.target}: could not take the lock {self.path}; try again")

    def _judge_existing(self) -> None:
        """Remove the existing lock file if its run is gone (on this host); else refuse this run."""
        try:
            owner = json.loads(self.path.read_text(encoding="utf-8"))
            alive = owner_alive_here(owner)
        except FileNotFoundError:
            return  # released meanwhile: try again
        except (OSError, ValueError, KeyError, TypeError, AttributeError):
            owner, alive = {}, True  # unreadable (being written, say): not ours to judge
        if alive is False:
            self._remove_stale(owner)
            return
        self._remove_created()
        who = (f"process {owner.get('pid', '?')} on {owner.get('host', '?')}, started {owner.get('started', '?')}"
               if owner else "a run whose lock file cannot be read")
        raise OutputError(
            f"--out {self.target}: another run is writing there ({who}; lock {self.path}); "
            "wait for it to end or choose another path"
        )

    def _remove_stale(self, owner: dict[str, Any]) -> None:
        """Move the dead run's lock aside and delete it; should another run have replaced it meanwhile (both saw
        the same dead lock), put that run's lock back instead."""
        aside = self.path.with_name(f"{self.path.name}.stale-{os.getpid()}")
        try:
            os.rename(self.path, aside)
        except FileNotFoundError:
            return  # removed by another run meanwhile
        try:
            moved = json.loads(aside.read_text(encoding="utf-8"))
        except (OSError, ValueError):
            moved = None
        if moved != owner:
            try:
                os.link(aside, self.path)  # fails if yet another lock is there: that one holds
            except OSError:
                pass
        else:
            self.stale = StaleLock(self.path, int(owner["pid"]))
        aside.unlink(missing_ok=True)

    def _make_parent(self) -> None:
        parent = self.path.parent
        missing = []
        while not parent.exists() and parent != parent.parent:
            missing.append(parent)
            parent = parent.parent
        try:
            for folder in reversed(missing):
                folder.mkdir()
                self._created.append(folder)
        except OSError as exc:
            self._remove_created()
            raise OutputError(
                f"--out {self.target}: cannot create a folder there ({exc.strerror}); choose another path"
            ) from exc

    def _remove_created(self) -> None:
        """Remove the parent folders this lock created, if nothing else was put in them."""
        for folder in reversed(self._created):
            try:
                folder.rmdir()
            except OSError:
                break
        self._created = []

    def __exit__(self, *exc: object) -> None:
        if self._held:
            try:
                owner = json.loads(self.path.read_text(encoding="utf-8"))
                if int(owner["pid"]) == os.getpid():
                    self.path.unlink()
            except (OSError, ValueError, KeyError, TypeError):
                pass
            self._held = False
        if not self.target.exists():
            self._remove_created()


def check_parent(target: Path) -> None:
    """Refuse a ``--out`` whose parent is a file or not writable."""
    parent = target.parent if str(target.parent) else Path(".")
    if parent.exists() and not parent.is_dir():
        raise OutputError(f"--out {target}: {parent} is a file, not a folder; choose another path")
    if parent.exists() and not os.access(parent, os.W_OK | os.X_OK):
        raise OutputError(f"--out {target}: the folder {parent} is not writable; choose another path")


def _umask() -> int:
    """The process's umask (read by setting and restoring it)."""
    mask = os.umask(0o022)
    os.umask(mask)
    return mask


def remove_stale_folders(target: Path) -> tuple[StaleFolder, ...]:
    """Remove the hidden folders beside ``target`` left by killed runs of this host (their process is gone).

    Only folders named ``.<target name>.partial-*`` or ``.<target name>.old-*`` with an owner file naming this
    host are considered; a folder of a live process, of another host, or without an owner file is left alone.
    """
    parent = target.parent if str(target.parent) else Path(".")
    try:
        candidates = sorted(p for kind in HIDDEN_KINDS for p in parent.glob(f".{target.name}{kind}*"))
    except OSError:
        return ()
    return remove_stale_folders_of(candidates)


class OutputFolder:
    """A folder whose contents appear all at once.

    Use as a context manager::

        with OutputFolder(Path("design"), force=False) as out:
            out.write_text("design.tsv", text)
        # design/ now exists with every file, or not at all

    Parameters
    ----------
    target : Path
        The folder the user asked for.
    force : bool
        Replace an existing non-empty folder, if it is a groupmodel output (:mod:`.target`).  Without it such a
        folder is an :class:`~groupmodel.errors.OutputError` raised at construction, before any work is done.
    inputs : paths
        The run's inputs: a ``--out`` holding one of them (or the working directory) is refused.

    Attributes
    ----------
    removed : tuple of StaleFolder
        Hidden folders of earlier, killed runs into the same place, removed at construction.
    """

    def __init__(self, target: Path | str, force: bool = False, inputs: Iterable[Path | str | None] = ()) -> None:
        self.target = Path(target)
        self.force = force
        check_target(self.target, force, inputs)
        check_parent(self.target)
        self.removed = remove_stale_folders(self.target)
        self.path: Path | None = None

    def __enter__(self) -> OutputFolder:
        parent = self.target.parent if str(self.target.parent) else Path(".")
        try:
            parent.mkdir(parents=True, exist_ok=True)
            self.path = Path(tempfile.mkdtemp(prefix=f".{self.target.name}.partial-", dir=parent))
            (self.path / OWNER_FILE).write_text(json.dumps(owner_record()), encoding="utf-8")
        except OSError as exc:
            raise OutputError(
                f"--out {self.target}: cannot create a folder there ({exc.strerror}); choose another path"
            ) from exc
        return self

    def __exit__(
        self,
        exc_type: type[BaseException] | None,
        exc: BaseException | None,
        tb: TracebackType | None,
    ) -> None:
        assert self.path is not None
        if exc_type is not None:
            shutil.rmtree(self.path, ignore_errors=True)
            return
        try:
            (self.path / OWNER_FILE).unlink()
            (self.path / OUTPUT_RECORD).write_text(output_record(self.path), encoding="utf-8")
            os.chmod(self.path, 0o777 & ~_umask())  # as any folder the user creates (mkdtemp makes it 0700)
            if self.target.exists():
                old = Path(tempfile.mkdtemp(prefix=f".{self.target.name}.old-", dir=self.path.parent))
                (old / OWNER_FILE).write_text(json.dumps(owner_record()), encoding="utf-8")
                os.rename(self.target, old / "previous")
                os.rename(self.path, self.target)
                shutil.rmtree(old, ignore_errors=True)
            else:
                os.rename(self.path, self.target)
        except OSError as exc2:
            shutil.rmtree(self.path, ignore_errors=True)
            raise OutputError(f"--out {self.target}: could not move results into place ({exc2})") from exc2

    def file(self, name: str) -> Path:
        """Path inside the temporary folder for ``name`` (sub-folders are created)."""
        assert self.path is not None, "use OutputFolder as a context manager"
        p = self.path / name
        p.parent.mkdir(parents=True, exist_ok=True)
        return p

    def write_text(self, name: str, text: str) -> Path:
        p = self.file(name)
        p.write_text(readable_text(text), encoding="utf-8")
        return p

    def write_json(self, name: str, obj: Any) -> Path:
        return self.write_text(name, dumps_json(obj))

    def write_tsv(self, name: str, frame: pd.DataFrame) -> Path:
        return self.write_text(name, format_tsv(frame))
