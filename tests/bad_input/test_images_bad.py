"""Bad image input: every case is an ImageError (exit code 2) with a one-line message naming the file.

Messages follow the project template (expected / found / where / fix); the checks below look for the
file, the observation and the numbers that tell the user what is wrong.
"""

from __future__ import annotations

from pathlib import Path

import nibabel as nib
import numpy as np
import pandas as pd
import pytest

from groupmodel.errors import ImageError
from groupmodel.images import check_images, load_mask, load_masked, resolve_images

AFFINE = np.array([[-2.0, 0, 0, 40], [0, 2.0, 0, -50], [0, 0, 2.0, -30], [0, 0, 0, 1]])
SHAPE = (6, 7, 5)


def _ids(n: int) -> list[str]:
    return [f"sub-{i:02d}" for i in range(1, n + 1)]


def _table(n: int) -> pd.DataFrame:
    return pd.DataFrame({"participant_id": _ids(n)})


def _save(path: Path, data: np.ndarray, affine: np.ndarray = AFFINE, klass=nib.Nifti1Image) -> Path:
    nib.save(klass(np.asarray(data), affine), path)
    return path


def _random(shape=SHAPE, seed=0) -> np.ndarray:
    return np.random.default_rng(seed).standard_normal(shape).astype(np.float32)


def _write_all(tmp_path: Path, n: int = 4) -> list[Path]:
    return [_save(tmp_path / f"{pid}.nii.gz", _random(seed=i)) for i, pid in enumerate(_ids(n))]


def _source(tmp_path: Path, n: int = 4, pattern: str = "{participant_id}.nii.gz"):
    return resolve_images(pattern, _ids(n), _table(n), tmp_path)


def _one_line(err: pytest.ExceptionInfo) -> str:
    msg = str(err.value)
    assert "\n" not in msg
    assert err.value.exit_code == 2
    return msg


def test_images_of_different_shapes(tmp_path):
    _write_all(tmp_path)
    bad = _save(tmp_path / "sub-03.nii.gz", _random((6, 7, 6)))
    with pytest.raises(ImageError) as err:
        check_images(_source(tmp_path))
    msg = _one_line(err)
    assert str(bad) in msg and "sub-03" in msg
    assert "6x7x5" in msg and "6x7x6" in msg and "sub-01" in msg


def test_images_with_different_affines(tmp_path):
    _write_all(tmp_path)
    moved = AFFINE.copy()
    moved[1, 3] += 2.0
    bad = _save(tmp_path / "sub-02.nii.gz", _random(), affine=moved)
    with pytest.raises(ImageError) as err:
        check_images(_source(tmp_path))
    msg = _one_line(err)
    assert str(bad) in msg and "sub-02" in msg
    assert "[-2 0 0 40]" in msg and "[0 2 0 -50]" in msg and "[0 2 0 -48]" in msg  # both affines, compact
    assert "differs by up to 2 mm" in msg


def test_four_d_file_with_wrong_number_of_volumes(tmp_path):
    _save(tmp_path / "all.nii.gz", np.stack([_random(seed=i) for i in range(5)], axis=-1))
    with pytest.raises(ImageError) as err:
        check_images(resolve_images("all.nii.gz", _ids(4), _table(4), tmp_path))
    msg = _one_line(err)
    assert "all.nii.gz" in msg and "expected 4 volumes" in msg and "found 5" in msg
    # with the participants file's row count known, both admissible counts are named
    with pytest.raises(ImageError) as err:
        check_images(resolve_images("all.nii.gz", _ids(4), _table(4), tmp_path, file_rows=[0, 1, 2, 3],
                                    n_file_rows=6))
    assert "or 6 (one per row of participants.tsv)" in _one_line(err)


def test_multi_volume_image_for_one_participant(tmp_path):
    _write_all(tmp_path)
    bad = _save(tmp_path / "sub-04.nii.gz", np.stack([_random(), _random()], axis=-1))
    with pytest.raises(ImageError) as err:
        check_images(_source(tmp_path))
    msg = _one_line(err)
    assert str(bad) in msg and "2 volumes" in msg


@pytest.mark.parametrize("name", ["sub-02.nii.gz", "sub-02.nii", "sub-02.gii"])
def test_non_image_file_with_an_image_name(tmp_path, name):
    ext = name.split(".", 1)[1]
    for i, pid in enumerate(_ids(3)):
        if ext == "gii":
            da = nib.gifti.GiftiDataArray(_random((50,), seed=i), datatype="NIFTI_TYPE_FLOAT32")
            nib.save(nib.gifti.GiftiImage(darrays=[da]), tmp_path / f"{pid}.gii")
        else:
            _save(tmp_path / f"{pid}.{ext}", _random(seed=i))
    (tmp_path / name).write_text("participant_id\tage\nsub-02\t31\n")
    with pytest.raises(ImageError) as err:
        check_images(_source(tmp_path, 3, "{participant_id}." + ext))
    msg = _one_line(err)
    assert str(tmp_path / name) in msg and "sub-02" in msg and "unreadable" in msg


def test_non_image_file_by_extension(tmp_path):
    _write_all(tmp_path, 2)
    (tmp_path / "notes.txt").write_text("hello")
    table = pd.DataFrame({"participant_id": _ids(2), "img": ["sub-01.nii.gz", "notes.txt"]})
    with pytest.raises(ImageError) as err:
        check_images(resolve_images("img", _ids(2), table, tmp_path))
    msg = _one_line(err)
    assert str(tmp_path / "notes.txt") in msg and "NIfTI" in msg and "GIFTI" in msg


def test_truncated_data_is_named_when_read(tmp_path):
    paths = [_save(tmp_path / f"{pid}.nii", _random(seed=i)) for i, pid in enumerate(_ids(3))]
    raw = paths[1].read_bytes()
    paths[1].write_bytes(raw[: len(raw) - 100])  # the header is intact, the voxel data are cut short
    src, _ = check_images(_source(tmp_path, 3, "{participant_id}.nii"))  # header-only checks pass
    with pytest.raises(ImageError) as err:
        load_masked(src, None, 10**6)
    msg = _one_line(err)
    assert str(paths[1]) in msg and "sub-02" in msg


def test_missing_image_and_drop_missing(tmp_path):
    paths = _write_all(tmp_path, 5)
    paths[2].unlink()
    with pytest.raises(ImageError) as err:
        check_images(_source(tmp_path, 5))
    msg = _one_line(err)
    assert msg.startswith("image for sub-03 not found: ")
    assert str(paths[2]) in msg and "pattern" in msg and "--drop-missing-images" in msg
    checked, dropped = check_images(_source(tmp_path, 5), drop_missing=True)
    assert dropped == [("sub-03", f"image not found: {paths[2]}")]
    assert checked.labels == ["sub-01", "sub-02", "sub-04", "sub-05"] and checked.rows == [0, 1, 3, 4]
    with load_masked(checked, None, 10**6) as md:
        assert md.n_obs == 4


def test_all_images_missing_even_with_drop(tmp_path):
    with pytest.raises(ImageError) as err:
        check_images(_source(tmp_path, 3), drop_missing=True)
    assert "found none of 3" in _one_line(err)


def test_all_nan_image(tmp_path):
    _write_all(tmp_path)
    bad = _save(tmp_path / "sub-04.nii.gz", np.full(SHAPE, np.nan, np.float32))
    src, _ = check_images(_source(tmp_path))
    with pytest.raises(ImageError) as err:
        load_masked(src, None, 10**6)
    msg = _one_line(err)
    assert str(bad) in msg and "sub-04" in msg and "NaN/inf everywhere" in msg


def test_spill_removed_after_an_error(tmp_path):
    _write_all(tmp_path)
    _save(tmp_path / "sub-04.nii.gz", np.full(SHAPE, np.nan, np.float32))
    src, _ = check_images(_source(tmp_path))
    work = tmp_path / "work"
    work.mkdir()
    with pytest.raises(ImageError):
        load_masked(src, None, 10, workdir=work)
    assert list(work.iterdir()) == []


@pytest.mark.parametrize("what", ["shape", "affine", "kind"])
def test_mask_on_another_grid(tmp_path, what):
    _write_all(tmp_path)
    src, _ = check_images(_source(tmp_path))
    if what == "shape":
        mask = _save(tmp_path / "mask.nii.gz", np.ones((6, 7, 4), np.uint8))
    elif what == "affine":
        mask = _save(tmp_path / "mask.nii.gz", np.ones(SHAPE, np.uint8), affine=np.diag([3.0, 3, 3, 1]))
    else:
        da = nib.gifti.GiftiDataArray(np.ones(210, np.float32), datatype="NIFTI_TYPE_FLOAT32")
        mask = tmp_path / "mask.gii"
        nib.save(nib.gifti.GiftiImage(darrays=[da]), mask)
    with pytest.raises(ImageError) as err:
        load_masked(src, mask, 10**6)
    msg = _one_line(err)
    assert str(mask) in msg and "6x7x5" in msg and "resample the mask" in msg


def test_empty_mask(tmp_path):
    _write_all(tmp_path)
    src, _ = check_images(_source(tmp_path))
    mask = _save(tmp_path / "mask.nii.gz", np.zeros(SHAPE, np.uint8))
    with pytest.raises(ImageError) as err:
        load_masked(src, mask, 10**6)
    msg = _one_line(err)
    assert str(mask) in msg and "empty mask" in msg
    with pytest.raises(ImageError):
        load_mask(tmp_path / "no_such_mask.nii.gz", src.grid)


def test_nothing_left_after_exclusions(tmp_path):
    # every voxel is NaN in one image or another: the mask would be empty
    for i, pid in enumerate(_ids(3)):
        a = _random(seed=i)
        a.reshape(-1)[i::3] = np.nan
        _save(tmp_path / f"{pid}.nii.gz", a)
    src, _ = check_images(_source(tmp_path, 3))
    with pytest.raises(ImageError) as err:
        load_masked(src, None, 10**6)
    msg = _one_line(err)
    assert "found none" in msg and f"{int(np.prod(SHAPE))} NaN/inf somewhere" in msg


def test_gifti_with_several_arrays_or_a_mesh(tmp_path):
    for pid in _ids(2):
        da = nib.gifti.GiftiDataArray(np.ones(40, np.float32), datatype="NIFTI_TYPE_FLOAT32")
        nib.save(nib.gifti.GiftiImage(darrays=[da]), tmp_path / f"{pid}.gii")
    arrays = [nib.gifti.GiftiDataArray(np.ones(40, np.float32), datatype="NIFTI_TYPE_FLOAT32") for _ in range(3)]
    nib.save(nib.gifti.GiftiImage(darrays=arrays), tmp_path / "sub-02.gii")
    with pytest.raises(ImageError) as err:
        check_images(_source(tmp_path, 2, "{participant_id}.gii"))
    msg = _one_line(err)
    assert str(tmp_path / "sub-02.gii") in msg and "exactly one data array" in msg and "found 3" in msg
    mesh = [
        nib.gifti.GiftiDataArray(np.zeros((40, 3), np.float32), intent="NIFTI_INTENT_POINTSET",
                                 datatype="NIFTI_TYPE_FLOAT32"),
        nib.gifti.GiftiDataArray(np.zeros((10, 3), np.int32), intent="NIFTI_INTENT_TRIANGLE",
                                 datatype="NIFTI_TYPE_INT32"),
    ]
    nib.save(nib.gifti.GiftiImage(darrays=mesh), tmp_path / "sub-02.gii")
    with pytest.raises(ImageError) as err:
        check_images(_source(tmp_path, 2, "{participant_id}.gii"))
    assert "surface geometry file" in _one_line(err)


def test_gifti_of_the_other_hemisphere(tmp_path):
    for pid, side in zip(_ids(2), ["CortexLeft", "CortexRight"], strict=True):
        da = nib.gifti.GiftiDataArray(np.ones(40, np.float32), datatype="NIFTI_TYPE_FLOAT32")
        meta = nib.gifti.GiftiMetaData({"AnatomicalStructurePrimary": side})
        nib.save(nib.gifti.GiftiImage(meta=meta, darrays=[da]), tmp_path / f"{pid}.gii")
    with pytest.raises(ImageError) as err:
        check_images(_source(tmp_path, 2, "{participant_id}.gii"))
    msg = _one_line(err)
    assert "CortexRight" in msg and "CortexLeft" in msg and str(tmp_path / "sub-02.gii") in msg


def test_mixed_nifti_and_gifti(tmp_path):
    _save(tmp_path / "a.nii.gz", _random())
    da = nib.gifti.GiftiDataArray(np.ones(40, np.float32), datatype="NIFTI_TYPE_FLOAT32")
    nib.save(nib.gifti.GiftiImage(darrays=[da]), tmp_path / "b.gii")
    table = pd.DataFrame({"participant_id": _ids(2), "img": ["a.nii.gz", "b.gii"]})
    with pytest.raises(ImageError) as err:
        check_images(resolve_images("img", _ids(2), table, tmp_path))
    assert str(tmp_path / "b.gii") in _one_line(err)


def test_complex_voxel_type(tmp_path):
    _write_all(tmp_path, 2)
    bad = _save(tmp_path / "sub-02.nii.gz", (_random() + 1j * _random()).astype(np.complex64))
    with pytest.raises(ImageError) as err:
        check_images(_source(tmp_path, 2))
    msg = _one_line(err)
    assert str(bad) in msg and "complex64" in msg


def test_pattern_with_unknown_column(tmp_path):
    with pytest.raises(ImageError) as err:
        resolve_images("{subject}_effect.nii.gz", _ids(2), _table(2), tmp_path)
    msg = _one_line(err)
    assert "{subject}" in msg and "participant_id" in msg


def test_two_rows_sharing_one_file(tmp_path):
    table = pd.DataFrame({"participant_id": _ids(3), "group": ["a", "b", "a"]})
    with pytest.raises(ImageError) as err:
        resolve_images("{group}.nii.gz", _ids(3), table, tmp_path)
    msg = _one_line(err)
    assert "sub-01" in msg and "sub-03" in msg and str(tmp_path / "a.nii.gz") in msg


def test_images_entry_that_is_nothing(tmp_path):
    with pytest.raises(ImageError) as err:
        resolve_images("maps/effect.nii.gz", _ids(2), _table(2), tmp_path)
    msg = _one_line(err)
    assert "maps/effect.nii.gz" in msg and "{participant_id}" in msg
