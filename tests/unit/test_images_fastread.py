"""The threaded whole-file reader (isal where installed, zlib otherwise) and the fast map writer give exactly
what nibabel gives.

Outside reference: nibabel itself -- ``np.asanyarray(nib.load(path).dataobj)`` for reading (values, dtype and
scaling) and the bytes ``nib.save`` writes for writing.  Exactness is the claim, so no tolerances.
"""

from __future__ import annotations

import gzip
import subprocess
import sys
from pathlib import Path

import nibabel as nib
import numpy as np
import pandas as pd
import pytest

from groupmodel.images import check_images, fastread, load_masked, resolve_images, write_map
from groupmodel.images.reading import _iter_arrays

HAVE_ISAL = fastread._isal_zlib is not None
ISAL_CHOICES = [False, pytest.param(True, marks=pytest.mark.skipif(not HAVE_ISAL, reason="isal not installed"))]
SHAPE = (9, 7, 5)
AFFINE = np.diag([2.0, 2.0, 2.0, 1.0])


def _ids(n: int) -> list[str]:
    return [f"sub-{i:02d}" for i in range(1, n + 1)]


def _study(tmp_path: Path, klass: type, ext: str, scaled: bool, n: int = 5) -> list[Path]:
    rng = np.random.default_rng(3)
    paths = []
    for i, pid in enumerate(_ids(n)):
        if scaled:  # int16 on disk, scl_slope/scl_inter applied on reading (float64 values)
            img = klass(rng.integers(-300, 300, SHAPE).astype(np.int16), AFFINE)
            img.header.set_slope_inter(0.25 + i, -3.0)
        else:
            data = np.where(rng.random(SHAPE) < 0.3, 0, rng.standard_normal(SHAPE)).astype(np.float32)
            data[0, 0, i] = np.nan
            img = klass(data, AFFINE)
        path = tmp_path / f"{pid}{ext}"
        nib.save(img, path)
        paths.append(path)
    return paths


def _source(tmp_path: Path, ext: str):
    ids = _ids(5)
    src, _ = check_images(resolve_images("{participant_id}" + ext, ids, pd.DataFrame({"participant_id": ids}),
                                         tmp_path))
    return src


@pytest.mark.parametrize("use_isal", ISAL_CHOICES)
@pytest.mark.parametrize("threads", [1, 2])
@pytest.mark.parametrize("scaled", [False, True])
@pytest.mark.parametrize("ext", [".nii", ".nii.gz"])
@pytest.mark.parametrize("klass", [nib.Nifti1Image, nib.Nifti2Image])
def test_reader_returns_nibabels_arrays(tmp_path, klass, ext, scaled, threads, use_isal):
    paths = _study(tmp_path, klass, ext, scaled)
    got = list(_iter_arrays(_source(tmp_path, ext), use_isal=use_isal, threads=threads))
    assert [rows for rows, _ in got] == [[i] for i in range(len(paths))]  # in order
    for (_, arr), path in zip(got, paths, strict=True):
        ref = np.asanyarray(nib.load(path).dataobj)
        assert arr.dtype == ref.dtype and arr.shape == ref.shape
        np.testing.assert_array_equal(arr, ref)  # NaN in the same places


@pytest.mark.parametrize("use_isal", ISAL_CHOICES)
def test_four_d_file_read_as_nibabel_reads_it(tmp_path, use_isal):
    rng = np.random.default_rng(5)
    vols = rng.standard_normal(SHAPE + (4,)).astype(np.float32)
    nib.save(nib.Nifti1Image(vols, AFFINE), tmp_path / "all.nii.gz")
    ids = _ids(4)
    table = pd.DataFrame({"participant_id": ids})
    src, _ = check_images(resolve_images(str(tmp_path / "all.nii.gz"), ids, table, tmp_path))
    got = dict((tuple(rows), arr) for rows, arr in _iter_arrays(src, use_isal=use_isal))
    ref = np.asanyarray(nib.load(tmp_path / "all.nii.gz").dataobj)
    for rows, arr in got.items():
        for r in rows:
            np.testing.assert_array_equal(arr, ref[..., r])


def test_environment_variable_turns_isal_off(monkeypatch):
    monkeypatch.setenv(fastread.NO_ISAL_ENV, "1")
    assert not fastread.isal_available()
    monkeypatch.delenv(fastread.NO_ISAL_ENV)
    assert fastread.isal_available() == HAVE_ISAL


@pytest.mark.parametrize("use_isal", ISAL_CHOICES)
def test_gunzip_checks_every_member_and_the_crc(use_isal):
    data = gzip.compress(b"abc" * 1000) + gzip.compress(b"xyz")
    assert fastread.gunzip(data, use_isal) == b"abc" * 1000 + b"xyz"  # reference: the gzip module
    assert fastread.gunzip(data + b"\0" * 8, use_isal) == b"abc" * 1000 + b"xyz"
    with pytest.raises(EOFError):
        fastread.gunzip(data[:-12], use_isal)
    broken = bytearray(gzip.compress(b"abc" * 1000))
    broken[-8] ^= 0xFF  # the CRC-32
    with pytest.raises(Exception, match="(?i)crc|incorrect|error"):
        fastread.gunzip(bytes(broken), use_isal)


def test_load_masked_same_data_with_and_without_isal(tmp_path, monkeypatch):
    _study(tmp_path, nib.Nifti1Image, ".nii.gz", False)
    src = _source(tmp_path, ".nii.gz")
    with load_masked(src, None, 2**30) as a:
        data_default, mask_default = a.data.copy(), a.mask.copy()
    monkeypatch.setenv(fastread.NO_ISAL_ENV, "1")
    with load_masked(src, None, 2**30) as b:
        np.testing.assert_array_equal(b.data, data_default)
        np.testing.assert_array_equal(b.mask, mask_default)
    # reference: nibabel + numpy indexing with the default mask (finite everywhere, nonzero somewhere)
    full = np.stack([np.asanyarray(nib.load(tmp_path / f"{p}.nii.gz").dataobj) for p in _ids(5)])
    mask = np.all(np.isfinite(full), axis=0) & np.any(full != 0, axis=0)
    np.testing.assert_array_equal(mask_default, mask)
    np.testing.assert_array_equal(data_default, full[:, mask])


@pytest.mark.parametrize("use_isal", ISAL_CHOICES)
@pytest.mark.parametrize("klass", [nib.Nifti1Image, nib.Nifti2Image])
def test_written_map_holds_the_bytes_nibabel_writes(tmp_path, monkeypatch, klass, use_isal):
    if not use_isal:
        monkeypatch.setenv(fastread.NO_ISAL_ENV, "1")
    rng = np.random.default_rng(9)
    nib.save(klass(rng.standard_normal(SHAPE).astype(np.float32), AFFINE), tmp_path / "in.nii.gz")
    ids = ["a"]
    src, _ = check_images(resolve_images(str(tmp_path / "in.nii.gz"), ids, pd.DataFrame({"participant_id": ids}),
                                         tmp_path))
    grid = src.grid
    mask = rng.random(SHAPE) < 0.6
    values = rng.standard_normal(int(mask.sum()))
    write_map(tmp_path / "map.nii.gz", values, mask, grid, intent=("t test", (12,)), description="d")
    write_map(tmp_path / "map.nii", values, mask, grid, intent=("t test", (12,)), description="d")
    ours = gzip.decompress((tmp_path / "map.nii.gz").read_bytes())
    assert ours == (tmp_path / "map.nii").read_bytes()  # the .nii is written by nib.save
    back = nib.load(tmp_path / "map.nii.gz")
    assert isinstance(back, klass)
    np.testing.assert_array_equal(back.get_fdata()[mask], values.astype(np.float32))


def test_without_isal_installed_the_zlib_path_gives_the_same_matrix(tmp_path):
    # isal made unimportable in a fresh interpreter: the fallback must load, and load the same values
    _study(tmp_path, nib.Nifti1Image, ".nii.gz", True)
    probe = (
        "import sys\n"
        "sys.modules['isal'] = None\n"
        "import numpy as np, pandas as pd\n"
        "from groupmodel.images import check_images, load_masked, resolve_images\n"
        "from groupmodel.images import fastread\n"
        "assert fastread._isal_zlib is None and not fastread.isal_available()\n"
        f"d = {str(tmp_path)!r}\n"
        f"ids = {_ids(5)!r}\n"
        "table = pd.DataFrame({'participant_id': ids})\n"
        "src, _ = check_images(resolve_images('{participant_id}.nii.gz', ids, table, d))\n"
        "with load_masked(src, None, 2**30) as m:\n"
        "    np.save(d + '/no_isal.npy', m.data)\n"
    )
    subprocess.run([sys.executable, "-c", probe], check=True, capture_output=True, text=True)
    with load_masked(_source(tmp_path, ".nii.gz"), None, 2**30) as m:
        np.testing.assert_array_equal(np.load(tmp_path / "no_isal.npy"), m.data)
