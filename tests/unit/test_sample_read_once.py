"""participants.tsv is read once per fit: image paths, dropped images and blocks all use the Sample."""

from __future__ import annotations

import builtins
import io
from pathlib import Path
from typing import Any

import pandas as pd
import pytest
from test_fit_voxelwise import make_study

import groupmodel.model.table as table_module
from groupmodel.cli import main


def test_one_voxelwise_fit_reads_the_participants_table_once(tmp_path: Path, monkeypatch: pytest.MonkeyPatch,
                                                             capsys: pytest.CaptureFixture[str]) -> None:
    spec = make_study(tmp_path / "study", n=20)
    participants = spec.parent / "participants.tsv"
    table = pd.read_csv(participants, sep="\t", dtype=str)
    table["family"] = [f"fam{i // 2}" for i in range(len(table))]
    table.to_csv(participants, sep="\t", index=False)
    (spec.parent / "maps" / "sub-004.nii.gz").unlink()  # dropped with --drop-missing-images: a rebuild

    reads: list[str] = []
    opens: list[str] = []
    real_read_table = table_module.read_table
    real_open = builtins.open

    def counting_read_table(path: Path) -> pd.DataFrame:
        reads.append(str(path))
        return real_read_table(path)

    def counting_open(file: Any, *args: Any, **kwargs: Any) -> Any:
        if Path(str(file)).name == "participants.tsv" if isinstance(file, str | Path) else False:
            opens.append(str(file))
        return real_open(file, *args, **kwargs)

    monkeypatch.setattr(table_module, "read_table", counting_read_table)
    monkeypatch.setattr(builtins, "open", counting_open)
    monkeypatch.setattr(io, "open", counting_open)
    out = tmp_path / "out"
    code = main(["fit", str(spec), "--out", str(out), "--drop-missing-images", "--permutations", "20",
                 "--blocks", "family"])
    assert code == 0, capsys.readouterr()
    assert reads == [str(participants)]
    assert opens == [str(participants)]
    printed = capsys.readouterr().out
    assert "sub-004" in printed  # the dropped participant is listed among the exclusions
