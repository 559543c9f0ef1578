"""What ``groupmodel`` prints on the terminal: the model report, the fit summary, the closing lines."""

from __future__ import annotations

from typing import TYPE_CHECKING, Any

from ..text import DISCLAIMER

if TYPE_CHECKING:
    from ..analysis.corrections import InferenceOptions
    from ..analysis.voxel_fit import VoxelFit
    from ..model.assembly import Model
    from ..outputs.folder import StaleFolder, StaleLock
    from ..runtime.log import StageLog


def print_removed(removed: tuple[StaleFolder, ...], where: str = "beside --out") -> None:
    """One line naming the folders of killed earlier runs that were just removed (nothing if none)."""
    if removed:
        names = ", ".join(f"{r.path.name} (process {r.pid})" for r in removed)
        print(f"removed {names}: left {where} by an earlier run that was killed before it finished")


def print_stale_lock(stale: StaleLock | None) -> None:
    """One line when the lock of a killed earlier run into the same --out was replaced."""
    if stale is not None:
        print(f"replaced {stale.path.name}: the lock of process {stale.pid}, which ended without releasing it")


def print_model_report(model: Model, findings: bool = True) -> None:
    """The model of ``build`` and of a table fit: size, columns, exclusions, findings (unless ``findings`` is
    False: a fit logs them on stderr instead, :func:`log_findings`), hypotheses."""
    d = model.design
    print(f"{model.spec.name}: {d.n_observations} observations, {d.n_columns} columns "
          f"({', '.join(d.column_names)})")
    print_exclusions(model)
    if model.findings and findings:
        print("findings:")
        for finding in model.findings:
            print(f"  {finding}")
    if model.hypotheses:
        print("hypotheses:")
        for h in model.hypotheses.values():
            rows = f"{h.n_rows} rows" if h.n_rows > 1 else "1 row"
            print(f"  {h.name} [{h.test}, {rows}]: {h.statement}")


def print_exclusions(model: Model) -> None:
    """Each participant left out, with its row and reason (nothing when none is)."""
    if model.sample.exclusions:
        print(f"excluded {len(model.sample.exclusions)}:")
        for e in model.sample.exclusions:
            print(f"  {e.participant_id} (row {e.row}): {e.reason}")


def print_voxel_fit(fit: VoxelFit, options: InferenceOptions) -> None:
    """A voxelwise fit before its files are written: sample and mask, warnings, hypotheses, inference, summary."""
    m = fit.model
    shape = (f"{m.design.n_columns} columns, {fit.df_resid} residual df" if m.strata is None else
             f"{len(m.strata.participant_ids)} participants, each hypothesis in its error stratum (df in the summary)")
    print(f"{m.spec.name}: {m.design.n_observations} observations, {shape}; "
          f"{fit.mask_report['voxels_in_mask']} {fit.elements} in the mask "
          f"({fit.mask_report['voxels_left_out_nonfinite_in_some_images']} left out for NaN/inf in some images)")
    print_exclusions(m)
    for h in m.hypotheses.values():
        print(f"  {h.name} [{h.test}]: {h.statement}")
    if options.active:
        print(_inference_line(fit, options))
    print(fit.summary().to_string(index=False))


#: How the terminal names the methods recorded in the sidecars.
_METHOD_WORDS = {"permutation": "row permutation", "sign_flip": "sign flips", "both": "permutation and sign flips"}


def _inference_line(fit: VoxelFit, options: InferenceOptions) -> str:
    """The settings of permutation inference, then the method and rearrangements of each hypothesis."""
    rule = " (auto: sign flips for means, row permutation for differences and slopes)" \
        if options.method == "auto" else ""
    if options.method == "auto" and getattr(fit, "variance_groups", None) is not None:
        rule = (" (auto with variance groups: row permutation within the groups; sign flips for means and for "
                "differences between the groups)")
    lines = [f"permutation inference: seed {options.seed}, Freedman-Lane; TFCE {'on' if options.tfce else 'off'}; "
             f"cluster threshold {options.cluster_threshold if options.cluster_threshold is not None else 'none'}; "
             f"method per hypothesis{rule}:"]
    for name, rec in fit.records.items():
        method = _METHOD_WORDS.get(rec.get("method"), rec.get("method"))
        lines.append(f"  {name}: {method}, {rec.get('permutations')} rearrangements"
                     f"{' (all that exist: exact)' if rec.get('exhaustive') else ''}"
                     f"{'; ' + rec['stratum'] + ' stratum: ' + rec['rearranged'] if 'stratum' in rec else ''}")
    return "\n".join(lines)


def log_findings(log: StageLog, findings: list[Any], warnings: list[str]) -> None:
    """The design's findings (condition number, VIF, ...) and the fit's warnings, on the log (stderr); notes
    only without --quiet."""
    for f in findings:
        if f.severity == "warning":
            log.warning(f.message)
        else:
            log.info(str(f))
    for w in warnings:
        log.warning(w)


def print_disclaimer() -> None:
    """The research-use note, last line of a command that wrote results."""
    print(DISCLAIMER)
