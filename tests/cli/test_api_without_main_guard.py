"""The Python API with TFCE in worker processes, called from a script without an ``if __name__ == "__main__":``
guard and from a script read from standard input: it finishes (before the fix the parent waited forever for
workers that failed to start).

Reference: the Python documentation of multiprocessing ("Safe importing of main module": spawned children
import the main module unless told otherwise).
"""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[2]
SCRIPT = f"""
from groupmodel.analysis.voxel_fit import fit_images
from groupmodel.model.options import InferenceOptions
fit = fit_images({str(ROOT / "example_study" / "model.json")!r}, progress=False,
                 inference=InferenceOptions(permutations=20, tfce=True, jobs=2, seed=1))
print("finished", fit.runtime["worker_processes"])
"""


@pytest.mark.parametrize("how", ["script-file", "standard-input"])
def test_api_with_worker_processes_needs_no_main_guard(tmp_path: Path, how: str) -> None:
    env = {**os.environ, "PYTHONPATH": os.pathsep.join([str(ROOT), os.environ.get("PYTHONPATH", "")])}
    script = tmp_path / "analysis.py"
    script.write_text(SCRIPT)
    if how == "script-file":
        proc = subprocess.run([sys.executable, str(script)], capture_output=True, text=True, env=env, cwd=tmp_path,
                              timeout=300)
    else:
        proc = subprocess.run([sys.executable, "-"], input=SCRIPT, capture_output=True, text=True, env=env,
                              cwd=tmp_path, timeout=300)
    assert proc.returncode == 0, proc.stderr
    assert proc.stdout.strip() == "finished 2"
