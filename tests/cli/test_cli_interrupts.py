"""``groupmodel`` stopped from outside: Ctrl-C during TFCE permutations with worker processes, and a reader that
closes the pipe early (``groupmodel check ... | head``).

Reference: common practice for command-line tools (a Ctrl-C ends the run with exit code 130 and no traceback; a
broken pipe ends it quietly, as in the Python documentation's "Note on SIGPIPE", with 128 + SIGPIPE = 141).
"""

from __future__ import annotations

import os
import shutil
import signal
import subprocess
import sys
import time
from collections.abc import Callable
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[2]
EXAMPLE = ROOT / "example_study"


def _children(pid: int) -> list[tuple[int, str, bytes]]:
    """(pid, state, command line) of the live processes whose parent is ``pid`` (Linux /proc)."""
    out = []
    for entry in Path("/proc").iterdir():
        if not entry.name.isdigit():
            continue
        try:
            stat = (entry / "stat").read_text()
            cmd = (entry / "cmdline").read_bytes()
        except OSError:
            continue
        state, ppid = stat.rsplit(")", 1)[1].split()[:2]
        if int(ppid) == pid and state != "Z":
            out.append((int(entry.name), state, cmd))
    return out


def _group_alive(pgid: int) -> list[int]:
    """Live (not zombie) processes of process group ``pgid``."""
    alive = []
    for entry in Path("/proc").iterdir():
        if entry.name.isdigit():
            try:
                fields = (entry / "stat").read_text().rsplit(")", 1)[1].split()
            except OSError:
                continue
            if int(fields[3]) == pgid and fields[0] != "Z":
                alive.append(int(entry.name))
    return alive


def _env() -> dict[str, str]:
    return {**os.environ, "PYTHONPATH": os.pathsep.join([str(ROOT), os.environ.get("PYTHONPATH", "")])}


def _start_tfce_fit(tmp_path: Path, out: Path, env: dict[str, str], *extra: str) -> subprocess.Popen[bytes]:
    """A TFCE fit with 2 worker processes, returned once the workers are up and have taken their batches."""
    proc = subprocess.Popen(
        [sys.executable, "-m", "groupmodel.cli", "fit", str(EXAMPLE / "model.json"), "--out", str(out),
         "--permutations", "20000", "--tfce", "--jobs", "2", *extra],
        stdout=subprocess.PIPE, stderr=subprocess.PIPE, start_new_session=True, env=env, cwd=tmp_path,
    )
    deadline = time.monotonic() + 300
    while time.monotonic() < deadline and proc.poll() is None:  # the permutation phase: workers are up
        if len([c for c in _children(proc.pid) if b"spawn_main" in c[2]]) >= 2:
            break
        time.sleep(0.1)
    assert proc.poll() is None, proc.communicate()
    time.sleep(1.0)  # let the workers take their first batches
    return proc


def _stop(proc: subprocess.Popen[bytes], send: Callable[[], None]) -> str:
    """Send the signal, wait for the run to end (killing its group if it does not) and return its stderr."""
    try:
        send()
        _, stderr = proc.communicate(timeout=300)
    finally:
        if proc.poll() is None:
            os.killpg(proc.pid, signal.SIGKILL)
            proc.wait()
    return stderr.decode()


def _assert_group_ends(pgid: int) -> None:
    """The workers end with their parent: no live process of the group within 30 s."""
    deadline = time.monotonic() + 30
    while _group_alive(pgid) and time.monotonic() < deadline:
        time.sleep(0.2)
    assert _group_alive(pgid) == []


@pytest.mark.slow
@pytest.mark.skipif(not Path("/proc/self/stat").exists(), reason="reads processes from /proc (Linux)")
def test_ctrl_c_during_tfce_workers_ends_quietly(tmp_path: Path) -> None:
    """SIGINT to the whole process group (as a terminal sends it) while TFCE nulls run in 2 worker processes."""
    out = tmp_path / "results"
    proc = _start_tfce_fit(tmp_path, out, _env())
    err = _stop(proc, lambda: os.killpg(proc.pid, signal.SIGINT))
    assert proc.returncode == 130, err
    assert "Traceback" not in err and "Error" not in err, err
    assert err.count("\n") == 1 and err.startswith("groupmodel: interrupted"), err
    assert not out.exists() and not list(tmp_path.glob(".results*"))
    _assert_group_ends(proc.pid)


COMMANDS = {
    "check": (["check", "--design", str(EXAMPLE / "faulty" / "design.txt"), "--contrasts",
               str(EXAMPLE / "faulty" / "contrasts.txt"), "--participants", str(EXAMPLE / "participants.tsv")], 1),
    "fit": (["fit", str(EXAMPLE / "model.json"), "--outcome", "hippocampus_signal", "--out", "OUT"], 0),
}


@pytest.mark.parametrize("read_bytes", [0, 10], ids=["reader-gone-at-once", "reader-takes-10-bytes"])
@pytest.mark.parametrize("name", sorted(COMMANDS))
def test_a_reader_that_stops_early(tmp_path: Path, name: str, read_bytes: int) -> None:
    """``groupmodel ... | head -c 10``: the reader takes a few bytes (or none) and closes the pipe.  Whether the
    command still manages to write everything depends on timing; either way it ends quietly, and when the pipe
    was closed before it wrote, with 141."""
    command, code = COMMANDS[name]
    command = [str(tmp_path / "out") if c == "OUT" else c for c in command]
    proc = subprocess.Popen([sys.executable, "-m", "groupmodel.cli", *command], stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, env=_env(), cwd=tmp_path)
    assert proc.stdout is not None and proc.stderr is not None
    first = proc.stdout.read(read_bytes) if read_bytes else b""
    proc.stdout.close()  # as head does after its bytes
    err = proc.stderr.read().decode()
    proc.wait(timeout=120)
    assert len(first) == read_bytes
    assert "Traceback" not in err and "BrokenPipeError" not in err and "Exception ignored" not in err, err
    assert err == "", err
    assert proc.returncode == (141 if read_bytes == 0 else proc.returncode) and proc.returncode in (code, 141)


@pytest.mark.skipif(shutil.which("sh") is None or shutil.which("head") is None, reason="needs sh and head")
def test_a_shell_pipeline_into_head(tmp_path: Path) -> None:
    """The same through a real pipeline: only head's lines reach the terminal, nothing on stderr."""
    script = (f"{sys.executable} -m groupmodel.cli check --design {EXAMPLE / 'faulty' / 'design.txt'} "
              f"--contrasts {EXAMPLE / 'faulty' / 'contrasts.txt'} --participants {EXAMPLE / 'participants.tsv'} "
              "| head -1")
    proc = subprocess.run(["sh", "-c", script], capture_output=True, text=True, env=_env(), cwd=tmp_path,
                          timeout=120)
    assert proc.stdout.count("\n") == 1 and proc.stderr == "", proc.stderr


@pytest.mark.slow
@pytest.mark.skipif(not Path("/proc/self/stat").exists(), reason="reads processes from /proc (Linux)")
@pytest.mark.parametrize("to_group", [False, True], ids=["main-process", "process-group"])
def test_sigterm_during_tfce_workers_ends_like_ctrl_c(tmp_path: Path, to_group: bool) -> None:
    """SIGTERM to the main process (as a batch system at its time limit), or to every process of the group (as
    some send it): exit 143 (128 + SIGTERM), one line, workers gone, no hidden folder, no lock, no spill file
    left in TMPDIR."""
    tmp = tmp_path / "tmp"
    tmp.mkdir()
    out = tmp_path / "results"
    proc = _start_tfce_fit(tmp_path, out, {**_env(), "TMPDIR": str(tmp)}, "--memory", "1MB")
    assert list(tmp.glob("groupmodel-spill-*")), "the data were expected to spill (--memory 1MB)"
    err = _stop(proc, (lambda: os.killpg(proc.pid, signal.SIGTERM)) if to_group
                else (lambda: proc.send_signal(signal.SIGTERM)))
    assert proc.returncode == 143, err
    assert "Traceback" not in err and "Error" not in err, err
    assert err.count("\n") == 1 and err.startswith("groupmodel: terminated"), err
    assert not out.exists() and not list(tmp_path.glob(".results*"))
    assert not list(tmp.glob("groupmodel-spill-*"))
    _assert_group_ends(proc.pid)


@pytest.mark.slow
@pytest.mark.skipif(not Path("/proc/self/stat").exists(), reason="reads processes from /proc (Linux)")
def test_workers_end_by_themselves_when_the_main_process_is_killed(tmp_path: Path) -> None:
    """SIGKILL to the main process alone (no clean-up possible there, and nobody signals the workers): the TFCE
    worker processes notice that their parent is gone and end, and so does the resource tracker; the lock and the
    hidden folder left behind are removed by the next run into the same place."""
    out = tmp_path / "results"
    proc = _start_tfce_fit(tmp_path, out, _env())
    workers = [pid for pid, _, cmd in _children(proc.pid) if b"multiprocessing" in cmd]
    assert len(workers) >= 2, workers
    try:
        proc.send_signal(signal.SIGKILL)
        proc.wait(timeout=30)
        deadline = time.monotonic() + 30
        while _group_alive(proc.pid) and time.monotonic() < deadline:
            time.sleep(0.2)
        assert _group_alive(proc.pid) == []  # nobody else ended them: their own watch on the parent did
    finally:
        if _group_alive(proc.pid):
            os.killpg(proc.pid, signal.SIGKILL)
    assert list(tmp_path.glob(".results.lock"))
    again = subprocess.run([sys.executable, "-m", "groupmodel.cli", "build", str(EXAMPLE / "model.json"), "--out",
                            str(out), "--no-pictures"], capture_output=True, text=True, env=_env(), cwd=tmp_path,
                           timeout=300)
    assert again.returncode == 0, again.stderr
    assert "replaced .results.lock" in again.stdout
    assert not list(tmp_path.glob(".results*"))
