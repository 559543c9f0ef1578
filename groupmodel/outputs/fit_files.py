"""The files of a fit: results.tsv/json of a table fit; maps, sidecars, cluster tables and a summary of a voxel fit.

Both are written atomically, beside the design and contrast files of the model; the maps and tables of each
hypothesis go to its own folder (:mod:`.index` has the layout and writes the index ``outputs.json``).
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from ..text import number_text
from .dataset import dataset_description, finish_folder
from .design_files import PictureJob, write_model, written_hypothesis
from .folder import OutputFolder
from .index import map_path, sidecar_path, table_path
from .provenance import RunInputs, command_line, provenance, run_record
from .strata_files import effect_size_notes
from .summary import summary_columns, summary_frame, summary_records

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
    "ci_lower": "lower bound of the two-sided confidence interval of the estimate (t tests; level in ci_level)",
    "ci_upper": "upper bound of the two-sided confidence interval of the estimate (t tests)",
    "cohens_d": "estimate / residual SD, for a t test comparing two cell or marginal means (weights over cell "
                "means summing to 0, positive part to 1); n/a elsewhere",
    "partial_eta_squared": "F df1 / (F df1 + df2) (F = t squared for t tests)",
    "partial_eta_squared_ci_lower": "lower bound of its two-sided confidence interval from the noncentral F "
                                    "(Steiger 2004; lambda / (lambda + df1 + df2 + 1))",
    "partial_eta_squared_ci_upper": "upper bound of the same interval",
}


def write_table_fit(fit: TableFit, out: Path | str, force: bool = False, pictures: bool = True,
                    command: Sequence[str] | None = None) -> Path:
    """Write results.tsv, results.json and the design files (with their pictures) atomically, then
    dataset_description.json, the index outputs.json and report.html."""
    from .report import write_report

    folder = OutputFolder(out, force=force)
    run = run_record(RunInputs.of_spec(fit.model.spec, sample=fit.model.sample), fit.clock)
    with folder as o:
        write_model(fit.model, o, pictures=pictures, run=run)
        o.write_tsv("results.tsv", fit.table)
        o.write_json("results.json", {**_results_sidecar(fit), "provenance": run})
        if fit.cell_means is not None:
            o.write_tsv("cell_means.tsv", fit.cell_means)
        finish_folder(o, dataset_description(f"table fit ({fit.outcome})", fit.model.spec, command_line(command)))
        write_report(o, pictures=pictures)
    return Path(out)


#: The further columns of results.tsv for a model with within-participant factors.
STRATA_COLUMNS = {
    "stratum": "error stratum: between (participant averages), within (within contrasts) or mixed (a weighted "
               "sum over within cells that is neither)",
    "epsilon_gg": "Greenhouse-Geisser (1959) epsilon (F tests with more than one within df; else n/a)",
    "epsilon_hf": "Huynh-Feldt (1976) epsilon, Lecoutre (1991) form, at most 1 (as epsilon_gg)",
    "p_gg": "p of F on df1 x epsilon_gg and df2 x epsilon_gg (as epsilon_gg)",
    "p_hf": "p of F on df1 x epsilon_hf and df2 x epsilon_hf (as epsilon_gg)",
    "participants": "participants who entered the hypothesis (a missing within cell it needs leaves one out)",
}
#: How the effect-size columns read for a model with within-participant factors (each in its stratum).
STRATA_EFFECT_COLUMNS = {
    "df2": "error degrees of freedom of the hypothesis's stratum",
    "ci_lower": "lower bound of the two-sided confidence interval of the estimate, on the stratum's df2 (t tests)",
    "ci_upper": "upper bound of the same interval",
    "cohens_d": "estimate / residual SD of the data fitted in the stratum, for a t test comparing two cell or "
                "marginal means: within stratum the SD of the differences (d_z), between stratum of the "
                "participant averages, mixed stratum of the values in the within cell; n/a elsewhere (see "
                "strata.NAME.cohens_d_sd)",
    "partial_eta_squared": "F df1 / (F df1 + df2) = SSH / (SSH + SSE) in the stratum (sphericity-assumed F)",
    "partial_eta_squared_ci_lower": "lower bound of its noncentral-F interval on the stratum's df (Steiger 2004); "
                                    "n/a for F tests with more than one within df (see "
                                    "strata.NAME.partial_eta_squared_interval)",
}


def _results_sidecar(fit: TableFit) -> dict[str, Any]:
    if hasattr(fit, "strata_sidecar"):  # within-participant factors: the strata say what was fitted
        return {
            **provenance(),
            "outcome": fit.outcome,
            "n_observations": fit.model.design.n_observations,
            "ci_level": fit.ci_level,
            "columns": {**RESULTS_COLUMNS, **STRATA_COLUMNS, **STRATA_EFFECT_COLUMNS},
            "hypotheses": {n: {"statement": h.statement, "test": h.test, "tail": h.tail}
                           for n, h in fit.model.hypotheses.items()},
            "strata": fit.strata_sidecar(),
            "excluded": [e.as_dict() for e in fit.model.sample.exclusions],
        }
    return {
        **provenance(),
        "outcome": fit.outcome,
        "n_observations": fit.model.design.n_observations,
        "df_resid": fit.result.df_resid,
        "residual_variance": float(fit.result.residual_variance[0]),
        "ci_level": fit.ci_level,
        "columns": RESULTS_COLUMNS,
        "hypotheses": {n: {"statement": h.statement, "test": h.test, "tail": h.tail}
                       for n, h in fit.model.hypotheses.items()},
        "excluded": [e.as_dict() for e in fit.model.sample.exclusions],
        "warnings": [], "findings": [f.as_dict() for f in fit.model.findings],
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
    "p_hf": "Huynh-Feldt (1976) corrected p: F on df1 x epsilon_hf and df2 x epsilon_hf (uncorrected for multiple "
            "comparisons)",
    "p_gg": "Greenhouse-Geisser (1959) corrected p: F on df1 x epsilon_gg and df2 x epsilon_gg (uncorrected for "
            "multiple comparisons)",
    "tfce": "threshold-free cluster enhancement (Smith and Nichols 2009) of the statistic, sign kept",
    "p_tfce_fwe": "family-wise error p from the maximum TFCE over the mask",
    "p_cluster_fwe": "family-wise error p of the voxel's cluster, by cluster size at the stated z threshold",
}
#: What the sphericity maps of an F test with more than one within-participant df hold.
SPHERICITY_NOTES = {
    "epsilon_gg": "Greenhouse-Geisser (1959) epsilon tr(S)^2 / (c tr(S^2)) of the residual cross-products S of the "
                  "c orthonormal within contrasts; 1 under sphericity, at least 1/c",
    "epsilon_hf": "Huynh-Feldt (1976) epsilon, Lecoutre (1991) form, at most 1",
}
#: What the effect-size and interval maps hold (``{level}``: the confidence level in percent).
EFFECT_SIZE_NOTES = {
    "ci_lower": "lower bound of the two-sided {level}% confidence interval of the effect: effect - t(df2) x se",
    "ci_upper": "upper bound of the two-sided {level}% confidence interval of the effect: effect + t(df2) x se",
    "cohens_d": "Cohen's d: the effect (a difference of two cell or marginal means) / residual SD",
    "partial_eta_squared": "partial eta squared, F df1 / (F df1 + df2) (F = t squared for a t test)",
    "partial_eta_squared_ci_lower": "lower bound of the two-sided {level}% confidence interval of partial eta "
                                    "squared, from the noncentral F (Steiger 2004)",
    "partial_eta_squared_ci_upper": "upper bound of the two-sided {level}% confidence interval of partial eta "
                                    "squared, from the noncentral F (Steiger 2004)",
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


def _in_words_of(grid: Any, text: str) -> str:
    """A note about voxels said of vertices for surface data."""
    if grid.kind != "gifti":
        return text
    return text.replace("voxels", "vertices").replace("voxel's", "vertex's").replace("voxel", "vertex")


def map_sidecar(fit: VoxelFit, name: str | None, statistic: str, *, run: dict[str, Any] | None = None,
                **extra: Any) -> dict[str, Any]:
    """The JSON sidecar of one map (``run``: the run record, written last as ``provenance``)."""
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
            "df1": fit.df_of(name)[0],
            "df2": fit.df_of(name)[1],
            "tail": h.tail,
        })
        if fit.model.strata is not None:  # within-participant factors: where and on what it was tested
            out["stratum"] = fit.model.strata.tests[name].stratum
            out["stratum_test"] = fit.model.strata.tests[name].as_dict(fit.model.strata)
    else:
        out.update({"df2": fit.df_resid})
    record = getattr(fit, "variance_groups", None)
    if record is not None:  # Welch's v and G: df2 is approximate and per voxel
        out.update({"df2": record["df2"], "variance_groups": record})
    out.update(extra)
    out.update(provenance())
    if run is not None:
        out["provenance"] = run
    return out


def _intent(stat: str, df: tuple[int, int]) -> tuple[str, tuple[int, ...]] | None:
    """The NIfTI intent of a map: t and F with their degrees of freedom, z and p without; others none."""
    if stat == "t":
        return ("t test", (df[1],))
    if stat == "F":
        return ("f test", df)
    if stat in ("z", "p"):
        return (_INTENTS[stat], ())
    return None


def _write_hypothesis(o: OutputFolder, fit: VoxelFit, h: Hypothesis, run: dict[str, Any]) -> list[str]:
    """Every map of one hypothesis with its sidecar, then its cluster tables, into the hypothesis's folder
    (paths from :mod:`.index`: one place per (hypothesis, statistic)); returns the file names."""
    from ..images import write_map

    written: list[str] = []
    for stat, values in fit.maps[h.name].items():
        fname = map_path(h.name, stat, fit.grid.kind)
        write_map(o.file(fname), values, fit.mask, fit.grid, intent=_intent(stat, fit.df_of(h.name)),
                  description=f"groupmodel {h.name} {stat}"[:79])
        extra = dict(fit.records.get(h.name, {})) if stat in PERMUTATION_STATS else {}
        if stat in CORRECTION_NOTES:
            extra["correction"] = _in_words_of(fit.grid, CORRECTION_NOTES[stat])
        if stat in SPHERICITY_NOTES:
            extra["sphericity"] = SPHERICITY_NOTES[stat]
        if stat in EFFECT_SIZE_NOTES:
            extra.update(effect_size_note(fit, stat))
            if fit.model.strata is not None:  # in the stratum: the SD of d, or why an interval is missing
                extra.update(effect_size_notes(fit.model.strata.tests[h.name]))
        o.write_json(sidecar_path(h.name, stat), map_sidecar(fit, h.name, stat, run=run, **extra))
        written.append(fname)
    for kind, table in fit.tables.get(h.name, {}).items():
        stat = f"clusters_{kind}"
        o.write_tsv(table_path(h.name, stat), table)
        o.write_json(sidecar_path(h.name, stat), map_sidecar(
            fit, h.name, stat, run=run, **fit.records.get(h.name, {}), columns=CLUSTER_COLUMNS,
            clusters=_in_words_of(fit.grid, CLUSTER_KINDS[kind])))
        written.append(table_path(h.name, stat))
    return written


def effect_size_note(fit: VoxelFit, stat: str) -> dict[str, Any]:
    """The sidecar entries of an effect-size or interval map: what it holds and, for intervals, the level."""
    level = float((fit.inference or {}).get("ci_level", 0.95))
    out: dict[str, Any] = {"effect_size": EFFECT_SIZE_NOTES[stat].format(level=number_text(100 * level))}
    if "ci_" in stat:
        out["ci_level"] = level
    if stat in ("ci_lower", "ci_upper") and getattr(fit, "variance_groups", None) is not None:
        out["effect_size"] += " (se and df2 of Welch's v: a residual variance per variance group)"
    return out


def _write_residuals_and_mask(o: OutputFolder, fit: VoxelFit, run: dict[str, Any]) -> list[str]:

    from ..images import write_map, write_mask

    fname = map_path(None, "residual_variance", fit.grid.kind)
    write_map(o.file(fname), fit.residual_variance, fit.mask, fit.grid, description="groupmodel residual variance")
    o.write_json(sidecar_path(None, "residual_variance"), map_sidecar(fit, None, "residual_variance", run=run))
    mname = map_path(None, "mask", fit.grid.kind)
    write_mask(o.file(mname), fit.mask, fit.grid)
    o.write_json(sidecar_path(None, "mask"), {"statistic": "mask", **fit.mask_report,
                                              **provenance(("software_version",)), "provenance": run})
    return [fname, mname, *_write_participant_check(o, fit, run)]


def _write_participant_check(o: OutputFolder, fit: VoxelFit, run: dict[str, Any]) -> list[str]:
    """The mean of the input images (the report's background) and each participant's mean |residual|."""
    from ..images import write_map

    names = []
    if fit.mean_input is not None:
        fname = map_path(None, "mean_input", fit.grid.kind)
        write_map(o.file(fname), fit.mean_input, fit.mask, fit.grid, description="groupmodel mean input image")
        o.write_json(sidecar_path(None, "mean_input"), map_sidecar(
            fit, None, "mean_input", run=run, description="mean of the input images over the observations"))
        names.append(fname)
    if fit.participant_residuals is not None:
        o.write_tsv("participants_residuals.tsv", fit.participant_residuals)
        names.append("participants_residuals.tsv")
    return names


def _write_summary(o: OutputFolder, fit: VoxelFit, run: dict[str, Any]) -> list[str]:
    frame = summary_frame(fit)
    o.write_tsv("summary.tsv", frame)
    o.write_json("summary.json", {
        **provenance(),
        "spec": str(fit.model.spec.path), "n_observations": fit.model.design.n_observations,
        "df_resid": fit.df_resid, "mask": fit.mask_report,
        "excluded": [e.as_dict() for e in fit.model.sample.exclusions],
        "warnings": fit.warnings, "inference": _inference_record(fit),
        "hypotheses": summary_records(frame), "columns": summary_columns(fit),
        "provenance": run,
        "findings": [f.as_dict() for f in fit.model.findings], "runtime": fit.runtime,
        **({"variance_groups": fit.variance_groups} if getattr(fit, "variance_groups", None) is not None else {}),
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


#: Threads writing maps at most (each compresses one map at a time).
MAX_WRITE_THREADS = 4


def write_threads() -> int:
    """Threads for writing maps: the cores this process may use, at most :data:`MAX_WRITE_THREADS`."""
    from ..runtime.cores import available_cores

    return max(1, min(available_cores(), MAX_WRITE_THREADS))


def _known_maps(fit: VoxelFit) -> dict[str, Callable[[], np.ndarray]]:
    """The maps just written that the report reads, as they are in the files (float32 values, 0 outside the
    mask, read back as float), made from the fit's arrays on demand: relative path -> maker."""
    from ..images import unmask

    n_in = int(np.count_nonzero(fit.mask))

    def made(values: np.ndarray) -> Callable[[], np.ndarray]:
        return lambda: unmask(values, fit.mask, 0.0, np.float32).astype(float)

    kind = fit.grid.kind
    known = {map_path(name, stat, kind): made(values) for name, maps in fit.maps.items()
             for stat, values in maps.items() if np.shape(values) == (n_in,)}
    known[map_path(None, "residual_variance", kind)] = made(fit.residual_variance)
    if fit.mean_input is not None:
        known[map_path(None, "mean_input", kind)] = made(fit.mean_input)
    known[map_path(None, "mask", kind)] = lambda: np.asarray(fit.mask, dtype=float)
    return known


def write_voxel_fit(fit: VoxelFit, out: Path | str, force: bool = False,
                    extra_writer: Callable[[OutputFolder], list[str]] | None = None,
                    pictures: bool = True, command: Sequence[str] | None = None) -> list[str]:
    """Write every map with its sidecar, the mask, the design files and a summary, atomically; then
    dataset_description.json and the index outputs.json (layout: :mod:`.index`).

    ``command``: the command-line arguments (recorded in dataset_description.json; default ``sys.argv``).
    The design and contrast pictures (``pictures``) are drawn in a thread while the maps are written (in
    :func:`write_threads` threads); the report (report.html, without figures when ``pictures`` is off) is
    written last, from the files (the maps it shows from the fit's arrays: the same values).
    """
    from .report import write_report

    folder = OutputFolder(out, force=force)
    written: list[str] = []
    run = run_record(fit.inputs or RunInputs.of_spec(fit.model.spec, sample=fit.model.sample), fit.clock)
    with folder as o:
        written += write_model(fit.model, o, pictures=False, run=run)
        job = PictureJob(fit.model) if pictures else None
        try:
            # the maps of the hypotheses (compression releases the GIL) in threads, listed in order
            with ThreadPoolExecutor(write_threads(), thread_name_prefix="groupmodel-write") as pool:
                jobs = [pool.submit(_write_hypothesis, o, fit, h, run) for h in fit.model.hypotheses.values()]
                jobs.append(pool.submit(_write_residuals_and_mask, o, fit, run))
                for job_done in jobs:
                    written += job_done.result()
            written += _write_summary(o, fit, run)
            if extra_writer is not None:
                written += extra_writer(o)
        finally:
            # never leave the thread writing into a folder that is being removed
            picture_names = job.write(o) if job is not None else []
        written[5:5] = picture_names  # listed beside the design files, as before
        written += finish_folder(o, dataset_description("voxelwise fit", fit.model.spec, command_line(command)))
        # last: it reads the folder through its index (the maps still in memory from there)
        written += write_report(o, pictures=job is not None, known=_known_maps(fit))
    return written
