"""Ensemble-averaged 3J couplings: published check values, exact averages, experiment comparison."""

import json
import os
import shutil
import warnings

import numpy as np
import pandas as pd
import pytest
from scipy import integrate

from conftest import place_fourth
from dihedra.analysis.couplings import (KarplusRelation, compare_with_experiment, couplings_from_histograms,
                                        ensemble_couplings, get_relation, read_experimental)
from dihedra.errors import DihedraError
from dihedra.io.resultsdir import load_results
from dihedra.tracking import track
from dihedra.units import kt_kj_mol
from synthetic_rotors import inverse_cdf_samples, rb_energy, write_rotor_trajectory

T = 298.15
EDGES = np.linspace(-180.0, 180.0, 361)


# ------------------------------------------------------------------------------------------------
# Published check values
# ------------------------------------------------------------------------------------------------

def test_vuister_bax_check_values():
    vb = get_relation("vuister-bax-1993")
    # Vuister & Bax, J. Am. Chem. Soc. 115 (1993) 7772 (A = 6.51, B = -1.76, C = 1.60 Hz, theta = phi - 60),
    # values derived from the coefficients: J(-60) = 4.107, J(-120) = 9.870, J(60) = 6.350
    assert vb.evaluate(-60.0) == pytest.approx(4.107, abs=1e-3)
    assert vb.evaluate(-120.0) == pytest.approx(9.870, abs=1e-3)
    assert vb.evaluate(60.0) == pytest.approx(6.350, abs=1e-3)
    # analytic (Vuister & Bax 1993 form): J(-120) is the maximum (A - B + C)
    grid = np.linspace(-180, 180, 3601)
    assert grid[np.argmax(vb.evaluate(grid))] == pytest.approx(-120.0, abs=0.1)


def test_hu_bax_and_pardi_follow_their_coefficients():
    # coefficients of Hu & Bax, J. Am. Chem. Soc. 119 (1997) 6360 and Pardi, Billeter & Wuthrich,
    # J. Mol. Biol. 180 (1984) 741; maximum A - B + C at theta = 180 deg, i.e. phi = -120 deg (analytic)
    assert get_relation("hu-bax-1997").evaluate(-120.0) == pytest.approx(7.09 + 1.42 + 1.55, abs=1e-9)
    assert get_relation("pardi-1984").evaluate(-120.0) == pytest.approx(6.4 + 1.4 + 1.9, abs=1e-9)
    # theta = phi - 60 = 0 gives A + B + C (analytic)
    assert get_relation("pardi-1984").evaluate(60.0) == pytest.approx(6.4 - 1.4 + 1.9, abs=1e-9)


def test_karplus_1959_check_values():
    k = get_relation("karplus-1959")
    # Karplus, J. Chem. Phys. 30 (1959) 11 (8.5 / 9.5 cos^2 - 0.28): J(0) = 8.22, J(90) = -0.28, J(180) = 9.22
    assert k.evaluate(0.0) == pytest.approx(8.22, abs=1e-9)
    assert k.evaluate(90.0) == pytest.approx(-0.28, abs=1e-9)
    assert k.evaluate(180.0) == pytest.approx(9.22, abs=1e-9)
    assert k.evaluate(-180.0) == pytest.approx(9.22, abs=1e-9)


def test_haasnoot_without_substituents_is_the_plain_cosine_form():
    h = get_relation("haasnoot-altona-1980")
    # Haasnoot, de Leeuw & Altona, Tetrahedron 36 (1980) 2783: P1..P3 = 13.7, -0.73, 0;
    # J(0) = P1 + P2, J(180) = P1 - P2 (analytic)
    assert h.evaluate(0.0) == pytest.approx(13.7 - 0.73, abs=1e-9)
    assert h.evaluate(180.0) == pytest.approx(13.7 + 0.73, abs=1e-9)
    # a substituent adds dchi (P4 + P5 cos^2(xi phi + P6 |dchi|)) (the published form)
    d = 1.3
    expected = 13.7 * np.cos(0.5) ** 2 - 0.73 * np.cos(0.5) + d * (0.56 - 2.47 * np.cos(0.5 + np.radians(16.9 * d)) ** 2)
    assert h.evaluate(np.degrees(0.5), [(d, 1)]) == pytest.approx(expected, abs=1e-12)


def test_bin_means_equal_the_integral_over_each_bin():
    # scipy.integrate.quad of J over a bin divided by its width
    vb = get_relation("vuister-bax-1993")
    means = vb.bin_means(EDGES)
    for b in (0, 57, 180, 300):
        exact = integrate.quad(vb.evaluate, EDGES[b], EDGES[b + 1])[0] / (EDGES[b + 1] - EDGES[b])
        assert means[b] == pytest.approx(exact, abs=1e-10)


# ------------------------------------------------------------------------------------------------
# Ensemble averages
# ------------------------------------------------------------------------------------------------

def boltzmann_average(relation, energy, temperature=T):
    """<J> = int J p dphi with p ~ exp(-V/kT), by scipy.integrate.quad (analytic distribution)."""
    kt = kt_kj_mol(temperature)
    pts = [-120, -60, 0, 60, 120]
    w = lambda x: np.exp(-energy(x) / kt)  # noqa: E731
    z = integrate.quad(w, -180, 180, points=pts, limit=200)[0]
    return integrate.quad(lambda x: relation.evaluate(x) * w(x), -180, 180, points=pts, limit=200)[0] / z


def test_exact_bin_probabilities_give_the_integral():
    # numerical integral (scipy) vs the histogram average with the exact bin probabilities
    kt = kt_kj_mol(T)
    w = lambda x: np.exp(-rb_energy(x) / kt)  # noqa: E731
    probs = np.array([integrate.quad(w, a, b)[0] for a, b in zip(EDGES[:-1], EDGES[1:])])
    hist = np.tile(probs / 16, (16, 1, 1))  # 16 identical blocks
    for name in ("vuister-bax-1993", "karplus-1959"):
        rel = get_relation(name)
        j, err, _ = couplings_from_histograms(hist, np.zeros(16, int), rel.bin_means(EDGES)[None, :])
        assert j[0] == pytest.approx(boltzmann_average(rel, rb_energy), abs=2e-3)
        assert err[0] == pytest.approx(0.0, abs=1e-12)


@pytest.fixture(scope="module")
def rb_folder(tmp_path_factory):
    """100 molecules x 400 frames drawn exactly from the RB butane distribution, tracked."""
    folder = tmp_path_factory.mktemp("rb")
    angles = inverse_cdf_samples(rb_energy, T, (400, 100), np.random.default_rng(5))
    pdb, dcd = write_rotor_trajectory(str(folder), "rb", angles)
    out = os.path.join(str(folder), "results")
    track(pdb, [dcd], torsions="rotatable", scheme="anti-gauche", out=out, temperature_k=T)
    return load_results(out)


def test_sampled_average_matches_the_integral_within_error(rb_folder):
    # numerical integral (scipy) of J over exp(-V_RB/kT); sampled average within 3 standard errors
    ttype = rb_folder.torsion_set.types[0]
    for name in ("vuister-bax-1993", "karplus-1959"):
        cres = ensemble_couplings(rb_folder, name, types=[ttype])
        pooled = cres.couplings[cres.couplings["level"] == "type"].iloc[0]
        expected = boltzmann_average(get_relation(name), rb_energy)
        assert abs(pooled["j_hz"] - expected) < 3 * pooled["j_err_hz"]
        assert 0 < pooled["j_err_hz"] < 0.05
        per = cres.couplings[cres.couplings["level"] == "torsion"]
        assert len(per) == 100
        # independent molecules: the per-torsion errors scatter the values as they claim (common practice)
        z = (per["j_hz"] - expected) / per["j_err_hz"]
        assert 0.6 < z.std() < 1.6


def test_hn_ha_family_spread_is_reported_separately(rb_folder):
    ttype = rb_folder.torsion_set.types[0]
    cres = ensemble_couplings(rb_folder, ["vuister-bax-1993", "hu-bax-1997", "pardi-1984"], types=[ttype])
    pooled = cres.couplings[cres.couplings["level"] == "type"].set_index("relation")
    # the standard deviation of the three averages (analytic definition of the column)
    assert pooled["j_systematic_hz"].iloc[0] == pytest.approx(np.std(pooled["j_hz"].to_numpy(), ddof=1),
                                                              rel=1e-6)
    assert (pooled["systematic_basis"] == "parameter-set spread").all()
    assert (pooled["j_err_hz"] < pooled["j_systematic_hz"]).all()


def test_relation_not_meant_for_the_torsions_says_so(rb_folder):
    # no torsion the relation couples: an error that names the atoms, not a silent average
    with pytest.raises(DihedraError, match="H-N-CA-HA") as err:
        ensemble_couplings(rb_folder, "vuister-bax-1993")
    assert "np.int64" not in str(err.value)
    with pytest.raises(DihedraError, match="H-C-C-H"):
        ensemble_couplings(rb_folder, "karplus-1959")
    # torsions selected by hand are taken as given, with a notice
    cres = ensemble_couplings(rb_folder, "vuister-bax-1993", types=[rb_folder.torsion_set.types[0]])
    assert any("H-N-CA-HA" in n and "not that torsion" in n for n in cres.notices)


# ------------------------------------------------------------------------------------------------
# Against experiment
# ------------------------------------------------------------------------------------------------

def test_experiment_comparison_verdicts(rb_folder, tmp_path):
    cres = ensemble_couplings(rb_folder, "karplus-1959", types=[rb_folder.torsion_set.types[0]])
    per = cres.couplings[cres.couplings["level"] == "torsion"].head(6)
    truth = boltzmann_average(get_relation("karplus-1959"), rb_energy)
    good = pd.DataFrame({"torsion": per["torsion"], "J_hz": truth, "J_err_hz": 0.2})
    path = tmp_path / "exp.csv"
    good.to_csv(path, index=False)
    points, summary = compare_with_experiment(cres.couplings, read_experimental(str(path)))
    # analytic: values equal to the exact average with honest errors -> chi-square small
    assert summary[0]["verdict"] == "consistent"
    assert summary[0]["n_points"] == 6
    assert np.allclose(points["deviation_hz"], points["j_hz"] - points["j_exp_hz"])
    assert np.allclose(points["sigma_hz"], np.hypot(points["j_err_hz"], 0.2))  # no systematic for 1959
    assert summary[0]["rmsd_hz"] == pytest.approx(np.sqrt(np.mean(points["deviation_hz"] ** 2)))
    # one value 3 Hz off: named as an outlier; all off by 2 Hz: inconsistent (chi-square p < 0.001)
    bad = good.copy()
    bad.iloc[2, 1] += 3.0
    bad.to_csv(path, index=False)
    points, summary = compare_with_experiment(cres.couplings, read_experimental(str(path)))
    assert summary[0]["outliers"] == [per["torsion"].iloc[2]]
    assert summary[0]["verdict"] in ("tension", "inconsistent")
    worse = good.assign(J_hz=good["J_hz"] + 2.0)
    worse.to_csv(path, index=False)
    _, summary = compare_with_experiment(cres.couplings, read_experimental(str(path)))
    assert summary[0]["verdict"] == "inconsistent"


def test_experiment_by_type_and_unmatched_labels(rb_folder, tmp_path):
    ttype = rb_folder.torsion_set.types[0]
    path = tmp_path / "exp.csv"
    pd.DataFrame({"residue": [ttype, "XYZ99"], "J_hz": [5.0, 5.0], "J_err_hz": [0.3, 0.3]}).to_csv(path, index=False)
    cres = ensemble_couplings(rb_folder, "karplus-1959", types=[ttype], experimental=read_experimental(str(path)))
    points, summary = cres.experiment, cres.experiment_summary
    assert points.iloc[0]["matched_as"] == "type"
    assert summary[0]["n_points"] == 1
    assert summary[0]["unmatched"][0].startswith("XYZ99")
    pd.DataFrame({"torsion": ["a"], "J": [1.0]}).to_csv(path, index=False)
    with pytest.raises(DihedraError, match="J_hz and J_err_hz"):
        read_experimental(str(path))
    with pytest.raises(DihedraError, match="lacks the column"):
        ensemble_couplings(rb_folder, "karplus-1959", types=[ttype], experimental=pd.DataFrame({"torsion": ["a"]}))
    # save writes the two tables and the JSON of the relation, with the file the values came from
    (tmp_path / "out").mkdir()
    paths = cres.save(str(tmp_path / "out"), experimental_path=str(path))
    assert [os.path.basename(p) for p in paths] == ["couplings_karplus-1959.csv",
                                                    "couplings_karplus-1959_vs_experiment.csv",
                                                    "couplings_karplus-1959.json"]
    with open(paths[2]) as fh:
        info = json.load(fh)
    assert info["experimental"]["file"] == str(path) and info["experimental"]["summary"][0]["n_points"] == 1


def test_experiment_coupled_atoms_and_columns_not_read(rb_folder, tmp_path):
    ttype = rb_folder.torsion_set.types[0]
    cres = ensemble_couplings(rb_folder, "karplus-1959", types=[ttype])
    row = cres.couplings[cres.couplings["level"] == "torsion"].iloc[0]
    path = tmp_path / "exp.csv"
    # coupled_atoms as the couplings table names them (spaces and case aside) chooses that row
    pd.DataFrame({"torsion": [row["torsion"]], "coupled_atoms": [row["coupled_atoms"].lower().replace(",", ", ")],
                  "J_hz": [row["j_hz"]], "J_err_hz": [0.2], "source": ["lab notebook"]}).to_csv(path, index=False)
    notices = []
    points, summary = compare_with_experiment(cres.couplings, read_experimental(str(path)), notices=notices)
    assert points["coupled_atoms"].iloc[0] == row["coupled_atoms"] and points["deviation_hz"].iloc[0] == 0.0
    # the column that is not read is named in a notice, not dropped silently
    assert any("source" in n and "not read" in n for n in notices)
    # coupled atoms the torsion has no row for: an error that names the row there is
    pd.DataFrame({"torsion": [row["torsion"]], "coupled_atoms": ["HN,HA"], "J_hz": [5.0],
                  "J_err_hz": [0.2]}).to_csv(path, index=False)
    with pytest.raises(DihedraError, match=row["coupled_atoms"]):
        compare_with_experiment(cres.couplings, read_experimental(str(path)))


# ------------------------------------------------------------------------------------------------
# Weighted histograms
# ------------------------------------------------------------------------------------------------

def test_weights_give_the_reweighted_average(tmp_path):
    # analytic: uniform samples reweighted by exp(-V/kT) average like exp(-V/kT) itself
    rng = np.random.default_rng(3)
    angles = rng.uniform(-180, 180, size=(600, 60))
    pdb, dcd = write_rotor_trajectory(str(tmp_path), "flat", angles)
    weights = np.exp(-rb_energy(angles[:, 0]) / kt_kj_mol(T))  # one molecule's angle sets each frame weight
    pd.DataFrame({"weight": weights}).to_csv(tmp_path / "w.csv", index=False)
    out = str(tmp_path / "res")
    track(pdb, [dcd], torsions="0,1,2,3", weights=str(tmp_path / "w.csv"), out=out, temperature_k=T)
    res = load_results(out)
    cres = ensemble_couplings(res, "karplus-1959", types=[res.torsion_set.labels[0]])
    row = cres.couplings.iloc[0]
    expected = boltzmann_average(get_relation("karplus-1959"), rb_energy)
    unweighted = integrate.quad(get_relation("karplus-1959").evaluate, -180, 180, points=[-90, 90])[0] / 360
    assert abs(row["j_hz"] - expected) < 3 * row["j_err_hz"]
    assert abs(row["j_hz"] - unweighted) > 5 * row["j_err_hz"]  # the weights did something
    assert any("weighted" in n for n in cres.notices)


# ------------------------------------------------------------------------------------------------
# Haasnoot-Altona substituents from the topology
# ------------------------------------------------------------------------------------------------

def write_ethanol(folder, torsions_deg, mirror=False, stem="etoh"):
    """Ethanol (all atoms) with the methyl turned so that H11-C1-C2-H21 takes each given value."""
    import MDAnalysis as mda

    names = ["C1", "C2", "O", "HO", "H11", "H12", "H13", "H21", "H22"]
    elements = ["C", "C", "O", "H", "H", "H", "H", "H", "H"]
    bonds = [(0, 1), (1, 2), (2, 3), (0, 4), (0, 5), (0, 6), (1, 7), (1, 8)]
    c1, c2, ref = np.zeros(3), np.array([1.53, 0, 0]), np.array([-0.5, 1.0, 0.0])
    o = place_fourth(ref, c1, c2, 1.43, 109.5, np.array(180.0))
    h21 = place_fourth(ref, c1, c2, 1.09, 109.5, np.array(60.0))
    h22 = place_fourth(ref, c1, c2, 1.09, 109.5, np.array(-60.0))
    ho = place_fourth(c1, c2, o, 0.96, 109.0, np.array(180.0))
    frames = []
    for t in np.atleast_1d(torsions_deg):
        hs = [place_fourth(h21, c2, c1, 1.09, 109.5, np.array(t + d)) for d in (0.0, 120.0, -120.0)]
        frames.append(np.array([c1, c2, o, ho, *hs, h21, h22]))
    xyz = np.array(frames)
    if mirror:
        xyz[..., 0] *= -1
    u = mda.Universe.empty(9, n_residues=1, atom_resindex=np.zeros(9, int), trajectory=True)
    u.add_TopologyAttr("names", names)
    u.add_TopologyAttr("elements", elements)
    u.add_TopologyAttr("resnames", ["ETO"])
    u.add_TopologyAttr("resids", [1])
    u.add_TopologyAttr("bonds", bonds)
    pdb, dcd = os.path.join(folder, stem + ".pdb"), os.path.join(folder, stem + ".dcd")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        u.atoms.positions = xyz[0]
        u.atoms.write(pdb, bonds="conect")
        with mda.Writer(dcd, 9) as w:
            for f in xyz:
                u.atoms.positions = f
                w.write(u.atoms)
    return pdb, dcd


def test_haasnoot_substituents_and_mirror_symmetry(tmp_path):
    rng = np.random.default_rng(9)
    t = np.degrees(rng.vonmises(np.radians(70.0), 4.0, size=800))  # an asymmetric distribution
    results = []
    for mirror in (False, True):
        pdb, dcd = write_ethanol(str(tmp_path), t, mirror=mirror, stem=f"etoh{int(mirror)}")
        out = str(tmp_path / f"res{int(mirror)}")
        track(pdb, [dcd], torsions="4,0,1,7", out=out, temperature_k=T, keep_angles=True)
        res = load_results(out)
        ang = res.angles()[res.torsion_set.labels[0]].to_numpy(float)
        assert np.allclose(ang, -t if mirror else t, atol=0.01)
        results.append(ensemble_couplings(res, "haasnoot-altona-1980"))
        # the same substituents from a universe handed in instead of the recorded topology
        import MDAnalysis as mda
        given = ensemble_couplings(res, "haasnoot-altona-1980", universe=mda.Universe(pdb))
        assert given.substituents == results[-1].substituents
        pd.testing.assert_frame_equal(given.couplings, results[-1].couplings, check_exact=True)
    subs = [list(r.substituents.values())[0] for r in results]
    # one substituent (O) on C2; Huggins O 3.50 - H 2.20 = 1.30 with an H as its only beta atom
    # (Huggins electronegativities as used by Haasnoot, de Leeuw & Altona 1980, from memory)
    assert [(round(d, 6), a) for d, _, a in subs[0]] == [(1.3, 2)]
    # a mirror image flips the orientation and the torsions: J(-phi, -xi) = J(phi, xi) (analytic symmetry)
    assert subs[0][0][1] == -subs[1][0][1]
    j = [r.couplings.iloc[0]["j_hz"] for r in results]
    assert j[0] == pytest.approx(j[1], abs=1e-3)
    # without the substituent term the average would differ (the term matters here)
    h = get_relation("haasnoot-altona-1980")
    bare = np.mean(h.evaluate(t))
    with_sub = np.mean(h.evaluate(t, [(1.3, subs[0][0][1])]))
    assert j[0] == pytest.approx(with_sub, abs=0.02)
    assert abs(with_sub - bare) > 0.3


def test_haasnoot_needs_h_c_c_h(rb_folder):
    with pytest.raises(DihedraError, match="H-C-C-H"):
        ensemble_couplings(rb_folder, "haasnoot-altona-1980")


# ------------------------------------------------------------------------------------------------
# Custom relations and the command line
# ------------------------------------------------------------------------------------------------

def test_custom_relation_from_toml(tmp_path):
    path = tmp_path / "rel.toml"
    path.write_text('[relation]\nname = "mine"\nA = 6.51\nB = -1.76\nC = 1.60\noffset_deg = -60\n'
                    'systematic_hz = 0.5\n')
    rel = get_relation(str(path))
    # same coefficients as Vuister & Bax, J. Am. Chem. Soc. 115 (1993) 7772: the same values
    assert rel.evaluate(-60.0) == pytest.approx(4.107, abs=1e-3)
    assert rel.systematic_hz == 0.5
    path.write_text('[relation]\nA = 1\n')
    with pytest.raises(DihedraError, match="B is missing"):
        get_relation(str(path))
    with pytest.raises(DihedraError, match="unknown Karplus relation"):
        get_relation("karplus")
    with pytest.raises(DihedraError, match="lacks"):
        KarplusRelation(name="x", form="cosine", coefficients={"A": 1})


def test_command_line(rb_folder, tmp_path, capsys):
    from dihedra.cli import main

    ttype = rb_folder.torsion_set.types[0]
    exp = tmp_path / "exp.csv"
    pd.DataFrame({"torsion": [ttype], "J_hz": [boltzmann_average(get_relation("karplus-1959"), rb_energy)],
                  "J_err_hz": [0.2]}).to_csv(exp, index=False)
    folder = str(tmp_path / "copy")
    shutil.copytree(rb_folder.folder, folder)
    status = main(["couplings", folder, "--relation", "karplus-1959", "--types", ttype, "--experimental", str(exp)])
    assert status == 0
    text = capsys.readouterr().out
    assert "consistent" in text and "karplus-1959" in text
    table = pd.read_csv(os.path.join(folder, "couplings_karplus-1959.csv"))
    assert {"torsion", "j_hz", "j_err_hz", "j_systematic_hz"} <= set(table.columns)
    vs = pd.read_csv(os.path.join(folder, "couplings_karplus-1959_vs_experiment.csv"))
    assert vs["matched_as"].iloc[0] == "type"
    with open(os.path.join(folder, "couplings_karplus-1959.json")) as fh:
        info = json.load(fh)
    assert info["relations"][0]["citation"].startswith("Karplus")
    assert main(["couplings", folder, "--relation", "nope"]) == 2
    # another relation keeps its own files beside the first's; the same relation again needs
    # --overwrite (the former --select still works, with a note)
    before = open(os.path.join(folder, "couplings_karplus-1959.csv"), "rb").read()
    assert main(["couplings", folder, "--relation", "vuister-bax-1993", "--select", ttype]) == 0
    assert "--select is now --types" in capsys.readouterr().err
    assert os.path.exists(os.path.join(folder, "couplings_vuister-bax-1993.csv"))
    assert open(os.path.join(folder, "couplings_karplus-1959.csv"), "rb").read() == before
    assert main(["couplings", folder, "--relation", "karplus-1959", "--types", ttype]) == 2
    assert "--overwrite" in capsys.readouterr().err
    assert main(["couplings", folder, "--relation", "karplus-1959", "--types", ttype, "--overwrite"]) == 0


# ------------------------------------------------------------------------------------------------
# Reference (measured) state populations, in the comparison output
# ------------------------------------------------------------------------------------------------

def boltzmann_anti(energy=rb_energy):
    """Fraction of exp(-V/kT) with |phi| > 120 deg (scipy.integrate.quad; no Jacobian for a torsion)."""
    kt = kt_kj_mol(T)
    w = lambda x: np.exp(-energy(x) / kt)  # noqa: E731
    z = integrate.quad(w, -180, 180, points=[-120, 0, 120], limit=200)[0]
    return (integrate.quad(w, 120, 180)[0] + integrate.quad(w, -180, -120)[0]) / z


def test_reference_populations_z_scores_and_verdicts(rb_folder, tmp_path):
    from dihedra.analysis.reference_populations import compare_reference_populations, read_reference_populations

    ttype = rb_folder.torsion_set.types[0]
    anti = boltzmann_anti()
    path = tmp_path / "ref.csv"
    pd.DataFrame({"type": [ttype, ttype], "state": ["anti", "gauche+|gauche-"],
                  "population": [anti, 1 - anti], "population_err": [0.01, 0.01]}).to_csv(path, index=False)
    ref = compare_reference_populations(rb_folder, read_reference_populations(str(path)))
    rows, verdicts = ref.rows, ref.verdicts
    # analytic: exact Boltzmann populations of the sampled potential are consistent
    assert verdicts.iloc[0]["verdict"] == "consistent"
    # analytic identity: gauche+ + gauche- = 1 - anti, with the same standard error
    assert rows.iloc[1]["population"] == pytest.approx(1 - rows.iloc[0]["population"], abs=1e-12)
    assert rows.iloc[1]["population_err"] == pytest.approx(rows.iloc[0]["population_err"], rel=1e-6)
    assert rows.iloc[0]["z_score"] == pytest.approx(
        (rows.iloc[0]["population"] - anti) / np.hypot(rows.iloc[0]["population_err"], 0.01))
    # a reference 0.1 off is inconsistent (|z| > 3), one 2.5 sigma off is in tension
    pd.DataFrame({"type": [ttype], "state": ["anti"], "population": [anti - 0.1],
                  "population_err": [0.01]}).to_csv(path, index=False)
    verdicts = compare_reference_populations(rb_folder, read_reference_populations(str(path))).verdicts
    assert verdicts.iloc[0]["verdict"] == "inconsistent"
    p, se = rows.iloc[0]["population"], rows.iloc[0]["population_err"]
    pd.DataFrame({"type": [ttype], "state": ["anti"], "population": [p - 2.5 * np.hypot(se, 0.001)],
                  "population_err": [0.001]}).to_csv(path, index=False)
    verdicts = compare_reference_populations(rb_folder, read_reference_populations(str(path))).verdicts
    assert verdicts.iloc[0]["verdict"] == "tension"
    pd.DataFrame({"type": [ttype], "state": ["trans"], "population": [0.5],
                  "population_err": [0.01]}).to_csv(path, index=False)
    with pytest.raises(DihedraError, match="not a state of the scheme"):
        compare_reference_populations(rb_folder, read_reference_populations(str(path)))


def test_reference_populations_in_the_comparison_output(rb_folder, tmp_path, capsys):
    from dihedra.cli import main

    ttype = rb_folder.torsion_set.types[0]
    ref = tmp_path / "ref.csv"
    pd.DataFrame({"type": [ttype], "state": ["anti"], "population": [boltzmann_anti()],
                  "population_err": [0.01]}).to_csv(ref, index=False)
    assert main(["compare", rb_folder.folder, "--reference-populations", str(ref)]) == 0
    table = pd.read_csv(os.path.join(rb_folder.folder, "comparison.csv"))
    assert table.loc[0, "reference_verdict"] == "consistent"
    assert "reference_z_score_anti" in table.columns
    # with a scan (the RB potential itself as a CSV) both sit in the same comparison.csv row
    scan = tmp_path / "scan.csv"
    grid = np.arange(-180.0, 180.0, 5.0)
    pd.DataFrame({"angle_deg": grid, "energy_kj_mol": rb_energy(grid)}).to_csv(scan, index=False)
    assert main(["compare", rb_folder.folder, "--scan", str(scan), "--reference-populations", str(ref),
                 "--bootstrap", "50", "--overwrite"]) == 0   # replaces the comparison of the populations alone
    table = pd.read_csv(os.path.join(rb_folder.folder, "comparison.csv"))
    assert len(table) == 1 and {"verdict", "reference_verdict"} <= set(table.columns)
    with open(os.path.join(rb_folder.folder, "comparison.json")) as fh:
        info = json.load(fh)
    assert info["reference_populations"]["verdicts"][0]["verdict"] == "consistent"
    assert "reference populations" in capsys.readouterr().out
    assert main(["compare", rb_folder.folder]) == 2
