"""The files of a fit: results.tsv/json of a table fit; maps, sidecars, cluster tables and a summary of a voxel fit.

Both are written atomically, beside the design and contrast files of the model.
"""

from __future__ import annotations

from collections.abc import Callable
from pathlib import Path
from typing import TYPE_CHECKING, Any

from .design_files import PictureJob, write_model, written_hypothesis
from .folder import OutputFolder
from .provenance import provenance

if TYPE_CHECKING:
    from ..analysis.table_fit import TableFit
    from ..analysis.voxel_fit import VoxelFit
    from ..model.hypotheses import Hypothesis


# --------------------------------------------------------------------------------------------------
# Table fit
# --------------------------------------------------------------------------------------------------
#: What the columns of results.tsv hold.
RESULTS_COLUMNS = {
    "estimate": "contrast estimate L b (t tests; n/a for F)",
    "se": "standard error of the estimate (t tests)",
    "statistic": "t or F",
    "df1": "numerator degrees of freedom (1 for t: t squared is F(1, df2))",
    "df2": "residual degrees of freedom",
    "p": "p value for the hypothesis's tail",
    "z": "z of equal p (signed like t; upper tail for F)",
}


def write_table_fit(fit: TableFit, out: Path | str, force: bool = False, pictures: bool = True) -> Path:
    """Write results.tsv, results.json and the design files (with their pictures) atomically."""
    folder = OutputFolder(out, force=force)
    with folder as o:
        write_model(fit.model, o, pictures=pictures)
        o.write_tsv("results.tsv", fit.table)
        o.write_json("results.json", _results_sidecar(fit))
    return Path(out)


def _results_sidecar(fit: TableFit) -> dict[str, Any]:
    return {
        **provenance(),
        "outcome": fit.outcome,
        "n_observations": fit.model.design.n_observations,
        "df_resid": fit.result.df_resid,
        "residual_variance": float(fit.result.residual_variance[0]),
        "columns": RESULTS_COLUMNS,
        "hypotheses": {n: {"statement": h.statement, "test": h.test, "tail": h.tail}
                       for n, h in fit.model.hypotheses.items()},
        "excluded": [e.as_dict() for e in fit.model.sample.exclusions],
        **({"variance_groups": fit.variance_groups} if fit.variance_groups is not None else {}),
    }


# --------------------------------------------------------------------------------------------------
# Voxelwise fit
# --------------------------------------------------------------------------------------------------
#: Maps that come from permutations (their sidecars record method, J, exhaustive and seed).
PERMUTATION_STATS = ("p_perm", "p_fwe", "tfce", "p_tfce_fwe", "p_cluster_fwe")
CORRECTION_NOTES = {
    "p_fdr": "Benjamini-Hochberg (1995) adjusted p over the voxels of the mask",
    "p_bonferroni": "Bonferroni adjusted p, min(1, p x voxels in the mask)",
    "p_perm": "uncorrected permutation p (identity included: never below 1/J)",
    "p_fwe": "family-wise error p from the maximum statistic over the mask (Nichols and Holmes 2002)",
    "tfce": "threshold-free cluster enhancement (Smith and Nichols 2009) of the statistic, sign kept",
    "p_tfce_fwe": "family-wise error p from the maximum TFCE over the mask",
    "p_cluster_fwe": "family-wise error p of the voxel's cluster, by cluster size at the stated z threshold",
}
#: What the cluster tables hold.
CLUSTER_KINDS = {
    "voxel_fwe": "clusters of voxels with voxel-level FWE p < 0.05; p_fwe is the smallest in the cluster",
    "tfce_fwe": "clusters of voxels with TFCE FWE p < 0.05; p_fwe is the smallest in the cluster",
    "cluster_extent_fwe": "clusters at the cluster-forming threshold; p_fwe is the cluster-extent FWE p",
}
CLUSTER_COLUMNS = {
    "cluster": "cluster number, largest first",
    "sign": "+1 for high values, -1 for low values (two-sided t)",
    "size": "voxels (or vertices)",
    "peak_stat": "most extreme statistic in the cluster's direction",
    "peak_index": "position of the peak in the mask's voxel order",
    "peak_i, peak_j, peak_k": "voxel indices of the peak in the image, counted from 0 (volumes only)",
    "peak_x_mm, peak_y_mm, peak_z_mm": "peak coordinates in mm (from the image affine)",
    "com_x_mm, com_y_mm, com_z_mm": "unweighted centre of mass in mm",
    "p_fwe": "family-wise error p",
}
#: The keys of a hypothesis's weights over cells (contrasts.json) that map sidecars carry too.
CELL_WEIGHT_KEYS = ("weights_over_cells", "slope_weights_over_cells", "slope_of")
_INTENTS = {"t": "t test", "F": "f test", "z": "z score", "p": "p value", "effect": "estimate", "se": "estimate",
            "mlog10p": "none", "residual_variance": "estimate"}


def _map_name(grid: Any, stem: str) -> str:
    """``stem.nii.gz`` for volumes; ``stem.func.gii`` for surface data (the GIFTI name of data over vertices)."""
    return stem + (".func.gii" if grid.kind == "gifti" else ".nii.gz")


def _in_words_of(grid: Any, text: str) -> str:
    """A note about voxels said of vertices for surface data."""
    if grid.kind != "gifti":
        return text
    return text.replace("voxels", "vertices").replace("voxel's", "vertex's").replace("voxel", "vertex")


def map_sidecar(fit: VoxelFit, name: str | None, statistic: str, **extra: Any) -> dict[str, Any]:
    """The JSON sidecar of one map."""
    out: dict[str, Any] = {"hypothesis": name, "statistic": statistic}
    if name is not None:
        h = fit.model.hypotheses[name]
        written = written_hypothesis(h).as_dict(fit.model.design)
        out.update({
            "test": h.test,
            "statement": h.statement,
            "weights": written["weights"],
            # over cell means (over cell slopes for a slope), as in contrasts.json
            **{k: written[k] for k in CELL_WEIGHT_KEYS if k in written},
            "df1": h.n_rows,
            "df2": fit.df_resid,
            "tail": h.tail,
        })
    else:
        out.update({"df2": fit.df_resid})
    record = getattr(fit, "variance_groups", None)
    if record is not None:  # Welch's v and G: df2 is approximate and per voxel
        out.update({"df2": record["df2"], "variance_groups": record})
    out.update(extra)
    out.update(provenance())
    return out


def _intent(stat: str, h: Hypothesis, df_resid: int) -> tuple[str, tuple[int, ...]] | None:
    """The NIfTI intent of a map: t and F with their degrees of freedom, z and p without; others none."""
    if stat == "t":
        return ("t test", (df_resid,))
    if stat == "F":
        return ("f test", (h.n_rows, df_resid))
    if stat in ("z", "p"):
        return (_INTENTS[stat], ())
    return None


def _write_hypothesis(o: OutputFolder, fit: VoxelFit, h: Hypothesis) -> list[str]:
    """Every map of one hypothesis with its sidecar, then its cluster tables; returns the file names."""
    from ..images import write_map

    written: list[str] = []
    for stat, values in fit.maps[h.name].items():
        fname = _map_name(fit.grid, f"{h.name}_{stat}")
        write_map(o.file(fname), values, fit.mask, fit.grid, intent=_intent(stat, h, fit.df_resid),
                  description=f"groupmodel {h.name} {stat}"[:79])
        # the sidecar is named after the map's stem: hypothesis names may contain dots
        extra = dict(fit.records.get(h.name, {})) if stat in PERMUTATION_STATS else {}
        if stat in CORRECTION_NOTES:
            extra["correction"] = _in_words_of(fit.grid, CORRECTION_NOTES[stat])
        o.write_json(f"{h.name}_{stat}.json", map_sidecar(fit, h.name, stat, **extra))
        written.append(fname)
    for kind, table in fit.tables.get(h.name, {}).items():
        tname = f"{h.name}_clusters_{kind}.tsv"
        o.write_tsv(tname, table)
        o.write_json(f"{h.name}_clusters_{kind}.json", map_sidecar(
            fit, h.name, f"clusters_{kind}", **fit.records.get(h.name, {}), columns=CLUSTER_COLUMNS,
            clusters=_in_words_of(fit.grid, CLUSTER_KINDS[kind])))
        written.append(tname)
    return written


def _write_residuals_and_mask(o: OutputFolder, fit: VoxelFit) -> list[str]:
    from ..images import write_map, write_mask

    fname = _map_name(fit.grid, "residual_variance")
    write_map(o.file(fname), fit.residual_variance, fit.mask, fit.grid, description="groupmodel residual variance")
    o.write_json("residual_variance.json", map_sidecar(fit, None, "residual_variance"))
    mname = _map_name(fit.grid, "mask")
    write_mask(o.file(mname), fit.mask, fit.grid)
    o.write_json("mask.json", {"statistic": "mask", **fit.mask_report, **provenance(("software_version",))})
    return [fname, mname]


def _write_summary(o: OutputFolder, fit: VoxelFit) -> list[str]:
    o.write_tsv("summary.tsv", fit.summary())
    o.write_json("summary.json", {
        **provenance(),
        "spec": str(fit.model.spec.path), "n_observations": fit.model.design.n_observations,
        "df_resid": fit.df_resid, "mask": fit.mask_report,
        "excluded": [e.as_dict() for e in fit.model.sample.exclusions],
        "warnings": fit.warnings, "inference": _inference_record(fit),
    })
    return ["summary.tsv", "summary.json"]


def _inference_record(fit: VoxelFit) -> dict[str, Any] | None:
    """The inference settings, with the method each hypothesis was tested with (never ``auto``) when
    permutations ran; the setting asked for is kept as ``method_setting``."""
    if fit.inference is None or not fit.records:
        return fit.inference
    out: dict[str, Any] = {}
    for key, value in fit.inference.items():
        if key == "method":
            out["method"] = {name: rec["method"] for name, rec in fit.records.items()}
            out["method_setting"] = value
        else:
            out[key] = value
    return out


def write_voxel_fit(fit: VoxelFit, out: Path | str, force: bool = False,
                    extra_writer: Callable[[OutputFolder], list[str]] | None = None,
                    pictures: bool = True) -> list[str]:
    """Write every map with its sidecar, the mask, the design files and a summary, atomically.

    The design and contrast pictures (``pictures``) are drawn in a thread while the maps are written.
    """
    folder = OutputFolder(out, force=force)
    written: list[str] = []
    with folder as o:
        written += write_model(fit.model, o, pictures=False)
        job = PictureJob(fit.model, o) if pictures else None
        try:
            for h in fit.model.hypotheses.values():
                written += _write_hypothesis(o, fit, h)
            written += _write_residuals_and_mask(o, fit)
            written += _write_summary(o, fit)
            if extra_writer is not None:
                written += extra_writer(o)
        finally:
            # never leave the thread writing into a folder that is being removed
            picture_names = job.join() if job is not None else []
        written[4:4] = picture_names  # listed beside the design files, as before
    return written
