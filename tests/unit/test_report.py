"""report.html: one self-contained page per output folder, for every kind of run.

References: the page is parsed with the standard library's html.parser (well-formed: every element closed in
order); the embedded PNGs are decoded with Pillow (the library matplotlib draws them with); the numbers shown
are compared with the TSV files of the same folder; the sensitivity with statsmodels' TTestIndPower; the
estimated cell means with statsmodels OLS get_prediction; the per-participant residuals with
scipy.linalg.lstsq on the images read by nibabel.
"""

from __future__ import annotations

import base64
import io
import json
import shutil
import subprocess
import sys
from html.parser import HTMLParser
from pathlib import Path

import nibabel as nib
import numpy as np
import pandas as pd
import pytest
from scipy import linalg

from groupmodel.cli import main

ROOT = Path(__file__).resolve().parents[2]
EXAMPLE = ROOT / "example_study"
sys.path.insert(0, str(ROOT / "tests" / "cli"))
from test_cli_surface import make_surface_study  # noqa: E402

VOID = {"meta", "img", "br", "hr", "input", "link", "col", "area", "base", "source", "wbr"}
SVG_VOID_OK = {"rect", "line", "circle", "path"}  # may be written <x/> or <x></x>
COMMON = ["study", "design", "hypotheses", "sensitivity", "caution"]


class Page(HTMLParser):
    """Parses a page, checking that elements close in order; collects ids, images, svgs, tables."""

    def __init__(self, text: str) -> None:
        super().__init__(convert_charrefs=True)
        self.stack: list[str] = []
        self.problems: list[str] = []
        self.ids: list[str] = []
        self.images: list[dict[str, str]] = []
        self.svgs = 0
        self.scripts = 0
        self.tables: dict[str, list[list[str]]] = {}
        self._table: str | None = None
        self._cell: list[str] | None = None
        self.feed(text)
        self.close()
        if self.stack:
            self.problems.append(f"not closed: {self.stack}")

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        a = {k: v or "" for k, v in attrs}
        if "id" in a:
            self.ids.append(a["id"])
        if tag == "img":
            self.images.append(a)
        if tag == "svg":
            self.svgs += 1
        if tag == "script":
            self.scripts += 1
        if tag == "table" and "id" in a:
            self._table = a["id"]
            self.tables[self._table] = []
        if tag == "tr" and self._table:
            self.tables[self._table].append([])
        if tag in ("td", "th") and self._table:
            self._cell = []
        if tag not in VOID:
            self.stack.append(tag)

    def handle_startendtag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        if tag not in VOID and tag not in SVG_VOID_OK:
            self.problems.append(f"self-closed <{tag}/>")

    def handle_endtag(self, tag: str) -> None:
        if tag in VOID:
            return
        if not self.stack or self.stack[-1] != tag:
            self.problems.append(f"</{tag}> closes <{self.stack[-1] if self.stack else None}>")
            return
        self.stack.pop()
        if tag in ("td", "th") and self._table and self._cell is not None:
            self.tables[self._table][-1].append("".join(self._cell).strip())
            self._cell = None
        if tag == "table":
            self._table = None

    def handle_data(self, data: str) -> None:
        if self._cell is not None:
            self._cell.append(data)


def read_page(folder: Path) -> tuple[str, Page]:
    text = (folder / "report.html").read_text(encoding="utf-8")
    page = Page(text)
    assert page.problems == [], page.problems[:5]
    return text, page


def assert_self_contained(text: str, page: Page, pictures: bool = True) -> None:
    assert page.scripts == 0  # readable with JavaScript off
    assert "http://" not in text.replace('xmlns="http://www.w3.org/2000/svg"', "") and "https://" not in text
    assert " src=\"" not in text.replace('<img src="data:image/png;base64,', "")
    for img in page.images:
        from PIL import Image

        assert img["src"].startswith("data:image/png;base64,")
        im = Image.open(io.BytesIO(base64.b64decode(img["src"].split(",", 1)[1])))
        assert im.size == (int(img["width"]), int(img["height"])) and min(im.size) > 0
        assert img.get("alt")
    if pictures:
        assert page.images
    else:
        assert not page.images and page.svgs == 0


# ----- the runs ------------------------------------------------------------------------------------------
@pytest.fixture(scope="module")
def runs(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Path]:
    base = tmp_path_factory.mktemp("reports")
    spec = str(EXAMPLE / "model.json")
    out = {k: base / k for k in ("build", "table", "plain", "perm", "surface", "nopics")}
    assert main(["build", spec, "--out", str(out["build"])]) == 0
    assert main(["fit", spec, "--outcome", "hippocampus_signal", "--out", str(out["table"])]) == 0
    assert main(["fit", spec, "--out", str(out["plain"])]) == 0
    assert main(["fit", spec, "--out", str(out["perm"]), "--permutations", "40", "--seed", "2"]) == 0
    assert main(["fit", spec, "--out", str(out["nopics"]), "--no-pictures"]) == 0
    surface = make_surface_study(base / "surface_study")
    assert main(["fit", str(surface), "--out", str(out["surface"]), "--permutations", "40", "--seed", "1",
                 "--tfce"]) == 0
    return out


@pytest.mark.parametrize("kind,sections", [
    ("build", COMMON),
    ("table", [*COMMON, "table-fit"]),
    ("plain", [*COMMON, "voxel-fit", "residuals"]),
    ("perm", [*COMMON, "voxel-fit", "residuals"]),
    ("surface", [*COMMON, "voxel-fit", "residuals"]),
])
def test_every_section_and_every_figure_embedded(runs: dict[str, Path], kind: str, sections: list[str]) -> None:
    text, page = read_page(runs[kind])
    for s in sections:
        assert s in page.ids, s
    assert_self_contained(text, page)
    contrasts = json.loads((runs[kind] / "contrasts.json").read_text())
    if kind in ("plain", "perm", "surface"):
        for name in contrasts["hypotheses"]:
            assert f"hyp-{name}" in page.ids
    assert "groupmodel output supports research; it is not a clinical or diagnostic tool." in text
    assert "-0.0<" not in text and "e-16" not in text and "99999999" not in text  # no round-off noise


def test_thresholds_are_named_corrected_or_uncorrected(runs: dict[str, Path]) -> None:
    plain, _ = read_page(runs["plain"])
    perm, _ = read_page(runs["perm"])
    assert "UNCORRECTED" in plain and "(corrected)" not in plain
    assert "voxel-level family-wise error p &lt; 0.05 (corrected)" in perm and "UNCORRECTED" not in perm
    assert "Clusters (voxel fwe)" in perm


def test_no_pictures_gives_a_report_without_figures(runs: dict[str, Path]) -> None:
    text, page = read_page(runs["nopics"])
    assert_self_contained(text, page, pictures=False)
    assert "pictures are off" in text and "hyp-age" in page.ids


# ----- numbers on the page are those of the files ---------------------------------------------------
def _compare(shown: list[list[str]], frame: pd.DataFrame) -> None:
    header, *rows = shown
    assert header == list(frame.columns)
    assert len(rows) == len(frame)
    for row, (_, expect) in zip(rows, frame.iterrows(), strict=True):
        for text, (col, value) in zip(row, expect.items(), strict=True):
            if isinstance(value, str):
                assert text == value, col
            elif pd.isna(value):
                assert text == "n/a", col
            else:  # 4 significant digits on the page
                np.testing.assert_allclose(float(text), float(value), rtol=5e-4, atol=1e-12, err_msg=col)


def _tsv(path: Path) -> pd.DataFrame:
    return pd.read_csv(path, sep="\t", na_values=["n/a"], keep_default_na=False)


def test_numbers_on_the_page_equal_the_files(runs: dict[str, Path]) -> None:
    _, page = read_page(runs["perm"])
    _compare(page.tables["summary"], _tsv(runs["perm"] / "summary.tsv"))
    n_tables = 0
    for path in runs["perm"].glob("hypotheses/*/clusters_*.tsv"):
        hyp, kind = path.parent.name, path.name.removesuffix(".tsv").removeprefix("clusters_")
        frame = _tsv(path)
        if len(frame):
            _compare(page.tables[f"clusters-{hyp}-{kind}"], frame)
            n_tables += 1
    assert n_tables >= 2
    _, page = read_page(runs["table"])
    _compare(page.tables["results"], _tsv(runs["table"] / "results.tsv"))
    _compare(page.tables["cell-means"], _tsv(runs["table"] / "cell_means.tsv"))
    design = json.loads((runs["table"] / "design.json").read_text())
    shown = {row[0]: row[2] for row in page.tables["exclusions"][1:]}
    assert shown == {e["participant_id"]: e["reason"] for e in design["excluded"]}
    counts = [int(row[2]) for row in page.tables["cells"][1:]]
    assert counts == [c["count"] for c in design["cells"]]


def test_covariate_summaries_per_cell(runs: dict[str, Path]) -> None:
    # Reference: pandas groupby on participants.tsv (with the three excluded rows dropped by hand)
    _, page = read_page(runs["plain"])
    header, *rows = page.tables["cells"]
    table = pd.read_csv(EXAMPLE / "participants.tsv", sep="\t", na_values=["n/a"]).dropna(
        subset=["training", "chronotype", "age"])
    age = table.groupby(["training", "chronotype"])["age"]
    for row in rows:
        cell = dict(zip(header, row, strict=True))
        key = (cell["training"], cell["chronotype"])
        np.testing.assert_allclose(float(cell["age mean"]), age.mean()[key], rtol=5e-4)
        np.testing.assert_allclose(float(cell["age SD"]), age.std()[key], rtol=5e-4)


# ----- external references --------------------------------------------------------------------------
def test_sensitivity_equals_statsmodels_ttestindpower(tmp_path: Path) -> None:
    # Reference: statsmodels.stats.power.TTestIndPower.solve_power (two independent groups, equal variances).
    from statsmodels.stats.power import TTestIndPower

    from groupmodel.outputs.report.sensitivity import sensitivity

    n1, n2 = 9, 14
    table = pd.DataFrame({"participant_id": [f"sub-{i:02d}" for i in range(n1 + n2)],
                          "group": ["a"] * n1 + ["b"] * n2})
    table.to_csv(tmp_path / "participants.tsv", sep="\t", index=False)
    spec = {"participants": "participants.tsv", "factors": {"group": {"levels": ["a", "b"]}}, "terms": ["group"],
            "hypotheses": {"b_vs_a": {"compare": {"group": ["b", "a"]}},
                           "b_gt_a": {"compare": {"group": ["b", "a"]}, "tail": "greater"}}}
    (tmp_path / "model.json").write_text(json.dumps(spec))
    assert main(["build", str(tmp_path / "model.json"), "--out", str(tmp_path / "out"), "--no-pictures"]) == 0
    _, page = read_page(tmp_path / "out")
    rows = {r[0]: r for r in page.tables["sensitivity-table"][1:]}
    power = TTestIndPower()
    for name, alternative in (("b_vs_a", "two-sided"), ("b_gt_a", "larger")):
        for column, alpha in ((3, 0.05), (4, 0.05 / 2)):  # Bonferroni over the 2 hypotheses
            d = power.solve_power(effect_size=None, nobs1=n1, ratio=n2 / n1, alpha=alpha, power=0.8,
                                  alternative=alternative)
            np.testing.assert_allclose(float(rows[name][column]), d, rtol=5e-4)  # in residual SD units
    x = np.zeros((n1 + n2, 2))
    x[:n1, 0], x[n1:, 1] = 1, 1
    s = sensitivity(x, np.array([[-1.0, 1.0]]), "t", "two-sided", 0.05, sigma=2.0)
    d = power.solve_power(effect_size=None, nobs1=n1, ratio=n2 / n1, alpha=0.05, power=0.8)
    np.testing.assert_allclose(s.smallest_effect, 2.0 * d, rtol=1e-5)  # statsmodels' own solver tolerance
    np.testing.assert_allclose(s.se_factor[0], np.sqrt(1 / n1 + 1 / n2), rtol=1e-12)


def test_f_sensitivity_of_one_row_is_the_square_of_t() -> None:
    # Reference: F(1, df) is t(df) squared, so the F noncentrality reaching 80% power is delta squared.
    from groupmodel.outputs.report.sensitivity import f_power, sensitivity

    x = np.column_stack([np.ones(30), np.r_[np.zeros(12), np.ones(18)]])
    t = sensitivity(x, np.array([[0.0, 1.0]]), "t", "two-sided", 0.01, None)
    f = sensitivity(x, np.array([[0.0, 1.0]]), "F", "upper", 0.01, None)
    np.testing.assert_allclose(f.noncentrality, t.noncentrality**2, rtol=1e-6)
    np.testing.assert_allclose(f_power(f.noncentrality, 1, 28, 0.01), 0.8, rtol=1e-8)


def test_cell_means_equal_statsmodels_predictions(runs: dict[str, Path]) -> None:
    # Reference: statsmodels OLS(...).get_prediction(cell rows).summary_frame(alpha=0.05) (mean, mean_se, CI).
    import statsmodels.api as sm

    folder = runs["table"]
    design = pd.read_csv(folder / "design.tsv", sep="\t")
    included = pd.read_csv(folder / "participants_included.tsv", sep="\t")
    x = design.drop(columns="participant_id").to_numpy(float)
    fit = sm.OLS(included["hippocampus_signal"].to_numpy(float), x).fit()
    rows = np.array([c["design_row"] for c in json.loads((folder / "design.json").read_text())["cells"]])
    pred = fit.get_prediction(rows).summary_frame(alpha=0.05)
    cm = _tsv(folder / "cell_means.tsv")
    np.testing.assert_allclose(cm["estimate"], pred["mean"], rtol=1e-9)
    np.testing.assert_allclose(cm["se"], pred["mean_se"], rtol=1e-9)
    np.testing.assert_allclose(cm[["ci_low", "ci_high"]], pred[["mean_ci_lower", "mean_ci_upper"]], rtol=1e-9)


def test_participant_residuals_and_mean_image_against_lstsq(runs: dict[str, Path]) -> None:
    # Reference: scipy.linalg.lstsq per voxel on the images read with nibabel; numpy mean of the images.
    folder = runs["plain"]
    design = pd.read_csv(folder / "design.tsv", sep="\t")
    mask = np.asarray(nib.load(folder / "mask.nii.gz").dataobj) > 0
    y = np.array([np.asarray(nib.load(EXAMPLE / "maps" / f"{pid}_effect.nii.gz").dataobj, dtype=float)[mask]
                  for pid in design["participant_id"]])
    x = design.drop(columns="participant_id").to_numpy(float)
    b, *_ = linalg.lstsq(x, y)
    expect = np.abs(y - x @ b).mean(axis=1)
    got = _tsv(folder / "participants_residuals.tsv")
    assert list(got["participant_id"]) == list(design["participant_id"])
    np.testing.assert_allclose(got["mean_abs_residual"], expect, rtol=1e-9)
    mean_input = np.asarray(nib.load(folder / "mean_input.nii.gz").dataobj, dtype=float)[mask]
    np.testing.assert_allclose(mean_input, y.mean(axis=0), rtol=1e-6)  # float32 map


def test_participant_sums_do_not_depend_on_chunks() -> None:
    # Reference: the sums over the whole array at once (numpy), bit for bit over chunkings is not claimed.
    from groupmodel.engine.participant_check import ParticipantCheck

    rng = np.random.default_rng(0)
    x = np.column_stack([np.ones(15), rng.normal(size=15)])
    y = rng.normal(size=(15, 101))
    b = np.linalg.pinv(x) @ y
    whole = ParticipantCheck.empty(15)
    whole.add(x, y, b)
    parts = ParticipantCheck.empty(15)
    for lo in range(0, 101, 17):
        parts.add(x, y[:, lo:lo + 17], b[:, lo:lo + 17])
    np.testing.assert_allclose(parts.means(), whole.means(), rtol=1e-12)
    np.testing.assert_allclose(whole.means(), np.abs(y - x @ b).mean(axis=1), rtol=1e-12)


def test_a_bad_image_is_named(tmp_path: Path) -> None:
    study = tmp_path / "study"
    shutil.copytree(EXAMPLE, study, ignore=shutil.ignore_patterns("faulty"))
    bad = study / "maps" / "sub-010_effect.nii.gz"
    img = nib.load(bad)
    data = np.asarray(img.dataobj, dtype=np.float32) * 6.0  # a scaling error in one image
    nib.save(nib.Nifti1Image(data, img.affine), bad)
    out = tmp_path / "out"
    assert main(["fit", str(study / "model.json"), "--out", str(out), "--no-pictures"]) == 0
    flagged = _tsv(out / "participants_residuals.tsv")
    assert flagged.loc[flagged["unusual"], "participant_id"].tolist() == ["sub-010"]
    text, page = read_page(out)
    assert "Unusual: sub-010" in text and page.tables["unusual-participants"][1][0] == "sub-010"


# ----- the command ------------------------------------------------------------------------------------
def test_report_command_rebuilds_and_refuses_other_folders(runs: dict[str, Path], tmp_path: Path) -> None:
    copy = tmp_path / "copy"
    shutil.copytree(runs["perm"], copy)
    (copy / "report.html").unlink()
    proc = subprocess.run([sys.executable, "-m", "groupmodel.cli", "report", str(copy)], capture_output=True,
                          text=True, timeout=300)
    assert proc.returncode == 0, proc.stderr
    text, page = read_page(copy)
    assert "hyp-age" in page.ids and text.count("<img ") == len(page.images) > 0
    other = tmp_path / "other"
    other.mkdir()
    (other / "notes.txt").write_text("x")
    proc = subprocess.run([sys.executable, "-m", "groupmodel.cli", "report", str(other)], capture_output=True,
                          text=True, timeout=120)
    assert proc.returncode == 2 and proc.stderr.count("\n") == 1 and "groupmodel output folder" in proc.stderr
    proc = subprocess.run([sys.executable, "-m", "groupmodel.cli", "report", str(copy), "--background",
                           str(tmp_path / "none.nii.gz")], capture_output=True, text=True, timeout=120)
    assert proc.returncode == 2 and proc.stderr.count("\n") == 1


def test_report_reads_an_index_when_there_is_one(runs: dict[str, Path], tmp_path: Path) -> None:
    # Every file is found through outputs.json: the per-hypothesis folders moved elsewhere and the index
    # rewritten to match give the same page.
    from groupmodel.outputs.report import report_html

    indexed = runs["perm"]
    moved = tmp_path / "moved"
    shutil.copytree(indexed, moved)
    (moved / "hypotheses").rename(moved / "elsewhere")
    index = json.loads((moved / "outputs.json").read_text())
    for entry in index["files"]:
        if entry["path"].startswith("hypotheses/"):
            entry["path"] = "elsewhere/" + entry["path"].removeprefix("hypotheses/")
    (moved / "outputs.json").write_text(json.dumps(index))
    a, b = Page(report_html(indexed, pictures=False)), Page(report_html(moved, pictures=False))
    assert a.tables == b.tables and a.ids == b.ids
    assert any(k.startswith("clusters-") for k in b.tables)


def test_uncorrected_clusters_label_as_the_inference_does() -> None:
    # Reference: groupmodel.inference.clusters.label_clusters on a 26-neighbour grid graph (numbering by size,
    # ties by lowest element) against the report's scipy.ndimage.label version, on random two-sided marks.
    from groupmodel.inference.clusters import label_clusters
    from groupmodel.inference.graph import grid_adjacency
    from groupmodel.outputs.report.uncorrected_clusters import _label

    rng = np.random.default_rng(4)
    mask = rng.random((9, 8, 7)) < 0.8
    for density in (0.05, 0.3, 0.6):
        marks = np.sign(rng.normal(size=mask.sum())) * (rng.random(mask.sum()) < density)
        a, b = _label(mask, marks), label_clusters(marks, 0.5, grid_adjacency(mask, 26), two_sided=True)
        np.testing.assert_array_equal(a.labels, b.labels)
        np.testing.assert_array_equal(a.sizes, b.sizes)
        np.testing.assert_array_equal(a.signs, b.signs)


def test_uncorrected_cluster_peaks_are_in_the_z_maps(runs: dict[str, Path]) -> None:
    # Reference: the z map read with nibabel at the shown voxel indices (float32 map: 4 digits on the page).
    folder = runs["plain"]
    _, page = read_page(folder)
    checked = 0
    for name in json.loads((folder / "contrasts.json").read_text())["hypotheses"]:
        header, *rows = page.tables[f"clusters-{name}"]
        z = np.asarray(nib.load(folder / "hypotheses" / name / "z.nii.gz").dataobj, dtype=float)
        for row in rows:
            cell = dict(zip(header, row, strict=True))
            value = z[int(cell["peak_i"]), int(cell["peak_j"]), int(cell["peak_k"])]
            np.testing.assert_allclose(float(cell["peak_z"]), value, rtol=5e-4)
            checked += 1
    assert checked >= 8


def test_a_failing_report_never_costs_the_results(tmp_path: Path, monkeypatch: pytest.MonkeyPatch,
                                                   capsys: pytest.CaptureFixture) -> None:
    import groupmodel.outputs.report as report

    def broken(*args: object, **kwargs: object) -> str:
        raise ValueError("a drawing problem")

    monkeypatch.setattr(report, "report_html", broken)
    out = tmp_path / "out"
    assert main(["build", str(EXAMPLE / "model.json"), "--out", str(out), "--no-pictures"]) == 0
    assert (out / "design.tsv").is_file()
    text, page = read_page(out)
    assert "a drawing problem" in text and "groupmodel report" in text
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "report.html could not be built" in err


def test_participant_check_and_mean_image_do_not_depend_on_the_chunk_size() -> None:
    # Reference: the same fit in one chunk and in chunks of 97 voxels (sums add up; only summation order differs).
    from groupmodel.fit import fit_images

    one = fit_images(EXAMPLE / "model.json", chunk_voxels=10**6, progress=False)
    many = fit_images(EXAMPLE / "model.json", chunk_voxels=97, progress=False)
    pd.testing.assert_frame_equal(one.participant_residuals, many.participant_residuals, rtol=1e-12)
    np.testing.assert_array_equal(one.mean_input, many.mean_input)  # per voxel: the same arithmetic


@pytest.mark.parametrize("kind", ["plain", "perm", "surface", "nopics"])
def test_report_of_a_fit_equals_the_report_built_from_its_files(runs: dict[str, Path], kind: str) -> None:
    # A fit hands the report the maps it still holds instead of reading them back; the page must be the one
    # built from the files alone (the reference: the report built again from the folder, as `groupmodel
    # report DIR` does).
    from groupmodel.outputs.report import report_html

    written = (runs[kind] / "report.html").read_text(encoding="utf-8")
    assert report_html(runs[kind], pictures=kind != "nopics") == written


def test_maps_handed_to_the_report_equal_the_files(tmp_path: Path) -> None:
    # Reference: nibabel reading the files just written (report.data.load_map), value for value.
    from groupmodel.fit import fit_images, write_voxel_fit
    from groupmodel.outputs.fit_files import _known_maps
    from groupmodel.outputs.report.data import load_map

    fit = fit_images(EXAMPLE / "model.json", progress=False)
    write_voxel_fit(fit, tmp_path / "out", pictures=False)
    known = _known_maps(fit)
    assert "mask.nii.gz" in known and "mean_input.nii.gz" in known and len(known) > 20
    for rel, made in known.items():
        from_file = load_map(tmp_path / "out" / rel)
        assert from_file.dtype == made().dtype and np.array_equal(made(), from_file, equal_nan=True), rel


def test_surface_report_without_permutations_speaks_of_vertices(tmp_path: Path) -> None:
    surface = make_surface_study(tmp_path / "surface_study")
    assert main(["fit", str(surface), "--out", str(tmp_path / "out"), "--no-pictures"]) == 0
    text, _ = read_page(tmp_path / "out")
    assert "the vertex tables mark the vertices past an uncorrected level" in text
    assert "slices" not in text.lower()
