"""Errors of correlated time averages against analytic results."""

import numpy as np
import pytest

from blocking_reference import reference_blocking
from dihedra.numerics.statistics import blocking_error, statistical_inefficiencies, statistical_inefficiency

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


def _inefficiency_by_definition(x, mintime=3):
    """g = 1 + 2 sum_t (1 - t/N) C_t over lags t = 1, 2, ... up to the first lag past ``mintime``
    with C_t <= 0 (Chodera et al. 2007), every C_t summed directly, no FFT."""
    x = np.asarray(x, dtype=float)
    n = len(x)
    dx = x - x.mean()
    var = np.mean(dx * dx)
    g = 1.0
    for t in range(1, n):
        c = np.sum(dx[:n - t] * dx[t:]) / (n - t) / var
        if c <= 0 and t > mintime:
            break
        g += 2.0 * (1.0 - t / n) * c
    return max(1.0, g)


def test_statistical_inefficiency_of_every_column_is_the_definition():
    # the FFT of all columns at once against the sum of the definition, lag by lag, column by
    # column: white noise, random walks (g near N), indicators, short and long series
    rng = np.random.default_rng(4)
    for n in (2, 3, 5, 17, 64, 301):
        x = np.c_[rng.normal(size=n), np.cumsum(rng.normal(size=n)), (rng.random(n) < 0.3).astype(float),
                  np.repeat(rng.normal(size=(n + 4) // 5), 5)[:n]]
        got = statistical_inefficiencies(x)
        want = [_inefficiency_by_definition(x[:, j]) for j in range(x.shape[1])]
        np.testing.assert_allclose(got, want, rtol=1e-9)
        assert [statistical_inefficiency(x[:, j]) for j in range(x.shape[1])] == pytest.approx(want, rel=1e-9)


def test_a_constant_series_has_no_correlation_whatever_its_mean_rounds_to():
    # ten blocks of the same population 0.1 (or 5/6): the mean of the floats is not exactly 0.1,
    # and the autocorrelation of that rounding is not a signal (it gave g = N, an error inflated
    # by sqrt(N) where the variance floor applies)
    from dihedra.numerics.convergence import series_error, series_errors

    for value in (0.1, 5 / 6, 5 / 11):
        x = np.full(10, value)
        assert statistical_inefficiency(x) == 1.0
        assert series_error(x) == (pytest.approx(value), 0.0, 1.0)
        _, se, g = series_errors(np.c_[x, np.arange(10.0)], var_floor=[0.01, 0.0])
        assert g[0] == 1.0 and se[0] == pytest.approx(np.sqrt(0.01 / 10))


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


# --- pooling over torsions that may differ: random effects ------------------------------------

# BCG vaccine trials (Colditz et al., JAMA 271 (1994) 698): treated/control tuberculosis cases and
# non-cases of the 13 trials, the standard worked example of random-effects meta-analysis
BCG = np.array([[4, 119, 11, 128], [6, 300, 29, 274], [3, 228, 11, 209], [62, 13536, 248, 12619],
                [33, 5036, 47, 5761], [180, 1361, 372, 1079], [8, 2537, 10, 619], [505, 87886, 499, 87892],
                [29, 7470, 45, 7232], [17, 1699, 65, 1600], [186, 50448, 141, 27197], [5, 2493, 3, 2338],
                [27, 16886, 29, 17825]], dtype=float)


def test_dersimonian_laird_on_the_bcg_trials():
    from scipy.stats import chi2

    from dihedra.numerics.heterogeneity import dersimonian_laird

    tp, tn, cp, cn = BCG.T
    y = np.log((tp / (tp + tn)) / (cp / (cp + cn)))          # log risk ratios
    v = 1 / tp - 1 / (tp + tn) + 1 / cp - 1 / (cp + cn)
    r = dersimonian_laird(y, v)
    # the published DerSimonian-Laird analysis of these trials (from memory, as reported e.g. by
    # Viechtbauer, J. Stat. Softw. 36 (2010) 3): Q(12) = 152.23, tau^2 = 0.3088, I^2 = 92.12 %,
    # random-effects log risk ratio -0.7141 +- 0.1787
    assert r.df == 12
    assert r.q == pytest.approx(152.233, abs=1e-3)
    assert r.tau_squared == pytest.approx(0.3088, abs=1e-4)
    assert r.i_squared == pytest.approx(0.9212, abs=1e-4)
    assert r.mean == pytest.approx(-0.7141, abs=1e-4)
    assert r.se == pytest.approx(0.1787, abs=1e-4)
    # Higgins & Thompson (2002): I^2 = (H^2 - 1) / H^2 with H^2 = Q / df; the p-value is the
    # upper tail of chi-square (SciPy's survival function, computed here independently)
    h2 = r.q / r.df
    assert r.i_squared == pytest.approx((h2 - 1) / h2)
    assert r.p_value == pytest.approx(chi2.sf(152.233, 12), rel=1e-3)


def test_dersimonian_laird_recovers_a_known_between_item_variance():
    # analytic model: y_i = mu + u_i + e_i, u ~ N(0, tau^2), e ~ N(0, v_i); the method-of-moments
    # estimate is unbiased before truncation, so its mean over many meta-analyses is near tau^2
    from dihedra.numerics.heterogeneity import dersimonian_laird

    rng = np.random.default_rng(7)
    tau2, got = 0.04, []
    for _ in range(400):
        v = rng.uniform(0.005, 0.03, 30)
        y = 0.5 + rng.normal(0, np.sqrt(tau2), 30) + rng.normal(0, np.sqrt(v))
        got.append(dersimonian_laird(y, v).tau_squared)
    assert np.mean(got) == pytest.approx(tau2, rel=0.1)
    # no heterogeneity: Q ~ chi-square(k - 1), so p is uniform and I^2 is 0 at least half the time
    ps, zero = [], 0
    for _ in range(400):
        v = rng.uniform(0.005, 0.03, 30)
        r = dersimonian_laird(0.5 + rng.normal(0, np.sqrt(v)), v)
        ps.append(r.p_value)
        zero += r.i_squared == 0
    assert np.mean(np.asarray(ps) < 0.05) == pytest.approx(0.05, abs=0.03)
    assert zero >= 180


def test_pooled_error_of_copies_and_of_residues_that_differ():
    from dihedra.numerics.heterogeneity import pooled_mean_error

    rng = np.random.default_rng(3)
    # copies of one molecule: populations scatter as their errors say; the error is the one of
    # independent copies, sqrt(sum se^2) / n, and I^2 is small
    se = np.full(100, 0.02)
    y = 0.3 + rng.normal(0, 0.02, 100)
    r = pooled_mean_error(y, se)
    assert not r["heterogeneous"] and r["i_squared"] < 0.3
    assert r["se"] == pytest.approx(np.sqrt(np.sum(se ** 2)) / 100)
    # residues that each sit in their own state (0 or 1, no transitions: errors 0): the error is
    # the standard error of the mean across residues (common practice), I^2 = 1
    y = np.array([1, 1, 0, 1, 0, 1, 1, 1, 0, 1, 1, 0, 1, 0], dtype=float)
    r = pooled_mean_error(y, np.zeros_like(y))
    assert r["heterogeneous"] and r["i_squared"] == 1.0 and np.isinf(r["q"]) and r["q_p_value"] == 0
    assert r["se"] == pytest.approx(np.std(y, ddof=1) / np.sqrt(len(y)))
    # an item whose error cannot be estimated makes the pooled error missing, never 0
    r = pooled_mean_error([0.2, 0.4], [np.nan, 0.01])
    assert np.isnan(r["se"]) and r["mean"] == pytest.approx(0.3)
    # one item: its own error; no heterogeneity to speak of
    r = pooled_mean_error([0.2], [0.01])
    assert r["se"] == 0.01 and np.isnan(r["i_squared"])


def test_every_blocking_call_uses_one_machine_code():
    # broadcast weights (populations), weights by column (conformers), 1-D values: the kernel is
    # always handed writable arrays, so numba loads one machine code of it per run (a read-only
    # view, as np.broadcast_to gives, is another type to numba: a second load)
    from numba.core import types

    from dihedra.numerics._kernels import blocking_columns

    rng = np.random.default_rng(3)
    counts = rng.integers(0, 5, size=(16, 7, 3)).astype(float)
    blocking_error(counts, counts.sum(axis=2, keepdims=True), np.zeros(16, dtype=int))
    blocking_error(counts[:, :, 0], counts.sum(axis=2), np.zeros(16, dtype=int),
                   weight_columns=np.arange(7) % 3)
    blocking_error(counts[:, 0, 0], counts[:, 0].sum(axis=1), np.repeat([0, 1], 8))
    blocking_error(np.zeros((2, 1)), np.ones((2, 1)), np.zeros(2, dtype=np.int64))
    arrays = [arg for sig in blocking_columns.signatures for arg in sig if isinstance(arg, types.Array)]
    assert arrays and all(arg.mutable for arg in arrays)
