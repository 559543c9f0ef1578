"""The voxelwise fit (``groupmodel.fit.fit_images`` / ``write_voxel_fit``) against outside references.

References:

* statsmodels ``OLS(y, X).fit().t_test / .f_test`` on the values of single voxels, read straight from the
  input images with nibabel (so the check also covers which value of which image lands in which voxel);
  one-sided p, z of equal p and -log10 p from scipy.stats / scipy.special on statsmodels' t and F;
* NIST StRD one-way ANOVA sets (certified F and residual SD in scipy's test data), one tiny image study
  per set, compared with the certified values and with the table-level fit (``fit_table``) of the same
  numbers, which ``tests/reference/test_ols_reference.py`` checks against NIST directly.

The design matrix and hypothesis weights given to statsmodels are groupmodel's own (``fit.model``): what is
checked here is the voxelwise fit, not the coding (checked elsewhere).
"""

from __future__ import annotations

import json
import math
from pathlib import Path

import nibabel as nib
import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from nist_strd import EASY, HARD, NIST_DIR, SKIP_REASON, lre, read_nist
from scipy import special, stats

from groupmodel import __version__
from groupmodel.analysis.effect_maps import effect_size_names
from groupmodel.fit import F_MAPS, T_MAPS, fit_images, fit_table, write_voxel_fit
from groupmodel.outputs.numbers import tidy

RTOL = 1e-8  # the bar for effect, SE, t, F and p against statsmodels
RTOL_F32 = 1e-6  # maps read back from float32 NIfTI files (float32 eps is 6e-8)
AFFINE = np.array([[2.0, 0.0, 0.0, -10.0], [0.0, 2.0, 0.0, -12.0], [0.0, 0.0, 2.5, -8.0],
                   [0.0, 0.0, 0.0, 1.0]])
SHAPE = (6, 5, 4)
SIDECAR_KEYS = ("hypothesis", "statistic", "statement", "weights", "df1", "df2", "tail", "software_version")


def _rel(a, b, floor: float = 1e-300) -> float:
    a, b = np.asarray(a, float), np.asarray(b, float)
    return float(np.max(np.abs(a - b) / np.maximum(np.abs(b), floor)))


def _make_study(root: Path, n: int = 30, seed: int = 11) -> Path:
    """A synthetic image study: 3-level x 2-level factors, a covariate, 6 hypotheses (2 F, 4 t).

    Voxels get effects of different sizes, scales from 1e-2 to 1e2 and offsets up to 10 noise SDs.
    Voxel (0, 0, 0) is 0 in every image (left out of the mask); voxel (5, 4, 3) is NaN in one image
    (left out and counted).
    """
    rng = np.random.default_rng(seed)
    (root / "maps").mkdir(parents=True)
    group = np.array(["a", "b", "c"])[rng.permutation(np.arange(n) % 3)]
    sex = np.array(["f", "m"])[rng.permutation(np.arange(n) % 2)]
    age = np.round(rng.uniform(20, 65, n), 1)
    ids = [f"sub-{i + 1:02d}" for i in range(n)]
    pd.DataFrame({"participant_id": ids, "group": group, "sex": sex, "age": age}).to_csv(
        root / "participants.tsv", sep="\t", index=False
    )
    nvox = int(np.prod(SHAPE))
    scale = 10.0 ** rng.uniform(-2, 2, nvox)
    offset = rng.choice([0.0, 1.0, 10.0], nvox)
    eff = rng.normal(0, 1, (4, nvox)) * rng.choice([0.0, 0.5, 2.0], (4, nvox))
    gnum = (group == "b") * 1.0 + (group == "c") * 2.0
    for i in range(n):
        v = offset + eff[0] * gnum[i] + eff[1] * (sex[i] == "m") + eff[2] * (age[i] - 40) / 10
        v = v + eff[3] * (gnum[i] == 2) * (sex[i] == "m") + rng.normal(0, 1, nvox)
        img = (v * scale).reshape(SHAPE).astype(np.float32)
        img[0, 0, 0] = 0.0
        if i == 3:
            img[5, 4, 3] = np.nan
        nib.save(nib.Nifti1Image(img, AFFINE), root / "maps" / f"{ids[i]}_beta.nii.gz")
    spec = {
        "participants": "participants.tsv",
        "factors": {
            "group": {"levels": ["a", "b", "c"], "coding": "effect"},
            "sex": {"levels": ["f", "m"], "coding": "treatment", "reference": "f"},
        },
        "covariates": {"age": {"center": "mean"}},
        "terms": ["group*sex", "age"],
        "hypotheses": {
            "group": {"main": "group"},
            "group_by_sex": {"interaction": ["group", "sex"]},
            "b_vs_a": {"compare": {"group": ["b", "a"]}, "tail": "greater"},
            "age": {"slope": "age", "tail": "less"},
            "c_m_mean": {"mean": {"group": "c", "sex": "m"}},
            "m_vs_f_in_c": {"compare": {"sex": ["m", "f"]}, "at": {"group": "c"}},
        },
        "images": "maps/{participant_id}_beta.nii.gz",
    }
    (root / "model.json").write_text(json.dumps(spec, indent=2))
    return root / "model.json"


_IMAGES: dict[str, dict[str, np.ndarray]] = {}


def _voxel_values(spec: Path, ids: list[str], ijk: tuple[int, int, int]) -> np.ndarray:
    """One voxel's value in every image, read directly with nibabel, in the given participant order."""
    key = str(spec)
    if key not in _IMAGES:  # each image read once per study
        _IMAGES[key] = {p.name.removesuffix("_beta.nii.gz"): np.asanyarray(nib.load(p).dataobj)
                       for p in (spec.parent / "maps").glob("*_beta.nii.gz")}
    return np.array([float(_IMAGES[key][p][ijk]) for p in ids])


@pytest.fixture(scope="module")
def study(tmp_path_factory):
    root = tmp_path_factory.mktemp("voxref")
    spec = _make_study(root / "study")
    fit = fit_images(spec, progress=False)
    out = root / "out"
    write_voxel_fit(fit, out)
    return spec, fit, out


def _mlog10(p: float, q: float) -> float:
    """-log10 p, from q = 1 - p (computed separately) where p is near 1, to keep relative accuracy."""
    return -math.log10(p) if p < 0.5 else -math.log1p(-q) / math.log(10)


def _statsmodels_reference(fit, y: np.ndarray) -> dict[str, dict[str, float]]:
    """Every map value of one voxel from statsmodels (effect, se, t/F, p) and scipy (one-sided p, z)."""
    x = fit.model.design.matrix
    res = sm.OLS(y, x).fit()
    df = float(res.df_resid)
    out: dict[str, dict[str, float]] = {"_": {"residual_variance": float(res.scale), "df": df}}
    for h in fit.model.hypotheses.values():
        if h.test == "t":
            tt = res.t_test(h.weights)
            t = float(tt.tvalue[0, 0])
            if h.tail == "two-sided":
                p = float(tt.pvalue)
            elif h.tail == "greater":
                p = float(stats.t.sf(t, df))  # scipy: the upper tail of statsmodels' t
            else:
                p = float(stats.t.cdf(t, df))
            # z of equal one-sided probability, signed like t (scipy): Phi^-1(P(T <= t))
            if t > 0:
                z = float(-special.ndtri(stats.t.sf(t, df)))
            else:
                z = float(special.ndtri(stats.t.cdf(t, df)))
            # 1 - p without cancellation (scipy), for -log10 p where p is near 1
            if h.tail == "two-sided":
                q = float(special.betainc(0.5, df / 2, t * t / (df + t * t)))  # P(|T| <= |t|)
            else:
                q = float(stats.t.cdf(t, df) if h.tail == "greater" else stats.t.sf(t, df))
            out[h.name] = {"effect": float(tt.effect[0]), "se": float(tt.sd[0, 0]), "t": t, "p": p, "z": z,
                           "mlog10p": _mlog10(p, q)}
            # the 95% interval of the effect: statsmodels conf_int; d (where defined): effect / sqrt(scale)
            out[h.name]["ci_lower"], out[h.name]["ci_upper"] = (float(v) for v in tt.conf_int(alpha=0.05)[0])
            if "cohens_d" in effect_size_names(h):
                out[h.name]["cohens_d"] = float(tt.effect[0]) / float(np.sqrt(res.scale))
        else:
            ft = res.f_test(h.weights)
            p = float(ft.pvalue)
            q = float(stats.f.cdf(float(ft.fvalue), ft.df_num, ft.df_denom))
            out[h.name] = {"F": float(ft.fvalue), "p": p, "z": float(stats.norm.isf(p)),
                           "mlog10p": _mlog10(p, q), "df1": float(ft.df_num), "df2": float(ft.df_denom)}
    return out


def test_random_voxels_match_statsmodels(study) -> None:
    # Reference: statsmodels OLS t_test / f_test on each voxel's values (read with nibabel), to 1e-8
    # relative; one-sided p and z from scipy.stats on statsmodels' t and F.
    spec, fit, _ = study
    ids = fit.model.design.participant_ids
    coords = np.argwhere(fit.mask)
    rng = np.random.default_rng(3)
    picks = rng.choice(len(coords), size=25, replace=False)
    for col in picks:
        ijk = tuple(int(c) for c in coords[col])
        ref = _statsmodels_reference(fit, _voxel_values(spec, ids, ijk))
        assert fit.df_resid == int(ref["_"]["df"])
        assert _rel(fit.residual_variance[col], ref["_"]["residual_variance"]) <= RTOL, ijk
        for name, stats_ref in ref.items():
            if name == "_":
                continue
            m = fit.maps[name]
            for stat, value in stats_ref.items():
                if stat in ("df1", "df2"):
                    continue
                # z near 0 and -log10 p near 0 (p near 1) are compared to 1e-14 absolute there: the
                # reference z has only absolute accuracy near z = 0 (Phi^-1 near 1/2)
                floor = 1e-6 if stat in ("z", "mlog10p") else 1e-300
                assert _rel(m[stat][col], value, floor) <= RTOL, (name, stat, ijk, m[stat][col], value)


def test_maps_and_mask_cover_the_right_voxels(study) -> None:
    # Reference: the mask rule computed with numpy on the images read by nibabel (finite in every
    # image and not zero in all); common practice.
    spec, fit, out = study
    files = sorted((spec.parent / "maps").glob("*.nii.gz"))
    stack = np.stack([np.asanyarray(nib.load(p).dataobj) for p in files])
    expected = np.all(np.isfinite(stack), axis=0) & np.any(stack != 0, axis=0)
    assert np.array_equal(fit.mask, expected)
    assert fit.mask_report["voxels_in_mask"] == int(expected.sum()) == int(np.prod(SHAPE)) - 2
    assert fit.mask_report["voxels_left_out_nonfinite_in_some_images"] == 1
    assert fit.mask_report["voxels_left_out_zero_in_all_images"] == 1
    written = nib.load(out / "mask.nii.gz")
    assert np.array_equal(np.asanyarray(written.dataobj) != 0, expected)
    assert np.allclose(written.affine, AFFINE, rtol=0, atol=1e-6)


def test_written_maps_read_back(study) -> None:
    # Reference: statsmodels (as above) at random voxels, through the float32 NIfTI files read back with
    # nibabel (~1e-6 relative); nibabel for the affine and data type; the issue for the sidecar keys.
    spec, fit, out = study
    ids = fit.model.design.participant_ids
    coords = np.argwhere(fit.mask)
    rng = np.random.default_rng(4)
    picks = rng.choice(len(coords), size=6, replace=False)
    refs = {int(c): _statsmodels_reference(fit, _voxel_values(spec, ids, tuple(coords[c]))) for c in picks}
    design_cols = fit.model.design.column_names
    for h in fit.model.hypotheses.values():
        kinds = T_MAPS if h.test == "t" else F_MAPS
        assert set(fit.maps[h.name]) == set(kinds) | set(effect_size_names(h))
        for stat in kinds:
            img = nib.load(out / "hypotheses" / h.name / f"{stat}.nii.gz")
            assert img.get_data_dtype() == np.float32
            assert img.shape == SHAPE
            assert np.allclose(img.affine, AFFINE, rtol=0, atol=1e-6)
            data = np.asanyarray(img.dataobj)
            assert data.dtype == np.float32
            assert np.all(data[~fit.mask] == 0)  # outside the mask: 0
            for col, ref in refs.items():
                value = float(data[tuple(coords[col])])
                floor = 1e-4 if stat in ("z", "mlog10p") else 1e-30
                if stat in ("p_fdr", "p_bonferroni"):
                    # Reference: scipy.stats.false_discovery_control (Benjamini-Hochberg) over the mask, and
                    # Bonferroni min(1, m p), on the engine's p map.
                    p_all = fit.maps[h.name]["p"]
                    adjusted = (stats.false_discovery_control(p_all, method="bh") if stat == "p_fdr"
                                else np.minimum(1.0, p_all * p_all.size))
                    where = np.searchsorted(np.flatnonzero(fit.mask), np.ravel_multi_index(coords[col], SHAPE))
                    assert _rel(value, float(adjusted[where]), floor) <= RTOL_F32, (h.name, stat, col)
                    continue
                assert _rel(value, ref[h.name][stat], floor) <= RTOL_F32, (h.name, stat, col)
            side = json.loads((out / "hypotheses" / h.name / f"{stat}.json").read_text())
            for key in SIDECAR_KEYS:
                assert key in side, (h.name, stat, key)
            assert side["hypothesis"] == h.name and side["statistic"] == stat
            assert side["statement"] == h.statement and side["tail"] == h.tail
            assert side["df1"] == h.n_rows and side["df2"] == fit.df_resid
            assert side["software_version"] == __version__
            assert list(side["weights"]) == design_cols
            written = np.array([side["weights"][c] for c in design_cols]).T
            # written without round-off noise (snapped to simple fractions), else the weights themselves
            assert np.array_equal(written, tidy(h.weights, axis=1))
            assert np.allclose(written, h.weights, rtol=0, atol=1e-12 * np.abs(h.weights).max())
    rv = np.asanyarray(nib.load(out / "residual_variance.nii.gz").dataobj)
    assert rv.dtype == np.float32
    for col, ref in refs.items():
        assert _rel(float(rv[tuple(coords[col])]), ref["_"]["residual_variance"]) <= RTOL_F32
    side = json.loads((out / "residual_variance.json").read_text())
    assert side["statistic"] == "residual_variance" and side["software_version"] == __version__
    # F sidecars: numerator df from statsmodels' f_test
    col = next(iter(refs))
    for h in fit.model.hypotheses.values():
        if h.test == "F":
            side = json.loads((out / "hypotheses" / h.name / "F.json").read_text())
            assert side["df1"] == refs[col][h.name]["df1"] and side["df2"] == refs[col][h.name]["df2"]


# ----------------------------------------------------------------------------- NIST StRD

NIST_SETS = EASY + HARD


#: Sets with the same group column share one image study, one voxel per set (the SmLs sets come in three
#: layouts of 189, 1809 and 18009 observations): the voxel maps then hold one voxel per NIST set.
NIST_STUDIES = {"AtmWtAg": ["AtmWtAg"], "SiRstv": ["SiRstv"], "SmLs_189": ["SmLs01", "SmLs04", "SmLs07"],
                "SmLs_1809": ["SmLs02", "SmLs05", "SmLs08"], "SmLs_18009": ["SmLs03", "SmLs06", "SmLs09"]}


def _nist_study(root: Path, sets: list[str]) -> Path:
    """One observation per row, a one-way factor, and one 4-D float64 NIfTI of len(sets)x1x1 voxels.

    Voxel k holds the values of ``sets[k]``; the table holds them too (column ``y_<set>``), for the
    table-level fit.  Values are written with 17 significant digits, so both routes see the same float64
    numbers.
    """
    data = {name: read_nist(name) for name in sets}
    groups = data[sets[0]].groups
    for name in sets:
        assert np.array_equal(data[name].groups, groups)  # same layout
    root.mkdir(parents=True)
    table = pd.DataFrame({"participant_id": [f"obs{i:05d}" for i in range(groups.size)],
                          "group": [f"g{g}" for g in groups]})
    for name in sets:
        table[f"y_{name}"] = [repr(float(v)) for v in data[name].y]
    table.to_csv(root / "participants.tsv", sep="\t", index=False)
    vol = np.stack([data[name].y for name in sets]).reshape(len(sets), 1, 1, groups.size)
    nib.save(nib.Nifti1Image(vol.astype(np.float64), np.eye(4)), root / "nist.nii")
    spec = {"participants": "participants.tsv", "factors": {"group": {"coding": "effect"}},
            "terms": ["group"], "hypotheses": {"main": {"main": "group"}}, "images": "nist.nii"}
    (root / "model.json").write_text(json.dumps(spec))
    return root / "model.json"


@pytest.fixture(scope="module")
def nist_fits(tmp_path_factory):
    """Study key -> (voxel fit, {set: table fit}); each study is made and fitted once, when first asked."""
    cache: dict = {}

    def get(key: str):
        if key not in cache:
            spec = _nist_study(tmp_path_factory.mktemp("nist") / key, NIST_STUDIES[key])
            vox = fit_images(spec, progress=False)
            cache[key] = (vox, {name: fit_table(spec, f"y_{name}") for name in NIST_STUDIES[key]})
        return cache[key]

    return get


@pytest.mark.skipif(not NIST_DIR.is_dir(), reason=SKIP_REASON)
@pytest.mark.parametrize("name", NIST_SETS)
def test_nist_voxel_maps_equal_table_fit(nist_fits, name: str) -> None:
    # Reference: NIST StRD certified F and residual SD (scipy's test data). The voxel maps must reach the
    # LRE of the table-level fit of the same numbers: >= 9 on the lower and average difficulty sets; on
    # SmLs07-09 (where the float64 inputs themselves have lost digits) the same LRE as the table fit.
    key = next(k for k, sets in NIST_STUDIES.items() if name in sets)
    vox, tables = nist_fits(key)
    nist = read_nist(name)
    f_cert, sd_cert = nist.f_certified, nist.sd_certified
    assert vox.mask_report["voxels_in_mask"] == len(NIST_STUDIES[key])
    v = NIST_STUDIES[key].index(name)  # voxel (v, 0, 0); the mask is every voxel, in C order
    table = tables[name]
    f_table = float(table.result["main"].statistic[0])
    sd_table = math.sqrt(float(table.result.residual_variance[0]))
    f_vox = float(vox.maps["main"]["F"][v])
    sd_vox = math.sqrt(float(vox.residual_variance[v]))
    if name not in HARD:
        # the table fit's bar (tests/reference/test_ols_reference.py), and the same bar for the maps
        assert lre(f_table, f_cert) >= 9.0 and lre(sd_table, sd_cert) >= 9.0
        assert lre(f_vox, f_cert) >= 9.0, (f_vox, f_cert)
        assert lre(sd_vox, sd_cert) >= 9.0, (sd_vox, sd_cert)
    else:
        # about 4.2-4.4 digits, the ceiling exact arithmetic on the float64 inputs reaches (REFERENCES.md):
        # the maps must keep every digit the table fit keeps
        assert lre(f_table, f_cert) > 3.5
        assert abs(lre(f_vox, f_cert) - lre(f_table, f_cert)) <= 0.1, (f_vox, f_table)
        assert abs(lre(sd_vox, sd_cert) - lre(sd_table, sd_cert)) <= 0.1, (sd_vox, sd_table)
