"""Shared fixtures."""

from __future__ import annotations

import pytest

from groupmodel.inference.fastpath import ENV_NO_COMPILED, compiled_kernels, compiled_scan

NO_NUMBA = 'numba is not installed (optional extra "fast": pip install -e ".[test,fast]"); compiled path not tested'


@pytest.fixture(params=["numpy", "compiled"])
def tfce_path(request: pytest.FixtureRequest, monkeypatch: pytest.MonkeyPatch) -> str:
    """Run a test once on the numpy implementation of TFCE and clusters and once on the compiled kernels
    (skipped when numba is not installed)."""
    if request.param == "numpy":
        monkeypatch.setenv(ENV_NO_COMPILED, "1")
    else:
        monkeypatch.delenv(ENV_NO_COMPILED, raising=False)
        if compiled_kernels() is None:
            pytest.skip(NO_NUMBA)
    return request.param


@pytest.fixture
def kernels():
    """The compiled TFCE and cluster kernels (the test is skipped when numba is not installed)."""
    if compiled_kernels() is None:
        pytest.skip(NO_NUMBA)
    return compiled_kernels()


@pytest.fixture
def fused():
    """The compiled max-statistic scan (the test is skipped when numba is not installed)."""
    if compiled_scan() is None:
        pytest.skip(NO_NUMBA)
    return compiled_scan()
