"""Unit tests of the voxelwise fit (``groupmodel.fit.fit_images``, ``write_voxel_fit``, ``VoxelFit``).

Invariance (the issue: results do not change, to 1e-10 relative, with the chunk size, the memory budget or
the number of BLAS threads), the input routes (3-D files, one 4-D file, GIFTI), masks, dropped images,
zero-variance voxels, the summary, --force and the progress bar.  Values are checked against statsmodels
in ``tests/reference/test_voxelwise_reference.py``; here the references are the fit itself under other
settings, numpy on the same numbers, and plain algebra, each named beside its check.
"""

from __future__ import annotations

import io
import json
import os
import subprocess
import sys
import textwrap
from pathlib import Path

import nibabel as nib
import numpy as np
import pandas as pd
import pytest

import groupmodel.images as images_module
import groupmodel.images.reading as images_reading
from groupmodel.analysis.effect_maps import effect_size_names
from groupmodel.errors import ImageError, InputError, ModelError, OutputError
from groupmodel.fit import F_MAPS, T_MAPS, VoxelFit, fit_images, write_voxel_fit

AFFINE = np.array([[3.0, 0.0, 0.0, -9.0], [0.0, 3.0, 0.0, -6.0], [0.0, 0.0, 3.0, -4.5], [0.0, 0.0, 0.0, 1.0]])
SHAPE = (7, 6, 5)
INVARIANCE_RTOL = 1e-10  # the bar

HYPOTHESES = {
    "group": {"main": "group"},
    "group_by_sex": {"interaction": ["group", "sex"]},
    "b_vs_a": {"compare": {"group": ["b", "a"]}, "tail": "greater"},
    "age": {"slope": "age", "tail": "less"},
    "c_f_mean": {"mean": {"group": "c", "sex": "f"}},
}


def _data(n: int, shape: tuple[int, ...], seed: int) -> tuple[pd.DataFrame, np.ndarray]:
    """A participants table and an (n, *shape) float32 array with group, sex and age effects."""
    rng = np.random.default_rng(seed)
    group = np.array(["a", "b", "c"])[rng.permutation(np.arange(n) % 3)]
    sex = np.array(["f", "m"])[rng.permutation(np.arange(n) % 2)]
    age = np.round(rng.uniform(20, 70, n), 1)
    table = pd.DataFrame({"participant_id": [f"sub-{i + 1:03d}" for i in range(n)], "group": group,
                          "sex": sex, "age": age})
    nvox = int(np.prod(shape))
    gnum = ((group == "b") * 1.0 + (group == "c") * 2.0)[:, None]
    eff = rng.normal(0, 1, (3, nvox)) * rng.choice([0.0, 1.0], (3, nvox))
    y = 5.0 + gnum * eff[0] + (sex == "m")[:, None] * eff[1] + ((age - 45) / 10)[:, None] * eff[2]
    y = (y + rng.normal(0, 1, (n, nvox))) * 10.0 ** rng.uniform(-1, 1, nvox)
    return table, y.reshape((n, *shape)).astype(np.float32)


def _spec(root: Path, images: str, extra: dict | None = None) -> Path:
    spec = {
        "participants": "participants.tsv",
        "factors": {"group": {"levels": ["a", "b", "c"], "coding": "effect"},
                    "sex": {"levels": ["f", "m"], "coding": "effect"}},
        "covariates": {"age": {"center": "mean"}},
        "terms": ["group*sex", "age"],
        "hypotheses": HYPOTHESES,
        "images": images,
        **(extra or {}),
    }
    (root / "model.json").write_text(json.dumps(spec, indent=2))
    return root / "model.json"


def make_study(root: Path, n: int = 24, shape: tuple[int, ...] = SHAPE, seed: int = 5, kind: str = "nii.gz",
               data: tuple[pd.DataFrame, np.ndarray] | None = None) -> Path:
    """Write a study: ``kind`` is ``nii.gz``, ``nii`` (3-D files), ``4d`` (one 4-D file) or ``gii``."""
    root.mkdir(parents=True, exist_ok=True)
    table, y = data if data is not None else _data(n, shape, seed)
    table.to_csv(root / "participants.tsv", sep="\t", index=False)
    if kind == "4d":
        nib.save(nib.Nifti1Image(np.moveaxis(y, 0, -1), AFFINE), root / "all.nii.gz")
        return _spec(root, "all.nii.gz")
    (root / "maps").mkdir(exist_ok=True)
    for pid, vol in zip(table["participant_id"], y, strict=True):
        if kind == "gii":
            darray = nib.gifti.GiftiDataArray(vol.ravel(), datatype="NIFTI_TYPE_FLOAT32")
            nib.save(nib.gifti.GiftiImage(darrays=[darray]), root / "maps" / f"{pid}.gii")
        else:
            nib.save(nib.Nifti1Image(vol, AFFINE), root / "maps" / f"{pid}.{kind}")
    return _spec(root, "maps/{participant_id}." + kind)


def assert_same_fit(a: VoxelFit, b: VoxelFit, rtol: float = INVARIANCE_RTOL) -> None:
    """Every map of ``a`` equals ``b``'s to ``rtol`` relative (NaN where NaN)."""
    assert np.array_equal(a.mask, b.mask)
    assert a.df_resid == b.df_resid
    pairs = [(a.residual_variance, b.residual_variance, "residual_variance")]
    for name in a.maps:
        assert set(a.maps[name]) == set(b.maps[name])
        pairs += [(a.maps[name][s], b.maps[name][s], f"{name} {s}") for s in a.maps[name]]
    for x, y, label in pairs:
        assert x.shape == y.shape, label
        assert np.array_equal(np.isnan(x), np.isnan(y)), label
        ok = ~np.isnan(x)
        # relative to each value, with a floor at 1e-10 of the map's scale for values that are 0 up to
        # rounding (an effect or t of 1e-17 is 0 whichever way it is rounded)
        scale = max(float(np.max(np.abs(y[ok]), initial=0.0)), 1e-300)
        err = np.abs(x[ok] - y[ok]) / np.maximum(np.abs(y[ok]), 1e-10 * scale)
        assert float(np.max(err, initial=0.0)) <= rtol, (label, float(np.max(err)))


@pytest.fixture(scope="module")
def study(tmp_path_factory) -> Path:
    return make_study(tmp_path_factory.mktemp("fitvox") / "study")


@pytest.fixture(scope="module")
def base_fit(study) -> VoxelFit:
    return fit_images(study, progress=False)


# ----------------------------------------------------------------------------- shapes and contents


def test_fit_contents(base_fit: VoxelFit) -> None:
    # Reference: the list of maps per test kind; n - rank residual df computed with numpy.
    fit = base_fit
    n_vox = int(np.prod(SHAPE))
    x = fit.model.design.matrix
    assert fit.df_resid == x.shape[0] - np.linalg.matrix_rank(x) == 24 - 7
    assert fit.mask.shape == SHAPE and int(fit.mask.sum()) == n_vox
    assert fit.mask_report["voxels_in_mask"] == n_vox
    assert fit.residual_variance.shape == (n_vox,)
    assert list(fit.maps) == list(HYPOTHESES)
    for name, maps in fit.maps.items():
        h = fit.model.hypotheses[name]
        want = (F_MAPS if h.test == "F" else T_MAPS) + effect_size_names(h)
        assert tuple(maps) == want
        for values in maps.values():
            assert values.shape == (n_vox,) and values.dtype == np.float64
        assert np.all((maps["p"] > 0) & (maps["p"] <= 1))
        assert np.allclose(maps["mlog10p"], -np.log10(maps["p"]), rtol=1e-9)
    assert fit.dropped == []


def test_summary_counts(base_fit: VoxelFit) -> None:
    # Reference: numpy counts and maxima on the maps themselves.
    frame = base_fit.summary()
    assert list(frame["hypothesis"]) == list(HYPOTHESES)
    for _, row in frame.iterrows():
        m = base_fit.maps[row["hypothesis"]]
        stat = m["t"] if row["test"] == "t" else m["F"]
        assert row["voxels_p_lt_0.001"] == int(np.sum(m["p"] < 1e-3))
        assert row["voxels_p_lt_0.05"] == int(np.sum(m["p"] < 0.05))
        # the peak in the test's direction; z is monotone in t (and in F) at fixed df, so the peak z is the
        # extreme z in that direction
        if row["tail"] == "greater" or row["test"] == "F":
            want, want_z = np.max(stat), np.max(m["z"])
        elif row["tail"] == "less":
            want, want_z = np.min(stat), np.min(m["z"])
        else:
            want, want_z = stat[np.argmax(np.abs(stat))], m["z"][np.argmax(np.abs(m["z"]))]
        assert row["peak_statistic"] == pytest.approx(float(want), rel=1e-15)
        assert row["peak_z"] == pytest.approx(float(want_z), rel=1e-12)
        assert row["df2"] == base_fit.df_resid
    # each direction at least once here: a one-sided test whose largest |t| lies on the other side (the peak
    # is then not the largest |t|), and two-sided tests
    one_sided = [h for h, spec in HYPOTHESES.items() if spec.get("tail") in ("greater", "less")]
    flipped = [h for h in one_sided if (np.max(base_fit.maps[h]["t"]) > -np.min(base_fit.maps[h]["t"]))
               != (HYPOTHESES[h]["tail"] == "greater")]
    assert flipped, "the study should have a one-sided test whose largest |t| is on the other side"


def test_peak_element_follows_the_direction_of_the_test() -> None:
    from groupmodel.engine.peaks import peak_element

    stat = np.array([1.0, -5.0, 3.0, np.nan])
    assert peak_element(stat, "greater") == 2
    assert peak_element(stat, "less") == 1
    assert peak_element(stat, "two-sided") == 1
    assert peak_element(np.abs(stat), "upper") == 1  # F
    assert peak_element(np.full(3, np.nan), "greater") is None


# ----------------------------------------------------------------------------- invariance


@pytest.mark.parametrize("chunk", [1, 7, None, 10_000])
def test_chunk_size_does_not_change_results(study, base_fit, chunk) -> None:
    # Reference: the same fit in one chunk (chunk_voxels=None with the default budget); issue: 1e-10.
    fit = fit_images(study, chunk_voxels=chunk, progress=False)
    assert_same_fit(fit, base_fit)


def test_memory_budget_spill_does_not_change_results(study, base_fit, monkeypatch) -> None:
    # Reference: the in-RAM fit; a budget far below the data size forces the memmap spill (checked
    # through MaskedData.spilled) and, through the budget, chunks of a single voxel.
    seen: list[bool] = []
    real = images_module.load_masked

    def spy(*args, **kwargs):
        data = real(*args, **kwargs)
        seen.append(data.spilled)
        return data

    reads: list[str] = []
    real_read = images_reading._read_array

    def count_reads(ref, *args, **kwargs):
        reads.append(ref.path.name)
        return real_read(ref, *args, **kwargs)

    monkeypatch.setattr(images_module, "load_masked", spy)
    monkeypatch.setattr(images_reading, "_read_array", count_reads)
    in_ram = fit_images(study, memory_bytes=2 * 1024**3, progress=False)
    spilled = fit_images(study, memory_bytes=4096, progress=False)
    assert seen == [False, True]
    # the issue: each image is decompressed once per fit, however small the budget
    assert sorted(reads) == sorted([p.name for p in (study.parent / "maps").iterdir()] * 2)
    assert_same_fit(in_ram, base_fit)
    assert_same_fit(spilled, base_fit)


_THREAD_CHILD = textwrap.dedent(
    """
    import ctypes
    import glob
    import os
    import sys
    import numpy as np
    from groupmodel.fit import fit_images

    def blas_threads():
        # best effort: the thread count of numpy's OpenBLAS (scipy-openblas wheels), -1 if not found
        libs = glob.glob(os.path.join(os.path.dirname(np.__file__), "..", "numpy.libs", "*openblas*"))
        for path in libs:
            lib = ctypes.CDLL(path)
            for name in ("scipy_openblas_get_num_threads64_", "openblas_get_num_threads64_",
                         "openblas_get_num_threads"):
                if hasattr(lib, name):
                    return getattr(lib, name)()
        return -1

    fit = fit_images(sys.argv[1], progress=False)
    arrays = {"residual_variance": fit.residual_variance, "mask": fit.mask,
              "blas_threads": np.array(blas_threads())}
    for name, maps in fit.maps.items():
        for stat, values in maps.items():
            arrays[f"{name}__{stat}"] = values
    np.savez(sys.argv[2], **arrays)
    """
)


def test_blas_threads_do_not_change_results(tmp_path: Path) -> None:
    # Reference: the same fit with 1 BLAS thread (threadpoolctl is not installed, so each run is a
    # subprocess with OPENBLAS_NUM_THREADS / OMP_NUM_THREADS / MKL_NUM_THREADS set). 20,000 voxels of 60
    # observations, so that the products are large enough for OpenBLAS to split them.
    table, y = _data(60, (40, 25, 20), seed=9)
    spec = make_study(tmp_path / "study", kind="nii", data=(table, y))
    results = {}
    for threads in (1, 2):
        env = dict(os.environ)
        for var in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
            env[var] = str(threads)
        out = tmp_path / f"threads{threads}.npz"
        proc = subprocess.run([sys.executable, "-c", _THREAD_CHILD, str(spec), str(out)], env=env,
                              capture_output=True, text=True, timeout=300)
        assert proc.returncode == 0, proc.stderr
        results[threads] = dict(np.load(out))
    one, two = results[1], results[2]
    if int(one["blas_threads"]) != -1:  # the variables took effect
        assert (int(one["blas_threads"]), int(two["blas_threads"])) == (1, 2)
    assert set(one) == set(two)
    assert np.array_equal(one["mask"], two["mask"])
    for key in one:
        if key in ("mask", "blas_threads"):
            continue
        a, b = one[key], two[key]
        assert np.array_equal(np.isnan(a), np.isnan(b)), key
        scale = float(np.nanmax(np.abs(b)))
        err = np.abs(a - b) / np.maximum(np.abs(b), 1e-10 * scale)
        assert float(np.nanmax(err)) <= INVARIANCE_RTOL, key


# ----------------------------------------------------------------------------- input routes


def test_one_4d_file_equals_3d_files(tmp_path: Path, base_fit: VoxelFit) -> None:
    # Reference: the fit of the same numbers given as one 3-D file per participant.
    spec = make_study(tmp_path / "four_d", kind="4d")
    fit = fit_images(spec, progress=False)
    assert_same_fit(fit, base_fit, rtol=0.0)


def test_gifti_surface_equals_volume(tmp_path: Path, base_fit: VoxelFit) -> None:
    # Reference: the fit of the same numbers as NIfTI volumes (vertex order = C order of the volume);
    # nibabel reads the written GIFTI maps back.
    spec = make_study(tmp_path / "surface", kind="gii")
    fit = fit_images(spec, progress=False)
    assert fit.grid.kind == "gifti" and fit.mask.shape == (int(np.prod(SHAPE)),)
    assert_same_fit(_as_volume(fit), base_fit, rtol=0.0)
    out = tmp_path / "surface_out"
    write_voxel_fit(fit, out)
    img = nib.load(out / "hypotheses/b_vs_a/t.func.gii")
    assert len(img.darrays) == 1
    values = img.darrays[0].data
    assert values.dtype == np.float32
    np.testing.assert_array_equal(values, fit.maps["b_vs_a"]["t"].astype(np.float32))
    assert json.loads((out / "hypotheses/b_vs_a/t.json").read_text())["statistic"] == "t"


def _as_volume(fit: VoxelFit) -> VoxelFit:
    """The same fit with its mask reshaped to the volume grid (the maps are in the same order)."""
    return VoxelFit(fit.model, fit.grid, fit.mask.reshape(SHAPE), fit.maps, fit.residual_variance,
                    fit.df_resid, fit.mask_report, fit.dropped, fit.warnings)


def test_drop_missing_images_equals_excluding_them(tmp_path: Path) -> None:
    # Reference: the same study with the participants left out by the spec's "exclude" list.
    spec = make_study(tmp_path / "study")
    gone = ["sub-004", "sub-017"]
    for pid in gone:
        (spec.parent / "maps" / f"{pid}.nii.gz").unlink()
    with pytest.raises(ImageError, match="sub-004"):
        fit_images(spec, progress=False)
    fit = fit_images(spec, drop_missing=True, progress=False)
    assert [d[0] for d in fit.dropped] == gone
    assert all("sub-004" in reason or "sub-017" in reason for _, reason in fit.dropped)
    assert fit.model.design.n_observations == 22
    assert {e.participant_id for e in fit.model.sample.exclusions} >= set(gone)
    ref_spec = _spec(spec.parent, "maps/{participant_id}.nii.gz", {"exclude": gone})
    ref = fit_images(ref_spec, progress=False)
    assert_same_fit(fit, ref, rtol=0.0)


def test_user_mask_and_spec_mask(tmp_path: Path, base_fit: VoxelFit) -> None:
    # Reference: the full fit restricted to the mask's voxels (numpy indexing); a voxel is independent of
    # the others, so its values must not change.
    spec = make_study(tmp_path / "study")
    mask = np.zeros(SHAPE, dtype=np.uint8)
    mask[1:5, 2:6, 1:4] = 1
    nib.save(nib.Nifti1Image(mask, AFFINE), tmp_path / "study" / "roi.nii.gz")
    keep = mask.ravel()[np.flatnonzero(base_fit.mask)] != 0
    for fit in (fit_images(spec, mask=tmp_path / "study" / "roi.nii.gz", progress=False),
                fit_images(_spec(spec.parent, "maps/{participant_id}.nii.gz", {"mask": "roi.nii.gz"}),
                           progress=False)):
        assert np.array_equal(fit.mask, mask != 0)
        for name, maps in fit.maps.items():
            for stat, values in maps.items():
                if stat in ("p_fdr", "p_bonferroni"):
                    continue  # adjusted over the mask: a smaller mask is a smaller family (tested elsewhere)
                np.testing.assert_allclose(values, base_fit.maps[name][stat][keep], rtol=INVARIANCE_RTOL)


def test_constant_voxel_has_zero_variance_and_nan_statistics(tmp_path: Path) -> None:
    # Reference: algebra -- a voxel equal to c in every image has residual variance 0, a cell mean of
    # exactly c and a difference of 0, and no t, F or p (the engine's documented rule: NaN).
    table, y = _data(24, SHAPE, seed=5)
    y[:, 2, 2, 2] = 3.25
    spec = make_study(tmp_path / "study", data=(table, y))
    fit = fit_images(spec, progress=False)
    col = int(np.flatnonzero(np.flatnonzero(fit.mask.ravel()) == np.ravel_multi_index((2, 2, 2), SHAPE))[0])
    assert fit.residual_variance[col] == pytest.approx(0.0, abs=1e-20)
    assert fit.maps["c_f_mean"]["effect"][col] == pytest.approx(3.25, rel=1e-12)
    assert fit.maps["b_vs_a"]["effect"][col] == pytest.approx(0.0, abs=1e-12)
    for name, maps in fit.maps.items():
        stat = "t" if "t" in maps else "F"
        assert np.isnan(maps[stat][col]) and np.isnan(maps["p"][col]) and np.isnan(maps["z"][col]), name
    others = np.ones(fit.mask.sum(), bool)
    others[col] = False
    assert np.all(np.isfinite(fit.maps["group"]["F"][others]))
    assert any("1 of 210 voxels have (numerically) zero residual variance" in w for w in fit.warnings)


def test_identical_images_give_nan_maps_and_a_summary(tmp_path: Path) -> None:
    # Reference: algebra (no residual variance anywhere: nothing is tested); the summary must still be made
    # (it once raised on an all-NaN map) and say so with NaN peaks and zero counts.
    table, y = _data(24, SHAPE, seed=5)
    y[:] = 2.5
    fit = fit_images(make_study(tmp_path / "study", data=(table, y)), progress=False)
    frame = fit.summary()
    assert frame["peak_statistic"].isna().all() and frame["peak_z"].isna().all()
    assert (frame["voxels_p_lt_0.05"] == 0).all()
    assert any("210 of 210 voxels" in w for w in fit.warnings)
    write_voxel_fit(fit, tmp_path / "out")
    assert json.loads((tmp_path / "out" / "summary.json").read_text())["warnings"] == fit.warnings


def test_not_fittable_specs(tmp_path: Path) -> None:
    # Reference: the issue (a spec without images cannot be fitted voxelwise; one without hypotheses has
    # nothing to test).
    spec = make_study(tmp_path / "study")
    raw = json.loads(spec.read_text())
    no_images = {k: v for k, v in raw.items() if k != "images"}
    (spec.parent / "no_images.json").write_text(json.dumps(no_images))
    with pytest.raises(InputError, match="images"):
        fit_images(spec.parent / "no_images.json", progress=False)
    no_hyp = {k: v for k, v in raw.items() if k != "hypotheses"}
    (spec.parent / "no_hyp.json").write_text(json.dumps(no_hyp))
    with pytest.raises(ModelError, match="hypotheses"):
        fit_images(spec.parent / "no_hyp.json", progress=False)


# ----------------------------------------------------------------------------- writing


def test_write_refuses_existing_folder_without_force(tmp_path: Path, base_fit: VoxelFit) -> None:
    # Reference: the issue (atomic writes and --force as in build).
    out = tmp_path / "out"
    names = write_voxel_fit(base_fit, out)
    assert "summary.json" in names and (out / "summary.json").is_file()
    (out / "marker.txt").write_text("old run")
    with pytest.raises(OutputError):
        write_voxel_fit(base_fit, out)
    assert (out / "marker.txt").is_file()  # untouched
    with pytest.raises(OutputError, match="did not write"):  # --force replaces only what groupmodel wrote
        write_voxel_fit(base_fit, out, force=True)
    (out / "marker.txt").unlink()
    write_voxel_fit(base_fit, out, force=True)
    sidecars = [n.replace(".nii.gz", ".json") for n in names if n.endswith(".nii.gz")]
    files = sorted(p.relative_to(out).as_posix() for p in out.rglob("*") if p.is_file())
    assert files == sorted([*names, *sidecars, ".groupmodel-output.json"])
    assert not [p for p in tmp_path.iterdir() if p.name.startswith(".")]  # no temporary folder left behind


def test_summary_json(tmp_path: Path, base_fit: VoxelFit) -> None:
    # Reference: the fit object itself (what the files must record).
    out = tmp_path / "out"
    write_voxel_fit(base_fit, out)
    summary = json.loads((out / "summary.json").read_text())
    assert summary["n_observations"] == 24 and summary["df_resid"] == base_fit.df_resid
    assert summary["mask"] == base_fit.mask_report
    frame = pd.read_csv(out / "summary.tsv", sep="\t")
    assert list(frame["hypothesis"]) == list(HYPOTHESES)
    mask_side = json.loads((out / "mask.json").read_text())
    assert mask_side["voxels_in_mask"] == int(base_fit.mask.sum())


# ----------------------------------------------------------------------------- progress


class _FakeTerminal(io.StringIO):
    def isatty(self) -> bool:
        return True


def test_progress_bar_only_on_a_terminal(study, monkeypatch) -> None:
    # Reference: the issue (a progress bar on a terminal, nothing extra otherwise).
    fake = _FakeTerminal()
    monkeypatch.setattr(sys, "stderr", fake)
    fit_images(study, progress=True)
    assert "reading images" in fake.getvalue()  # one bar while reading
    assert "fitting" in fake.getvalue()  # and one while fitting
    fake_off = _FakeTerminal()
    monkeypatch.setattr(sys, "stderr", fake_off)
    fit_images(study, progress=False)
    assert fake_off.getvalue() == ""
    plain = io.StringIO()
    monkeypatch.setattr(sys, "stderr", plain)
    fit_images(study, progress=True)
    assert plain.getvalue() == ""


def test_hypothesis_names_with_dots_get_their_own_sidecars(tmp_path: Path) -> None:
    # Reference: the spec schema (hypothesis names may hold letters, digits, _ . -; they become file
    # names): every map keeps its own sidecar, named after the map.
    spec = make_study(tmp_path / "study", n=12)
    raw = json.loads(spec.read_text())
    raw["hypotheses"] = {"age.slope": {"slope": "age"}, "group.main": {"main": "group"}}
    spec.write_text(json.dumps(raw))
    fit = fit_images(spec, progress=False)
    out = tmp_path / "out"
    write_voxel_fit(fit, out)
    for name, stats in (("age.slope", T_MAPS), ("group.main", F_MAPS)):
        for stat in stats:
            assert (out / "hypotheses" / name / f"{stat}.nii.gz").is_file()
            side = json.loads((out / "hypotheses" / name / f"{stat}.json").read_text())
            assert side["hypothesis"] == name and side["statistic"] == stat
    assert not (out / "age.json").exists() and not (out / "group.json").exists()
