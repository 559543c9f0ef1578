"""The local Dask cluster the cluster tests share within a module: 2 single-threaded worker processes."""

from __future__ import annotations

from collections.abc import Iterator
from typing import Any

import pytest


@pytest.fixture(scope="module")
def client() -> Iterator[Any]:
    distributed = pytest.importorskip("distributed", reason='Dask is an optional extra: pip install -e ".[cluster]"')
    cluster = distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True, dashboard_address=":0",
                                       silence_logs=40)
    with distributed.Client(cluster) as c:
        yield c
    cluster.close()
