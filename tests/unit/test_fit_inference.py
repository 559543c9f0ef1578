"""Corrected inference through the voxelwise fit: reproducibility, records, tables and the command line.

The statistics themselves are checked against outside references (scipy.stats.permutation_test, brute-force
Freedman-Lane, Benjamini and Hochberg 1995, the TFCE plateau) in tests/reference/test_inference_reference.py
and tests/reference/test_tfce_reference.py; here the reference is the fit itself under other settings.
"""

from __future__ import annotations

import json
from dataclasses import replace
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from scipy import stats
from test_fit_voxelwise import make_study

from groupmodel.analysis.corrections import InferenceOptions
from groupmodel.cli import main
from groupmodel.errors import InputError
from groupmodel.fit import fit_images

OPTS = InferenceOptions(permutations=40, seed=3, tfce=True, cluster_threshold=2.3)
PERM_MAPS = ("p_perm", "p_fwe", "tfce", "p_tfce_fwe", "p_cluster_fwe")


def _same(a: np.ndarray, b: np.ndarray, stat: str, label: str) -> None:
    """p values identical; TFCE values to 1e-10 (BLAS may round the last bits by product shape)."""
    if stat == "tfce":
        np.testing.assert_allclose(a, b, rtol=1e-10, atol=0, err_msg=label)
    else:
        np.testing.assert_array_equal(a, b, err_msg=label)


@pytest.fixture(scope="module")
def study(tmp_path_factory) -> Path:
    return make_study(tmp_path_factory.mktemp("fitinf") / "study", n=20)


@pytest.fixture(scope="module")
def reference_fit(study):
    return fit_images(study, progress=False, inference=OPTS)


def test_same_seed_same_maps_whatever_the_chunk_size(study, reference_fit) -> None:
    # Reference: the same fit with all voxels in one chunk; the issue asks for identical maps whatever the
    # chunk size or memory budget.
    for chunk in (1, 17):
        other = fit_images(study, progress=False, inference=OPTS, chunk_voxels=chunk)
        for name, maps in reference_fit.maps.items():
            for stat in PERM_MAPS:
                _same(other.maps[name][stat], maps[stat], stat, f"{name} {stat} chunk {chunk}")
    small = fit_images(study, progress=False, inference=OPTS, memory_bytes=200_000)
    for name, maps in reference_fit.maps.items():
        for stat in PERM_MAPS:
            _same(small.maps[name][stat], maps[stat], stat, f"{name} {stat} small budget")
    # Threads for the products and worker processes for TFCE and clusters (the reference uses the defaults:
    # as many of each as there are cores).
    for threads, jobs in ((1, 1), (3, 2)):
        opts = replace(OPTS, threads=threads, jobs=jobs)
        other = fit_images(study, progress=False, inference=opts, chunk_voxels=150)
        for name, maps in reference_fit.maps.items():
            for stat in PERM_MAPS:
                _same(other.maps[name][stat], maps[stat], stat, f"{name} {stat} threads {threads} jobs {jobs}")


def test_another_seed_gives_another_permutation_set(study, reference_fit) -> None:
    other = fit_images(study, progress=False, inference=InferenceOptions(permutations=40, seed=4))
    differs = [not np.array_equal(other.maps[n]["p_perm"], m["p_perm"]) for n, m in reference_fit.maps.items()]
    assert any(differs)


def test_permutation_p_bounds_and_records(reference_fit) -> None:
    # Facts of the method (Nichols and Holmes 2002; common practice): p >= 1/J with the identity counted,
    # FWE p >= uncorrected p, and p_fdr >= p.
    for name, maps in reference_fit.maps.items():
        rec = reference_fit.records[name]
        J = rec["permutations"]
        assert rec["seed"] == 3 and rec["nuisance_method"] == "Freedman-Lane"
        assert rec["method"] in ("permutation", "sign_flip", "both")
        assert np.all(maps["p_perm"] >= 1.0 / J - 1e-15)
        assert np.all(maps["p_fwe"] >= maps["p_perm"] - 1e-15)
        assert np.all(maps["p_fdr"] >= maps["p"] - 1e-15)
        # Reference: scipy.stats.false_discovery_control (Benjamini-Hochberg) on the parametric p map.
        np.testing.assert_allclose(maps["p_fdr"], stats.false_discovery_control(maps["p"], method="bh"))
        assert "tfce" in rec and rec["tfce"]["E"] == 0.5 and rec["tfce"]["H"] == 2.0 and rec["tfce"]["dh"] > 0
        # The step derived from the observed maximum is recorded with its rule, to 6 significant digits.
        assert rec["tfce"]["dh_from"] == "largest observed value / 100, rounded to 6 significant digits"
        assert rec["tfce"]["dh"] == float(f"{rec['tfce']['dh']:.6g}")
        assert rec["cluster"]["z_threshold"] == 2.3


def test_one_sample_model_uses_sign_flips(tmp_path) -> None:
    # Common practice: with nothing to shuffle (intercept only), rearrange by sign flips; with n = 6 there are
    # 2^6 = 64 flips, fewer than asked for, so all are enumerated and the result is exact.
    spec_path = make_study(tmp_path / "one", n=6)
    spec = json.loads(spec_path.read_text())
    spec.update(factors={}, covariates={}, terms=[], hypotheses={"mean": {"mean": {}}})
    spec_path.write_text(json.dumps(spec))
    fit = fit_images(spec_path, progress=False, inference=InferenceOptions(permutations=100, seed=1))
    rec = fit.records["mean"]
    assert rec["method"] == "sign_flip" and rec["exhaustive"] is True and rec["permutations"] == 64
    assert np.all(fit.maps["mean"]["p_perm"] >= 1 / 64 - 1e-15)


def test_cli_writes_permutation_maps_sidecars_and_cluster_tables(study, tmp_path, capsys) -> None:
    out = tmp_path / "res"
    code = main(["fit", str(study), "--out", str(out), "--permutations", "30", "--seed", "7", "--tfce",
                 "--cluster-threshold", "2.3"])
    assert code == 0
    printed = capsys.readouterr().out
    assert "permutation inference: seed 7, Freedman-Lane" in printed
    assert "  group: row permutation, 30 rearrangements" in printed
    side = json.loads((out / "hypotheses/group/p_tfce_fwe.json").read_text())
    for key in ("hypothesis", "statistic", "method", "permutations", "exhaustive", "seed", "tfce", "df1", "df2"):
        assert key in side, key
    assert side["statistic"] == "p_tfce_fwe" and side["seed"] == 7 and side["permutations"] == 30
    for kind in ("voxel_fwe", "tfce_fwe", "cluster_extent_fwe"):
        table = pd.read_csv(out / f"hypotheses/group/clusters_{kind}.tsv", sep="\t")
        assert list(table.columns[:4]) == ["cluster", "sign", "size", "peak_stat"]
        meta = json.loads((out / f"hypotheses/group/clusters_{kind}.json").read_text())
        assert meta["statistic"] == f"clusters_{kind}" and "clinical" in meta["note"] and "p_fwe" in meta["columns"]
    summary = json.loads((out / "summary.json").read_text())
    assert summary["inference"]["permutations"] == 30


def test_blocks_column_recorded_and_missing_block_refused(study, tmp_path) -> None:
    table = pd.read_csv(study.parent / "participants.tsv", sep="\t", dtype=str)
    table["family"] = [f"fam{i // 2}" for i in range(len(table))]
    table.to_csv(study.parent / "participants.tsv", sep="\t", index=False)
    try:
        fit = fit_images(study, progress=False, inference=InferenceOptions(permutations=20, seed=1, blocks="family"))
        assert fit.records["group"]["blocks"] == "family"
        table.loc[3, "family"] = "n/a"
        table.to_csv(study.parent / "participants.tsv", sep="\t", index=False)
        with pytest.raises(InputError, match=r"row 4, column 'family'.*n/a"):
            fit_images(study, progress=False, inference=InferenceOptions(permutations=20, blocks="family"))
    finally:
        table.drop(columns="family").to_csv(study.parent / "participants.tsv", sep="\t", index=False)


@pytest.mark.parametrize("option", ["--threads", "--jobs"])
def test_zero_threads_or_jobs_is_a_usage_error(study, tmp_path, capsys, option) -> None:
    with pytest.raises(SystemExit) as exc:  # refused by the argument parser, before any work
        main(["fit", str(study), "--out", str(tmp_path / "x"), "--permutations", "10", option, "0"])
    assert exc.value.code == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and f"argument {option}: expected a whole number >= 1, found 0" in err
    assert not (tmp_path / "x").exists()


def test_tfce_without_permutations_is_a_usage_error(study, tmp_path, capsys) -> None:
    code = main(["fit", str(study), "--out", str(tmp_path / "x"), "--tfce"])
    assert code == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "--permutations" in err
    assert not (tmp_path / "x").exists()
