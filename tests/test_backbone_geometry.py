"""Protein backbone torsions of ideal secondary structures built from internal coordinates."""

import numpy as np
import pytest

from conftest import place_fourth, write_system
from dihedra.tracking import track

# Handbook values: Belitz, Grosch & Schieberle, Food Chemistry, 4th ed. (Springer, 2009),
# Table 1.21; phi/psi in degrees (IUPAC-IUB sign: IUPAC-IUB Commission on Biochemical
# Nomenclature, J. Mol. Biol. 52 (1970) 1)
HANDBOOK = {
    "alpha-helix": (-57.0, -47.0),
    "parallel-beta": (-119.0, 113.0),
    "antiparallel-beta": (-139.0, 135.0),
    "polyproline-II": (-78.0, 149.0),
}
# backbone geometry (Engh & Huber 1991 averages, from memory; any reasonable values serve here)
BOND = {"N-CA": 1.458, "CA-C": 1.525, "C-N": 1.329}
ANGLE = {"N-CA-C": 111.2, "CA-C-N": 116.2, "C-N-CA": 121.7}


def build_backbone(phi, psi, n_res=12, omega=180.0):
    """N, CA, C of a peptide with the given phi/psi (natural extension reference frame)."""
    xyz = [np.array([0.0, 0.0, 0.0]), np.array([BOND["N-CA"], 0, 0])]
    a = np.radians(ANGLE["N-CA-C"])
    xyz.append(xyz[1] + BOND["CA-C"] * np.array([-np.cos(a), np.sin(a), 0.0]))
    for i in range(1, n_res):
        # N(i) from psi(i-1), CA(i) from omega(i-1), C(i) from phi(i)
        for bond, angle, tors in ((BOND["C-N"], ANGLE["CA-C-N"], psi), (BOND["N-CA"], ANGLE["C-N-CA"], omega),
                                  (BOND["CA-C"], ANGLE["N-CA-C"], phi)):
            a_, b_, c_ = (p[None, :].copy() for p in xyz[-3:])
            xyz.append(place_fourth(a_, b_, c_, bond, angle, np.array([tors]))[0])
    return np.array(xyz)


@pytest.mark.parametrize("structure", sorted(HANDBOOK))
def test_backbone_phi_psi_of_ideal_structures(structure, tmp_path):
    phi, psi = HANDBOOK[structure]
    xyz = build_backbone(phi, psi)[None]  # one frame
    top, traj = write_system(str(tmp_path), np.repeat(xyz, 3, axis=0), names=("N", "CA", "C"),
                             resname="ALA", box=None, fmt="dcd",
                             extra_bonds=[(3 * r + 2, 3 * r + 3) for r in range(11)])  # C(i)-N(i+1)
    res = track(top, [traj], torsions="protein-backbone", scheme="klyne-prelog", keep_angles=True)
    angles = res.angles().iloc[0]
    table = res.torsions.set_index("torsion")
    got_phi = [angles[t] for t in table.index if table.loc[t, "name"] == "phi"]
    got_psi = [angles[t] for t in table.index if table.loc[t, "name"] == "psi"]
    got_omega = [angles[t] for t in table.index if table.loc[t, "name"] == "omega"]
    assert len(got_phi) == 11 and len(got_psi) == 11 and len(got_omega) == 11
    # DCD stores float32 coordinates: agreement to about 1e-3 degree
    assert np.allclose(got_phi, phi, atol=0.01)
    assert np.allclose(got_psi, psi, atol=0.01)
    assert np.allclose(np.abs(got_omega), 180.0, atol=0.01)
