"""Dask stays optional: a run without --scheduler never imports it, and --scheduler without it is one line.

These tests need no Dask (the import is blocked in a subprocess where it must be missing).
"""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import pytest

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "unit"))
from test_fit_voxelwise import make_study  # noqa: E402

ROOT = Path(__file__).resolve().parents[2]


@pytest.fixture(scope="module")
def study(tmp_path_factory: pytest.TempPathFactory) -> Path:
    return make_study(tmp_path_factory.mktemp("optional") / "study", n=12)


def _run(code: str, tmp: Path) -> subprocess.CompletedProcess:
    env = {**os.environ, "PYTHONPATH": str(ROOT)}
    return subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, env=env, cwd=tmp,
                          timeout=300)


def test_a_fit_without_scheduler_imports_no_dask(study: Path, tmp_path: Path) -> None:
    code = (
        "import sys\n"
        "from groupmodel.cli import main\n"
        f"code = main(['fit', {str(study)!r}, '--out', 'out', '--permutations', '20', '--tfce', '--jobs', '1',\n"
        "              '--no-pictures'])\n"
        "loaded = sorted(m for m in sys.modules if m.split('.')[0] in ('dask', 'distributed'))\n"
        "print('LOADED', loaded, code)\n"
    )
    done = _run(code, tmp_path)
    assert done.returncode == 0, done.stderr
    assert "LOADED [] 0" in done.stdout, done.stdout


def test_scheduler_without_dask_is_one_line_and_exit_2(study: Path, tmp_path: Path) -> None:
    # Dask made unimportable (a None entry in sys.modules makes the import fail, as if not installed).
    code = (
        "import sys\n"
        "sys.modules['distributed'] = None\n"
        "from groupmodel.cli import main\n"
        f"sys.exit(main(['fit', {str(study)!r}, '--out', 'out', '--scheduler', 'local:2']))\n"
    )
    done = _run(code, tmp_path)
    assert done.returncode == 2
    lines = done.stderr.strip().splitlines()
    assert len(lines) == 1, done.stderr
    assert "groupmodel[cluster]" in lines[0] and "--scheduler" in lines[0]
    assert not (tmp_path / "out" / "design.tsv").exists()
