"""``fit --checkpoint DIR``, killed outright (SIGKILL) in the middle of the permutations, then the same command with
``--resume``: the maps are bit-for-bit those of a run that was never stopped (the claim is bit identity, so the
comparison is exact); a resume with other parameters is refused.
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import nibabel as nib
import numpy as np
import pytest

ROOT = Path(__file__).resolve().parents[2]
SPEC = ROOT / "example_study" / "model.json"
ARGS = ["--permutations", "300", "--tfce", "--seed", "3", "--no-pictures", "--quiet"]


def _cmd(out: Path, *extra: str) -> list[str]:
    return [sys.executable, "-m", "groupmodel.cli", "fit", str(SPEC), "--out", str(out), *ARGS, *extra]


def _env() -> dict[str, str]:
    return {**os.environ, "PYTHONPATH": os.pathsep.join([str(ROOT), os.environ.get("PYTHONPATH", "")])}


def _partial(checkpoint: Path) -> bool:
    """Some hypothesis is done and another saved part of its rearrangements."""
    states = []
    for f in checkpoint.glob("*.npz"):
        try:
            with np.load(f) as z:
                states.append(int(z["done"]))
        except (OSError, ValueError, KeyError, EOFError):
            continue
    return any(s == 300 for s in states) and any(0 < s < 300 for s in states)


@pytest.mark.slow
def test_killed_run_resumed_gives_identical_maps(tmp_path: Path) -> None:
    whole = subprocess.run(_cmd(tmp_path / "whole"), capture_output=True, text=True, env=_env(), timeout=600)
    assert whole.returncode == 0, whole.stderr
    checkpoint = tmp_path / "ck"
    resumed = tmp_path / "resumed"
    proc = subprocess.Popen(_cmd(resumed, "--checkpoint", str(checkpoint), "--checkpoint-every", "0"),
                            stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, env=_env(), start_new_session=True)
    try:
        deadline = time.monotonic() + 600
        while time.monotonic() < deadline and proc.poll() is None and not _partial(checkpoint):
            time.sleep(0.02)
        assert proc.poll() is None, "the run ended before it could be killed mid-way"
        os.killpg(proc.pid, signal.SIGKILL)
    finally:
        if proc.poll() is None:
            os.killpg(proc.pid, signal.SIGKILL)
        proc.wait()
    assert not resumed.exists()
    again = subprocess.run(_cmd(resumed, "--checkpoint", str(checkpoint)), capture_output=True, text=True,
                           env=_env(), timeout=600)
    assert again.returncode == 2 and "--resume" in again.stderr  # an existing checkpoint is never overwritten
    other = subprocess.run(_cmd(resumed, "--checkpoint", str(checkpoint), "--resume", "--permutations", "301"),
                           capture_output=True, text=True, env=_env(), timeout=600)
    assert other.returncode == 2 and "other parameters (inference differ)" in other.stderr, other.stderr
    done = subprocess.run(_cmd(resumed, "--checkpoint", str(checkpoint), "--resume"), capture_output=True,
                          text=True, env=_env(), timeout=600)
    assert done.returncode == 0, done.stderr
    assert "resuming from" in done.stdout and " 300" in done.stdout, done.stdout  # went on from the saved state
    assert not checkpoint.exists()  # removed once the results are written
    whole = tmp_path / "whole"
    maps = sorted(str(p.relative_to(whole)) for p in whole.rglob("*.nii.gz"))
    assert any("tfce" in m for m in maps)
    assert maps == sorted(str(p.relative_to(resumed)) for p in resumed.rglob("*.nii.gz"))
    for name in maps:
        a = np.asanyarray(nib.load(whole / name).dataobj)
        b = np.asanyarray(nib.load(resumed / name).dataobj)
        assert a.tobytes() == b.tobytes(), name
