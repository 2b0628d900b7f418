"""Umbrella windows (MBAR and WHAM) against known potentials, and weights through profiles."""

import json
import os
import warnings

import numpy as np
import pandas as pd
import pytest
from scipy import integrate

from dihedra.analysis.couplings import ensemble_couplings, get_relation
from dihedra.errors import DihedraError
from dihedra.analysis.profiles import free_energy_profiles
from dihedra.io.resultsdir import load_results
from dihedra.tracking import track
from dihedra.units import kt_kj_mol
from dihedra.analysis.windows import (bias_kj_mol, neighbour_pairs, read_windows, solve_free_energies, unbias_windows,
                                     wham_log_factors)
from synthetic_rotors import inverse_cdf_samples, rb_energy, write_rotor_trajectory

T = 298.15
KT = kt_kj_mol(T)
HERE = os.path.dirname(os.path.abspath(__file__))
BUTANE_WINDOWS = os.path.join(HERE, "..", "example_trajectories", "butane_windows", "windows.csv")


def asymmetric_energy(phi_deg):
    """A known potential with a 45 kJ/mol barrier near 0 and no mirror symmetry (so that a sign
    slip in the bias would show): RB butane + 4 sin(phi) kJ/mol."""
    return rb_energy(phi_deg) + 4.0 * np.sin(np.radians(phi_deg))


def reference_profile(energy, n_bins=72):
    """Bin-averaged -kT ln p of p ~ exp(-V/kT), normalised, per degree (scipy.integrate.quad)."""
    w = lambda x: np.exp(-energy(x) / KT)  # noqa: E731
    z = integrate.quad(w, -180, 180, points=[-120, -60, 0, 60, 120], limit=200)[0]
    edges = np.linspace(-180, 180, n_bins + 1)
    mass = np.array([integrate.quad(w, a, b)[0] for a, b in zip(edges[:-1], edges[1:])]) / z
    return -KT * np.log(mass / (edges[1] - edges[0])), mass


def write_windows(folder, energy, centres, k, n_frames, n_molecules, seed=1, name="windows.csv"):
    """Exact samples of the biased density of every window, as 4-atom molecules (one trajectory each)."""
    rng = np.random.default_rng(seed)
    rows = []
    for i, c in enumerate(centres):
        a = inverse_cdf_samples(lambda p: energy(p) + bias_kj_mol(p, c, k), T, (n_frames, n_molecules), rng)
        pdb, dcd = write_rotor_trajectory(str(folder), f"w{i:02d}", a)
        rows.append({"trajectory": os.path.basename(dcd), "topology": os.path.basename(pdb),
                     "torsions": "rotatable", "centre_deg": c, "k_kj_mol_rad2": k})
    path = os.path.join(str(folder), name)
    pd.DataFrame(rows).to_csv(path, index=False)
    return path


@pytest.fixture(scope="module")
def synthetic(tmp_path_factory):
    """36 windows 10 degrees apart, k = 400 kJ/mol/rad^2, 2400 exact samples each, analysed."""
    folder = tmp_path_factory.mktemp("windows")
    csv = write_windows(folder, asymmetric_energy, np.arange(-180.0, 180.0, 10.0), 400.0, 80, 30)
    out = os.path.join(str(folder), "results")
    wres = unbias_windows(csv, temperature_k=T, n_bootstrap=40)
    assert wres.result.folder is None and not os.path.exists(out)  # nothing written before save
    paths = wres.save(out)
    assert wres.result.folder == out and all(os.path.exists(p) for p in paths)
    return wres, out


# ------------------------------------------------------------------------------------------------
# The equations
# ------------------------------------------------------------------------------------------------

def test_solver_recovers_exact_free_energies():
    # analytic: with the expected counts of known windows the equations return the exact f_k and p
    g = np.linspace(-179.5, 179.5, 360)
    p = np.exp(-asymmetric_energy(g) / KT)
    p /= p.sum()
    centres, k = np.arange(-180.0, 180.0, 20.0), 300.0
    log_c = -bias_kj_mol(g[None, :], centres[:, None], k) / KT
    f_true = -np.log(np.exp(log_c) @ p)
    n_k = np.linspace(500, 1500, len(centres))
    counts = (n_k[:, None] * np.exp(f_true[:, None] + log_c) * p[None, :]).sum(axis=0)
    f, log_p = solve_free_energies(counts, n_k, log_c)
    assert np.allclose(f, f_true - f_true[0], atol=1e-7)
    assert np.allclose(np.exp(log_p), p, rtol=1e-7)


def test_solver_matches_pymbar_on_samples():
    # reference library: pymbar.MBAR on the same samples (each sample its own grid point)
    import logging
    logging.getLogger("pymbar").setLevel(logging.ERROR)
    import pymbar

    rng = np.random.default_rng(2)
    centres, k = np.array([-40.0, -20.0, 0.0, 20.0, 40.0]), 200.0
    x = np.concatenate([inverse_cdf_samples(lambda q: rb_energy(q) + bias_kj_mol(q, c, k), T, 300, rng)
                        for c in centres])
    u = bias_kj_mol(x[None, :], centres[:, None], k) / KT
    n_k = np.full(len(centres), 300.0)
    f, _ = solve_free_energies(np.ones(len(x)), n_k, -u)
    ref = pymbar.MBAR(u, n_k).f_k
    assert np.allclose(f, ref - ref[0], atol=1e-6)


def test_wham_bias_factors_are_bin_means():
    # scipy.integrate.quad of exp(-w/kT) over a bin, divided by its width
    lc = wham_log_factors(np.array([30.0]), np.array([500.0]), KT)
    for b in (200, 205, 215):
        a = -180.0 + b
        exact = integrate.quad(lambda q: np.exp(-bias_kj_mol(q, 30.0, 500.0) / KT), a, a + 1)[0]
        assert np.exp(lc[0, b]) == pytest.approx(exact, rel=2e-3)


def test_bias_uses_the_minimum_image():
    # analytic: 170 and -170 deg are 20 degrees apart
    assert bias_kj_mol(-170.0, 170.0, 100.0) == pytest.approx(0.5 * 100.0 * np.radians(20.0) ** 2)
    assert neighbour_pairs([-170.0, 170.0, 10.0, -10.0, 90.0, -90.0])[-1] == (1, 0)


# ------------------------------------------------------------------------------------------------
# Synthetic windows of a known potential with a high barrier
# ------------------------------------------------------------------------------------------------

@pytest.mark.slow
def test_synthetic_windows_recover_the_potential_everywhere(synthetic):
    wres, _ = synthetic
    ref, mass = reference_profile(asymmetric_energy)
    prof = wres.profiles.by_type[next(iter(wres.profiles.by_type))][0]
    # the barrier is out of reach without bias (analytic): an unbiased run with as many samples
    # would put fewer than 0.01 samples into the top bin
    n_samples = int(wres.windows["n_samples"].sum())
    top = int(np.argmax(ref))
    assert n_samples * mass[top] < 0.01
    assert prof.sampled.all()
    f = -KT * np.log(prof.density_per_deg)     # normalised: no alignment needed
    z = (f - ref) / prof.free_energy_err_kj_mol
    # analytic: every bin within its error (4 sigma for the worst of 72 bins), the barrier top within 3
    assert np.max(np.abs(z)) < 4.0
    assert abs(z[top]) < 3.0
    assert abs(f[top] - ref[top]) < 1.0
    # the errors are honest: mean z^2 near 1 (analytic expectation for correct errors)
    assert 0.3 < np.mean(z ** 2) < 2.5
    # the barrier feature against the potential's own barrier (fine grid of the known potential)
    grid = np.linspace(-180, 180, 36001)
    v = asymmetric_energy(grid)
    bar = wres.profiles.barriers
    syn = bar.loc[(bar["angle_deg"].abs() < 30)].iloc[0]
    assert syn["free_energy_kj_mol"] == pytest.approx(v.max() - v.min(),
                                                      abs=max(1.0, 3 * syn["free_energy_err_kj_mol"]))


@pytest.mark.slow
def test_mbar_and_wham_agree_within_error(synthetic):
    wres, _ = synthetic
    cmp = wres.comparison
    assert cmp["sampled"].all()
    # both estimates of the same data: the difference within 2 combined errors in every bin
    assert (cmp["difference_kj_mol"].abs() <= 2 * cmp["difference_err_kj_mol"]).all()
    row = wres.agreement.iloc[0]
    assert row["fraction_within"] == 1.0
    # the grid solution of the MBAR equations matches pymbar's (reference library)
    assert row["mbar_grid_check_kt"] < 5e-3
    # every neighbouring pair overlaps (the windows were designed to)
    assert not wres.overlap["poor"].any()
    assert len(wres.overlap) == 36  # the circle closes


@pytest.mark.slow
def test_windows_folder_serves_couplings_and_populations(synthetic):
    wres, out = synthetic
    res = load_results(out)
    assert {"profiles.csv", "windows.csv", "window_overlap.csv", "windows_profiles.csv",
            "windows.json"} <= set(os.listdir(out))
    # reweighted populations against the Boltzmann integral (scipy.integrate.quad), within 3 sigma
    w = lambda x: np.exp(-asymmetric_energy(x) / KT)  # noqa: E731
    z = integrate.quad(w, -180, 180, points=[-120, -60, 0, 60, 120], limit=200)[0]
    anti = (integrate.quad(w, 120, 180)[0] + integrate.quad(w, -180, -120)[0]) / z
    row = res.populations_by_type.set_index("state").loc["anti"]
    assert abs(row["population"] - anti) < 3 * row["population_err"]
    # couplings from the weighted histograms equal the integral within error (scipy)
    rel = get_relation("karplus-1959")
    expected = integrate.quad(lambda x: rel.evaluate(x) * w(x), -180, 180, points=[-90, 0, 90], limit=200)[0] / z
    cres = ensemble_couplings(res, "karplus-1959", select=[res.torsion_set.types[0]])
    pooled = cres.couplings[cres.couplings["level"] == "type"].iloc[0]
    assert abs(pooled["j_hz"] - expected) < 4 * pooled["j_err_hz"]
    # the profile files have the layout of dihedra profile
    prof = pd.read_csv(os.path.join(out, "profiles.csv"))
    assert set(prof["estimate"]) == {"histogram", "kernel"}
    with open(os.path.join(out, "windows.json")) as fh:
        assert json.load(fh)["n_windows"] == 36


def test_compare_on_a_windows_folder_keeps_the_windows_errors(synthetic):
    # compare on a windows folder uses the windows' own MBAR profile and the errors of their bootstrap
    # (window free energies re-estimated in every resample), never errors recomputed from the weighted
    # histograms with the weights held fixed
    from dihedra.analysis.compare import compare_with_scan
    from dihedra.analysis.scans import scan_from_points

    wres, out = synthetic
    res = load_results(out)
    typ = res.torsion_set.types[0]
    grid = np.arange(-180.0, 180.0, 2.0)
    scan = scan_from_points(grid, asymmetric_energy(grid))
    cmp = compare_with_scan(res, scan, temperature_k=T)
    own = wres.profiles.by_type[typ][0]
    np.testing.assert_allclose(cmp.profiles["free_energy_err_kj_mol"], own.free_energy_err_kj_mol, rtol=1e-6)
    info = cmp.details["types"][typ]
    syn = next(b for b in info["barriers"] if abs(b["scan_angle_deg"]) < 30)
    written = wres.profiles.barriers.loc[wres.profiles.barriers["angle_deg"].abs() < 30].iloc[0]
    assert syn["sampled_free_energy_err_kj_mol"] == pytest.approx(written["free_energy_err_kj_mol"], rel=1e-6)
    # the states too; and a population carries the same error in populations_by_type.csv and in
    # state_free_energies.csv (the rule of dihedra profile)
    dg = wres.profiles.state_free_energies.set_index("state")
    pooled = res.populations_by_type.set_index("state")
    for s in info["states"]:
        assert s["free_energy_err_kj_mol"] == pytest.approx(dg.loc[s["state"], "free_energy_err_kj_mol"], rel=1e-6)
        assert s["population_err"] == pytest.approx(dg.loc[s["state"], "population_err"], rel=1e-6)
        assert dg.loc[s["state"], "population_err"] == pytest.approx(pooled.loc[s["state"], "population_err"])
    # the errors are honest against the known potential (analytic; scipy quad for the barrier's height):
    # the syn barrier within 3 errors of 1 kJ/mol at most, every reliable bin within 4 errors of the
    # scan's bin average, mean z^2 near 1; also for bins of another width than the windows'
    v = asymmetric_energy(np.linspace(-180, 180, 36001))
    assert syn["sampled_free_energy_err_kj_mol"] < 1.0
    assert abs(syn["sampled_free_energy_kj_mol"] - (v.max() - v.min())) < 3 * syn["sampled_free_energy_err_kj_mol"]
    for width in (5.0, 10.0):
        rows = compare_with_scan(res, scan, temperature_k=T, bin_width_deg=width).profiles
        rel = rows[rows["reliable"]]
        z = rel["difference_kj_mol"] / rel["free_energy_err_kj_mol"]
        assert len(rel) >= 0.6 * len(rows) and np.max(np.abs(z)) < 4.0 and 0.3 < np.mean(z ** 2) < 2.5, width


def test_poor_overlap_is_reported_by_pair(tmp_path):
    centres = [-180.0, -170.0, -160.0, -150.0, -140.0, -100.0, -90.0, -80.0]
    csv = write_windows(tmp_path, rb_energy, centres, 400.0, 40, 10, seed=4)
    wres = unbias_windows(csv, temperature_k=T, n_bootstrap=20)
    poor = wres.overlap[wres.overlap["poor"]]
    # analytic: 40 degrees apart with sigma of about 4 degrees, the windows -140 and -100 cannot overlap
    assert poor[["centre_a_deg", "centre_b_deg"]].values.tolist() == [[-140.0, -100.0]]
    assert any("poor overlap" in n and "-140/-100" in n for n in wres.notices)
    assert any("sampled by no window" in n for n in wres.notices)
    prof = wres.profiles.profiles
    hist = prof[prof["estimate"] == "histogram"]
    assert hist.loc[~hist["sampled"], "free_energy_kj_mol"].isna().all()


# ------------------------------------------------------------------------------------------------
# Per-frame weights through profiles (and populations)
# ------------------------------------------------------------------------------------------------

def test_weights_flow_through_profiles(tmp_path):
    # analytic: samples drawn from V1 and weighted by exp(-(V0 - V1)/kT) have the profile of V0
    rng = np.random.default_rng(8)
    v1 = lambda x: 0.2 * rb_energy(x)  # noqa: E731 - a flattened potential that visits everything
    angles = inverse_cdf_samples(v1, T, (1500, 1), rng)
    pdb, dcd = write_rotor_trajectory(str(tmp_path), "flat", angles)
    weights = np.exp(-(rb_energy(angles[:, 0]) - v1(angles[:, 0])) / KT)
    pd.DataFrame({"weight": weights}).to_csv(tmp_path / "w.csv", index=False)
    out = str(tmp_path / "weighted")
    track(pdb, [dcd], torsions="0,1,2,3", weights=str(tmp_path / "w.csv"), out=out, temperature_k=T)
    res = load_results(out)
    assert res.blocks["histograms"].dtype == np.float64  # weighted sums (trackpass)
    pset = free_energy_profiles(res, temperature_k=T, per_torsion=False, n_bootstrap=100)
    hist = pset.profiles[(pset.profiles["estimate"] == "histogram")]
    ref, _ = reference_profile(rb_energy)
    f = -KT * np.log(hist["probability_density_per_deg"].to_numpy())
    err = hist["free_energy_err_kj_mol"].to_numpy()
    ok = hist["sampled"].to_numpy() & (ref - ref.min() < 15.0)
    z = (f - ref)[ok] / err[ok]
    assert np.max(np.abs(z)) < 4.0
    # without the weights the same samples give the flattened profile, far from V0 (the weights matter)
    out2 = str(tmp_path / "unweighted")
    track(pdb, [dcd], torsions="0,1,2,3", out=out2, temperature_k=T)
    flat = free_energy_profiles(load_results(out2), temperature_k=T, per_torsion=False, n_bootstrap=100).profiles
    f2 = -KT * np.log(flat[flat["estimate"] == "histogram"]["probability_density_per_deg"].to_numpy())
    assert np.max(np.abs(f2 - ref)[ok]) > 5.0
    # the weighted anti population matches the Boltzmann integral of V0 (scipy), within 3 sigma
    w0 = lambda x: np.exp(-rb_energy(x) / KT)  # noqa: E731
    z0 = integrate.quad(w0, -180, 180, points=[-120, 0, 120], limit=200)[0]
    anti = (integrate.quad(w0, 120, 180)[0] + integrate.quad(w0, -180, -120)[0]) / z0
    row = res.populations.set_index("state").loc["anti"]
    assert abs(row["population"] - anti) < 3 * row["population_err"]


# ------------------------------------------------------------------------------------------------
# Input checks and the command line
# ------------------------------------------------------------------------------------------------

def test_window_table_checks(tmp_path):
    path = tmp_path / "w.csv"
    path.write_text("trajectory,topology,centre_deg\na.dcd,a.pdb,10\nb.dcd,b.pdb,20\n")
    with pytest.raises(DihedraError, match="torsions, k_kj_mol_rad2"):
        read_windows(str(path))
    path.write_text("trajectory,topology,torsions,centre_deg,k_kj_mol_rad2\n"
                    "a.dcd,a.pdb,\"0,1,2,3\",190,100\nsub/b.dcd,/abs/b.pdb,rotatable,20,0\n")
    with pytest.raises(DihedraError, match="row 2: k_kj_mol_rad2 must be a positive number"):
        read_windows(str(path))
    path.write_text("trajectory,topology,torsions,centre_deg,k_kj_mol_rad2\n"
                    "a.dcd,a.pdb,\"0,1,2,3\",190,100\nsub/b.dcd,/abs/b.pdb,rotatable,20,50\n")
    table = read_windows(str(path))
    assert table["trajectory"][1] == os.path.join(str(tmp_path), "sub", "b.dcd")  # relative to the CSV
    assert table["topology"][1] == "/abs/b.pdb"
    assert table["torsions"][0] == "0,1,2,3"
    assert table["centre_deg"][0] == pytest.approx(-170.0)  # wrapped to (-180, 180]
    with pytest.raises(DihedraError, match="temperature"):
        unbias_windows(str(path), temperature_k=None)


def test_window_table_as_dataframe_and_save(tmp_path, monkeypatch):
    # common practice: a DataFrame with the columns of the CSV gives the same analysis; the results
    # folder is written only by save, never over an existing folder without overwrite
    from dihedra.errors import OutputExistsError

    centres = np.arange(-180.0, 180.0, 30.0)
    csv = write_windows(tmp_path, lambda x: 0.3 * rb_energy(x), centres, 60.0, 30, 10, seed=6)
    from_file = unbias_windows(csv, temperature_k=T, n_bootstrap=20)
    monkeypatch.chdir(tmp_path)   # relative paths of a DataFrame are relative to the current folder
    from_frame = unbias_windows(pd.read_csv(csv, dtype={"torsions": str}), temperature_k=T, n_bootstrap=20)
    monkeypatch.undo()
    pd.testing.assert_frame_equal(from_file.comparison, from_frame.comparison)
    pd.testing.assert_frame_equal(from_file.windows, from_frame.windows)
    assert from_file.info["windows_file"] == os.path.abspath(csv) and from_frame.info["windows_file"] is None
    assert from_frame.parameters["n_bootstrap"] == 20
    out = str(tmp_path / "saved")
    paths = from_frame.save(out)
    names = {os.path.basename(p) for p in paths}
    assert {"windows.csv", "profiles.csv", "summary.json", "blocks.npz", "histograms.parquet"} <= names
    assert load_results(out).summary["temperature_k"] == T
    with pytest.raises(OutputExistsError):
        from_file.save(out)
    assert from_file.save(out, overwrite=True) and from_file.result.folder == out
    with pytest.raises(OutputExistsError, match="holds an input"):   # never replaced
        from_file.save(str(tmp_path), overwrite=True)


def test_command_line(tmp_path, capsys):
    from dihedra.cli import main

    centres = np.arange(-180.0, 180.0, 30.0)
    csv = write_windows(tmp_path, lambda x: 0.3 * rb_energy(x), centres, 60.0, 30, 10, seed=6)
    out = str(tmp_path / "cli")
    assert main(["windows", csv, "--temperature", "298.15", "--out", out, "--bootstrap", "20"]) == 0
    text = capsys.readouterr().out
    assert "MBAR vs WHAM" in text and "overlap of neighbouring windows" in text
    assert load_results(out).summary["temperature_k"] == 298.15
    assert main(["windows", csv, "--temperature", "298.15", "--out", out]) == 2  # exists, no --overwrite
    assert main(["windows", str(tmp_path / "missing.csv"), "--temperature", "300", "--out",
                 str(tmp_path / "x")]) == 2


# ------------------------------------------------------------------------------------------------
# Ryckaert-Bellemans butane simulated in windows (OpenMM, example_trajectories/make_butane_windows.py)
# ------------------------------------------------------------------------------------------------

@pytest.fixture(scope="module")
def butane_windows():
    """The bundled OpenMM windows of RB butane (36 windows, k = 400 kJ/mol/rad^2, 50 molecules x 85
    frames each), analysed with 50 bootstrap resamples."""
    return unbias_windows(BUTANE_WINDOWS, temperature_k=T, n_bootstrap=50)


@pytest.mark.slow
def test_openmm_butane_windows_reproduce_the_rb_potential(butane_windows):
    # Ryckaert & Bellemans, Faraday Discuss. Chem. Soc. 66 (1978) 95: RB butane C0..C5; the derived
    # values are recomputed here from the coefficients
    c = [9.28, 12.16, -13.12, -3.06, 26.24, -31.5]
    syn = sum(cn * (-1.0) ** n for n, cn in enumerate(c))       # V(0): cos(psi) = -1
    anti = sum(c)                                                 # V(180): cos(psi) = 1
    assert syn - anti == pytest.approx(44.80, abs=1e-9)
    grid = np.linspace(0, 180, 18001)
    v = rb_energy(grid)
    gauche = v[(grid > 30) & (grid < 90)].min()
    tg_barrier = v[(grid > 90) & (grid < 150)].max()
    wres = butane_windows
    prof = wres.profiles.by_type[next(iter(wres.profiles.by_type))][0]
    ref, _ = reference_profile(rb_energy)
    assert prof.sampled.all()
    f = -KT * np.log(prof.density_per_deg)
    dev = f - ref
    # within 1 kJ/mol everywhere, the syn barrier included, and within 4 errors
    assert np.max(np.abs(dev)) < 1.0
    assert np.max(np.abs(dev / prof.free_energy_err_kj_mol)) < 4.0
    bar = wres.profiles.barriers.set_index(wres.profiles.barriers["angle_deg"].round(-1).abs())
    minima = wres.profiles.minima
    syn_row = bar[bar["angle_deg"].abs() < 20].iloc[0]
    assert syn_row["free_energy_kj_mol"] == pytest.approx(44.80, abs=1.0)
    tg = bar[(bar["angle_deg"].abs() > 100) & (bar["angle_deg"].abs() < 140)]
    assert np.allclose(tg["free_energy_kj_mol"], tg_barrier - anti, atol=1.0)
    g = minima[minima["angle_deg"].abs() < 90]
    assert len(g) == 2 and np.allclose(g["free_energy_kj_mol"], gauche - anti, atol=1.0)
    # MBAR and WHAM agree within error; every neighbouring pair overlaps
    assert wres.agreement.iloc[0]["fraction_within"] == 1.0
    assert not wres.overlap["poor"].any()
    # complete XTC files are not reported as cut (the frame end is read from the XTC header)
    assert not any("incomplete frame" in n for n in wres.notices)


# ------------------------------------------------------------------------------------------------
# State populations against the Boltzmann integral, and their errors against the spread
# ------------------------------------------------------------------------------------------------

def boltzmann_populations(energy):
    """anti (|phi| > 120), gauche+ (0, 120) and gauche- (-120, 0) of p ~ exp(-V/kT) (scipy.integrate.quad)."""
    w = lambda x: np.exp(-energy(x) / KT)  # noqa: E731
    arcs = {"anti": ((120.0, 180.0), (-180.0, -120.0)), "gauche+": ((0.0, 60.0), (60.0, 120.0)),
            "gauche-": ((-120.0, -60.0), (-60.0, 0.0))}
    mass = {s: sum(integrate.quad(w, a, b, limit=200)[0] for a, b in arc) for s, arc in arcs.items()}
    total = sum(mass.values())
    return {s: m / total for s, m in mass.items()}


def estimate_windows(angles, centres, k, n_bootstrap, seed=0):
    """estimate_type on samples ``angles`` (n_windows, n) of windows at ``centres`` (one frame per
    sample, 16 blocks per window), anti-gauche states: the TypeEstimate and the bootstrap error of
    each state population."""
    from dihedra.analysis.windows import estimate_type
    from dihedra.numerics.density import bootstrap_multiplicities, bootstrap_spread
    from dihedra.selection.schemes import get_scheme

    n_win, n = angles.shape
    window = np.repeat(np.arange(n_win), n)
    pos = np.tile(np.arange(n), n_win)
    flat = angles.reshape(-1)
    mult = bootstrap_multiplicities(np.repeat(np.arange(n_win), 16), n_bootstrap, np.random.default_rng(seed))
    table = pd.DataFrame({"centre_deg": centres, "k_kj_mol_rad2": k})
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        est = estimate_type(flat, window, pos, window * 16 + pos * 16 // n,
                            get_scheme("anti-gauche").assign(flat).astype(np.int64), 3, table, KT, mult)
    return est, bootstrap_spread(est.boot_state_counts)[0]


def quantile_samples(energy, n):
    """The n quantiles (i + 1/2) / n of p ~ exp(-V/kT) (the CDF on a 0.001-degree grid): samples
    without noise, whose estimates err only by the discreteness, O(1/n)."""
    grid = np.linspace(-180.0, 180.0, 360001)
    w = np.exp(-(energy(grid) - energy(grid).min()) / KT)
    cdf = np.concatenate([[0.0], np.cumsum(0.5 * (w[1:] + w[:-1]) * np.diff(grid))])
    return np.interp((np.arange(n) + 0.5) / n, cdf / cdf[-1], grid)


@pytest.mark.slow
def test_windows_of_noiseless_samples_give_the_boltzmann_populations():
    # analytic: windows whose samples are the exact quantiles of their biased densities carry no
    # noise; MBAR must return the Boltzmann integral of every state (scipy.integrate.quad) up to the
    # discreteness of 1000 quantiles (6e-4 measured), far below the +0.028 that a bias in the
    # estimator would have to be to explain 0.680 for the bundled butane windows
    centres, k = np.arange(-180.0, 180.0, 10.0), 400.0
    angles = np.stack([quantile_samples(lambda p, c=c: asymmetric_energy(p) + bias_kj_mol(p, c, k), 1000)
                       for c in centres])
    est, _ = estimate_windows(angles, centres, k, n_bootstrap=4)
    exact = boltzmann_populations(asymmetric_energy)
    for s, state in enumerate(("anti", "gauche+", "gauche-")):
        assert est.state_counts[s] == pytest.approx(exact[state], abs=2e-3)


@pytest.mark.slow
def test_population_errors_match_the_spread_of_independent_windows():
    # analytic: six independent sets of exact samples of the same 36 windows; their populations
    # scatter about the Boltzmann integral (scipy.integrate.quad) as their bootstrap errors say:
    # mean z^2 near 1 (chi-square with 12 degrees, the three states summing to 1: below 0.3 or above
    # 2.5 has a chance near 1 %), and their mean is within 3 of its errors of the integral
    centres, k, n, reps = np.arange(-180.0, 180.0, 10.0), 400.0, 600, 6
    exact = np.array(list(boltzmann_populations(rb_energy).values()))
    rng = np.random.default_rng(5)
    pops, errs = [], []
    for r in range(reps):
        angles = np.stack([inverse_cdf_samples(lambda p, c=c: rb_energy(p) + bias_kj_mol(p, c, k), T, n, rng)
                           for c in centres])
        est, err = estimate_windows(angles, centres, k, n_bootstrap=20, seed=r)
        pops.append(est.state_counts)
        errs.append(err)
    pops, errs = np.array(pops), np.array(errs)
    z = (pops - exact) / errs
    assert 0.3 < np.mean(z ** 2) < 2.5
    assert np.all(np.abs(pops.mean(axis=0) - exact) < 3 * np.sqrt(np.mean(errs ** 2, axis=0) / reps))


def read_window_angles(csv):
    """Torsion angles (n_windows, n_frames, n_molecules) of every window of a table of 4-site
    molecules, read with MDAnalysis (calc_dihedrals, IUPAC sign), and the table."""
    import MDAnalysis as mda
    from MDAnalysis.lib.distances import calc_dihedrals

    table = pd.read_csv(csv)
    folder = os.path.dirname(csv)
    out = []
    for row in table.itertuples(index=False):
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            u = mda.Universe(os.path.join(folder, row.topology), os.path.join(folder, row.trajectory))
        q = np.arange(u.atoms.n_atoms // 4) * 4
        frames = [calc_dihedrals(*(u.atoms.positions[q + i] for i in range(4))) for _ in u.trajectory]
        out.append(np.degrees(frames))
    return np.array(out), table


def grid_mbar_anti(angles, centres, k, n_grid=7200):
    """The anti population (|phi| > 120) of window samples ``angles`` (n_windows, ...) by the MBAR
    equations (Shirts & Chodera, J. Chem. Phys. 129 (2008) 124105) on a 0.05-degree grid, solved
    here by minimising their convex objective with scipy (independent of dihedra's solver)."""
    from scipy.optimize import minimize
    from scipy.special import logsumexp

    width = 360.0 / n_grid
    grid = -180.0 + (np.arange(n_grid) + 0.5) * width
    d = np.radians((grid[None, :] - np.asarray(centres)[:, None] + 180.0) % 360.0 - 180.0)
    log_c = -0.5 * k * d ** 2 / KT
    index = lambda a: np.clip(((np.ravel(a) + 180.0) // width).astype(int), 0, n_grid - 1)  # noqa: E731
    counts = np.stack([np.bincount(index(a), minlength=n_grid) for a in angles]).astype(float)
    n_k, c_g = counts.sum(axis=1), counts.sum(axis=0)
    keep = c_g > 0

    def objective(f_rest):
        f = np.concatenate([[0.0], f_rest])
        a = (np.log(n_k) + f)[:, None] + log_c[:, keep]
        ln_d = logsumexp(a, axis=0)
        return c_g[keep] @ ln_d - n_k @ f, (np.exp(a - ln_d) @ c_g[keep] - n_k)[1:]

    f = np.concatenate([[0.0], minimize(objective, np.zeros(len(n_k) - 1), jac=True, method="BFGS",
                                        options={"gtol": 1e-8, "maxiter": 5000}).x])
    p = c_g[keep] * np.exp(-logsumexp((np.log(n_k) + f)[:, None] + log_c[:, keep], axis=0))
    return float(p[np.abs(grid[keep]) > 120.0].sum() / p.sum())


@pytest.mark.slow
def test_openmm_butane_windows_give_the_boltzmann_populations_within_their_errors(butane_windows):
    # Ryckaert & Bellemans 1978 (coefficients above), psi = phi - 180: the populations of the
    # bundled windows against the Boltzmann integral (scipy.integrate.quad; anti 0.652). Measured
    # on these files: anti 0.680 +- 0.017, 1.6 errors off; a jackknife over molecules gives 0.018,
    # and 820 independent data sets of exact samples of the same size give 0.651 on average,
    # scattered by 0.017 (9 % of them 0.028 or more from 0.652): the offset is noise of this data
    # set, the error honest
    exact = boltzmann_populations(rb_energy)
    rows = butane_windows.result.populations_by_type.set_index("state")
    for state, p in exact.items():
        assert abs(rows.loc[state, "population"] - p) < 2.5 * rows.loc[state, "population_err"]
    # the stated error against the spread of independent estimates: the molecules do not interact,
    # so groups of them are independent; a jackknife over 10 groups of 5 molecules (Efron & Tibshirani,
    # An Introduction to the Bootstrap, 1993, ch. 11), each estimate by the MBAR equations solved
    # here on angles read with MDAnalysis
    angles, table = read_window_angles(BUTANE_WINDOWS)
    centres, k = table["centre_deg"].to_numpy(float), float(table["k_kj_mol_rad2"].iloc[0])
    assert grid_mbar_anti(angles, centres, k) == pytest.approx(rows.loc["anti", "population"], abs=2e-3)
    groups = np.array_split(np.arange(angles.shape[2]), 10)
    jack = np.array([grid_mbar_anti(np.delete(angles, g, axis=2), centres, k) for g in groups])
    jack_err = np.sqrt((len(jack) - 1) / len(jack) * np.sum((jack - jack.mean()) ** 2))
    # chi-square with 9 degrees: the jackknife error is within a factor 0.6-1.4 of the true one (90 %)
    assert 0.5 < rows.loc["anti", "population_err"] / jack_err < 2.0


# ------------------------------------------------------------------------------------------------
# Windows whose samples contradict their stated restraint
# ------------------------------------------------------------------------------------------------

def test_restraint_check_of_a_harmonic_window():
    from dihedra.analysis.windows.restraints import restraint_check
    # analytic: on a flat free energy a window of k samples a normal law of variance kT / k
    # around its centre: consistent; the same samples with the centre off by 180 degrees, or with
    # a force constant ten times the one sampled, are not
    k = 400.0
    sd = np.degrees(np.sqrt(KT / k))
    assert restraint_check(31.0, sd, 30.0, k, KT)["restraint_consistent"]
    off = restraint_check(31.0, sd, -150.0, k, KT)
    assert not off["restraint_consistent"] and off["mean_force_kj_mol_rad"] > 1000
    assert abs(off["mean_offset_deg"]) == pytest.approx(179.0)
    stiff = restraint_check(30.0, sd, 30.0, 10 * k, KT)
    assert not stiff["restraint_consistent"] and stiff["curvature_kj_mol_rad2"] == pytest.approx(-9 * k)
    # a weak window on the flank of the steepest torsion barrier drifts: a mean force of 80
    # kJ/mol/rad (the amide barrier, from memory) holds k = 100 about 46 degrees off: consistent
    assert restraint_check(30.0 + np.degrees(80 / 100), np.degrees(np.sqrt(KT / 100)), 30.0, 100.0, KT)[
        "restraint_consistent"]


def test_windows_off_by_half_a_turn_or_stiffer_than_sampled_are_flagged(tmp_path, capsys):
    centres = np.arange(-180.0, 180.0, 30.0)
    csv = write_windows(tmp_path, rb_energy, centres, 400.0, 30, 6, seed=9)
    table = pd.read_csv(csv)
    table.loc[3, "centre_deg"] += 180.0        # a centre off by half a turn
    table.loc[7, "centre_deg"] = 720.0         # a typo: 720 for 30 (wrapped to 0)
    table.loc[9, "k_kj_mol_rad2"] = 4000.0     # ten times the force constant sampled
    table.to_csv(csv, index=False)
    wres = unbias_windows(csv, temperature_k=T, n_bootstrap=20)
    bad = wres.windows.loc[~wres.windows["restraint_consistent"], "window"].tolist()
    assert bad == [4, 8, 10]
    assert wres.notices[0].startswith("WARNING: 3 window(s) contradict their stated restraint")
    assert wres.info["restraints_consistent"] is False
    from dihedra.cli import main
    code = main(["windows", csv, "--temperature", str(T), "--out", str(tmp_path / "out"), "--bootstrap", "20"])
    err = capsys.readouterr().err
    assert code == 1   # the result is unusable: a script must not go on with it
    assert "WARNING: 3 window(s) contradict" in err and "exit status 1" in err
    written = pd.read_csv(tmp_path / "out" / "windows.csv")
    assert written["restraint_consistent"].tolist().count(False) == 3


# ------------------------------------------------------------------------------------------------
# Force constants that the samples contradict (a unit slip in the window table)
# ------------------------------------------------------------------------------------------------

@pytest.fixture(scope="module")
def windows_400(tmp_path_factory):
    """RB butane in 36 windows 10 degrees apart, k = 400 kJ/mol/rad^2, 600 exact samples each (the
    files only); tests restate the force constant in tables of their own beside it."""
    folder = tmp_path_factory.mktemp("restraints")
    return write_windows(folder, rb_energy, np.arange(-180.0, 180.0, 10.0), 400.0, 60, 10, seed=11)


def restated(csv, name, k):
    """A copy of the window table ``csv`` (beside it, same samples) with every force constant ``k``."""
    table = pd.read_csv(csv, dtype={"torsions": str})
    table["k_kj_mol_rad2"] = k
    path = os.path.join(os.path.dirname(csv), name)
    table.to_csv(path, index=False)
    return path


def test_force_constant_ratio_is_exact_for_any_free_energy():
    from dihedra.analysis.windows.restraints import force_constant_ratios

    # analytic: windows whose true biases are 3 times the stated ones have expected counts with
    # ln(h_i / h_j) = -3 (u_i - u_j) / kT + c whatever F is (here the asymmetric potential), and the
    # maximum-likelihood ratio of the expected counts is exactly 3
    g = np.arange(360) - 179.5
    centres, k = np.array([-20.0, 0.0, 20.0]), 50.0
    dens = [np.exp(-(asymmetric_energy(g) + 3.0 * bias_kj_mol(g, c, k)) / KT) for c in centres]
    hist = np.array([5000.0 * d / d.sum() for d in dens])
    ratios = force_constant_ratios(hist, pd.DataFrame({"centre_deg": centres, "k_kj_mol_rad2": k}),
                                   [(0, 1), (1, 2)], KT, np.ones(3))
    assert np.allclose(ratios["force_constant_ratio"], 3.0, rtol=1e-6)
    assert (ratios["force_constant_ratio_err"] > 0).all()


def test_force_constant_per_degree_squared_is_flagged(windows_400, capsys):
    # the classic slip: 400 kJ/mol/rad^2 written as 400 (pi/180)^2 = 0.1218. Each window on its
    # own fits so weak a restraint (it is only narrower than the restraint allows), so the check of
    # single windows passes them all; the pairs do not (analytic ratio (180/pi)^2 = 3283)
    from dihedra.analysis.windows.restraints import restraint_check
    from dihedra.cli import main

    csv = restated(windows_400, "per_degree.csv", 400.0 * np.radians(1.0) ** 2)
    wres = unbias_windows(csv, temperature_k=T, n_bootstrap=20)
    w = wres.windows
    assert all(restraint_check(r.mean_angle_deg, r.circular_sd_deg, r.centre_deg, r.k_kj_mol_rad2, KT)
               ["restraint_consistent"] for r in w.itertuples(index=False))
    assert not w["restraint_consistent"].any() and wres.info["restraints_consistent"] is False
    assert wres.overlap["force_constant_ratio"].median() == pytest.approx(np.degrees(1.0) ** 2, rel=0.1)
    assert np.allclose(w["k_from_samples_kj_mol_rad2"], 400.0, rtol=0.2)
    assert wres.notices[0].startswith("WARNING: the force constants of the window table are about")
    assert "times weaker" in wres.notices[0] and "(180/pi)^2 = 3283: k per degree squared" in wres.notices[0]
    # windows that the stated biases cannot tell apart (MBAR overlap 1/36 each) are no overlap problem
    assert not wres.overlap["poor"].any() and not any("poor overlap" in n for n in wres.notices)
    folder = os.path.join(os.path.dirname(csv), "pd")
    code = main(["windows", csv, "--temperature", str(T), "--out", folder, "--bootstrap", "20"])
    out = capsys.readouterr()
    assert code == 1
    assert out.out.startswith("UNUSABLE: the samples contradict the window table")
    assert "(180/pi)^2 = 3283" in out.err and "exit status 1" in out.err
    assert "overlap of neighbouring windows: not assessed" in out.out
    with open(os.path.join(folder, "windows.json")) as fh:   # strict JSON: the overlap not assessed is null
        info = json.load(fh, parse_constant=lambda c: pytest.fail(f"{c} in windows.json"))
    assert info["restraints_consistent"] is False and info["overlap"][0]["mbar_overlap"] is None


def test_a_pipeline_stops_at_a_contradicted_window_table(windows_400, tmp_path):
    # the later steps of an analysis file would rest on the unusable profile: the windows step
    # fails, named, after writing its files
    from dihedra.pipeline import load_pipeline, run_pipeline

    csv = restated(windows_400, "per_degree_pipe.csv", 400.0 * np.radians(1.0) ** 2)
    toml = tmp_path / "w.toml"
    toml.write_text(f'out = "{tmp_path / "res"}"\nsteps = ["windows", "profile"]\n[windows]\n'
                    f'windows = "{csv}"\ntemperature_k = {T}\nn_bootstrap = 20\n[profile]\n')
    said = []
    with pytest.raises(DihedraError, match=r"step windows .* failed: the samples contradict the window table"):
        run_pipeline(load_pipeline(str(toml)), log=said.append)
    assert os.path.exists(tmp_path / "res" / "windows.csv")
    assert any(line.startswith("== step 1/2: windows") for line in said)
    assert not any(line.startswith("== step 2/2") for line in said)


def test_centres_with_the_wrong_sign_are_named_as_such(windows_400):
    # analytic: the difference of two harmonic biases, u_c - u_c' = k/2 (c^2 - c'^2) - k (c - c') phi,
    # is linear in phi with a slope that changes sign with the centres; windows sampled at c and c'
    # but stated at -c and -c' show a force-constant ratio of exactly -1 (up to noise and the
    # wrap-around at 180 degrees) whatever F is: no force constant, the samples on the wrong side
    table = pd.read_csv(windows_400, dtype={"torsions": str})
    table["centre_deg"] = -table["centre_deg"]
    csv = os.path.join(os.path.dirname(windows_400), "flipped.csv")
    table.to_csv(csv, index=False)
    wres = unbias_windows(csv, temperature_k=T, n_bootstrap=20)
    assert wres.overlap["force_constant_ratio"].median() == pytest.approx(-1.0, abs=0.05)
    warning = next(n for n in wres.notices if n.startswith("WARNING: the samples lie on the other side"))
    assert "than the restraints pull" in warning and "centres have the wrong sign" in warning
    assert "about -0.9" in warning or "about -1" in warning
    assert not any("times stiffer" in n or "times weaker" in n for n in wres.notices)
    # no force constant pulls the samples where they are (k_from_samples NaN), except beside the two
    # windows at +-90 whose samples sit half a turn from their stated centres, where the stated bias
    # wraps round and the ratio is not -1
    w = wres.windows
    assert w.loc[(w["centre_deg"].abs() - 90.0).abs() > 15, "k_from_samples_kj_mol_rad2"].isna().all()
    assert not wres.windows["restraint_consistent"].any()


def test_too_stiff_force_constant_gives_no_numpy_warnings(windows_400):
    # the same samples as test_correct_force_constants_pass, whose profile bins are all sampled
    csv = restated(windows_400, "stiff.csv", 400.0e3)
    with warnings.catch_warnings():
        warnings.simplefilter("error", RuntimeWarning)    # numpy's overflow / invalid value
        wres = unbias_windows(csv, temperature_k=T, n_bootstrap=20)
    assert not wres.windows["restraint_consistent"].any()
    assert wres.overlap["force_constant_ratio"].median() == pytest.approx(1e-3, rel=0.1)
    assert "times stiffer" in " ".join(n for n in wres.notices if n.startswith("WARNING"))
    assert not any("sampled by no window" in n for n in wres.notices)
    assert wres.overlap["mbar_overlap"].isna().all()     # not assessed under biases the samples contradict
    assert not any("MBAR and WHAM differ" in n for n in wres.notices)


def test_correct_force_constants_pass(windows_400, tmp_path):
    wres = unbias_windows(windows_400, temperature_k=T, n_bootstrap=20)
    assert wres.windows["restraint_consistent"].all() and wres.info["restraints_consistent"] is True
    assert not any(n.startswith("WARNING") for n in wres.notices)
    lam = wres.overlap["force_constant_ratio"]
    assert lam.notna().all() and abs(lam.median() - 1.0) < 0.05 and lam.between(0.8, 1.25).all()
    assert np.allclose(wres.windows["k_from_samples_kj_mol_rad2"], 400.0, rtol=0.15)
    assert wres.profiles.by_type[next(iter(wres.profiles.by_type))][0].sampled.all()
    # a weak but true restraint over the 45 kJ/mol barrier: windows near the barrier tops slide off
    # their centres (k + F'' < 0 there), and are narrower on average than a periodic F allows in the
    # harmonic picture; the pairs still show the stated force constant
    weak = write_windows(tmp_path, rb_energy, np.arange(-180.0, 180.0, 15.0), 40.0, 60, 10, seed=3)
    wres = unbias_windows(weak, temperature_k=T, n_bootstrap=20)
    assert wres.windows["restraint_consistent"].all()
    assert wres.windows["mean_offset_deg"].abs().max() > 20
    assert abs(wres.overlap["force_constant_ratio"].median() - 1.0) < 0.1


def test_one_time_step_line_for_all_windows(tmp_path, capsys):
    # the bundled window XTC files store time 0 for every frame; windows has no --dt-ps and needs none
    from dihedra.cli import main

    base = os.path.dirname(BUTANE_WINDOWS)
    table = pd.read_csv(BUTANE_WINDOWS, dtype={"torsions": str}).iloc[12:18]
    for col in ("trajectory", "topology"):
        table[col] = [os.path.join(base, f) for f in table[col]]
    csv = str(tmp_path / "six.csv")
    table.to_csv(csv, index=False)
    assert main(["windows", csv, "--temperature", str(T), "--out", str(tmp_path / "out"), "--bootstrap", "20"]) == 0
    err = capsys.readouterr().err
    lines = [ln for ln in err.splitlines() if "time step" in ln]
    assert len(lines) == 1 and lines[0].startswith("note: 6 of 6 window trajectories have no usable time step")
    assert "--dt-ps" not in err
    # nor a line per window on the errors of its own (biased) populations, which windows does not report
    assert "never left one state" not in err


def test_kinetics_refuses_a_folder_of_windows(synthetic):
    # restrained torsions do not move as the unbiased ones (common practice): no rates from them
    import dihedra

    with pytest.raises(DihedraError, match="umbrella windows"):
        dihedra.state_kinetics(dihedra.load_results(synthetic[1]), dt_ps=1.0)


def test_windows_of_few_correlation_times_are_named(tmp_path, synthetic):
    # each exact sample held for 10 frames: g of about 10 and a window of 120 frames spans about
    # 120 / 4.5 = 27 correlation times (tau = (g - 1) / 2), where a bootstrap over 16 blocks sees
    # about 0.45 of the variance (dihedra.numerics.blocking_bias.level_ratio, an exponential
    # autocorrelation); the independent samples of the synthetic windows are named nowhere
    rng = np.random.default_rng(3)
    rows = []
    for i, c in enumerate(np.arange(-180.0, 180.0, 30.0)):
        a = inverse_cdf_samples(lambda p: rb_energy(p) + bias_kj_mol(p, c, 100.0), T, (12, 5), rng)
        pdb, dcd = write_rotor_trajectory(str(tmp_path), f"w{i:02d}", np.repeat(a, 10, axis=0))
        rows.append({"trajectory": os.path.basename(dcd), "topology": os.path.basename(pdb),
                     "torsions": "rotatable", "centre_deg": c, "k_kj_mol_rad2": 100.0})
    csv = tmp_path / "windows.csv"
    pd.DataFrame(rows).to_csv(csv, index=False)
    wres = unbias_windows(str(csv), temperature_k=T, n_bootstrap=20)
    spans = wres.windows["correlation_times"]
    assert spans.between(10, 60).all(), spans.tolist()
    named = [n for n in wres.notices if "correlation times of their bias energy" in n]
    assert len(named) == 1 and named[0].startswith("12 of 12 window(s)")
    assert not any("correlation times of their bias energy" in n for n in synthetic[0].notices)
    assert (synthetic[0].windows["correlation_times"] > 200).all()


def _type_rows(frame):
    return frame[frame["torsion"] == ""].reset_index(drop=True)


def test_profile_of_a_windows_folder_keeps_the_windows_errors(synthetic, tmp_path):
    # dihedra profile on a windows folder gives the types the windows' own profile with the errors of
    # their bootstrap (window free energies re-estimated in every resample, stored in blocks.npz),
    # never errors recomputed from the weighted histograms with the weights held fixed (hundreds of
    # kJ/mol at the barrier)
    from scipy.ndimage import convolve1d
    from scipy.stats import vonmises

    from dihedra.analysis.compare import compare_with_scan
    from dihedra.analysis.scans import scan_from_points
    from dihedra.cli import main

    wres, out = synthetic
    res = load_results(out)
    again = free_energy_profiles(res, temperature_k=T, n_bootstrap=20)
    own = wres.profiles
    for name in ("profiles", "minima", "barriers", "state_free_energies"):
        mine, theirs = _type_rows(getattr(again, name)), _type_rows(getattr(own, name))
        assert len(mine) == len(theirs), name
        for col in [c for c in theirs.columns if c.endswith("_err_kj_mol") or c.endswith("_err")]:
            np.testing.assert_allclose(mine[col], theirs[col], rtol=1e-6, err_msg=f"{name}.{col}")
    np.testing.assert_allclose(_type_rows(again.profiles)["bandwidth_deg"], _type_rows(own.profiles)["bandwidth_deg"])
    assert any(n.startswith("this folder holds umbrella windows") and "own bootstrap (40 resamples" in n
               for n in again.notices)
    # the torsions of the type (30 molecules) have no resamples of their own: their rows hold the weights
    # fixed, and a notice says so of them alone; without them it is not given
    narrow = [n for n in again.notices if "have no resamples of the windows' bootstrap" in n]
    assert len(narrow) == 1 and "of the 30 torsions of 1 type(s)" in narrow[0]
    types_only = free_energy_profiles(res, temperature_k=T, per_torsion=False)
    assert not [n for n in types_only.notices if "have no resamples of the windows' bootstrap" in n]
    # against the known potential (analytic; scipy quad): the syn barrier within 3 of its errors (each under
    # 1 kJ/mol), every 5-degree bin within 4 errors, mean z^2 near 1 (correct errors)
    v = asymmetric_energy(np.linspace(-180, 180, 36001))
    bar = _type_rows(again.barriers)
    syn = bar.loc[bar["angle_deg"].abs() < 30].iloc[0]
    assert syn["free_energy_err_kj_mol"] < 1.0
    assert abs(syn["free_energy_kj_mol"] - (v.max() - v.min())) < 3 * syn["free_energy_err_kj_mol"]
    for width in (5.0, 10.0):
        prof = again if width == 5.0 else free_energy_profiles(res, temperature_k=T, bin_width_deg=width,
                                                               per_torsion=False)
        hist = _type_rows(prof.profiles).query("estimate == 'histogram'")
        ref, _ = reference_profile(asymmetric_energy, n_bins=int(360 / width))
        z = (-KT * np.log(hist["probability_density_per_deg"].to_numpy()) - ref) / hist["free_energy_err_kj_mol"]
        assert np.max(np.abs(z)) < 4.0 and 0.3 < np.mean(z ** 2) < 2.5, width
        # the same errors as dihedra compare gives for the width (the windows' resamples in wider bins)
        grid = np.arange(-180.0, 180.0, 2.0)
        cmp = compare_with_scan(res, scan_from_points(grid, asymmetric_energy(grid)), temperature_k=T,
                                bin_width_deg=width)
        np.testing.assert_allclose(hist["free_energy_err_kj_mol"], cmp.profiles["free_energy_err_kj_mol"], rtol=1e-6)
    # a kernel of a bandwidth asked for: the von Mises smoothing of the exact fine-bin probabilities
    # (scipy.stats.vonmises, kappa = 1 / sigma^2) within 4 errors at every point, the barrier included,
    # and mean z^2 near 1
    smooth = free_energy_profiles(res, temperature_k=T, bandwidth_deg=4.0, per_torsion=False)
    kern = _type_rows(smooth.profiles).query("estimate == 'kernel'")
    assert (kern["bandwidth_deg"] == 4.0).all()
    _, mass = reference_profile(asymmetric_energy, n_bins=360)
    offsets = np.arange(-180, 180)
    kernel = vonmises.pdf(np.radians(offsets), 1.0 / np.radians(4.0) ** 2)
    exact = -KT * np.log(convolve1d(mass, kernel / kernel.sum(), mode="wrap", origin=0))
    f = -KT * np.log(kern["probability_density_per_deg"].to_numpy())
    zk = (f - exact) / kern["free_energy_err_kj_mol"].to_numpy()
    assert np.max(np.abs(zk)) < 4.0 and 0.3 < np.mean(zk ** 2) < 2.5
    # a bin width the fine bins do not tile is refused, as for any folder
    with pytest.raises(DihedraError, match="multiple of the fine histogram bin"):
        free_energy_profiles(res, temperature_k=T, bin_width_deg=7.0)
    # the command line writes the windows' own errors and says whose they are
    import shutil
    copy = str(tmp_path / "again")
    shutil.copytree(out, copy)
    assert main(["profile", copy, "--types-only", "--overwrite"]) == 0
    written = pd.read_csv(os.path.join(copy, "barriers.csv"))
    np.testing.assert_allclose(written["free_energy_err_kj_mol"], _type_rows(own.barriers)["free_energy_err_kj_mol"],
                               rtol=1e-5)
    with open(os.path.join(copy, "profiles.json")) as fh:
        info = json.load(fh)
    assert info["n_type_resamples"] == 40 and any("umbrella windows' own bootstrap" in c for c in info["cautions"])


def test_profile_of_windows_without_stored_resamples_says_its_errors_hold_the_weights_fixed(synthetic):
    # a windows folder of an earlier dihedra (no resamples in blocks.npz): the weighted histograms
    # resampled with the weights fixed, and a notice says so; an ordinary run's profile says nothing of it
    from dihedra.analysis.profiles import RESAMPLED_PROBABILITIES

    res = load_results(synthetic[1])
    del res.blocks[RESAMPLED_PROBABILITIES]
    again = free_energy_profiles(res, temperature_k=T, n_bootstrap=20, per_torsion=False)
    assert [n for n in again.notices if n.startswith("this folder of umbrella windows holds no bootstrap resamples")]
    assert "n_type_resamples" not in again.settings
    assert not [n for n in synthetic[0].profiles.notices if "held fixed" in n]


def test_a_torsion_alone_in_its_type_has_the_windows_errors(tmp_path):
    # one biased torsion per window (the usual umbrella run): its own rows are those of its type, from
    # the windows' resamples, and no notice speaks of rows with the weights held fixed
    csv = write_windows(tmp_path, lambda x: 0.3 * rb_energy(x), np.arange(-180.0, 180.0, 30.0), 60.0, 200, 1, seed=9)
    wres = unbias_windows(csv, temperature_k=T, n_bootstrap=20)
    pset = free_energy_profiles(wres.result, temperature_k=T)
    label = wres.result.torsion_set.labels[0]
    for name in ("profiles", "minima", "barriers", "state_free_energies"):
        table = getattr(pset, name)
        mine = table[table["torsion"] == label].drop(columns="torsion").reset_index(drop=True)
        pooled = _type_rows(table).drop(columns="torsion")
        assert len(mine) == len(pooled) > 0, name
        pd.testing.assert_frame_equal(mine, pooled, check_categorical=False)
    np.testing.assert_allclose(_type_rows(pset.profiles)["free_energy_err_kj_mol"],
                               _type_rows(wres.profiles.profiles)["free_energy_err_kj_mol"], rtol=1e-6)
    # and honest against the potential (analytic; scipy quad): every 5-degree bin within 4 errors
    hist = _type_rows(pset.profiles).query("estimate == 'histogram'")
    ref, _ = reference_profile(lambda x: 0.3 * rb_energy(x))
    z = (-KT * np.log(hist["probability_density_per_deg"].to_numpy()) - ref) / hist["free_energy_err_kj_mol"]
    assert np.max(np.abs(z)) < 4.0
    assert not [n for n in pset.notices if "held fixed" in n]
    assert {b["torsion"] for b in pset.settings["bandwidths_deg"]} == {"", label}
    assert len({b["bandwidth_deg"] for b in pset.settings["bandwidths_deg"]}) == 1
