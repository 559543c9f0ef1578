"""``groupmodel check --images``: the unequal-variance warning over the images' voxels, with the count of voxels
recomputed here from ``numpy.linalg.lstsq`` residuals and ``scipy.stats.levene`` (median-centred, the test the
warning names)."""

from __future__ import annotations

import re
from pathlib import Path

import nibabel as nib
import numpy as np
import pandas as pd
from scipy import stats

from groupmodel.audit import audit
from groupmodel.engine.variance_check import VARIANCE_RATIO_WARN
from groupmodel.engine.welch import group_residual_df


def _study(root: Path, sd_late: float, listed: list[int] | None = None) -> tuple[Path, Path, Path, np.ndarray]:
    """24 participants (early, late), age; one 6x6x6 image each with SD 1 (early) or ``sd_late`` (late)."""
    rng = np.random.default_rng(8)
    n = 24
    group = np.repeat(["early", "late"], n // 2)
    age = rng.uniform(20, 60, n).round(1)
    ids = [f"sub-{i + 1:02d}" for i in range(n)]
    pd.DataFrame({"participant_id": ids, "chronotype": group, "age": age}).to_csv(
        root / "participants.tsv", sep="\t", index=False)
    x = np.column_stack([np.ones(n), (group == "late") * 1.0, age - age.mean()])
    pd.DataFrame(x, columns=["intercept", "late", "age_c"]).to_csv(root / "design.tsv", sep="\t", index=False)
    sd = np.where(group == "late", sd_late, 1.0)
    y = 5.0 + rng.standard_normal((n, 216)) * sd[:, None]
    (root / "maps").mkdir()
    for i, pid in enumerate(ids):
        image = nib.Nifti1Image(y[i].reshape(6, 6, 6).astype(np.float32), np.eye(4))
        nib.save(image, root / "maps" / f"{pid}_effect.nii.gz")
    order = listed if listed is not None else list(range(n))
    (root / "images.txt").write_text("".join(f"maps/{ids[i]}_effect.nii.gz\n" for i in order))
    return root / "design.tsv", root / "participants.tsv", root / "images.txt", y.astype(np.float32).astype(float)


def _expected_count(x: np.ndarray, y: np.ndarray, labels: np.ndarray) -> int:
    """Voxels where the groups' residual variances (RSS over residual df) differ by more than the allowed factor
    and scipy's median-centred Levene test gives p < 0.05."""
    resid = y - x @ np.linalg.lstsq(x, y, rcond=None)[0]
    u = np.linalg.svd(x, full_matrices=False)[0]
    rho = group_residual_df(u, labels, 2)
    count = 0
    for v in range(y.shape[1]):
        parts = [resid[labels == g, v] for g in (0, 1)]
        var = [np.sum(p**2) / r for p, r in zip(parts, rho, strict=True)]
        if max(var) / min(var) > VARIANCE_RATIO_WARN and stats.levene(*parts, center="median").pvalue < 0.05:
            count += 1
    return count


def test_check_counts_the_voxels_whose_group_variances_differ(tmp_path: Path) -> None:
    design, table, images, y = _study(tmp_path, sd_late=3.0)
    report = audit(design, participants=table, images=images)
    found = [f for f in report.findings if f.code == "unequal_variances_images"]
    assert len(found) == 1 and found[0].severity == "warning" and found[0].section == "variances"
    hit, total = map(int, re.search(r"in (\d+) of (\d+) voxels", found[0].message).groups())
    x = pd.read_csv(design, sep="\t").to_numpy()
    labels = (pd.read_csv(table, sep="\t")["chronotype"] == "late").to_numpy().astype(np.int64)
    assert total == 216
    assert hit == _expected_count(x, y, labels) and hit > 150
    assert "'chronotype'" in found[0].message and '"variance_groups": "chronotype"' in found[0].message


def test_no_warning_when_variances_are_equal(tmp_path: Path) -> None:
    design, table, images, _ = _study(tmp_path, sd_late=1.0)
    report = audit(design, participants=table, images=images)
    assert not [f for f in report.findings if f.code.startswith("unequal_variances")]
    assert ("note", "image_order_ok") in {(f.severity, f.code) for f in report.findings}


def test_images_out_of_order_are_not_fitted(tmp_path: Path) -> None:
    # The rows section reports the order as an error; the variance check does not fit images to the wrong rows.
    order = list(range(24))
    order[0], order[13] = order[13], order[0]
    design, table, images, _ = _study(tmp_path, sd_late=3.0, listed=order)
    report = audit(design, participants=table, images=images)
    codes = {f.code for f in report.findings}
    assert "image_order" in codes and "unequal_variances_images" not in codes


def test_unreadable_image_is_a_note(tmp_path: Path) -> None:
    design, table, images, _ = _study(tmp_path, sd_late=3.0)
    (tmp_path / "maps" / "sub-05_effect.nii.gz").write_bytes(b"not an image")
    report = audit(design, participants=table, images=images)
    notes = [f for f in report.findings if f.code == "image_variances_unread"]
    assert len(notes) == 1 and notes[0].severity == "note" and "sub-05" in notes[0].message
