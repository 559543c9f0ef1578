"""Resident memory of a spilled fit stays near the budget (the issue: peak memory under --memory plus a
fixed overhead, for any number of participants).

tracemalloc (tests/unit/test_images.py) sees Python allocations only; pages of a memory-mapped spill count
in the process's resident set too, so this test measures the resident high-water mark of a subprocess.
"""

from __future__ import annotations

import json
import subprocess
import sys
import textwrap

PROBE = textwrap.dedent(
    """
    import json, resource, sys, tempfile
    from pathlib import Path
    import nibabel as nib, numpy as np, pandas as pd
    from groupmodel.images import check_images, load_masked, load_overhead_bytes, resolve_images

    n, shape, budget = 250, (40, 48, 40), 8 * 2**20
    d = Path(tempfile.mkdtemp())
    rng = np.random.default_rng(0)
    ids = [f"sub-{i:03d}" for i in range(n)]
    for pid in ids:
        nib.save(nib.Nifti1Image(rng.normal(size=shape).astype(np.float32), np.eye(4)), d / f"{pid}.nii")
    src, _ = check_images(resolve_images("{participant_id}.nii", ids, pd.DataFrame({"participant_id": ids}), d))
    before = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024
    total = 0.0
    with load_masked(src, None, budget) as m:
        spilled, data_bytes = m.spilled, m.data.nbytes
        for _, y in m.chunks(2000):
            total += float(y[0, 0])
    after = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024
    print(json.dumps({"growth": after - before, "budget": budget, "overhead": load_overhead_bytes(src.grid),
                      "spilled": spilled, "data_bytes": data_bytes}))
    """
)


def test_spilled_load_and_chunks_keep_resident_memory_near_the_budget() -> None:
    out = subprocess.run([sys.executable, "-c", PROBE], capture_output=True, text=True, check=True)
    r = json.loads(out.stdout.strip().splitlines()[-1])
    assert r["spilled"] and r["data_bytes"] > 8 * r["budget"]
    # 16 MiB of slack for the allocator and numpy temporaries (common practice for RSS measurements).
    assert r["growth"] <= r["budget"] + r["overhead"] + 16 * 2**20, r
    assert r["growth"] < r["data_bytes"] / 2, r  # the spilled matrix itself never becomes resident
