"""Non-ASCII paths under a plain POSIX locale (file-system encoding ASCII: no locale coercion, no UTF-8 mode), as
on some cluster nodes: the images named in the spec are found and --out is written.

Reference: PEP 538 and PEP 540 (locale coercion and UTF-8 mode, turned off here) and the os.fsdecode /
surrogateescape convention of the Python documentation.
"""

from __future__ import annotations

import os
import shutil
import subprocess
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
EXAMPLE = ROOT / "example_study"


def test_non_ascii_image_paths_under_posix_locale(tmp_path: Path) -> None:
    study = tmp_path / "étude"
    maps = study / "cartes_é"
    maps.mkdir(parents=True)
    for image in sorted((EXAMPLE / "maps").glob("*_effect.nii.gz")):
        shutil.copy(image, maps / image.name.replace("_effect", "_éffet"))
    shutil.copy(EXAMPLE / "participants.tsv", study)
    spec = (EXAMPLE / "model.json").read_text().replace("maps/{participant_id}_effect.nii.gz",
                                                        "cartes_é/{participant_id}_éffet.nii.gz")
    (study / "model.json").write_text(spec, encoding="utf-8")
    env = {**os.environ, "LC_ALL": "POSIX", "LANG": "POSIX", "PYTHONUTF8": "0", "PYTHONCOERCECLOCALE": "0",
           "PYTHONPATH": os.pathsep.join([str(ROOT), os.environ.get("PYTHONPATH", "")])}
    check = subprocess.run([sys.executable, "-c", "import sys; print(sys.getfilesystemencoding())"],
                           capture_output=True, text=True, env=env)
    assert check.stdout.strip().lower() in ("ascii", "ansi_x3.4-1968"), check.stdout  # the locale this test is about
    proc = subprocess.run([sys.executable, "-m", "groupmodel.cli", "fit", "model.json", "--out", "résultats",
                           "--no-pictures", "--quiet"], capture_output=True, env=env, cwd=study, timeout=300)
    assert proc.returncode == 0, proc.stderr.decode("utf-8", "replace")
    assert (study / "résultats" / "summary.json").is_file()
