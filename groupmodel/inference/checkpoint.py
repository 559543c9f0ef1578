"""Checkpoints of permutation inference: the counts and maxima of the rearrangements done so far, so that a run
killed after hours continues where it stopped and gives maps identical to a run that was never stopped.

What a contrast's permutations build up is a sum of counts per element and, per rearrangement, the largest
statistic (and the largest TFCE value and cluster size); both are exact (integers, maxima), so a run that
reloads them after rearrangement k and goes on from k + 1 gets the same bits as one that never stopped.  The
observed pass (the first batch, identity included) is recomputed on resuming: it is deterministic, and it fixes
the thresholds the counts are made against.

A checkpoint folder holds ``parameters.json`` (what the run was asked to do; a resume with other parameters is
refused) and one ``<contrast>.npz`` per contrast, replaced atomically at most every ``every`` seconds and when
the contrast is done.
"""

from __future__ import annotations

import json
import os
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from ..errors import InputError

__all__ = ["CHECKPOINT_SECONDS", "BatchState", "CheckpointFolder", "ContrastCheckpoint"]

#: Seconds between two saves of a contrast's state (and always when the contrast is done).
CHECKPOINT_SECONDS = 60.0
PARAMETERS = "parameters.json"


@dataclass(frozen=True)
class BatchState:
    """The state after the rearrangements ``0 .. done - 1``: counts per element, maxima per rearrangement.

    Runs that take the elements in the outer loop (variance groups: every rearrangement of one chunk of
    elements, then the next chunk) save instead the state after the elements ``0 .. elements_done - 1``, with
    their observed statistics ``stat``; ``done`` is then the number of rearrangements counted for every
    element (0 until the last chunk).
    """

    done: int
    count: np.ndarray
    max_null: np.ndarray
    tfce_max: np.ndarray | None
    cluster_max: np.ndarray | None
    stat: np.ndarray | None = None
    elements_done: int | None = None


class ContrastCheckpoint:
    """The checkpoint of one contrast: :meth:`load` the saved state (None: start from the beginning), and
    :meth:`save` the state after a batch (written when ``every`` seconds have passed, or ``final``)."""

    def __init__(self, path: Path, key: dict[str, Any], every: float = CHECKPOINT_SECONDS) -> None:
        self.path, self.key, self.every = Path(path), key, every
        self._last = time.monotonic()

    def load(self) -> BatchState | None:
        if not self.path.exists():
            return None
        try:
            with np.load(self.path, allow_pickle=False) as z:
                key = json.loads(str(z["key"]))
                if key != self.key:
                    raise InputError(
                        f"checkpoint {self.path}: made for {key}, not for this contrast {self.key}; remove the "
                        "checkpoint folder or run the original command"
                    )
                return BatchState(int(z["done"]), z["count"], z["max_null"],
                                  z["tfce_max"] if "tfce_max" in z else None,
                                  z["cluster_max"] if "cluster_max" in z else None,
                                  z["stat"] if "stat" in z else None,
                                  int(z["elements_done"]) if "elements_done" in z else None)
        except (OSError, ValueError, KeyError) as exc:
            raise InputError(f"checkpoint {self.path}: unreadable ({exc}); remove it to start again") from exc

    def due(self, final: bool = False) -> bool:
        return final or time.monotonic() - self._last >= self.every

    def save(self, state: BatchState) -> None:
        arrays = {"key": np.array(json.dumps(self.key, sort_keys=True)), "done": np.array(state.done),
                  "count": state.count, "max_null": state.max_null}
        if state.tfce_max is not None:
            arrays["tfce_max"] = state.tfce_max
        if state.cluster_max is not None:
            arrays["cluster_max"] = state.cluster_max
        if state.stat is not None:
            arrays["stat"] = state.stat
        if state.elements_done is not None:
            arrays["elements_done"] = np.array(state.elements_done)
        tmp = self.path.with_name(f".{self.path.name}.{os.getpid()}.tmp")
        with open(tmp, "wb") as fh:
            np.savez(fh, **arrays)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, self.path)
        self._last = time.monotonic()


class CheckpointFolder:
    """A checkpoint folder for one command: its parameters, and a :class:`ContrastCheckpoint` per contrast.

    Parameters
    ----------
    folder : path
    parameters : dict
        What the run was asked to do (JSON values); recorded, and compared on resuming.
    resume : bool
        Continue from the saved state (refused when the parameters differ); without it, a folder that already
        holds a checkpoint is refused, so that none is overwritten by mistake.
    every : float
        Seconds between saves.
    """

    def __init__(self, folder: Path | str, parameters: dict[str, Any], resume: bool,
                 every: float = CHECKPOINT_SECONDS) -> None:
        self.folder, self.parameters, self.every = Path(folder), json.loads(json.dumps(parameters)), every
        record = self.folder / PARAMETERS
        if record.exists():
            saved = json.loads(record.read_text(encoding="utf-8"))
            if not resume:
                raise InputError(
                    f"--checkpoint {self.folder}: holds the checkpoint of an earlier run; add --resume to continue it, "
                    "or remove the folder to start again"
                )
            if saved != self.parameters:
                changed = sorted(k for k in set(saved) | set(self.parameters) if saved.get(k) != self.parameters.get(k))
                raise InputError(
                    f"--checkpoint {self.folder}: made by a run with other parameters ({', '.join(changed)} differ); "
                    "resume with the same command, or remove the folder to start again"
                )
        else:
            self.folder.mkdir(parents=True, exist_ok=True)
            record.write_text(json.dumps(self.parameters, indent=2, sort_keys=True) + "\n", encoding="utf-8")

    def progress(self) -> dict[str, str]:
        """Contrast file name -> what a resume starts from, in words (``300 rearrangements``, or with variance
        groups ``1200 of 5000 elements``)."""
        out = {}
        for p in sorted(self.folder.glob("*.npz")):
            try:
                with np.load(p, allow_pickle=False) as z:
                    if "elements_done" in z:
                        out[p.stem] = f"{int(z['elements_done'])} of {int(z['count'].size)} elements"
                    else:
                        out[p.stem] = f"{int(z['done'])} rearrangements"
            except (OSError, ValueError, KeyError, EOFError):
                continue
        return out

    def contrast(self, name: str, key: dict[str, Any]) -> ContrastCheckpoint:
        safe = "".join(c if c.isalnum() or c in "-_." else "_" for c in name)
        return ContrastCheckpoint(self.folder / f"{safe}.npz", {"name": name, **key}, self.every)

    def remove(self) -> None:
        """Remove the checkpoint files (after the results are written)."""
        for p in self.folder.glob("*.npz"):
            p.unlink(missing_ok=True)
        (self.folder / PARAMETERS).unlink(missing_ok=True)
        try:
            self.folder.rmdir()
        except OSError:
            pass
