"""Convergence checks against known answers: equilibration detection on series with a known start,
the statistical inefficiency of an AR(1) process, the replica test's false-alarm rate and power,
the forecast against the error actually reached, and the whole chain on trajectories whose first
fifth comes from another ensemble.

Synthetic processes (analytic answers, from memory / common practice):

* AR(1), x_t = rho x_{t-1} + e_t: statistical inefficiency g = (1 + rho) / (1 - rho).
* A "jump" process on three states: each step, with probability r, the state is drawn afresh from
  pi, else kept. Its stationary distribution is pi exactly, the indicator of a state is an AR(1)
  with rho = 1 - r (g = (2 - r) / r), and a start away from pi relaxes as (1 - r)^t, i.e. with the
  relaxation time 1 / r steps.
"""

import json
import os

import numpy as np
import pandas as pd
import pytest

import dihedra
from dihedra.errors import DihedraError
from dihedra.numerics.convergence import (detect_start, equilibration, replica_chi_square, series_error,
                                          time_needed)
from dihedra.trajectory.discard import parse_discard

from conftest import chain_coordinates, write_system

CENTRES_DEG = np.array([180.0, 60.0, -60.0])   # anti, gauche+, gauche- of the anti-gauche scheme


def ar1(n, rho, rng):
    x = np.empty(n)
    x[0] = rng.normal() / np.sqrt(1 - rho ** 2)
    e = rng.normal(size=n)
    for i in range(1, n):
        x[i] = rho * x[i - 1] + e[i]
    return x


def jump(n_frames, n_torsions, pi, rate, rng, start=None):
    """States (n_frames, n_torsions) of the jump process (see the module notes)."""
    s = rng.choice(3, size=n_torsions, p=pi) if start is None else np.full(n_torsions, start)
    out = np.empty((n_frames, n_torsions), dtype=np.int64)
    for f in range(n_frames):
        new = rng.random(n_torsions) < rate
        s = np.where(new, rng.choice(3, size=n_torsions, p=pi), s)
        out[f] = s
    return out


def angles_of(states, rng):
    return CENTRES_DEG[states] + rng.normal(0.0, 12.0, states.shape)


# ------------------------------------------------------------------------------------------------
# the methods on plain series
# ------------------------------------------------------------------------------------------------

def test_ar1_error_matches_the_spread_of_means():
    # g = (1 + rho) / (1 - rho) = 19 for rho = 0.9 (AR(1), analytic); se = sqrt(g var / N)
    rng = np.random.default_rng(1)
    rho, n = 0.9, 4000
    results = [series_error(ar1(n, rho, rng)) for _ in range(200)]
    g = np.median([r[2] for r in results])
    assert g == pytest.approx((1 + rho) / (1 - rho), rel=0.15)
    spread = np.std([r[0] for r in results])
    assert np.median([r[1] for r in results]) == pytest.approx(spread, rel=0.15)


def test_start_of_a_step_at_one_fifth_is_found_at_the_step():
    rng = np.random.default_rng(2)
    hits = []
    for _ in range(20):
        x = ar1(1000, 0.5, rng) + np.r_[np.full(200, 3.0), np.zeros(800)]
        s = equilibration(x)
        assert s.drifts
        hits.append(s.t0)
    off = np.abs(np.array(hits) - 200)
    # the noise of g moves the maximum of N_eff now and then: most within 3 % of the series, none
    # beyond 20 %
    assert np.mean(off <= 30) >= 0.85 and off.max() <= 200


def test_jump_process_started_away_from_equilibrium_leaves_no_bias_after_t0():
    # 2000 torsions all start in gauche+ (pi = 0.6 anti) and relax with the relaxation time
    # 1 / r = 50 steps; blocks of 10 steps (as time_blocks makes them). The start found lies within
    # a few relaxation times, and what is kept is at equilibrium (within 3 standard errors of pi).
    # A transient this short is about one correlation time long, so it need not be cut (Chodera
    # 2016: it does not lower N_eff); when it is, it counts as a drift.
    rng = np.random.default_rng(3)
    pi, r = [0.6, 0.2, 0.2], 0.02
    for _ in range(6):
        s = jump(5000, 2000, pi, r, rng, start=1)
        anti = (s == 0).mean(axis=1).reshape(500, 10).mean(axis=1)
        st = equilibration(anti)
        assert st.t0 * 10 <= 8 / r
        assert st.drifts == (st.t0 > 0 and st.shift_se > 1)
        _, se, _ = series_error(anti[st.t0:])
        assert abs(anti[st.t0:].mean() - pi[0]) < 3 * se


@pytest.mark.parametrize("make", [lambda rng: ar1(1000, 0.9, rng), lambda rng: ar1(500, 0.5, rng),
                                  lambda rng: (jump(1000, 10, [0.6, 0.2, 0.2], 0.1, rng) == 0).mean(axis=1)])
def test_stationary_series_are_rarely_called_unequilibrated(make):
    rng = np.random.default_rng(4)
    flagged = np.mean([equilibration(make(rng)).drifts for _ in range(200)])
    assert flagged <= 0.03


def test_detect_start_maximises_the_effective_samples():
    # Chodera 2016: N_eff(t0) = (N - t0) / g(t0) is largest at the returned t0 (here against a
    # brute-force scan of every t0 in the first half)
    from dihedra.numerics.statistics import statistical_inefficiency

    rng = np.random.default_rng(5)
    x = ar1(300, 0.8, rng) + np.r_[np.linspace(4, 0, 60), np.zeros(240)]
    t0, g, n_eff = detect_start(x, n_candidates=1000)
    brute = max(range(0, 151), key=lambda t: (300 - t) / statistical_inefficiency(x[t:]))
    assert t0 == brute
    assert n_eff == pytest.approx((300 - t0) / g)


def test_detect_start_of_a_long_series_refines_in_steps_and_stays_near_the_largest_n_eff(monkeypatch):
    # a series of 6,000 points (coarse grid every 30 points, then every 3, then single points):
    # about 100 + 2 x 21 inefficiencies rather than 100 + 59, and the N_eff found within 1 % of the
    # largest over every t0 of the first half (brute force, Chodera 2016's definition)
    import dihedra.numerics.convergence as conv
    from dihedra.numerics.statistics import statistical_inefficiency

    rng = np.random.default_rng(6)
    n = 6000
    x = ar1(n, 0.9, rng) + np.r_[np.linspace(6, 0, 700), np.zeros(n - 700)]
    calls = []
    monkeypatch.setattr(conv, "statistical_inefficiency", lambda y: calls.append(len(y)) or statistical_inefficiency(y))
    t0, g, n_eff = conv.detect_start(x)
    assert len(calls) <= 100 + 2 * 21 + 2
    brute = max((n - t) / statistical_inefficiency(x[t:]) for t in range(0, n // 2 + 1))
    assert brute * 0.99 <= n_eff <= brute
    assert 400 <= t0 <= 1200


def test_replica_test_false_alarm_rate_is_near_its_nominal_level_and_it_has_power():
    # two replicas of the same jump process: P(p < 0.05) near 0.05; with pi(anti) 0.6 against 0.5
    # (about 4 standard errors apart) the test almost always rejects
    rng = np.random.default_rng(6)

    def replica(pi):
        s = jump(4000, 10, pi, 0.05, rng)
        x = (s == 0).mean(axis=1).reshape(400, 10).mean(axis=1)   # time blocks of 10 steps
        _, se, _ = series_error(x)
        return x.mean(), se

    same = []
    for _ in range(300):
        (a, ea), (b, eb) = replica([0.6, 0.2, 0.2]), replica([0.6, 0.2, 0.2])
        same.append(replica_chi_square([a, b], [ea, eb])[2])
    assert 0.02 <= np.mean(np.array(same) < 0.05) <= 0.10
    differ = []
    for _ in range(100):
        (a, ea), (b, eb) = replica([0.6, 0.2, 0.2]), replica([0.5, 0.25, 0.25])
        differ.append(replica_chi_square([a, b], [ea, eb])[2])
    assert np.mean(np.array(differ) < 0.05) >= 0.9


def test_forecast_matches_the_error_reached_on_a_longer_series():
    # forecast the length for a target error from a short AR(1) series, then check the spread of
    # means of series that long
    rng = np.random.default_rng(7)
    rho, n = 0.95, 2000
    _, se, _ = series_error(ar1(n, rho, rng))
    target = se / 3.0
    needed = int(round(time_needed(se, target, n)))
    assert needed == pytest.approx(9 * n, rel=1e-6)
    reached = np.std([ar1(needed, rho, rng).mean() for _ in range(150)])
    assert reached == pytest.approx(target, rel=0.3)


def test_chi_square_of_two_estimates():
    # (0.50 - 0.52)^2 / (2 * 0.01^2) = 2 with 1 degree of freedom: p = 0.157 (chi-square table)
    chi2, dof, p = replica_chi_square([0.50, 0.52], [0.01, 0.01])
    assert (chi2, dof) == (pytest.approx(2.0), 1)
    assert p == pytest.approx(0.1573, abs=1e-4)


@pytest.mark.parametrize("value, parsed", [("auto", ("auto", None)), (300, ("frames", 300)), ("300", ("frames", 300)),
                                           ("300 frames", ("frames", 300)), ("250ps", ("time", 250.0)),
                                           ("1.5 ns", ("time", 1500.0)), (None, None)])
def test_discard_values(value, parsed):
    assert parse_discard(value) == parsed


def test_discarding_a_time_drops_the_frames_inside_it():
    from dihedra.trajectory.discard import frames_to_drop

    # frames 1 ps apart: 10 ps are frames 0..9, also where the step is stored in single precision
    # (CHARMM/NAMD DCDs of MDAnalysisTests record dt = 0.99999991 ps for 1 ps)
    for dt in (1.0, float(np.float32(0.99999991)), 0.99999991):
        assert frames_to_drop(("time", 10.0), 100, dt) == 10
        assert frames_to_drop(("time", 10.5), 100, dt) == 11
    assert frames_to_drop(("time", 10.0), 100, 2.0) == 5 and frames_to_drop(("frames", 7), 100, 2.0) == 7
    assert frames_to_drop(("time", 10000.0), 20000, float(np.float32(0.99999991))) == 10000   # (10 ns)


@pytest.mark.parametrize("value", ["3x", -1, 2.5, "2.5 frames", True, "ps"])
def test_bad_discard_values_are_one_clear_error(value):
    with pytest.raises(DihedraError, match="discard must be 'auto'"):
        parse_discard(value)


# ------------------------------------------------------------------------------------------------
# the whole chain on trajectories
# ------------------------------------------------------------------------------------------------

EQUILIBRIUM = [0.7, 0.15, 0.15]


@pytest.fixture(scope="module")
def two_ensembles(tmp_path_factory):
    """2000 frames of 30 torsions: the first fifth from pi = (0.3, 0.35, 0.35), the rest from
    EQUILIBRIUM, relaxation time 10 frames (1 ps per frame)."""
    folder = tmp_path_factory.mktemp("two-ensembles")
    rng = np.random.default_rng(11)
    states = np.r_[jump(400, 30, [0.3, 0.35, 0.35], 0.1, rng), jump(1600, 30, EQUILIBRIUM, 0.1, rng)]
    return write_system(str(folder), chain_coordinates(angles_of(states, rng)), stem="start", fmt="dcd")


def test_a_start_from_another_ensemble_is_found_and_discarded(two_ensembles, tmp_path):
    top, traj = two_ensembles
    plain = dihedra.track(top, [traj], torsions="rotatable", out=str(tmp_path / "plain"))
    table = pd.read_csv(tmp_path / "plain" / "convergence.csv")
    row = table.iloc[0]
    assert row["start"] == "drifts" and row["verdict"].startswith("not converged: the first")
    assert abs(row["t0_frames"] - 400) <= 0.03 * 2000          # within 3 % of the run
    assert any("suggested start is t0" in n for n in plain.notices)

    auto = dihedra.track(top, [traj], torsions="rotatable", discard="auto", out=str(tmp_path / "auto"))
    summary = json.load(open(tmp_path / "auto" / "summary.json"))
    record = summary["parameters"]["discard"]
    assert record["requested"] == "auto" and abs(record["discarded_frames"][0] - 400) <= 60
    assert summary["replicas"][0]["first_frame"] == record["first_frame_kept"][0]
    pops = auto.populations_by_type.set_index("state")
    for state, p in zip(["anti", "gauche+", "gauche-"], EQUILIBRIUM):
        assert abs(pops.loc[state, "population"] - p) < 3 * pops.loc[state, "population_err"]
    assert not any("suggested start" in n for n in auto.notices)
    # every table starts after the dropped frames: the series too
    states = auto.states()
    assert states["frame"].iloc[0] == record["first_frame_kept"][0]
    assert len(states) == 2000 - record["discarded_frames"][0]


def test_discard_by_frames_and_time_equals_a_later_start(two_ensembles):
    top, traj = two_ensembles
    later = dihedra.track(top, [traj], torsions="rotatable", start=500)
    frames = dihedra.track(top, [traj], torsions="rotatable", discard=500)
    time = dihedra.track(top, [traj], torsions="rotatable", discard="500 ps")
    for res in (frames, time):
        pd.testing.assert_frame_equal(res.populations, later.populations)


def test_torsion_states_discard(two_ensembles):
    import MDAnalysis as mda

    top, traj = two_ensembles
    u = mda.Universe(top, traj)
    plain = dihedra.TorsionStates(u.atoms).run(start=450)
    dropped = dihedra.TorsionStates(u.atoms, discard=450).run()
    pd.testing.assert_frame_equal(dropped.results.populations, plain.results.populations)
    assert dropped.results.summary["parameters"]["discard"]["discarded_frames"] == [450]
    auto = dihedra.TorsionStates(u.atoms, discard="auto").run()
    assert abs(auto.results.summary["parameters"]["discard"]["discarded_frames"][0] - 400) <= 60
    # the start is gone: no reason about it is left (the population error of the rest is near the
    # default target, on either side of it)
    before = dihedra.TorsionStates(u.atoms).run().results.convergence.iloc[0]
    after = auto.results.convergence.iloc[0]
    assert before["start"] == "drifts" and "not equilibrated" in before["verdict"]
    assert after["start"] != "drifts" and "not equilibrated" not in after["verdict"]
    assert after["population_err_max"] < 1.2 * after["target_error"]


@pytest.fixture(scope="module")
def replicas(tmp_path_factory):
    """Two replicas of different potentials (anti 0.7 against 0.55) and two halves of one run."""
    folder = str(tmp_path_factory.mktemp("replicas"))
    rng = np.random.default_rng(12)
    parts = [jump(1000, 30, EQUILIBRIUM, 0.1, rng), jump(1000, 30, [0.55, 0.25, 0.2], 0.1, rng),
             jump(2000, 30, EQUILIBRIUM, 0.1, rng)]
    coords = chain_coordinates(angles_of(np.concatenate(parts), rng))
    top, a = write_system(folder, coords[:1000], stem="ff_a", fmt="dcd")
    _, b = write_system(folder, coords[1000:2000], stem="ff_b", fmt="dcd")
    _, h1 = write_system(folder, coords[2000:3000], stem="half1", fmt="dcd")
    _, h2 = write_system(folder, coords[3000:], stem="half2", fmt="dcd")
    return top, (a, b), (h1, h2)


def test_replicas_of_different_potentials_disagree_and_halves_of_one_run_agree(replicas, tmp_path):
    top, different, halves = replicas
    res = dihedra.track(top, list(different), torsions="rotatable", out=str(tmp_path / "different"))
    row = pd.read_csv(tmp_path / "different" / "convergence.csv").iloc[0]
    assert row["replicas"] == "disagree" and "the replicas disagree" in row["verdict"]
    assert row["replica_p_value"] < 1e-3
    assert any("replicas disagree" in n for n in res.notices)
    same = dihedra.convergence(dihedra.track(top, list(halves), torsions="rotatable"))
    assert same.convergence["replicas"].iloc[0] == "agree"


def test_convergence_result_saves_its_tables(replicas, tmp_path):
    top, _, halves = replicas
    res = dihedra.track(top, [halves[0]], torsions="rotatable", temperature_k=300.0)
    conv = dihedra.convergence(res, target_error=0.001)
    paths = conv.save(str(tmp_path))
    assert sorted(os.path.basename(p) for p in paths) == ["convergence.csv", "convergence.json",
                                                          "convergence_by_state.csv", "convergence_over_time.csv"]
    row = conv.convergence.iloc[0]
    # error ~ 1 / sqrt(time): the time needed is the time so far x (error / target)^2
    assert row["time_needed_ps"] == pytest.approx(row["simulated_time_ps"] * (row["population_err_max"] / 0.001) ** 2)
    assert "more" in row["forecast"] and row["verdict"].startswith("not converged")
    # without a physical time step (MDAnalysis' 1 ps per frame) the forecast is a multiple of the
    # run, the same ratio, and names no time
    blind = dihedra.convergence(res, target_error=0.001, time_step_known=False).convergence.iloc[0]
    ratio = row["time_needed_ps"] / row["simulated_time_ps"]
    assert f"about {ratio:.3g} times as much sampling as analysed" in blind["forecast"]
    assert not any(unit in blind["forecast"] for unit in (" ps", " ns", " µs")) and "--dt-ps" in blind["forecast"]
    over = conv.over_time
    full = over[(over["fraction"] == 1.0)]
    assert np.allclose(full[full["direction"] == "forward"]["population"].to_numpy(),
                       full[full["direction"] == "backward"]["population"].to_numpy())
    with pytest.raises(DihedraError, match="target_error"):
        dihedra.convergence(res, target_error=2)


def test_the_convergence_command_judges_a_folder_again_and_replaces_tables_only_when_asked(replicas, tmp_path,
                                                                                           capsys):
    # the same forecast rule as above (error ~ 1 / sqrt(time)) through the command line, on a folder
    # whose tables 'track' wrote with its own target
    from dihedra.cli import main

    top, _, halves = replicas
    folder = tmp_path / "run"
    assert main(["track", top, halves[0], "--torsions", "rotatable", "--out", str(folder)]) == 0
    before = (folder / "convergence.csv").read_bytes()
    capsys.readouterr()
    assert main(["convergence", str(folder), "--target-error", "0.001"]) == 0
    out, err = capsys.readouterr()
    assert "population target 0.001" in out and "not converged: population error" in out
    assert "not written" in err and "--overwrite" in err
    assert (folder / "convergence.csv").read_bytes() == before
    assert main(["convergence", str(folder), "--target-error", "0.001", "--overwrite"]) == 0
    row = pd.read_csv(folder / "convergence.csv").iloc[0]
    expected = dihedra.convergence(dihedra.load_results(str(folder)), target_error=0.001).convergence.iloc[0]
    assert row["target_error"] == 0.001 and row["verdict"] == expected["verdict"]
    assert row["time_needed_ps"] == pytest.approx(row["simulated_time_ps"] * (row["population_err_max"] / 0.001) ** 2)
    capsys.readouterr()
    assert main(["convergence", str(folder), "--time-blocks", "5"]) == 2
    assert "at least 20" in capsys.readouterr().err


def test_report_opens_with_the_convergence_verdicts(two_ensembles, tmp_path):
    from dihedra.presentation.report import build_report

    top, traj = two_ensembles
    dihedra.track(top, [traj], torsions="rotatable", out=str(tmp_path / "r"))
    html = build_report(str(tmp_path / "r"), figures=False)
    main = html[html.index("<main>"):]
    assert main.index("id='convergence'") < main.index("id='inputs'")
    assert "not converged" in main[:main.index("id='inputs'")]
    assert "are not equilibrated" in main[:main.index("id='inputs'")]


def test_track_command_prints_the_verdicts_and_refuses_a_bad_discard(two_ensembles, tmp_path, capsys):
    from dihedra.cli import main

    top, traj = two_ensembles
    main(["track", top, traj, "--torsions", "rotatable", "--out", str(tmp_path / "c"), "--discard", "auto"])
    out = capsys.readouterr().out
    assert "convergence per type (start dropped:" in out and "converged" in out
    assert main(["track", top, traj, "--torsions", "rotatable", "--out", str(tmp_path / "d"), "--discard", "soon"]) == 2
    assert "dihedra: error: discard must be 'auto'" in capsys.readouterr().err


def assert_same_time_blocks(counted, read):
    """The time blocks the pass counted equal those read back from the state series."""
    assert counted is not None
    assert counted.types == read.types and counted.states == read.states
    np.testing.assert_array_equal(counted.n_torsions, read.n_torsions)
    assert len(counted.replicas) == len(read.replicas)
    for a, b in zip(counted.replicas, read.replicas):
        for name in ("counts", "weights", "frames", "first", "time_ps"):
            np.testing.assert_array_equal(getattr(a, name), getattr(b, name), err_msg=name)
        assert (a.replica, a.n_frames, a.interval_ps) == (b.replica, b.n_frames, b.interval_ps)


def assert_counted_equals_read_back(result, folder):
    # the convergence time blocks are counted during the pass; reading the state series back (what
    # a folder loaded later does) gives the same blocks and byte-identical tables
    from dihedra.trajectory.timeblocks import time_blocks

    assert_same_time_blocks(result.time_blocks, time_blocks(result))
    loaded = dihedra.load_results(str(folder))
    assert loaded.time_blocks is None
    again = str(folder) + "-again"
    os.makedirs(again)
    dihedra.convergence(loaded).save(again)
    for name in ("convergence.csv", "convergence_by_state.csv", "convergence_over_time.csv"):
        with open(os.path.join(folder, name), "rb") as a, open(os.path.join(again, name), "rb") as b:
            assert a.read() == b.read(), name


def test_time_blocks_counted_in_the_pass_equal_the_read_back_example(tmp_path):
    # the bundled hexane example, two replicas (the second from frame 5), serial and two workers
    top, trj = dihedra.example_path("hexane.pdb"), dihedra.example_path("hexane.xtc")
    res = dihedra.track(top, [trj, trj], allow_duplicates=True, start=5, out=str(tmp_path / "two"))
    assert_counted_equals_read_back(res, tmp_path / "two")
    res = dihedra.track(top, trj, workers=2, backend="multiprocessing", out=str(tmp_path / "workers"))
    assert_counted_equals_read_back(res, tmp_path / "workers")


def test_time_blocks_counted_in_the_pass_equal_the_read_back_protein(tmp_path):
    # MDAnalysisTests' adenylate kinase (OPLS-AA, 10 frames), backbone torsions of the protein scheme
    # set: many types in short runs (the torsion-by-torsion branch of the counting kernel)
    from MDAnalysisTests.datafiles import GRO, XTC

    res = dihedra.track(GRO, XTC, torsions="protein-backbone", out=str(tmp_path / "adk"))
    assert len(res.time_blocks.types) > 10
    assert_counted_equals_read_back(res, tmp_path / "adk")


def test_weighted_time_blocks_counted_in_the_pass(tmp_path):
    # with frame weights the block sums are the same products summed in another order
    from dihedra.trajectory.timeblocks import time_blocks

    top, trj = dihedra.example_path("hexane.pdb"), dihedra.example_path("hexane.xtc")
    n = 1000   # the example's frames
    weights = pd.DataFrame({"replica": 0, "frame": np.arange(n),
                            "weight": np.random.default_rng(2).uniform(0.5, 2.0, n)})
    weights.to_csv(tmp_path / "w.csv", index=False)
    res = dihedra.track(top, trj, weights=str(tmp_path / "w.csv"))
    read = time_blocks(res)
    for a, b in zip(res.time_blocks.replicas, read.replicas):
        np.testing.assert_allclose(a.counts, b.counts, rtol=1e-12)
        np.testing.assert_allclose(a.weights, b.weights, rtol=1e-12)
        np.testing.assert_array_equal(a.frames, b.frames)


def test_protein_types_list_only_their_own_states_and_frozen_omega_gets_no_forecast(tmp_path):
    # MDAnalysisTests' adenylate kinase (OPLS-AA, 10 frames),
    # protein scheme set: phi/psi, omega and side chains follow different parts, so every type
    # has the states of its own part only. Peptide bonds do not isomerise on MD time scales
    # (cis-trans exchange takes seconds to minutes: common practice), so no omega torsion changes
    # state in these frames: a constant series has no error to forecast from.
    from MDAnalysisTests.datafiles import GRO, XTC

    res = dihedra.track(GRO, XTC, torsions="protein-backbone", out=str(tmp_path / "adk"))
    by_state = pd.read_csv(tmp_path / "adk" / "convergence_by_state.csv")
    for typ, rows in by_state.groupby("type"):
        assert list(rows["state"]) == list(res.scheme.states_of_type(typ)), typ
    table = pd.read_csv(tmp_path / "adk" / "convergence.csv").set_index("type")
    omega = table[table.index.str.endswith(":omega")]
    # (a torsion moved when it spent 3 frames or more, or 2 % of its frames or more, outside its
    # main state: fewer are momentary excursions, whose populations are not sampled ones)
    top = res.populations_by_replica.groupby(["type", "replica", "torsion"])[["population", "n_samples"]].max()
    outside = (1.0 - top["population"]) * top["n_samples"]
    moved = set(outside[(outside > 2.5) | (outside >= 0.02 * top["n_samples"])].index.get_level_values("type"))
    frozen = [t for t in omega.index if t not in moved]
    assert frozen, "expected omega types whose torsions all stay trans"
    for t in frozen:
        row = table.loc[t]
        assert not row["state_changes_seen"] and "no torsion of this type changed state" in row["verdict"]
        assert np.isnan(row["population_err_max"]) and np.isnan(row["time_needed_ps"])
        assert "more" not in row["forecast"]
        assert by_state[by_state["type"] == t]["population_err"].isna().all()
    # types with a torsion that moved keep their estimates and forecasts
    for t in moved & set(table.index):
        assert table.loc[t, "state_changes_seen"] and "no torsion of this type changed" not in table.loc[t, "verdict"]
    # the report names them even when its table shows other types
    from dihedra.presentation.report import write_report

    html = open(write_report(str(tmp_path / "adk"), figures=False), encoding="utf-8").read()
    n_frozen = sum(t not in moved for t in table.index)
    assert f"{n_frozen} type(s) never changed state" in html and n_frozen >= len(frozen)
    assert "types that never changed state" in html


def test_a_one_state_scheme_has_nothing_to_converge(tmp_path):
    # MDAnalysisTests' adenylate kinase (CHARMM PSF/DCD): with the auto schemes, methyl and NH3+
    # rotors follow the one-state symmetric-rotor scheme (three equivalent minima, common
    # practice), so their population is 1 by definition; they are neither "not converged" nor
    # listed among the types that never changed state.
    from MDAnalysisTests.datafiles import DCD, PSF

    from dihedra.presentation.report import write_report
    from dihedra.trajectory.convergence import ONE_STATE

    res = dihedra.track(PSF, DCD, torsions="rotatable", scheme="auto", stop=20, out=str(tmp_path / "adk"))
    rotors = set(res.populations_by_type.query("scheme == 'symmetric-rotor'")["type"])
    assert len(rotors) >= 5
    table = pd.read_csv(tmp_path / "adk" / "convergence.csv").set_index("type")
    for t in rotors:
        row = table.loc[t]
        assert row["n_states"] == 1 and row["verdict"] == "converged" and row["forecast"] == ONE_STATE, t
    others = table.drop(index=list(rotors))
    assert (others["n_states"] > 1).all()
    frozen = others[~others["state_changes_seen"]]
    html = open(write_report(str(tmp_path / "adk"), figures=False), encoding="utf-8").read()
    assert f"{len(frozen)} type(s) never changed state" in html
    assert f"({len(rotors)} of them with a scheme of one state" in html
    # nor are their torsions among those that never left one state
    rotor_torsions = set(res.populations.query("scheme == 'symmetric-rotor'")["torsion"])
    stuck = [n for n in res.notices if "never left one state" in n]
    assert not stuck or not any(f"(e.g. {t} in" in stuck[0] for t in rotor_torsions)


@pytest.mark.parametrize("excursion, frozen", [(1, True), (2, True), (3, False)])
def test_a_momentary_excursion_does_not_make_a_frozen_type_converged(tmp_path, excursion, frozen):
    # 6 torsions held in anti for 300 frames, one of them in gauche+ for `excursion` frames: one or
    # two frames give gauche+ a population of 1/1800 or 2/1800 with an error of its own size, which
    # passes a target of 0.01; they say nothing sampled about gauche+, and the type is treated as
    # one whose torsions never changed state (no errors, no forecast); three frames are a visit
    from synthetic_rotors import write_rotor_trajectory

    rng = np.random.default_rng(9)
    angles = 178.0 + rng.normal(0.0, 4.0, size=(300, 6))
    angles[150:150 + excursion, 2] = 62.0
    pdb, dcd = write_rotor_trajectory(str(tmp_path), "held", angles)
    res = dihedra.track(pdb, [dcd], torsions="rotatable", out=str(tmp_path / "res"))
    row = pd.read_csv(tmp_path / "res" / "convergence.csv").iloc[0]
    assert bool(row["state_changes_seen"]) is not frozen
    assert ("no torsion of this type changed state" in row["verdict"]) is frozen
    assert bool(np.isnan(row["population_err_max"])) is frozen
    pops = res.populations_by_type.set_index("state")
    assert pops.loc["gauche+", "population"] == pytest.approx(excursion / 1800)


def test_the_command_line_gives_types_of_one_verdict_one_line(tmp_path, capsys):
    # MDAnalysisTests' adenylate kinase (OPLS-AA, 10 frames): the omega types all stay trans and
    # share one verdict, printed once with their names; the explanation of too few effective
    # samples is printed once, not in every verdict (convergence.csv keeps the full verdicts)
    from MDAnalysisTests.datafiles import GRO, XTC

    from dihedra.cli import main

    assert main(["track", GRO, XTC, "--torsions", "protein-backbone", "--out", str(tmp_path / "adk")]) == 0
    out = capsys.readouterr().out
    table = pd.read_csv(tmp_path / "adk" / "convergence.csv")
    frozen = table[table["verdict"].str.contains("no torsion of this type changed state")]
    assert len(frozen) > 1
    line = [x for x in out.splitlines() if x.startswith(f"  {len(frozen)} types (")]
    assert len(line) == 1 and "no torsion of this type changed state" in line[0]
    assert out.count("the run holds about that many") <= 1


def test_the_start_of_a_few_frames_is_not_called_equilibrated(tmp_path):
    # equilibration detection (Chodera, J. Chem. Theory Comput. 12 (2016) 1799) cuts a start only with
    # at least 20 effective samples after it, so in replicas of at most 20 frames it can flag nothing:
    # the start of a single structure (MDAnalysisTests' RNA, PDB 1k5i) or of 20 frames is "not testable"
    # with t0 empty, never "equilibrated"; 21 frames make the test possible (the control)
    from MDAnalysisTests.datafiles import RNA_PDB, RNA_PSF

    dihedra.track(RNA_PSF, [RNA_PDB], torsions="nucleic-backbone", out=str(tmp_path / "rna"))
    table = pd.read_csv(tmp_path / "rna" / "convergence.csv")
    assert (table["start"] == "not testable").all() and table["t0_ps"].isna().all() and table["t0_frames"].isna().all()
    assert (table["verdict"] == "not converged: one frame per replica, nothing to judge convergence by").all()
    assert pd.read_csv(tmp_path / "rna" / "convergence_by_state.csv")["t0_ps"].isna().all()
    rng = np.random.default_rng(3)
    states = jump(21, 6, [0.6, 0.2, 0.2], 0.3, rng)
    for n_frames, testable in ((20, False), (21, True)):
        coords = chain_coordinates(angles_of(states[:n_frames], rng))
        top, traj = write_system(str(tmp_path), coords, stem=f"few{n_frames}")
        conv = dihedra.convergence(dihedra.track(top, [traj], torsions="rotatable", scheme="anti-gauche"))
        row = conv.convergence.iloc[0]
        assert (row["start"] in ("equilibrated", "drifts")) is testable, (n_frames, row["start"])
        assert ("start not testable (every replica has at most 20 frames)" in row["verdict"]) is not testable
        assert bool(np.isfinite(row["t0_ps"])) is testable
