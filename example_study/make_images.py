"""Make the example study's invented effect images (seeded; run ``python example_study/make_images.py``).

Writes, next to this file:

- ``maps/{participant_id}_effect.nii.gz``: one float32 effect image per row of ``participants.tsv`` (also
  for rows with ``n/a``), on a 20x24x20 grid of 4 mm voxels (x runs right-to-left, like common templates);
- ``planted_regions.nii.gz``: labels of where effects were planted (1, 2, 3; 0 elsewhere);
- ``planted_regions.json``: what was planted where, and which tests should find signal where.

The data are invented.  Every image is zero outside an ellipsoid "brain".  Inside it:

    value = noise + A-profile * training effect + B-profile * (sprint and late) effect
                  + C-profile * age slope * (age - 35) / 10

- noise: white Gaussian noise smoothed to FWHM 10 mm, scaled to SD 1 (arbitrary units), different for
  every participant (seeded by the row's position);
- region 1 "training" (A): sprint +3.0, endurance +1.5, rest 0 (a main effect of training, no interaction);
- region 2 "training_by_chronotype" (B): +4.5 in sprint participants with a late chronotype only (a
  training x chronotype interaction; it also moves the training and chronotype marginal means there);
- region 3 "age" (C): +1.5 per decade of age above 35 years (a covariate effect);
- each profile is a Gaussian bump (sigma 6 mm) cut to exactly 0 beyond 14 mm from its centre, so the true
  effect is exactly zero outside the labelled spheres.

A missing value leaves its effect out for that participant: n/a training -> no training effect, n/a
chronotype -> no interaction effect, n/a age -> no age effect.

Running the script twice gives byte-identical files (seeded noise, gzip headers without time stamps).
"""

from __future__ import annotations

import csv
import json
from pathlib import Path

import nibabel as nib
import numpy as np
from scipy import ndimage

HERE = Path(__file__).resolve().parent
SEED = 20240611
SHAPE = (20, 24, 20)
VOXEL_MM = 4.0
# voxel (i, j, k) -> mm; x decreases with i (right-to-left storage), origin away from the corner
AFFINE = np.array(
    [
        [-VOXEL_MM, 0.0, 0.0, 38.0],
        [0.0, VOXEL_MM, 0.0, -54.0],
        [0.0, 0.0, VOXEL_MM, -30.0],
        [0.0, 0.0, 0.0, 1.0],
    ]
)
BRAIN_CENTRE = (9.5, 11.5, 9.5)  # voxels
BRAIN_SEMI_AXES = (8.5, 10.5, 8.0)  # voxels
NOISE_FWHM_MM = 10.0
BUMP_SIGMA_MM = 6.0
BUMP_RADIUS_MM = 14.0
AGE_CENTRE = 35.0

TRAINING_EFFECT = {"sprint": 3.0, "endurance": 1.5, "rest": 0.0}
INTERACTION_EFFECT = 4.5
AGE_EFFECT_PER_DECADE = 1.5

#: label, name, centre voxel, and what is planted there (peak values in noise-SD units)
REGIONS = [
    {"label": 1, "name": "training", "centre_voxel": [5, 15, 10],
     "planted": f"training main effect: sprint +{TRAINING_EFFECT['sprint']}, endurance "
                f"+{TRAINING_EFFECT['endurance']}, rest 0 (same in both chronotypes)"},
    {"label": 2, "name": "training_by_chronotype", "centre_voxel": [14, 15, 10],
     "planted": f"interaction: +{INTERACTION_EFFECT} in sprint participants with a late chronotype only"},
    {"label": 3, "name": "age", "centre_voxel": [9, 6, 10],
     "planted": f"age: +{AGE_EFFECT_PER_DECADE} per decade above {AGE_CENTRE:g} years"},
]


def brain_mask() -> np.ndarray:
    """Boolean ellipsoid of shape SHAPE."""
    idx = np.indices(SHAPE, dtype=float)
    r2 = sum(((idx[d] - BRAIN_CENTRE[d]) / BRAIN_SEMI_AXES[d]) ** 2 for d in range(3))
    return r2 <= 1.0


def bump(centre_voxel: list[int]) -> np.ndarray:
    """Gaussian profile (peak 1) around a voxel, exactly 0 beyond BUMP_RADIUS_MM."""
    idx = np.indices(SHAPE, dtype=float)
    r_mm = VOXEL_MM * np.sqrt(sum((idx[d] - centre_voxel[d]) ** 2 for d in range(3)))
    profile = np.exp(-0.5 * (r_mm / BUMP_SIGMA_MM) ** 2)
    profile[r_mm > BUMP_RADIUS_MM] = 0.0
    return profile


def smooth_noise(rng: np.random.Generator) -> np.ndarray:
    """Smoothed Gaussian noise with unit variance (the kernel's sum of squares is divided out)."""
    sigma_vox = NOISE_FWHM_MM / (2.0 * np.sqrt(2.0 * np.log(2.0))) / VOXEL_MM
    white = rng.standard_normal(SHAPE)
    impulse = np.zeros(SHAPE)
    impulse[tuple(s // 2 for s in SHAPE)] = 1.0
    kernel_ss = float(np.sum(ndimage.gaussian_filter(impulse, sigma_vox, mode="constant") ** 2))
    return ndimage.gaussian_filter(white, sigma_vox, mode="wrap") / np.sqrt(kernel_ss)


def read_rows(path: Path) -> list[dict[str, str]]:
    with open(path, newline="", encoding="utf-8") as fh:
        return list(csv.DictReader(fh, delimiter="\t"))


def main() -> None:
    rows = read_rows(HERE / "participants.tsv")
    brain = brain_mask()
    profiles = {r["name"]: bump(r["centre_voxel"]) * brain for r in REGIONS}
    out = HERE / "maps"
    out.mkdir(exist_ok=True)

    for position, row in enumerate(rows):
        rng = np.random.default_rng([SEED, position])
        img = smooth_noise(rng)
        training, chronotype, age = row["training"], row["chronotype"], row["age"]
        if training in TRAINING_EFFECT:
            img += TRAINING_EFFECT[training] * profiles["training"]
        if training == "sprint" and chronotype == "late":
            img += INTERACTION_EFFECT * profiles["training_by_chronotype"]
        if age != "n/a":
            img += AGE_EFFECT_PER_DECADE * (float(age) - AGE_CENTRE) / 10.0 * profiles["age"]
        img = np.where(brain, img, 0.0).astype(np.float32)
        nii = nib.Nifti1Image(img, AFFINE)
        nii.header.set_xyzt_units("mm")
        nii.header.set_qform(AFFINE, code="aligned")
        nii.header.set_sform(AFFINE, code="aligned")
        nii.header["descrip"] = b"groupmodel example: invented effect map"
        nib.save(nii, out / f"{row['participant_id']}_effect.nii.gz")

    labels = np.zeros(SHAPE, dtype=np.int16)
    for r in REGIONS:
        labels[profiles[r["name"]] > 0] = r["label"]
    lab = nib.Nifti1Image(labels, AFFINE)
    lab.header.set_xyzt_units("mm")
    lab.header.set_qform(AFFINE, code="aligned")
    lab.header.set_sform(AFFINE, code="aligned")
    lab.header.set_intent("label")
    nib.save(lab, HERE / "planted_regions.nii.gz")

    regions = []
    for r in REGIONS:
        centre_mm = (AFFINE @ np.array([*r["centre_voxel"], 1.0]))[:3]
        regions.append({
            **r,
            "centre_mm": [float(v) for v in centre_mm],
            "radius_mm": BUMP_RADIUS_MM,
            "n_voxels": int(np.count_nonzero(labels == r["label"])),
        })
    description = {
        "about": "Invented effect images of the groupmodel example study; made by make_images.py.",
        "images": "maps/{participant_id}_effect.nii.gz",
        "labels_image": "planted_regions.nii.gz",
        "grid": {"shape": list(SHAPE), "voxel_mm": VOXEL_MM, "affine": AFFINE.tolist()},
        "brain": {
            "shape": "ellipsoid; every image is exactly 0 outside it",
            "centre_voxel": list(BRAIN_CENTRE),
            "semi_axes_voxels": list(BRAIN_SEMI_AXES),
            "n_voxels": int(brain.sum()),
        },
        "noise": {"distribution": "Gaussian", "sd": 1.0, "fwhm_mm": NOISE_FWHM_MM, "seed": SEED},
        "profile": {
            "shape": "Gaussian bump, peak 1 at the centre voxel, exactly 0 beyond radius_mm",
            "sigma_mm": BUMP_SIGMA_MM,
            "radius_mm": BUMP_RADIUS_MM,
        },
        "regions": regions,
        "cell_means_at_peak": {
            "training": dict(TRAINING_EFFECT),
            "training_by_chronotype": {
                "sprint/late": INTERACTION_EFFECT, "sprint/early": 0.0, "endurance/late": 0.0,
                "endurance/early": 0.0, "rest/late": 0.0, "rest/early": 0.0,
            },
            "age": {"slope_per_year": AGE_EFFECT_PER_DECADE / 10.0, "centre_years": AGE_CENTRE},
        },
        "missing_values": "n/a training: no training effect; n/a chronotype: no interaction effect; "
                          "n/a age: no age effect",
        "true_effects": {
            "about": "Labels (regions) where each test has a nonzero true effect; outside them the true "
                     "effect is exactly 0, so a strict threshold should find nothing there.  The "
                     "interaction in region 2 also moves the training and chronotype marginal means there.  "
                     "With about 3000 brain voxels, p < 0.001 uncorrected leaves a few noise voxels outside "
                     "the regions (about 2-3 per test are expected); a Bonferroni threshold (0.05 / voxels) "
                     "should leave none.",
            "training": [1, 2],
            "chronotype": [2],
            "training:chronotype": [2],
            "age": [3],
            "sprint_vs_rest": [1, 2],
        },
    }
    (HERE / "planted_regions.json").write_text(json.dumps(description, indent=2) + "\n", encoding="utf-8")
    print(f"wrote {len(rows)} images to {out} and planted_regions.json / .nii.gz")


if __name__ == "__main__":
    main()
