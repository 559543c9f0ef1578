"""How a fit divides its memory budget (``--memory``): one definition of every share.

The image data matrix gets :data:`DATA_SHARE` of the budget; the rest is working memory: one chunk's
arrays and the result maps of the parametric pass, and, during permutations, half of it each for the
residualised data the engine keeps and for the whole statistic maps of TFCE and cluster batches.

Worker processes for TFCE and cluster nulls (about :data:`WORKER_BYTES` each) are counted in the budget too:
together at most :data:`WORKER_SHARE` of it (:meth:`MemoryBudget.worker_processes`), so a small budget means fewer
workers (or none: the nulls then run in the main process).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

from ..errors import InputError

#: Share of the budget given to the image data matrix.
DATA_SHARE = 0.6
#: The least working memory a chunk is given, as a share of the budget, however many maps are kept.
MIN_WORK_SHARE = 0.1
#: Bytes of one float64 value of a result map.
MAP_VALUE_BYTES = 8
#: Memory of one worker process of TFCE and cluster nulls (Python, numpy, scipy and a batch of maps; 240-280 MB
#: measured on the example study).
WORKER_BYTES = 250 * 2**20
#: Share of the budget the worker processes may take together (out of the working share).
WORKER_SHARE = 0.2


@dataclass(frozen=True)
class MemoryBudget:
    """A memory budget in bytes and its shares."""

    total: int

    def __post_init__(self) -> None:
        ok = isinstance(self.total, int | float) and not isinstance(self.total, bool) and math.isfinite(self.total)
        if not ok or self.total < 1:
            raise InputError(
                f"the memory budget (--memory, memory_bytes) must be a positive number of bytes; got {self.total!r}; "
                "give e.g. --memory 2GB"
            )

    @property
    def data_bytes(self) -> int:
        """For the image data matrix (loaded, or spilled to disk beyond this)."""
        return int(self.total * DATA_SHARE)

    def chunk_work_bytes(self, n_maps: int, n_elements: int) -> int:
        """For one chunk's work, after ``n_maps`` float64 maps of ``n_elements`` values are kept."""
        return int(max(self.total * (1 - DATA_SHARE) - n_maps * n_elements * MAP_VALUE_BYTES,
                       self.total * MIN_WORK_SHARE))

    @property
    def permutation_bytes(self) -> int:
        """For each of: the residualised data the permutation engine caches, and the whole maps of
        TFCE and cluster batches (half of the working share each, a fifth of the budget)."""
        return int(self.total * (1 - DATA_SHARE) * 0.5)

    def worker_processes(self) -> int:
        """How many worker processes fit the budget (0 or 1: none, the work stays in the main process)."""
        return int(self.total * WORKER_SHARE // WORKER_BYTES)
