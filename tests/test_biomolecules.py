"""Honest numbers on real biomolecules: the protein and nucleic-acid files that MDAnalysisTests
ships (reference data of the MDAnalysis test suite) run as a new user would run them.

* CHARMM adenylate kinase PSF/DCD (98 frames of a closed-to-open transition),
* AMBER parm7/NetCDF (tz2, a file whose NetCDF stores time 0 in every frame),
* the RNA PSF/PDB (one frame).
"""

import os
import warnings

import numpy as np
import pandas as pd
import pytest

import dihedra
from dihedra.cli import main
from dihedra.errors import DihedraError

mda = pytest.importorskip("MDAnalysis")
data = pytest.importorskip("MDAnalysisTests.datafiles")

warnings.filterwarnings("ignore", category=DeprecationWarning)
warnings.filterwarnings("ignore", category=UserWarning)


def test_a_zero_time_step_is_unknown_and_kinetics_asks_for_dt(tmp_path, capsys):
    # tz2.truncoct.nc stores time 0 in every frame: the time step is unknown, not 0 ps
    out = str(tmp_path / "nc")
    assert main(["track", data.PRM7, data.NCDFtruncoct, "--torsions", "protein-backbone",
                 "--keep-angles", "--out", out]) == 0
    printed = capsys.readouterr()
    assert "time step unknown" in printed.err and "--dt-ps" in printed.err
    res = dihedra.load_results(out)
    rep = res.summary["replicas"][0]
    assert rep["time_step_known"] is False
    assert "0 ps" in rep["time_step_source"]
    with pytest.raises(DihedraError, match="--dt-ps"):
        dihedra.state_kinetics(res)
    assert main(["kinetics", out]) == 2
    assert "--dt-ps" in capsys.readouterr().err
    # with the time step given, the times are those frames x dt
    ok = dihedra.state_kinetics(res, dt_ps=2.0, lags=[1], n_bootstrap=0)
    assert ok.parameters["frame_interval_ps"] == 2.0


def test_a_time_step_that_varies_is_unknown():
    from dihedra.trajectory.assemble import time_step_problem

    assert time_step_problem(1.0, [0.0, 1.0, 2.0, 3.0]) is None
    # float32 times of an XTC file (MDAnalysisTests' adk_oplsaa.xtc: 100.0000076 ps apart)
    assert time_step_problem(100.0, np.float32([0.0, 100.0000076, 200.0000153, 300.0])) is None
    assert "vary" in time_step_problem(1.0, [0.0, 1.0, 2.0, 10.0])
    assert time_step_problem(-1.0, [0.0, -1.0]) is not None
    assert time_step_problem(float("nan"), [0.0, 1.0]) is not None


@pytest.fixture(scope="module")
def adk_backbone(tmp_path_factory):
    out = str(tmp_path_factory.mktemp("adk") / "bb")
    assert main(["track", data.PSF, data.DCD, "--torsions", "protein-backbone", "--out", out]) == 0
    return dihedra.load_results(out)


def test_pooled_errors_of_residues_include_the_spread_between_them(adk_backbone):
    pops, by_type = adk_backbone.populations, adk_backbone.populations_by_type
    # every isoleucine psi stays in its state through the 98 frames: per residue 0 or 1, errors 0
    ile = pops[(pops["type"] == "ILE:psi") & (pops["state"] == "gauche-")]
    assert set(ile["population"]) == {0.0, 1.0} and (ile["population_err"] == 0).all()
    row = by_type[(by_type["type"] == "ILE:psi") & (by_type["state"] == "gauche-")].iloc[0]
    # the pooled error is the standard error of the mean across the 14 residues (common practice),
    # not 0; I^2 = 1: all of the spread is between residues (Higgins & Thompson 2002)
    sem = ile["population"].std(ddof=1) / np.sqrt(len(ile))
    assert row["population_err"] == pytest.approx(sem) and sem > 0.1
    assert row["i_squared"] == 1.0 and row["heterogeneous"]
    assert any("Cochran's Q" in n for n in adk_backbone.notices)
    # types whose residues agree within their errors keep the error of independent copies
    calm = by_type[~by_type["heterogeneous"].astype(bool) & by_type["population_err"].notna()]
    assert len(calm)


def test_a_single_frame_has_no_errors(tmp_path, capsys):
    out = str(tmp_path / "rna")
    assert main(["track", data.RNA_PSF, data.RNA_PDB, "--torsions", "nucleic-backbone", "--out", out]) == 0
    printed = capsys.readouterr()
    assert "± n/a" in printed.out and "± 0.000" not in printed.out
    assert "no error estimate" in printed.err
    res = dihedra.load_results(out)
    verdicts = set(pd.read_csv(os.path.join(out, "convergence.csv"))["verdict"])
    assert verdicts == {"not converged: one frame per replica, nothing to judge convergence by"}
    for table in (res.populations, res.populations_by_type, res.conformers, res.conformers_by_type):
        assert table["population_err"].isna().all()
    assert res.populations["n_effective"].isna().all()     # never infinite
    assert not np.isinf(res.populations["n_effective"]).any()
    from dihedra.presentation.report import write_report
    html = open(write_report(out, figures=False), encoding="utf-8").read()
    assert "± n/a" in html and "± 0.000" not in html


def test_rna_backbone_gets_the_nucleic_scheme_and_the_a_form_states(tmp_path):
    # MDAnalysisTests' RNA (CHARMM36, one frame) is an A-form helix: chi anti (about -160),
    # delta in the C3'-endo range (about 80), and the A-form backbone alpha g-, beta t, gamma g+,
    # epsilon t, zeta g- (Saenger, Principles of Nucleic Acid Structure, Springer 1984, from
    # memory); syn and anti as IUPAC-IUB, Eur. J. Biochem. 131 (1983) 9 defines them
    res = dihedra.track(data.RNA_PSF, data.RNA_PDB, torsions="nucleic-backbone", out=str(tmp_path / "rna"))
    assert res.scheme.name == "nucleic"
    pops = res.populations
    assert set(pops.loc[pops["type"] == "GUA:chi", "state"]) == {"anti", "syn"}
    assert set(pops.loc[pops["type"] == "GUA:delta", "state"]) == {"C3'-endo", "C2'-endo", "atypical"}
    held = pops[pops["population"] == 1.0]   # (one frame: every torsion in one state)
    name = held["type"].str.partition(":")[2]
    majority = {"chi": "anti", "delta": "C3'-endo", "alpha": "g-", "beta": "t", "gamma": "g+", "epsilon": "t",
                "zeta": "g-"}
    for angle, state in majority.items():
        states = held.loc[name == angle, "state"]
        assert (states == state).mean() > 0.75, (angle, states.value_counts().to_dict())
    assert (held.loc[name == "chi", "state"] == "anti").all()
    schemes = pd.read_csv(tmp_path / "rna" / "schemes.csv")
    assert set(schemes.loc[schemes["type"].str.endswith(":delta"), "scheme"]) == {"sugar-pucker"}


def test_proline_chi1_and_chi2_give_one_ring_pucker(tmp_path):
    # the pyrrolidine ring keeps chi1 and chi2 near +-30 with opposite signs: C-gamma endo (chi1 > 0,
    # chi2 < 0) or exo (chi1 < 0, chi2 > 0) (Milner-White, Bell & Maccallum, J. Mol. Biol. 228
    # (1992) 725, from memory), so the two torsions of one proline name the same pucker in (nearly)
    # every frame; MDAnalysisTests' adenylate kinase (OPLS-AA, 10 frames)
    res = dihedra.track(data.GRO, data.XTC, torsions="protein-sidechains")
    pro = res.torsions[res.torsions["type"].isin(["PRO:chi1", "PRO:chi2"])]
    assert len(pro) >= 10
    assert res.scheme.states_of_type("PRO:chi1") == ["endo", "exo"]
    states = res.states()
    for residue, rows in pro.groupby("group"):
        chi1, chi2 = (rows.loc[rows["type"] == f"PRO:{c}", "torsion"].iloc[0] for c in ("chi1", "chi2"))
        assert (states[chi1] == states[chi2]).mean() >= 0.9, residue
    codes = set(np.unique(states[list(pro["torsion"])].to_numpy()))
    assert codes <= {res.scheme.labels.index("endo"), res.scheme.labels.index("exo")}
    assert res.scheme.states_of_type("LEU:chi1") == ["g+", "t", "g-"]


def test_terminal_and_internal_residues_are_named_plainly(adk_backbone):
    # the first residue of adenylate kinase is MET1 (no phi: nothing precedes it); the five
    # internal methionines have phi, psi and omega
    names = set(adk_backbone.conformers_by_type["group_type"])
    assert {"MET", "MET (no phi)"} <= names
    assert not any("#" in n for n in names)
    conf = adk_backbone.conformers
    assert set(conf.loc[conf["group"] == "MET1", "group_type"]) == {"MET (no phi)"}
    assert set(conf.loc[conf["group"] == "MET21", "group_type"]) == {"MET"}


def test_force_field_variants_are_one_type_and_kept_in_torsions_csv(adk_backbone, tmp_path):
    # CHARMM names its histidines HSD: the type is HIS (IUPAC-IUB 1970 residue), the variant stays
    table = adk_backbone.torsions
    his = table[table["resname"] == "HSD"]
    assert len(his) and set(his["type"].str.split(":").str[0]) == {"HIS"} and set(his["variant"]) == {"HSD"}
    by_type = adk_backbone.populations_by_type
    row = by_type[(by_type["type"] == "HIS:psi") & (by_type["state"] == "gauche-")].iloc[0]
    pops = adk_backbone.populations
    per = pops[(pops["type"] == "HIS:psi") & (pops["state"] == "gauche-")]["population"]
    assert row["population_err"] == pytest.approx(per.std(ddof=1) / np.sqrt(len(per)))
    assert row["i_squared"] == 1.0
    assert "HIS" in set(adk_backbone.conformers_by_type["group_type"])
    # kept apart on request
    out = str(tmp_path / "apart")
    assert main(["track", data.PSF, data.DCD, "--torsions", "protein-backbone", "--keep-variants",
                 "--stop", "10", "--out", out]) == 0
    assert "HSD:psi" in set(pd.read_csv(os.path.join(out, "torsions.csv"))["type"])


def test_hn_ha_couplings_only_where_there_is_an_amide_h_and_both_glycine_protons(adk_backbone):
    from MDAnalysis.analysis.dihedrals import Ramachandran

    cres = dihedra.ensemble_couplings(adk_backbone, "vuister-bax-1993")
    table = cres.couplings
    # proline has no amide H: no PRO row (Vuister & Bax 1993 couple HN and HA)
    assert not table["type"].str.startswith("PRO").any()
    assert any("PRO" in n and "amide H" in n for n in cres.notices)
    # glycine: a row per H-alpha and their sum; <J> of the second H-alpha is the relation at
    # phi + 60 (the first at phi - 60), averaged over MDAnalysis' own phi angles (reference library)
    u = mda.Universe(data.PSF, data.DCD)
    gly = u.select_atoms("resname GLY and resid 10")
    phi = Ramachandran(gly).run().results.angles[:, 0, 0]
    rel = dihedra.analysis.couplings.get_relation("vuister-bax-1993")
    rows = table[(table["torsion"] == "GLY10:phi")].set_index("coupled_atoms")
    assert len(rows) == 3
    first, second = (k for k in rows.index if "+" not in k)
    assert rows.loc[first, "j_hz"] == pytest.approx(np.mean(rel.evaluate(phi)), abs=0.05)
    assert rows.loc[second, "j_hz"] == pytest.approx(np.mean(rel.evaluate(phi + 120.0)), abs=0.05)
    both = [k for k in rows.index if "+" in k][0]
    assert rows.loc[both, "j_hz"] == pytest.approx(rows.loc[first, "j_hz"] + rows.loc[second, "j_hz"])
    # the first is the H-alpha where L-amino acids carry HA (CHARMM names it HA2)
    assert first == "HN,HA2"
    # a relation with no torsion it couples is an error
    with pytest.raises(DihedraError, match="H-C-C-H"):
        dihedra.ensemble_couplings(adk_backbone, "karplus-1959")


def test_experimental_couplings_choose_a_glycine_row_and_say_why_proline_is_left_out(adk_backbone, tmp_path):
    from MDAnalysis.analysis.dihedrals import Ramachandran

    from dihedra.analysis.couplings import get_relation, read_experimental

    # <J> of GLY7's HN,HA2 (theta = phi - 60) over MDAnalysis' own phi angles (reference library)
    u = mda.Universe(data.PSF, data.DCD)
    phi = Ramachandran(u.select_atoms("resname GLY and resid 7")).run().results.angles[:, 0, 0]
    ha2 = float(np.mean(get_relation("vuister-bax-1993").evaluate(phi)))
    path = tmp_path / "exp.csv"
    pd.DataFrame({"torsion": ["GLY7:phi", "GLY7:phi", "GLY7:phi", "GLY7:phi", "PRO9:phi", "PRO9:psi", "XYZ5:phi"],
                  "coupled_atoms": ["HN,HA2", "hn, ha1+ha2", "", "HN,HA1", "", "", ""],
                  "J_hz": [ha2, 12.0, 12.0, 30.0, 5.0, 5.0, 5.0], "J_err_hz": 0.5,
                  "remark": "x"}).to_csv(path, index=False)
    cres = dihedra.ensemble_couplings(adk_backbone, "vuister-bax-1993", experimental=read_experimental(str(path)))
    pts = cres.experiment
    # the row named by coupled_atoms is the one compared: HN,HA2 itself, not the sum of both H-alpha
    assert pts["j_hz"].iloc[0] == pytest.approx(ha2, abs=0.05)
    assert list(pts["coupled_atoms"].iloc[:3]) == ["HN,HA2", "HN,HA2+HA1", "HN,HA2+HA1"]
    assert abs(pts["z"].iloc[0]) < 1
    assert cres.experiment_summary[0]["outliers"] == ["GLY7:phi [HN,HA1]"]   # (30 Hz is far from any <J>)
    # without coupled_atoms the sum is compared, and a notice says so and how to choose another row
    assert any("GLY7:phi" in n and "coupled_atoms" in n and "HN,HA1" in n for n in cres.notices)
    # a column that is not read is named
    assert any("remark" in n and "not read" in n for n in cres.notices)
    # proline's phi is in the folder, but 3J(HN,HA) needs an amide H: said so, unlike a label that is not there
    why = dict(zip(pts["label"], pts["matched_as"]))
    assert "in the folder" in why["PRO9:phi"] and "amide H" in why["PRO9:phi"]
    assert "in the folder" in why["PRO9:psi"] and "H-N-CA-HA" in why["PRO9:psi"]
    assert why["XYZ5:phi"] == "no matching torsion, type or residue"
    # a coupled_atoms that is not a row of that torsion is an error naming the rows there are
    pd.DataFrame({"torsion": ["GLY7:phi"], "coupled_atoms": ["HN,HA3"], "J_hz": [5.0],
                  "J_err_hz": [0.5]}).to_csv(path, index=False)
    with pytest.raises(DihedraError, match="HN,HA2 / HN,HA1 / HN,HA2\\+HA1"):
        dihedra.ensemble_couplings(adk_backbone, "vuister-bax-1993", experimental=read_experimental(str(path)))


def test_kinetics_say_when_their_numbers_are_weak(tmp_path, capsys):
    out = str(tmp_path / "k")
    # the same trajectory twice is refused: copies are not independent replicas
    assert main(["track", data.PSF, data.DCD, data.DCD, "--torsions", "protein-backbone", "--out", out]) == 2
    assert "same SHA-256" in capsys.readouterr().err
    assert main(["track", data.PSF, data.DCD, "--torsions", "protein-backbone", "--keep-angles", "--out", out]) == 0
    res = dihedra.state_kinetics(dihedra.load_results(out), dt_ps=1.0, n_bootstrap=0)
    # 98 frames: lags above a tenth of the run are left out, with a notice
    assert res.parameters["lags_frames"] == [1, 2, 5]
    assert any("left out" in n for n in res.notices)
    lt = res.lifetimes
    # a state never left: its mean dwell is a lower bound, marked
    never_left = lt[(lt["n_segments"] == 0) & (lt["n_censored"] > 0)]
    assert len(never_left) and never_left["mean_restricted"].all()
    # counted and rate-implied populations that differ by more than a factor 1.5 are flagged
    pc, pr = lt["population_counted"], lt["population_from_rates"]
    ratio = np.maximum(pc, pr) / np.minimum(pc, pr)
    expect = (ratio > 1.5) & ((pc - pr).abs() > 0.05)
    assert (lt["population_mismatch"] == expect).all() and expect.any()
    assert main(["kinetics", out, "--dt-ps", "1", "--bootstrap", "0"]) == 0
    printed = capsys.readouterr().out
    assert ">=" in printed


def test_protein_backbone_reports_omega_as_cis_or_trans(adk_backbone):
    # the default scheme of protein torsions: omega cis/trans, phi and psi anti/gauche
    assert adk_backbone.scheme.name == "protein"
    pops = adk_backbone.populations
    omega = pops[pops["type"].str.endswith(":omega")]
    assert set(omega["state"]) == {"trans", "cis"}
    assert set(pops[pops["type"] == "ALA:phi"]["state"]) == {"anti", "gauche+", "gauche-"}
    # the PHE86-PRO87 peptide bond of adenylate kinase turns cis in part of this trajectory; the
    # fraction equals that of MDAnalysis' own angles with |omega| < 90 (reference library)
    from MDAnalysis.lib.distances import calc_dihedrals

    u = mda.Universe(data.PSF, data.DCD)
    atoms = [u.select_atoms(f"resid {r} and name {n}")[0].index for r, n in ((86, "CA"), (86, "C"), (87, "N"), (87, "CA"))]
    w = np.array([np.degrees(calc_dihedrals(*(ts.positions[[i]] for i in atoms)))[0] for ts in u.trajectory])
    cis = omega[(omega["torsion"] == "PHE86:omega") & (omega["state"] == "cis")]["population"].iloc[0]
    assert cis == pytest.approx(np.mean(np.abs(w) < 90)) and cis > 0.1
    by_type = adk_backbone.populations_by_type
    assert set(by_type[by_type["type"] == "PHE:omega"]["state"]) == {"trans", "cis"}


def test_ramachandran_regions_from_mdanalysis_angles(tmp_path):
    from MDAnalysis.analysis.dihedrals import Ramachandran

    out = str(tmp_path / "rama")
    assert main(["track", data.PSF, data.DCD, "--torsions", "protein-backbone", "--keep-angles", "--out", out]) == 0
    res = dihedra.ramachandran_regions(dihedra.load_results(out))
    # independent reference: MDAnalysis' own phi/psi, classified with the published rectangles
    # (Beauchamp et al., J. Chem. Theory Comput. 8 (2012) 1409, from memory) written out here
    u = mda.Universe(data.PSF, data.DCD)
    sel = u.select_atoms("resid 20-30")
    rama = Ramachandran(sel).run()
    phi, psi = rama.results.angles[:, :, 0], rama.results.angles[:, :, 1]
    wrap_psi = np.where(psi < -120, psi + 360, psi)
    expect = {"alpha-R": (phi > -160) & (phi < -20) & (psi > -120) & (psi < 50),
              "beta": (phi > -180) & (phi < -90) & (wrap_psi > 50) & (wrap_psi < 240),
              "PPII": (phi > -90) & (phi < -20) & (wrap_psi > 50) & (wrap_psi < 240),
              "alpha-L": (phi > 0) & (phi < 180) & (psi > -100) & (psi < 100)}
    table = res.regions.set_index(["residue", "region"])
    for k, r in enumerate(rama.ag3.residues):   # the residues MDAnalysis could compute (their CA)
        name = f"{r.resname}{r.resid}"
        for region, mask in expect.items():
            assert table.loc[(name, region), "population"] == pytest.approx(mask[:, k].mean()), (name, region)
    by_type = res.regions_by_type
    assert {"i_squared", "heterogeneous", "n_residues"} <= set(by_type.columns)
    assert np.allclose(by_type.groupby("type")["population"].sum(), 1.0)
    # without angles: a clear error
    no_angles = str(tmp_path / "noangles")
    assert main(["track", data.PSF, data.DCD, "--torsions", "protein-backbone", "--stop", "5", "--out", no_angles]) == 0
    with pytest.raises(DihedraError, match="--keep-angles"):
        dihedra.ramachandran_regions(dihedra.load_results(no_angles))


def test_kinetics_with_the_defaults_of_track_needs_no_angles(tmp_path):
    # 'dihedra track' with its defaults, then 'dihedra kinetics' with its defaults: core sets of the
    # protein schemes (omega cis/trans, phi and psi anti/gauche) from the state codes and the core
    # bits of the pass give the tables that the angles give (core_codes of each type's scheme is
    # the reference of both)
    plain, angles = str(tmp_path / "plain"), str(tmp_path / "angles")
    assert main(["track", data.PSF, data.DCD, "--torsions", "protein-backbone", "--stop", "40", "--out", plain]) == 0
    assert main(["track", data.PSF, data.DCD, "--torsions", "protein-backbone", "--stop", "40", "--keep-angles",
                 "--out", angles]) == 0
    assert not os.path.exists(os.path.join(plain, "angles.parquet"))
    assert main(["kinetics", plain]) == 0
    a = dihedra.state_kinetics(dihedra.load_results(plain), n_bootstrap=10)
    b = dihedra.state_kinetics(dihedra.load_results(angles), n_bootstrap=10)
    for name in ("transitions", "lifetimes", "timescales"):
        pd.testing.assert_frame_equal(getattr(a, name), getattr(b, name))
    assert (a.transitions["count"] > 0).any()
