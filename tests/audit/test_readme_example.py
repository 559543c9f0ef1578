"""The check report pasted in README.md is what the command prints today."""

from __future__ import annotations

import re
from pathlib import Path

from groupmodel.cli import main

ROOT = Path(__file__).resolve().parents[2]


def test_readme_check_report_is_current(capsys, monkeypatch) -> None:
    readme = (ROOT / "README.md").read_text(encoding="utf-8")
    block = re.search(r"```\n(groupmodel check: .*?)```", readme, re.S)
    assert block is not None, "README has no check report block"
    monkeypatch.chdir(ROOT)
    code = main([
        "check", "--design", "example_study/faulty/design.txt", "--contrasts", "example_study/faulty/contrasts.txt",
        "--participants", "example_study/participants.tsv", "--spec", "example_study/model.json",
        "--images", "example_study/faulty/images.txt",
    ])
    assert code == 1
    printed = capsys.readouterr().out
    assert printed.strip() == block.group(1).strip()
