"""Make the example study's invented two-session images (seeded; run ``python example_study/make_sessions.py``).

A mixed design beside the one-image-per-participant example: 16 invented participants (8 ``trained``, 8
``control``), each with a ``pre`` and a ``post`` effect image.  Writes into ``sessions/`` next to this file:

- ``participants.tsv`` (participant_id, group, age) and ``observations.tsv`` (participant_id, session);
- ``maps/{participant_id}_{session}_effect.nii.gz``: float32 images on the grid of the main example;
- ``model.json``: group between participants, session within (``"within": true``);
- ``planted_regions.json``: what was planted where.

Inside the ellipsoid "brain" of the main example:

    value = person + session noise + S-profile * 2.0 * [post] + G-profile * 3.0 * [post and trained]

- person: smoothed Gaussian noise (SD 1) shared by a participant's two images (what the within stratum removes);
- session noise: smoothed Gaussian noise (SD 0.7), new in every image;
- region 1 "session": post - pre = +2.0 in every participant (a session main effect);
- region 2 "group_by_session": post - pre = +3.0 in trained participants only (a group x session interaction;
  it also moves the session and group marginal means there).

Values are rounded to 1/64 (exact in binary) so that the images compress well; running the script twice gives
byte-identical files.
"""

from __future__ import annotations

import json
from pathlib import Path

import nibabel as nib
import numpy as np
from make_images import AFFINE, brain_mask, bump, smooth_noise

HERE = Path(__file__).resolve().parent / "sessions"
SEED = 20240612
GROUPS = ["trained"] * 8 + ["control"] * 8
SESSION_EFFECT = 2.0
INTERACTION_EFFECT = 3.0
SESSION_NOISE_SD = 0.7
REGIONS = [
    {"label": 1, "name": "session", "centre_voxel": [5, 15, 10],
     "planted": f"post - pre = +{SESSION_EFFECT} in every participant"},
    {"label": 2, "name": "group_by_session", "centre_voxel": [14, 15, 10],
     "planted": f"post - pre = +{INTERACTION_EFFECT} in trained participants only"},
]
MODEL = {
    "participants": "participants.tsv",
    "observations": "observations.tsv",
    "factors": {"group": {"levels": ["trained", "control"]},
                "session": {"within": True, "levels": ["pre", "post"]}},
    "covariates": {"age": {"center": "mean"}},
    "terms": ["group*session", "age"],
    "hypotheses": {
        "group": {"main": "group"},
        "session": {"compare": {"session": ["post", "pre"]}},
        "group_by_session": {"interaction": ["group", "session"]},
        "gain_in_trained": {"compare": {"session": ["post", "pre"]}, "at": {"group": "trained"}},
        "trained_vs_control_at_post": {"compare": {"group": ["trained", "control"]}, "at": {"session": "post"}},
    },
    "images": "maps/{participant_id}_{session}_effect.nii.gz",
}


def save(img: np.ndarray, path: Path) -> None:
    nii = nib.Nifti1Image(img.astype(np.float32), AFFINE)
    nii.header.set_xyzt_units("mm")
    nii.header.set_qform(AFFINE, code="aligned")
    nii.header.set_sform(AFFINE, code="aligned")
    nii.header["descrip"] = b"groupmodel example: invented session map"
    nib.save(nii, path)


def main() -> None:
    (HERE / "maps").mkdir(parents=True, exist_ok=True)
    brain = brain_mask()
    profiles = {r["name"]: bump(r["centre_voxel"]) * brain for r in REGIONS}
    ages = np.round(np.random.default_rng([SEED, 999]).uniform(20, 60, len(GROUPS)), 1)
    people = ["participant_id\tgroup\tage"]
    observations = ["participant_id\tsession"]
    for i, group in enumerate(GROUPS):
        pid = f"sub-{i + 1:02d}"
        people.append(f"{pid}\t{group}\t{ages[i]:g}")
        rng = np.random.default_rng([SEED, i])
        person = smooth_noise(rng)
        for session in ("pre", "post"):
            img = person + SESSION_NOISE_SD * smooth_noise(rng)
            if session == "post":
                img += SESSION_EFFECT * profiles["session"]
                if group == "trained":
                    img += INTERACTION_EFFECT * profiles["group_by_session"]
            img = np.round(np.where(brain, img, 0.0) * 64) / 64
            save(img, HERE / "maps" / f"{pid}_{session}_effect.nii.gz")
            observations.append(f"{pid}\t{session}")
    (HERE / "participants.tsv").write_text("\n".join(people) + "\n", encoding="utf-8")
    (HERE / "observations.tsv").write_text("\n".join(observations) + "\n", encoding="utf-8")
    (HERE / "model.json").write_text(json.dumps(MODEL, indent=2) + "\n", encoding="utf-8")
    description = {
        "about": "Invented two-session images of the groupmodel example study; made by make_sessions.py.",
        "regions": REGIONS,
        "noise": {"person_sd": 1.0, "session_sd": SESSION_NOISE_SD, "seed": SEED},
        "true_effects": {"session": [1, 2], "group_by_session": [2], "gain_in_trained": [1, 2],
                         "group": [2], "trained_vs_control_at_post": [2]},
    }
    (HERE / "planted_regions.json").write_text(json.dumps(description, indent=2) + "\n", encoding="utf-8")
    print(f"wrote {2 * len(GROUPS)} images to {HERE / 'maps'}")


if __name__ == "__main__":
    main()
