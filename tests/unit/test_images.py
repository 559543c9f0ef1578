"""Unit tests of groupmodel.images: paths, header checks, masks, reading once, chunks, memory, writing.

The outside reference for every value check is nibabel itself (images written by groupmodel are read
back with nibabel; inputs are read directly with nibabel) and plain numpy indexing for what the mask and
the data matrix must be.
"""

from __future__ import annotations

import tracemalloc
from collections import Counter
from pathlib import Path

import nibabel as nib
import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from nibabel.arrayproxy import ArrayProxy

import groupmodel.images.reading as images_reading
from groupmodel.images import (
    Grid,
    check_images,
    chunk_size_for,
    load_mask,
    load_masked,
    load_overhead_bytes,
    resolve_images,
    unmask,
    write_map,
    write_mask,
)
from groupmodel.images.loading import _Tally
from groupmodel.images.packed import NEVER, compact_packed, plan_rows
from groupmodel.images.sources import ImageRef

# a realistic oblique-free affine: x stored right-to-left, origin away from the corner
AFFINE = np.array([[-3.0, 0, 0, 30.5], [0, 3.0, 0, -42.0], [0, 0, 3.5, -20.25], [0, 0, 0, 1]])
SHAPE = (7, 8, 6)


def _ids(n: int) -> list[str]:
    return [f"sub-{i:02d}" for i in range(1, n + 1)]


def _table(n: int, **extra: list) -> pd.DataFrame:
    return pd.DataFrame({"participant_id": _ids(n), **extra})


def _save_nifti(path: Path, data: np.ndarray, klass=nib.Nifti1Image, affine=AFFINE) -> None:
    img = klass(data, affine)
    img.header.set_sform(affine, code="aligned")
    img.header.set_qform(affine, code="scanner")
    img.header.set_xyzt_units("mm")
    nib.save(img, path)


def _volumes(n: int, seed: int = 0, shape=SHAPE) -> list[np.ndarray]:
    """Random images, zero on the outer face of the first axis (a 'background')."""
    rng = np.random.default_rng(seed)
    out = []
    for _ in range(n):
        a = rng.standard_normal(shape).astype(np.float32)
        a[0] = 0.0
        out.append(a)
    return out


def _study(tmp_path: Path, arrays: list[np.ndarray], ext: str = ".nii.gz", klass=nib.Nifti1Image):
    """Write one image per participant and return the checked source."""
    ids = _ids(len(arrays))
    for pid, a in zip(ids, arrays, strict=True):
        _save_nifti(tmp_path / f"{pid}_effect{ext}", a, klass)
    source = resolve_images(f"{{participant_id}}_effect{ext}", ids, _table(len(ids)), tmp_path)
    checked, dropped = check_images(source)
    assert dropped == []
    return checked


def _expected(arrays: list[np.ndarray], candidate: np.ndarray | None = None):
    """The mask rule written out directly: finite in every image and nonzero in some (within candidate)."""
    stack = np.stack(arrays).astype(np.float32)
    finite = np.isfinite(stack).all(axis=0)
    nonzero = ((stack != 0) & np.isfinite(stack)).any(axis=0)
    mask = finite & nonzero
    if candidate is not None:
        mask &= candidate
    return mask, stack[:, mask]


def _gifti(path: Path, values: np.ndarray, side: str = "CortexLeft", n_arrays: int = 1) -> None:
    arrays = [
        nib.gifti.GiftiDataArray(np.asarray(values, np.float32), intent="NIFTI_INTENT_NONE",
                                 datatype="NIFTI_TYPE_FLOAT32")
        for _ in range(n_arrays)
    ]
    meta = nib.gifti.GiftiMetaData({"AnatomicalStructurePrimary": side})
    nib.save(nib.gifti.GiftiImage(meta=meta, darrays=arrays), path)


# ---------------------------------------------------------------------------------------------------------
# resolving paths
# ---------------------------------------------------------------------------------------------------------


def test_pattern_uses_any_column_and_writes_integers_plainly(tmp_path):
    table = pd.DataFrame({"participant_id": ["sub-01", "sub-01", "sub-02"], "session": [1.0, 2.0, 1.0]})
    src = resolve_images("{participant_id}/ses-{session}_effect.nii.gz", table.participant_id, table, tmp_path)
    assert [r.path for r in src.refs] == [
        tmp_path / "sub-01/ses-1_effect.nii.gz",
        tmp_path / "sub-01/ses-2_effect.nii.gz",
        tmp_path / "sub-02/ses-1_effect.nii.gz",
    ]
    assert src.mode == "pattern" and src.labels == ["sub-01", "sub-01", "sub-02"]


def test_column_of_paths_and_na_become_missing(tmp_path):
    arrays = _volumes(3)
    for i, a in enumerate(arrays):
        _save_nifti(tmp_path / f"img{i}.nii", a)
    table = _table(4, effect=["img0.nii", str(tmp_path / "img1.nii"), "img2.nii", None])
    src = resolve_images("effect", table.participant_id, table, tmp_path)
    assert src.mode == "column"
    assert src.refs[1].path == tmp_path / "img1.nii"  # absolute paths stay absolute
    assert src.refs[3].path is None and "n/a" in src.refs[3].problem
    checked, dropped = check_images(src, drop_missing=True)
    assert checked.rows == [0, 1, 2]
    assert dropped[0][0] == "sub-04" and "n/a in column 'effect'" in dropped[0][1]


def test_pattern_na_in_used_column_is_a_missing_image(tmp_path):
    table = pd.DataFrame({"participant_id": ["sub-01", "sub-02"], "run": [1, None]})
    src = resolve_images("{participant_id}_run-{run}.nii", table.participant_id, table, tmp_path)
    assert src.refs[1].path is None and "run" in src.refs[1].problem


# ---------------------------------------------------------------------------------------------------------
# header checks and grid
# ---------------------------------------------------------------------------------------------------------


def test_check_reads_headers_only_and_builds_grid(tmp_path, monkeypatch):
    arrays = _volumes(3)
    ids = _ids(3)
    for pid, a in zip(ids, arrays, strict=True):
        _save_nifti(tmp_path / f"{pid}.nii.gz", a)
    reads = Counter()
    orig = ArrayProxy.__array__

    def counting(self, *a, **k):
        reads["data"] += 1
        return orig(self, *a, **k)

    monkeypatch.setattr(ArrayProxy, "__array__", counting)
    src, _ = check_images(resolve_images("{participant_id}.nii.gz", ids, _table(3), tmp_path))
    assert reads["data"] == 0  # no voxel data read by the checks
    g = src.grid
    assert g.kind == "nifti" and g.shape == SHAPE and g.zooms == (3.0, 3.0, 3.5)
    np.testing.assert_allclose(g.affine, AFFINE)
    assert g.to_json()["shape"] == list(SHAPE)


def test_affine_within_tolerance_is_the_same_grid(tmp_path):
    arrays = _volumes(2)
    _save_nifti(tmp_path / "sub-01.nii", arrays[0])
    shifted = AFFINE.copy()
    shifted[0, 3] += 5e-5  # below the 1e-4 mm tolerance
    _save_nifti(tmp_path / "sub-02.nii", arrays[1], affine=shifted)
    src, _ = check_images(resolve_images("{participant_id}.nii", _ids(2), _table(2), tmp_path))
    assert src.grid.shape == SHAPE


# ---------------------------------------------------------------------------------------------------------
# masks and data
# ---------------------------------------------------------------------------------------------------------


def test_default_mask_finite_everywhere_and_nonzero_somewhere(tmp_path):
    arrays = _volumes(5)
    arrays[1][3, 4, 2] = np.nan  # NaN in one image only -> left out, counted
    arrays[3][2, 2, 2] = np.inf
    arrays[4][5, 1, 1] = -np.inf
    for a in arrays:  # a voxel zero in every image, inside the 'brain'
        a[4, 4, 4] = 0.0
    src = _study(tmp_path, arrays)
    with load_masked(src, None, memory_bytes=10**8) as md:
        mask, data = _expected(arrays)
        np.testing.assert_array_equal(md.mask, mask)
        np.testing.assert_array_equal(md.data, data)
        assert md.data.dtype == np.float32 and md.data.shape == (5, mask.sum())
        assert md.n_nonfinite_excluded == 3
        assert md.n_nonfinite_everywhere == 0
        assert md.n_zero_excluded == SHAPE[1] * SHAPE[2] + 1  # the background face and the one voxel
        assert md.n_in_mask == int(mask.sum()) == int(np.prod(SHAPE)) - md.n_zero_excluded - 3
        assert md.nonfinite_per_image.tolist() == [0, 1, 0, 1, 1]
        assert not md.mask[3, 4, 2] and not md.mask[4, 4, 4]
        assert not md.spilled


def test_nan_background_counted_separately(tmp_path):
    arrays = _volumes(3)
    for a in arrays:
        a[0] = np.nan  # NaN-padded images: the background is NaN in every image
    src = _study(tmp_path, arrays)
    with load_masked(src, None, memory_bytes=10**8) as md:
        assert md.n_nonfinite_everywhere == SHAPE[1] * SHAPE[2]
        assert md.n_nonfinite_excluded == 0
        np.testing.assert_array_equal(md.data, _expected(arrays)[1])


def test_user_mask_is_honoured_and_nan_inside_it_excluded(tmp_path):
    arrays = _volumes(4)
    arrays[2][3, 3, 3] = np.nan
    src = _study(tmp_path, arrays)
    user = np.zeros(SHAPE, np.int16)
    user[2:6, 1:7, 1:5] = 3  # any nonzero value means 'in'
    user[0, 0, 0] = 1  # in the all-zero background: left out, counted as zero everywhere
    _save_nifti(tmp_path / "mask.nii.gz", user)
    with load_masked(src, tmp_path / "mask.nii.gz", memory_bytes=10**8) as md:
        mask, data = _expected(arrays, candidate=user != 0)
        assert not md.mask[3, 3, 3] and not md.mask[0, 0, 0]
        np.testing.assert_array_equal(md.mask, mask)
        np.testing.assert_array_equal(md.data, data)
        assert md.n_nonfinite_excluded == 1 and md.n_zero_excluded == 1
        assert md.n_in_mask == int((user != 0).sum()) - 2


def test_scaled_integer_images_are_read_with_their_scaling(tmp_path):
    rng = np.random.default_rng(3)
    ids = _ids(3)
    expected = []
    for pid in ids:
        img = nib.Nifti1Image(rng.integers(-500, 500, SHAPE).astype(np.int16), AFFINE)
        img.header.set_slope_inter(0.01, 2.0)
        nib.save(img, tmp_path / f"{pid}.nii.gz")
        expected.append(nib.load(tmp_path / f"{pid}.nii.gz").get_fdata())  # nibabel applies the scaling
    src, _ = check_images(resolve_images("{participant_id}.nii.gz", ids, _table(3), tmp_path))
    with load_masked(src, None, 10**8) as md:
        mask, data = _expected(expected)
        np.testing.assert_array_equal(md.data, data)


def test_each_image_read_once_with_small_budget(tmp_path, monkeypatch):
    arrays = _volumes(12)
    arrays[5][2, 3, 1] = np.nan  # forces compaction after the single pass
    src = _study(tmp_path, arrays)
    loads: Counter = Counter()
    reads: Counter = Counter()
    orig_load = nib.load
    orig_array = ArrayProxy.__array__
    orig_getitem = ArrayProxy.__getitem__

    def counting_load(path, *a, **k):
        loads[Path(path).name] += 1
        return orig_load(path, *a, **k)

    def counting_fast(path, *a, **k):  # .nii.gz files are read whole and decompressed once (fastread)
        loads[Path(path).name] += 1
        reads[Path(path).name] += 1
        return orig_fast(path, *a, **k)

    def counting_array(self, *a, **k):
        if isinstance(self.file_like, str | Path):
            reads[Path(self.file_like).name] += 1
        return orig_array(self, *a, **k)

    def counting_getitem(self, item):
        if isinstance(self.file_like, str | Path):
            reads[Path(self.file_like).name] += 1
        return orig_getitem(self, item)

    orig_fast = images_reading.read_nifti_gz
    monkeypatch.setattr(images_reading, "read_nifti_gz", counting_fast)
    monkeypatch.setattr(nib, "load", counting_load)
    monkeypatch.setattr(ArrayProxy, "__array__", counting_array)
    monkeypatch.setattr(ArrayProxy, "__getitem__", counting_getitem)
    with load_masked(src, None, memory_bytes=1000, workdir=tmp_path) as md:  # far below the data size
        assert md.spilled
        names = [f"{pid}_effect.nii.gz" for pid in _ids(12)]
        assert loads == Counter(names)  # one load per file ...
        assert reads == Counter(names)  # ... and one read of its voxel data
        np.testing.assert_array_equal(md.data, _expected(arrays)[1])


def test_four_d_file_follows_rows_and_file_rows(tmp_path, monkeypatch):
    arrays = _volumes(6, seed=4)
    _save_nifti(tmp_path / "all.nii.gz", np.stack(arrays, axis=-1))
    # one volume per included observation
    src, _ = check_images(resolve_images("all.nii.gz", _ids(6), _table(6), tmp_path))
    assert [r.volume for r in src.refs] == list(range(6))
    with load_masked(src, None, 10**8) as md:
        np.testing.assert_array_equal(md.data, _expected(arrays)[1])
    # one volume per row of the participants file, rows 1 and 4 excluded by the model
    keep = [0, 2, 3, 5]
    ids = [_ids(6)[i] for i in keep]
    src = resolve_images("all.nii.gz", ids, _table(6).iloc[keep], tmp_path, file_rows=keep, n_file_rows=6)
    src, _ = check_images(src)
    assert [r.volume for r in src.refs] == keep
    reads: Counter = Counter()
    orig = ArrayProxy.__getitem__

    def counting(self, item):
        reads["slices"] += 1
        return orig(self, item)

    monkeypatch.setattr(ArrayProxy, "__getitem__", counting)
    with load_masked(src, None, 200, workdir=tmp_path) as md:
        np.testing.assert_array_equal(md.data, _expected([arrays[i] for i in keep])[1])
        assert reads["slices"] == 4  # each needed volume read once


def test_four_d_single_volume_per_participant_is_fine(tmp_path):
    arrays = _volumes(3)
    src = _study(tmp_path, [a[..., None] for a in arrays])
    assert src.grid.shape == SHAPE
    with load_masked(src, None, 10**8) as md:
        np.testing.assert_array_equal(md.data, _expected(arrays)[1])


# ---------------------------------------------------------------------------------------------------------
# chunks and the spill
# ---------------------------------------------------------------------------------------------------------


@pytest.mark.parametrize("with_nan", [False, True])
def test_chunks_concatenate_to_data_and_spill_equals_ram(tmp_path, with_nan):
    arrays = _volumes(9, seed=7)
    if with_nan:
        arrays[4][3, 3, 3] = np.nan
        arrays[8][1:3, 2, 2] = np.inf
    src = _study(tmp_path, arrays)
    mask, expected = _expected(arrays)
    n_full = 9 * int(np.prod(SHAPE)) * 4
    n_compact = expected.size * 4
    with (
        load_masked(src, None, memory_bytes=10**9) as ram,
        load_masked(src, None, memory_bytes=64, workdir=tmp_path) as disk,  # spill, compact on disk
        load_masked(src, None, memory_bytes=(n_compact + n_full) // 2, workdir=tmp_path) as back,  # spill, RAM
    ):
        assert not ram.spilled and disk.spilled and not back.spilled
        assert isinstance(disk.data, np.memmap)
        for md in (ram, disk, back):
            np.testing.assert_array_equal(md.mask, mask)
            np.testing.assert_array_equal(md.data, expected)
            for size in (1, 7, md.n_in_mask, md.n_in_mask + 5):
                pieces = list(md.chunks(size))
                assert all(b.dtype == np.float64 and b.flags.c_contiguous for _, b in pieces)
                assert [s.start for s, _ in pieces] == list(range(0, md.n_in_mask, size))
                np.testing.assert_array_equal(np.concatenate([b for _, b in pieces], axis=1), expected)
        spill_dir = disk.spill_dir
        assert spill_dir is not None and spill_dir.exists() and spill_dir.parent == tmp_path
    assert not spill_dir.exists()  # closed by the context manager


@settings(max_examples=150, deadline=None)
@given(
    n=st.integers(1, 7),
    n_cand=st.integers(1, 30),
    data=st.data(),
)
def test_packed_rows_compact_in_place_to_fancy_indexing(n, n_cand, data):
    # Images with zeros and NaN anywhere, stored in any observation order: each row keeps only the candidates
    # still in play (finite so far, nonzero once), then the packed rows are compacted in place.  Reference:
    # numpy indexing of the full matrix with the mask "finite in every image and nonzero in some".
    kinds = st.sampled_from([0.0, 0.0, 1.5, -2.0, 3.25, np.nan])
    full = np.array(data.draw(st.lists(st.lists(kinds, min_size=n_cand, max_size=n_cand), min_size=n,
                                       max_size=n)), dtype=np.float32)
    full *= np.arange(1, n_cand + 1, dtype=np.float32)  # distinct values per column
    full[:, 0] = np.nan_to_num(full[:, 0])  # every image has a finite value (else an ImageError)
    row_of = data.draw(st.permutations(range(n)))  # stored order -> observation
    tally = _Tally(n, n_cand)
    flat = np.full(n * n_cand, -99.0, dtype=np.float32)
    offsets, lengths, offset = [], [], 0
    for s, r in enumerate(row_of):
        tally.add(full[r], s, [r], ImageRef(r, "x", None), "test", False)
        length = int(np.count_nonzero(tally.in_play))
        flat[offset : offset + length] = full[r][tally.in_play]
        offsets.append(offset)
        lengths.append(length)
        offset += length
    keep = tally.finite_all & tally.nonzero_any
    assert np.all(tally.first_nonzero[keep] < NEVER)
    gather = np.array(data.draw(st.permutations(np.flatnonzero(keep).tolist())), dtype=np.int64)
    plan = plan_rows(offsets, lengths, row_of, tally.first_nonzero, tally.first_nonfinite, gather)
    compact_packed(flat, plan)
    k = gather.size
    np.testing.assert_array_equal(flat[: n * k].reshape(n, k), full[:, gather])


def test_chunk_size_for_budget():
    per_voxel = 8 * (4 * 60 + 8 * 3 + 32)  # the stated per-voxel model
    assert chunk_size_for(60, 3, 100 * per_voxel) == 100
    assert chunk_size_for(60, 3, 1) == 1
    assert chunk_size_for(600, 3, 10**8) < chunk_size_for(60, 3, 10**8)


# ---------------------------------------------------------------------------------------------------------
# memory
# ---------------------------------------------------------------------------------------------------------


@pytest.fixture(scope="module")
def many_images(tmp_path_factory):
    """200 synthetic .nii.gz images of 40x48x40 voxels (58.6 MB as a float32 matrix on the full grid)."""
    d = tmp_path_factory.mktemp("many")
    shape = (40, 48, 40)
    rng = np.random.default_rng(11)
    brain = np.zeros(shape, bool)
    brain[5:35, 6:42, 5:35] = True
    base = np.where(brain, rng.standard_normal(shape), 0).astype(np.float32)
    ids = [f"sub-{i:03d}" for i in range(200)]
    for i, pid in enumerate(ids):
        # cheap but distinct images: a shifted copy plus the row number inside the brain
        a = np.where(brain, np.roll(base, i, axis=1) + np.float32(i), 0).astype(np.float32)
        _save_nifti(d / f"{pid}.nii.gz", a, affine=np.diag([2.0, 2.0, 2.0, 1.0]))
    src, _ = check_images(resolve_images("{participant_id}.nii.gz", ids, pd.DataFrame({"participant_id": ids}), d))
    return src, brain


def test_peak_memory_stays_within_budget_plus_overhead(many_images, tmp_path):
    src, brain = many_images
    grid = src.grid
    budget = 4 * 2**20
    full_bytes = 200 * grid.n_voxels * 4
    assert full_bytes > 2 * (budget + load_overhead_bytes(grid))  # holding everything would fail the test
    tracemalloc.start()
    try:
        md = load_masked(src, None, budget, workdir=tmp_path)
        _, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    try:
        assert md.spilled and md.n_in_mask == int(brain.sum())
        assert peak <= budget + load_overhead_bytes(grid), peak
        # the spilled data are right: row i inside the brain is the rolled base plus i
        assert float(md.data[7, 0]) - float(md.data[0, 0]) != 0
        first = nib.load(src.refs[199].path).get_fdata(dtype=np.float32)[brain]
        np.testing.assert_array_equal(md.data[199], first)
    finally:
        md.close()


def test_peak_memory_in_ram_is_the_full_matrix_plus_overhead(many_images):
    src, brain = many_images
    grid = src.grid
    tracemalloc.start()
    try:
        md = load_masked(src, None, 2**30)
        current, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    assert not md.spilled
    assert peak <= 200 * grid.n_voxels * 4 + load_overhead_bytes(grid)
    # after the in-place compaction only the masked matrix is held
    assert current <= md.data.nbytes + load_overhead_bytes(grid)
    md.close()


def test_peak_memory_gifti_within_budget_plus_overhead(tmp_path):
    # nibabel's XML parser reserves a 35 MB buffer per file by default; the overhead must not include it
    n_vertices = 160_000
    rng = np.random.default_rng(1)
    ids = _ids(4)
    for pid in ids:
        _gifti(tmp_path / f"{pid}.gii", rng.standard_normal(n_vertices))
    src, _ = check_images(resolve_images("{participant_id}.gii", ids, _table(4), tmp_path))
    budget = 2**20
    tracemalloc.start()
    try:
        md = load_masked(src, None, budget, workdir=tmp_path)
        _, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    assert md.spilled and md.n_in_mask == n_vertices
    assert peak <= budget + load_overhead_bytes(src.grid), peak
    md.close()


# ---------------------------------------------------------------------------------------------------------
# writing maps (round trips through nibabel)
# ---------------------------------------------------------------------------------------------------------


@pytest.mark.parametrize("klass", [nib.Nifti1Image, nib.Nifti2Image])
@pytest.mark.parametrize("ext", [".nii", ".nii.gz"])
def test_write_map_round_trip_nifti(tmp_path, klass, ext):
    arrays = _volumes(3)
    src = _study(tmp_path, arrays, ext=ext, klass=klass)
    with load_masked(src, None, 10**8) as md:
        rng = np.random.default_rng(5)
        values = rng.standard_normal(md.n_in_mask) * 1e3
        out = write_map(tmp_path / f"tstat{ext}", values, md.mask, md.grid, intent=("t test", (27,)),
                        description="t of a contrast")
        back = nib.load(out)
        assert type(back) is klass
        assert back.shape == SHAPE and back.get_data_dtype() == np.float32
        np.testing.assert_array_equal(back.affine, AFFINE)
        assert int(back.header["sform_code"]) == 2 and int(back.header["qform_code"]) == 1
        np.testing.assert_array_equal(back.header.get_sform(), AFFINE)
        np.testing.assert_allclose(back.header.get_qform(), AFFINE, atol=1e-6)
        assert back.header.get_intent()[:2] == ("t test", (27.0,))
        got = back.get_fdata(dtype=np.float32)
        np.testing.assert_array_equal(got[md.mask], values.astype(np.float32))
        assert np.all(got[~md.mask] == 0)
        # NaN outside the mask on request
        out2 = write_map(tmp_path / f"nan{ext}", values, md.mask, md.grid, fill=np.nan)
        assert np.all(np.isnan(nib.load(out2).get_fdata()[~md.mask]))
        # a mask, as 0/1
        out3 = write_mask(tmp_path / f"mask{ext}", md.mask, md.grid)
        np.testing.assert_array_equal(np.asanyarray(nib.load(out3).dataobj), md.mask.astype(np.uint8))
        assert load_mask(out3, md.grid).sum() == md.n_in_mask


def test_write_map_from_four_d_single_volume_inputs_is_3d(tmp_path):
    arrays = _volumes(2)
    src = _study(tmp_path, [a[..., None] for a in arrays])
    with load_masked(src, None, 10**8) as md:
        out = write_map(tmp_path / "beta.nii.gz", md.data[0], md.mask, md.grid)
        back = nib.load(out)
        assert back.shape == SHAPE
        np.testing.assert_array_equal(back.get_fdata(dtype=np.float32)[md.mask], md.data[0])


def test_write_map_accepts_full_grid_values_and_rejects_wrong_lengths(tmp_path):
    grid = Grid("nifti", SHAPE, AFFINE, (3.0, 3.0, 3.5))
    mask = np.zeros(SHAPE, bool)
    mask[2:4, 2:4, 2:4] = True
    full = np.arange(np.prod(SHAPE), dtype=float).reshape(SHAPE)
    back = nib.load(write_map(tmp_path / "x.nii.gz", full, mask, grid)).get_fdata()
    np.testing.assert_array_equal(back, np.where(mask, full, 0))
    np.testing.assert_array_equal(back.ravel()[np.flatnonzero(mask)], full[mask])  # C-order convention
    with pytest.raises(ValueError):
        write_map(tmp_path / "y.nii.gz", np.zeros(5), mask, grid)
    with pytest.raises(ValueError):
        write_map(tmp_path / "y.gii", np.zeros(8), mask, grid)


def test_unmask_inverts_boolean_indexing():
    rng = np.random.default_rng(2)
    mask = rng.random(SHAPE) > 0.5
    full = rng.standard_normal(SHAPE)
    np.testing.assert_array_equal(unmask(full[mask], mask, dtype=float)[mask], full[mask])


# ---------------------------------------------------------------------------------------------------------
# GIFTI (a tiny surface made here: 320 vertices)
# ---------------------------------------------------------------------------------------------------------


def test_gifti_study_round_trip(tmp_path):
    n_vertices = 320
    rng = np.random.default_rng(9)
    arrays = [rng.standard_normal(n_vertices).astype(np.float32) for _ in range(5)]
    for a in arrays:
        a[:10] = 0.0  # the medial wall
    arrays[2][50] = np.nan
    ids = _ids(5)
    for pid, a in zip(ids, arrays, strict=True):
        _gifti(tmp_path / f"{pid}.L.effect.gii", a)
    src, _ = check_images(resolve_images("{participant_id}.L.effect.gii", ids, _table(5), tmp_path))
    g = src.grid
    assert g.kind == "gifti" and g.shape == (n_vertices,) and g.affine is None
    assert dict(g.gifti_meta) == {"AnatomicalStructurePrimary": "CortexLeft"}
    with load_masked(src, None, memory_bytes=100, workdir=tmp_path) as md:
        mask, data = _expected(arrays)
        np.testing.assert_array_equal(md.mask, mask)
        np.testing.assert_array_equal(md.data, data)
        assert md.n_in_mask == n_vertices - 11 and md.n_nonfinite_excluded == 1
        values = np.linspace(-3, 3, md.n_in_mask)
        out = write_map(tmp_path / "z.gii", values, md.mask, md.grid, intent=("z score", ()), description="z")
        back = nib.load(out)
        assert len(back.darrays) == 1 and back.darrays[0].data.dtype == np.float32
        assert back.darrays[0].intent == nib.nifti1.intent_codes.code["z score"]
        assert back.meta["AnatomicalStructurePrimary"] == "CortexLeft"
        np.testing.assert_array_equal(back.darrays[0].data[md.mask], values.astype(np.float32))
        assert np.all(back.darrays[0].data[~md.mask] == 0)
        mask_file = write_mask(tmp_path / "mask.gii", md.mask, md.grid)
        np.testing.assert_array_equal(load_mask(mask_file, md.grid), md.mask)
        # a user mask on the surface
        with load_masked(src, mask_file, memory_bytes=10**6) as md2:
            np.testing.assert_array_equal(md2.data, data)


# ---------------------------------------------------------------------------------------------------------
# the example study
# ---------------------------------------------------------------------------------------------------------


EXAMPLE = Path(__file__).resolve().parents[2] / "example_study"


@pytest.mark.skipif(not (EXAMPLE / "maps" / "sub-001_effect.nii.gz").exists(), reason="run make_images.py")
def test_example_study_images_check_and_load():
    table = pd.read_csv(EXAMPLE / "participants.tsv", sep="\t", dtype=str, keep_default_na=False)
    src = resolve_images("maps/{participant_id}_effect.nii.gz", table.participant_id, table, EXAMPLE)
    src, dropped = check_images(src)
    assert len(src) == 62 and dropped == []
    assert src.grid.shape == (20, 24, 20) and src.grid.zooms == (4.0, 4.0, 4.0)
    assert np.any(src.grid.affine[:3, 3] != 0)
    labels = np.asanyarray(nib.load(EXAMPLE / "planted_regions.nii.gz").dataobj)
    with load_masked(src, None, 10**8) as md:
        assert md.n_nonfinite_excluded == 0
        assert set(np.unique(labels[~md.mask])) == {0}  # planted regions lie inside the brain
        assert 2000 < md.n_in_mask < 4000
