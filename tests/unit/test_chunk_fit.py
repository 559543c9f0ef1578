"""The per-chunk fit task (``groupmodel.analysis.chunk_fit.ChunkFit``) cut into sub-chunks fitted in threads.

The claim: the parts of a chunk are the same bits with 1, 2 or 3 threads (the cut changes no voxel's values
and the participant sums are added block by block in the same order).  References beside each check: the task
itself with one thread; numpy on the same numbers for the participant sums; scipy.stats.levene for the
unequal-variance counts (the rule of ``groupmodel.engine.variance_check``, written out here).
"""

from __future__ import annotations

import dataclasses
from functools import partial

import numpy as np
import pytest
from scipy import stats

from groupmodel.analysis.chunk_fit import MIN_THREADED_VOXELS, ChunkFit, sub_chunks
from groupmodel.analysis.unequal_variances import _Factor, chunk_counts
from groupmodel.engine.ols import Test, prepare
from groupmodel.engine.participant_check import sums_step
from groupmodel.engine.welch import group_residual_df

N, V = 36, 3 * MIN_THREADED_VOXELS + 517  # wide enough for 3 sub-chunks, not a multiple of the blocks


def _task(threads: int) -> tuple[ChunkFit, np.ndarray, np.ndarray]:
    rng = np.random.default_rng(7)
    labels = np.repeat([0, 1, 2], N // 3)
    age = rng.normal(0.0, 10.0, N)
    x = np.column_stack([np.ones(N), labels == 1, labels == 2, age]).astype(float)
    tests = [Test("b_vs_a", np.array([0.0, 1.0, 0.0, 0.0]), "t"),
             Test("group", np.array([[0.0, 1.0, 0.0, 0.0], [0.0, 0.0, 1.0, 0.0]]), "F"),
             Test("age", np.array([0.0, 0.0, 0.0, 1.0]), "t", tail="less")]
    prepared = prepare(x, tests)
    # group c has three times the SD of a and b in a third of the voxels
    sd = np.where((labels == 2)[:, None] & (np.arange(V) % 3 == 0)[None, :], 3.0, 1.0)
    y = (rng.standard_normal((N, V)) * sd + 5.0).astype(np.float32)
    y[:, 11] = np.nan  # a voxel without data: left out of the sums
    factor = _Factor("group", ("a", "b", "c"), labels, group_residual_df(prepared.u, labels, 3))
    return ChunkFit(prepared, x, partial(chunk_counts, (factor,)), threads=threads), y, x


def _equal(a: object, b: object) -> bool:
    if isinstance(a, np.ndarray):
        return isinstance(b, np.ndarray) and a.shape == b.shape and np.array_equal(a, b, equal_nan=True)
    if isinstance(a, dict):
        return isinstance(b, dict) and a.keys() == b.keys() and all(_equal(a[k], b[k]) for k in a)
    if dataclasses.is_dataclass(a):
        return all(_equal(getattr(a, f.name), getattr(b, f.name)) for f in dataclasses.fields(a))
    return a == b


@pytest.mark.parametrize("threads", [2, 3])
def test_sub_chunks_give_the_same_bits(threads: int) -> None:
    one, y, _ = _task(1)
    many = dataclasses.replace(one, threads=threads)
    assert len(sub_chunks(V, threads, sums_step(N))) == threads
    a, b = one(y), many(y)
    assert _equal(a.fit, b.fit)  # effects, SEs, statistics, p, z, coefficients: identical
    assert np.array_equal(a.mean, b.mean, equal_nan=True)
    assert np.array_equal(a.sums, b.sums)
    assert a.counts == b.counts


def test_sub_chunks_cut_on_the_sum_blocks() -> None:
    step = sums_step(N)
    cuts = sub_chunks(V, 3, step)
    assert cuts[0].start == 0 and cuts[-1].stop == V
    assert all(c.stop == d.start and c.start % step == 0 for c, d in zip(cuts, cuts[1:], strict=False))
    assert sub_chunks(2 * MIN_THREADED_VOXELS - 1, 2, step) == [slice(0, 2 * MIN_THREADED_VOXELS - 1)]
    assert sub_chunks(V, 1, step) == [slice(0, V)]


def test_parts_against_numpy_and_scipy() -> None:
    work, y, x = _task(2)
    parts = work(y)
    # Reference: numpy -- OLS residuals by lstsq, |residual| summed over the voxels with data.
    yy = y.astype(np.float64)
    keep = np.isfinite(yy).all(axis=0)
    beta = np.linalg.lstsq(x, yy[:, keep], rcond=None)[0]
    resid = yy[:, keep] - x @ beta
    np.testing.assert_allclose(parts.sums, np.abs(resid).sum(axis=1), rtol=1e-10)
    np.testing.assert_allclose(parts.mean[keep], yy[:, keep].mean(axis=0), rtol=1e-12)
    # Reference: scipy.stats.levene (centred on medians) and the group variances RSS_g / rho_g, per voxel.
    labels = np.repeat([0, 1, 2], N // 3)
    rho = group_residual_df(work.prepared.u, labels, 3)
    var = np.stack([(resid[labels == g] ** 2).sum(axis=0) / rho[g] for g in range(3)])
    p = stats.levene(*[resid[labels == g] for g in range(3)], center="median", axis=0).pvalue
    flagged = int(np.count_nonzero((var.max(axis=0) / var.min(axis=0) > 2.0) & (p < 0.05)))
    assert parts.counts["group"] == (flagged, int(keep.sum()))
    assert flagged > V // 5  # the planted third of the voxels, mostly
