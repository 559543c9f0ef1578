"""``groupmodel fit`` as a batch job runs it: output to files (no terminal), a scheduler's CPU allocation.

Reference: the conventions of batch systems (SLURM_CPUS_PER_TASK is the cores allocated per task; OMP_NUM_THREADS
the threads a program should run) [from memory].
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
EXAMPLE = ROOT / "example_study"


def _run(tmp_path: Path, *args: str, **env: str) -> subprocess.CompletedProcess[str]:
    full = {**os.environ, "PYTHONPATH": os.pathsep.join([str(ROOT), os.environ.get("PYTHONPATH", "")]), **env}
    for name in ("SLURM_CPUS_PER_TASK", "OMP_NUM_THREADS"):
        if name not in env:
            full.pop(name, None)
    return subprocess.run([sys.executable, "-m", "groupmodel.cli", *args], capture_output=True, text=True,
                          env=full, cwd=tmp_path, timeout=300)


def test_scheduler_allocation_logged_once_and_recorded(tmp_path: Path) -> None:
    out = tmp_path / "res"
    proc = _run(tmp_path, "fit", str(EXAMPLE / "model.json"), "--out", str(out), "--permutations", "20",
                "--tfce", "--no-pictures", SLURM_CPUS_PER_TASK="1")
    assert proc.returncode == 0, proc.stderr
    log = proc.stdout.splitlines()
    assert log.count("groupmodel: using 1 core (SLURM_CPUS_PER_TASK=1)") == 1
    for stage in ("reading images", "fitting", "permutations"):
        assert sum(line.startswith(f"groupmodel: {stage}: done in ") for line in log) == 1, log
    assert "warning" not in proc.stdout
    summary = json.loads((out / "summary.json").read_text())
    assert summary["runtime"]["threads"] == 1 and summary["runtime"]["worker_processes"] == 0
    assert summary["runtime"]["cores_from"] == "SLURM_CPUS_PER_TASK=1"
    assert isinstance(summary["findings"], list)


def test_quiet_run_has_no_stage_lines(tmp_path: Path) -> None:
    proc = _run(tmp_path, "fit", str(EXAMPLE / "model.json"), "--out", str(tmp_path / "res"), "--quiet",
                "--no-pictures", OMP_NUM_THREADS="1")
    assert proc.returncode == 0 and proc.stderr == "", proc.stderr
    assert "groupmodel: " not in proc.stdout and "wrote " in proc.stdout


def test_table_fit_findings_on_stderr_and_in_results_json(tmp_path: Path) -> None:
    """A table fit (``--outcome``) logs the design's findings like a voxelwise fit: on stderr, and recorded in
    results.json; with ``--quiet`` too (warnings are never dropped)."""
    lines = (EXAMPLE / "participants.tsv").read_text().splitlines()
    years = ["birth_year"] + [str(1990 + i % 7) for i in range(len(lines) - 1)]
    (tmp_path / "participants.tsv").write_text("".join(f"{a}\t{y}\n" for a, y in zip(lines, years, strict=True)))
    spec = json.loads((EXAMPLE / "model.json").read_text())
    spec["covariates"] = {"birth_year": {"center": "none"}}  # uncentred around 1993: a large condition number
    spec["terms"] = ["training*chronotype", "birth_year"]
    spec["hypotheses"].pop("age")
    spec.pop("images")
    (tmp_path / "model.json").write_text(json.dumps(spec))
    for quiet in ((), ("--quiet",)):
        out = tmp_path / f"res{len(quiet)}"
        proc = _run(tmp_path, "fit", "model.json", "--outcome", "hippocampus_signal", "--out", str(out),
                    "--no-pictures", *quiet)
        assert proc.returncode == 0, proc.stderr
        assert "groupmodel: warning: condition number" in proc.stderr
        assert "condition number" not in proc.stdout
        recorded = json.loads((out / "results.json").read_text())
        assert [f["code"] for f in recorded["findings"]] == ["ill_conditioned"]
        assert recorded["findings"][0]["severity"] == "warning" and recorded["warnings"] == []
