"""Owner records: which process made a file or folder, so that a later run can tell leftovers of a killed run
(its process gone) from the work of a live one, without guessing from names or ages.

A record holds the process id, the host and the process start time (from ``/proc``, so that a later process
given the same id is not taken for the owner).  Only records of this host are judged; a record of another
host, an unreadable one, or one of a live process is never removed.
"""

from __future__ import annotations

import json
import os
import shutil
import socket
from collections.abc import Iterable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

__all__ = ["OWNER_FILE", "StaleFolder", "owner_alive_here", "owner_record", "process_gone", "process_start",
           "remove_stale_folders_of", "write_owner"]

#: The owner file inside a folder being written by a run (a hidden output folder, a spill folder).
OWNER_FILE = ".groupmodel-owner.json"


def process_start(pid: int) -> str | None:
    """When process ``pid`` started (clock ticks since boot, Linux), to tell it from a later one with the same
    id; None where /proc does not say."""
    try:
        stat = Path(f"/proc/{pid}/stat").read_text()
    except OSError:
        return None
    fields = stat.rsplit(")", 1)[1].split()
    return fields[19] if len(fields) > 19 else None


def process_gone(pid: int, started: str | None) -> bool:
    """Whether process ``pid`` (started at ``started``) has ended (or its id now names another process)."""
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return True
    except PermissionError:  # alive, another user's
        return False
    except OSError:
        return False
    try:
        state = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()[0]
    except (OSError, IndexError):
        return False
    if state in ("Z", "X"):  # ended, not yet reaped by its parent
        return True
    now = process_start(pid)
    return started is not None and now is not None and now != started


def owner_record() -> dict[str, Any]:
    """This process's owner record: pid, host, process start time."""
    pid = os.getpid()
    return {"pid": pid, "host": socket.gethostname(), "process_start": process_start(pid)}


def write_owner(folder: Path) -> None:
    """Put this process's owner record into ``folder``."""
    (folder / OWNER_FILE).write_text(json.dumps(owner_record()), encoding="utf-8")


def owner_alive_here(owner: dict[str, Any]) -> bool | None:
    """Whether the process of an owner record is alive: True/False on this host, None on another host."""
    if owner.get("host") != socket.gethostname():
        return None
    return not process_gone(int(owner["pid"]), owner.get("process_start"))


@dataclass(frozen=True)
class StaleFolder:
    """A folder left by a run that was killed, removed by a later run."""

    path: Path
    pid: int


def remove_stale_folders_of(candidates: Iterable[Path]) -> tuple[StaleFolder, ...]:
    """Remove those of ``candidates`` whose owner file names a process of this host that is gone.

    A folder without a readable owner file, of another host, or of a live process is left alone.
    """
    removed: list[StaleFolder] = []
    for folder in candidates:
        try:
            owner = json.loads((folder / OWNER_FILE).read_text(encoding="utf-8"))
            pid = int(owner["pid"])
            if pid == os.getpid() or owner_alive_here(owner) is not False:
                continue
        except (OSError, ValueError, KeyError, TypeError, AttributeError):
            continue  # not ours to judge
        shutil.rmtree(folder, ignore_errors=True)
        if not folder.exists():
            removed.append(StaleFolder(folder, pid))
    return tuple(removed)
