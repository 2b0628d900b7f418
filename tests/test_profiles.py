"""Free-energy profiles: recovered densities, barriers, errors, unsampled bins, 2-D profiles."""

import os
import re

import numpy as np
import pandas as pd
import pytest
from scipy import integrate, optimize, stats

from dihedra.errors import DihedraError
from dihedra.analysis.profiles import bootstrap_multiplicities, free_energy_profiles, pair_profiles, von_mises_smooth
from dihedra.io.resultsdir import load_results
from dihedra.tracking import track
from dihedra.units import R_KJ_PER_MOL_K

from synthetic_rotors import (butane_results, inverse_cdf_samples, rb_energy, rotor_results,
                              threefold_energy, write_rotor_trajectory)

T = 298.15
KT = R_KJ_PER_MOL_K * T


def bin_averaged_free_energy(energy, centres, width):
    """-kT ln of the bin average of exp(-V/kT) (what a histogram estimates), by scipy quad."""
    out = []
    for c in centres:
        val, _ = integrate.quad(lambda x: np.exp(-energy(x) / KT), c - width / 2, c + width / 2)
        out.append(-KT * np.log(val / width))
    return np.array(out)


@pytest.fixture(scope="module")
def rb_synthetic(tmp_path_factory):
    return rotor_results(tmp_path_factory.mktemp("rb"), rb_energy, T, n_frames=2000, n_molecules=100, seed=5,
                         keep_angles=True)


@pytest.fixture(scope="module")
def rb_profiles(rb_synthetic):
    return free_energy_profiles(rb_synthetic, temperature_k=T, per_torsion=True)


def test_profiles_table_is_the_same_whatever_the_stacks_of_torsions(rb_synthetic, rb_profiles, monkeypatch):
    # the per-torsion rows are written into the table's final arrays stack by stack: stacks of 7
    # (which do not divide the 100 torsions) give the rows of stacks of 64, in the same order
    from dihedra.analysis.profiles import driver

    monkeypatch.setattr(driver, "_BATCH", 7)
    small = free_energy_profiles(rb_synthetic, temperature_k=T, per_torsion=True)
    a, b = small.profiles, rb_profiles.profiles
    n_torsions = len(rb_synthetic.torsion_set.labels)
    assert len(a) == len(b) == (1 + n_torsions) * (360 // 5 + 360)   # histogram and kernel rows
    for c in a.columns:
        if c == "free_energy_err_kj_mol":   # bootstrap spreads, kept in single precision: the same to
            np.testing.assert_allclose(a[c], b[c], rtol=1e-6)   # its rounding (another summation order)
        else:
            pd.testing.assert_series_equal(a[c], b[c])
    assert list(a["torsion"].unique()) == [""] + list(rb_synthetic.torsion_set.labels)


def test_known_density_recovered_within_error_band(rb_profiles):
    # analytic: exact inverse-CDF samples of exp(-V/kT) must give F = V (bin-averaged) + const,
    # with residuals that scatter like the stated error band (mean z^2 near 1)
    hist, _ = rb_profiles.by_type["BUT:C1-C2-C3-C4"]
    ref = bin_averaged_free_energy(rb_energy, hist.angle_deg, hist.width_deg)
    ok = hist.sampled & (hist.boot_valid_fraction == 1.0) & (ref < 6 * KT)
    diff = hist.free_energy_kj_mol - ref
    w = 1 / hist.free_energy_err_kj_mol[ok] ** 2
    offset = np.sum(w * diff[ok]) / np.sum(w)
    z = (diff[ok] - offset) / hist.free_energy_err_kj_mol[ok]
    assert ok.sum() > 40
    assert np.mean(np.abs(z) <= 2) >= 0.85
    assert np.max(np.abs(z)) < 5
    assert 0.4 < np.mean(z ** 2) < 2.0
    assert np.median(hist.free_energy_err_kj_mol[ok]) < 0.3  # the band is narrow enough to mean something


def test_unsampled_bins_are_marked_and_written_empty(rb_profiles, rb_synthetic, tmp_path):
    # common practice: unvisited regions are "unsampled", never 0 or infinity in a table
    prof = rb_profiles.profiles
    hist = prof[(prof["estimate"] == "histogram") & (prof["torsion"] == "")]
    cis = hist[np.abs(hist["angle_deg"]) < 15]
    assert (~cis["sampled"]).all() and cis["free_energy_kj_mol"].isna().all()
    paths = rb_profiles.save(str(tmp_path), "kJ/mol")
    text = open(os.path.join(str(tmp_path), "profiles.csv")).read()
    assert "inf" not in text.lower() and "nan" not in text.lower()
    back = pd.read_csv(os.path.join(str(tmp_path), "profiles.csv"))
    unsampled = back[~back["sampled"]]
    assert len(unsampled) and unsampled["free_energy_kj_mol"].isna().all()
    assert {os.path.basename(p) for p in paths} >= {"profiles.csv", "minima.csv", "barriers.csv",
                                                    "state_free_energies.csv", "profiles.json"}
    assert not [f for f in os.listdir(str(tmp_path)) if f.endswith(".tmp")]


def test_energy_unit_columns(rb_profiles, tmp_path):
    # 1 thermochemical calorie = 4.184 J (NIST SP 811); kT = R T with R = 8.314462618 J/(mol K)
    # (CODATA 2018: Tiesinga et al., Rev. Mod. Phys. 93 (2021) 025010)
    rb_profiles.save(str(tmp_path), "kcal/mol")
    kcal = pd.read_csv(os.path.join(str(tmp_path), "minima.csv"))
    kj = rb_profiles.minima
    assert np.allclose(kcal["free_energy_kcal_mol"] * 4.184, kj["free_energy_kj_mol"], equal_nan=True)
    rb_profiles.save(str(tmp_path), "kT")
    kt = pd.read_csv(os.path.join(str(tmp_path), "minima.csv"))
    assert np.allclose(kt["free_energy_kt"] * 8.314462618e-3 * T, kj["free_energy_kj_mol"], equal_nan=True)


def test_state_free_energy_matches_boltzmann_integral(rb_profiles):
    # analytic, derived from the Ryckaert-Bellemans potential (Ryckaert & Bellemans, Faraday Discuss.
    # Chem. Soc. 66 (1978) 95): single-torsion populations by numerical integration of exp(-V_RB/kT)
    # over the anti-gauche arcs
    def weight(a, b):
        return integrate.quad(lambda x: np.exp(-rb_energy(x) / KT), a, b, limit=200)[0]
    anti = weight(120, 180) + weight(-180, -120)
    gplus = weight(0, 120)
    expected = -KT * np.log(gplus / anti)
    dg = rb_profiles.state_free_energies
    row = dg[(dg["torsion"] == "") & (dg["state"] == "gauche+")].iloc[0]
    assert row["reference_state"] == "anti"
    assert abs(row["free_energy_kj_mol"] - expected) < 3 * row["free_energy_err_kj_mol"] + 1e-9


def test_ethane_like_rotor_barrier(tmp_path):
    # common practice: the textbook ethane barrier of about 12 kJ/mol (Kemp & Pitzer, J. Chem. Phys. 4
    # (1936) 749; from memory); a three-fold
    # rotor V = 6 (1 + cos 3 phi) sampled exactly must show minima at +-60 and 180 and barriers of 12
    res = rotor_results(tmp_path, threefold_energy, T, n_frames=1500, n_molecules=200, seed=3, name="ethane")
    prof = free_energy_profiles(res, temperature_k=T, per_torsion=False)
    minima = prof.minima
    assert len(minima) == 3
    for target in (-60.0, 60.0, 180.0):
        d = np.abs((minima["angle_deg"] - target + 180) % 360 - 180)
        assert d.min() < 3.0
    bars = prof.barriers
    assert len(bars) == 3 and bars["sampled"].all()
    for r in bars.itertuples():
        assert abs(r.free_energy_kj_mol - 12.0) <= 3 * r.free_energy_err_kj_mol, (r.angle_deg, r.free_energy_kj_mol)
        assert min(abs((r.angle_deg - c + 180) % 360 - 180) for c in (0.0, 120.0, -120.0)) < 6.0


@pytest.fixture(scope="module")
def butane(tmp_path_factory):
    return butane_results(tmp_path_factory.mktemp("butane"))


def test_butane_barrier_near_120(butane):
    # Ryckaert & Bellemans, Faraday Discuss. Chem. Soc. 66 (1978) 95 (derived): trans-gauche barrier
    # near +-120 deg at 12.35 kJ/mol; recomputed here from the coefficients with scipy.optimize
    res, source = butane
    top = optimize.minimize_scalar(lambda x: -rb_energy(x), bounds=(90, 150), method="bounded")
    v_top = -top.fun
    assert abs(v_top - 12.35) < 0.01 and abs(top.x - 120) < 3
    prof = free_energy_profiles(res, per_torsion=False)  # temperature recorded by track
    bars = prof.barriers[prof.barriers["sampled"]]
    assert len(bars) == 2, source
    for r in bars.itertuples():
        assert abs(abs(r.angle_deg) - top.x) < 10, (source, r.angle_deg)
        assert abs(r.free_energy_kj_mol - v_top) <= 3 * r.free_energy_err_kj_mol, (source, r.free_energy_kj_mol,
                                                                                      r.free_energy_err_kj_mol)


@pytest.fixture(scope="module")
def butane_profiles(butane):
    res, source = butane
    return free_energy_profiles(res, per_torsion=True), source   # temperature recorded by track


def test_sparse_bins_carry_their_counting_error(butane_profiles):
    # analytic: -kT ln of the exact bin averages of exp(-V/kT) of the Ryckaert-Bellemans potential
    # (scipy quad) against the pooled histogram. Bins of a few samples (a single visit to the cis
    # slope in the simulated example) left most blocks empty and their bootstrap spread collapsed
    # (1.0 kJ/mol for one sample, 4 sigma from the exact value); the counting floor kT sqrt(1/n -
    # 1/N) keeps every sampled bin within 3.5 sigma of it
    prof, source = butane_profiles
    hist, _ = prof.by_type["BUT:C1-C2-C3-C4"]
    ref = bin_averaged_free_energy(rb_energy, hist.angle_deg, hist.width_deg)
    ok = hist.sampled
    ref = ref - ref[np.argmin(np.where(ok, hist.free_energy_kj_mol, np.inf))]
    n, total = hist.samples[ok], hist.samples.sum()
    err = hist.free_energy_err_kj_mol[ok]
    assert np.all(err >= KT * np.sqrt(1 / n - 1 / total) * (1 - 1e-12))
    z = (hist.free_energy_kj_mol[ok] - ref[ok]) / err
    assert np.max(np.abs(z)) < 3.5, (source, hist.angle_deg[ok][np.argmax(np.abs(z))], np.max(np.abs(z)))
    # compare's reliable bins (error at most 0.2 kT) then hold at least 25 samples
    assert n[err <= 0.2 * KT].min() >= 25


def test_every_minimum_of_a_butane_torsion_is_one_of_its_wells(butane_profiles):
    # Ryckaert & Bellemans, Faraday Discuss. Chem. Soc. 66 (1978) 95: the potential has its minima at
    # 180 and about +-60 degrees (recomputed with scipy.optimize); a sparse bin on a barrier's slope
    # (9 samples between bins of 1-3 on one torsion of the simulated example) made a "minimum" at
    # -129 degrees 10.7 kJ/mol up (its errors too small to show it was not significant)
    prof, source = butane_profiles
    gauche = optimize.minimize_scalar(rb_energy, bounds=(30, 90), method="bounded").x
    wells = np.array([180.0, gauche, -gauche])
    minima = prof.minima
    d = np.abs((minima["angle_deg"].to_numpy()[:, None] - wells[None, :] + 180) % 360 - 180).min(axis=1)
    assert d.max() < 15.0, (source, minima.iloc[int(np.argmax(d))].to_dict())
    # the pooled gauche minima where the potential has them, within their errors: a parabola through
    # five bins put them 0.75 degrees further out (the well is skewed), 4 of their errors
    pooled = minima[minima["torsion"] == ""]
    for target in (gauche, -gauche):
        r = pooled.iloc[int(np.argmin(np.abs(pooled["angle_deg"] - target)))]
        assert abs(r["angle_deg"] - target) <= 3 * r["angle_err_deg"] + 0.05, (source, r.to_dict(), target)


def test_counting_floor_against_the_poisson_interval():
    # reference library: the exact (Garwood) 68.27 % interval of a Poisson mean given n counts, from
    # scipy's chi-square quantiles, half its width in ln: kT sqrt(1/n) (N large, the delta method) is
    # never wider than that conservative interval, within 35 % of it for a single count and closer
    # as n grows
    from dihedra.analysis.profiles import counting_error_floor

    n = np.array([1.0, 4.0, 25.0, 100.0, 400.0])
    floor = counting_error_floor(np.r_[n, 1e12], KT)[:-1] / KT
    lo = stats.chi2.ppf(0.158655, 2 * n) / 2
    hi = stats.chi2.ppf(0.841345, 2 * n + 2) / 2
    half = 0.5 * np.log(hi / lo)
    ratio = floor / half
    assert np.all(ratio <= 1.0) and np.all(ratio >= 0.65) and np.all(np.diff(ratio) > 0) and ratio[-1] > 0.95, ratio
    assert np.isnan(counting_error_floor(np.array([0.0, 5.0]), KT)[0])
    # binomial: a bin holding every sample has no counting error at all
    assert counting_error_floor(np.array([0.0, 7.0]), KT)[1] == 0.0


def test_kernel_counting_floor_is_the_spread_of_kernel_estimates():
    # Monte Carlo against the variance of a kernel estimate (Silverman, Density Estimation, 1986,
    # section 3.3: var f_hat / f^2 = R(K) / (N f), R = 1 / (2 sigma sqrt(pi)) for a Gaussian kernel):
    # N uniform angles smoothed with a 3-degree von Mises kernel, repeated; the spread of -kT ln f_hat
    # at every point matches the floor within 10 %
    from dihedra.numerics.density import kernel_counting_floor, von_mises_smooth

    rng = np.random.default_rng(4)
    n, sigma = 2000, 3.0
    free = []
    for _ in range(400):
        counts = np.bincount(rng.integers(0, 360, size=n), minlength=360).astype(float)
        free.append(-KT * np.log(von_mises_smooth(counts, sigma)))
    spread = np.std(np.array(free), axis=0, ddof=1)
    floor = kernel_counting_floor(np.full((1, 360), n / 360.0), [sigma], 1.0, KT)[0]
    assert np.allclose(floor, floor[0]) and abs(spread.mean() / floor[0] - 1.0) < 0.1, (spread.mean(), floor[0])


def test_weighted_counts_use_kish_effective_samples(tmp_path):
    # Kish, Survey Sampling (Wiley 1965): n_eff = (sum w)^2 / sum w^2; a histogram of weight sums
    # holds n_eff / sum w effective samples per unit of weight, and the weights' own unit (here
    # 1/1000 of a frame) changes nothing
    from dihedra.analysis.profiles import effective_count_scale

    rng = np.random.default_rng(3)
    angles = inverse_cdf_samples(rb_energy, T, (400, 6), rng)
    pdb, dcd = write_rotor_trajectory(str(tmp_path), "weighted", angles)
    w = rng.uniform(0.2, 3.0, 400) / 1000.0
    pd.DataFrame({"weight": w}).to_csv(tmp_path / "w.csv", index=False)
    res = track(pdb, [dcd], torsions="rotatable", temperature_k=T, weights=str(tmp_path / "w.csv"))
    scale = effective_count_scale(res)
    assert scale == pytest.approx(w.sum() / np.sum(w ** 2), rel=1e-9)
    prof = free_energy_profiles(res, n_bootstrap=40, per_torsion=False)
    hist, _ = next(iter(prof.by_type.values()))
    ok = hist.sampled
    floor = KT * np.sqrt(1 / (scale * hist.samples[ok]) - 1 / (scale * hist.samples.sum()))
    assert np.all(hist.free_energy_err_kj_mol[ok] >= floor * (1 - 1e-9))
    assert prof.settings["effective_samples_per_count"] == pytest.approx(scale)
    unweighted = track(pdb, [dcd], torsions="rotatable", temperature_k=T)
    assert effective_count_scale(unweighted) == 1.0


def test_temperature_required_or_announced(tmp_path):
    # common practice: temperature always explicit, never a silent default
    res = rotor_results(tmp_path, threefold_energy, T, n_frames=64, n_molecules=4, record_temperature=False)
    with pytest.raises(DihedraError, match="temperature"):
        free_energy_profiles(res)
    res.summary["temperature_k"] = 310.0
    said = []
    prof = free_energy_profiles(res, log=said.append, per_torsion=False, n_bootstrap=20)
    assert prof.temperature_k == 310.0 and any("310" in s for s in said)
    assert not any("was simulated at" in n for n in prof.notices)
    # another temperature than the run's is used as asked, and pointed out (-kT ln p holds at the
    # simulated temperature only: Boltzmann's relation, common practice)
    other = free_energy_profiles(res, temperature_k=400.0, per_torsion=False, n_bootstrap=20)
    assert other.temperature_k == 400.0
    assert any("simulated at 310 K" in n and "400 K" in n for n in other.notices)
    assert not any("simulated at" in n for n in free_energy_profiles(res, temperature_k=310.2, per_torsion=False,
                                                                     n_bootstrap=20).notices)


def test_von_mises_kernel_matches_scipy():
    # reference library: smoothing a single count with the kernel gives scipy's von Mises density
    counts = np.zeros(360)
    counts[180] = 1.0  # bin centre 0.5 deg
    sigma = 10.0
    smooth = von_mises_smooth(counts, sigma)
    centres = -179.5 + np.arange(360)
    ref = stats.vonmises.pdf(np.radians(centres - 0.5), kappa=1 / np.radians(sigma) ** 2) * np.radians(1.0)
    assert np.allclose(smooth, ref, atol=1e-6)
    assert abs(smooth.sum() - 1) < 1e-9


def test_kernel_bandwidth_is_stated(rb_profiles):
    # common practice: a kernel estimate states its bandwidth
    kern = rb_profiles.profiles[rb_profiles.profiles["estimate"] == "kernel"]
    assert kern["bandwidth_deg"].notna().all() and (kern["bandwidth_deg"] >= 1.0).all()
    assert rb_profiles.settings["bandwidth_rule"]


def test_bootstrap_stays_within_replicas():
    # common practice (block bootstrap, Kuensch 1989): blocks are drawn within each replica
    replica = np.repeat([0, 1, 2], [16, 16, 8])
    m = bootstrap_multiplicities(replica, 50, np.random.default_rng(0))
    for r, n in ((0, 16), (1, 16), (2, 8)):
        assert np.all(m[:, replica == r].sum(axis=1) == n)


def test_pair_profile_of_independent_torsions(rb_synthetic):
    # analytic: two independent molecules have F(a, b) = F(a) + F(b) (up to a constant); the 1-D
    # profile (all 100 molecules) is far more precise than the 2-D one (2000 frames of one pair)
    a, b = rb_synthetic.torsion_set.labels[:2]
    pair = pair_profiles(rb_synthetic, a, b, temperature_k=T, bin_width_deg=30)
    one = free_energy_profiles(rb_synthetic, temperature_k=T, bin_width_deg=30, per_torsion=False, n_bootstrap=20)
    hist = one.by_type["BUT:C1-C2-C3-C4"][0]
    f1 = dict(zip(hist.angle_deg, hist.free_energy_kj_mol))
    ok = (pair["sampled"] & (pair["free_energy_err_kj_mol"] < 0.2 * KT)).to_numpy()
    expect = np.array([f1[x] + f1[y] for x, y in zip(pair["angle_a_deg"], pair["angle_b_deg"])])
    d = pair["free_energy_kj_mol"].to_numpy()[ok] - expect[ok]
    err = pair["free_energy_err_kj_mol"].to_numpy()[ok]
    d -= np.average(d, weights=1 / err ** 2)
    assert ok.sum() > 6
    assert np.mean((d / err) ** 2) < 3.0
    assert pair["n_samples"].sum() == 2000
    # binomial counting (delta method): no bin's error below kT sqrt(1/n - 1/N)
    seen = pair[pair["sampled"]]
    floor = KT * np.sqrt(1 / seen["n_samples"] - 1 / 2000)
    assert (seen["free_energy_err_kj_mol"] >= floor * (1 - 1e-12)).all()


def test_pair_profile_needs_angles(tmp_path):
    # common practice: without the angle time series the message says how to get it
    res = rotor_results(tmp_path, threefold_energy, T, n_frames=32, n_molecules=2)
    with pytest.raises(DihedraError, match="--keep-angles"):
        pair_profiles(res, *res.torsion_set.labels[:2], temperature_k=T)


def test_profile_command(rb_synthetic, capsys, monkeypatch):
    # common practice: the command line is a thin layer and prints the bandwidth it used
    from dihedra.cli import main
    status = main(["profile", rb_synthetic.folder, "--temperature", "298.15", "--types-only",
                   "--pair", *rb_synthetic.torsion_set.labels[:2]])
    out = capsys.readouterr().out
    assert status == 0 and "kernel bandwidth" in out and "barrier" in out
    assert os.path.exists(os.path.join(rb_synthetic.folder, "profiles_2d.csv"))
    assert main(["profile", rb_synthetic.folder, "--temperature", "298.15", "--bin-width", "7", "--overwrite"]) == 2
    assert "7" in capsys.readouterr().err
    # a pair that names no torsion is refused before any work or message about reading the angles
    before = os.path.getmtime(os.path.join(rb_synthetic.folder, "profiles.csv"))
    assert main(["profile", rb_synthetic.folder, "--temperature", "298.15", "--overwrite", "--pair",
                 rb_synthetic.torsion_set.labels[0], "NOPE:x"]) == 2
    err = capsys.readouterr().err
    assert "'NOPE:x' is neither a torsion label nor a torsion type" in err and "reading" not in err
    assert os.path.getmtime(os.path.join(rb_synthetic.folder, "profiles.csv")) == before
    # a per-torsion table above the size limit points at --types-only (limit lowered for the test)
    import dihedra.cli.profile as command

    monkeypatch.setattr(command, "LARGE_TABLE_BYTES", 1000)
    assert main(["profile", rb_synthetic.folder, "--temperature", "298.15", "--overwrite"]) == 0
    assert "--types-only writes the types' alone" in capsys.readouterr().err
    # above the torsion limit the default is the types alone, said; --per-torsion profiles them all
    monkeypatch.setattr(command, "PER_TORSION_LIMIT", 1)
    table = os.path.join(rb_synthetic.folder, "profiles.csv")
    assert main(["profile", rb_synthetic.folder, "--temperature", "298.15", "--overwrite"]) == 0
    assert "--per-torsion writes them" in capsys.readouterr().err
    assert pd.read_csv(table)["torsion"].isna().all()
    assert main(["profile", rb_synthetic.folder, "--temperature", "298.15", "--overwrite", "--per-torsion"]) == 0
    assert set(pd.read_csv(table)["torsion"].dropna()) == set(rb_synthetic.torsion_set.labels)


def test_one_minimum_has_one_barrier_around_the_circle(tmp_path, capsys):
    # analytic: V = 4 (1 + cos phi) has one minimum (180 deg) and one maximum (0 deg, 8 kJ/mol): the
    # barrier of the only minimum lies on the way around the circle back to it, not "between" two
    from dihedra.cli import main

    res = rotor_results(tmp_path, lambda phi: 4.0 * (1.0 + np.cos(np.radians(phi))), T, n_frames=1000,
                        n_molecules=40, seed=4, name="onefold")
    assert main(["profile", res.folder, "--types-only", "--bootstrap", "40"]) == 0
    out = capsys.readouterr().out
    lines = [x for x in out.splitlines() if x.strip().startswith("barrier")]
    minima = [x for x in out.splitlines() if x.strip().startswith("minimum")]
    assert len(minima) == 1 and len(lines) == 1, out
    found = re.search(r"around the circle from the only minimum \((-?\d+) deg\) back to it", lines[0])
    assert found and abs(float(minima[0].split()[1]) - float(found.group(1))) <= 0.5, (minima[0], lines[0])
    assert "between" not in lines[0] and "from each side" not in lines[0]


def test_in_memory_and_loaded_results_give_identical_tables(tmp_path):
    # common practice: an analysis reads a result only through its API, so a result kept in memory
    # (track without out) and the same run written to a folder and loaded give the same tables
    rng = np.random.default_rng(11)
    angles = inverse_cdf_samples(rb_energy, T, (300, 12), rng)
    pdb, dcd = write_rotor_trajectory(str(tmp_path), "mem", angles)
    kwargs = dict(torsions="rotatable", keep_angles=True, temperature_k=T)
    in_memory = track(pdb, [dcd], **kwargs)
    assert in_memory.folder is None
    out = str(tmp_path / "saved")
    track(pdb, [dcd], out=out, **kwargs)
    loaded = load_results(out)
    pair = [tuple(in_memory.torsion_set.labels[:2])]
    a = free_energy_profiles(in_memory, n_bootstrap=40, pairs=pair)   # temperature recorded by track
    b = free_energy_profiles(loaded, n_bootstrap=40, pairs=pair)
    for name in ("profiles", "minima", "barriers", "state_free_energies", "profiles_2d"):
        left, right = getattr(a, name), getattr(b, name)
        assert len(left) > 0, name
        pd.testing.assert_frame_equal(left, right, check_exact=True, obj=name)
    assert a.settings == b.settings and a.notices == b.notices
    # the histograms are read as counted (uint8 here: 300 frames in 16 blocks), not widened; a
    # result whose histograms were widened first (int32, as analyses see them) gives the same tables
    assert loaded.blocks.kept("histograms").dtype == np.uint8
    widened = load_results(out)
    assert widened.blocks["histograms"].dtype == np.int32
    c = free_energy_profiles(widened, n_bootstrap=40, pairs=pair)
    for name in ("profiles", "minima", "barriers", "state_free_energies"):
        pd.testing.assert_frame_equal(getattr(b, name), getattr(c, name), check_exact=True, obj=name)
    paths_a, paths_b = a.save(str(tmp_path / "a")), b.save(str(tmp_path / "b"))
    assert [os.path.basename(p) for p in paths_a] == [os.path.basename(p) for p in paths_b]
    for pa, pb in zip(paths_a, paths_b):
        if pa.endswith(".csv"):
            assert open(pa, "rb").read() == open(pb, "rb").read(), pa


def test_torsions_that_move_together_keep_the_larger_error_of_the_pooled_counts(tmp_path):
    # 24 torsions that all follow one stationary two-state jump process (flip probability 0.01 per
    # frame: lam = 0.98; a collective motion, each copy with its own libration): the pooled
    # population has the error of one torsion, sqrt(24) times what the pooled table gives when it
    # takes them as independent (identical copies leave Cochran's Q nothing to add). The exact
    # error of the time average of n frames of such a chain, p (1 - p) / n [(1 + lam) / (1 - lam)
    # - 2 lam (1 - lam^n) / (n (1 - lam)^2)] (common practice; M. B. Priestley, Spectral Analysis
    # and Time Series, 1981, sec. 5.3, from memory), is the reference: the bootstrap of the pooled
    # counts, which the type row keeps as the larger error, is near it; the pooled table's far below
    rng = np.random.default_rng(1)
    n, runs, lam = 2000, 12, 0.98
    exact = np.sqrt(0.25 / n * ((1 + lam) / (1 - lam) - 2 * lam * (1 - lam ** n) / (n * (1 - lam) ** 2)))
    rows, pooled_errs = [], []
    for r in range(runs):
        s, cur = np.zeros(n), float(rng.random() < 0.5)
        for f in range(n):
            cur = 1.0 - cur if rng.random() < 0.01 else cur
            s[f] = cur
        angles = np.where(s > 0, 62.0, 178.0)[:, None] + rng.normal(0.0, 5.0, size=(n, 24))
        pdb, dcd = write_rotor_trajectory(str(tmp_path), f"c{r}", angles)
        res = track(pdb, [dcd], torsions="rotatable", temperature_k=T)
        dg = free_energy_profiles(res, n_bootstrap=100, per_torsion=False).state_free_energies
        rows.append(dg[(dg["torsion"].astype(str) == "") & (dg["state"] == "anti")]["population_err"].iloc[0])
        pooled_errs.append(res.populations_by_type.set_index("state").loc["anti", "population_err"])
    assert np.median(np.array(rows) / np.array(pooled_errs)) > 3.0
    assert 0.7 < np.sqrt(np.mean(np.square(rows))) / exact < 1.4
    assert np.sqrt(np.mean(np.square(pooled_errs))) / exact < 0.5


def test_pooled_state_errors_include_the_spread_between_frozen_torsions(tmp_path):
    # 12 torsions of one type that never move, 4 held in gauche+ and 8 in anti: every block of
    # time holds the same pooled counts, so a bootstrap over blocks alone gives an error of 0,
    # while the torsions plainly differ. The type rows carry the run's pooled error (its
    # random-effects spread, DerSimonian & Laird, Control. Clin. Trials 7 (1986) 177) and a
    # free-energy error at least the delta method's from those population errors.
    rng = np.random.default_rng(5)
    held = np.r_[np.full(4, 65.0), np.full(8, 178.0)]
    angles = held[None, :] + rng.normal(0.0, 4.0, size=(200, 12))
    pdb, dcd = write_rotor_trajectory(str(tmp_path), "frozen", angles)
    res = track(pdb, [dcd], torsions="rotatable", temperature_k=T)
    pooled = res.populations_by_type.set_index("state")
    assert pooled.loc["anti", "population"] == pytest.approx(8 / 12) and pooled.loc["anti", "population_err"] > 0.05
    pset = free_energy_profiles(res, n_bootstrap=40)
    dg = pset.state_free_energies
    # no torsion ever changed state: the profile says its free energies are not an equilibrium's
    assert [n for n in pset.notices if n.startswith("1 type(s) never changed state")]
    types = dg[dg["torsion"].astype(str) == ""].set_index("state")
    for state in ("anti", "gauche+"):
        assert types.loc[state, "population_err"] == pytest.approx(pooled.loc[state, "population_err"], rel=1e-12)
    p, q = pooled.loc["gauche+", "population"], pooled.loc["anti", "population"]
    delta = KT * np.hypot(pooled.loc["gauche+", "population_err"] / p, pooled.loc["anti", "population_err"] / q)
    assert types.loc["gauche+", "reference_state"] == "anti"
    assert types.loc["gauche+", "free_energy_err_kj_mol"] >= delta * (1 - 1e-12)
    # single torsions keep their own (time) errors: each never left its state
    singles = dg[dg["torsion"].astype(str) != ""]
    assert (singles["population_err"].fillna(0) == 0).all()


def test_a_single_frame_has_no_state_free_energy_errors():
    # one frame fills one block: no spread between blocks can be seen, so the errors are missing
    # (NaN, 'n/a'), as track's population errors are, never 0 (common practice: no error from one sample)
    import MDAnalysis as mda

    import dihedra

    u = mda.Universe(dihedra.example_path("hexane.pdb"), dihedra.example_path("hexane.xtc"))
    ts = dihedra.TorsionStates(u.atoms, torsions="rotatable", scheme="anti-gauche").run(stop=1)
    sfe = dihedra.free_energy_profiles(ts, temperature_k=298.15, per_torsion=False).state_free_energies
    assert sfe["population"].notna().all()
    assert sfe["population_err"].isna().all()
    assert sfe.loc[sfe["state"] != sfe["reference_state"], "free_energy_err_kj_mol"].isna().all()


@pytest.fixture(scope="module")
def rna_single(tmp_path_factory):
    """MDAnalysisTests' RNA (PDB 1k5i, CHARMM36): a single structure, its nucleic-acid backbone tracked."""
    from MDAnalysisTests.datafiles import RNA_PDB, RNA_PSF

    out = str(tmp_path_factory.mktemp("rna") / "rna")
    track(RNA_PSF, [RNA_PDB], torsions="nucleic-backbone", temperature_k=300.0, keep_angles=True, out=out)
    return load_results(out)


def test_a_single_structure_has_no_profile_errors(rna_single, capsys):
    # one structure is one frame, which fills one block: every resample that holds it holds the same
    # data, and the 8 residues of one structure are not 8 independent samples of the run's time
    # (common practice: no spread can be estimated from a single sample). No bin, kernel point or state
    # free energy has an error, the header claims no bootstrap, and the notice says why.
    from dihedra.cli import main

    pset = free_energy_profiles(rna_single, n_bootstrap=40)
    sampled = pset.profiles["sampled"].astype(bool)
    assert sampled.sum() > 100
    assert pset.profiles.loc[sampled, "free_energy_err_kj_mol"].isna().all()   # histogram and kernel rows
    assert pset.state_free_energies["free_energy_err_kj_mol"].isna().all()
    assert pset.state_free_energies["population_err"].isna().all()
    assert pset.settings["n_blocks_with_samples"] == 1
    assert [n for n in pset.notices if n.startswith(f"all {len(rna_single.torsion_set.labels) + 28} profile(s) "
                                                    "have no errors")]
    assert main(["profile", rna_single.folder, "--bootstrap", "40", "--overwrite"]) == 0
    out = capsys.readouterr().out
    header = out.splitlines()[0]
    assert "no errors" in header and "bootstrap" not in header
    assert "dG vs g+ = 0.00 ± n/a" in out   # (the reference state too: no error, not a measured 0)
    written = pd.read_csv(os.path.join(rna_single.folder, "profiles.csv"))
    assert written.loc[written["sampled"], "free_energy_err_kj_mol"].isna().all()


def test_minima_and_barriers_of_a_profile_without_errors_have_none():
    # a profile whose samples lie in one block (its only resample is the profile itself, so minima and
    # barriers are found) gives them no errors either, while the same counts in two blocks do (common
    # practice: a bootstrap needs at least two blocks to resample)
    from dihedra.analysis.profiles.features import _features_stack
    from dihedra.numerics.density import _histogram_stack

    centres = np.arange(72) * 5.0 - 177.5
    counts = np.round(400 * np.exp(-threefold_energy(centres) / KT)).astype(float)   # three wells, sampled
    one = _histogram_stack(counts[None, None, :], np.ones((20, 1)), KT, 5.0)
    minima, barriers = _features_stack(one, KT)
    assert len(minima["row"]) == 3 and len(barriers["row"]) == 3
    for table in (minima, barriers):
        for name in [f for f in table if "_err_" in f]:
            assert np.isnan(table[name]).all(), name
    assert np.isnan(one.free_energy_err_kj_mol).all()
    halves = np.stack([np.floor(counts / 2), np.ceil(counts / 2)])[:, None, :]
    two = _histogram_stack(halves, bootstrap_multiplicities([0, 0], 20, np.random.default_rng(1)), KT, 5.0)
    minima, _ = _features_stack(two, KT)
    assert np.isfinite(two.free_energy_err_kj_mol[two.sampled]).all()
    assert np.isfinite(minima["free_energy_err_kj_mol"]).all()


@pytest.mark.parametrize("n_frames", [2, 3])
def test_errors_of_a_few_frames_are_said_to_be_rough(n_frames):
    # two or three frames fill two or three blocks: a bootstrap spread can be computed, but the
    # standard deviation of k values is itself uncertain by sqrt(1 - c4^2) / c4, c4 =
    # sqrt(2 / (k - 1)) Gamma(k / 2) / Gamma((k - 1) / 2) for normal values (the bias constant of
    # the sample standard deviation, common practice; scipy.special.gamma): the notice's
    # 1 / sqrt(2 (k - 1)) is within 10 % of it, and the header calls the errors rough
    import MDAnalysis as mda
    from scipy.special import gamma

    import dihedra
    from dihedra.analysis.profiles.estimation import error_source

    u = mda.Universe(dihedra.example_path("hexane.pdb"), dihedra.example_path("hexane.xtc"))
    ts = dihedra.TorsionStates(u.atoms, torsions="rotatable", scheme="anti-gauche").run(stop=n_frames)
    pset = free_energy_profiles(ts, temperature_k=298.15, per_torsion=False, n_bootstrap=40)
    sampled = pset.profiles["sampled"].astype(bool)
    assert np.isfinite(pset.profiles.loc[sampled, "free_energy_err_kj_mol"]).all()
    assert pset.settings["n_blocks_with_samples"] == n_frames
    rough = [n for n in pset.notices if f"bootstrap over only {n_frames} blocks" in n]
    assert rough and "rough" in rough[0]
    stated = float(re.search(r"(\d+)% for", rough[0]).group(1)) / 100
    c4 = np.sqrt(2 / (n_frames - 1)) * gamma(n_frames / 2) / gamma((n_frames - 1) / 2)
    assert stated == pytest.approx(np.sqrt(1 - c4 ** 2) / c4, rel=0.1)
    assert error_source(pset.settings).endswith(f"of only {n_frames} blocks with samples (rough)")
