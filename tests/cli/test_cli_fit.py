"""``groupmodel fit`` on images from the command line: files written, --force, exit codes, progress bar.

References: the issue's list of outputs (per t hypothesis effect, se, t, z, p, -log10 p maps; per F
hypothesis F, z, p, -log10 p; the residual variance, the mask, the design files of ``build``, a summary;
issue 16: intervals of t effects, Cohen's d of two-mean comparisons, partial eta squared with its interval),
each map with a JSON sidecar; exit codes 0 / 1 / 2 as documented in ``groupmodel --help``.
"""

from __future__ import annotations

import fcntl
import json
import os
import pty
import select
import struct
import subprocess
import sys
import termios
from pathlib import Path

import nibabel as nib
import numpy as np
import pandas as pd
import pytest
import scipy.stats

from groupmodel.cli import main

AFFINE = np.diag([2.5, 2.5, 2.5, 1.0])
SHAPE = (6, 5, 4)
HYPOTHESES = {
    "dose": {"main": "dose"},
    "high_vs_low": {"compare": {"dose": ["high", "low"]}, "tail": "greater"},
    "score": {"slope": "score"},
}
ETA_MAPS = ("partial_eta_squared", "partial_eta_squared_ci_lower", "partial_eta_squared_ci_upper")
T_MAPS = ("effect", "se", "t", "z", "p", "mlog10p", "p_fdr", "p_bonferroni", "ci_lower", "ci_upper", *ETA_MAPS)
F_MAPS = ("F", "z", "p", "mlog10p", "p_fdr", "p_bonferroni", *ETA_MAPS)


def make_study(root: Path, n: int = 18, seed: int = 2) -> Path:
    """A one-factor (3 levels) + covariate study of n float32 images, one F and two t hypotheses."""
    rng = np.random.default_rng(seed)
    (root / "maps").mkdir(parents=True)
    dose = np.array(["low", "mid", "high"])[np.arange(n) % 3]
    score = np.round(rng.normal(100, 15, n), 1)
    ids = [f"sub-{i + 1:02d}" for i in range(n)]
    pd.DataFrame({"participant_id": ids, "dose": dose, "score": score}).to_csv(
        root / "participants.tsv", sep="\t", index=False)
    for i, pid in enumerate(ids):
        vol = rng.normal(2.0, 1.0, SHAPE) + (dose[i] == "high") * 1.5
        nib.save(nib.Nifti1Image(vol.astype(np.float32), AFFINE), root / "maps" / f"{pid}_con.nii.gz")
    spec = {"participants": "participants.tsv",
            "factors": {"dose": {"levels": ["low", "mid", "high"], "coding": "effect"}},
            "covariates": {"score": {"center": "mean"}},
            "terms": ["dose", "score"],
            "hypotheses": HYPOTHESES,
            "images": "maps/{participant_id}_con.nii.gz"}
    (root / "model.json").write_text(json.dumps(spec))
    return root / "model.json"


def expected_files() -> set[str]:
    names = {"design.tsv", "design.json", "contrasts.tsv", "contrasts.json", "design.png", "contrasts.png",
             "summary.tsv", "summary.json", "residual_variance.nii.gz", "residual_variance.json",
             "mask.nii.gz", "mask.json", "dataset_description.json", "outputs.json",
             "participants_included.tsv", "mean_input.nii.gz", "mean_input.json",
             "participants_residuals.tsv", "report.html", ".groupmodel-output.json"}
    for name, h in HYPOTHESES.items():
        for stat in (F_MAPS if "main" in h else T_MAPS) + (("cohens_d",) if "compare" in h else ()):
            names |= {f"hypotheses/{name}/{stat}.nii.gz", f"hypotheses/{name}/{stat}.json"}
    return names


def files_in(folder: Path) -> set[str]:
    """Every file under ``folder``, as relative POSIX paths."""
    return {p.relative_to(folder).as_posix() for p in folder.rglob("*") if p.is_file()}


def run_cli(*args: str) -> subprocess.CompletedProcess:
    """The real command in a subprocess, with stdout and stderr as pipes (not a terminal)."""
    return subprocess.run([sys.executable, "-m", "groupmodel.cli", *args], capture_output=True, text=True,
                          timeout=300)


@pytest.fixture(scope="module")
def spec(tmp_path_factory) -> Path:
    return make_study(tmp_path_factory.mktemp("clifit") / "study")


def test_fit_writes_every_map_and_nothing_on_stderr(spec: Path, tmp_path: Path) -> None:
    # Reference: the output list; nothing on stderr when it is not a terminal (no progress bar).
    out = tmp_path / "results"
    proc = run_cli("fit", str(spec), "--out", str(out))
    assert proc.returncode == 0, proc.stderr
    assert proc.stderr == ""
    assert "\r" not in proc.stdout  # no progress bar leaked into stdout either
    assert files_in(out) == expected_files()
    assert "18 observations" in proc.stdout and "wrote" in proc.stdout
    for name in HYPOTHESES:
        assert name in proc.stdout
    for path in out.rglob("*.nii.gz"):
        img = nib.load(path)
        assert np.allclose(img.affine, AFFINE)
        if path.name != "mask.nii.gz":
            assert img.get_data_dtype() == np.float32
    summary = json.loads((out / "summary.json").read_text())
    assert summary["n_observations"] == 18 and summary["df_resid"] == 18 - 4
    side = json.loads((out / "hypotheses/dose/F.json").read_text())
    assert side["hypothesis"] == "dose" and side["statistic"] == "F" and side["df1"] == 2


def test_ci_level_option_sets_the_intervals_and_their_sidecars(spec: Path, tmp_path: Path, capsys) -> None:
    # Reference: scipy.stats.t.ppf for the half-width of the interval at the level asked for (effect -/+ t se,
    # read back from the float32 maps, ~1e-6); the issue for a note per statistic in each sidecar.
    out = tmp_path / "ci90"
    assert main(["fit", str(spec), "--out", str(out), "--ci-level", "0.9", "--no-pictures"]) == 0
    capsys.readouterr()
    maps = {s: np.asarray(nib.load(out / "hypotheses" / "high_vs_low" / f"{s}.nii.gz").dataobj, dtype=float)
            for s in ("effect", "se", "ci_lower", "ci_upper")}
    half = scipy.stats.t.ppf(0.95, 18 - 4) * maps["se"]
    np.testing.assert_allclose(maps["ci_lower"], maps["effect"] - half, rtol=1e-5, atol=1e-5)
    np.testing.assert_allclose(maps["ci_upper"], maps["effect"] + half, rtol=1e-5, atol=1e-5)
    side = json.loads((out / "hypotheses" / "high_vs_low" / "ci_lower.json").read_text())
    assert side["ci_level"] == 0.9 and "90% confidence interval" in side["effect_size"]
    side = json.loads((out / "hypotheses" / "dose" / "partial_eta_squared_ci_upper.json").read_text())
    assert side["ci_level"] == 0.9 and "noncentral F" in side["effect_size"]
    d_side = json.loads((out / "hypotheses" / "high_vs_low" / "cohens_d.json").read_text())
    assert "Cohen's d" in d_side["effect_size"]
    assert not (out / "hypotheses" / "score" / "cohens_d.nii.gz").exists()  # a slope: not two means compared
    assert json.loads((out / "summary.json").read_text())["inference"]["ci_level"] == 0.9


def test_existing_folder_needs_force(spec: Path, tmp_path: Path) -> None:
    # Reference: exit codes of `groupmodel --help` (2: usage or unreadable input); --force as in build.
    out = tmp_path / "results"
    out.mkdir()
    (out / "old.txt").write_text("keep me")
    proc = run_cli("fit", str(spec), "--out", str(out))
    assert proc.returncode == 2
    lines = proc.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("groupmodel: error:") and "--force" in lines[0]
    assert "Traceback" not in proc.stderr
    assert [p.name for p in out.iterdir()] == ["old.txt"]
    proc = run_cli("fit", str(spec), "--out", str(out), "--force")
    assert proc.returncode == 2 and "not a groupmodel output" in proc.stderr  # not groupmodel's: kept
    (out / "old.txt").unlink()
    (out / "dataset_description.json").write_text('{"GeneratedBy": [{"Name": "groupmodel"}]}')
    proc = run_cli("fit", str(spec), "--out", str(out), "--force")
    assert proc.returncode == 0, proc.stderr
    assert files_in(out) == expected_files()


def test_exit_codes_in_process(spec: Path, tmp_path: Path, capsys) -> None:
    # Reference: exit codes of `groupmodel --help`: 0 ok, 1 model problems, 2 usage/unreadable input.
    assert main(["fit", str(spec), "--out", str(tmp_path / "ok"), "--memory", "64MB"]) == 0
    capsys.readouterr()
    # 2: a --memory that is not a size (argparse), and a spec that does not exist
    with pytest.raises(SystemExit) as info:
        main(["fit", str(spec), "--out", str(tmp_path / "x"), "--memory", "lots"])
    assert info.value.code == 2
    assert main(["fit", str(tmp_path / "nope.json"), "--out", str(tmp_path / "y")]) == 2
    err = capsys.readouterr().err
    assert err.strip().splitlines()[-1].startswith("groupmodel: error:")
    # 1: a hypothesis the design cannot estimate (a level nobody has)
    raw = json.loads(spec.read_text())
    raw["factors"]["dose"]["levels"] = ["low", "mid", "high", "max"]
    raw["hypotheses"]["max_vs_low"] = {"compare": {"dose": ["max", "low"]}}
    bad = spec.parent / "bad_model.json"
    bad.write_text(json.dumps(raw))
    assert main(["fit", str(bad), "--out", str(tmp_path / "z")]) == 1
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and err[0].startswith("groupmodel: error:")
    assert not (tmp_path / "x").exists() and not (tmp_path / "y").exists() and not (tmp_path / "z").exists()


def test_memory_option_gives_the_same_maps(spec: Path, tmp_path: Path, capsys) -> None:
    # Reference: the run with the default budget (results must not depend on --memory).
    assert main(["fit", str(spec), "--out", str(tmp_path / "a")]) == 0
    assert main(["fit", str(spec), "--out", str(tmp_path / "b"), "--memory", "20KB"]) == 0
    capsys.readouterr()
    for name in ("hypotheses/dose/F", "hypotheses/high_vs_low/t", "hypotheses/score/effect", "residual_variance"):
        a = np.asanyarray(nib.load(tmp_path / "a" / f"{name}.nii.gz").dataobj)
        b = np.asanyarray(nib.load(tmp_path / "b" / f"{name}.nii.gz").dataobj)
        np.testing.assert_array_equal(a, b)


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="pseudo-terminal test written for Linux")
def test_progress_bar_on_a_terminal(spec: Path, tmp_path: Path) -> None:
    # Reference: the issue (a progress bar on a terminal).  stderr is a pseudo-terminal here.
    master, slave = pty.openpty()
    # a new pseudo-terminal is 0 x 0 characters, where tqdm draws an empty bar: give it 24 x 100
    fcntl.ioctl(slave, termios.TIOCSWINSZ, struct.pack("HHHH", 24, 100, 0, 0))
    out = tmp_path / "results"
    env = dict(os.environ)
    proc = subprocess.Popen([sys.executable, "-m", "groupmodel.cli", "fit", str(spec), "--out", str(out)],
                            stdout=subprocess.PIPE, stderr=slave, env=env)
    os.close(slave)
    chunks = []
    while True:
        ready, _, _ = select.select([master], [], [], 60)
        if not ready:
            break
        try:
            data = os.read(master, 4096)
        except OSError:  # the child closed the terminal
            break
        if not data:
            break
        chunks.append(data)
    proc.communicate(timeout=120)
    os.close(master)
    assert proc.returncode == 0
    assert "fitting" in b"".join(chunks).decode(errors="replace")


def test_fit_without_pictures_never_imports_matplotlib(tmp_path):
    # the pictures are the only users of matplotlib: a fit with --no-pictures must not pay for its import
    example = Path(__file__).resolve().parents[2] / "example_study" / "model.json"
    code = (
        "import sys\n"
        "from groupmodel.cli import main\n"
        f"rc = main([{str(example)!r}, '--out', {str(tmp_path / 'out')!r}, '--no-pictures'])\n"
        "assert rc == 0, rc\n"
        "print('matplotlib' in sys.modules)\n"
    )
    code = code.replace("main([", "main(['fit', ")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip().splitlines()[-1] == "False"
    assert not list((tmp_path / "out").glob("*.png"))
    assert (tmp_path / "out" / "design.tsv").exists()
