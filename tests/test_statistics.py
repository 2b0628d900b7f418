"""Errors of correlated time averages against analytic results."""

import numpy as np
import pytest

from blocking_reference import reference_blocking
from dihedra.numerics.statistics import blocking_error, statistical_inefficiency

#: dihedra's compiled blocking and the plain NumPy reference implementation
BLOCKING = {"compiled": blocking_error, "reference": reference_blocking}


def ar1(rho, n, seed):
    rng = np.random.default_rng(seed)
    e = rng.normal(size=n)
    x = np.empty(n)
    x[0] = e[0] / np.sqrt(1 - rho**2)
    for i in range(1, n):
        x[i] = rho * x[i - 1] + e[i]
    return x


def test_statistical_inefficiency_of_ar1():
    # analytic: AR(1) with rho has g = (1 + rho) / (1 - rho); rho = 0.9 gives 19 (g as defined by
    # Chodera, Swope, Pitera, Seok & Dill, J. Chem. Theory Comput. 3 (2007) 26)
    g = statistical_inefficiency(ar1(0.9, 400_000, 1))
    assert g == pytest.approx(19.0, rel=0.1)


def test_statistical_inefficiency_of_white_noise_is_one():
    # analytic: uncorrelated samples have g = 1
    assert statistical_inefficiency(np.random.default_rng(2).normal(size=50_000)) == pytest.approx(1.0, abs=0.1)


@pytest.mark.parametrize("blocking", ["compiled", "reference"])
def test_blocking_error_of_independent_bernoulli_samples(blocking):
    # analytic: the standard error of a fraction of N independent samples is sqrt(p(1-p)/N)
    rng = np.random.default_rng(4)
    n, p = 64_000, 0.3
    ind = (rng.random(n) < p).astype(float)
    blocks = ind.reshape(64, -1)
    mean, se, n_eff = BLOCKING[blocking](blocks.sum(1), np.full(64, blocks.shape[1]), np.zeros(64, int))
    assert se == pytest.approx(np.sqrt(p * (1 - p) / n), rel=0.3)
    assert n_eff == pytest.approx(n, rel=0.6)


@pytest.mark.parametrize("blocking", ["compiled", "reference"])
def test_blocking_error_of_correlated_indicator_matches_inefficiency(blocking):
    # analytic route (Chodera, Swope, Pitera, Seok & Dill, J. Chem. Theory Comput. 3 (2007) 26)
    # against blocking (Flyvbjerg & Petersen, J. Chem. Phys. 91 (1989) 461)
    errs, refs = [], []
    for seed in range(4):
        ind = (ar1(0.95, 256_000, seed) > 0.5).astype(float)
        g = statistical_inefficiency(ind)
        refs.append(np.sqrt(ind.var() * g / len(ind)))
        b = ind.reshape(64, -1)
        errs.append(BLOCKING[blocking](b.sum(1), np.full(64, b.shape[1]), np.zeros(64, int))[1])
    # blocking takes the largest level: at least the g-based error, within a factor 1.6
    assert np.mean(errs) == pytest.approx(np.mean(refs), rel=0.35)


def test_blocks_of_different_replicas_are_never_merged():
    # replica 0 always in the state, replica 1 never: pooled mean 0.5, finite error
    v = np.concatenate([np.full(16, 10.0), np.zeros(16)])
    w = np.full(32, 10.0)
    r = np.repeat([0, 1], 16)
    mean, se, _ = blocking_error(v, w, r)
    assert mean == pytest.approx(0.5)
    assert se > 0.1  # two replicas that disagree completely: a large error
