"""``groupmodel check`` with design rows in another order than the participants table.

The permutation families (a swap, a moved block, a block shifted by one, a reversed block, a stable sort by
factors) are the elementary rearrangements of a sequence (common practice; a moved block is a rotation of the
stretch of rows it crosses).  The gallery (tests/audit/gallery/rows_*) holds whole file sets; these tests
check the pieces and the cases the gallery does not hold (the example study sorted by training with a spec, a
swap inside one cell told apart by a covariate, and one that cannot be told apart).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from groupmodel.audit import audit
from groupmodel.audit.reorder_words import runs_text, simplest_family

ROOT = Path(__file__).resolve().parents[2]


def _family(order: list[int], keys: dict[str, list[int]] | None = None) -> tuple[np.ndarray, object]:
    """The family of an exact permutation: design row i holds position order[i]."""
    row = np.array(order)
    pos = np.arange(row.size)
    k = {f: (np.array(v)[row], np.array(v)) for f, v in (keys or {}).items()}
    return simplest_family(row, pos, k)


def test_swap_moved_block_shift_and_reversal_are_recognised() -> None:
    got, fam = _family([0, 4, 2, 3, 1, 5])
    assert fam.kind == "swap" and fam.pairs == ((1, 4),) and got.tolist() == [0, 4, 2, 3, 1, 5]
    # participants 3-7 (0-based 2..6) typed after participant 12
    order = [0, 1] + list(range(7, 12)) + [2, 3, 4, 5, 6] + [12, 13]
    got, fam = _family(order)
    assert fam.kind == "rotate" and (fam.start, fam.stop, fam.shift) == (2, 12, 5) and got.tolist() == order
    order = [0, 1, 2, 4, 5, 6, 7, 3, 8]
    got, fam = _family(order)
    assert fam.kind == "rotate" and (fam.start, fam.stop, fam.shift) == (3, 8, 1) and got.tolist() == order
    order = [0, 1, 6, 5, 4, 3, 2, 7]
    got, fam = _family(order)
    assert fam.kind == "reverse" and (fam.start, fam.stop) == (2, 7) and got.tolist() == order


def test_sort_by_factor_and_several_swaps() -> None:
    group = [1, 0, 1, 0, 0, 1, 1, 0]
    order = [1, 3, 4, 7, 0, 2, 5, 6]  # stable sort by group
    got, fam = _family(order, {"group": group})
    assert fam.kind == "sorted" and fam.factors == ("group",) and got.tolist() == order
    got, fam = _family([1, 0, 2, 3, 5, 4, 6, 8, 7])
    assert fam.kind in ("swaps", "swap") and fam.pairs == ((0, 1), (4, 5), (7, 8))


def test_runs_text() -> None:
    assert runs_text([1, 2, 3, 7, 4, 5, 6, 9]) == "1-3, 7, 4-6, 9"


def _example_rows() -> tuple[list[str], list[str]]:
    lines = (ROOT / "example_study/faulty/design.txt").read_text().splitlines()
    comments = [ln for ln in lines if ln.startswith("#")]
    rows = [ln for ln in lines if ln.strip() and not ln.startswith("#")]
    rows[8], rows[9] = rows[9], rows[8]  # undo the example's swap: rows in table order
    return comments, rows


def test_example_study_sorted_by_training_with_spec(tmp_path: Path) -> None:
    """Sorted by training (sprint, endurance, rest as in the spec), read with the spec: one error that says so."""
    comments, rows = _example_rows()
    training = {"0 0": "rest", "1 0": "sprint", "0 1": "endurance"}
    level = [training[" ".join(r.split()[1:3])] for r in rows]
    order = sorted(range(len(rows)), key=lambda i: ["sprint", "endurance", "rest"].index(level[i]))
    design = tmp_path / "design.txt"
    design.write_text("\n".join(comments + [rows[i] for i in order]) + "\n")
    report = audit(design, participants=ROOT / "example_study/participants.tsv", spec=ROOT / "example_study/model.json")
    errors = [f for f in report.findings if f.severity == "error"]
    assert [f.code for f in errors] == ["rows_out_of_place"]
    msg = errors[0].message
    n_sprint = level.count("sprint")
    assert "age values" in msg and "the rows are sorted by training" in msg
    assert f"rows 1-{n_sprint} sprint" in msg
    # read in the right order, every column is explained and nothing else is wrong
    assert not any(f.code == "column_unexplained" for f in report.findings)


def _small(tmp_path: Path, with_x: bool, swap: tuple[int, int]) -> Path:
    table = tmp_path / "participants.tsv"
    group = ["a", "b"] * 5
    x = [31, 44, 27, 38, 25, 49, 35, 41, 29, 46]
    table.write_text("participant_id\tgroup\tx\n" + "".join(
        f"sub-{i + 1:02d}\t{g}\t{v}\n" for i, (g, v) in enumerate(zip(group, x, strict=True))))
    mean = sum(x) / len(x)
    rows = [[1.0, 1.0 if g == "b" else 0.0] + ([v - mean] if with_x else []) for g, v in zip(group, x, strict=True)]
    i, j = swap
    rows[i], rows[j] = rows[j], rows[i]
    design = tmp_path / "design.txt"
    design.write_text("".join(" ".join(f"{v:g}" for v in r) + "\n" for r in rows))
    return design


def test_swap_within_a_cell_found_through_the_covariate(tmp_path: Path) -> None:
    design = _small(tmp_path, True, (0, 4))  # sub-01 and sub-05: both group a
    report = audit(design, participants=tmp_path / "participants.tsv", factors=["group"], covariates=["x"])
    hits = [f for f in report.findings if f.code == "rows_out_of_place"]
    assert len(hits) == 1 and hits[0].severity == "error"
    assert "rows 1 and 5 look swapped" in hits[0].message and "has the x of sub-05" in hits[0].message
    assert "x values" in hits[0].message


@pytest.mark.parametrize("with_x", [False])
def test_swap_within_a_cell_without_covariate_cannot_be_seen(tmp_path: Path, with_x: bool) -> None:
    """The README's limit: rows of one cell are interchangeable without ids (or a covariate column)."""
    design = _small(tmp_path, with_x, (0, 4))
    report = audit(design, participants=tmp_path / "participants.tsv", factors=["group"])
    assert not [f for f in report.findings if f.severity in ("error", "warning")]


def test_two_factors_the_coding_fits_equally_are_named(tmp_path: Path) -> None:
    """Without --factors, a 0/1 column sorted into two halves of ten fits group and sex alike: say so."""
    rng = np.random.default_rng(3)
    group, sex = np.array(["a"] * 10 + ["b"] * 10), np.array(["f"] * 10 + ["m"] * 10)
    rng.shuffle(group)
    rng.shuffle(sex)
    table = tmp_path / "participants.tsv"
    table.write_text("participant_id\tgroup\tsex\n" + "".join(
        f"sub-{i + 1:02d}\t{g}\t{s}\n" for i, (g, s) in enumerate(zip(group, sex, strict=True))))
    design = tmp_path / "design.txt"
    design.write_text("".join(f"1 {int(group[i] == 'b')}\n" for i in sorted(range(20), key=lambda i: group[i])))
    auto = [f for f in audit(design, participants=table).findings if f.code == "rows_out_of_place"]
    assert len(auto) == 1 and "equally well" in auto[0].message and "give --factors" in auto[0].message
    given = [f for f in audit(design, participants=table, factors=["group"]).findings
             if f.code == "rows_out_of_place"]
    assert len(given) == 1 and "sorted by group (rows 1-10 a, rows 11-20 b)" in given[0].message
    assert "equally well" not in given[0].message


def _site_study(tmp_path: Path, sorted_rows: bool) -> tuple[Path, Path]:
    """group x sex, 5 per cell, table in group order.  The design codes group and either a scanner site that is
    not in the table (table order, nothing wrong with the rows) or sex with the rows sorted by sex within group."""
    rng = np.random.default_rng(8)
    sex = np.array((["f"] * 5 + ["m"] * 5) * 2)
    site = np.array([0] * 5 + [1] * 5 + [0] * 5 + [1] * 5)
    for half in (slice(0, 10), slice(10, 20)):
        sex[half] = rng.permutation(sex[half])
        site[half] = rng.permutation(site[half])
    group = np.array(["a"] * 10 + ["b"] * 10)
    table = tmp_path / "participants.tsv"
    table.write_text("participant_id\tgroup\tsex\n" + "".join(
        f"sub-{i + 1:02d}\t{g}\t{s}\n" for i, (g, s) in enumerate(zip(group, sex, strict=True))))
    if sorted_rows:
        order = sorted(range(20), key=lambda i: (group[i], sex[i]))
        rows = [f"1 {int(group[i] == 'b')} {int(sex[i] == 'm')}" for i in order]
    else:
        rows = [f"1 {int(group[i] == 'b')} {site[i]}" for i in range(20)]
    design = tmp_path / "design.txt"
    design.write_text("\n".join(rows) + "\n")
    return design, table


def test_a_column_not_in_the_table_is_no_reordering(tmp_path: Path) -> None:
    """A 0/1 site column that happens to split each group as sex does: a warning naming both readings, no error."""
    design, table = _site_study(tmp_path, False)
    report = audit(design, participants=table)
    bad = [(f.severity, f.code) for f in report.findings if f.severity in ("error", "warning")]
    assert ("warning", "rows_out_of_place") in bad and not any(s == "error" for s, _ in bad)
    msg = next(f.message for f in report.findings if f.code == "rows_out_of_place")
    assert "something that is not in participants.tsv" in msg and "give --factors" in msg


def test_rows_sorted_within_group_with_factors_given(tmp_path: Path) -> None:
    design, table = _site_study(tmp_path, True)
    hits = [f for f in audit(design, participants=table, factors=["group", "sex"]).findings
            if f.code == "rows_out_of_place"]
    assert len(hits) == 1 and hits[0].severity == "error" and "sorted by group, then sex" in hits[0].message


def test_images_in_a_third_order_are_not_taken_for_the_design(tmp_path: Path) -> None:
    """Design sorted by mode, images sorted by shift: the design is reordered (error) and the images are wrong."""
    case = Path(__file__).parent / "gallery" / "rows_sorted_by_factor"
    table = case / "participants.tsv"
    lines = table.read_text().splitlines()[1:]
    shift = {ln.split("\t")[0]: ln.split("\t")[2] for ln in lines}
    ids = sorted(shift, key=lambda p: shift[p] == "night")
    images = tmp_path / "images.txt"
    images.write_text("".join(f"{p}/{p}_con.nii.gz\n" for p in ids))
    report = audit(case / "design.txt", participants=table, factors=["mode", "shift"], covariates=["sleep_h"],
                   images=images)
    codes = {(f.severity, f.code) for f in report.findings}
    assert ("error", "rows_out_of_place") in codes and ("error", "image_order") in codes
    assert ("note", "rows_follow_images") not in codes


def test_many_cells_of_equal_size_sorted(tmp_path: Path) -> None:
    """3 x 4 cells of 10 (12! matchings of equal-size groups): each factor's levels are found among the codings."""
    rng = np.random.default_rng(2)
    a_lv, b_lv = ["a1", "a2", "a3"], ["b1", "b2", "b3", "b4"]
    cells = [(a, b) for a in a_lv for b in b_lv for _ in range(10)]
    rng.shuffle(cells)
    table = tmp_path / "participants.tsv"
    table.write_text("participant_id\tA\tB\n"
                     + "".join(f"sub-{i + 1:03d}\t{a}\t{b}\n" for i, (a, b) in enumerate(cells)))

    def effect(levels: list[str], lv: str) -> np.ndarray:
        k = levels.index(lv)
        row = np.full(len(levels) - 1, -1.0 if k == len(levels) - 1 else 0.0)
        if k < len(levels) - 1:
            row[k] = 1.0
        return row

    order = sorted(range(len(cells)), key=lambda i: (a_lv.index(cells[i][0]), b_lv.index(cells[i][1])))
    rows = []
    for i in order:
        ea, eb = effect(a_lv, cells[i][0]), effect(b_lv, cells[i][1])
        rows.append(np.concatenate([[1.0], ea, eb, np.outer(ea, eb).ravel()]))
    design = tmp_path / "design.txt"
    design.write_text("".join(" ".join(f"{v:g}" for v in r) + "\n" for r in rows))
    report = audit(design, participants=table, factors=["A", "B"])
    hits = [f for f in report.findings if f.code == "rows_out_of_place"]
    assert len(hits) == 1 and "sorted by A, then B (rows 1-10 a1/b1, rows 11-20 a1/b2" in hits[0].message
    assert [c.description.split(":")[0] for c in report.columns[1:3]] == ["effect coding of A"] * 2
