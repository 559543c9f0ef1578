"""``groupmodel fit`` on surface data (GIFTI) from the command line: the mesh, TFCE and clusters, file names.

References: the TFCE of the observed map against a brute-force TFCE that relabels the mesh at every
threshold with scipy.sparse.csgraph.connected_components (Smith and Nichols 2009: the sum over thresholds
of extent^E height^H dh); the GIFTI naming convention (``.func.gii`` for data over the vertices of a
surface, common practice); exit codes 0 / 2 as documented in ``groupmodel --help``.
"""

from __future__ import annotations

import json
from pathlib import Path

import nibabel as nib
import numpy as np
import pandas as pd
import pytest
from scipy import sparse
from scipy.sparse import csgraph

from groupmodel.cli import main

ROWS, COLS = 10, 12  # a triangulated grid of 120 vertices
PATCH = [r * COLS + c for r in range(3, 7) for c in range(3, 7)]  # 16 vertices with a group difference


def grid_mesh() -> tuple[np.ndarray, np.ndarray]:
    """Vertex coordinates (mm) and triangles of a flat ROWS x COLS grid, two triangles per square."""
    r, c = np.divmod(np.arange(ROWS * COLS), COLS)
    coords = np.column_stack([c * 2.0, r * 2.0, np.zeros(r.size)]).astype(np.float32)
    faces = []
    for i in range(ROWS - 1):
        for j in range(COLS - 1):
            a, b, d, e = i * COLS + j, i * COLS + j + 1, (i + 1) * COLS + j, (i + 1) * COLS + j + 1
            faces += [(a, b, d), (b, e, d)]
    return coords, np.array(faces, dtype=np.int32)


def save_mesh(path: Path, coords: np.ndarray, faces: np.ndarray) -> None:
    arrays = [nib.gifti.GiftiDataArray(coords, intent="NIFTI_INTENT_POINTSET", datatype="NIFTI_TYPE_FLOAT32"),
              nib.gifti.GiftiDataArray(faces, intent="NIFTI_INTENT_TRIANGLE", datatype="NIFTI_TYPE_INT32")]
    nib.save(nib.gifti.GiftiImage(darrays=arrays), path)


def make_surface_study(root: Path, mesh: str | None = "surf/grid.surf.gii", n: int = 20) -> Path:
    """Two groups of n/2; group b is 2.5 noise SDs higher on the PATCH; one GIFTI data file per participant."""
    rng = np.random.default_rng(3)
    root.mkdir(parents=True)
    (root / "maps").mkdir()
    (root / "surf").mkdir()
    group = np.array(["a", "b"] * (n // 2))
    table = pd.DataFrame({"participant_id": [f"sub-{i + 1:02d}" for i in range(n)], "group": group})
    table.to_csv(root / "participants.tsv", sep="\t", index=False)
    for pid, g in zip(table["participant_id"], group, strict=True):
        y = rng.normal(0.0, 1.0, ROWS * COLS)
        if g == "b":
            y[PATCH] += 2.5
        darray = nib.gifti.GiftiDataArray(y.astype(np.float32), datatype="NIFTI_TYPE_FLOAT32")
        nib.save(nib.gifti.GiftiImage(darrays=[darray]), root / "maps" / f"{pid}.gii")
    save_mesh(root / "surf" / "grid.surf.gii", *grid_mesh())
    spec = {"participants": "participants.tsv",
            "factors": {"group": {"levels": ["a", "b"], "coding": "effect"}}, "terms": ["group"],
            "hypotheses": {"b_vs_a": {"compare": {"group": ["b", "a"]}, "tail": "greater"}},
            "images": "maps/{participant_id}.gii"}
    if mesh is not None:
        spec["inference"] = {"mesh": mesh}
    (root / "model.json").write_text(json.dumps(spec))
    return root / "model.json"


def brute_tfce_mesh(x: np.ndarray, faces: np.ndarray, dh: float, E: float = 0.5, H: float = 2.0) -> np.ndarray:
    """TFCE by relabelling the mesh at every threshold h = dh, 2 dh, ... (connected components)."""
    n = x.size
    u = np.concatenate([faces[:, 0], faces[:, 1], faces[:, 2]])
    v = np.concatenate([faces[:, 1], faces[:, 2], faces[:, 0]])
    out = np.zeros(n)
    k = 1
    while k * dh <= x.max() + 1e-9 * dh:
        h = k * dh
        on = x >= h - 1e-9 * dh
        keep = on[u] & on[v]
        g = sparse.csr_matrix((np.ones(keep.sum()), (u[keep], v[keep])), shape=(n, n))
        _, lab = csgraph.connected_components(g, directed=False)
        sizes = np.bincount(lab[on], minlength=n).astype(float)
        out[on] += sizes[lab[on]] ** E * h**H * dh
        k += 1
    return out


def _data(path: Path) -> np.ndarray:
    return np.asarray(nib.load(path).darrays[0].data, dtype=np.float64)


def test_surface_tfce_and_clusters_with_a_mesh(tmp_path, capsys) -> None:
    spec = make_surface_study(tmp_path / "study")
    out = tmp_path / "res"
    code = main(["fit", str(spec), "--out", str(out), "--permutations", "200", "--seed", "1", "--tfce",
                 "--cluster-threshold", "2.3"])
    printed = capsys.readouterr().out
    assert code == 0
    assert "120 vertices in the mask" in printed and "voxel" not in printed
    names = {p.relative_to(out).as_posix() for p in out.rglob("*") if p.is_file()}
    for stem in ("t", "p", "p_fwe", "tfce", "p_tfce_fwe", "p_cluster_fwe"):
        assert f"hypotheses/b_vs_a/{stem}.func.gii" in names, stem
    assert "mask.func.gii" in names and "residual_variance.func.gii" in names
    assert not any(n.endswith(".gii") and not n.endswith(".func.gii") for n in names)
    # TFCE of the observed t map, against relabelling the mesh at every threshold (scipy connected components)
    side = json.loads((out / "hypotheses/b_vs_a/tfce.json").read_text())
    assert side["tfce"]["connectivity"] == "mesh edges"
    t = _data(out / "hypotheses/b_vs_a/t.func.gii")
    _, faces = grid_mesh()
    np.testing.assert_allclose(_data(out / "hypotheses/b_vs_a/tfce.func.gii"),
                               brute_tfce_mesh(t, faces, side["tfce"]["dh"]), rtol=1e-5)  # float32 maps
    # The planted patch is found, and only it: one cluster of the 16 patch vertices in each table
    assert np.all(_data(out / "hypotheses/b_vs_a/p_tfce_fwe.func.gii")[PATCH] < 0.05)
    for kind in ("tfce_fwe", "cluster_extent_fwe", "voxel_fwe"):
        table = pd.read_csv(out / f"hypotheses/b_vs_a/clusters_{kind}.tsv", sep="\t")
        assert len(table) >= 1 and table["p_fwe"].iloc[0] < 0.05, kind
        assert "vertices" in json.loads((out / f"hypotheses/b_vs_a/clusters_{kind}.json").read_text())["clusters"] \
            or kind == "cluster_extent_fwe"
    extent = pd.read_csv(out / "hypotheses/b_vs_a/clusters_cluster_extent_fwe.tsv", sep="\t")
    assert extent["size"].iloc[0] <= len(PATCH) + 4
    summary = json.loads((out / "summary.json").read_text())
    assert summary["inference"]["mesh"] == str(tmp_path / "study" / "surf" / "grid.surf.gii")
    assert "vertices_p_fwe_lt_0.05" in pd.read_csv(out / "summary.tsv", sep="\t").columns


def test_surface_without_mesh_writes_no_cluster_table_and_says_why(tmp_path, capsys) -> None:
    spec = make_surface_study(tmp_path / "study", mesh=None)
    out = tmp_path / "res"
    assert main(["fit", str(spec), "--out", str(out), "--permutations", "50"]) == 0
    printed = capsys.readouterr().err  # warnings go to stderr
    assert not list(out.glob("*clusters*"))  # before: a 1-byte empty table
    summary = json.loads((out / "summary.json").read_text())
    assert any("no cluster tables" in w and "inference.mesh" in w for w in summary["warnings"])
    assert "warning: no cluster tables" in printed
    assert (out / "hypotheses/b_vs_a/p_fwe.func.gii").exists()


def test_surface_mesh_without_tfce_gives_the_voxel_fwe_table(tmp_path, capsys) -> None:
    spec = make_surface_study(tmp_path / "study")
    out = tmp_path / "res"
    assert main(["fit", str(spec), "--out", str(out), "--permutations", "100"]) == 0
    table = pd.read_csv(out / "hypotheses/b_vs_a/clusters_voxel_fwe.tsv", sep="\t")
    assert len(table) >= 1 and set(table["cluster"]) >= {1}
    assert "no cluster tables" not in capsys.readouterr().out


@pytest.mark.parametrize("problem", ["missing", "other_surface", "no_triangles"])
def test_bad_mesh_is_one_line_error_and_nothing_written(tmp_path, capsys, problem) -> None:
    spec = make_surface_study(tmp_path / "study")
    mesh = tmp_path / "study" / "surf" / "grid.surf.gii"
    coords, faces = grid_mesh()
    if problem == "missing":
        mesh.unlink()
    elif problem == "other_surface":
        save_mesh(mesh, coords[:-COLS], faces[: 2 * (COLS - 1) * (ROWS - 2)])  # one row of vertices fewer
    else:
        nib.save(nib.gifti.GiftiImage(darrays=[nib.gifti.GiftiDataArray(coords, intent="NIFTI_INTENT_POINTSET")]),
                 mesh)
    out = tmp_path / "res"
    code = main(["fit", str(spec), "--out", str(out), "--permutations", "20", "--tfce"])
    err = capsys.readouterr().err.strip().splitlines()
    assert code == 2 and len(err) == 1 and err[0].startswith("groupmodel: error: inference.mesh ")
    assert not out.exists()


def test_schema_accepts_mesh_and_rejects_a_non_string(tmp_path, capsys) -> None:
    spec = make_surface_study(tmp_path / "study")
    body = json.loads(spec.read_text())
    body["inference"]["mesh"] = 3
    spec.write_text(json.dumps(body))
    assert main(["fit", str(spec), "--out", str(tmp_path / "res"), "--permutations", "20", "--tfce"]) == 2
    assert "inference" in capsys.readouterr().err
