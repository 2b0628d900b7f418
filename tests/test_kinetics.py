"""Tests of dihedra.analysis.kinetics: core-set assignment, counts, rates, dwell times, Markov timescales, Eyring.

The main checks simulate a known three-state Markov jump process with numpy (exact exponential dwell
times, Gillespie), turn the states into torsion angles of five-site chains, write them through
MDAnalysis to an XTC with a PDB topology made here, run ``dihedra track --keep-angles`` and
``dihedra kinetics``, and compare with the rates put in.
"""

import itertools
import json
import os
import shutil

import numpy as np
import pandas as pd
import pytest
from conftest import place_fourth, write_system

from dihedra.analysis.kinetics import (TABLE_COLUMNS, StateTally, analyse_state_series, eyring_barrier_kj_mol,
                                      eyring_rate_per_s, fill_forward, markov_model, state_kinetics)
from dihedra.cli import main
from dihedra.errors import DihedraError
from dihedra.io.resultsdir import load_results
from dihedra.selection.schemes import NO_CORE, get_scheme
from dihedra.tracking import track

#: State order of the anti-gauche scheme: anti, gauche+, gauche-.
CENTRES_DEG = np.array([180.0, 60.0, -60.0])
#: True rate constants in 1/ps (rows: from anti, gauche+, gauche-). Detailed balance holds:
#: pi = (0.5556, 0.2222, 0.2222); lifetimes 1/sum_j k_ij = 100 ps (anti), 69.0 ps (gauche).
RATES = np.array([[0.0, 0.005, 0.005],
                  [0.0125, 0.0, 0.002],
                  [0.0125, 0.002, 0.0]])
LABELS = ("anti", "gauche+", "gauche-")
N_FRAMES = 20000
N_MOLECULES = 16
DT_PS = 1.0


# ------------------------------------------------------------------------------------------------
# simulation helpers
# ------------------------------------------------------------------------------------------------
def jump_process(rates, n_frames, dt, rng):
    """State at times 0, dt, 2 dt, ... of a continuous-time Markov jump process (Gillespie)."""
    k_out = rates.sum(axis=1)
    out = np.empty(n_frames, dtype=np.int64)
    t, s, frame = 0.0, int(rng.integers(len(rates))), 0
    while frame < n_frames:
        t_end = t + rng.exponential(1.0 / k_out[s])
        last = min(n_frames, int(np.floor(t_end / dt)) + 1)
        out[frame:last] = s
        frame = max(frame, last)
        t = t_end
        s = int(rng.choice(len(rates), p=rates[s] / k_out[s]))
    return out


def excursion_angles(states, rng, probability):
    """Single frames that cross a crisp boundary but stay outside every core (margin 20 deg).

    From anti to +-110 (gauche sectors, outside the gauche cores 20..100); from gauche+ to 130
    (anti sector, outside the anti core beyond 140) or -10 (gauche- sector, outside its core);
    gauche- mirrored. Only frames inside a dwell (same state before and after) are used, so every
    excursion returns to where it came from.
    """
    targets = {0: (110.0, -110.0), 1: (130.0, -10.0), 2: (-130.0, 10.0)}
    n = len(states)
    inside = np.zeros(n, dtype=bool)
    inside[1:-1] = (states[1:-1] == states[:-2]) & (states[1:-1] == states[2:])
    pick = inside & (rng.random(n) < probability)
    pick[1:] &= ~pick[:-1]  # never two in a row
    out = np.full(n, np.nan)
    for s, (a, b) in targets.items():
        sel = np.flatnonzero(pick & (states == s))
        out[sel] = np.where(rng.random(len(sel)) < 0.5, a, b) + rng.uniform(-3, 3, len(sel))
    return out


def chain5_coordinates(t1, t2, spacing=9.0, bond=1.53, angle=112.0, seed=0):
    """Five-site chains A-B-C-D-E with torsions A-B-C-D = t1 and B-C-D-E = t2 (degrees)."""
    n_frames, n_mol = t1.shape
    rng = np.random.default_rng(seed)
    out = np.empty((n_frames, 5 * n_mol, 3))
    side = int(np.ceil(n_mol ** (1 / 3)))
    th = np.radians(angle)
    for m in range(n_mol):
        origin = spacing * np.array([m % side, (m // side) % side, m // side**2], dtype=float)
        q, _ = np.linalg.qr(rng.normal(size=(3, 3)))
        a = np.tile(np.array([bond * np.sin(th), bond * np.cos(th), 0.0]) @ q.T, (n_frames, 1))
        b = np.zeros((n_frames, 3))
        c = np.tile(np.array([0.0, bond, 0.0]) @ q.T, (n_frames, 1))
        d = place_fourth(a, b, c, bond, angle, t1[:, m])
        e = place_fourth(b, c, d, bond, angle, t2[:, m])
        out[:, 5 * m:5 * m + 5] = np.stack([a, b, c, d, e], axis=1) + origin
    return out


def simulate_folder(folder, seed, excursion_probability=0.0):
    """Simulate, write pen.pdb/pen.xtc, track with --keep-angles; return the results folder."""
    rng = np.random.default_rng(seed)
    states = np.stack([jump_process(RATES, N_FRAMES, DT_PS, rng) for _ in range(2 * N_MOLECULES)], axis=1)
    angles = CENTRES_DEG[states] + rng.normal(0.0, 8.0, states.shape)
    if excursion_probability:
        for k in range(states.shape[1]):
            exc = excursion_angles(states[:, k], rng, excursion_probability)
            angles[:, k] = np.where(np.isnan(exc), angles[:, k], exc)
    coords = chain5_coordinates(angles[:, :N_MOLECULES], angles[:, N_MOLECULES:], seed=seed)
    top, traj = write_system(str(folder), coords, names=("C1", "C2", "C3", "C4", "C5"), resname="PEN",
                             dt_ps=DT_PS, stem="pen")
    out = os.path.join(str(folder), "res")
    assert main(["track", top, traj, "--torsions", "rotatable", "--keep-angles", "--out", out,
                 "--temperature", "300"]) == 0
    return out


def folder_kinetics(folder, **options):
    """:func:`state_kinetics` of a results folder."""
    return state_kinetics(load_results(folder), **options)


def type_rates(transitions):
    """{(type, from, to): (rate, err)} of the pooled per-type rows."""
    sub = transitions[transitions["level"] == "type"]
    return {(r.name, r.from_state, r.to_state): (r.rate_per_ps, r.rate_err_per_ps)
            for r in sub.itertuples(index=False)}


@pytest.fixture(scope="module")
def clean_folder(tmp_path_factory):
    return simulate_folder(tmp_path_factory.mktemp("jump"), seed=11)


@pytest.fixture(scope="module")
def excursion_folder(tmp_path_factory):
    return simulate_folder(tmp_path_factory.mktemp("jump_exc"), seed=12, excursion_probability=0.02)


# ------------------------------------------------------------------------------------------------
# assignment and counting
# ------------------------------------------------------------------------------------------------
def test_fill_forward_is_transition_based_assignment():
    # Buchete & Hummer, J. Phys. Chem. B 112 (2008) 6057: keep the last core state until another core
    # is entered; frames before the first core visit are unassigned (definition, checked by hand).
    codes = np.array([NO_CORE, NO_CORE, 0, NO_CORE, 0, NO_CORE, 1, 1, NO_CORE, -1, 0])
    assert fill_forward(codes).tolist() == [-1, -1, 0, 0, 0, 0, 1, 1, 1, 1, 0]
    # the carry from a previous chunk of the same replica continues the assignment
    assert fill_forward(codes[:3], last=2).tolist() == [2, 2, 0]
    # chunked == whole, column by column
    rng = np.random.default_rng(0)
    many = rng.choice([NO_CORE, -1, 0, 1, 2], size=(50, 4), p=[0.5, 0.05, 0.15, 0.15, 0.15])
    whole = fill_forward(many)
    first = fill_forward(many[:17])
    assert np.array_equal(np.vstack([first, fill_forward(many[17:], first[-1])]), whole)


def test_core_assignment_of_scheme_sectors():
    # common practice: with a 20 deg margin the anti-gauche cores are 20..100, -100..-20, |phi| > 140
    scheme = get_scheme("anti-gauche")
    codes = scheme.core_codes([60.0, 110.0, 130.0, 150.0, -10.0, -60.0, np.nan], 20.0)
    assert codes.tolist() == [1, NO_CORE, NO_CORE, 0, NO_CORE, 2, -1]


def run_lengths(dtraj):
    """Reference segments (state, length, censored) by itertools.groupby (first/last censored)."""
    runs = [(k, len(list(g))) for k, g in itertools.groupby(dtraj) if k >= 0]
    return [(s, n, i == 0 or i == len(runs) - 1) for i, (s, n) in enumerate(runs)]


@pytest.mark.parametrize("scale, key_limit", [(1, None), (14 ** 8 // 3, None), (14 ** 8 // 3, 10.0)])
def test_streamed_counts_match_deeptime_and_run_lengths(scale, key_limit, monkeypatch):
    # reference library: deeptime's sliding-window TransitionCountEstimator; reference segments from
    # itertools.groupby. Trajectories are fed in uneven chunks, several replicas one after another,
    # series 0 counted in row 1 and series 1 in row 0. Scaled, the codes are as wide as the joint
    # states of eight torsions of a 14-state scheme (14^8: no int64 key of (row, from, to) holds
    # them; the tally ranks the codes of a chunk, and takes half the series at a time when even the
    # ranks do not fit, forced here by a tiny key limit).
    from deeptime.markov import TransitionCountEstimator

    from dihedra.analysis.kinetics import tally as tally_module

    if key_limit:
        monkeypatch.setattr(tally_module, "_KEY_LIMIT", key_limit)
    rng = np.random.default_rng(3)
    lags, pool = [1, 3, 7], np.array([1, 0])
    reps = []
    for n in (300, 41, 500):
        traj = np.cumsum(rng.random((n, 2)) < 0.08, axis=0) % 3
        traj[: rng.integers(0, 20)] = -1  # unassigned prefix (before the first core visit)
        reps.append(traj)
    tally = StateTally(2, lags, pool=pool)
    for traj in reps:
        cuts = np.sort(rng.choice(np.arange(1, len(traj)), size=min(6, len(traj) - 1), replace=False))
        for part in np.split(traj, cuts):
            tally.add(np.where(part >= 0, part * scale, part))
        tally.end_replica()
    tally.finish()
    for series in range(2):
        dtrajs = [t[t[:, series] >= 0, series] for t in reps]
        for lag in lags:
            ref = TransitionCountEstimator(lag, "sliding", n_states=3).fit(dtrajs).fetch_model().count_matrix
            rows, counts = tally.pairs_[lag]
            mine = np.zeros((3, 3))
            sel = rows[:, 0] == pool[series]
            np.add.at(mine, (rows[sel, 1] // scale, rows[sel, 2] // scale), counts[sel])
            assert np.array_equal(mine, ref)
        expected = {}
        for d in dtrajs:
            for seg in run_lengths(list(d * scale)):
                expected[seg] = expected.get(seg, 0) + 1
        rows, counts = tally.segments_
        sel = rows[:, 0] == pool[series]
        got = {(int(s), int(n), bool(c)): int(k) for (_, s, n, c), k in zip(rows[sel], counts[sel])}
        assert got == expected


# ------------------------------------------------------------------------------------------------
# Markov timescales and Eyring
# ------------------------------------------------------------------------------------------------
def test_two_state_implied_timescale_analytic():
    # analytic: a two-state chain whose transition probabilities at lag tau are p12, p21 has
    # lambda_2 = 1 - p12 - p21, so its implied timescale is -tau / ln(1 - p12 - p21).
    p12, p21 = 0.03, 0.07
    t1 = np.array([[1 - p12, p12], [p21, 1 - p21]])
    pi = np.array([p21, p12]) / (p12 + p21)
    for tau in (1, 4):
        t_tau = np.linalg.matrix_power(t1, tau)
        counts = 1e6 * pi[:, None] * t_tau  # exactly reversible counts at lag tau
        msm = markov_model(counts, tau)
        expected = -tau / np.log(1 - t_tau[0, 1] - t_tau[1, 0])
        assert msm["timescales_frames"][0] == pytest.approx(expected, rel=1e-6)
        # the same process seen at any lag has the same timescale (Chapman-Kolmogorov, analytic)
        assert expected == pytest.approx(-1 / np.log(1 - p12 - p21), rel=1e-9)
        # mean first-passage time of a two-state chain: 1/p12 steps (analytic)
        if tau == 1:
            assert msm["mfpt_frames"][0, 1] == pytest.approx(1 / p12, rel=1e-6)
    # a simulated chain through the whole table path recovers it within 3 % (at 2e5 steps the
    # statistical error of the timescale is about 1 %)
    rng = np.random.default_rng(5)
    dwell0 = rng.geometric(p12, size=8000)
    dwell1 = rng.geometric(p21, size=8000)
    traj = np.repeat(np.tile([0, 1], 8000), np.column_stack([dwell0, dwell1]).ravel())
    tables = analyse_state_series([traj], ["a", "b"], dt_ps=0.5, lags=[1, 3], n_bootstrap=0)
    ts = tables["timescales"]
    for tau in (1, 3):
        got = ts.loc[ts["lag_frames"] == tau, "timescale_ps"].iloc[0]
        assert got == pytest.approx(0.5 * -1 / np.log(1 - p12 - p21), rel=0.03)


def test_eyring_check_value():
    # Eyring, J. Chem. Phys. 3 (1935) 107: k = (k_B T / h) exp(-dG/RT); 12.1 kJ/mol at 298.15 K gives
    # 4.71e10 /s with the CODATA 2018 constants (Tiesinga et al., Rev. Mod. Phys. 93 (2021) 025010;
    # worked out by hand).
    assert eyring_rate_per_s(12.1, 298.15) == pytest.approx(4.71e10, rel=5e-3)
    # recomputed from the exact CODATA 2018 values of k_B, h and N_A written out here
    kb, h, na = 1.380649e-23, 6.62607015e-34, 6.02214076e23
    direct = kb * 298.15 / h * np.exp(-12.1e3 / (kb * na * 298.15))
    assert eyring_rate_per_s(12.1, 298.15) == pytest.approx(direct, rel=1e-12)
    # zero barrier: the Eyring prefactor k_B T / h = 6.251e12 /s at 300 K (CODATA 2018, by hand)
    assert eyring_rate_per_s(0.0, 300.0) == pytest.approx(6.251e12, rel=1e-3)
    # the barrier of a rate inverts the rate of a barrier (analytic)
    assert eyring_barrier_kj_mol(4.71e10, 298.15) == pytest.approx(12.1, abs=0.01)


# ------------------------------------------------------------------------------------------------
# the known jump process through track and kinetics
# ------------------------------------------------------------------------------------------------
@pytest.mark.slow
def test_three_state_jump_process_rates_and_lifetimes(clean_folder, capsys):
    # analytic: the rates put into the simulation, the lifetimes 1/sum_j k_ij and, for independent
    # torsions, conformer rates equal to the single-torsion rate of the torsion that flips.
    assert main(["kinetics", clean_folder, "--lag-ps", "1", "5", "20", "--bootstrap", "400"]) == 0
    screen = capsys.readouterr().out
    assert "anti -> gauche+" in screen and "upper bound" in screen
    # one replica of 16 pentanes: each type has 16 torsions, each conformer type 16 groups
    assert f"({N_MOLECULES} torsions)" in screen and f"({N_MOLECULES} groups)" in screen
    assert "trajectories" not in screen
    tr = pd.read_csv(os.path.join(clean_folder, "transitions.csv"))
    lt = pd.read_csv(os.path.join(clean_folder, "lifetimes.csv"))
    ts = pd.read_csv(os.path.join(clean_folder, "timescales.csv"))
    rates = type_rates(tr)
    types = sorted({k[0] for k in rates})
    assert len(types) == 2
    for t in types:
        for i, j in itertools.permutations(range(3), 2):
            k, err = rates[(t, LABELS[i], LABELS[j])]
            assert abs(k - RATES[i, j]) < 3 * err, (t, i, j, k, err)  # within 3 standard errors
    life = lt[lt["level"] == "type"]
    for r in life.itertuples(index=False):
        true = 1.0 / RATES[LABELS.index(r.state)].sum()
        se = (r.ci_high_ps - r.ci_low_ps) / (2 * 1.96)
        assert abs(r.mean_ps - true) < 3 * se, (r.name, r.state, r.mean_ps, true, se)
        assert r.n_censored <= 2 * N_MOLECULES
        # consistency: populations from rates next to the counted ones
        assert r.population_from_rates == pytest.approx(r.population_counted, abs=0.01)
    # conformers: (a, b) -> (a', b) happens at the rate of the first torsion alone
    conf = tr[tr["level"] == "conformer"]
    checked = 0
    for r in conf.itertuples(index=False):
        a, b = r.from_state.split("|"), r.to_state.split("|")
        changed = [k for k in range(2) if a[k] != b[k]]
        if len(changed) == 1 and r.count >= 30:
            k = changed[0]
            true = RATES[LABELS.index(a[k]), LABELS.index(b[k])]
            assert abs(r.rate_per_ps - true) < 3 * r.rate_err_per_ps + 1e-12, (r.from_state, r.to_state)
            checked += 1
    assert checked >= 12
    # analytic: implied timescales are -1/eigenvalues of the rate matrix (44.4 and 60.6 ps)
    gen = RATES - np.diag(RATES.sum(axis=1))
    expected = np.sort(-1.0 / np.sort(np.linalg.eigvals(gen).real)[:2])[::-1]
    for t in types:
        got = ts[(ts["level"] == "type") & (ts["name"] == t) & (ts["lag_frames"] == 5)]
        assert got["timescale_ps"].to_numpy() == pytest.approx(expected, rel=0.06)
    with open(os.path.join(clean_folder, "kinetics.json")) as fh:
        params = json.load(fh)["parameters"]
    assert params["core_margin_deg"] == 20.0 and params["temperature_k"] == 300.0


@pytest.mark.slow
def test_core_assignment_ignores_excursions_crisp_does_not(excursion_folder):
    # analytic: single-frame excursions across the crisp boundary that never reach another core are
    # not transitions; the core assignment recovers the true rates, the crisp one overestimates them.
    core = folder_kinetics(excursion_folder, assignment="core", lags=[1], n_bootstrap=0, conformers=False)
    crisp = folder_kinetics(excursion_folder, assignment="crisp", lags=[1], n_bootstrap=0, conformers=False)
    core_rates, crisp_rates = type_rates(core.transitions), type_rates(crisp.transitions)
    for (t, a, b), (k, err) in core_rates.items():
        true = RATES[LABELS.index(a), LABELS.index(b)]
        assert abs(k - true) < 3 * err, (t, a, b, k, err)
        k_crisp, err_crisp = crisp_rates[(t, a, b)]
        assert k_crisp > true + 5 * err_crisp, (t, a, b, k_crisp)
    factor = np.mean([crisp_rates[key][0] / core_rates[key][0] for key in core_rates])
    assert factor > 2.0
    # the crisp dwell times are correspondingly too short
    lt_core = core.lifetimes[core.lifetimes["level"] == "type"].set_index(["name", "state"])
    lt_crisp = crisp.lifetimes[crisp.lifetimes["level"] == "type"].set_index(["name", "state"])
    assert (lt_crisp["mean_ps"] < 0.6 * lt_core["mean_ps"]).all()


# ------------------------------------------------------------------------------------------------
# replicas, chunks, errors
# ------------------------------------------------------------------------------------------------
def four_site(tmp_path, angles, stem):
    from conftest import chain_coordinates
    return write_system(str(tmp_path), chain_coordinates(np.asarray(angles)[:, None]), stem=stem)


@pytest.fixture(scope="module")
def two_replicas(tmp_path_factory):
    """Replica 0 stays anti, replica 1 stays gauche+ (one torsion each, 120 frames)."""
    tmp = tmp_path_factory.mktemp("replicas")
    rng = np.random.default_rng(2)
    top, traj0 = four_site(tmp, 180.0 + rng.normal(0, 5, 120), "rep0")
    _, traj1 = four_site(tmp, 60.0 + rng.normal(0, 5, 120), "rep1")
    _, joined = four_site(tmp, np.r_[180.0 + rng.normal(0, 5, 120), 60.0 + rng.normal(0, 5, 120)], "joined")
    out = str(tmp / "res")
    track(top, [traj0, traj1], torsions="rotatable", keep_angles=True, out=out)
    out_joined = str(tmp / "res_joined")
    track(top, [joined], torsions="rotatable", keep_angles=True, out=out_joined)
    return out, out_joined


def test_no_transition_across_replica_join(two_replicas):
    # common practice: replicas are independent trajectories; never a transition across their join.
    folder, joined = two_replicas
    res = folder_kinetics(folder, lags=[1, 2], n_bootstrap=50)
    assert res.transitions["count"].sum() == 0
    life = res.lifetimes[res.lifetimes["level"] == "torsion"].set_index("state")
    assert life.loc["anti", "n_censored"] == 1 and life.loc["anti", "n_segments"] == 0
    assert life.loc["gauche+", "n_censored"] == 1
    # control: the same frames as one trajectory give exactly one anti -> gauche+ transition
    one = folder_kinetics(joined, lags=[1], n_bootstrap=0).transitions
    one = one[one["level"] == "torsion"].set_index(["from_state", "to_state"])["count"]
    assert one.loc[("anti", "gauche+")] == 1 and one.sum() == 1


def test_chunked_reading_equals_whole(two_replicas):
    # common practice: streaming in chunks (carrying the state across borders) gives the same result
    folder, joined = two_replicas
    for f in (folder, joined):
        a = folder_kinetics(f, lags=[1, 3], n_bootstrap=0)
        b = folder_kinetics(f, lags=[1, 3], n_bootstrap=0, batch_frames=7)
        for name in TABLE_COLUMNS:
            pd.testing.assert_frame_equal(getattr(a, name), getattr(b, name))


def four_chains(folder, seed, n_frames=400):
    """Four five-site chains (two torsions each, one conformer group per chain) in the fast jump
    process: (topology, trajectory)."""
    rng = np.random.default_rng(seed)
    states = np.stack([jump_process(5 * RATES, n_frames, DT_PS, rng) for _ in range(8)], axis=1)
    angles = CENTRES_DEG[states] + rng.normal(0.0, 8.0, states.shape)
    return write_system(str(folder), chain5_coordinates(angles[:, :4], angles[:, 4:], seed=seed),
                        names=("C1", "C2", "C3", "C4", "C5"), resname="PEN", dt_ps=DT_PS, stem="mem")


def test_in_memory_result_equals_folder(tmp_path):
    # common practice: the analysis reads the time series only through the tracking result, so a result
    # kept in memory and the same run loaded from its folder give identical tables and files
    top, traj = four_chains(tmp_path, 21)
    memory = track(top, [traj], torsions="rotatable", keep_angles=True, temperature_k=300.0)
    out = str(tmp_path / "res")
    track(top, [traj], torsions="rotatable", keep_angles=True, temperature_k=300.0, out=out)
    options = dict(lags=[1, 4], n_bootstrap=40, seed=3)
    a = state_kinetics(memory, **options)
    b = state_kinetics(load_results(out), **options)
    assert memory.folder is None and a.transitions["count"].sum() > 0
    assert (a.lifetimes["level"] == "conformer").any() and len(a.dwell_survival)
    for name in TABLE_COLUMNS:
        pd.testing.assert_frame_equal(getattr(a, name), getattr(b, name))
    assert a.notices == b.notices
    assert {k: v for k, v in a.parameters.items() if k != "folder"} == \
        {k: v for k, v in b.parameters.items() if k != "folder"}
    paths_a, paths_b = a.save(str(tmp_path / "a")), b.save(str(tmp_path / "b"))
    for pa, pb in zip(paths_a, paths_b):
        if pa.endswith(".csv"):
            assert open(pa, "rb").read() == open(pb, "rb").read(), pa


def test_time_series_is_tallied_in_bounded_pieces(tmp_path, monkeypatch):
    # the pass works on about CHUNK_VALUES values at a time over all its threads together, however
    # long the run (two parts side by side: each at most half of it), reads every frame of every
    # torsion once, and gives the tables of the pass in one piece
    from dihedra.analysis.kinetics import tally as tally_module

    top, traj = four_chains(tmp_path, 5)
    result = track(top, [traj], torsions="rotatable", keep_angles=True, temperature_k=300.0)
    whole = state_kinetics(result, lags=[1, 3], n_bootstrap=20, seed=2)
    seen, add_series = [], StateTally.add_series
    monkeypatch.setattr(StateTally, "add_series",
                        lambda self, x: seen.append((id(self), self.n_states, x.shape)) or add_series(self, x))
    for name, value in (("CHUNK_VALUES", 120), ("READ_VALUES", 480), ("_THREADS", 2), ("_MIN_PART", 1)):
        monkeypatch.setattr(tally_module, name, value)
    pieces = state_kinetics(result, lags=[1, 3], n_bootstrap=20, seed=2)
    torsions = [(who, shape) for who, n_states, shape in seen if n_states == 3]
    assert len({who for who, _ in torsions}) == 2  # two parts of four torsions
    assert max(a * b for _, _, (a, b) in seen) <= 120 // 2
    assert sum(a * b for _, (a, b) in torsions) == 8 * 400
    for name in TABLE_COLUMNS:
        pd.testing.assert_frame_equal(getattr(pieces, name), getattr(whole, name))


def test_tables_hold_text_as_codes(tmp_path):
    # a Markov model of k states has k^2 mfpt rows per lag (hundreds of thousands for the conformers
    # of a protein residue): its text columns are categoricals (codes, categories sorted as the
    # strings), a few bytes a row, and are written as the same text as plain strings
    from dihedra.io.tables import write_table

    walk = np.cumsum(np.random.default_rng(4).choice([-1, 0, 0, 1], size=6000)) % 30  # on a ring of 30 states
    tables = analyse_state_series([walk], [f"s{k:02d}" for k in range(30)], dt_ps=1.0, lags=[1, 2], n_bootstrap=0)
    mfpt = tables["mfpt"]
    assert len(mfpt) == 2 * 30 * 30
    for c in ("level", "name", "type", "from_state", "to_state"):
        assert list(mfpt[c].cat.categories) == sorted(set(mfpt[c].astype(str))), c
    # four numbers of 8 bytes and five codes of one byte (as Python strings: about 300 bytes a row)
    assert mfpt.memory_usage(deep=True).sum() / len(mfpt) < 48
    for name, table in tables.items():
        plain = table.astype({c: object for c in table.columns if isinstance(table[c].dtype, pd.CategoricalDtype)})
        a, b = write_table(table, str(tmp_path), "codes.csv"), write_table(plain, str(tmp_path), "text.csv")
        assert open(a, "rb").read() == open(b, "rb").read(), name


def test_clear_errors(two_replicas, tmp_path, capsys):
    folder, _ = two_replicas
    # no angles.parquet: core sets at the default margin from the state codes and the core bits the
    # pass recorded, the same tables as from the angles (core_codes of the scheme is the reference
    # of both); another margin needs the angles, and says how to get them
    copy = str(tmp_path / "noangles")
    shutil.copytree(folder, copy)
    shutil.rmtree(os.path.join(copy, "angles.parquet"))
    from_bits = folder_kinetics(copy, lags=[1, 3], n_bootstrap=20, seed=1)
    from_angles = folder_kinetics(folder, lags=[1, 3], n_bootstrap=20, seed=1)
    assert from_bits.parameters["core_source"].startswith("states.parquet")
    assert from_angles.parameters["core_source"] == "angles.parquet"
    for name in ("transitions", "lifetimes", "timescales", "dwell_times"):
        pd.testing.assert_frame_equal(getattr(from_bits, name), getattr(from_angles, name))
    with pytest.raises(DihedraError, match="--keep-angles"):
        folder_kinetics(copy, core_margin_deg=10)
    assert main(["kinetics", copy, "--core-margin", "10"]) == 2
    assert "--assignment crisp" in capsys.readouterr().err
    shutil.rmtree(os.path.join(copy, "cores.parquet"))   # a folder of an older dihedra
    with pytest.raises(DihedraError, match="neither cores.parquet nor angles.parquet"):
        folder_kinetics(copy)
    assert len(folder_kinetics(copy, assignment="crisp", lags=[1], n_bootstrap=0).lifetimes)
    # no usable time step: ask for --dt-ps, and use it when given
    with open(os.path.join(copy, "summary.json")) as fh:
        summary = json.load(fh)
    for rep in summary["replicas"]:
        rep["time_step_known"] = False
    with open(os.path.join(copy, "summary.json"), "w") as fh:
        json.dump(summary, fh)
    with pytest.raises(DihedraError, match="--dt-ps"):
        folder_kinetics(copy, assignment="crisp")
    res = folder_kinetics(copy, assignment="crisp", lags=[2], dt_ps=0.25, n_bootstrap=0)
    assert res.parameters["frame_interval_ps"] == 0.25
    assert (res.timescales["lag_ps"] == 0.5).all() or res.timescales.empty
    # lags in ps are whole numbers of frames (here 1 ps apart); the former --lag (frames) still works
    assert main(["kinetics", folder, "--lag-ps", "1.5", "--overwrite"]) == 2
    assert "not a positive whole number of frames" in capsys.readouterr().err
    res = folder_kinetics(folder, lags_ps=[2.0, 4.0], n_bootstrap=0, conformers=False)
    assert res.parameters["lags_frames"] == [2, 4] and res.parameters["lags_ps"] == [2.0, 4.0]
    with pytest.raises(DihedraError, match="not both"):
        folder_kinetics(folder, lags_ps=[2.0], lags=[2])
    # a margin that leaves no core
    with pytest.raises(DihedraError, match="no core"):
        folder_kinetics(folder, core_margin_deg=65)
    # an unknown type lists the valid ones
    with pytest.raises(DihedraError, match="BUT:C1-C2-C3-C4"):
        folder_kinetics(folder, types=["nope"])


def test_a_single_structure_has_no_kinetics(tmp_path, capsys):
    # common practice: a transition is a change of state between consecutive frames and a dwell time a
    # run of frames, so replicas of one frame each hold neither: refused in plain words, before the
    # time step is asked for (also by the command line, which exits 2)
    top, first = four_site(tmp_path, [180.0], "first")
    _, second = four_site(tmp_path, [62.0], "second")
    out = str(tmp_path / "single")
    track(top, [first, second], torsions="rotatable", out=out)
    with pytest.raises(DihedraError, match="kinetics needs at least 2 frames in a replica"):
        folder_kinetics(out)
    assert main(["kinetics", out, "--dt-ps", "10"]) == 2
    err = capsys.readouterr().err
    assert "every replica of" in err and "has 1 frame (2 replica(s)): a single structure has no kinetics" in err


def test_a_run_without_transitions_and_a_run_of_few_frames_say_so(two_replicas, tmp_path):
    # two replicas of 120 frames that never change state: every rate is an upper limit and every
    # dwell time a lower bound, said plainly; four frames with one transition keep the lag of one
    # frame (the shortest there is) although it is more than 0.1 of the run, and say how little it rests on
    folder, _ = two_replicas
    still = folder_kinetics(folder, lags=[1], n_bootstrap=0)
    assert still.transitions["count"].sum() == 0
    assert [n for n in still.notices if n.startswith("no torsion changed state between two frames in 240 frame(s) "
                                                     "of 2 replica(s)")]
    top, traj = four_site(tmp_path, [180.0, 178.0, 62.0, 60.0], "short")
    out = str(tmp_path / "short")
    track(top, [traj], torsions="rotatable", keep_angles=True, out=out)
    short = folder_kinetics(out, n_bootstrap=0)
    assert short.parameters["lags_frames"] == [1]
    assert short.transitions.loc[short.transitions["level"] == "torsion", "count"].sum() == 1
    assert [n for n in short.notices if n.startswith("the lag of 1 frame (1 ps) is kept") and "(4 frames)" in n
            and "3 pair(s) of frames" in n]
    assert not [n for n in short.notices if n.startswith("no torsion changed state")]


def test_custom_scheme_and_file_output(tmp_path):
    # a custom two-state TOML scheme (trans 150..-150, other elsewhere) works with core sets; files are
    # written under their final names only (common practice: temporary name, then os.replace).
    scheme = tmp_path / "trans.toml"
    scheme.write_text('name = "trans-or-not"\n[[state]]\nlabel = "trans"\nfrom_deg = 150\nto_deg = -150\n'
                      '[[state]]\nlabel = "other"\nfrom_deg = -150\nto_deg = 150\n')
    angles = np.r_[np.full(40, 180.0), np.full(3, 145.0), np.full(40, 180.0), np.full(40, 60.0),
                   np.full(40, 178.0)]
    top, traj = four_site(tmp_path, angles, "custom")
    out = str(tmp_path / "res")
    track(top, [traj], torsions="rotatable", scheme=str(scheme), keep_angles=True, out=out)
    res = folder_kinetics(out, core_margin_deg=10, lags=[1], n_bootstrap=0)
    written = res.save(out)
    t = res.transitions[res.transitions["level"] == "torsion"].set_index(["from_state", "to_state"])
    # the three frames at 145 deg are outside the trans core (160..-160) and outside other's core
    # (-140..140): no transition; 180 -> 60 -> 178 gives two
    assert t.loc[("trans", "other"), "count"] == 1 and t.loc[("other", "trans"), "count"] == 1
    crisp = folder_kinetics(out, assignment="crisp", lags=[1], n_bootstrap=0).transitions
    assert crisp.loc[crisp["level"] == "torsion", "count"].sum() == 4
    names = set(os.listdir(out))
    expected = {"transitions.csv", "lifetimes.csv", "dwell_times.csv", "dwell_survival.csv", "timescales.csv",
                "mfpt.csv", "kinetics.json"}
    assert expected <= names
    assert {os.path.basename(p) for p in written} == expected
    assert all(os.path.dirname(p) == out for p in written)
    assert not [n for n in names if n.endswith(".partial")]


def test_profile_barriers_enter_next_to_eyring():
    # analytic: a barrier between the anti minimum (180) and the gauche+ minimum (60) with heights 12
    # above anti and 9 above gauche+ is the anti -> gauche+ barrier (12) and the reverse one (9); the
    # TST rate of a profile barrier is the Eyring rate of that barrier (CODATA 2018 constants).
    from dihedra.analysis.kinetics.estimators import _add_tst, _read_barrier_table

    scheme = get_scheme("anti-gauche")
    barriers = pd.DataFrame({
        "type": ["T", "T"], "torsion": [np.nan, np.nan], "barrier": [1, 2],
        "from_minimum_deg": [179.5, 62.0], "to_minimum_deg": [62.0, -61.0],
        "height_from_first_kj_mol": [12.0, np.nan], "height_from_first_err_kj_mol": [0.3, np.nan],
        "height_from_second_kj_mol": [9.0, np.nan], "height_from_second_err_kj_mol": [0.2, np.nan],
        "sampled": [True, False]})
    mapping = _read_barrier_table(barriers, scheme)
    assert mapping == {("type", "T", "anti", "gauche+"): (12.0, 0.3), ("type", "T", "gauche+", "anti"): (9.0, 0.2)}
    transitions = pd.DataFrame({"level": ["type"] * 3, "name": ["T"] * 3,
                                "from_state": ["anti", "gauche+", "gauche+"],
                                "to_state": ["gauche+", "anti", "gauche-"], "rate_per_ps": [0.01, 0.02, 0.0]})
    notices = []
    _add_tst(transitions, 298.15, mapping, notices)
    assert transitions["profile_barrier_kj_mol"].tolist()[:2] == [12.0, 9.0]
    assert np.isnan(transitions["profile_barrier_kj_mol"].iloc[2])  # unsampled barrier: no value
    assert transitions["tst_rate_from_profile_per_ps"].iloc[0] == pytest.approx(
        eyring_rate_per_s(12.0, 298.15) / 1e12, rel=1e-12)
    assert transitions["eyring_barrier_kj_mol"].iloc[0] == pytest.approx(
        float(eyring_barrier_kj_mol(0.01e12, 298.15)), rel=1e-12)
    assert np.isnan(transitions["eyring_barrier_kj_mol"].iloc[2])  # no rate, no barrier


def test_dwell_time_table_counts_segments_and_censoring():
    # analytic: a b-a-b sequence with known segments; the first and last segment are right-censored
    traj = np.array([0, 0, 0, 1, 1, 0, 0, 0, 0, 1])
    tables = analyse_state_series([traj], ["a", "b"], dt_ps=2.0, lags=[1], n_bootstrap=0)
    dwell = tables["dwell_times"].set_index(["state", "dwell_ps"])[["n_complete", "n_censored"]]
    assert dwell.loc[("a", 6.0)].tolist() == [0, 1]   # first segment, 3 frames
    assert dwell.loc[("a", 8.0)].tolist() == [1, 0]   # complete, 4 frames
    assert dwell.loc[("b", 4.0)].tolist() == [1, 0]   # complete, 2 frames
    assert dwell.loc[("b", 2.0)].tolist() == [0, 1]   # last segment, 1 frame
    assert len(dwell) == 4


def test_a_state_left_once_has_no_interval_of_its_dwell_time():
    # a: censored first and last visits and one complete visit (frames 5-8); b: two complete
    # visits (2 and 3 frames). One complete dwell time has no spread (a bootstrap of it, or its
    # Kaplan-Meier variance, is an interval of zero width): a has none; b's contains its mean
    traj = np.array([0, 0, 0, 1, 1, 0, 0, 0, 0, 1, 1, 1, 0, 0])
    tables = analyse_state_series([traj], ["a", "b"], dt_ps=1.0, lags=[1], n_bootstrap=200)
    life = tables["lifetimes"].set_index("state")
    assert life.loc["a", "n_segments"] == 1 and life.loc["b", "n_segments"] == 2
    assert np.isnan(life.loc["a", "ci_low_ps"]) and np.isnan(life.loc["a", "ci_high_ps"])
    assert np.isfinite(life.loc["a", "mean_ps"])
    assert life.loc["b", "mean_ps"] == pytest.approx(2.5)
    assert life.loc["b", "ci_low_ps"] < 2.5 < life.loc["b", "ci_high_ps"]


def test_dwell_survival_is_the_kaplan_meier_product_limit():
    # Kaplan & Meier, J. Am. Stat. Assoc. 53 (1958) 457: S(t) = prod over the distinct dwell times
    # t_i <= t of (1 - d_i / Y_i), a censored segment at risk up to its length (ties: events first).
    # Worked by hand for state a: complete dwells of 1, 2, 2 and 4 frames and one censored at 3 (the
    # last segment of the second trajectory): S = 4/5, 4/5 * 2/4, unchanged, 0.
    first = np.array([1, 0, 1, 0, 0, 1, 0, 0, 0, 0, 1])
    second = np.array([1, 0, 0, 1, 0, 0, 0])
    tables = analyse_state_series([first, second], ["a", "b"], dt_ps=1.0, lags=[1], n_bootstrap=0)
    surv = tables["dwell_survival"]
    a = surv[surv["state"] == "a"]
    assert a["time_ps"].tolist() == [1.0, 2.0, 3.0, 4.0]
    assert a["n_at_risk"].tolist() == [5, 4, 2, 1]
    assert a["survival"].to_numpy() == pytest.approx([0.8, 0.4, 0.4, 0.0], abs=1e-12)
    # the restricted mean is the area under this curve (1 + 0.8 + 0.4 + 0.4 frames) and the median the
    # first dwell time with S <= 1/2 (Kaplan & Meier 1958; Klein & Moeschberger, Survival Analysis, 2003)
    life = tables["lifetimes"].set_index("state")
    assert life.loc["a", "mean_ps"] == pytest.approx(2.6, rel=1e-12)
    assert life.loc["a", "median_ps"] == 2.0
    # one curve point per row of the dwell-time distribution
    dwell = tables["dwell_times"]
    assert surv[["level", "name", "state"]].equals(dwell[["level", "name", "state"]])
    assert surv["time_ps"].tolist() == dwell["dwell_ps"].tolist()
