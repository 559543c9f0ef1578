"""Validity of Freedman-Lane max-statistic FWE control under simulated nulls (slow).

Outside reference: Winkler et al. (2014, NeuroImage 92:381-397) and Nichols and Holmes (2002): with
exchangeable (permutation) or symmetric (sign flips) errors, the max-statistic test controls the
family-wise error rate at its nominal level, also with a nuisance covariate correlated with the
effect of interest.  The observed rate of studies with any FWE rejection at 0.05 must lie in the
binomial 99% interval (scipy.stats.binom.interval).
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from groupmodel.inference.driver import run_permutations
from groupmodel.inference.settings import ContrastTest, Rearrangements

N_SIM = 1000
N_PERM = 200  # p <= 0.05 means at most 10 of 200: a size of exactly 0.05 for continuous data
N_OBS = 24
N_VOX = 20


def _errors(rng, kind, shape):
    if kind == "gauss":
        return rng.standard_normal(shape)
    if kind == "skewed":
        return rng.exponential(1.0, shape) - 1.0  # exchangeable, not symmetric
    if kind == "laplace":
        return rng.laplace(0.0, 1.0, shape)  # symmetric, heavy tails
    raise ValueError(kind)


def _scenario(name, rng):
    n = N_OBS
    if name in ("groups-gauss", "groups-skewed"):
        group = np.r_[np.zeros(n // 2), np.ones(n // 2)]
        nuis = 0.8 * group + rng.standard_normal(n) * 0.6  # correlated with the effect of interest
        X = np.column_stack([np.ones(n), group, nuis - nuis.mean()])
        L, err = [0, 1, 0], name.split("-")[1]
    elif name == "slope-skewed":
        x = rng.standard_normal(n)
        nuis = 0.7 * x + 0.7 * rng.standard_normal(n)
        X = np.column_stack([np.ones(n), x, nuis])
        L, err = [0, 1, 0], "skewed"
    elif name == "onesample-laplace":
        nuis = rng.standard_normal(n)
        X = np.column_stack([np.ones(n), nuis - nuis.mean()])
        L, err = [1, 0], "laplace"
    else:
        raise ValueError(name)
    # Null for the effect of interest; the nuisance has a real effect that must be removed.
    beta = np.zeros(X.shape[1])
    beta[-1] = 2.0
    if name != "onesample-laplace":
        beta[0] = 5.0
    Y = (X @ beta)[:, None] + _errors(rng, err, (n, N_VOX))
    return X, L, Y


@pytest.mark.slow
@pytest.mark.parametrize("name", ["groups-gauss", "groups-skewed", "slope-skewed", "onesample-laplace"])
def test_fwe_rate_is_nominal(name):
    rng = np.random.default_rng(sum(map(ord, name)))
    hits = 0
    method = None
    for i in range(N_SIM):
        X, L, Y = _scenario(name, rng)
        res = run_permutations(ContrastTest(X, L, tail="two-sided"), Y, Rearrangements(n_perm=N_PERM, seed=1000 + i))
        method = res.method
        hits += bool(np.nanmin(res.p_fwe) <= 0.05)
    lo, hi = stats.binom.interval(0.99, N_SIM, 0.05)  # scipy.stats.binom 99% interval
    rate = hits / N_SIM
    print(
        f"{name}: method {method}, FWE rate {rate:.3f} ({hits}/{N_SIM}), "
        f"99% interval [{lo / N_SIM:.3f}, {hi / N_SIM:.3f}]"
    )
    assert method == ("flip" if name.startswith("onesample") else "permute")
    assert lo <= hits <= hi
