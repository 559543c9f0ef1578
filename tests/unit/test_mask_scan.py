"""The analysis mask found without the data matrix (:mod:`groupmodel.images.mask_scan`, what the workers of a Dask
fit do) against :func:`groupmodel.images.load_masked`, which reads the matrix: the same mask, exclusions, warnings
and column values, however the images are grouped."""

from __future__ import annotations

from pathlib import Path

import nibabel as nib
import numpy as np
import pytest

from groupmodel.errors import ImageError
from groupmodel.images import ImageRef, ImageSource, check_images, load_masked
from groupmodel.images.mask_scan import masked_columns, scan_groups

SHAPE = (7, 6, 5)


def _source(root: Path, kind: str = "nii.gz") -> ImageSource:
    """Nine images with NaN in some voxels of some images, a NaN background in all, voxels zero in every image,
    an image zero everywhere (a warning), and float64 values beyond float32 (inf when stored)."""
    rng = np.random.default_rng(3)
    y = rng.standard_normal((9, *SHAPE))
    y[:, 0] = np.nan  # NaN in every image
    y[2, 3, 2, 1] = np.nan  # NaN in one image only
    y[5, 4, 4, 4] = np.inf
    y[:, 6] = 0.0  # zero in every image
    y[7] = 0.0  # an image zero everywhere
    y[7, 0] = np.nan
    y[4, 2, 2, 2] = 1e300  # beyond float32: inf once stored as float32
    root.mkdir()
    refs = []
    if kind == "4d":
        with np.errstate(over="ignore"):  # 1e300 becomes inf in float32, as the loader stores it
            volumes = np.moveaxis(y.astype(np.float32), 0, -1)
        nib.save(nib.Nifti1Image(volumes, np.eye(4)), root / "all.nii.gz")
        refs = [ImageRef(i, f"sub-{i:02d}", root / "all.nii.gz", volume=i) for i in range(9)]
        return ImageSource(tuple(refs), "4d", "test images")
    for i in range(9):
        nib.save(nib.Nifti1Image(y[i], np.eye(4)), root / f"sub-{i:02d}.{kind}")  # float64 on disk
        refs.append(ImageRef(i, f"sub-{i:02d}", root / f"sub-{i:02d}.{kind}"))
    return ImageSource(tuple(refs), "column", "test images")


@pytest.mark.parametrize("kind", ["nii.gz", "nii", "4d"])
@pytest.mark.parametrize("with_mask", [False, True])
def test_same_mask_exclusions_warnings_and_values(tmp_path: Path, kind: str, with_mask: bool) -> None:
    source, _ = check_images(_source(tmp_path / "images", kind))
    mask = None
    if with_mask:
        m = np.zeros(SHAPE, dtype=np.uint8)
        m[1:6, 1:5, :] = 1
        m[6, 1:3, :] = 1  # some of the all-zero voxels
        mask = tmp_path / "mask.nii.gz"
        nib.save(nib.Nifti1Image(m, np.eye(4)), mask)
    with load_masked(source, mask, 10**8) as ref:
        for groups in (1, 2, 4, 9):
            got = masked_columns(source, str(mask) if mask else None, groups=groups)
            assert np.array_equal(got.mask, ref.mask)
            assert got.n_in_mask == ref.n_in_mask > 0
            assert (got.n_nonfinite_excluded, got.n_nonfinite_everywhere, got.n_zero_excluded) == (
                ref.n_nonfinite_excluded, ref.n_nonfinite_everywhere, ref.n_zero_excluded)
            np.testing.assert_array_equal(got.nonfinite_per_image, ref.nonfinite_per_image)
            assert got.warnings == ref.warnings and any("zero everywhere" in w for w in got.warnings)
            assert got.data.dtype == str(ref.data.dtype)
            np.testing.assert_array_equal(got.data[:, :], ref.data)  # read from the files on demand
            np.testing.assert_array_equal(got.data[:, 3:11], ref.data[:, 3:11])
            for (cols, block), (ref_cols, ref_block) in zip(got.chunks(13), ref.chunks(13), strict=True):
                assert cols == ref_cols
                np.testing.assert_array_equal(block, ref_block)
    assert ref.n_nonfinite_excluded > 0 and (with_mask or ref.n_zero_excluded > 0)


def test_groups_are_contiguous_and_cover_every_image(tmp_path: Path) -> None:
    source = _source(tmp_path / "images")
    for groups in (1, 2, 4, 9, 20):
        cut = scan_groups(source, groups)
        assert [i for g in cut for i in g] == list(range(9)) and len(cut) <= max(1, groups)
    four_d = _source(tmp_path / "four", "4d")
    assert scan_groups(four_d, 4) == [tuple(range(9))]  # one 4-D file: read once


def test_an_image_without_finite_values_is_an_image_error(tmp_path: Path) -> None:
    root = tmp_path / "bad"
    root.mkdir()
    refs = []
    for i in range(3):
        vol = np.full(SHAPE, np.nan) if i == 1 else np.ones(SHAPE)
        nib.save(nib.Nifti1Image(vol, np.eye(4)), root / f"sub-{i}.nii")
        refs.append(ImageRef(i, f"sub-{i}", root / f"sub-{i}.nii"))
    source = ImageSource(tuple(refs), "column", "test images")
    with pytest.raises(ImageError, match="sub-1.*NaN/inf everywhere"):
        masked_columns(source, None, groups=3)
