"""Two runs into the same ``--out`` (the second refused at once, naming the first), the lock of a killed run
replaced, and the output folder's permissions following the umask.

Reference: common practice for batch tools (a lock file created with O_CREAT | O_EXCL, holding the owner's
process id; a lock whose process is gone is stale) and POSIX (a new folder gets mode 0777 & ~umask).
"""

from __future__ import annotations

import json
import os
import signal
import socket
import stat
import subprocess
import sys
import time
from pathlib import Path

import pytest

from groupmodel.cli.main import main
from groupmodel.outputs.folder import OutputFolder, OutputLock

ROOT = Path(__file__).resolve().parents[2]
EXAMPLE = ROOT / "example_study"


def _env() -> dict[str, str]:
    return {**os.environ, "PYTHONPATH": os.pathsep.join([str(ROOT), os.environ.get("PYTHONPATH", "")])}


def _fit(out: Path, *extra: str) -> list[str]:
    return [sys.executable, "-m", "groupmodel.cli", "fit", str(EXAMPLE / "model.json"), "--out", str(out), *extra]


@pytest.mark.slow
def test_a_second_run_into_the_same_out_is_refused_at_once(tmp_path: Path) -> None:
    out = tmp_path / "results"
    lock = tmp_path / ".results.lock"
    first = subprocess.Popen(_fit(out, "--permutations", "20000", "--tfce", "--jobs", "1"), stdout=subprocess.PIPE,
                             stderr=subprocess.PIPE, start_new_session=True, env=_env(), cwd=tmp_path)
    try:
        deadline = time.monotonic() + 60
        while not lock.exists() and time.monotonic() < deadline:
            time.sleep(0.05)
        assert lock.exists() and first.poll() is None
        record = json.loads(lock.read_text())
        assert record["pid"] == first.pid and record["host"] == socket.gethostname()
        assert record["started"] and "fit" in record["command"]
        started = time.monotonic()
        second = subprocess.run(_fit(out, "--force"), capture_output=True, text=True, env=_env(), cwd=tmp_path,
                                timeout=60)
        elapsed = time.monotonic() - started
        assert first.poll() is None  # the first run goes on
    finally:
        first.send_signal(signal.SIGINT)
        first.communicate(timeout=120)
    assert second.returncode == 2, second.stderr
    assert second.stderr.count("\n") == 1, second.stderr
    assert f"process {first.pid} on {socket.gethostname()}, started {record['started']}" in second.stderr
    assert elapsed < 1.0 + 1.5, elapsed  # within a second of work (plus the interpreter's start)
    assert not out.exists() and not lock.exists()  # the first, interrupted, released it


def test_the_lock_of_a_dead_process_is_replaced(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    dead = subprocess.Popen([sys.executable, "-c", "pass"])
    dead.wait()
    lock = tmp_path / ".design.lock"
    lock.write_text(json.dumps({"pid": dead.pid, "host": socket.gethostname(), "process_start": "1",
                                "started": "2026-01-01T00:00:00+0000", "command": ["groupmodel"]}))
    code = main(["build", str(EXAMPLE / "model.json"), "--out", str(tmp_path / "design"), "--no-pictures"])
    assert code == 0
    assert f"replaced .design.lock: the lock of process {dead.pid}" in capsys.readouterr().out
    assert (tmp_path / "design" / "design.tsv").exists() and not lock.exists()


def test_a_live_lock_of_this_process_parent_refuses(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    """A live holder (here the test's parent process) is never replaced; nothing is written."""
    lock = tmp_path / ".design.lock"
    holder = {"pid": os.getppid(), "host": socket.gethostname(), "process_start": None,
              "started": "2026-01-01T00:00:00+0000", "command": ["groupmodel"]}
    lock.write_text(json.dumps(holder))
    code = main(["build", str(EXAMPLE / "model.json"), "--out", str(tmp_path / "design")])
    err = capsys.readouterr().err
    assert code == 2 and f"process {os.getppid()} on {socket.gethostname()}, started 2026-01-01" in err
    assert json.loads(lock.read_text()) == holder and not (tmp_path / "design").exists()


def test_a_lock_refused_leaves_no_parent_folder(tmp_path: Path) -> None:
    target = tmp_path / "a" / "b" / "out"
    (tmp_path / "a" / "b").mkdir(parents=True)
    (tmp_path / "a" / "b" / ".out.lock").write_text(json.dumps({"pid": os.getppid(), "host": socket.gethostname()}))
    with pytest.raises(Exception, match="another run is writing there"), OutputLock(target):
        pass
    fresh = tmp_path / "x" / "y" / "out"
    with OutputLock(fresh):
        assert (tmp_path / "x" / "y" / ".out.lock").exists()
    assert not (tmp_path / "x").exists()  # nothing was written there: the created folders are gone too


@pytest.mark.parametrize(("umask", "mode"), [(0o022, 0o755), (0o027, 0o750)])
def test_the_output_folder_follows_the_umask(tmp_path: Path, umask: int, mode: int) -> None:
    previous = os.umask(umask)
    try:
        with OutputFolder(tmp_path / "out") as out:
            out.write_text("a.txt", "a\n")
    finally:
        os.umask(previous)
    assert stat.S_IMODE((tmp_path / "out").stat().st_mode) == mode


def test_a_lock_replaced_meanwhile_by_another_run_is_kept(tmp_path: Path) -> None:
    """Two runs both judged the same dead lock; the first already put its own in place: the second must not
    remove it."""
    live = {"pid": os.getppid(), "host": socket.gethostname(), "process_start": None}
    dead = {"pid": 999_999_999, "host": socket.gethostname(), "process_start": "1"}
    lock = OutputLock(tmp_path / "out")
    lock.path.write_text(json.dumps(live))
    lock._remove_stale(dead)
    assert json.loads(lock.path.read_text()) == live and lock.stale is None
    assert [p.name for p in tmp_path.iterdir()] == [".out.lock"]
