"""Post-processing of many torsions at once: the stacked (vectorised) profile and kinetics code.

The per-torsion loops of dihedra.analysis.profiles and dihedra.analysis.kinetics were replaced by array operations
over a torsion axis. These tests check the stacked pieces against reference libraries (deeptime,
scipy), against analytic results, and against the rule written out one profile at a time.
"""

import os
import warnings

import numpy as np
import pandas as pd
import pytest
from scipy import linalg

from dihedra.analysis import kinetics as kin
from dihedra.analysis.kinetics import estimators as kin_estimators
from dihedra.analysis.kinetics import markov as kin_markov
from dihedra.analysis.kinetics import tables as kin_tables
from dihedra.analysis.kinetics import tally as kin_tally
from dihedra.analysis import profiles as prof
from dihedra.analysis.profiles import estimation as prof_est
from dihedra.analysis.profiles import features as prof_feat
from dihedra.io.tables import write_csv
from dihedra.selection.schemes import get_scheme


# ------------------------------------------------------------------------------------------------
# reversible Markov models
# ------------------------------------------------------------------------------------------------
def random_counts(rng, n, stay):
    """A strongly connected count matrix with metastable states (large diagonal)."""
    weights = rng.random((n, n)) ** 3 + np.eye(n) * stay
    c = rng.poisson(weights / weights.sum(axis=1, keepdims=True) * rng.uniform(50, 5000)).astype(float)
    ring = np.arange(n)
    c[ring, (ring + 1) % n] += 1
    c[(ring + 1) % n, ring] += 1
    return c


def test_reversible_estimator_matches_deeptime():
    # reference library: deeptime's MaximumLikelihoodMSM(reversible=True) on the same counts (run to
    # a tight tolerance), its timescales and mean first-passage times
    from deeptime.markov import TransitionCountModel
    from deeptime.markov.msm import MaximumLikelihoodMSM
    from deeptime.markov.tools.analysis import mfpt

    rng = np.random.default_rng(4)
    counts = [random_counts(rng, n, rng.uniform(5, 300)) for n in (2, 3, 3, 3, 4, 6) for _ in range(4)]
    for c in counts:
        n, lag = len(c), 3
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            ref = MaximumLikelihoodMSM(reversible=True, maxerr=1e-14).fit(
                TransitionCountModel(c, lagtime=lag)).fetch_model()
        t_ref = np.asarray(ref.transition_matrix)
        mine = kin.markov_model(c, lag)
        assert np.allclose(mine["transition_matrix"], t_ref, rtol=1e-8, atol=1e-11)
        assert np.allclose(mine["stationary"], ref.stationary_distribution, rtol=1e-8)
        assert np.allclose(mine["timescales_frames"], ref.timescales(k=n - 1), rtol=1e-7)
        for j in range(n):
            assert np.allclose(mine["mfpt_frames"][:, j], mfpt(t_ref, j, tau=lag), rtol=1e-6)
    # the stack gives each matrix the result it gets alone (3 x 3 matrices of one active pattern)
    stack = np.stack([c for c in counts if len(c) == 3])
    (members, active, t, pi, ts, m), = kin_markov._markov_stack(stack, 2)
    for k, c in zip(members, stack):
        one = kin.markov_model(c, 2)
        assert np.allclose(t[k], one["transition_matrix"], rtol=1e-12, atol=1e-14)


def test_reversible_estimator_detailed_balance_and_two_state_closed_form():
    # analytic: the estimate obeys detailed balance; for two states it is c_ij / c_i (any 2-state
    # stochastic matrix is reversible, so the constraint does not bind)
    rng = np.random.default_rng(5)
    c = np.stack([random_counts(rng, 4, 50.0) for _ in range(20)])
    t, pi = kin.reversible_transition_matrices(c)
    flux = pi[:, :, None] * t
    assert np.allclose(flux, np.swapaxes(flux, 1, 2), atol=1e-13)
    assert np.allclose(t.sum(axis=2), 1.0)
    two = np.array([[[900.0, 37.0], [52.0, 411.0]]])
    t2, _ = kin.reversible_transition_matrices(two)
    assert np.allclose(t2[0], two[0] / two[0].sum(axis=1, keepdims=True), rtol=1e-12)


def test_largest_connected_set_matches_scipy():
    # reference library: scipy's strongly connected components; the largest set (ties: more counts)
    from scipy.sparse.csgraph import connected_components

    rng = np.random.default_rng(6)
    for _ in range(200):
        c = rng.poisson(0.6, (5, 5)).astype(float) * (rng.random((5, 5)) < 0.5)
        if c.sum() == 0:
            continue
        mine = kin.largest_connected_set(c)
        n_comp, comp = connected_components(c > 0, directed=True, connection="strong")
        sizes = np.bincount(comp)
        weights = np.bincount(comp, weights=c.sum(axis=1))
        best_key = max((sizes[k], weights[k]) for k in range(n_comp))
        assert (len(mine), c[mine].sum()) == best_key
        assert len(np.unique(comp[mine])) == 1 and (comp == comp[mine[0]]).sum() == len(mine)


def test_stationary_populations_of_rate_stack():
    # reference library: the left null vector of the generator (scipy.linalg.null_space), over the
    # visited states of each matrix; NaN when the rates do not connect them
    rng = np.random.default_rng(7)
    k = rng.random((30, 4, 4)) * (rng.random((30, 4, 4)) < 0.7)
    k[:, np.arange(4), np.arange(4)] = 0.0
    visited = rng.random((30, 4)) < 0.85
    k = k * visited[:, :, None] * visited[:, None, :]
    pi = kin_estimators._stationary_stack(k, visited)
    for m in range(30):
        idx = np.flatnonzero(visited[m])
        sub = k[m][np.ix_(idx, idx)]
        q = sub - np.diag(sub.sum(axis=1))
        null = linalg.null_space(q.T)
        if len(idx) == 1:
            assert pi[m, idx[0]] == 1.0
        elif null.shape[1] == 1 and (np.all(null > 1e-12) or np.all(null < -1e-12)):
            ref = null[:, 0] / null[:, 0].sum()
            assert np.allclose(pi[m, idx], ref, atol=1e-10)
            assert np.all(pi[m, ~visited[m]] == 0)
        elif null.shape[1] > 1:
            assert np.isnan(pi[m]).all()


# ------------------------------------------------------------------------------------------------
# dwell times
# ------------------------------------------------------------------------------------------------
def test_grouped_kaplan_meier_matches_single_and_analytic_variance():
    # analytic: without censoring the restricted mean is the sample mean and its Kaplan-Meier variance
    # is sum (x - mean)^2 / n^2; with censoring the grouped estimate equals the one-group function
    rng = np.random.default_rng(8)
    groups = []
    for g in range(12):
        x = rng.geometric(rng.uniform(0.02, 0.3), size=rng.integers(3, 60))
        cens = rng.random(len(x)) < (0.0 if g < 4 else 0.2)
        d, inv = np.unique(x, return_inverse=True)
        ev = np.bincount(inv, weights=~cens, minlength=len(d))
        ce = np.bincount(inv, weights=cens, minlength=len(d))
        groups.append((x, cens, d, ev, ce))
    starts = np.cumsum([0] + [len(g[2]) for g in groups[:-1]])
    km = kin.kaplan_meier_groups(starts, *(np.concatenate([g[k] for g in groups]) for k in (2, 3, 4)))
    for k, (x, cens, d, ev, ce) in enumerate(groups):
        mean, median = kin.kaplan_meier(d, ev, ce)
        assert km["mean"][k] == pytest.approx(float(mean), rel=1e-12)
        assert km["median"][k] == median or (np.isnan(median) and np.isnan(km["median"][k]))
        if not cens.any():
            assert km["mean"][k] == pytest.approx(x.mean(), rel=1e-12)
            assert km["mean_se"][k] == pytest.approx(np.sqrt(((x - x.mean()) ** 2).sum()) / len(x), rel=1e-9)
    # a median where S is exactly 1/2 (1 - 1/2 after the first event): the first time S <= 1/2
    half = kin.kaplan_meier_groups(np.array([0]), np.array([1.0, 2.0]), np.array([1.0, 1.0]), np.zeros(2))
    assert half["median"][0] == 1.0


def test_torsion_rows_equal_each_torsion_alone(tmp_path):
    # common practice: the stacked analysis of all torsions gives every torsion what the analysis of
    # its own trajectory gives (single-series path), incl. Markov models checked against deeptime above
    rng = np.random.default_rng(9)
    n_frames, n_tor = 3000, 6
    p_stay = rng.uniform(0.95, 0.995, n_tor)
    trajs = np.zeros((n_tor, n_frames), dtype=np.int64)
    for k in range(n_tor):
        for t in range(1, n_frames):
            trajs[k, t] = trajs[k, t - 1] if rng.random() < p_stay[k] else rng.integers(0, 3)
    trajs[2] = np.minimum(trajs[2], 1)  # one torsion never visits the third state
    tally = kin.StateTally(n_tor, [1, 4], n_states=3)
    tally.add_series(trajs[:, :1700])
    tally.add_series(trajs[:, 1700:])
    tally.finish()
    labels = np.array(["a", "b", "c"], dtype=object)
    stack = kin_tables._Stack("torsion", np.array([f"t{k}" for k in range(n_tor)], dtype=object),
                       np.array(["T"] * n_tor, dtype=object), labels, tally.pair_matrices_,
                       tuple(tally.segments_[0].T) + (tally.segments_[1],), np.ones(n_tor, dtype=np.int64),
                       bootstrap=True)
    got = kin_tables._tables([kin_tables._stack_tables(stack, 0.5, [1, 4], 100, np.random.default_rng(1))])
    for k in range(n_tor):
        one = kin.analyse_state_series([trajs[k]], list(labels), 0.5, lags=[1, 4], n_bootstrap=100)
        for name in ("transitions", "lifetimes", "timescales", "mfpt"):
            mine = got[name][got[name]["name"] == f"t{k}"].drop(columns=["level", "name", "type"])
            ref = one[name].drop(columns=["level", "name", "type"])
            if name == "lifetimes":  # bootstrap draws differ (one generator across torsions)
                mine = mine.drop(columns=["ci_low_ps", "ci_high_ps"])
                ref = ref.drop(columns=["ci_low_ps", "ci_high_ps"])
            pd.testing.assert_frame_equal(mine.reset_index(drop=True), ref.reset_index(drop=True),
                                          check_dtype=False, rtol=1e-10)
    assert set(got["transitions"].loc[got["transitions"]["name"] == "t2", "to_state"]) == {"a", "b"}


# ------------------------------------------------------------------------------------------------
# profiles
# ------------------------------------------------------------------------------------------------
def scalar_minima(free, err, kt, usable, min_depth_kt=prof.MIN_DEPTH_KT, min_depth_sigma=prof.MIN_DEPTH_SIGMA):
    """The minimum rule of dihedra.analysis.profiles.features, one profile at a time (plain Python)."""
    g = [f if np.isfinite(f) else np.inf for f in free]
    ok = [np.isfinite(x) and u for x, u in zip(g, usable)]
    e = [x if np.isfinite(x) else 0.0 for x in err]
    n = len(g)
    if not any(ok):
        return []
    cand = [i for i in range(n) if ok[i] and g[i] < g[i - 1] and g[i] <= g[(i + 1) % n]]
    if not cand:
        cand = [min((g[i], i) for i in range(n) if ok[i])[1]]

    def between(a, b):
        length = (b - a) % n if a != b else n
        return [(a + 1 + t) % n for t in range(length - 1)]

    while len(cand) > 1:
        deficits = []
        for k, i in enumerate(cand):
            sides = []
            for a, b in ((cand[k - 1], i), (i, cand[(k + 1) % len(cand)])):
                arc = between(a, b)
                # the wall: the highest sampled bin between them (first in arc order); with none
                # sampled, the higher of the two candidates
                sampled = [t for t in range(len(arc)) if np.isfinite(g[arc[t]])]
                j = arc[max(sampled, key=lambda t: (g[arc[t]], -t))] if sampled else (a if g[a] >= g[b] else b)
                sides.append((g[j], j))
            top, j = min(sides)
            need = max(min_depth_kt * kt, min_depth_sigma * np.hypot(e[i], e[j]))
            deficits.append(top - g[i] - need)
        worst = int(np.argmin(deficits))
        if deficits[worst] >= 0:
            break
        cand.pop(worst)
    return sorted(cand)


def test_stacked_minima_follow_the_rule_profile_by_profile():
    # the rule of the features module written out in plain Python, on noisy periodic profiles with
    # unsampled and unusable bins
    rng = np.random.default_rng(10)
    kt = 2.479
    m, n = 400, 72
    x = np.radians(np.arange(n) * 5.0)
    free = (rng.uniform(2, 8) * (1 + np.cos(3 * x + rng.uniform(0, 6, (m, 1))))
            + rng.normal(0, rng.uniform(0.05, 1.5, (m, 1)), (m, n)))
    free[rng.random((m, n)) < 0.08] = np.nan
    free[:100] = np.round(free[:100] * 2.0) / 2.0  # many equal values: ties go to the first in arc order
    err = np.abs(rng.normal(0.2, 0.15, (m, n)))
    usable = rng.random((m, n)) < 0.95
    got = prof_feat._minima_stack(free, err, kt, usable)
    for k in range(m):
        assert list(got[k]) == scalar_minima(free[k], err[k], kt, usable[k]), k
    assert sum(len(g) for g in got) > m  # the profiles do have several minima


def test_kernel_error_without_kept_resamples_equals_full_bootstrap():
    # common practice: the per-torsion error from sums over resamples equals the standard deviation
    # of the kept resamples (the pooled path), to single-precision accuracy; sparse blocks included
    rng = np.random.default_rng(11)
    blocks = rng.poisson(rng.uniform(0.02, 3.0, (1, 40, 1)) * (1.2 + np.cos(np.radians(np.arange(360)) * 3)),
                         (32, 40, 360)).astype(float)
    blocks[:, :5, 100:200] = 0.0
    mult = prof.bootstrap_multiplicities(np.repeat([0, 1], 16), 60, np.random.default_rng(0))
    bws = rng.uniform(2.0, 12.0, 40)
    full = prof_est._kernel_stack(blocks, mult, 2.479, bws, 1.0)
    _, smooth, _, free, err, ok = prof_est._kernel_columns(blocks, mult, 2.479, bws, 1.0)
    assert np.array_equal(ok, full.sampled)
    ref = np.where(full.sampled, full.free_energy_err_kj_mol, np.nan)
    assert np.array_equal(np.isnan(ref), np.isnan(err))
    assert np.allclose(err, ref, rtol=2e-5, equal_nan=True)
    assert np.allclose(free, full.free_energy_kj_mol, equal_nan=True)


def test_profile_of_a_stack_equals_profiles_one_by_one():
    # the features of a stack of profiles are those of each profile alone (no mixing between rows)
    rng = np.random.default_rng(12)
    blocks = rng.poisson(5 * (1.3 + np.cos(np.radians(np.arange(72) * 5.0) * 3 + rng.uniform(0, 6, (1, 30, 1)))),
                         (32, 30, 72)).astype(float)
    mult = prof.bootstrap_multiplicities(np.repeat([0, 1], 16), 50, np.random.default_rng(2))
    stack = prof_est._histogram_stack(blocks, mult, 2.479, 5.0)
    minima, barriers = prof_feat._features_stack(stack, 2.479)
    for k, one in enumerate(prof_est._unstack(stack)):
        m1, b1 = prof.profile_features(one, 2.479)
        rows = minima["row"] == k
        assert len(m1) == rows.sum()
        for f in prof.MINIMUM_FIELDS:
            assert np.allclose([r[f] for r in m1], minima[f][rows], equal_nan=True)
        rows = barriers["row"] == k
        for f in prof.BARRIER_FIELDS:
            assert np.allclose([r[f] for r in b1], barriers[f][rows].astype(float), equal_nan=True)


def test_default_bandwidths_of_a_stack():
    # common practice (Silverman's rule within arcs): the stacked rule equals the rule for one
    scheme = get_scheme("anti-gauche")
    rng = np.random.default_rng(13)
    counts = rng.poisson(3.0, (6, 360)).astype(float)
    counts[2] = 0.0
    neff = rng.uniform(10, 1000, 6)
    stacked = prof.default_bandwidths_deg(counts, scheme, neff)
    for k in range(6):
        assert stacked[k] == pytest.approx(prof.default_bandwidth_deg(counts[k], scheme, neff[k]), rel=1e-12)
    assert stacked[2] == 1.0


# ------------------------------------------------------------------------------------------------
# chunks, threads and files
# ------------------------------------------------------------------------------------------------
def test_threads_and_chunks_give_the_serial_result(tmp_path, monkeypatch):
    # common practice: reading the columns in parts (threads, molecules kept whole) and in small
    # chunks changes nothing, conformers included
    from conftest import write_system
    from test_kinetics import chain5_coordinates

    from dihedra.io.resultsdir import load_results
    from dihedra.tracking import track

    rng = np.random.default_rng(14)
    angles = np.where(rng.random((300, 16)) < 0.5, 180.0, 60.0) + rng.normal(0, 10, (300, 16))
    top, traj = write_system(str(tmp_path), chain5_coordinates(angles[:, :8], angles[:, 8:]),
                             names=("C1", "C2", "C3", "C4", "C5"), resname="PEN", stem="parts")
    out = str(tmp_path / "res")
    track(top, [traj, traj], torsions="rotatable", keep_angles=True, out=out, allow_duplicates=True)
    serial = kin.state_kinetics(load_results(out), lags=[1, 3], n_bootstrap=30)
    assert (serial.lifetimes["level"] == "conformer").any()
    monkeypatch.setattr(kin_tally, "_THREADS", 3)
    monkeypatch.setattr(kin_tally, "_MIN_PART", 2)
    monkeypatch.setattr(kin_tally, "CHUNK_VALUES", 50)
    assert len(kin_tally._column_parts(16, [np.array([2 * k, 2 * k + 1]) for k in range(8)], 3)) == 3
    parts = kin.state_kinetics(load_results(out), lags=[1, 3], n_bootstrap=30, batch_frames=37)
    for name in kin.TABLE_COLUMNS:
        pd.testing.assert_frame_equal(getattr(serial, name), getattr(parts, name))


def test_csv_writer_round_trip(tmp_path):
    # common practice: NaN as an empty cell, booleans and text read back by pandas; a comma quotes
    frame = pd.DataFrame({"name": pd.Categorical(["a", "b,c", "a"]), "x_deg": [1.5, np.nan, -1e-7],
                          "ok": [True, False, True], "n": [1, 2, 3], "s": ["", "u", "v"]})
    path = write_csv(frame, os.path.join(str(tmp_path), "t.csv"))
    text = open(path).read()
    assert text.splitlines()[0] == "name,x_deg,ok,n,s" and "nan" not in text.lower()
    back = pd.read_csv(path, keep_default_na=False, na_values=[""])
    assert back["name"].tolist() == ["a", "b,c", "a"] and back["ok"].tolist() == [True, False, True]
    assert np.isnan(back["x_deg"][1]) and back["x_deg"][2] == pytest.approx(-1e-7, rel=1e-6)
    assert back["n"].tolist() == [1, 2, 3]


def test_core_codes_by_table_equal_the_scheme():
    # the lookup table gives exactly StateScheme.core_codes (values at and next to every core edge
    # included, margins 0 to near the limit, two schemes)
    rng = np.random.default_rng(15)
    for name, margins in (("anti-gauche", (0.0, 20.0, 55.0)), ("klyne-prelog", (0.0, 10.0, 29.0))):
        scheme = get_scheme(name)
        for margin in margins:
            edges = np.array([e for _, a, b in scheme.merged_arcs() for e in (a + margin, b - margin)])
            edges = (edges + 180.0) % 360.0 - 180.0
            near = np.concatenate([edges + d for d in (0.0, 1e-5, -1e-5, 1e-3, -1e-3, 0.01, -0.01)])
            angles = np.concatenate([rng.uniform(-180, 180, 200_000), near, [180.0, -179.99999, 0.0]])
            angles = np.where(angles <= -180.0, 180.0, angles).astype(np.float32)
            assert np.array_equal(kin.CoreCodes(scheme, margin)(angles), scheme.core_codes(angles, margin))
    with_nan = np.array([np.nan, 60.0, -170.0], dtype=np.float32)
    scheme = get_scheme("anti-gauche")
    assert np.array_equal(kin.CoreCodes(scheme, 20.0)(with_nan), scheme.core_codes(with_nan, 20.0))
