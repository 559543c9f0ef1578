"""Maps carried to worker processes through shared-memory slots (:mod:`groupmodel.inference.map_slots`).

The claim is bit-identity: the workers read the same float64 values in place instead of unpickling a copy,
so the TFCE and cluster nulls, and the p maps, are the same bits as computed in one process, with or
without slots.  Outside reference for the values: tests/reference/test_tfce_reference.py (scipy.ndimage.label).
"""

from __future__ import annotations

import os

import numpy as np
import pytest
from scipy import ndimage

from groupmodel.inference import map_slots
from groupmodel.inference.driver import run_permutations
from groupmodel.inference.graph import grid_adjacency
from groupmodel.inference.map_slots import MapSlots
from groupmodel.inference.results import ClusterResult, TfceResult
from groupmodel.inference.settings import ContrastTest, Execution, MapSettings, Rearrangements
from groupmodel.inference.tfce import TfceParams
from groupmodel.inference.whole_maps import MapWorkers


def _study():
    rng = np.random.default_rng(4)
    mask = np.ones((9, 10, 8), bool)
    n = 16
    X = np.column_stack([np.ones(n), np.r_[np.zeros(8), np.ones(8)]])
    Y = np.stack([ndimage.gaussian_filter(rng.standard_normal(mask.shape), 1.0)[mask] for _ in range(n)])
    Y[8:, :100] += 0.8
    return mask, X, Y


def _run(mask, X, Y, execution):
    adj = grid_adjacency(mask)
    return run_permutations(ContrastTest(X, np.array([[0, 1.0]])), Y, Rearrangements(n_perm=120, seed=3),
                            MapSettings(adjacency=adj, tfce=TfceParams(), cluster_z=2.3), execution)


def _same(a, b):
    for kind in (TfceResult, ClusterResult):
        np.testing.assert_array_equal(a.whole_map(kind).p_fwe, b.whole_map(kind).p_fwe)
    np.testing.assert_array_equal(a.whole_map(TfceResult).max_null, b.whole_map(TfceResult).max_null)
    np.testing.assert_array_equal(a.whole_map(ClusterResult).max_null, b.whole_map(ClusterResult).max_null)


@pytest.mark.skipif(not os.path.isdir(map_slots.SHARED_DIR), reason="no /dev/shm on this system")
def test_workers_with_slots_give_the_same_bits_and_clean_up():
    mask, X, Y = _study()
    inline = _run(mask, X, Y, Execution(batch_size=25))
    adj = grid_adjacency(mask)
    with MapWorkers(2, adj) as workers:
        adj_run = run_permutations(
            ContrastTest(X, np.array([[0, 1.0]])), Y, Rearrangements(n_perm=120, seed=3),
            MapSettings(adjacency=adj, tfce=TfceParams(), cluster_z=2.3), Execution(batch_size=25, workers=workers))
        assert workers.slots is not None  # the maps went through slots
        folder = workers.slots.folder
        assert os.path.isdir(folder)
    assert not os.path.exists(folder)  # removed on close
    _same(inline, adj_run)


def test_without_shared_memory_the_maps_go_as_pickles(monkeypatch, tmp_path):
    monkeypatch.setattr(map_slots, "SHARED_DIR", str(tmp_path / "missing"))
    mask, X, Y = _study()
    inline = _run(mask, X, Y, Execution(batch_size=25))
    pickled = _run(mask, X, Y, Execution(batch_size=25, n_jobs=2))
    _same(inline, pickled)


def test_slots_wait_for_a_free_one_and_refuse_what_does_not_fit(tmp_path, monkeypatch):
    monkeypatch.setattr(map_slots, "SHARED_DIR", str(tmp_path))
    slots = MapSlots.create(3, 5, 2)
    assert slots is not None
    a = slots.put(np.ones((3, 5)))
    b = slots.put(np.full((2, 5), 2.0))
    assert a is not None and b is not None and a.path != b.path
    np.testing.assert_array_equal(map_slots._read(b), np.full((2, 5), 2.0))
    assert not slots.fits(np.ones((4, 5))) and not slots.fits(np.ones((3, 6)))
    slots.release(a)
    c = slots.put(np.zeros((1, 5)))
    assert c is not None and c.path == a.path  # reused, not a third file
    slots.close()
    assert not os.path.exists(slots.folder)
