"""Run a fixed set of groupmodel commands into a folder, and compare two such folders.

Used to show that a change of structure leaves every output as it was:

    python tests/golden/reference_outputs.py run BEFORE/      # on the old code
    python tests/golden/reference_outputs.py run AFTER/       # on the new code
    python tests/golden/reference_outputs.py compare BEFORE/ AFTER/

``compare`` is exact by default: maps bit for bit, TSV and JSON equal apart from the software version,
terminal output equal line by line.  ``--rtol`` allows a relative float tolerance instead (for comparisons
across machines).  ``tests/golden/test_golden.py`` keeps one such comparison on a small study.
"""

from __future__ import annotations

import argparse
import json
import math
import shutil
import subprocess
import sys
from pathlib import Path
from typing import Any

import numpy as np

ROOT = Path(__file__).resolve().parents[2]
EXAMPLE = ROOT / "example_study"
#: Keys whose values legitimately change between versions, runs or machines: versions, the time fields of the
#: run record, the digest of the image list (it holds modification times, set anew by every checkout) and the
#: command line in dataset_description.json (it holds --out).
VOLATILE_KEYS = {"software_version", "software_versions", "started", "wall_time_seconds", "list_sha256",
                 "Description", "runtime"}  # runtime: cores of the machine


def _run(name: str, args: list[str], out: Path) -> None:
    cmd = [sys.executable, "-m", "groupmodel.cli", *args]
    proc = subprocess.run(cmd, capture_output=True, text=True, cwd=ROOT)
    text = proc.stdout.replace(str(out), "<OUT>").replace(str(ROOT), "<ROOT>")
    err = proc.stderr.replace(str(out), "<OUT>").replace(str(ROOT), "<ROOT>")
    (out / f"{name}.stdout").write_text(text)
    (out / f"{name}.stderr").write_text(err)
    (out / f"{name}.exit").write_text(f"{proc.returncode}\n")


def make_surface_study(dest: Path) -> Path:
    """A surface copy of the example study: each volume map flattened into a GIFTI data array."""
    import nibabel as nib

    dest.mkdir(parents=True, exist_ok=True)
    (dest / "maps").mkdir(exist_ok=True)
    shutil.copy(EXAMPLE / "participants.tsv", dest / "participants.tsv")
    shutil.copy(EXAMPLE / "participants.json", dest / "participants.json")
    for path in sorted((EXAMPLE / "maps").glob("*.nii.gz")):
        vol = np.asarray(nib.load(path).dataobj, dtype=np.float32)
        darray = nib.gifti.GiftiDataArray(vol.ravel(), datatype="NIFTI_TYPE_FLOAT32")
        nib.save(nib.gifti.GiftiImage(darrays=[darray]), dest / "maps" / path.name.replace(".nii.gz", ".gii"))
    spec = json.loads((EXAMPLE / "model.json").read_text())
    spec["images"] = "maps/{participant_id}_effect.gii"
    (dest / "model.json").write_text(json.dumps(spec, indent=2))
    return dest / "model.json"


def run_all(out: Path) -> None:
    """The reference runs: build, table fit, quick start, permutations with TFCE and clusters, surface, check."""
    out.mkdir(parents=True, exist_ok=False)
    spec = str(EXAMPLE / "model.json")
    _run("build", ["build", spec, "--out", str(out / "build")], out)
    _run("table", ["fit", spec, "--outcome", "hippocampus_signal", "--out", str(out / "table")], out)
    _run("quick", ["fit", spec, "--out", str(out / "quick"), "--permutations", "500", "--seed", "1", "--tfce"], out)
    _run("perm", ["fit", spec, "--out", str(out / "perm"), "--permutations", "200", "--seed", "1", "--tfce",
                  "--cluster-threshold", "3"], out)
    surface = make_surface_study(out / "_surface_study")
    _run("surface", ["fit", str(surface), "--out", str(out / "surface"), "--permutations", "100", "--seed", "2"],
         out)
    faulty = EXAMPLE / "faulty"
    _run("check", ["check", "--design", str(faulty / "design.txt"), "--contrasts", str(faulty / "contrasts.txt"),
                   "--participants", str(EXAMPLE / "participants.tsv"), "--spec", spec,
                   "--images", str(faulty / "images.txt"), "--json", str(out / "check.json")], out)
    shutil.rmtree(out / "_surface_study")
    (out / "roots.json").write_text(json.dumps({"out": str(out), "root": str(ROOT)}))


# ----------------------------------------------------------------------------------------------------
# Comparison
# ----------------------------------------------------------------------------------------------------
def _close(a: float, b: float, rtol: float) -> bool:
    if a == b or (math.isnan(a) and math.isnan(b)):
        return True
    return rtol > 0 and abs(a - b) <= rtol * max(abs(a), abs(b), 1e-300)


def _json_diff(a: Any, b: Any, where: str, rtol: float, out: list[str]) -> None:
    if isinstance(a, dict) and isinstance(b, dict):
        if set(a) != set(b):
            out.append(f"{where}: keys differ: {sorted(set(a) ^ set(b))}")
        for k in set(a) & set(b):
            if k not in VOLATILE_KEYS:
                _json_diff(a[k], b[k], f"{where}.{k}", rtol, out)
    elif isinstance(a, list) and isinstance(b, list):
        if len(a) != len(b):
            out.append(f"{where}: lengths {len(a)} vs {len(b)}")
        for i, (x, y) in enumerate(zip(a, b, strict=False)):
            _json_diff(x, y, f"{where}[{i}]", rtol, out)
    elif isinstance(a, float) and isinstance(b, float | int) and not isinstance(b, bool):
        if not _close(a, float(b), rtol):
            out.append(f"{where}: {a!r} vs {b!r}")
    elif a != b:
        out.append(f"{where}: {a!r} vs {b!r}")


def _float_or_text(cell: str) -> float | str:
    try:
        return float(cell)
    except ValueError:
        return cell


def _text_diff(a: str, b: str, where: str, rtol: float, out: list[str]) -> None:
    la, lb = a.splitlines(), b.splitlines()
    if len(la) != len(lb):
        out.append(f"{where}: {len(la)} vs {len(lb)} lines")
        return
    for i, (x, y) in enumerate(zip(la, lb, strict=True)):
        if x == y:
            continue
        if rtol > 0:
            cx, cy = x.split(), y.split()
            if len(cx) == len(cy) and all(
                (isinstance(p, float) and isinstance(q, float) and _close(p, q, rtol)) or p == q
                for p, q in zip(map(_float_or_text, cx), map(_float_or_text, cy), strict=True)
            ):
                continue
        out.append(f"{where} line {i + 1}: {x!r} vs {y!r}")
        if len(out) > 50:
            return


def _image_diff(a: Path, b: Path, where: str, rtol: float, out: list[str]) -> None:
    import nibabel as nib

    ia, ib = nib.load(a), nib.load(b)
    if type(ia) is not type(ib):
        out.append(f"{where}: image types differ")
        return
    if hasattr(ia, "darrays"):
        arrays = [(x.data, y.data) for x, y in zip(ia.darrays, ib.darrays, strict=True)]
    else:
        arrays = [(np.asarray(ia.dataobj), np.asarray(ib.dataobj))]
        if not np.array_equal(ia.affine, ib.affine):
            out.append(f"{where}: affines differ")
        if ia.header.get_data_dtype() != ib.header.get_data_dtype():
            out.append(f"{where}: data types differ")
    for x, y in arrays:
        if x.shape != y.shape:
            out.append(f"{where}: shapes {x.shape} vs {y.shape}")
        elif rtol == 0:
            if not np.array_equal(x, y, equal_nan=True):
                out.append(f"{where}: {int(np.sum(~((x == y) | (np.isnan(x) & np.isnan(y)))))} values differ")
        elif not np.allclose(x, y, rtol=rtol, atol=0, equal_nan=True):
            out.append(f"{where}: values differ beyond rtol {rtol}")


def _normalised(text: str, roots: dict[str, str]) -> str:
    """Paths of the run's own folders replaced by placeholders, so runs in other places compare."""
    for key, path in sorted(roots.items(), key=lambda kv: -len(kv[1])):
        text = text.replace(path, f"<{key.upper()}>")
    return text


def _roots(folder: Path) -> dict[str, str]:
    path = folder / "roots.json"
    return json.loads(path.read_text()) if path.exists() else {}


def compare(a: Path, b: Path, rtol: float = 0.0, pictures: bool = True) -> list[str]:
    """Differences between two reference folders (empty list: the same)."""
    diffs: list[str] = []
    roots_a, roots_b = _roots(a), _roots(b)
    # the report (report.html) embeds the pictures: compared with them
    wanted = (lambda p: p.is_file()) if pictures else (lambda p: p.is_file() and p.suffix not in (".png", ".html"))
    files_a = {p.relative_to(a) for p in a.rglob("*") if wanted(p)}
    files_b = {p.relative_to(b) for p in b.rglob("*") if wanted(p)}
    for missing in sorted(files_a ^ files_b):
        diffs.append(f"{missing}: only in {'first' if missing in files_a else 'second'}")
    for rel in sorted(files_a & files_b):
        pa, pb, name = a / rel, b / rel, str(rel)
        if name.endswith((".nii.gz", ".nii", ".gii")):
            _image_diff(pa, pb, name, rtol, diffs)
        elif name.endswith(".json"):
            if name != "roots.json":
                _json_diff(json.loads(_normalised(pa.read_text(), roots_a)),
                           json.loads(_normalised(pb.read_text(), roots_b)), name, rtol, diffs)
        elif name.endswith((".png", ".html")):
            if pa.read_bytes() != pb.read_bytes():
                diffs.append(f"{name}: pictures differ")
        else:
            _text_diff(_normalised(pa.read_text(), roots_a), _normalised(pb.read_text(), roots_b), name, rtol, diffs)
    return diffs


def main() -> int:
    p = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    sub = p.add_subparsers(dest="cmd", required=True)
    r = sub.add_parser("run")
    r.add_argument("out", type=Path)
    c = sub.add_parser("compare")
    c.add_argument("a", type=Path)
    c.add_argument("b", type=Path)
    c.add_argument("--rtol", type=float, default=0.0)
    args = p.parse_args()
    if args.cmd == "run":
        run_all(args.out)
        return 0
    diffs = compare(args.a, args.b, args.rtol)
    for d in diffs:
        print(d)
    print(f"{len(diffs)} differences")
    return 1 if diffs else 0


if __name__ == "__main__":
    sys.exit(main())
