"""Spill folders of a run killed outright (SIGKILL: no clean-up possible) are removed by the next run, recognised
by their owner record (process gone); folders of live processes and folders without a record are left alone.

Reference: the usual rule for lock and PID files of daemons (a record naming a process that no longer exists
is stale), as for the lock beside --out (tests/cli/test_cli_lock.py).
"""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest

from groupmodel.images.spill import SPILL_PREFIX, _new_spill, remove_stale_spills
from groupmodel.runtime.owner import OWNER_FILE, owner_record

ROOT = Path(__file__).resolve().parents[2]
EXAMPLE = ROOT / "example_study"


def _env(tmp: Path) -> dict[str, str]:
    return {**os.environ, "TMPDIR": str(tmp),
            "PYTHONPATH": os.pathsep.join([str(ROOT), os.environ.get("PYTHONPATH", "")])}


def _fit(out: Path, *extra: str) -> list[str]:
    return [sys.executable, "-m", "groupmodel.cli", "fit", str(EXAMPLE / "model.json"), "--out", str(out),
            "--memory", "1MB", *extra]


@pytest.mark.slow
@pytest.mark.skipif(not Path("/proc/self/stat").exists(), reason="reads processes from /proc (Linux)")
def test_spill_of_a_killed_run_is_removed_by_the_next_run(tmp_path: Path) -> None:
    tmp = tmp_path / "tmp"
    tmp.mkdir()
    foreign = tmp / f"{SPILL_PREFIX}someone-else"  # no owner record: never ours to remove
    foreign.mkdir()
    proc = subprocess.Popen(_fit(tmp_path / "first", "--permutations", "50000", "--jobs", "1"),
                            stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, env=_env(tmp),
                            start_new_session=True, cwd=tmp_path)
    try:
        deadline = time.monotonic() + 300
        spilled: list[Path] = []
        while time.monotonic() < deadline and proc.poll() is None and not spilled:
            spilled = [p for p in tmp.glob(f"{SPILL_PREFIX}*") if (p / OWNER_FILE).exists()]
            time.sleep(0.1)
        assert spilled, proc.communicate()
        os.killpg(proc.pid, signal.SIGKILL)
    finally:
        if proc.poll() is None:
            os.killpg(proc.pid, signal.SIGKILL)
        proc.wait()
    assert spilled[0].exists(), "a killed run cannot remove its own spill"
    second = subprocess.run(_fit(tmp_path / "second"), capture_output=True, text=True, env=_env(tmp),
                            cwd=tmp_path, timeout=300)
    assert second.returncode == 0, second.stderr
    assert not spilled[0].exists()
    assert f"removed {spilled[0].name} (process {proc.pid})" in second.stdout
    assert foreign.exists()
    assert [p for p in tmp.glob(f"{SPILL_PREFIX}*")] == [foreign]


def test_spill_of_a_live_process_or_another_host_is_kept(tmp_path: Path) -> None:
    live, other = tmp_path / f"{SPILL_PREFIX}live", tmp_path / f"{SPILL_PREFIX}other"
    for folder, record in ((live, owner_record()), (other, {**owner_record(), "host": "elsewhere", "pid": 1})):
        folder.mkdir()
        (folder / OWNER_FILE).write_text(json.dumps(record))
    sleeper = subprocess.Popen([sys.executable, "-c", "pass"])
    sleeper.wait()  # a process id that is gone now
    dead = tmp_path / f"{SPILL_PREFIX}dead"
    dead.mkdir()
    (dead / OWNER_FILE).write_text(json.dumps({**owner_record(), "pid": sleeper.pid, "process_start": "1"}))
    removed = remove_stale_spills(tmp_path)
    assert [r.path for r in removed] == [dead]
    assert live.exists() and other.exists() and not dead.exists()


def test_a_new_spill_carries_its_owner_record(tmp_path: Path) -> None:
    folder, mm = _new_spill(tmp_path, 16)
    record = json.loads((folder / OWNER_FILE).read_text())
    assert record["pid"] == os.getpid() and folder.name.startswith(SPILL_PREFIX)
    del mm
