"""The sub-commands of ``groupmodel``: each calls the Python API, prints, and returns an exit code."""

from __future__ import annotations

import argparse
from typing import Any

from ..errors import InputError, OutputError
from ..outputs.folder import OutputFolder, OutputLock
from .printing import print_disclaimer, print_model_report, print_removed, print_stale_lock, print_voxel_fit


def cmd_build(args: argparse.Namespace) -> int:
    """``groupmodel build``: build the model, report it, write the design files (none when it has errors)."""
    with OutputLock(args.out) as lock:  # a second run into the same --out is refused at once
        print_stale_lock(lock.stale)
        return _build(args)


def _build(args: argparse.Namespace) -> int:
    from ..model.assembly import build
    from ..outputs.design_files import write_model

    folder = OutputFolder(args.out, force=args.force)  # refuse an existing folder before any work
    print_removed(folder.removed)
    model = build(args.spec)
    print_model_report(model)
    if model.errors:
        print("nothing written: the model has errors (see above)")
        model.raise_for_errors()  # the same one line on stderr and exit code 1 as every other error
    with folder as out:
        names = write_model(model, out, pictures=not args.no_pictures)
    print(f"wrote {args.out}: {', '.join(names)}")
    print_disclaimer()
    return 0


def cmd_fit(args: argparse.Namespace) -> int:
    """``groupmodel fit``: one table column with --outcome, else every voxel of the images."""
    with OutputLock(args.out) as lock:  # a second run into the same --out is refused at once
        print_stale_lock(lock.stale)
        return _fit(args)


def _fit(args: argparse.Namespace) -> int:
    print_removed(OutputFolder(args.out, force=args.force).removed)  # refuse an existing folder before any work
    if args.outcome:
        if getattr(args, "scheduler", None) is not None:
            raise InputError("--scheduler is for fits to images; a fit to one table column (--outcome) runs "
                             "here; leave out --scheduler")
        return _fit_table(args)
    return _fit_images(args)


def _fit_table(args: argparse.Namespace) -> int:
    from ..analysis.table_fit import fit_table
    from ..outputs.fit_files import write_table_fit

    fit = fit_table(args.spec, args.outcome)
    print_model_report(fit.model)
    print()
    print(fit.format())
    write_table_fit(fit, args.out, force=args.force, pictures=not args.no_pictures)
    print(f"wrote {args.out}/results.tsv")
    return 0


def _fit_images(args: argparse.Namespace) -> int:
    """Fit, print a summary, write the maps."""
    from ..analysis.voxel_fit import fit_images
    from ..model.spec import load_spec
    from ..outputs.fit_files import write_voxel_fit

    spec = load_spec(args.spec)
    options = spec.inference_options.with_overrides(**inference_overrides(args))
    executor = None
    if args.scheduler is not None:
        from ..runtime.cluster import open_scheduler

        executor = open_scheduler(args.scheduler)
    try:
        fit = fit_images(spec, mask=args.mask, memory_bytes=args.memory, drop_missing=args.drop_missing_images,
                         inference=options, client=executor)
    finally:
        if executor is not None:
            executor.close()
    print_voxel_fit(fit, options)
    write_voxel_fit(fit, args.out, force=args.force, pictures=not args.no_pictures)
    print(f"wrote {args.out}")
    print_disclaimer()
    return 0


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


#: Sub-command name -> its function.
COMMANDS = {"build": cmd_build, "fit": cmd_fit, "check": cmd_check}


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
    for name in ("cluster_threshold", "jobs", "threads"):
        if getattr(args, name) is not None:
            given[name] = getattr(args, name)
    return given
