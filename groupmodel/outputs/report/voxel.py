"""The voxelwise part of the report: per hypothesis slices (or top vertices), clusters and p values; the
residual SD map; the per-participant check."""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from ...engine.participant_check import UNUSUAL_Z
from ...errors import InputError
from .data import FolderData
from .page import esc, figure, num, paragraph, table
from .picture import Picture
from .strata import sphericity_html, strata_of, stratum_paragraph
from .svg import p_histogram, residual_dots

#: Uncorrected level used when no corrected map exists.
UNCORRECTED_P = 0.001
#: Corrected maps, preferred first.
CORRECTED = (("p_tfce_fwe", "TFCE family-wise error"), ("p_fwe", "voxel-level family-wise error"),
             ("p_cluster_fwe", "cluster-extent family-wise error"))
TOP_VERTICES = 10

Section = tuple[str, str, str]


@dataclass(frozen=True)
class Grid:
    """The mask and background of the maps (``surface``: values over vertices, 1-D)."""

    mask: np.ndarray
    background: np.ndarray | None
    surface: bool
    elements: str
    background_words: str


def open_grid(d: FolderData, background: Path | None) -> Grid:
    locs = d.locations
    mask_path = locs.map(None, "mask")
    if mask_path is None:
        raise FileNotFoundError("mask")
    mask = d.load_map(mask_path) > 0
    surface = mask.ndim == 1
    bg_path = background if background is not None else locs.map(None, "mean_input")
    bg = d.load_map(bg_path) if bg_path is not None and not surface else None
    if bg is not None and bg.ndim > 3:
        bg = bg[..., 0]
    if bg is not None and bg.shape != mask.shape:
        raise InputError(f"{bg_path}: expected an image on the grid of the maps {mask.shape}, found shape "
                         f"{bg.shape}; name another background image")
    words = ("mask (no background image)" if bg is None else f"image {background}" if background is not None
             else "mean of the input images")
    return Grid(mask, bg, surface, "vertices" if surface else "voxels", words)


def voxel_sections(d: FolderData, pictures: bool, background: Path | None) -> list[Section]:
    grid = open_grid(d, background)
    out = [("voxel-fit", "Voxelwise fit", _overview(d, grid))]
    for name in d.hypotheses:
        out.append((f"hyp-{name}", f"Hypothesis {name}", _hypothesis(d, grid, name, pictures)))
    out.append(("residuals", "Residuals and participants", _residuals(d, grid, pictures)))
    return out


def _overview(d: FolderData, grid: Grid) -> str:
    s = d.summary or {}
    mask = s.get("mask", {})
    dfs = (f"{s.get('df_resid')} residual degrees of freedom" if strata_of(d) is None else
           f"{(strata_of(d) or {}).get('participants')} participants, each hypothesis in its error stratum "
           "(its df in the table below)")
    parts = [paragraph(f"{s.get('n_observations')} observations, {dfs}, "
                       f"{mask.get('voxels_in_mask', int(grid.mask.sum()))} {grid.elements} in the mask.")]
    inf = s.get("inference")
    if inf and inf.get("permutations"):
        parts.append(paragraph(f"Permutation inference: {inf.get('permutations')} rearrangements, seed "
                               f"{inf.get('seed')}, TFCE {'on' if inf.get('tfce') else 'off'}."))
    else:
        shown = ("the vertex tables mark the vertices past an uncorrected level" if grid.surface
                 else "slices are thresholded at an uncorrected level")
        parts.append(paragraph(f"No permutation inference: {shown}, labelled as such."))
    for w in s.get("warnings", []):
        parts.append(paragraph("Warning: " + w, "finding-warning"))
    if d.summary_table is not None:
        parts.append(table(list(d.summary_table.columns), d.summary_table.itertuples(index=False, name=None),
                           ident="summary"))
    return "".join(parts)


def _masked(values: np.ndarray, grid: Grid) -> np.ndarray:
    return values[grid.mask]


def _threshold(d: FolderData, name: str, grid: Grid) -> tuple[np.ndarray | None, str]:
    """Which elements to show (in the mask's order) and the words for the threshold."""
    locs = d.locations
    for stat, words in CORRECTED:
        path = locs.map(name, stat)
        if path is not None:
            return _masked(d.load_map(path), grid) < 0.05, f"{words} p < 0.05 (corrected)"
    path = locs.map(name, "p")
    if path is None:
        return None, ""
    return (_masked(d.load_map(path), grid) < UNCORRECTED_P,
            f"p < {num(UNCORRECTED_P)} UNCORRECTED (no permutation results in this folder)")


def _hypothesis(d: FolderData, grid: Grid, name: str, pictures: bool) -> str:
    h = d.hypotheses[name]
    locs = d.locations
    parts = [paragraph(f"{h['test']} test ({h.get('tail')}): {h.get('statement', '')}"), stratum_paragraph(d, name),
             sphericity_html(d, name, grid.mask)]
    z_path, p_path = locs.map(name, "z"), locs.map(name, "p")
    if z_path is None or p_path is None:
        return "".join(parts) + paragraph("No z or p map in this folder.", "note")
    z = _masked(d.load_map(z_path), grid)
    p = _masked(d.load_map(p_path), grid)
    shown, words = _threshold(d, name, grid)
    assert shown is not None
    parts.append(paragraph(f"Shown: {int(np.count_nonzero(shown))} of {z.size} {grid.elements} at {words}."))
    if grid.surface:
        parts.append(_top_vertices(z, p, shown, name, np.flatnonzero(grid.mask)))
    else:
        pic, ks = _slices(grid, z, shown) if pictures else (None, [])
        parts.append(figure(pic, f"Axial slices k = {', '.join(map(str, ks))} of the z map over the "
                            f"{grid.background_words}; amber above zero, teal below (brighter is further from "
                            f"zero, up to |z| = {_limit_text(z, shown)}); only {grid.elements} at {words}.",
                            f"z map slices of {name}"))
    parts.append(figure(p_histogram(p, grid.elements, f"p value histogram of {name}") if pictures else None,
                        "Uncorrected p values over the mask; the dashed line is the count expected with no "
                        "effect anywhere.", f"p value histogram of {name}"))
    parts.append(_clusters(d, name) if d.locations.cluster_tables(name) or grid.surface
                 else _uncorrected_clusters(d, grid, name, z, shown, words))
    return "".join(parts)


def _uncorrected_clusters(d: FolderData, grid: Grid, name: str, z: np.ndarray, shown: np.ndarray,
                          words: str) -> str:
    from .uncorrected_clusters import clusters_shown

    mask_path = d.locations.map(None, "mask")
    assert mask_path is not None
    frame = clusters_shown(grid.mask, mask_path, z, shown)
    head = f"<h3>Clusters at {esc(words)}</h3>" + paragraph(
        "Groups of touching voxels (26 neighbours) among those shown; no family-wise error control.", "note")
    if frame.empty:
        return head + paragraph("No cluster.")
    return head + table(list(frame.columns), frame.itertuples(index=False, name=None), ident=f"clusters-{name}")


def _unmask(values: np.ndarray, mask: np.ndarray) -> np.ndarray:
    full = np.full(mask.shape, np.nan)
    full[mask] = values
    return full


def _limit(z: np.ndarray, shown: np.ndarray) -> float:
    finite = np.abs(z[shown & np.isfinite(z)])
    return float(finite.max()) if finite.size else 1.0


def _limit_text(z: np.ndarray, shown: np.ndarray) -> str:
    return num(_limit(z, shown))


def _slices(grid: Grid, z: np.ndarray, shown: np.ndarray) -> tuple[Picture, list[int]]:
    from .plots import montage

    bg = grid.background if grid.background is not None else grid.mask.astype(float)
    over = _unmask(np.where(shown, z, np.nan), grid.mask)
    return montage(bg, over, grid.mask, limit=_limit(z, shown))


def _top_vertices(z: np.ndarray, p: np.ndarray, shown: np.ndarray, name: str, vertices: np.ndarray) -> str:
    """The TOP_VERTICES vertices of largest |z|, with their vertex index on the surface."""
    index = np.flatnonzero(np.isfinite(z))
    order = index[np.argsort(-np.abs(z[index]), kind="stable")][:TOP_VERTICES]
    rows = [(int(vertices[i]), float(z[i]), float(p[i]), bool(shown[i])) for i in order]
    return (f"<h3>Top {TOP_VERTICES} vertices by |z|</h3>"
            + table(["vertex", "z", "p", "past the threshold"], rows, ident=f"top-{name}"))


def _clusters(d: FolderData, name: str) -> str:
    tables = d.locations.cluster_tables(name)
    if not tables:
        return paragraph("No cluster table: cluster tables come with permutation inference.", "note")
    parts = []
    for kind, path in tables.items():
        frame = pd.read_csv(path, sep="\t", na_values=["n/a"], keep_default_na=False)
        parts.append(f"<h3>Clusters ({esc(kind.replace('_', ' '))})</h3>")
        if frame.empty:
            parts.append(paragraph("No cluster."))
        else:
            parts.append(table(list(frame.columns), frame.itertuples(index=False, name=None),
                               ident=f"clusters-{name}-{kind}"))
    return "".join(parts)


def _residuals(d: FolderData, grid: Grid, pictures: bool) -> str:
    parts = []
    path = d.locations.map(None, "residual_variance")
    if path is not None:
        sd = np.sqrt(np.clip(_masked(d.load_map(path), grid), 0, None))
        of = (" (of the participants' averages over the within cells: the between stratum)"
              if strata_of(d) is not None else "")
        parts.append(paragraph(f"Residual SD{of} over the mask: median {num(float(np.median(sd)))}, "
                               f"2nd to 98th percentile {num(float(np.percentile(sd, 2)))} to "
                               f"{num(float(np.percentile(sd, 98)))}."))
        if not grid.surface:
            pic = None
            top = float(np.percentile(sd, 99))
            if pictures:
                from .plots import montage

                bg = grid.background if grid.background is not None else grid.mask.astype(float)
                pic = montage(bg, _unmask(sd, grid.mask), grid.mask, limit=top, cmap="cividis")[0]
            parts.append(figure(pic, "Residual standard deviation, in the units of the input images: dark blue "
                                f"0 to light yellow {num(top)} (99th percentile) and above.",
                                "residual SD map"))
    parts.append(_participants(d, pictures))
    return "".join(parts)


def _participants(d: FolderData, pictures: bool) -> str:
    r = d.residuals
    if r is None:
        return paragraph("No per-participant check in this folder (participants_residuals.tsv).", "note")
    unusual = r["unusual"].astype(str).str.lower().isin(["true", "1", "yes"]).to_numpy()
    named = r.loc[unusual, "participant_id"].astype(str).tolist()
    groups = (d.summary or {}).get("variance_groups") or {}
    median = f"the median of its variance group ({groups['factor']})" if groups.get("factor") else "the median"
    words = (f"Unusual: {', '.join(named)} (mean |residual| more than {num(UNUSUAL_Z)} robust SDs above "
             f"{median}): look at these images before reading the results." if named
             else f"No participant stands out (none more than {num(UNUSUAL_Z)} robust SDs above {median}).")
    ids = r["participant_id"].astype(str).tolist()
    pic = (residual_dots(ids, r["mean_abs_residual"].to_numpy(float), unusual, "per-participant residuals")
           if pictures else None)
    parts = ["<h3>Per-participant check</h3>", paragraph(words, "finding-warning" if named else None),
             figure(pic, "Each participant's mean absolute residual across the mask, sorted (large values: an "
                    "image unlike the others).", "per-participant mean absolute residual")]
    if named:
        rows = [(a, float(b), float(c)) for a, b, c, u in
                zip(ids, r["mean_abs_residual"], r["robust_z"], unusual, strict=True) if u]
        parts.append(table(["participant", "mean |residual|", "robust z"], rows, ident="unusual-participants"))
    return "".join(parts)


def median_residual_sd(d: FolderData) -> float | None:
    """The median residual SD over the mask (for the sensitivity)."""
    path = d.locations.map(None, "residual_variance")
    mpath = d.locations.map(None, "mask")
    if path is None or mpath is None:
        return None
    mask = d.load_map(mpath) > 0
    return float(np.median(np.sqrt(np.clip(d.load_map(path)[mask], 0, None))))


def n_in_mask(d: FolderData) -> int:
    s: dict[str, Any] = d.summary or {}
    return int(s.get("mask", {}).get("voxels_in_mask", 1))


__all__ = ["CORRECTED", "UNCORRECTED_P", "median_residual_sd", "n_in_mask", "voxel_sections"]
