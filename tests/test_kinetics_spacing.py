"""Tests of what the frame spacing lets ``dihedra kinetics`` resolve (dihedra.analysis.kinetics.spacing).

A module of its own beside test_kinetics.py (the estimators), which is at the length limit.
Known discrete-time Markov chains are simulated with numpy and turned into torsions of four-site
chains; every step is one frame of the fine run, every k-th step one frame of the coarse run. The coarse run is the same
chain seen through the transition matrix T^k (Chapman-Kolmogorov; e.g. J. R. Norris, Markov
Chains, Cambridge 1997, sect. 1.1), which gives the expected dwells, jumps and timescales.
"""

import numpy as np
import pytest
from conftest import chain_coordinates

from dihedra.analysis.kinetics import state_kinetics
from dihedra.analysis.kinetics.spacing import _between, _boundaries
from dihedra.selection.schemes import get_scheme
from dihedra.tracking import track

#: anti, gauche+, gauche- (the codes of the anti-gauche scheme) and their angles.
CENTRES_DEG = np.array([180.0, 60.0, -60.0])
#: Per-step transition matrix: gauche+ and gauche- are joined only through anti.
T_GAUCHE = np.array([[0.98, 0.01, 0.01],
                     [0.025, 0.975, 0.0],
                     [0.025, 0.0, 0.975]])
#: Four states on a ring (north, east, south, west), each step to a neighbour only.
T_RING = 0.96 * np.eye(4) + 0.02 * (np.roll(np.eye(4), 1, axis=1) + np.roll(np.eye(4), -1, axis=1))
RING_CENTRES_DEG = np.array([0.0, 90.0, 180.0, -90.0])
RING_SCHEME = ('name = "compass"\n'
               '[[state]]\nlabel = "north"\nfrom_deg = -45\nto_deg = 45\n'
               '[[state]]\nlabel = "east"\nfrom_deg = 45\nto_deg = 135\n'
               '[[state]]\nlabel = "south"\nfrom_deg = 135\nto_deg = -135\n'
               '[[state]]\nlabel = "west"\nfrom_deg = -135\nto_deg = -45\n')
N_TORSIONS = 16
#: One step of the chains, in ps (lifetimes of 8 and 10 ps, as of butane's gauche and anti), and
#: the coarse spacing in steps.
STEP_PS = 0.2
EVERY = 50


def markov_chain(t, n_steps, n_series, rng):
    """States of ``n_series`` independent chains with transition matrix ``t`` (n_steps, n_series),
    the first from the stationary distribution: each stay in state i is geometric with parameter
    1 - t_ii, then the next state is j with probability t_ij / (1 - t_ii) (the same chain)."""
    stay = np.diag(t)
    jump = np.cumsum((t - np.diag(stay)) / (1.0 - stay)[:, None], axis=1)
    out = np.empty((n_steps, n_series), dtype=np.int64)
    for k in range(n_series):
        state, filled = rng.choice(len(t), p=np.linalg.matrix_power(t, 4000)[0]), 0
        while filled < n_steps:
            length = rng.geometric(1.0 - stay[state])
            out[filled:filled + length, k] = state
            filled += length
            state = int((rng.random() > jump[state]).sum())
    return out


def crossing_angles(states, centres, boundaries, rng, caught=0.3):
    """Angles of the states (wells of 8 degrees), and, at the last frame of a visit longer than one
    frame, with probability ``caught``, on the barrier it is about to cross (``boundaries[(i, j)]``
    +- 5 degrees): the frames that catch a torsion in the middle of a crossing."""
    angles = centres[states] + rng.normal(0.0, 8.0, states.shape)
    for (i, j), at in boundaries.items():
        last = (states[:-1] == i) & (states[1:] == j) & (rng.random(angles[:-1].shape) < caught)
        last[1:] &= states[:-2] == i   # (a visit of one frame keeps it: its state is seen)
        angles[:-1][last] = at + rng.normal(0.0, 5.0, int(last.sum()))
    return angles


def track_angles(angles_deg, dt_ps, **options):
    """An in-memory tracking result of four-site chains with these torsions, frames dt_ps apart."""
    import MDAnalysis as mda
    from MDAnalysis.coordinates.memory import MemoryReader

    coords = chain_coordinates(angles_deg).astype(np.float32)
    n_res = angles_deg.shape[1]
    u = mda.Universe.empty(4 * n_res, n_residues=n_res, atom_resindex=np.repeat(np.arange(n_res), 4), trajectory=True)
    u.add_TopologyAttr("names", ["C1", "C2", "C3", "C4"] * n_res)
    u.add_TopologyAttr("resnames", ["BUT"] * n_res)
    u.add_TopologyAttr("resids", np.arange(1, n_res + 1))
    u.add_TopologyAttr("elements", ["C"] * (4 * n_res))
    u.add_TopologyAttr("bonds", [(4 * r + k, 4 * r + k + 1) for r in range(n_res) for k in range(3)])
    u.load_new(coords, format=MemoryReader, dt=dt_ps)
    return track(u, torsions="rotatable", keep_angles=True, **options)


def notices_with(res, words):
    return [n for n in res.notices if words in n]


@pytest.fixture(scope="module")
def gauche_runs():
    """The gauche chain seen every step (16 torsions, 6000 frames 0.2 ps apart) and every 50th step
    (64 torsions, 1500 frames 10 ps apart), with their states."""
    rng = np.random.default_rng(7)
    states = markov_chain(T_GAUCHE, 1500 * EVERY, 4 * N_TORSIONS, rng)
    angles = crossing_angles(states, CENTRES_DEG, {(0, 1): 120.0, (1, 0): 120.0, (0, 2): -120.0, (2, 0): -120.0},
                             rng)
    fine = track_angles(angles[:6000, :N_TORSIONS], STEP_PS, temperature_k=300.0)
    coarse = track_angles(angles[::EVERY], STEP_PS * EVERY, temperature_k=300.0)
    return fine, coarse, states[:6000, :N_TORSIONS], states[::EVERY]


def pooled(table, **where):
    sub = table[table["level"] == "type"]
    for column, value in where.items():
        sub = sub[sub[column] == value]
    return sub


def test_scheme_neighbours_from_the_sectors():
    # from the sector definitions (IUPAC Klyne-Prelog sectors; the anti-gauche boundaries at 0 and
    # +-120 deg): +sc and -sc do not meet, sp lies between them on one side and +ac, ap, -ac on the
    # other; gauche+ and gauche- meet at 0 deg, and anti lies between them only the other way round.
    kp = get_scheme("klyne-prelog")
    bounds, sequence = _boundaries(kp)
    code = {label: k for k, label in enumerate(kp.labels)}
    assert not [b for b in bounds if {b[0], b[1]} == {code["+sc"], code["-sc"]}]
    assert {kp.labels[k] for k in _between(sequence, code["+sc"], code["-sc"])} == {"sp", "+ac", "ap", "-ac"}
    assert _between(sequence, code["+sc"], code["+ac"]) == {code[s] for s in ("sp", "-sc", "-ac", "ap")}
    ag = get_scheme("anti-gauche")
    bounds, _ = _boundaries(ag)
    g = {ag.labels.index("gauche+"), ag.labels.index("gauche-")}
    assert [b[2] % 360.0 for b in bounds if {b[0], b[1]} == g] == [0.0]


def test_fine_frames_give_no_spacing_notice(gauche_runs):
    # analytic: with a step exit probability of 0.02-0.025, a 1 - T_ii = 2-2.5 % share of the
    # visits last one frame (dwells are geometric), the slowest implied timescale is -1/ln(0.975) =
    # 39.5 frames, longer than every lag, and gauche+ -> gauche- has probability 0. The frames that
    # catch a crossing on its barrier (30 % of the crossings) allow the anti <-> gauche rates.
    fine, _, states, _ = gauche_runs
    res = state_kinetics(fine, lags=[1, 5, 10], n_bootstrap=0, conformers=False)
    assert not notices_with(res, "about as long as the dwell times")
    assert not notices_with(res, "counted as direct")
    assert not notices_with(res, "shorter than their lag time")
    assert not res.lifetimes["frame_limited"].any() and not res.transitions["intermediate_missed"].any()
    assert not res.timescales["shorter_than_lag"].any()
    slowest = res.timescales[(res.timescales["level"] == "type") & (res.timescales["index"] == 1)]
    assert slowest["timescale_ps"].to_numpy() == pytest.approx(-STEP_PS / np.log(0.975), rel=0.15)
    assert pooled(res.transitions, from_state="gauche+", to_state="gauche-")["count"].sum() == 0


def test_coarse_frames_are_flagged(gauche_runs):
    # analytic (Chapman-Kolmogorov): every 50th step is the chain of T^50, whose visits last one frame
    # with probability 1 - (T^50)_ii (anti 0.40, gauche 0.61), whose gauche+ -> gauche- jumps (passages
    # through anti between two frames) have probability (T^50)_+- = 0.109, and whose slowest implied
    # timescale is still -0.2 ps / ln(0.975) = 7.9 ps, now shorter than the lag of 10 ps.
    _, coarse, _, states = gauche_runs
    res = state_kinetics(coarse, lags=[1, 2], n_bootstrap=0, conformers=False)
    p50 = np.linalg.matrix_power(T_GAUCHE, EVERY)
    dwell = pooled(res.dwell_times)
    for code, label in enumerate(("anti", "gauche+", "gauche-")):
        sub = dwell[dwell["state"] == label]
        n = sub["n_complete"].sum()
        single = sub.loc[sub["dwell_ps"] == STEP_PS * EVERY, "n_complete"].sum() / n
        expected = 1.0 - p50[code, code]
        assert abs(single - expected) < 4 * np.sqrt(expected * (1 - expected) / n), (label, single, expected)
    (short,) = notices_with(res, "about as long as the dwell times")
    assert "10 ps apart" in short and "gauche+" in short and "too low" in short and "too long" in short
    assert pooled(res.lifetimes)["frame_limited"].all() and pooled(res.transitions)["frame_limited"].all()
    # the gauche+ -> gauche- "transitions" are the passages through anti the coarse chain hides
    jumps = pooled(res.transitions, from_state="gauche+", to_state="gauche-")
    in_plus = (states[:-1] == 1).sum()
    expected = in_plus * p50[1, 2]
    assert abs(jumps["count"].sum() - expected) < 5 * np.sqrt(expected), (jumps["count"].sum(), expected)
    (skipped,) = notices_with(res, "counted as direct")
    assert skipped.startswith("gauche+ <-> gauche- of ") and "through anti between two frames" in skipped
    assert "none of the" in skipped   # the wells are 7.5 sigma from 0 deg: no frame where the states meet
    flagged = res.transitions[res.transitions["intermediate_missed"]]
    assert set(zip(flagged["from_state"], flagged["to_state"])) == {("gauche+", "gauche-"), ("gauche-", "gauche+")}
    assert set(flagged["level"]) == {"type", "torsion"}
    assert not notices_with(res, "do not meet")
    ts = res.timescales[(res.timescales["level"] == "type") & (res.timescales["index"] == 1)]
    assert ts["shorter_than_lag"].all()
    at_one = ts.loc[ts["lag_frames"] == 1, "timescale_ps"]
    assert at_one.to_numpy() == pytest.approx(-STEP_PS / np.log(0.975), rel=0.06)
    assert notices_with(res, "shorter than their lag time")


def test_states_that_do_not_meet(tmp_path):
    # analytic: on a ring of four states a step goes to a neighbour only, so north -> south never
    # happens between two fine frames; every 50th step it happens with probability (T^50)_NS =
    # 0.189, always through east or west. No temperature is needed to say so.
    scheme = tmp_path / "compass.toml"
    scheme.write_text(RING_SCHEME)
    rng = np.random.default_rng(3)
    states = markov_chain(T_RING, 400 * EVERY, N_TORSIONS, rng)
    angles = RING_CENTRES_DEG[states] + rng.normal(0.0, 6.0, states.shape)
    fine = state_kinetics(track_angles(angles[:4000], STEP_PS, scheme=str(scheme)), lags=[1, 5], n_bootstrap=0,
                          conformers=False)
    assert not notices_with(fine, "do not meet") and not fine.transitions["intermediate_missed"].any()
    assert pooled(fine.transitions, from_state="north", to_state="south")["count"].sum() == 0
    coarse = state_kinetics(track_angles(angles[::EVERY], STEP_PS * EVERY, scheme=str(scheme)), lags=[1],
                            n_bootstrap=0, conformers=False)
    (apart,) = notices_with(coarse, "do not meet on the circle")
    assert "north <-> south" in apart or "east <-> west" in apart
    assert "east or west" in apart or "north or south" in apart
    p50 = np.linalg.matrix_power(T_RING, EVERY)
    seen = states[::EVERY]
    got = pooled(coarse.transitions, from_state="north", to_state="south")
    expected = (seen[:-1] == 0).sum() * p50[0, 2]
    assert abs(got["count"].sum() - expected) < 5 * np.sqrt(expected)
    assert got["intermediate_missed"].all()
    neighbours = pooled(coarse.transitions, from_state="north", to_state="east")
    assert not neighbours["intermediate_missed"].any()
