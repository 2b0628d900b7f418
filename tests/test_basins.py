"""States from the sampled distribution (--scheme basins) against potentials whose barriers and
Boltzmann populations are known: numerical maxima of V (scipy.optimize) and Boltzmann integrals
over the basins (scipy.integrate)."""

import os

import numpy as np
import pytest
from scipy import integrate, optimize

from dihedra.errors import DihedraError
from dihedra.trajectory.basins import basin_labels, basin_scheme, find_basins
from synthetic_rotors import (EXAMPLE_BUTANE, R_KJ_PER_MOL_K, inverse_cdf_samples, rb_energy, threefold_energy,
                              write_rotor_trajectory)

T = 298.15


def _maxima(energy, guesses, half_width=40.0):
    """Angles (degrees) of the maxima of ``energy`` near each guess (bounded scalar maximisation)."""
    out = []
    for g in guesses:
        res = optimize.minimize_scalar(lambda x: -energy(x), bounds=(g - half_width, g + half_width),
                                       method="bounded", options={"xatol": 1e-6})
        out.append((res.x + 180.0) % 360.0 - 180.0)
    return np.array(out)


def _gap(a, b):
    return np.abs((np.asarray(a) - np.asarray(b) + 180.0) % 360.0 - 180.0)


def _boltzmann(energy, lo, hi):
    """Boltzmann integral of exp(-V/RT) over (lo, hi] going up the circle, normalised (no Jacobian:
    the volume element of a torsion is d(phi))."""
    kt = R_KJ_PER_MOL_K * T
    w = lambda x: np.exp(-energy(x) / kt)  # noqa: E731
    hi = hi if hi > lo else hi + 360.0
    total = integrate.quad(w, -180.0, 180.0, limit=400)[0]
    return integrate.quad(w, lo, hi, limit=400, points=[180.0] if lo < 180.0 < hi else None)[0] / total


def _hist_blocks(angles, n_blocks=16):
    """Fine 1-degree histograms per block as the pass keeps them (bins open at the left edge)."""
    blocks = np.array_split(np.asarray(angles), n_blocks)
    out = np.zeros((n_blocks, 1, 360))
    for k, a in enumerate(blocks):
        idx = np.clip(np.ceil(a + 180.0).astype(int) - 1, 0, 359)
        out[k, 0] = np.bincount(idx, minlength=360)
    return out


def test_threefold_rotor_basins_lie_at_the_maxima_of_the_potential():
    # an ethane-like 3-fold rotor made asymmetric by a 1-fold term, so that its maxima are not at
    # round angles; the maxima of V come from numerical maximisation (scipy)
    def energy(phi):
        return threefold_energy(phi, 8.0) + 1.5 * (1 + np.cos(np.radians(np.asarray(phi) - 40.0)))

    rng = np.random.default_rng(11)
    angles = inverse_cdf_samples(energy, T, 1_000_000, rng)
    schemes, table, _ = find_basins(_hist_blocks(angles), np.zeros(16, int), ["ROT:x"], ["ROT:x"], T,
                                    np.array([1.0e6]))
    scheme = schemes["ROT:x"]
    assert scheme.n_states == 3 and set(scheme.labels) == {"anti", "gauche+", "gauche-"}
    maxima = _maxima(energy, [0.0, 120.0, -120.0])
    found = np.array(sorted(scheme.boundaries_deg))
    for m in maxima:
        assert _gap(found, m).min() < 3.0, (found, maxima)
    minima = _maxima(lambda x: -energy(x), [60.0, 180.0, -60.0])
    for m in minima:
        assert _gap(table["minimum_deg"], m).min() < 3.0


def test_a_shallow_dip_is_no_basin_and_labels_follow_the_sectors():
    # a single well with a shoulder 0.2 kT deep: the depth rule (0.5 kT) merges it
    def energy(phi):
        x = np.radians(np.asarray(phi))
        return 6.0 * (1 - np.cos(x - np.pi)) - 0.3 * np.exp(-((np.degrees(x) - 60.0) / 8.0) ** 2)

    angles = inverse_cdf_samples(energy, T, 400_000, np.random.default_rng(2))
    schemes, table, _ = find_basins(_hist_blocks(angles), np.zeros(16, int), ["A"], ["A"], T, np.array([4e5]))
    assert schemes["A"].labels == ("anti",) and len(table) == 1
    assert basin_labels([178.0, 5.0]) == ["trans", "cis"]          # a planar pair
    # one naming system per type (Klyne & Prelog, Experientia 16 (1960) 521, sectors): words only
    # where every minimum lies in ap, +sc or -sc; an aromatic chi2 at +82 and -96 is +sc and -ac
    assert basin_labels([178.0, 5.0, 70.0]) == ["ap", "sp", "+sc"]
    assert basin_labels([82.0, -96.0]) == ["+sc", "-ac"]
    assert basin_labels([178.0, -65.0]) == ["anti", "gauche-"]
    assert basin_labels([40.0, 85.0]) == ["gauche+@40", "gauche+@85"]  # one sector, told apart
    s = basin_scheme([0.0, 180.0], [90.0, -90.0])
    assert s.labels == ("trans", "cis") and [s.labels[c] for c in s.assign([10.0, 170.0, 90.0])] == \
        ["cis", "trans", "cis"]


def test_twofold_rotor_gives_cis_and_trans_split_at_its_barriers():
    def energy(phi):   # an amide-like 2-fold potential with unequal wells
        x = np.radians(np.asarray(phi))
        return 5.0 * (1 - np.cos(2 * x)) + 2.0 * (1 + np.cos(x))

    angles = inverse_cdf_samples(energy, T, 600_000, np.random.default_rng(5))
    schemes, table, _ = find_basins(_hist_blocks(angles), np.zeros(16, int), ["B"], ["B"], T, np.array([6e5]))
    assert set(schemes["B"].labels) == {"cis", "trans"}
    for m in _maxima(energy, [90.0, -90.0]):
        assert _gap(np.array(schemes["B"].boundaries_deg), m).min() < 4.0


@pytest.mark.skipif(not os.path.exists(EXAMPLE_BUTANE + ".xtc"), reason="example trajectory missing")
def test_butane_rb_basins_fall_at_its_barriers_with_boltzmann_populations(tmp_path, capsys):
    """The 'Done when' of the basins: `dihedra track --scheme basins` on the united-atom RB butane gas
    (Ryckaert & Bellemans, Faraday Discuss. Chem. Soc. 66 (1978) 95; example_trajectories/README.md)."""
    from dihedra.cli import main
    from dihedra.io.resultsdir import load_results

    out = str(tmp_path / "basins")
    main(["track", EXAMPLE_BUTANE + ".pdb", EXAMPLE_BUTANE + ".xtc", "--torsions", "rotatable", "--scheme", "basins",
          "--temperature", str(T), "--out", out])
    printed = capsys.readouterr().out
    assert "basins: gauche-" in printed
    res = load_results(out)
    table = res.schemes
    assert sorted(table["state"]) == ["anti", "gauche+", "gauche-"]
    maxima = _maxima(rb_energy, [0.0, 120.0, -120.0])
    edges = np.concatenate([table["from_deg"], table["to_deg"]])
    for m in maxima:   # every barrier of V has a boundary within 10 degrees, and no boundary is elsewhere
        assert _gap(edges, m).min() < 10.0, (edges, maxima)
    for e in edges:
        assert _gap(maxima, e).min() < 10.0
    by_type = res.populations_by_type.set_index("state")
    assert (res.populations_by_type["scheme"] == "basins").all() and (res.torsions["scheme"] == "basins").all()
    for row in table.itertuples(index=False):
        expected = _boltzmann(rb_energy, row.from_deg, row.to_deg)
        got, err = by_type.loc[row.state, "population"], by_type.loc[row.state, "population_err"]
        assert abs(got - expected) < 3.0 * err, (row.state, got, err, expected)
    # the cis region is never visited (V = 44.8 kJ/mol): a boundary, not a state
    assert not table["from_barrier_sampled"].all()


def test_basins_need_a_temperature_and_follow_the_frames_given(tmp_path):
    import MDAnalysis as mda

    from dihedra import TorsionStates, track

    angles = inverse_cdf_samples(lambda p: threefold_energy(p, 6.0), T, (300, 20), np.random.default_rng(3))
    pdb, dcd = write_rotor_trajectory(str(tmp_path), "rot", angles)
    with pytest.raises(DihedraError, match="temperature"):
        track(pdb, [dcd], torsions="rotatable", scheme="basins")
    u = mda.Universe(pdb, dcd)
    ts = TorsionStates(u, torsions="rotatable", scheme="basins", temperature_k=T).run()
    assert set(ts.results.schemes["state"]) <= {"anti", "gauche+", "gauche-"}
    assert ts.results.summary["parameters"]["scheme_choice"]["basins"]["first_pass"]["frames"] == [300]
    assert ts.scheme.name == "basins" and ts.results.populations_by_type["population"].sum() == pytest.approx(1.0)
