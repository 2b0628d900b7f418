"""Torsion angles: IUPAC sign, range, minimum image, agreement with RDKit and plain numpy."""

import numpy as np
import pytest

from dihedra.numerics.angles import torsion_angles_deg

mda = pytest.importorskip("MDAnalysis")


def numpy_dihedral_deg(p0, p1, p2, p3):
    """Independent reference: the atan2 form of the dihedral from the projections of the outer
    bonds on the plane normal to the central bond (common practice), IUPAC sign."""
    b0, b1, b2 = p0 - p1, p2 - p1, p3 - p2
    b1 = b1 / np.linalg.norm(b1, axis=-1, keepdims=True)
    v = b0 - np.sum(b0 * b1, axis=-1, keepdims=True) * b1
    w = b2 - np.sum(b2 * b1, axis=-1, keepdims=True) * b1
    x = np.sum(v * w, axis=-1)
    y = np.sum(np.cross(b1, v) * w, axis=-1)
    return np.degrees(np.arctan2(y, x))


def test_iupac_sign_of_a_constructed_plus_60_torsion():
    # IUPAC sign convention (Moss, Pure Appl. Chem. 68 (1996) 2193; Klyne & Prelog, Experientia 16
    # (1960) 521): positive when A-B turns clockwise onto C-D seen along B->C.
    # A on +x, B at the origin, C on +z; D rotated counter-clockwise by 60 deg seen from +z, i.e.
    # clockwise seen along B->C (looking towards +z).
    xyz = np.array([[1, 0, 0], [0, 0, 0], [0, 0, 1], [np.cos(np.pi / 3), np.sin(np.pi / 3), 1]])
    assert torsion_angles_deg(xyz, np.array([[0, 1, 2, 3]]))[0] == pytest.approx(60.0, abs=1e-4)
    assert numpy_dihedral_deg(*xyz) == pytest.approx(60.0, abs=1e-9)


def test_trans_is_plus_180_never_minus_180():
    xyz = np.array([[1, 0, 0], [0, 0, 0], [0, 0, 1], [-1, 0, 1]], dtype=float)
    assert torsion_angles_deg(xyz, np.array([[0, 1, 2, 3]]))[0] == 180.0


def test_agrees_with_rdkit_on_the_mdanalysis_test_protein():
    # reference library: RDKit rdMolTransforms.GetDihedralDeg on MDAnalysisTests PSF/DCD (adk)
    Chem = pytest.importorskip("rdkit.Chem")
    from rdkit.Chem import rdMolTransforms
    from rdkit.Geometry import Point3D
    from MDAnalysisTests.datafiles import DCD, PSF

    from dihedra.selection.specs import select_torsions

    u = mda.Universe(PSF, DCD)
    tset = select_torsions(u, "rotatable")
    idx = tset.indices
    mol = Chem.RWMol()
    for _ in range(u.atoms.n_atoms):
        mol.AddAtom(Chem.Atom(6))
    conf = Chem.Conformer(u.atoms.n_atoms)
    for frame in (0, 50, 97):
        u.trajectory[frame]
        for i, (x, y, z) in enumerate(u.atoms.positions.astype(float)):
            conf.SetAtomPosition(i, Point3D(x, y, z))
        ref = np.array([rdMolTransforms.GetDihedralDeg(conf, *map(int, q)) for q in idx])
        ours = torsion_angles_deg(u.atoms.positions, idx, None)
        diff = (ours - ref + 180.0) % 360.0 - 180.0
        assert np.max(np.abs(diff)) < 1e-2  # float32 coordinates


@pytest.mark.parametrize("box", [[30.0, 30.0, 30.0, 90.0, 90.0, 90.0],
                                 [30.0, 32.0, 35.0, 70.0, 80.0, 100.0]])
def test_split_molecule_gives_the_same_angle_as_a_whole_one(box):
    from MDAnalysis.lib.mdamath import triclinic_vectors
    rng = np.random.default_rng(3)
    vecs = triclinic_vectors(np.array(box, dtype=np.float32)).astype(float)
    steps = rng.normal(size=(200, 4, 3))
    steps *= 1.5 / np.linalg.norm(steps, axis=-1, keepdims=True)  # bonds of 1.5 angstrom
    whole = steps.cumsum(axis=1) + 14.0
    split = whole.copy()
    # move single atoms by whole box vectors, as a wrapped trajectory does
    shifts = rng.integers(-1, 2, size=(200, 4, 3))
    split += shifts @ vecs
    idx = np.arange(800).reshape(200, 4)
    a_whole = torsion_angles_deg(whole.reshape(-1, 3), idx, box)
    a_split = torsion_angles_deg(split.reshape(-1, 3), idx, box)
    ref = numpy_dihedral_deg(*[whole[:, k] for k in range(4)])
    def close(a, b):  # periodic difference; float32 coordinates inside MDAnalysis
        return np.abs((a - b + 180.0) % 360.0 - 180.0) < 0.05

    assert close(a_whole, ref).all()
    assert close(a_split, a_whole).all()
    # without the box the split molecules give different (wrong) angles
    assert not close(torsion_angles_deg(split.reshape(-1, 3), idx, None), a_whole).all()


def test_collinear_and_nan_coordinates_are_undefined():
    xyz = np.array([[0, 0, 0], [1, 0, 0], [2, 0, 0], [3, 1, 0],
                    [np.nan, 0, 0], [0, 0, 0], [0, 1, 0], [1, 1, 1]], dtype=float)
    out = torsion_angles_deg(xyz, np.array([[0, 1, 2, 3], [4, 5, 6, 7]]))
    assert np.isnan(out).all()


def test_range_is_open_at_minus_180():
    rng = np.random.default_rng(5)
    xyz = rng.normal(size=(4000, 3))
    out = torsion_angles_deg(xyz, np.arange(4000).reshape(-1, 4))
    assert (out > -180).all() and (out <= 180).all()
