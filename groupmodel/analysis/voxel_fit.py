"""Run the OLS engine over a table column (ROI analysis) or over all chunks of the images.

The engine (:mod:`groupmodel.ols`) is a pure function of (design, tests, chunk of data); this module only
feeds it and collects what it returns.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from ..engine.ols import ChunkResult, fit_chunk, prepare
from ..errors import InputError, ModelError
from ..model.assembly import Model, build
from ..model.spec import ModelSpec, load_spec
from ..text import DISCLAIMER
from .corrections import InferenceOptions, parametric_corrections, permutation_inference


@dataclass
class TableFit:
    """The table-level fit of every hypothesis to one outcome column."""

    model: Model
    outcome: str
    result: ChunkResult
    table: pd.DataFrame

    def format(self) -> str:
        """The results table for a terminal."""
        lines = [
            f"outcome {self.outcome}: {self.model.design.n_observations} observations, "
            f"{self.result.df_resid} residual df, residual SD {float(np.sqrt(self.result.residual_variance[0])):.6g}",
        ]
        frame = self.table.copy()
        for col in ("estimate", "se", "statistic", "z"):
            frame[col] = frame[col].map(lambda v: "n/a" if pd.isna(v) else f"{v:.6g}")
        frame["p"] = frame["p"].map(lambda v: f"{v:.4g}")
        lines.append(frame.to_string(index=False))
        lines.append(DISCLAIMER)
        return "\n".join(lines)


def results_table(model: Model, result: ChunkResult, voxel: int = 0) -> pd.DataFrame:
    """One row per hypothesis: test, estimate, se, statistic, df1, df2, p (for its tail), z of equal p."""
    records = []
    for h in model.hypotheses.values():
        r = result[h.name]
        t = h.test == "t"
        records.append({
            "hypothesis": h.name,
            "test": h.test,
            "tail": h.tail,
            "estimate": float(r.effect[voxel]) if t else np.nan,
            "se": float(r.se[voxel]) if t and r.se is not None else np.nan,
            "statistic": float(r.statistic[voxel]),
            "df1": r.df1,
            "df2": r.df2,
            "p": float(r.p[voxel]),
            "z": float(r.z[voxel]),
        })
    return pd.DataFrame.from_records(
        records, columns=["hypothesis", "test", "tail", "estimate", "se", "statistic", "df1", "df2", "p", "z"]
    )


def _require_fittable(model: Model) -> None:
    model.raise_for_errors()
    if not model.hypotheses:
        raise ModelError(f"{model.spec.name}: the spec has no hypotheses to test; add a 'hypotheses' object")


def fit_table(spec: ModelSpec | Path | str, outcome: str) -> TableFit:
    """Fit every hypothesis of ``spec`` to the numeric table column ``outcome``.

    Rows with ``n/a`` in the outcome are left out and listed with the other exclusions.
    """
    if not isinstance(spec, ModelSpec):
        spec = load_spec(spec)
    model = build(spec, numeric_columns=[outcome])
    _require_fittable(model)
    y = model.sample.data[outcome].to_numpy(dtype=float)[:, None]
    prepared = prepare(model.design.matrix, model.tests())
    result = fit_chunk(prepared, y)
    return TableFit(model, outcome, result, results_table(model, result))


# --------------------------------------------------------------------------------------------------
# Voxelwise fit
# --------------------------------------------------------------------------------------------------
#: Share of --memory given to the image data matrix; the rest is for one chunk's work and the result maps.
DATA_SHARE = 0.6
#: Maps written for each kind of test (statistic names as in the sidecars).
T_MAPS = ("effect", "se", "t", "z", "p", "mlog10p", "p_fdr", "p_bonferroni")
F_MAPS = ("F", "z", "p", "mlog10p", "p_fdr", "p_bonferroni")


@dataclass
class VoxelFit:
    """Maps of a voxelwise fit, in mask order, plus what is needed to write them.

    Attributes
    ----------
    model : Model
    grid : groupmodel.images.Grid
    mask : ndarray of bool, shape grid.shape
    maps : dict
        Hypothesis name -> statistic name (``effect``, ``se``, ``t``/``F``, ``z``, ``p``, ``mlog10p``) ->
        float64 array of shape (n_in_mask,).
    residual_variance : ndarray, shape (n_in_mask,)
    df_resid : int
    mask_report : dict
        Voxel counts of the mask (in mask, left out for NaN/inf, left out for zero everywhere).
    dropped : list of (participant_id, reason)
        Participants left out for missing images (with --drop-missing-images).
    inference : dict or None
        The corrected-inference settings used.
    records : dict
        Hypothesis -> what its permutation maps were made with (method, J, exhaustive, seed, TFCE, ...).
    tables : dict
        Hypothesis -> kind (``voxel_fwe``, ``tfce_fwe``, ``cluster_extent_fwe``) -> cluster table.
    """

    model: Model
    grid: Any
    mask: np.ndarray
    maps: dict[str, dict[str, np.ndarray]]
    residual_variance: np.ndarray
    df_resid: int
    mask_report: dict[str, int]
    dropped: list[tuple[str, str]]
    warnings: list[str]
    inference: dict[str, Any] | None = None
    records: dict[str, dict[str, Any]] = field(default_factory=dict)
    tables: dict[str, dict[str, pd.DataFrame]] = field(default_factory=dict)

    def summary(self) -> pd.DataFrame:
        """Per hypothesis: test, df, peak |statistic|, peak z, voxels with p < 0.001 and p < 0.05 (uncorrected)."""
        rows = []
        for h in self.model.hypotheses.values():
            m = self.maps[h.name]
            stat = m["t"] if h.test == "t" else m["F"]
            # NaN statistics (zero-variance voxels) are not tested; no tested voxel at all gives NaN peaks
            tested = ~np.isnan(stat)
            rows.append({
                "hypothesis": h.name,
                "test": h.test,
                "tail": h.tail,
                "df1": h.n_rows,
                "df2": self.df_resid,
                "peak_statistic": float(stat[np.nanargmax(np.abs(stat))]) if tested.any() else np.nan,
                "peak_z": float(np.max(m["z"][tested])) if tested.any() else np.nan,
                "voxels_p_lt_0.001": int(np.count_nonzero(m["p"] < 1e-3)),
                "voxels_p_lt_0.05": int(np.count_nonzero(m["p"] < 0.05)),
                **{f"voxels_{k}_lt_0.05": int(np.count_nonzero(m[k] < 0.05))
                   for k in ("p_fdr", "p_fwe", "p_tfce_fwe", "p_cluster_fwe") if k in m},
            })
        return pd.DataFrame(rows)


def _progress(total: int, desc: str, unit: str = "vox") -> Any:
    """A tqdm bar on a terminal, nothing otherwise."""
    import sys

    if not sys.stderr.isatty():
        return None
    from tqdm import tqdm

    return tqdm(total=total, desc=desc, unit=unit, leave=False)


def open_images(model: Model, drop_missing: bool = False) -> tuple[Model, Any, list[tuple[str, str]]]:
    """Resolve and check the images of a model's observations; rebuild the model if some are dropped.

    Returns
    -------
    model : Model
        With participants without images left out (listed among the exclusions) when ``drop_missing``.
    source : groupmodel.images.ImageSource
        Checked, in design-row order.
    dropped : list of (participant_id, reason)
    """
    from ..images import check_images, resolve_images

    spec = model.spec
    if not spec.images:
        raise InputError(
            f'{spec.name}: expected an "images" entry (a path pattern such as '
            '"maps/{participant_id}_effect.nii.gz", a column of paths, or one 4-D file); found none; '
            "add it, or fit one table column with --outcome"
        )
    # The participants table was read once, by build: its rows come from the sample.
    sample = model.sample
    source = resolve_images(spec.images, model.design.participant_ids, sample.table_rows(), spec.base_dir,
                            source_label=f'{spec.name} "images"', file_rows=sample.file_rows,
                            n_file_rows=sample.n_file_rows)
    source, dropped = check_images(source, drop_missing=drop_missing)
    if dropped:
        model = model.without({pid: reason for pid, reason in dropped})
        source = resolve_images(spec.images, model.design.participant_ids, model.sample.table_rows(),
                                spec.base_dir, source_label=f'{spec.name} "images"')
        source, _ = check_images(source)
    return model, source, dropped


def fit_images(
    spec: ModelSpec | Path | str,
    mask: Path | str | None = None,
    memory_bytes: int = 2 * 1024**3,
    drop_missing: bool = False,
    chunk_voxels: int | None = None,
    progress: bool = True,
    inference: InferenceOptions | None = None,
) -> VoxelFit:
    """Fit every hypothesis of ``spec`` at every voxel of its images.

    Every hypothesis also gets Benjamini-Hochberg and Bonferroni adjusted p maps over the mask; with
    ``inference`` (``permutations > 0``) permutation inference runs on the same data while they are loaded.

    Parameters
    ----------
    spec : ModelSpec or path
    mask : path, optional
        Mask image on the grid of the images (default: the spec's ``mask``, else every voxel finite in all
        images and nonzero in some).
    memory_bytes : int
        Budget for image data and working arrays (bytes).
    drop_missing : bool
        Leave out participants whose image is missing (listed) instead of stopping.
    chunk_voxels : int, optional
        Voxels per chunk (default: from the budget).  Results do not depend on it.
    progress : bool
        Show a progress bar when stderr is a terminal.
    inference : InferenceOptions, optional
        Permutation inference settings (default: the spec's ``inference`` object).
    """
    from ..images import chunk_size_for, load_masked

    if not isinstance(spec, ModelSpec):
        spec = load_spec(spec)
    if inference is None:
        inference = InferenceOptions.from_spec(spec)
    model = build(spec)
    _require_fittable(model)
    model, source, dropped = open_images(model, drop_missing)
    _require_fittable(model)
    tests = model.tests()
    prepared = prepare(model.design.matrix, tests)
    mask_path = mask if mask is not None else spec.mask
    # Reading (decompressing) the images is usually the longest step: it gets its own bar.
    read_bar = _progress(len(source), "reading images", unit="image") if progress else None

    def images_read(done: int, total: int) -> None:
        read_bar.update(done - read_bar.n)

    try:
        data = load_masked(source, mask_path, int(memory_bytes * DATA_SHARE),
                           progress=None if read_bar is None else images_read)
    finally:
        if read_bar is not None:
            read_bar.close()
    bar = None
    try:
        n_vox = data.n_in_mask
        maps = {h.name: {k: np.empty(n_vox) for k in (T_MAPS if h.test == "t" else F_MAPS)}
                for h in model.hypotheses.values()}
        resid_var = np.empty(n_vox)
        if chunk_voxels is None:
            n_maps = sum(len(m) for m in maps.values()) + 1
            work = max(memory_bytes * (1 - DATA_SHARE) - n_maps * n_vox * 8, memory_bytes * 0.1)
            chunk_voxels = chunk_size_for(model.design.n_observations, len(tests), int(work))
        bar = _progress(n_vox, "fitting") if progress else None
        for cols, y in data.chunks(chunk_voxels):
            res = fit_chunk(prepared, y)
            resid_var[cols] = res.residual_variance
            for h in model.hypotheses.values():
                r = res[h.name]
                m = maps[h.name]
                if h.test == "t":
                    m["effect"][cols] = r.effect
                    m["se"][cols] = r.se
                    m["t"][cols] = r.statistic
                else:
                    m["F"][cols] = r.statistic
                m["z"][cols] = r.z
                m["p"][cols] = r.p
                m["mlog10p"][cols] = r.mlog10p
            if bar is not None:
                bar.update(cols.stop - cols.start)
        # A rank-deficient design is fitted (with a generalised inverse); say so where the fit is reported.
        warnings = [f.message for f in model.findings if f.code == "rank_deficient"] + list(data.warnings)
        if maps:
            first = next(iter(maps.values()))
            n_flat = int(np.count_nonzero(np.isnan(first["t" if "t" in first else "F"])))
            if n_flat:
                warnings.append(
                    f"{n_flat} of {n_vox} voxels have (numerically) zero residual variance, e.g. the same "
                    "value in every image: their t, F, z and p are NaN (not tested)"
                )
        for name, extra in parametric_corrections({n: m["p"] for n, m in maps.items()}).items():
            maps[name].update(extra)
        records: dict[str, dict[str, Any]] = {}
        tables: dict[str, dict[str, pd.DataFrame]] = {}
        if inference.active:
            if bar is not None:
                bar.close()
            perm_bar = _progress(inference.permutations * len(maps), "permutations", unit="perm") \
                if progress else None
            done_before: dict[str, int] = {}

            def perm_progress(name: str, done: int, total: int) -> None:
                if perm_bar is not None:
                    perm_bar.update(done - done_before.get(name, 0))
                    done_before[name] = done

            # Half of the working share each (a fifth of the budget) for residualised data and whole maps.
            share = int(memory_bytes * (1 - DATA_SHARE) * 0.5)
            try:
                results = permutation_inference(
                    model, data, inference, cache_bytes=share, maps_bytes=share,
                    chunk_voxels=chunk_voxels, progress=perm_progress,
                )
            finally:
                if perm_bar is not None:
                    perm_bar.close()
            for name, res in results.items():
                maps[name].update(res.maps)
                records[name] = res.record
                tables[name] = res.tables
        report = {
            "voxels_in_mask": int(n_vox),
            "voxels_left_out_nonfinite_in_some_images": int(data.n_nonfinite_excluded),
            "voxels_left_out_nonfinite_in_all_images": int(data.n_nonfinite_everywhere),
            "voxels_left_out_zero_in_all_images": int(data.n_zero_excluded),
        }
        return VoxelFit(model, data.grid, data.mask, maps, resid_var, prepared.df_resid, report, dropped,
                        warnings, inference=inference.as_dict(), records=records, tables=tables)
    finally:
        if bar is not None:
            bar.close()
        data.close()


__all__ = ["TableFit", "VoxelFit", "fit_table", "fit_images", "results_table", "InputError"]
