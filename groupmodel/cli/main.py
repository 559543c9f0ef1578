"""The ``groupmodel`` command: a thin layer over the Python API.

It parses arguments, calls the API, prints results, and turns every
:class:`~groupmodel.errors.GroupModelError` into one line on stderr and an exit
code: 0 ok, 1 the model or data has problems, 2 usage or unreadable input.
``--debug`` shows the traceback instead.
"""

from __future__ import annotations

import argparse
import sys
import traceback
from collections.abc import Sequence
from pathlib import Path

from .. import __version__
from ..errors import GroupModelError

EPILOG_MAIN = """\
examples:
  groupmodel build example_study/model.json --out design/
  groupmodel fit example_study/model.json --out results/
  groupmodel fit example_study/model.json --outcome hippocampus_signal --out roi/
  groupmodel check --design design.tsv --contrasts contrasts.tsv --participants participants.tsv

exit codes: 0 ok; 1 the model or data has problems; 2 usage or unreadable input.
groupmodel supports research; it is not a clinical or diagnostic tool.
"""


class _Parser(argparse.ArgumentParser):
    """argparse with exit code 2 and a one-line error, as every other input error."""

    def error(self, message: str) -> None:  # type: ignore[override]
        self.print_usage(sys.stderr)
        sys.stderr.write(f"groupmodel: error: {message}; see --help\n")
        raise SystemExit(2)


def _memory(text: str) -> int:
    """'2GB', '512MB', '1.5G', '300000000' -> bytes."""
    t = text.strip().upper().removesuffix("B")
    mult = {"K": 1024, "M": 1024**2, "G": 1024**3, "T": 1024**4}
    try:
        if t and t[-1] in mult:
            return int(float(t[:-1]) * mult[t[-1]])
        return int(float(t))
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a size like 2GB or 512MB, found {text!r}") from None


def make_parser() -> argparse.ArgumentParser:
    p = _Parser(
        prog="groupmodel",
        description="Group-level models for brain-imaging studies: design and contrast matrices from a "
        "participants table and a JSON spec, hypotheses stated over cell means, audits of hand-written "
        "designs, and voxelwise OLS with t, F, z and p maps.",
        epilog=EPILOG_MAIN,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    p.add_argument("--version", action="version", version=f"groupmodel {__version__}")
    p.add_argument("--debug", action="store_true", help="show the full traceback on errors")
    sub = p.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)

    b = sub.add_parser(
        "build",
        help="build design and contrast files from a model spec",
        description="Read participants.tsv and the model spec, build the design matrix and the contrast "
        "rows of every hypothesis, check them, and write design.tsv, design.json, contrasts.tsv, "
        "contrasts.json and pictures of both into --out.",
        epilog="example:\n  groupmodel build example_study/model.json --out design/\n\n"
        "Nothing is written when the model has an error (exit code 1).",
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    b.add_argument("spec", type=Path, help="the JSON model spec, e.g. example_study/model.json")
    b.add_argument("--out", type=Path, required=True, help="output folder (created; e.g. --out design/)")
    b.add_argument("--force", action="store_true", help="replace an existing non-empty --out folder")
    b.add_argument("--no-pictures", action="store_true", help="skip the PNG pictures")
    b.add_argument("--debug", action="store_true", help=argparse.SUPPRESS)

    f = sub.add_parser(
        "fit",
        help="fit the model to images (voxelwise) or to one table column (--outcome)",
        description="Fit OLS at every voxel of the images named in the spec (or to one column of the "
        "participants table with --outcome) and write effect, standard error, t, F, z and p maps "
        "(or results.tsv) for every hypothesis.",
        epilog="examples:\n"
        "  groupmodel fit example_study/model.json --out results/\n"
        "  groupmodel fit example_study/model.json --out results/ --mask mask.nii.gz --memory 2GB\n"
        "  groupmodel fit example_study/model.json --outcome hippocampus_signal --out roi/\n"
        "  groupmodel fit example_study/model.json --out results/ --permutations 5000 --seed 1 --tfce\n",
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    f.add_argument("spec", type=Path, help="the JSON model spec")
    f.add_argument("--out", type=Path, required=True, help="output folder (e.g. --out results/)")
    f.add_argument("--outcome", help="fit one numeric table column instead of images (e.g. --outcome roi_mean)")
    f.add_argument("--mask", type=Path, help="mask image on the grid of the images (default: every voxel "
                   "finite in all images and not zero in all)")
    f.add_argument("--memory", type=_memory, default=_memory("2GB"),
                   help="memory budget for image data, e.g. 2GB or 512MB (default 2GB)")
    f.add_argument("--drop-missing-images", action="store_true",
                   help="leave out participants whose image is missing (listed) instead of stopping")
    f.add_argument("--force", action="store_true", help="replace an existing non-empty --out folder")
    f.add_argument("--permutations", type=int, default=0, metavar="J",
                   help="rearrangements for permutation inference, the identity included (0: parametric "
                   "corrections only; e.g. 5000); all of them, exactly, when fewer exist")
    f.add_argument("--seed", type=int, default=None,
                   help="random seed for permutations (default 0; recorded in every sidecar)")
    f.add_argument("--method", choices=["auto", "permutation", "sign_flip", "both"], default="auto",
                   help="how to rearrange the data: row permutation, sign flips, or both (default auto: "
                   "sign flips for one-sample hypotheses, permutation otherwise)")
    f.add_argument("--blocks", help="table column of exchangeability blocks (e.g. --blocks family_id)")
    f.add_argument("--whole-blocks", action="store_true", help="permute blocks as wholes instead of within")
    f.add_argument("--tfce", action="store_true", help="threshold-free cluster enhancement (E=0.5, H=2)")
    f.add_argument("--cluster-threshold", type=float, metavar="Z",
                   help="cluster-forming threshold as a z value for cluster-extent FWE (e.g. 3.1)")
    f.add_argument("--jobs", type=int, default=None, metavar="N",
                   help="worker processes for TFCE and cluster permutations (default: all cores this process "
                   "may use; results do not depend on it)")
    f.add_argument("--threads", type=int, default=None, metavar="N",
                   help="threads for the permutation products (default: all cores this process may use; "
                   "results do not depend on it)")
    f.add_argument("--debug", action="store_true", help=argparse.SUPPRESS)

    c = sub.add_parser(
        "check",
        help="audit hand-written design and contrast files",
        description="Read a design and contrast files written by hand or by other scripts and report, "
        "finding by finding, whether they match the participants (and images), are full rank and "
        "estimable, what each column encodes and what each contrast tests over cell means.",
        epilog="examples:\n"
        "  groupmodel check --design design.txt --contrasts contrasts.txt "
        "--participants participants.tsv --factors training,chronotype --covariates age\n"
        "  groupmodel check --design example_study/faulty/design.txt "
        "--contrasts example_study/faulty/contrasts.txt \\\n"
        "      --participants example_study/participants.tsv --spec example_study/model.json "
        "--images example_study/faulty/images.txt --json report.json\n\n"
        "Design rows follow participants.tsv (after the spec's n/a exclusions with --spec) unless the design "
        "has a participant_id column.\n"
        "exit code 0 when no finding is an error, 1 when one is, 2 for unreadable input.",
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    c.add_argument("--design", type=Path, required=True,
                   help="design file: TSV/CSV with a header, or plain numbers; '#' lines are comments")
    c.add_argument("--contrasts", type=Path,
                   help="contrast file, one row per line; rows sharing a name (a first text column, or a "
                   "hypothesis/contrast/name/label column) form one F test")
    c.add_argument("--participants", type=Path, required=True, help="participants.tsv the rows follow")
    c.add_argument("--factors", help="comma-separated factor columns, e.g. training,chronotype (default: the "
                   "spec's, or the table columns the design turns out to encode)")
    c.add_argument("--covariates", help="comma-separated covariate columns, e.g. age (default: the spec's, or "
                   "the numeric table columns the design turns out to use)")
    c.add_argument("--spec", type=Path, help="a model spec to compare with: column space, and which of its "
                   "hypotheses each contrast tests")
    c.add_argument("--images", type=Path, help="text file listing image paths in design-row order; the "
                   "sub-<label> in each path is compared with the row's participant")
    c.add_argument("--json", type=Path, help="also write the findings as JSON to this file")
    c.add_argument("--debug", action="store_true", help=argparse.SUPPRESS)
    return p


def _print_findings(model) -> None:  # type: ignore[no-untyped-def]
    for finding in model.findings:
        print(f"  {finding}")


def _cmd_build(args: argparse.Namespace) -> int:
    from ..model.assembly import DISCLAIMER, build
    from ..outputs.folder import OutputFolder

    folder = OutputFolder(args.out, force=args.force)  # refuse an existing folder before any work
    model = build(args.spec)
    _report_model(model)
    if model.errors:
        print("nothing written: the model has errors (see above)")
        model.raise_for_errors()  # the same one line on stderr and exit code 1 as every other error
    with folder as out:
        names = model.write_into(out, pictures=not args.no_pictures)
    print(f"wrote {args.out}: {', '.join(names)}")
    print(DISCLAIMER)
    return 0


def _report_model(model) -> None:  # type: ignore[no-untyped-def]
    d = model.design
    print(f"{model.spec.name}: {d.n_observations} observations, {d.n_columns} columns "
          f"({', '.join(d.column_names)})")
    if model.sample.exclusions:
        print(f"excluded {len(model.sample.exclusions)}:")
        for e in model.sample.exclusions:
            print(f"  {e.participant_id} (row {e.row}): {e.reason}")
    if model.findings:
        print("findings:")
        _print_findings(model)
    if model.hypotheses:
        print("hypotheses:")
        for h in model.hypotheses.values():
            rows = f"{h.n_rows} rows" if h.n_rows > 1 else "1 row"
            print(f"  {h.name} [{h.test}, {rows}]: {h.statement}")


def _cmd_fit(args: argparse.Namespace) -> int:
    from ..outputs.folder import OutputFolder

    OutputFolder(args.out, force=args.force)  # refuse an existing folder before any work
    if args.outcome:
        from ..analysis.voxel_fit import fit_table, write_table_fit

        fit = fit_table(args.spec, args.outcome)
        _report_model(fit.model)
        print()
        print(fit.format())
        write_table_fit(fit, args.out, force=args.force)
        print(f"wrote {args.out}/results.tsv")
        return 0
    from ..analysis.voxel_fit import run_voxelwise_cli

    return run_voxelwise_cli(args)


def _cmd_check(args: argparse.Namespace) -> int:
    from ..audit.pipeline import run_check_cli

    return run_check_cli(args)


def main(argv: Sequence[str] | None = None) -> int:
    parser = make_parser()
    args = parser.parse_args(argv)
    if args.command is None:
        parser.print_help()
        return 2
    try:
        if args.command == "build":
            return _cmd_build(args)
        if args.command == "fit":
            return _cmd_fit(args)
        if args.command == "check":
            return _cmd_check(args)
    except GroupModelError as exc:
        if args.debug:
            traceback.print_exc()
        sys.stderr.write(f"groupmodel: error: {exc}\n")
        return exc.exit_code
    except KeyboardInterrupt:
        sys.stderr.write("groupmodel: interrupted; nothing was written\n")
        return 130
    return 2


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
