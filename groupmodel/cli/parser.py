"""The command line of ``groupmodel``: argparse only (one function per sub-command)."""

from __future__ import annotations

import argparse
import math
import sys
from collections.abc import Callable
from pathlib import Path

from .. import __version__

EPILOG_MAIN = """\
examples:
  groupmodel build example_study/model.json --out design/
  groupmodel fit example_study/model.json --out results/
  groupmodel fit example_study/model.json --outcome hippocampus_signal --out roi/
  groupmodel check --design design.tsv --contrasts contrasts.tsv --participants participants.tsv
  groupmodel report results/

exit codes: 0 ok; 1 the model or data has problems; 2 usage or unreadable input.
groupmodel supports research; it is not a clinical or diagnostic tool.
"""


class _Parser(argparse.ArgumentParser):
    """argparse with exit code 2 and a one-line error, as every other input error (the usage is in --help)."""

    def error(self, message: str) -> None:  # type: ignore[override]
        sys.stderr.write(f"groupmodel: error: {message}; see --help\n")
        raise SystemExit(2)


def parse_memory(text: str) -> int:
    """'2GB', '512MB', '1.5G', '300000000' -> bytes (at least 1)."""
    t = text.strip().upper().removesuffix("B")
    mult = {"K": 1024, "M": 1024**2, "G": 1024**3, "T": 1024**4}
    problem = f"expected a size like 2GB or 512MB, found {text!r}"
    try:
        x = float(t[:-1]) * mult[t[-1]] if t and t[-1] in mult else float(t)
    except ValueError:
        raise argparse.ArgumentTypeError(problem) from None
    if not math.isfinite(x) or x < 1:
        raise argparse.ArgumentTypeError(f"{problem}, which is not a positive size")
    return int(x)


def whole_number(minimum: int) -> Callable[[str], int]:
    """An argparse type: a whole number >= ``minimum``."""

    def parse(text: str) -> int:
        try:
            value = int(text)
        except ValueError:
            raise argparse.ArgumentTypeError(f"expected a whole number, found {text!r}") from None
        if value < minimum:
            raise argparse.ArgumentTypeError(f"expected a whole number >= {minimum}, found {value}")
        return value

    parse.__name__ = f"whole number >= {minimum}"
    return parse


def finite_number(text: str) -> float:
    """An argparse type: a finite number."""
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a number, found {text!r}") from None
    if not math.isfinite(value):
        raise argparse.ArgumentTypeError(f"expected a finite number, found {text!r}")
    return value


def make_parser() -> argparse.ArgumentParser:
    """The ``groupmodel`` parser with its sub-commands build, fit and check."""
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
    _add_build(sub)
    _add_fit(sub)
    _add_check(sub)
    _add_report(sub)
    return p


def _add_build(sub: argparse._SubParsersAction) -> None:
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


def _add_fit(sub: argparse._SubParsersAction) -> None:
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
    f.add_argument("--memory", type=parse_memory, default=parse_memory("2GB"),
                   help="memory budget for image data, e.g. 2GB or 512MB (default 2GB)")
    f.add_argument("--scheduler", metavar="ADDRESS",
                   help="run the fit and permutations on a Dask cluster: a scheduler address (tcp://host:8786) "
                   'or local:N for N worker processes here; needs pip install "groupmodel[cluster]"; the '
                   "workers read the images themselves, and --memory is each worker's budget")
    f.add_argument("--drop-missing-images", action="store_true",
                   help="leave out participants whose image is missing (listed) instead of stopping")
    f.add_argument("--force", action="store_true", help="replace an existing non-empty --out folder")
    f.add_argument("--no-pictures", action="store_true", help="skip the PNG pictures of the design and contrasts")
    f.add_argument("--dry-run", action="store_true",
                   help="check spec, table, images and mask and say what the run would do (observations, voxels, "
                   "hypotheses, permutations, memory, estimated time); write nothing; exit 0/1/2 as a real run")
    f.add_argument("--checkpoint", type=Path, metavar="DIR",
                   help="keep the counts and maxima of finished permutation batches in DIR (removed when the run "
                   "ends well), so that a killed run can be continued with --resume")
    f.add_argument("--resume", action="store_true",
                   help="continue the run whose --checkpoint DIR is given (same command; the maps are identical to "
                   "those of a run that was never stopped)")
    f.add_argument("--checkpoint-every", type=finite_number, default=60.0, metavar="SECONDS",
                   help="seconds between two saves of the checkpoint (default 60)")
    f.add_argument("--quiet", action="store_true", help="no stage or progress lines on stderr (warnings still shown)")
    _add_inference_options(f)
    f.add_argument("--debug", action="store_true", help=argparse.SUPPRESS)


def _add_inference_options(f: argparse.ArgumentParser) -> None:
    """The permutation-inference options of ``fit`` (they override the spec's ``inference`` object)."""
    f.add_argument("--permutations", type=whole_number(0), default=0, metavar="J",
                   help="rearrangements for permutation inference, the identity included (0: parametric "
                   "corrections only; e.g. 5000); all of them, exactly, when fewer exist")
    f.add_argument("--seed", type=whole_number(0), default=None,
                   help="random seed for permutations (default 0; recorded in every sidecar)")
    f.add_argument("--method", choices=["auto", "permutation", "sign_flip", "both"], default="auto",
                   help="how to rearrange the data: row permutation, sign flips, or both (default auto: "
                   "sign flips for a hypothesis about a mean, i.e. weights over cell means that do not sum to zero; "
                   "permutation for differences, interactions and slopes)")
    f.add_argument("--blocks", help="table column of exchangeability blocks (e.g. --blocks family_id)")
    f.add_argument("--whole-blocks", action="store_true", help="permute blocks as wholes instead of within")
    f.add_argument("--tfce", action="store_true", help="threshold-free cluster enhancement (E=0.5, H=2)")
    f.add_argument("--cluster-threshold", type=finite_number, metavar="Z",
                   help="cluster-forming threshold as a z value for cluster-extent FWE (e.g. 3.1)")
    f.add_argument("--ci-level", type=finite_number, default=None, metavar="LEVEL",
                   help="confidence level of the intervals of effects and partial eta squared, between 0 and 1 "
                   "(default 0.95)")
    f.add_argument("--jobs", type=whole_number(1), default=None, metavar="N",
                   help="worker processes for TFCE and cluster permutations (default: all cores this process "
                   "may use; results do not depend on it)")
    f.add_argument("--threads", type=whole_number(1), default=None, metavar="N",
                   help="threads for the permutation products (default: all cores this process may use; "
                   "results do not depend on it)")


def _add_check(sub: argparse._SubParsersAction) -> None:
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


def _add_report(sub: argparse._SubParsersAction) -> None:
    r = sub.add_parser(
        "report",
        help="build report.html again from an output folder",
        description="Read the files of a groupmodel output folder (of build or fit) and write its report.html: "
        "one self-contained page with the study, the design, the hypotheses, their sensitivity and the results.",
        epilog="examples:\n  groupmodel report results/\n  groupmodel report results/ --background template.nii.gz\n",
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    r.add_argument("folder", type=Path, help="the --out folder of a groupmodel build or fit")
    r.add_argument("--background", type=Path, help="image on the grid of the maps to draw slices over (default: "
                   "the mean of the input images, mean_input)")
    r.add_argument("--no-pictures", action="store_true", help="leave the figures out of the report")
    r.add_argument("--debug", action="store_true", help=argparse.SUPPRESS)
