"""Cluster tables of a volume fit without permutation results: the connected groups (26 neighbours, one
sign) of the voxels shown at the uncorrected level, with the peak z in voxel and mm coordinates.  No
family-wise error control: the report says so beside them.  Labelled with scipy.ndimage (quick, no compiled
kernels to load), numbered as the inference's clusters: largest first, ties by the lowest voxel."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
from scipy import ndimage

from ...inference.clusters import Clusters, cluster_table


def _label(mask: np.ndarray, marks: np.ndarray) -> Clusters:
    """Clusters of the +1 and the -1 marks (in the mask's order), 26-connected within each sign."""
    labels = np.zeros(marks.size, dtype=np.int64)
    found: list[tuple[int, int, int, np.ndarray]] = []  # (-size, first element, sign, members)
    for sign in (1, -1):
        volume = np.zeros(mask.shape, dtype=bool)
        volume[mask] = marks == sign
        lab, count = ndimage.label(volume, structure=np.ones((3, 3, 3), dtype=bool))
        in_mask = lab[mask]
        # the members of every cluster at once: elements sorted by label (stable: in mask order within one)
        order = np.argsort(in_mask, kind="stable")
        edges = np.searchsorted(in_mask[order], np.arange(1, count + 2))
        for c in range(count):
            members = order[edges[c]:edges[c + 1]]
            found.append((-members.size, int(members[0]), sign, members))
    found.sort(key=lambda f: (f[0], f[1]))
    for number, (_, _, _, members) in enumerate(found, start=1):
        labels[members] = number
    return Clusters(labels.astype(np.int32), np.array([-f[0] for f in found], dtype=np.int64),
                    np.array([f[2] for f in found], dtype=np.int8))


def clusters_shown(mask: np.ndarray, mask_path: Path, z: np.ndarray, shown: np.ndarray) -> pd.DataFrame:
    """One row per cluster of ``shown`` voxels (in the mask's order), largest first; peak by |z|."""
    import nibabel as nib

    affine = nib.load(str(mask_path)).affine
    marks = np.where(shown & np.isfinite(z), np.sign(z), 0.0)
    table = cluster_table(np.nan_to_num(z), _label(mask, marks), ijk=np.argwhere(mask), affine=affine)
    return table.drop(columns=["p_fwe"]).rename(columns={"peak_stat": "peak_z"})


__all__ = ["clusters_shown"]
