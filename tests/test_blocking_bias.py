"""The short-run correction of blocking errors against exact results: the covariance of an
exponentially correlated series (linear algebra on its covariance matrix) and two-state Markov
chains, whose variance of the time average is known in closed form: the state indicator of a
stationary two-state chain has the autocorrelation lam^t exactly (lam = 1 - k_ab - k_ba), and the
variance of the mean of n values of such a series is the finite sum of :func:`_exact_error`
(common practice; e.g. M. B. Priestley, Spectral Analysis and Time Series, 1981, sec. 5.3, cited
from memory)."""

import numpy as np
import pytest

from dihedra.numerics.blocking_bias import fit_span, level_ratio, stretch_variance
from dihedra.numerics.populations import pool_by_type, torsion_populations
from dihedra.numerics.statistics import blocking_error


def _expected_level_ratio(n_frames, tau, n_blocks):
    """E[se^2] of one blocking level over Var(mean), exactly, for a series with covariance
    exp(-|i - j| / tau): se^2 = sum (B_i - B)^2 / (n (n - 1)) is a quadratic form of the series."""
    lag = np.abs(np.subtract.outer(np.arange(n_frames), np.arange(n_frames)))
    cov = np.exp(-lag / tau)
    per = n_frames // n_blocks
    to_blocks = np.kron(np.eye(n_blocks), np.full((1, per), 1.0 / per))   # block means
    centred = to_blocks - to_blocks.mean(axis=0)
    expected_se2 = np.trace(centred @ cov @ centred.T) / (n_blocks * (n_blocks - 1))
    mean = np.full(n_frames, 1.0 / n_frames)
    return expected_se2 / (mean @ cov @ mean)


@pytest.mark.parametrize("span", [2.0, 8.0, 20.0, 80.0])
def test_level_ratio_is_the_exact_expectation_for_an_exponential_correlation(span):
    # 1,024 frames make the discrete series close to the continuous one of the formula
    for n_blocks in (8, 16):
        exact = _expected_level_ratio(1024, 1024 / span, n_blocks)
        assert level_ratio(span, n_blocks) == pytest.approx(exact, rel=0.002)
    # the bias the correction undoes: 8 blocks of a run of 8 correlation times see a third of the variance
    assert level_ratio(8.0, 8) == pytest.approx(0.338, abs=0.001)


def test_stretch_variance_limits():
    # a stretch much shorter than tau is one sample; a long one has 2 tau / T of the variance
    assert float(stretch_variance(1e-6)) == pytest.approx(1.0)
    assert float(stretch_variance(1e4)) == pytest.approx(2e-4, rel=1e-3)


def _two_state_chain(n_torsions, n_frames, k_ab, k_ba, rng):
    """State 0/1 of independent two-state Markov chains started from the stationary law."""
    p0 = k_ba / (k_ab + k_ba)
    s = (rng.random(n_torsions) >= p0).astype(np.int8)
    out = np.empty((n_frames, n_torsions), dtype=np.int8)
    for f in range(n_frames):
        u = rng.random(n_torsions)
        s = np.where(s == 0, (u < k_ab).astype(np.int8), (u >= k_ba).astype(np.int8))
        out[f] = s
    return out


def _exact_error(p, lam, n):
    """Standard error of the time average of n frames of a stationary two-state chain (lam = 1 -
    k_ab - k_ba): Var = p (1 - p) / n [(1 + lam) / (1 - lam) - 2 lam (1 - lam^n) / (n (1 - lam)^2)]."""
    return np.sqrt(p * (1 - p) / n * ((1 + lam) / (1 - lam) - 2 * lam * (1 - lam ** n) / (n * (1 - lam) ** 2)))


def _populations(states, n_blocks=64):
    n_frames, n_t = states.shape
    counts = np.stack([states == 0, states == 1], axis=2).reshape(n_blocks, n_frames // n_blocks, n_t, 2).sum(axis=1)
    table = torsion_populations(counts, np.zeros(n_blocks, dtype=int), [f"t{i}" for i in range(n_t)],
                                ["T"] * n_t, ["A", "B"])
    plain = blocking_error(counts[:, :, 0].astype(float), counts.sum(axis=2).astype(float),
                           np.zeros(n_blocks, dtype=int), short_run=False)[1]
    return table[table["state"] == "A"].reset_index(drop=True), plain


@pytest.mark.parametrize("span, seed", [(8, 1), (20, 2)])
def test_copies_of_a_torsion_get_calibrated_errors_in_a_short_run(span, seed):
    # 100 copies of a two-state torsion (p_A = 0.6) over a run of `span` correlation times
    rng = np.random.default_rng(seed)
    n_frames = 6400
    rate = 1.0 / (n_frames / span)             # k_ab + k_ba = 1 / tau
    states = _two_state_chain(100, n_frames, 0.4 * rate, 0.6 * rate, rng)
    table, plain = _populations(states)
    exact = _exact_error(0.6, 1.0 - rate, n_frames)
    rms = np.sqrt(np.mean(table["population_err"] ** 2))
    # blocking alone is biased low (0.58 and 0.80 of the exact error expected); corrected, within
    # the scatter of 100 estimates
    assert np.sqrt(np.mean(plain ** 2)) / exact < (0.7 if span == 8 else 0.9)
    assert 0.85 < rms / exact < 1.2
    # the spread of the 100 means agrees with the exact error (the chain is right), and copies
    # are not called heterogeneous (Cochran's Q) as they were with the biased errors
    assert 0.8 < table["population"].std(ddof=1) / exact < 1.25
    pooled = pool_by_type(table)
    assert not bool(pooled["heterogeneous"].iloc[0])
    assert pooled["population_err"].iloc[0] == pytest.approx(exact / 10, rel=0.25)


def test_a_long_run_keeps_its_blocking_errors():
    # 200 correlation times: the coarsest level has reached its plateau; the correction changes
    # the errors by a few per cent at most
    rng = np.random.default_rng(4)
    n_frames = 6400
    rate = 200.0 / n_frames
    states = _two_state_chain(100, n_frames, 0.4 * rate, 0.6 * rate, rng)
    table, plain = _populations(states)
    ratio = table["population_err"].to_numpy() / plain
    assert (ratio >= 1.0).all()
    assert np.sqrt(np.mean(ratio ** 2)) < 1.05


def test_the_fitted_span_of_a_pool_is_the_run_in_correlation_times():
    rng = np.random.default_rng(6)
    for span in (6.0, 30.0):
        states = _two_state_chain(100, 6400, 0.5 * span / 6400, 0.5 * span / 6400, rng)
        counts = (states == 0).reshape(64, 100, 100).sum(axis=1).astype(float)
        _, _, _, found = blocking_error(counts, np.full_like(counts, 100.0), np.zeros(64, dtype=int), levels=True)
        summed = (found.se ** 2).sum(axis=1, keepdims=True)
        fitted = fit_span(summed, found.n_blocks, 1, np.array([100]))[0]
        assert fitted == pytest.approx(span, rel=0.25)


def _three_well_runs(n_runs, n_torsions, n_frames, span, rng):
    """``n_runs`` independent runs of ``n_torsions`` copies of a three-well rotor (anti at 180, gauche
    at +-60 degrees, angles 15 degrees wide within a well, independent from frame to frame) whose
    wells change as a Markov jump process with relaxation time n_frames / span: the fine (5-degree)
    histograms in 16 blocks, pooled over the copies, (16, n_runs, 72), and the state counts of every
    torsion in 64 blocks, (64, n_runs * n_torsions, 3)."""
    rate = span / n_frames
    n = n_runs * n_torsions
    s = rng.choice(3, n, p=[2 / 3, 1 / 6, 1 / 6])
    hist = np.zeros((16, n_runs, 72))
    states = np.zeros((64, n, 3))
    centres = np.array([180.0, 60.0, -60.0])
    run_of = np.repeat(np.arange(n_runs), n_torsions)
    for f in range(n_frames):
        u = rng.random(n)
        to_gauche = (s == 0) & (u < 0.5 * rate)
        s = np.where(to_gauche, np.where(rng.random(n) < 0.5, 1, 2), np.where((s > 0) & (u < rate), 0, s))
        angle = (centres[s] + rng.normal(0.0, 15.0, n) + 180.0) % 360.0 - 180.0
        b = np.clip(((angle + 180.0) // 5.0).astype(int), 0, 71)
        np.add.at(hist[f * 16 // n_frames], (run_of, b), 1.0)
        states[f * 64 // n_frames, np.arange(n), s] += 1.0
    return hist, states


def test_profile_errors_of_a_short_run_are_raised_where_the_blocks_are_correlated():
    # 30 independent runs of 100 copies, each 10 correlation times long: the spread of their pooled
    # free energies is the true error, against which the bootstrap over 16 blocks is about half in
    # the wells, while at the barrier (a few samples: the counting floor) it is right already
    from dihedra.analysis.profiles.estimation import bin_ratios
    from dihedra.numerics.blocking_bias import level_ratio
    from dihedra.numerics.density import _histogram_stack, bootstrap_multiplicities, free_energy_from_counts
    from dihedra.numerics.populations import type_spans, type_state_spans
    from dihedra.selection.schemes import get_scheme

    rng = np.random.default_rng(12)
    n_runs, kt = 30, 2.479
    hist, states = _three_well_runs(n_runs, 100, 3200, 10.0, rng)
    mult = bootstrap_multiplicities(np.zeros(16, dtype=int), 200, rng)
    names = [f"run{k}" for k in range(n_runs) for _ in range(100)]
    spans = type_state_spans(states, np.zeros(64, dtype=int), names)
    # the gauche wells relax at the rate of their exit (10 correlation times); the anti indicator
    # faster (exit to either gauche plus the return: 15)
    assert np.median([spans[f"run{k}"] for k in range(n_runs)], axis=0) == pytest.approx([15.0, 10.0, 10.0], rel=0.3)
    assert type_spans(states, np.zeros(64, dtype=int), names)["run0"] == pytest.approx(np.nanmin(spans["run0"]))
    # each bin takes the ratio of its state (anti-gauche: anti beyond 120 degrees, gauche+ 0..120)
    by_state = np.array([level_ratio(spans[f"run{k}"], 16) for k in range(n_runs)])
    ratio = bin_ratios(by_state, [get_scheme("anti-gauche")] * n_runs, 72)
    plain = _histogram_stack(hist, mult, kt, 5.0)
    raised = _histogram_stack(hist, mult, kt, 5.0, ratio=ratio)
    free = free_energy_from_counts(hist.sum(axis=0), 5.0, kt)[1]
    for bin_ in (48, 54, 71):   # gauche+ (60 deg), its shoulder (90 deg), anti (180 deg)
        truth = np.nanstd(free[:, bin_], ddof=1)
        rms = np.sqrt(np.nanmean(raised.free_energy_err_kj_mol[:, bin_] ** 2))
        # (the spread of 30 runs is itself known to about 13 %)
        assert 0.8 < rms / truth < 1.3, (bin_, rms / truth)
        assert np.sqrt(np.nanmean(plain.free_energy_err_kj_mol[:, bin_] ** 2)) / truth < 0.75
    # at the barrier (120 deg: a few samples per run, their variance mostly that of counting) the
    # error was not too small and is raised little
    barrier = raised.free_energy_err_kj_mol[:, 60] / plain.free_energy_err_kj_mol[:, 60]
    assert np.nanmedian(barrier) < 1.25
    # the resamples carry the raised spread (barrier heights and minima are read from them)
    boot = raised.boot_free_energy[:, 48]
    assert np.nanstd(np.where(np.isfinite(boot), boot, np.nan), axis=-1, ddof=1) == pytest.approx(
        raised.free_energy_err_kj_mol[:, 48], rel=1e-6)


def test_coupling_errors_of_a_short_run_are_raised_with_the_span_of_the_states():
    # 400 independent copies of a three-well rotor over a run of 10 correlation times: the spread
    # of their <J> (Vuister & Bax 1993 coefficients on 1-degree bins) is the true error of one
    # copy's, against which blocking over 16 histogram blocks (two levels, 16 and 8) gives about
    # sqrt(level_ratio(10, 8)) = 0.6; with the span fitted to the state populations (64 blocks)
    # the error is right
    from dihedra.analysis.couplings.ensemble import couplings_from_histograms
    from dihedra.analysis.couplings.relations import get_relation
    from dihedra.numerics.populations import type_spans

    rng = np.random.default_rng(14)
    n, n_frames, span = 400, 3200, 10.0
    rate = span / n_frames
    s = rng.choice(3, n, p=[2 / 3, 1 / 6, 1 / 6])
    hist = np.zeros((16, n, 360))
    states = np.zeros((64, n, 3))
    centres = np.array([180.0, 60.0, -60.0])
    for f in range(n_frames):
        u = rng.random(n)
        to_gauche = (s == 0) & (u < 0.5 * rate)
        s = np.where(to_gauche, np.where(rng.random(n) < 0.5, 1, 2), np.where((s > 0) & (u < rate), 0, s))
        angle = (centres[s] + rng.normal(0.0, 15.0, n) + 180.0) % 360.0 - 180.0
        np.add.at(hist[f * 16 // n_frames], (np.arange(n), np.clip((angle + 180.0).astype(int), 0, 359)), 1.0)
        states[f * 64 // n_frames, np.arange(n), s] += 1.0
    kern = np.tile(get_relation("vuister-bax-1993").bin_means(np.linspace(-180.0, 180.0, 361)), (n, 1))
    one = np.zeros(16, dtype=int)
    j, plain, _ = couplings_from_histograms(hist, one, kern)
    spans = np.full(n, type_spans(states, np.zeros(64, dtype=int), ["T"] * n)["T"])
    assert spans[0] == pytest.approx(span, rel=0.3)
    _, raised, _ = couplings_from_histograms(hist, one, kern, spans)
    truth = np.std(j, ddof=1)   # (known to about 4 % from 400 copies)
    assert np.sqrt(np.mean(plain ** 2)) / truth < 0.75
    assert 0.85 < np.sqrt(np.mean(raised ** 2)) / truth < 1.2
    assert np.all(raised >= plain)
