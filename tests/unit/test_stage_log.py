"""Stage and progress lines for logs (stdout, no terminal), warnings on stderr: one line per stage, progress at
most every 30 s, with rate and time left computed as (J - k) / (k / elapsed) (plain arithmetic, checked by hand
below)."""

from __future__ import annotations

import io

from groupmodel.runtime.log import StageLog, duration_text


class Clock:
    def __init__(self) -> None:
        self.now = 100.0

    def __call__(self) -> float:
        return self.now


def test_one_line_per_stage_and_progress_every_30_s() -> None:
    out, clock = io.StringIO(), Clock()
    log = StageLog(stream=out, clock=clock)
    with log.stage("permutations"):
        for k in range(1, 201):  # 200 batches of 10 rearrangements, one per second
            clock.now += 1.0
            log.progress("permutations", 10 * k, 2000, "rearrangements")
    lines = out.getvalue().splitlines()
    progress = [line for line in lines if " of 2000 " in line]
    assert len(progress) == 6  # at 30, 60, ..., 180 s
    # at 30 s: 300 done, 10/s, (2000 - 300) / 10 = 170 s left
    assert progress[0] == "groupmodel: permutations: 300 of 2000 rearrangements (10/s, about 2 min 50 s left)"
    assert lines[-1] == "groupmodel: permutations: done in 3 min 20 s"


def test_quiet_keeps_only_warnings() -> None:
    out, clock = io.StringIO(), Clock()
    log = StageLog(quiet=True, stream=out, clock=clock, errors=out)
    with log.stage("fitting"):
        clock.now += 60
        log.progress("fitting", 1, 2)
    log.info("using 2 cores")
    log.warning("something to know")
    assert out.getvalue() == "groupmodel: warning: something to know\n"


def test_durations_read_plainly() -> None:
    assert [duration_text(s) for s in (0.04, 9.96, 12.4, 185, 7440)] == ["0.0 s", "10.0 s", "12 s", "3 min 5 s",
                                                                        "2 h 4 min"]
