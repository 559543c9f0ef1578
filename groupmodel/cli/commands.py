"""The sub-commands of ``groupmodel``: each calls the Python API, prints, and returns an exit code."""

from __future__ import annotations

import argparse
import sys
from pathlib import Path
from typing import Any

from ..errors import InputError, OutputError
from ..outputs.folder import OutputFolder, OutputLock
from .printing import (
    log_findings,
    print_disclaimer,
    print_model_report,
    print_removed,
    print_stale_lock,
    print_voxel_fit,
)


def cmd_build(args: argparse.Namespace) -> int:
    """``groupmodel build``: build the model, report it, write the design files (none when it has errors)."""
    with OutputLock(args.out) as lock:  # a second run into the same --out is refused at once
        print_stale_lock(lock.stale)
        return _build(args)


def _build(args: argparse.Namespace) -> int:
    from ..model.assembly import build
    from ..outputs.design_files import write_build
    from ..outputs.provenance import RunClock

    clock = RunClock.start()
    folder = OutputFolder(args.out, force=args.force, inputs=_inputs(args))  # refuse a wrong --out before any work
    print_removed(folder.removed)
    model = build(args.spec)
    print_model_report(model)
    if model.errors:
        print("nothing written: the model has errors (see above)")
        model.raise_for_errors()  # the same one line on stderr and exit code 1 as every other error
    check_build_images(model)
    with folder as out:
        names = write_build(model, out, pictures=not args.no_pictures, command=getattr(args, "argv", None), clock=clock)
    print(f"wrote {args.out}: {', '.join(names)}")
    print_disclaimer()
    return 0


def _inputs(args: argparse.Namespace) -> list[Any]:
    """The input files of a run (a --out holding one of them is refused)."""
    from ..model.spec import load_spec

    spec = load_spec(args.spec)  # a broken spec is reported here, before any work, as it would be later
    return [args.spec, getattr(args, "mask", None), spec.participants, spec.observations]


def check_build_images(model: Any) -> None:
    """When the spec names images: refuse a build none of whose images exists (exit 2); other image problems
    are warnings (the design files do not need the images)."""
    from ..errors import ImageError
    from ..images.headers import ImageProblems

    if not model.spec.images or not model.design.n_observations:
        return
    from ..analysis.voxel_fit import open_images

    try:
        open_images(model)
    except ImageError as exc:
        problems = exc.problems if isinstance(exc, ImageProblems) else ()
        if sum(p.kind == "missing" for p in problems) == model.design.n_observations:
            raise
        for line in str(exc).splitlines():
            sys.stderr.write(f"groupmodel: warning: {line.strip()}\n")


def cmd_fit(args: argparse.Namespace) -> int:
    """``groupmodel fit``: one table column with --outcome, else every voxel of the images."""
    if args.outcome:
        refuse_image_options(args)
    if args.dry_run:
        return _dry_run(args)
    with OutputLock(args.out) as lock:  # a second run into the same --out is refused at once
        print_stale_lock(lock.stale)
        return _fit(args)


#: Options of a voxelwise fit that a table fit (--outcome) cannot honour: (attribute, option, value when not given).
_IMAGE_OPTIONS = (("permutations", "--permutations", None), ("tfce", "--tfce", False),
                  ("cluster_threshold", "--cluster-threshold", None), ("blocks", "--blocks", None),
                  ("whole_blocks", "--whole-blocks", False), ("method", "--method", "auto"),
                  ("checkpoint", "--checkpoint", None), ("resume", "--resume", False), ("mask", "--mask", None),
                  ("scheduler", "--scheduler", None))


def refuse_image_options(args: argparse.Namespace) -> None:
    """A usage error (exit 2, before any work) for options of a voxelwise fit given with --outcome, which would
    otherwise be ignored (a table fit reports parametric p only)."""
    given = [opt for name, opt, unset in _IMAGE_OPTIONS if getattr(args, name, unset) not in (unset, 0)]
    if given:
        raise InputError(f"fit --outcome fits one table column with parametric p: {', '.join(given)} "
                         "apply to voxelwise fits only; leave them out, or leave out --outcome to fit the images")


def _dry_run(args: argparse.Namespace) -> int:
    """``fit --dry-run``: every check, the plan, nothing written (no lock, no folder)."""
    from ..analysis.dry_run import dry_run
    from ..analysis.table_fit import fit_table
    from ..model.spec import load_spec
    from ..outputs.target import check_target

    check_target(args.out, args.force, _inputs(args))
    if args.outcome:
        fit = fit_table(args.spec, args.outcome)
        print_model_report(fit.model)
        print(f"dry run: {args.outcome} can be fitted; nothing is written")
        return 0
    spec = load_spec(args.spec)
    options = spec.inference_options.with_overrides(**inference_overrides(args))
    plan = dry_run(spec, mask=args.mask, memory_bytes=args.memory, drop_missing=args.drop_missing_images,
                   inference=options)
    print("\n".join(plan.lines()))
    return 0


def _fit(args: argparse.Namespace) -> int:
    folder = OutputFolder(args.out, force=args.force, inputs=_inputs(args))  # refuse a wrong --out before any work
    print_removed(folder.removed)
    if args.outcome:
        return _fit_table(args)
    return _fit_images(args)


def _fit_table(args: argparse.Namespace) -> int:
    from ..analysis.table_fit import fit_table
    from ..outputs.fit_files import write_table_fit
    from ..runtime.log import StageLog

    fit = fit_table(args.spec, args.outcome, ci_level=args.ci_level)
    print_model_report(fit.model, findings=False)
    log_findings(StageLog(quiet=args.quiet), fit.model.findings, [])
    print()
    print(fit.format())
    write_table_fit(fit, args.out, force=args.force, pictures=not args.no_pictures, command=getattr(args, "argv", None))
    print(f"wrote {args.out}/results.tsv and {args.out}/report.html")
    return 0


def _fit_images(args: argparse.Namespace) -> int:
    """Fit, print a summary, write the maps."""
    from ..analysis.voxel_fit import fit_images
    from ..images.spill import remove_stale_spills
    from ..model.spec import load_spec
    from ..outputs.fit_files import write_voxel_fit
    from ..runtime.log import StageLog

    print_removed(remove_stale_spills(), "in the temporary folder")
    log = StageLog(quiet=args.quiet)
    spec = load_spec(args.spec)
    options = spec.inference_options.with_overrides(**inference_overrides(args))
    checkpoint = open_checkpoint(args, spec, options)
    executor = None
    if args.scheduler is not None:
        from ..runtime.cluster import open_scheduler

        executor = open_scheduler(args.scheduler)
    try:
        fit = fit_images(spec, mask=args.mask, memory_bytes=args.memory, drop_missing=args.drop_missing_images,
                         inference=options, log=log, checkpoint=checkpoint, client=executor)
    finally:
        if executor is not None:
            executor.close()
    log_findings(log, fit.model.findings, fit.warnings)
    print_voxel_fit(fit, options)
    write_voxel_fit(fit, args.out, force=args.force, pictures=not args.no_pictures, command=getattr(args, "argv", None))
    if checkpoint is not None:
        checkpoint.remove()
    print(f"wrote {args.out}")
    print_disclaimer()
    return 0


def open_checkpoint(args: argparse.Namespace, spec: Any, options: Any) -> Any:
    """The --checkpoint folder with this command's parameters (None without --checkpoint)."""
    from ..inference.checkpoint import CheckpointFolder
    from ..runtime.digest import sha256_file as file_digest

    if args.checkpoint is None:
        if args.resume:
            raise OutputError("--resume: expected --checkpoint DIR naming the checkpoint to continue; add it")
        return None
    mask = args.mask if args.mask is not None else spec.mask
    parameters = {
        "spec": str(Path(args.spec).resolve()), "spec_sha256": file_digest(args.spec),
        "participants_sha256": file_digest(spec.participants),
        "mask": None if mask is None else str(Path(mask).resolve()),
        "mask_sha256": None if mask is None else file_digest(mask),
        "drop_missing_images": bool(args.drop_missing_images),
        # threads and worker processes do not change the results: a resume may use others
        "inference": {k: v for k, v in options.as_dict().items() if k not in ("jobs", "threads")},
    }
    if spec.observations is not None:  # several images per participant: their table is an input too
        parameters["observations_sha256"] = file_digest(spec.observations)
    folder = CheckpointFolder(args.checkpoint, parameters, resume=args.resume, every=args.checkpoint_every)
    saved = folder.progress()
    if args.resume:
        done = ", ".join(f"{name} {k}" for name, k in saved.items()) or "nothing saved yet"
        print(f"resuming from {args.checkpoint}: done per hypothesis: {done}")
    return folder


def cmd_check(args: argparse.Namespace) -> int:
    """``groupmodel check``: print the report, write --json, return 0 (no error finding) or 1."""
    from ..audit import audit
    from ..outputs.folder import dumps_json

    report = audit(
        design=args.design,
        contrasts=args.contrasts,
        participants=args.participants,
        factors=_split_names(args.factors),
        covariates=_split_names(args.covariates),
        spec=args.spec,
        images=args.images,
    )
    print(report.format())
    if args.json is not None:
        try:
            args.json.parent.mkdir(parents=True, exist_ok=True)
            args.json.write_text(dumps_json(report.as_dict()), encoding="utf-8")
        except OSError as exc:
            raise OutputError(f"--json {args.json}: cannot be written ({exc.strerror}); choose another path") from None
        print(f"wrote {args.json}")
    return report.exit_code


def _split_names(text: str | None) -> list[str] | None:
    """'training, chronotype' -> ['training', 'chronotype'] (None when not given)."""
    if text is None:
        return None
    return [t.strip() for t in text.split(",") if t.strip()]


def cmd_report(args: argparse.Namespace) -> int:
    """``groupmodel report DIR``: build report.html again from the files of an output folder."""
    from ..outputs.index import INDEX_NAME, refresh_index
    from ..outputs.report import REPORT_NAME, report_html

    text = report_html(args.folder, pictures=not args.no_pictures, background=args.background)
    target = args.folder / REPORT_NAME
    tmp = target.with_name(f".{REPORT_NAME}.partial")
    try:
        tmp.write_text(text, encoding="utf-8")
        tmp.replace(target)
        if (args.folder / INDEX_NAME).exists():
            refresh_index(args.folder)  # the index lists report.html too
    except OSError as exc:
        tmp.unlink(missing_ok=True)
        raise OutputError(f"{target}: cannot be written ({exc.strerror}); check the folder's permissions") from None
    print(f"wrote {target}")
    print_disclaimer()
    return 0


#: Sub-command name -> its function.
COMMANDS = {"build": cmd_build, "fit": cmd_fit, "check": cmd_check, "report": cmd_report}


def inference_overrides(args: argparse.Namespace) -> dict[str, Any]:
    """The inference settings given on the command line (options left at their defaults give nothing)."""
    given: dict[str, Any] = {}
    if args.permutations:
        given["permutations"] = args.permutations
    if args.seed is not None:
        given["seed"] = args.seed
    if args.method != "auto":
        given["method"] = args.method
    if args.blocks:
        given["blocks"] = args.blocks
    if args.whole_blocks:
        given["whole_blocks"] = True
    if args.tfce:
        given["tfce"] = True
    for name in ("cluster_threshold", "jobs", "threads", "ci_level"):
        if getattr(args, name) is not None:
            given[name] = getattr(args, name)
    return given
