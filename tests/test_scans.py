"""Static scans: CSV import with units, parameter forms, computed MMFF94 and GFN2-xTB scans."""

import os

import numpy as np
import pandas as pd
import pytest
from scipy import optimize

from dihedra.errors import DihedraError
from dihedra.analysis.scans import (cosine_series_kj_mol, molecule_from_topology, read_parameter_toml, read_scan,
                           read_scan_csv, ryckaert_bellemans_kj_mol, write_scan_csv)
from dihedra.units import CALORIE_J, HARTREE_KJ_PER_MOL

from synthetic_rotors import RB_BUTANE, rb_energy


def write(path, text):
    path.write_text(text)
    return str(path)


def table(path, header, angles, energies):
    return write(path, header + "\n" + "".join(f"{a},{e}\n" for a, e in zip(angles, energies)))


ANGLES = np.arange(-180.0, 180.0, 15.0)


def test_unit_constants():
    # 1 thermochemical calorie = 4.184 J (NIST SP 811); 1 hartree = 2625.4996 kJ/mol (CODATA 2018)
    assert CALORIE_J == 4.184
    assert abs(HARTREE_KJ_PER_MOL - 2625.4996) < 1e-4


def test_units_from_column_names_convert(tmp_path):
    # NIST SP 811 and CODATA 2018: kcal/mol x 4.184 = kJ/mol; hartree x 2625.4996 = kJ/mol
    e = rb_energy(ANGLES)
    kcal = read_scan_csv(table(tmp_path / "a.csv", "angle_deg,energy_kcal_mol", ANGLES, e / 4.184))
    assert np.allclose(kcal.energy_at(ANGLES), e - e.min(), atol=1e-9)
    eh = read_scan_csv(table(tmp_path / "b.csv", "phi (deg),E [hartree]", ANGLES, -158.0 + e / 2625.4996))
    assert np.allclose(eh.energy_at(ANGLES), e - e.min(), atol=2e-3)
    rad = read_scan_csv(table(tmp_path / "c.csv", "torsion_rad,energy_kj_mol", np.radians(ANGLES + 360), e))
    assert np.allclose(rad.angle_deg, np.sort(np.where(ANGLES == -180, 180, ANGLES)))
    assert rad.metadata["angle_unit"] == "rad" and kcal.metadata["energy_unit"] == "kcal/mol"


def test_units_are_mandatory(tmp_path):
    # common practice: units are mandatory unless the column names carry them
    path = table(tmp_path / "n.csv", "phi,E", ANGLES, rb_energy(ANGLES))
    with pytest.raises(DihedraError, match="angle unit is unknown.*--scan-angle-unit"):
        read_scan_csv(path)
    with pytest.raises(DihedraError, match="energy unit is unknown.*--scan-energy-unit"):
        read_scan_csv(path, angle_unit="deg")
    assert read_scan_csv(path, angle_unit="deg", energy_unit="kJ/mol").kind == "unspecified"
    named = table(tmp_path / "m.csv", "angle_deg,energy_kcal_mol", ANGLES, rb_energy(ANGLES))
    with pytest.raises(DihedraError, match="kcal/mol but kJ/mol was given"):
        read_scan_csv(named, energy_unit="kJ/mol")


def test_bad_files_get_clear_errors(tmp_path):
    # common practice: non-numeric cells, too few points, gaps over 60 degrees (with where)
    bad = write(tmp_path / "x.csv", "angle_deg,energy_kj_mol\n0,1\n30,abc\n60,2\n90,3\n120,4\n150,5\n180,0\n")
    with pytest.raises(DihedraError, match="row 2.*'abc' is not a number"):
        read_scan_csv(bad)
    few = table(tmp_path / "f.csv", "angle_deg,energy_kj_mol", [0, 60, 120, 180, -60], [1, 2, 3, 0, 2])
    with pytest.raises(DihedraError, match="5 distinct angle"):
        read_scan_csv(few)
    gap = table(tmp_path / "g.csv", "angle_deg,energy_kj_mol", [-180, -150, -120, -90, -60, 0, 30, 60, 90],
                np.arange(9.0))
    with pytest.raises(DihedraError, match="gap of 90 degrees.*between 90 and 180"):
        read_scan_csv(gap)
    with pytest.raises(DihedraError, match="does not exist"):
        read_scan_csv(str(tmp_path / "missing.csv"))


def test_duplicates_averaged_and_periodic_spline(tmp_path):
    # analytic: -180 and 180 are one angle (averaged); a periodic cubic spline through points every
    # 10 degrees reproduces a smooth cosine potential closely and is continuous through 180
    x = np.arange(-180.0, 181.0, 10.0)
    e = 6.0 * (1 + np.cos(np.radians(3 * x)))
    e[0] += 0.2  # -180 differs from 180 by 0.2: the two are averaged
    scan = read_scan_csv(table(tmp_path / "s.csv", "angle_deg,energy_kj_mol", x, e))
    assert len(scan.angle_deg) == 36
    assert abs(scan.energy_at(180.0) - 0.1) < 1e-9
    fine = np.linspace(-179, 179, 500)
    assert np.max(np.abs(scan.energy_at(fine) - 6.0 * (1 + np.cos(np.radians(3 * fine))))) < 0.15
    assert abs(scan.energy_at(179.999) - scan.energy_at(-179.999)) < 1e-3


def test_rb_parameters(tmp_path):
    # Ryckaert & Bellemans, Faraday Discuss. Chem. Soc. 66 (1978) 95 (values derived from C0..C5):
    # V(180) = 0, V(0) = 44.80 kJ/mol, gauche
    # minimum near +-60 at 2.93 kJ/mol (recomputed with scipy.optimize)
    path = write(tmp_path / "rb.toml", 'form = "ryckaert-bellemans"\nenergy_unit = "kJ/mol"\n'
                                       f"coefficients = {list(RB_BUTANE)}\n")
    scan = read_parameter_toml(path)
    assert scan.kind == "parameters"
    assert abs(scan.energy_at(180.0)) < 1e-9 and abs(scan.energy_at(0.0) - 44.80) < 1e-9
    g = optimize.minimize_scalar(lambda x: float(scan.energy_at(x)), bounds=(30, 90), method="bounded")
    assert abs(g.x - 60) < 5 and abs(g.fun - 2.93) < 0.01
    kcal = write(tmp_path / "rbk.toml", 'form = "ryckaert-bellemans"\nenergy_unit = "kcal/mol"\n'
                                        f"coefficients = {[c / 4.184 for c in RB_BUTANE]}\n")
    assert abs(read_scan(kcal).energy_at(0.0) - 44.80) < 1e-9


def test_extrema_of_parameter_scans_are_refined_on_the_function(tmp_path):
    # analytic: the extrema of the Ryckaert-Bellemans butane torsion (Ryckaert & Bellemans, Faraday
    # Discuss. Chem. Soc. 66 (1978) 95) and of the TraPPE-UA alkane torsion (Martin & Siepmann,
    # J. Phys. Chem. B 102 (1998) 2569; c1, c2, c3 = 355.03, -68.19, 791.32 K, from memory), found
    # by scipy.optimize on the formulas themselves: the scan's features lie within 0.01 degrees of
    # them (a 0.5-degree grid alone puts them up to 0.25 degrees off), their energies within 1e-6
    from dihedra.analysis.scans import scan_features
    from dihedra.units import R_KJ_PER_MOL_K

    c1, c2, c3 = (c * R_KJ_PER_MOL_K for c in (355.03, -68.19, 791.32))

    def trappe(phi):
        p = np.radians(phi)
        return c1 * (1 + np.cos(p)) + c2 * (1 - np.cos(2 * p)) + c3 * (1 + np.cos(3 * p))

    files = {
        "rb": ('form = "ryckaert-bellemans"\nenergy_unit = "kJ/mol"\n' f"coefficients = {list(RB_BUTANE)}\n",
               rb_energy),
        "trappe": ('form = "cosine-series"\nenergy_unit = "kJ/mol"\n'
                   f"[[term]]\nk = {c1}\nn = 1\nphase_deg = 0\n[[term]]\nk = {c2}\nn = 2\nphase_deg = 180\n"
                   f"[[term]]\nk = {c3}\nn = 3\nphase_deg = 0\n", trappe)}
    for name, (text, energy) in files.items():
        minima, barriers = scan_features(read_scan(write(tmp_path / f"{name}.toml", text)), 2.479)

        def exact(kind, near):
            sign = 1.0 if kind == "min" else -1.0
            best = optimize.minimize_scalar(lambda x: sign * energy(x), bounds=(near - 10, near + 10),
                                            method="bounded", options={"xatol": 1e-9})
            return best.x, energy(best.x) - energy(180.0)

        gauche, top = exact("min", 60.0), exact("max", 120.0)
        expected_minima = [(-gauche[0], gauche[1]), (gauche[0], gauche[1]), (180.0, 0.0)]
        expected_barriers = [(0.0, energy(0.0) - energy(180.0)), (top[0], top[1]), (-top[0], top[1])]
        assert len(minima) == 3 and len(barriers) == 3, name
        for got, (angle, value) in zip(minima + barriers, expected_minima + expected_barriers):
            assert abs(got["angle_deg"] - angle) < 0.01, (name, got, angle)
            assert abs(got["energy_kj_mol"] - value) < 1e-6, (name, got, value)
        assert minima[2]["angle_deg"] == 180.0          # on (-180, 180]
        assert barriers[1]["between_deg"] == [minima[1]["angle_deg"], minima[2]["angle_deg"]]


def test_cosine_series_equals_rb_by_the_published_conversion(tmp_path):
    # analytic (trigonometric identities): the Fourier form
    # V = 1/2[F1(1+cos) + F2(1-cos 2phi) + F3(1+cos 3phi) + F4(1-cos 4phi)]
    # converts to RB with C0 = F2 + (F1+F3)/2, C1 = (-F1+3F3)/2, C2 = -F2+4F4, C3 = -2F3, C4 = -4F4
    f1, f2, f3, f4 = 5.9, -1.1, 13.2, 0.7
    toml = ('form = "cosine-series"\nenergy_unit = "kJ/mol"\n'
            f"[[term]]\nk = {f1 / 2}\nn = 1\nphase_deg = 0\n"
            f"[[term]]\nk = {f2 / 2}\nn = 2\nphase_deg = 180\n"
            f"[[term]]\nk = {f3 / 2}\nn = 3\nphase_deg = 0\n"
            f"[[term]]\nk = {f4 / 2}\nn = 4\nphase_rad = {np.pi}\n")
    series = read_scan(write(tmp_path / "c.toml", toml))
    rb = (f2 + (f1 + f3) / 2, (-f1 + 3 * f3) / 2, -f2 + 4 * f4, -2 * f3, -4 * f4, 0.0)
    x = np.linspace(-180, 180, 73)
    expected = ryckaert_bellemans_kj_mol(x, rb)
    assert np.allclose(series.energy_at(x), expected - expected.min(), atol=1e-9)
    assert np.allclose(cosine_series_kj_mol(x, [(1.0, 3, 0.0)]), 1 + np.cos(np.radians(3 * x)))


def test_parameter_file_errors(tmp_path):
    # common practice: units checked, malformed terms refused with the reason
    with pytest.raises(DihedraError, match="energy_unit is missing"):
        read_scan(write(tmp_path / "a.toml", 'form = "cosine-series"\n[[term]]\nk = 1\nn = 3\n'))
    with pytest.raises(DihedraError, match="unknown energy unit"):
        read_scan(write(tmp_path / "b.toml", 'form = "cosine-series"\nenergy_unit = "kJ"\n[[term]]\nk = 1\nn = 3\n'))
    with pytest.raises(DihedraError, match="positive integer"):
        read_scan(write(tmp_path / "c.toml",
                        'form = "cosine-series"\nenergy_unit = "kJ/mol"\n[[term]]\nk = 1\nn = 1.5\n'))
    with pytest.raises(DihedraError, match="form must be one of"):
        read_scan(write(tmp_path / "d.toml", 'form = "fourier"\nenergy_unit = "kJ/mol"\n'))


@pytest.fixture(scope="module")
def butane_pdb(tmp_path_factory):
    from rdkit import Chem
    from rdkit.Chem import AllChem
    mol = Chem.AddHs(Chem.MolFromSmiles("CCCC"))
    AllChem.EmbedMolecule(mol, randomSeed=42)
    path = str(tmp_path_factory.mktemp("mmff") / "butane.pdb")
    Chem.MolToPDBFile(mol, path)
    return mol, path


def test_mmff94_butane_scan(butane_pdb, tmp_path):
    # from memory (loose bound; the gas-phase gauche-anti enthalpy of butane is about 2.6-4.0 kJ/mol):
    # MMFF94 (Halgren, J. Comput. Chem. 17 (1996) 490) butane has its minima at anti and near +-65 degrees,
    # gauche a few kJ/mol above anti
    from dihedra.analysis.scans import mmff94_scan, scan_features
    mol, path = butane_pdb
    seen = []
    scan = mmff94_scan(mol, (0, 1, 2, 3), step_deg=10, progress=lambda *a: seen.append(a))
    assert len(scan.angle_deg) == 36 and len(seen) == 3 * 36
    minima, _ = scan_features(scan, 2.479)
    angles = sorted((m["angle_deg"] for m in minima), key=abs)
    assert len(minima) == 3
    assert 55 <= abs(angles[0]) <= 75 and 55 <= abs(angles[1]) <= 75 and angles[0] * angles[1] < 0
    assert abs(abs(angles[2]) - 180) < 5
    gauche = [m["energy_kj_mol"] for m in minima if abs(m["angle_deg"]) < 120]
    assert all(1.0 < g < 6.0 for g in gauche)
    # the same molecule built from a topology (elements, hydrogens, first frame) gives the same scan
    from_top, local = molecule_from_topology(path, "0,1,2,3")
    again = mmff94_scan(from_top, local, step_deg=30)
    assert np.allclose(again.energy_kj_mol, scan.energy_at(again.angle_deg), atol=0.05)
    out = write_scan_csv(scan, str(tmp_path / "mmff.csv"))
    back = read_scan_csv(out)
    assert back.kind == "relaxed" and "MMFF94" in back.metadata["method"]
    assert np.allclose(back.energy_kj_mol, scan.energy_kj_mol, atol=1e-5)


def test_united_atom_topology_refused(tmp_path):
    # common practice: force-field scans need every hydrogen; a united-atom model is refused clearly
    from synthetic_rotors import write_rotor_trajectory
    pdb, _ = write_rotor_trajectory(str(tmp_path), "ua", np.full((1, 1), 180.0))
    with pytest.raises(DihedraError, match="no hydrogens"):
        molecule_from_topology(pdb, "0,1,2,3")
    with pytest.raises(DihedraError, match="four different"):
        molecule_from_topology(pdb, "0,1,2")


@pytest.mark.slow
def test_gfn2_xtb_ethane_scan():
    # common practice: ethane is staggered at +-60 and 180 (H-C-C-H) with an
    # eclipsed barrier of about 12 kJ/mol (GFN2-xTB, Bannwarth, Ehlert & Grimme, J. Chem. Theory Comput. 15
    # (2019) 1652, is known to land somewhat lower; loose bound)
    from rdkit import Chem
    from rdkit.Chem import AllChem
    from dihedra.analysis.scans import scan_features, xtb_scan
    mol = Chem.AddHs(Chem.MolFromSmiles("CC"))
    AllChem.EmbedMolecule(mol, randomSeed=1)
    h_on_0 = [n.GetIdx() for n in mol.GetAtomWithIdx(0).GetNeighbors() if n.GetSymbol() == "H"][0]
    h_on_1 = [n.GetIdx() for n in mol.GetAtomWithIdx(1).GetNeighbors() if n.GetSymbol() == "H"][0]
    scan = xtb_scan(mol, (h_on_0, 0, 1, h_on_1), step_deg=30)
    assert scan.kind == "relaxed" and "GFN2-xTB" in scan.metadata["method"]
    minima, barriers = scan_features(scan, 2.479)
    assert len(minima) == 3
    for m in minima:
        assert min(abs((m["angle_deg"] - c + 180) % 360 - 180) for c in (60, 180, -60)) < 8
    for b in barriers:
        assert 8.0 < b["energy_kj_mol"] < 16.0


@pytest.mark.slow
def test_gfn2_xtb_butane_scan_is_relaxed_to_its_mirror_symmetry(butane_pdb):
    # analytic: butane is its own mirror image, and the mirror image of a relaxed geometry at phi is
    # one at -phi with the same energy, so an exact relaxed scan has E(phi) = E(-phi). A gradient
    # tolerance of 1e-3 hartree/bohr left 0.48 kJ/mol between +30 and -30 degrees.
    from dihedra.analysis.scans import xtb_scan
    from dihedra.analysis.scans.computed import XTB_GRADIENT_TOLERANCE, mirror_asymmetry

    mol, local = molecule_from_topology(butane_pdb[1], "0,1,2,3")
    scan = xtb_scan(mol, local, step_deg=30)
    energy = dict(zip(np.round(scan.angle_deg, 6), scan.energy_kj_mol))
    for phi in (30.0, 60.0, 90.0, 120.0, 150.0):
        assert energy[phi] == pytest.approx(energy[-phi], abs=0.05)
    meta = scan.metadata
    assert meta["gradient_tolerance_hartree_bohr"] == XTB_GRADIENT_TOLERANCE
    assert f"{XTB_GRADIENT_TOLERANCE:g} hartree/bohr" in meta["method"]
    assert meta["largest_remaining_gradient_hartree_bohr"] <= XTB_GRADIENT_TOLERANCE
    assert max(meta["largest_gradient_hartree_bohr"].values()) <= XTB_GRADIENT_TOLERANCE
    assert meta["above_tolerance_angles_deg"] == []
    assert meta["mirror_asymmetry_kj_mol"] == pytest.approx(mirror_asymmetry(scan.angle_deg, scan.energy_kj_mol)[0],
                                                            abs=1e-4)
    assert meta["mirror_asymmetry_kj_mol"] < 0.05


def test_a_molecule_is_told_from_its_mirror_image():
    # the definition of chirality (common practice): an achiral molecule (butane, meso-2,3-butanediol
    # (2R,3S)) is its own mirror image; (R)-2-butanol and (2R,3R)-2,3-butanediol are not. Only the
    # first kind has E(phi) = E(-phi) in a relaxed scan.
    from rdkit import Chem
    from rdkit.Chem import AllChem
    from dihedra.analysis.scans.computed import is_own_mirror_image, mirror_asymmetry

    expected = {"CCCC": True, "C[C@@H](O)[C@@H](O)C": True, "C[C@H](O)CC": False, "C[C@@H](O)[C@H](O)C": False}
    for smiles, own in expected.items():
        mol = Chem.AddHs(Chem.MolFromSmiles(smiles))
        AllChem.EmbedMolecule(mol, randomSeed=3)
        assert is_own_mirror_image(mol) is own, smiles
    angles = np.array([-120.0, -60.0, 0.0, 60.0, 120.0, 180.0])
    assert mirror_asymmetry(angles, [1.0, 2.0, 5.0, 2.5, 1.2, 0.0]) == pytest.approx((0.5, 60.0))


def test_gfn2_xtb_refuses_a_charge_the_electrons_cannot_have():
    # propanoate (C3H5O2-) has 40 electrons; given as neutral, its 39 electrons cannot all pair up
    # (0 unpaired): a wavefunction of no real state, refused before any energy is computed
    from rdkit import Chem
    from rdkit.Chem import AllChem
    from dihedra.analysis.scans import xtb_scan

    mol = Chem.AddHs(Chem.MolFromSmiles("CCC(=O)[O-]"))
    AllChem.EmbedMolecule(mol, randomSeed=1)
    with pytest.raises(DihedraError, match="39 electrons at charge \\+0, which cannot leave 0 unpaired.*sum to -1"):
        xtb_scan(mol, (0, 1, 2, 3), step_deg=60)
    with pytest.raises(DihedraError, match="40 electrons at charge -1, which cannot leave 1 unpaired"):
        xtb_scan(mol, (0, 1, 2, 3), step_deg=60, charge=-1, unpaired=1)


def test_scan_command(butane_pdb, tmp_path, capsys):
    # common practice: 'dihedra scan' writes a reusable CSV that 'compare' reads
    from dihedra.cli import main
    _, path = butane_pdb
    out = str(tmp_path / "scan.csv")
    assert main(["scan", path, "--torsion", "0,1,2,3", "--method", "mmff94", "--step", "30", "--out", out]) == 0
    assert os.path.exists(out) and read_scan_csv(out).kind == "relaxed"
    assert main(["scan", path, "--torsion", "0,1,2,3", "--method", "mmff94", "--out", out]) == 2
    assert "already exists" in capsys.readouterr().err
    # a step that does not divide 360 is refused before anything is announced or computed
    assert main(["scan", path, "--torsion", "0,1,2,3", "--method", "mmff94", "--step", "7", "--out",
                 str(tmp_path / "seven.csv")]) == 2
    printed = capsys.readouterr()
    assert "must divide 360" in printed.err and "relaxed scan" not in printed.err + printed.out


def test_a_written_scan_reads_back_with_plain_pandas_and_keeps_its_metadata_beside_it(tmp_path):
    from dihedra.analysis.scans import scan_from_points
    from dihedra.analysis.scans.files import sidecar_path
    from dihedra.errors import OutputExistsError

    x = np.arange(-170.0, 181.0, 10.0)
    scan = scan_from_points(x, 2.0 * (1 + np.cos(np.radians(3 * x))), kind="relaxed", source="made here",
                            metadata={"method": "cosine (made up)"})
    out = write_scan_csv(scan, str(tmp_path / "scan.csv"), extra={"torsion_atoms": "0,1,2,3"})
    table = pd.read_csv(out)   # a plain CSV: no comment lines to skip
    assert list(table.columns) == ["angle_deg", "energy_kj_mol"] and len(table) == len(scan.angle_deg)
    assert sidecar_path(out) == str(tmp_path / "scan.json")
    back = read_scan_csv(out)
    assert back.kind == "relaxed" and back.metadata["method"] == "cosine (made up)"
    assert back.metadata["torsion_atoms"] == "0,1,2,3"
    assert np.allclose(back.energy_kj_mol, scan.energy_kj_mol, atol=1e-6)
    # a second write replaces only with overwrite; a JSON of the user's beside a new scan is refused
    with pytest.raises(OutputExistsError, match="--overwrite"):
        write_scan_csv(scan, out)
    write_scan_csv(scan, out, overwrite=True)
    (tmp_path / "other.json").write_text('{"mine": true}')
    with pytest.raises(OutputExistsError):
        write_scan_csv(scan, str(tmp_path / "other.csv"))
    assert not (tmp_path / "other.csv").exists()


def test_a_scan_file_a_user_brings_may_carry_comment_lines(tmp_path):
    path = tmp_path / "user.csv"
    path.write_text("# kind: rigid\n# method: B3LYP/6-31G*\nphi_deg,E_kcal_mol\n0,3.0\n60,0.8\n120,3.1\n180,0.0\n"
                    "-120,3.1\n-60,0.8\n")
    scan = read_scan_csv(str(path))
    assert scan.kind == "rigid" and scan.metadata["method"] == "B3LYP/6-31G*"
    assert scan.energy_at([180.0])[0] == pytest.approx(0.0)
    assert scan.energy_at([0.0])[0] == pytest.approx(3.0 * 4.184)   # kcal -> kJ (thermochemical calorie)
