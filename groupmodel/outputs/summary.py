"""summary.tsv / summary.json of a voxelwise fit: per hypothesis the peak and where it is, counts, clusters.

The columns of :meth:`VoxelFit.summary` (test, df, peak statistic, peak z, counts of voxels past each
threshold), with the peak's location inserted after ``peak_statistic`` (voxel indices i, j, k counted from 0
and mm coordinates from the image affine for volumes; the vertex index for surface data) and, when
permutations made cluster tables, the count of clusters with FWE p < 0.05 in each table.
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Any

import numpy as np
import pandas as pd

from ..engine.peaks import peak_element, statistic_map
from .index import table_path
from .numbers import tidy

if TYPE_CHECKING:
    from ..analysis.voxel_fit import VoxelFit

#: The level below which a cluster of a cluster table is counted.
CLUSTER_ALPHA = 0.05
VOXEL_PEAK_COLUMNS = ("peak_i", "peak_j", "peak_k", "peak_x_mm", "peak_y_mm", "peak_z_mm")
VERTEX_PEAK_COLUMNS = ("peak_vertex",)


def _peak_element(fit: VoxelFit, name: str) -> int | None:
    """:func:`peak_element` of hypothesis ``name`` (t or F, or with variance groups v or G)."""
    return peak_element(statistic_map(fit.maps[name]), fit.model.hypotheses[name].tail)


def peak_location(fit: VoxelFit, name: str) -> dict[str, Any]:
    """Where the peak of hypothesis ``name`` is: i, j, k and mm (volumes) or the vertex index (surfaces)."""
    element = _peak_element(fit, name)
    surface = fit.grid.kind == "gifti"
    if element is None:
        return dict.fromkeys(VERTEX_PEAK_COLUMNS if surface else VOXEL_PEAK_COLUMNS)
    flat = int(np.flatnonzero(np.asarray(fit.mask).ravel())[element])
    if surface:
        return {"peak_vertex": flat}
    ijk = np.unravel_index(flat, np.asarray(fit.mask).shape)[:3]
    out: dict[str, Any] = dict(zip(VOXEL_PEAK_COLUMNS[:3], (int(v) for v in ijk), strict=True))
    if fit.grid.affine is not None:
        affine = np.asarray(fit.grid.affine, dtype=np.float64)
        mm = tidy(affine[:3, :3] @ np.asarray(ijk, dtype=np.float64) + affine[:3, 3])
        out.update(zip(VOXEL_PEAK_COLUMNS[3:], (float(v) for v in mm), strict=True))
    else:
        out.update(dict.fromkeys(VOXEL_PEAK_COLUMNS[3:]))
    return out


def cluster_counts(fit: VoxelFit, name: str) -> dict[str, int]:
    """Per cluster table of the hypothesis (``clusters_<kind>``): clusters with FWE p < 0.05."""
    return {f"clusters_{kind}": int(np.count_nonzero(table["p_fwe"].to_numpy(dtype=float) < CLUSTER_ALPHA))
            for kind, table in fit.tables.get(name, {}).items()}


def summary_frame(fit: VoxelFit) -> pd.DataFrame:
    """summary.tsv: VoxelFit.summary() with the peak's location and the cluster counts."""
    frame = fit.summary()
    names = list(frame["hypothesis"])
    at = list(frame.columns).index("peak_statistic") + 1
    locations = pd.DataFrame([peak_location(fit, n) for n in names])
    for offset, column in enumerate(locations.columns):
        values = locations[column]
        dtype = "Int64" if column in ("peak_i", "peak_j", "peak_k", "peak_vertex") else "float64"
        frame.insert(at + offset, column, values.astype(dtype))
    counts = pd.DataFrame([cluster_counts(fit, n) for n in names])
    for column in counts.columns:
        frame[column] = counts[column].astype("Int64")
    return frame


def summary_records(frame: pd.DataFrame) -> dict[str, dict[str, Any]]:
    """summary.tsv as JSON: hypothesis -> its row (missing values as null)."""
    out: dict[str, dict[str, Any]] = {}
    for row in frame.to_dict(orient="records"):
        name = row.pop("hypothesis")
        out[name] = {k: (None if v is pd.NA or (isinstance(v, float) and np.isnan(v)) else
                         int(v) if isinstance(v, np.integer) else v) for k, v in row.items()}
    return out


def summary_columns(fit: VoxelFit) -> dict[str, str]:
    """What the columns of summary.tsv (and the rows under ``hypotheses`` in summary.json) hold."""
    el = fit.elements
    one = "vertex" if el == "vertices" else "voxel"
    out = {
        "peak_statistic": (f"the peak statistic over the {el} tested, in the direction of the test: the largest "
                           "t for tail greater, the smallest for tail less, the largest |t| for two-sided t "
                           "tests (signed), the largest F"),
        "peak_z": "z at the peak (z of equal p, signed like t)",
        f"{el}_<p>_lt_<level>": f"{el} whose p map <p> (p uncorrected, p_fdr, p_fwe, ...) is below <level>",
        "clusters_<kind>": (f"clusters with FWE p < {CLUSTER_ALPHA} in the cluster table "
                            f"{table_path('<hypothesis>', 'clusters_<kind>')}"),
    }
    if el == "vertices":
        out["peak_vertex"] = f"index of the peak {one} in the surface, counted from 0"
    else:
        out["peak_i, peak_j, peak_k"] = f"{one} indices of the peak in the image, counted from 0"
        out["peak_x_mm, peak_y_mm, peak_z_mm"] = "peak coordinates in mm (from the image affine)"
    return out
