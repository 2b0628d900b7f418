"""Tests of dihedra.selection.biopolymer: protein and nucleic-acid torsions by the IUPAC-IUB definitions.

References used (named beside each check):

* MDAnalysis's own residue selections ``phi_selection``, ``psi_selection``, ``omega_selection`` and
  ``chi1_selection`` (MDAnalysis.core.topologyattrs), the chi2 atoms of
  ``MDAnalysis.analysis.dihedrals.Janin`` and the nucleic torsions of
  ``MDAnalysis.analysis.nuclinfo``, run on the MDAnalysisTests data files;
* the atom definitions of the IUPAC-IUB Commission on Biochemical Nomenclature, J. Mol. Biol. 52
  (1970) 1 (protein phi, psi, omega, chi) and of the IUPAC-IUB Joint Commission on Biochemical
  Nomenclature, Eur. J. Biochem. 131 (1983) 9 (nucleic-acid backbone and chi);
* handbook helix geometry (Belitz, Grosch & Schieberle, Food Chemistry, 4th ed., Springer 2009,
  Table 1.21);
* torsion angles recomputed with plain numpy and with RDKit's rdMolTransforms.GetDihedralDeg.
"""

import warnings

import numpy as np
import pytest

mda = pytest.importorskip("MDAnalysis")
data = pytest.importorskip("MDAnalysisTests.datafiles")

from MDAnalysis.lib.distances import calc_dihedrals  # noqa: E402

from dihedra.selection.biopolymer import (nucleic_backbone_torsions, protein_backbone_torsions,  # noqa: E402
                                          protein_sidechain_torsions)
from dihedra.selection.residue_names import classify_residue_name  # noqa: E402
from dihedra.selection.torsions import molecule_group  # noqa: E402

pytestmark = pytest.mark.filterwarnings("ignore")


# --------------------------------------------------------------------------------------------
# helpers
# --------------------------------------------------------------------------------------------

def load(*names):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return mda.Universe(*[getattr(data, n) for n in names])


def by_owner(universe, tset):
    """(residue index of atom B, angle name) -> atom indices; atom B lies in the owning residue."""
    out = {}
    for t in tset:
        key = (int(universe.atoms[t.indices[1]].resindex), t.name)
        assert key not in out, f"two torsions {t.name} for one residue: {t.label}"
        out[key] = tuple(t.indices)
    return out


def atom_names(universe, tset):
    return {t.label: tuple(universe.atoms[list(t.indices)].names) for t in tset}


def numpy_dihedral_deg(p0, p1, p2, p3):
    """Plain-numpy torsion angle (IUPAC sign), written here independently of dihedra."""
    b0, b1, b2 = p0 - p1, p2 - p1, p3 - p2
    b1 = b1 / np.linalg.norm(b1)
    v = b0 - np.dot(b0, b1) * b1
    w = b2 - np.dot(b2, b1) * b1
    return np.degrees(np.arctan2(np.dot(np.cross(b1, v), w), np.dot(v, w)))


def angles_deg(universe, tset):
    pos = universe.atoms.positions
    idx = tset.indices
    return np.degrees(calc_dihedrals(pos[idx[:, 0]], pos[idx[:, 1]], pos[idx[:, 2]],
                                     pos[idx[:, 3]], box=universe.dimensions))


def renamed(universe, residues=None, atoms=None):
    """A copy with residue names changed ({resindex: name}) and atom names ({index: name})."""
    u = universe.copy()
    if residues:
        names = u.residues.resnames.copy()
        for ix, name in residues.items():
            names[ix] = name
        u.residues.resnames = names
    if atoms:
        names = u.atoms.names.copy()
        for ix, name in atoms.items():
            names[ix] = name
        u.atoms.names = names
    return u


def same_torsions(u_a, set_a, u_b, set_b):
    """Both sets hold the same four-atom torsions with the same angle names."""
    assert [t.name for t in set_a] == [t.name for t in set_b]
    assert [tuple(t.indices) for t in set_a] == [tuple(t.indices) for t in set_b]


@pytest.fixture(scope="module")
def adk_charmm():
    return load("PSF", "DCD")  # CHARMM adenylate kinase, bonds from the PSF


@pytest.fixture(scope="module")
def adk_gromacs_gro():
    return load("GRO")  # OPLS-AA adenylate kinase in water, no bonds


@pytest.fixture(scope="module")
def adk_gromacs_tpr():
    return load("TPR")  # the same system with bonds and GROMOS names (LYSH, HISB, CYSH)


# --------------------------------------------------------------------------------------------
# MDAnalysis residue selections as the reference
# --------------------------------------------------------------------------------------------

SELECTION_FILES = [
    ("PSF", "DCD"),          # CHARMM PSF, bonds
    ("GRO",),                # GROMACS .gro, no bonds: links by distance
    ("TPR",),                # GROMACS .tpr, bonds, GROMOS residue names
    ("PRM", "TRJ"),          # AMBER prmtop, HIE
    ("PRM7",),               # AMBER parm7 with an NHE cap
    ("PDB_small",),          # CHARMM-named PDB with hydrogens
    ("PDB_CRYOEM_BOX",),     # PDB with hydrogens
    ("PDB_janin",),          # crystal PDB: heavy atoms, chain gaps, truncated side chains
]


@pytest.mark.parametrize("files", SELECTION_FILES, ids=lambda f: "+".join(f))
def test_backbone_and_chi1_match_mdanalysis_selections(files):
    # Source: MDAnalysis Residue.phi_selection / psi_selection / omega_selection /
    # chi1_selection. Our atoms must equal theirs wherever theirs are defined.
    u = load(*files)
    backbone = by_owner(u, protein_backbone_torsions(u))
    sidechain = by_owner(u, protein_sidechain_torsions(u))
    compared = 0
    for residue in u.select_atoms("protein").residues:
        for name, method, ours in (("phi", "phi_selection", backbone),
                                   ("psi", "psi_selection", backbone),
                                   ("omega", "omega_selection", backbone),
                                   ("chi1", "chi1_selection", sidechain)):
            reference = getattr(residue, method)()
            if reference is None:
                continue
            compared += 1
            assert ours.get((residue.ix, name)) == tuple(reference.indices), \
                f"{residue.resname}{residue.resid} {name}"
    assert compared > 20


def test_adk_backbone_set_equals_mdanalysis_exactly(adk_charmm):
    # Source: MDAnalysis phi/psi/omega selections on one unbroken chain: the same set, no more.
    u = adk_charmm
    ours = by_owner(u, protein_backbone_torsions(u))
    theirs = {}
    for residue in u.residues:
        for name in ("phi", "psi", "omega"):
            ag = getattr(residue, f"{name}_selection")()
            if ag is not None:
                theirs[(residue.ix, name)] = tuple(ag.indices)
    assert ours == theirs
    assert len(ours) == 3 * 214 - 3  # no phi for MET1, no psi/omega for GLY214


@pytest.mark.parametrize("files", [("PSF", "DCD"), ("TPR",), ("PRM", "TRJ"), ("PDB_CRYOEM_BOX",)],
                         ids=lambda f: "+".join(f))
def test_chi2_matches_mdanalysis_janin_atoms(files):
    # Source: MDAnalysis.analysis.dihedrals.Janin selects chi2 as CA-CB-(CG|CG1)-(CD|CD1|OD1|
    # ND1|SD) for all residues except ALA CYS GLY PRO SER THR VAL.
    from MDAnalysis.analysis.dihedrals import Janin

    u = load(*files)
    janin = Janin(u.select_atoms("protein"))
    quads = np.stack([janin.ag2.indices, janin.ag3.indices, janin.ag4.indices,
                      janin.ag5.indices], axis=1)
    ours = by_owner(u, protein_sidechain_torsions(u))
    assert len(quads) > 5
    for quad in quads:
        residue = u.atoms[quad[1]].residue
        assert ours[(residue.ix, "chi2")] == tuple(quad), f"{residue.resname}{residue.resid}"


# --------------------------------------------------------------------------------------------
# IUPAC-IUB atom definitions
# --------------------------------------------------------------------------------------------

# Source: IUPAC-IUB Commission on Biochemical Nomenclature, J. Mol. Biol. 52 (1970) 1 (chi1
# branch atoms X, chi2 atoms Y, chi3..5 following the chain); Pro chi2 = CA-CB-CG-CD is our
# documented addition.
IUPAC_SIDECHAINS = {
    "ARG": [("N", "CA", "CB", "CG"), ("CA", "CB", "CG", "CD"), ("CB", "CG", "CD", "NE"),
            ("CG", "CD", "NE", "CZ"), ("CD", "NE", "CZ", "NH1")],
    "ASN": [("N", "CA", "CB", "CG"), ("CA", "CB", "CG", "OD1")],
    "ASP": [("N", "CA", "CB", "CG"), ("CA", "CB", "CG", "OD1")],
    "CYS": [("N", "CA", "CB", "SG")],
    "GLN": [("N", "CA", "CB", "CG"), ("CA", "CB", "CG", "CD"), ("CB", "CG", "CD", "OE1")],
    "GLU": [("N", "CA", "CB", "CG"), ("CA", "CB", "CG", "CD"), ("CB", "CG", "CD", "OE1")],
    "HSD": [("N", "CA", "CB", "CG"), ("CA", "CB", "CG", "ND1")],
    "ILE": [("N", "CA", "CB", "CG1"), ("CA", "CB", "CG1", "CD")],  # CHARMM names CD1 "CD"
    "LEU": [("N", "CA", "CB", "CG"), ("CA", "CB", "CG", "CD1")],
    "LYS": [("N", "CA", "CB", "CG"), ("CA", "CB", "CG", "CD"), ("CB", "CG", "CD", "CE"),
            ("CG", "CD", "CE", "NZ")],
    "MET": [("N", "CA", "CB", "CG"), ("CA", "CB", "CG", "SD"), ("CB", "CG", "SD", "CE")],
    "PHE": [("N", "CA", "CB", "CG"), ("CA", "CB", "CG", "CD1")],
    "PRO": [("N", "CA", "CB", "CG"), ("CA", "CB", "CG", "CD")],
    "SER": [("N", "CA", "CB", "OG")],
    "THR": [("N", "CA", "CB", "OG1")],
    "TYR": [("N", "CA", "CB", "CG"), ("CA", "CB", "CG", "CD1")],
    "VAL": [("N", "CA", "CB", "CG1")],
    "ALA": [],
    "GLY": [],
}


def test_sidechain_atoms_follow_iupac(adk_charmm):
    # Source: IUPAC-IUB, J. Mol. Biol. 52 (1970) 1: Ser chi1 ends at OG, Thr at OG1, Val and Ile at
    # CG1, Cys at SG; Val, Thr, Ser, Cys have chi1 only; chi2..chi5 as listed above.
    u = adk_charmm
    tset = protein_sidechain_torsions(u)
    per_residue = {}
    for t in tset:
        per_residue.setdefault((t.resname, t.resid), []).append(
            (t.name, tuple(u.atoms[list(t.indices)].names)))
    seen = set()
    for residue in u.residues:
        expected = IUPAC_SIDECHAINS[residue.resname]
        got = per_residue.get((residue.resname, residue.resid), [])
        assert got == [(f"chi{n}", atoms) for n, atoms in enumerate(expected, start=1)], \
            f"{residue.resname}{residue.resid}"
        seen.add(residue.resname)
    for t in tset:  # all four atoms lie in the owning residue
        assert set(u.atoms[list(t.indices)].resindices) == {u.atoms[t.indices[1]].resindex}
    assert {"SER", "THR", "VAL", "ILE", "CYS", "ARG", "PRO", "HSD"} <= seen
    assert tset.notices == []


def test_isoleucine_delta_carbon_cd1_and_cd():
    # Source: IUPAC-IUB 1970 Ile chi2 = CA-CB-CG1-CD1; AMBER names the atom CD1 (CPPTRAJ test
    # topology), CHARMM and GROMACS name it CD (adk PSF).
    amber = load("CPPTRAJ_TRAJ_TOP")
    names = atom_names(amber, protein_sidechain_torsions(amber))
    assert names["ILE5:chi2"] == ("CA", "CB", "CG1", "CD1")
    charmm = load("PSF")
    names = atom_names(charmm, protein_sidechain_torsions(charmm))
    assert names["ILE3:chi2"] == ("CA", "CB", "CG1", "CD")


def test_backbone_atom_names_and_neighbours(adk_charmm):
    # Source: IUPAC-IUB 1970: phi = C(i-1)-N-CA-C, psi = N-CA-C-N(i+1),
    # omega = CA-C-N(i+1)-CA(i+1), owned by residue i.
    u = adk_charmm
    tset = protein_backbone_torsions(u)
    for t in tset:
        atoms = u.atoms[list(t.indices)]
        offsets = tuple(atoms.resids - t.resid)
        expected = {"phi": (("C", "N", "CA", "C"), (-1, 0, 0, 0)),
                    "psi": (("N", "CA", "C", "N"), (0, 0, 0, 1)),
                    "omega": (("CA", "C", "N", "CA"), (0, 0, 1, 1))}[t.name]
        assert (tuple(atoms.names), offsets) == expected, t.label


def test_nucleic_atom_definitions():
    # Source: IUPAC-IUB Joint Commission on Biochemical Nomenclature, Eur. J. Biochem. 131 (1983) 9.
    u = load("RNA_PSF", "RNA_PDB")
    tset = nucleic_backbone_torsions(u)
    expected = {
        "alpha": (("O3'", "P", "O5'", "C5'"), (-1, 0, 0, 0)),
        "beta": (("P", "O5'", "C5'", "C4'"), (0, 0, 0, 0)),
        "gamma": (("O5'", "C5'", "C4'", "C3'"), (0, 0, 0, 0)),
        "delta": (("C5'", "C4'", "C3'", "O3'"), (0, 0, 0, 0)),
        "epsilon": (("C4'", "C3'", "O3'", "P"), (0, 0, 0, 1)),
        "zeta": (("C3'", "O3'", "P", "O5'"), (0, 0, 1, 1)),
    }
    purine_chi = ("O4'", "C1'", "N9", "C4")
    pyrimidine_chi = ("O4'", "C1'", "N1", "C2")
    for t in tset:
        atoms = u.atoms[list(t.indices)]
        if t.name == "chi":
            want = purine_chi if t.resname in ("ADE", "GUA") else pyrimidine_chi
            assert tuple(atoms.names) == want, t.label
        else:
            assert (tuple(atoms.names), tuple(atoms.resids - t.resid)) == expected[t.name], t.label
    # 23 nucleotides in one chain: no alpha/beta at the 5' end (no P), no epsilon/zeta at the 3'
    assert len(tset) == 23 * 7 - 4
    assert tset.notices == []


# --------------------------------------------------------------------------------------------
# angle values
# --------------------------------------------------------------------------------------------

def test_backbone_angles_against_plain_numpy_and_rdkit():
    # Source: plain numpy torsion formula on atoms picked here by name; RDKit
    # rdMolTransforms.GetDihedralDeg on a molecule built from the same coordinates.
    u = load("PDB_helix")  # an ideal alpha helix, Ala6-Pro-Ala6
    tset = protein_backbone_torsions(u)
    values = dict(zip(tset.labels, angles_deg(u, tset)))
    pos = lambda sel: u.select_atoms(sel).positions[0]  # noqa: E731
    for resid in (3, 7, 10):
        phi = numpy_dihedral_deg(pos(f"resid {resid - 1} and name C"),
                                 pos(f"resid {resid} and name N"),
                                 pos(f"resid {resid} and name CA"),
                                 pos(f"resid {resid} and name C"))
        psi = numpy_dihedral_deg(pos(f"resid {resid} and name N"),
                                 pos(f"resid {resid} and name CA"),
                                 pos(f"resid {resid} and name C"),
                                 pos(f"resid {resid + 1} and name N"))
        resname = u.select_atoms(f"resid {resid}").residues[0].resname
        assert values[f"{resname}{resid}:phi"] == pytest.approx(phi, abs=1e-3)
        assert values[f"{resname}{resid}:psi"] == pytest.approx(psi, abs=1e-3)

    rdkit = pytest.importorskip("rdkit")
    from rdkit import Chem
    from rdkit.Chem import rdMolTransforms
    from rdkit.Geometry import Point3D

    del rdkit
    for t in tset.torsions[:6]:
        mol = Chem.RWMol()
        for atom in u.atoms[list(t.indices)]:
            mol.AddAtom(Chem.Atom(atom.name[0]))
        conf = Chem.Conformer(4)
        for k, xyz in enumerate(u.atoms[list(t.indices)].positions):
            conf.SetAtomPosition(k, Point3D(*map(float, xyz)))
        mol.AddConformer(conf)
        reference = rdMolTransforms.GetDihedralDeg(mol.GetConformer(), 0, 1, 2, 3)
        assert values[t.label] == pytest.approx(reference, abs=1e-3), t.label


def test_alpha_helix_angles_near_handbook_values():
    # Source: Belitz, Grosch & Schieberle, Food Chemistry (2009), Table 1.21: right-handed alpha
    # helix phi/psi = -57/-47. The model helix deviates by a few degrees, so
    # this checks the sign convention and the atom order, with a 10-degree tolerance.
    u = load("PDB_helix")
    tset = protein_backbone_torsions(u)
    values = dict(zip(tset.labels, angles_deg(u, tset)))
    interior = range(2, 13)
    phis = [v for k, v in values.items() if k.endswith(":phi") and int(k[3:-4]) in interior]
    psis = [v for k, v in values.items() if k.endswith(":psi") and int(k[3:-4]) in interior]
    assert np.mean(phis) == pytest.approx(-57, abs=10)
    assert np.mean(psis) == pytest.approx(-47, abs=10)
    omegas = [v for k, v in values.items() if k.endswith(":omega")]
    assert min(abs(o) for o in omegas) > 150  # trans peptides (IUPAC: extended = 180)


@pytest.mark.parametrize("files", [("RNA_PSF", "RNA_PDB"), ("PRM12", "TRJ12_bz2"), ("MMTF",)],
                         ids=["charmm-rna", "amber-dna", "pdb-dna"])
def test_nucleic_angles_match_nuclinfo(files):
    # Source: MDAnalysis.analysis.nuclinfo tors_alpha .. tors_zeta, tors_chi (degrees on
    # [0, 360)), selected there by segment, resid and atom name.
    from MDAnalysis.analysis import nuclinfo

    u = load(*files)
    tset = nucleic_backbone_torsions(u)
    reference = {"alpha": nuclinfo.tors_alpha, "beta": nuclinfo.tors_beta,
                 "gamma": nuclinfo.tors_gamma, "delta": nuclinfo.tors_delta,
                 "epsilon": nuclinfo.tors_eps, "zeta": nuclinfo.tors_zeta,
                 "chi": nuclinfo.tors_chi}
    assert len(tset) > 50
    for t, value in zip(tset, angles_deg(u, tset)):
        expected = reference[t.name](u, t.segid, t.resid)
        assert (value - expected + 180) % 360 - 180 == pytest.approx(0, abs=1e-3), t.label


# --------------------------------------------------------------------------------------------
# force-field name variants
# --------------------------------------------------------------------------------------------

def _first(u, resname):
    return u.select_atoms(f"resname {resname}").residues[0]


@pytest.mark.parametrize("his", ["HIS", "HSE", "HSP", "HID", "HIE", "HIP", "HISD", "HISE", "HISH",
                                 "HIS1", "HISB"])
def test_histidine_names(adk_charmm, his):
    # Source: residue naming of CHARMM (HSD/HSE/HSP), AMBER (HID/HIE/HIP), GROMACS (HISD/HISE/
    # HISH/HIS1) and GROMOS (HISB); the definitions are those of His.
    u = adk_charmm
    hsd = u.select_atoms("resname HSD").residues
    v = renamed(u, residues={r.ix: his for r in hsd})
    for func in (protein_backbone_torsions, protein_sidechain_torsions):
        base, variant = func(u), func(v)
        same_torsions(u, base, v, variant)
        assert variant.notices == []
    # one type per residue kind: the type is His's, the force field's name stays in the label and
    # in the variant; with keep_variants the type keeps it
    chi2 = [t for t in protein_sidechain_torsions(v) if t.name == "chi2" and t.resname == his]
    assert {t.type for t in chi2} == {"HIS:chi2"}
    assert {t.variant for t in chi2} == ({""} if his == "HIS" else {his})
    assert f"{his}:chi2" in {t.type for t in protein_sidechain_torsions(v, keep_variants=True)}
    label = f"{his}{hsd[0].resid}:chi2"
    assert atom_names(v, protein_sidechain_torsions(v))[label] == ("CA", "CB", "CG", "ND1")


def test_amber_and_gromacs_names_on_charmm_structure(adk_charmm):
    # Source: AMBER (CYX, LYN, ASH, GLH, NMET/CGLY terminal names, Ile CD1, OXT), GROMACS
    # (CYS2, LYSH, ASPH, GLUH, OC1/OC2) residue and atom names.
    u = adk_charmm
    first, last = u.residues[0], u.residues[-1]
    ile_cd = u.select_atoms("resname ILE and name CD")
    ot1, ot2 = (u.select_atoms(f"resid {last.resid} and name {n}")[0] for n in ("OT1", "OT2"))
    variants = {
        "amber": ({_first(u, "CYS").ix: "CYX", _first(u, "LYS").ix: "LYN",
                   _first(u, "ASP").ix: "ASH", _first(u, "GLU").ix: "GLH",
                   first.ix: "NMET", last.ix: "CGLY"},
                  {**{a.ix: "CD1" for a in ile_cd}, ot1.ix: "O", ot2.ix: "OXT"}),
        "gromacs": ({_first(u, "CYS").ix: "CYS2", _first(u, "LYS").ix: "LYSH",
                     _first(u, "ASP").ix: "ASPH", _first(u, "GLU").ix: "GLUH"},
                    {ot1.ix: "OC1", ot2.ix: "OC2"}),
        "gromacs-o1o2": ({_first(u, "CYS").ix: "CYSH"}, {ot1.ix: "O1", ot2.ix: "O2"}),
        "amber-cym": ({_first(u, "CYS").ix: "CYM"}, {}),
    }
    for residues, atoms in variants.values():
        v = renamed(u, residues=residues, atoms=atoms)
        for func in (protein_backbone_torsions, protein_sidechain_torsions):
            base, variant = func(u), func(v)
            same_torsions(u, base, v, variant)
            assert variant.notices == []


@pytest.mark.parametrize("which", ["bonds", "distance"])
def test_renamed_terminal_residues_do_not_count_as_breaks(adk_charmm, adk_gromacs_gro, which):
    # Two copies of the chain in one segment: the C-terminal atoms (renamed to OT1/OT2, O/OXT,
    # OC1/OC2, O1/O2) and the N-terminal hydrogens mark chain ends, so no chain-break notice.
    # Source: terminal atom names of CHARMM, AMBER/PDB and GROMACS (common practice).
    u = adk_charmm if which == "bonds" else adk_gromacs_gro
    protein = u.select_atoms("protein")
    last = protein.residues[-1]
    terminal = last.atoms.select_atoms("name OT1 OT2 O1 O2")
    assert len(terminal) == 2
    for c_names in (("OT1", "OT2"), ("O", "OXT"), ("OC1", "OC2"), ("O1", "O2")):
        v = renamed(u, atoms={terminal[0].ix: c_names[0], terminal[1].ix: c_names[1]})
        chain = v.select_atoms("protein")
        two = mda.Merge(chain, chain)
        two.dimensions = u.dimensions  # the .gro protein crosses the box edge (ARG156-LYS157)
        for residue in two.residues[len(chain.residues):]:
            residue.segment = two.segments[0]  # both copies in one segment
        tset = protein_backbone_torsions(two)
        assert len(tset) == 2 * (3 * 214 - 3)
        assert [n for n in tset.notices if "break" in n] == [], c_names


def test_nucleic_name_variants():
    # Source: nucleotide names of CHARMM (ADE/CYT/GUA/URA), AMBER (RA, RA5/RA3, A/C/G/U, O1P) and
    # the PDB (OP1; primes written as * in old files, O3*).
    u = load("RNA_PSF", "RNA_PDB")
    base = nucleic_backbone_torsions(u)
    rna = [r for r in u.residues if r.resname in ("ADE", "CYT", "GUA", "URA")]
    amber = {"ADE": "RA", "CYT": "RC", "GUA": "RG", "URA": "RU"}
    one_letter = {"ADE": "A", "CYT": "C", "GUA": "G", "URA": "U"}
    names_amber = {r.ix: amber[r.resname] for r in rna}
    names_amber[rna[0].ix] += "5"
    names_amber[rna[-1].ix] += "3"
    star = {a.ix: a.name.replace("'", "*") for a in u.atoms if "'" in a.name}
    op = {a.ix: {"O1P": "OP1", "O2P": "OP2"}[a.name] for a in u.select_atoms("name O1P O2P")}
    for residues, atoms in ((names_amber, None), ({r.ix: one_letter[r.resname] for r in rna}, star),
                            (None, op)):
        v = renamed(u, residues=residues, atoms=atoms)
        variant = nucleic_backbone_torsions(v)
        same_torsions(u, base, v, variant)
        assert variant.notices == []


def test_classify_residue_name():
    # Source: residue names of the force fields named in the brief (CHARMM, AMBER, GROMACS, OPLS).
    assert classify_residue_name("HSD") == ("amino", "HIS", "")
    assert classify_residue_name("HISE") == ("amino", "HIS", "")
    assert classify_residue_name("NALA") == ("amino", "ALA", "N")
    assert classify_residue_name("CHIE") == ("amino", "HIS", "C")
    assert classify_residue_name("CYSH") == ("amino", "CYS", "")
    assert classify_residue_name("ACE")[0] == "n-cap"
    assert classify_residue_name("NME")[0] == "c-cap"
    assert classify_residue_name("DA5") == ("nucleotide", "A", "5")
    assert classify_residue_name("THY") == ("nucleotide", "T", "")
    assert classify_residue_name("SOL") == (None, None, "")


# --------------------------------------------------------------------------------------------
# caps, chain breaks, missing atoms, non-standard residues
# --------------------------------------------------------------------------------------------

def test_amber_caps_give_neighbour_atoms():
    # ACE-ALA-NME (AMBER): phi of ALA uses the ACE carbonyl C, psi the NME N, omega the NME
    # methyl carbon; the caps get no torsions. Source: IUPAC-IUB 1970 definitions (neighbouring
    # atoms of the linked residues).
    u = load("PRMpbc", "TRJpbc_bz2")
    tset = protein_backbone_torsions(u)
    assert tset.labels == ["ALA2:phi", "ALA2:psi", "ALA2:omega"]
    got = {t.name: (tuple(u.atoms[list(t.indices)].names),
                    tuple(u.atoms[list(t.indices)].resnames)) for t in tset}
    assert got["phi"] == (("C", "N", "CA", "C"), ("ACE", "ALA", "ALA", "ALA"))
    assert got["psi"] == (("N", "CA", "C", "N"), ("ALA", "ALA", "ALA", "NME"))
    assert got["omega"] == (("CA", "C", "N", "CH3"), ("ALA", "ALA", "NME", "NME"))
    assert tset.notices == []


def test_caps_without_bonds_and_other_cap_names():
    # ACE ... NMA from a PDB without bonds (methyl carbon of NMA named CA), the gramicidin
    # formyl (FOR) and ethanolamine (ETA) ends, and AMBER's NHE (no carbon: no omega).
    u = load("capping_output")
    names = atom_names(u, protein_backbone_torsions(u))
    assert names["ALA2:phi"] == ("C", "N", "CA", "C")
    assert u.atoms[list(protein_backbone_torsions(u).torsions[0].indices)][0].resname == "ACE"
    assert names["ALA15:omega"] == ("CA", "C", "N", "CA")
    last = [t for t in protein_backbone_torsions(u) if t.label == "ALA15:omega"][0]
    assert u.atoms[last.indices[3]].resname == "NMA"

    gramicidin = load("PDB_HOLE")
    tset = protein_backbone_torsions(gramicidin)
    first = [t for t in tset if t.label == "VAL1:phi"]
    assert len(first) == 2  # two chains, both start with a formyl group
    assert gramicidin.atoms[first[0].indices[0]].resname == "FOR"
    last = [t for t in tset if t.label == "TRP15:omega"][0]
    assert list(gramicidin.atoms[list(last.indices)].resnames) == ["TRP", "TRP", "ETA", "ETA"]
    assert not any(t.resname in ("FOR", "ETA") for t in tset)
    assert [n for n in tset.notices if "break" in n] == []

    tz2 = load("PRM7")
    names = atom_names(tz2, protein_backbone_torsions(tz2))
    assert names["LYS12:psi"] == ("N", "CA", "C", "N")
    assert "LYS12:omega" not in names
    assert protein_backbone_torsions(tz2).notices == []


def test_charmm_patch_caps_inside_the_residue():
    # CHARMM's ACE and CT3 patches put the cap atoms CY/CAY and NT/CAT into the terminal residue.
    # Built from the AMBER ACE-ALA-NME coordinates: the angles must equal the AMBER ones.
    amber = load("PRMpbc", "TRJpbc_bz2")
    reference = dict(zip(protein_backbone_torsions(amber).labels,
                         angles_deg(amber, protein_backbone_torsions(amber))))
    rename = {("ACE", "C"): "CY", ("ACE", "CH3"): "CAY", ("ACE", "O"): "OY",
              ("NME", "N"): "NT", ("NME", "CH3"): "CAT"}
    atoms = amber.select_atoms("resname ACE ALA NME and not name H*")
    u = mda.Universe.empty(len(atoms), n_residues=1, atom_resindex=np.zeros(len(atoms), int),
                           trajectory=True)
    u.add_TopologyAttr("names", [rename.get((a.resname, a.name), a.name) for a in atoms])
    u.add_TopologyAttr("resnames", ["ALA"])
    u.add_TopologyAttr("resids", [2])
    u.add_TopologyAttr("segids", ["PROA"])
    u.atoms.positions = atoms.positions
    tset = protein_backbone_torsions(u)
    names = atom_names(u, tset)
    assert names == {"ALA2:phi": ("CY", "N", "CA", "C"), "ALA2:psi": ("N", "CA", "C", "NT"),
                     "ALA2:omega": ("CA", "C", "NT", "CAT")}
    for label, value in zip(tset.labels, angles_deg(u, tset)):
        assert value == pytest.approx(reference[label], abs=1e-3)
    assert tset.notices == []


@pytest.mark.parametrize("which", ["bonds", "distance"])
def test_chain_break_gives_no_torsions_across_the_gap(adk_charmm, adk_gromacs_gro, which):
    # Delete residue 50: no psi/omega of residue 49, no phi of residue 51, and a notice.
    # Source: IUPAC-IUB 1970 (phi and psi need the linked neighbour); the brief's link rule.
    u = adk_charmm if which == "bonds" else adk_gromacs_gro
    cut = mda.Merge(u.select_atoms("not (protein and resid 50)"))
    cut.dimensions = u.dimensions  # Merge drops the box; links are judged with minimum image
    tset = protein_backbone_torsions(cut)
    labels = set(tset.labels)
    r49, r51 = (u.select_atoms(f"resid {i}").residues[0] for i in (49, 51))
    tag49, tag51 = f"{r49.resname}49", f"{r51.resname}51"
    assert f"{tag49}:phi" in labels and f"{tag51}:psi" in labels
    assert f"{tag49}:psi" not in labels and f"{tag49}:omega" not in labels
    assert f"{tag51}:phi" not in labels
    assert len(tset) == 3 * 214 - 3 - 6
    breaks = [n for n in tset.notices if "chain break" in n]
    assert len(breaks) == 1
    assert tag49 in breaks[0] and tag51 in breaks[0]
    assert ("bond" in breaks[0]) if which == "bonds" else ("distance" in breaks[0])


def test_link_uses_minimum_image(adk_gromacs_gro):
    # A residue moved by one box vector (as in a molecule split across the box) stays linked:
    # the C-N distance is taken with the minimum image (common practice for periodic boundaries).
    u = adk_gromacs_gro.copy()
    moved = u.select_atoms("resid 100")
    moved.positions = moved.positions + np.array([u.dimensions[0], 0, 0], dtype=np.float32)
    base = protein_backbone_torsions(adk_gromacs_gro)
    shifted = protein_backbone_torsions(u)
    same_torsions(adk_gromacs_gro, base, u, shifted)
    values = angles_deg(u, shifted)  # with the box: the same angles as before
    assert values == pytest.approx(angles_deg(adk_gromacs_gro, base), abs=1e-3)


def test_missing_side_chain_atom_notice(adk_charmm):
    # A recognised residue without CD: chi2..chi5 of Arg are skipped with a notice naming the
    # residue, the atoms expected and those found; chi1 stays. Source: the brief's rule.
    u = adk_charmm
    cut = mda.Merge(u.select_atoms("not (resid 2 and name CD)"))
    tset = protein_sidechain_torsions(cut)
    labels = set(tset.labels)
    assert "ARG2:chi1" in labels
    assert not {"ARG2:chi2", "ARG2:chi3", "ARG2:chi4", "ARG2:chi5"} & labels
    notices = [n for n in tset.notices if "ARG2" in n]
    assert len(notices) == 1
    assert "chi2, chi3, chi4, chi5" in notices[0]
    assert "expected atoms N, CA, CB, CG, CD, NE, CZ, NH1" in notices[0]
    assert "found N, CA, CB, CG, NE, CZ, NH1, NH2, C, O" in notices[0]


def test_missing_backbone_atom_notice(adk_charmm):
    # Residue 10 without CA: its phi, psi, omega and the omega of residue 9 are skipped.
    u = adk_charmm
    cut = mda.Merge(u.select_atoms("not (resid 10 and name CA)"))
    tset = protein_backbone_torsions(cut)
    tag9, tag10 = (f"{u.select_atoms(f'resid {i}').residues[0].resname}{i}" for i in (9, 10))
    labels = set(tset.labels)
    assert not {f"{tag10}:phi", f"{tag10}:psi", f"{tag10}:omega", f"{tag9}:omega"} & labels
    assert f"{tag9}:psi" in labels  # N of residue 10 is still there
    assert any(tag10 in n and "expected atoms N, CA, C" in n for n in tset.notices)
    assert any(f"omega of {tag9}" in n and "no atom CA" in n for n in tset.notices)


def test_unrecognised_residue_name(adk_charmm):
    # A residue with backbone atoms but an unknown name: backbone torsions kept (it is linked into
    # the chain), side-chain torsions skipped; both reported.
    u = adk_charmm
    v = renamed(u, residues={u.residues[1].ix: "XAR"})
    side = protein_sidechain_torsions(v)
    assert not [t for t in side if t.resname == "XAR"]
    assert side.notices == ["skipped side-chain torsions of XAR2: residue name XAR is not "
                            "recognised as an amino acid"]
    backbone = protein_backbone_torsions(v)
    assert {"XAR2:phi", "XAR2:psi", "XAR2:omega"} <= set(backbone.labels)
    assert len(backbone.notices) == 1 and "XAR2" in backbone.notices[0]


def test_topology_without_names_is_a_clear_error():
    # A topology without residue names cannot be recognised: one sentence that says what to load.
    from dihedra.errors import SelectionError

    u = mda.Universe.empty(10, trajectory=True)
    for func in (protein_backbone_torsions, protein_sidechain_torsions, nucleic_backbone_torsions):
        with pytest.raises(SelectionError, match="has no residue names"):
            func(u)


def test_water_and_ions_are_ignored_silently(adk_gromacs_gro, adk_gromacs_tpr):
    # 11084 SOL and 4 NA+ residues: no notice about them.
    for u in (adk_gromacs_gro, adk_gromacs_tpr):
        for func in (protein_backbone_torsions, protein_sidechain_torsions,
                     nucleic_backbone_torsions):
            tset = func(u)
            assert not [n for n in tset.notices if "SOL" in n or "NA" in n], tset.notices
    assert nucleic_backbone_torsions(adk_gromacs_tpr).torsions == []


# --------------------------------------------------------------------------------------------
# the torsion records
# --------------------------------------------------------------------------------------------

def test_labels_types_groups_and_segments():
    # The data model of dihedra.selection.torsions: label RESNAME RESID:name with the real residue
    # name, type RESIDUE:name with the standard residue of a force-field variant (the variant kept
    # beside it), group from molecule_group of the CA / C1' atom.
    from dihedra.selection.residue_names import canonical_residue_name

    u = load("PSF", "DCD")
    for t in protein_sidechain_torsions(u).torsions + protein_backbone_torsions(u).torsions:
        assert t.label == f"{t.resname}{t.resid}:{t.name}"
        assert t.type == f"{canonical_residue_name(t.resname)}:{t.name}"
        assert t.variant == ("" if t.resname == canonical_residue_name(t.resname) else t.resname)
        ca = u.select_atoms(f"resid {t.resid} and name CA")[0]
        assert t.group == molecule_group(ca) and t.segid == "4AKE"
    assert "HIS:chi2" in protein_sidechain_torsions(u).types
    assert "HSD:chi2" in protein_sidechain_torsions(u, keep_variants=True).types

    rna = load("RNA_PSF", "RNA_PDB")  # three segments: groups carry the segment
    for t in nucleic_backbone_torsions(rna):
        c1 = rna.select_atoms(f"segid {t.segid} and resid {t.resid} and name C1'")[0]
        assert t.group == molecule_group(c1) == f"{t.segid}:{t.resname}{t.resid}"


def test_gromos_names_in_tpr(adk_gromacs_tpr):
    # The GROMACS .tpr names Lys LYSH, His HISB and Cys CYSH (GROMOS): all side chains found.
    u = adk_gromacs_tpr
    types = set(protein_sidechain_torsions(u, keep_variants=True).types)
    assert {"LYSH:chi4", "HISB:chi2", "CYSH:chi1"} <= types
    assert len(protein_sidechain_torsions(u)) == len(protein_sidechain_torsions(load("PSF")))
    # typed by residue kind, the GROMOS and the CHARMM topologies of one protein have the same
    # types, so their results pool and compare
    assert set(protein_sidechain_torsions(u).types) == set(protein_sidechain_torsions(load("PSF")).types)
    assert set(protein_backbone_torsions(u).types) == set(protein_backbone_torsions(load("PSF")).types)


def test_named_specifications_use_these_functions(adk_charmm):
    # select_torsions resolves protein-backbone / protein-sidechains / nucleic-backbone here.
    pytest.importorskip("dihedra.selection.rotatable")
    from dihedra.selection.specs import select_torsions

    tset = select_torsions(adk_charmm, ["protein-backbone", "protein-sidechains"])
    assert len(tset) == 639 + 421
    orders = {t.label: t.order for t in tset}
    assert orders["ARG2:phi"] < orders["ARG2:psi"] < orders["ARG2:omega"] < orders["ARG2:chi1"]


def test_a_selection_of_nothing_names_two_reasons_and_counts_the_rest():
    # MDAnalysisTests' nucl_res.pdb holds one CA atom per nucleotide: no nucleic torsion has its atoms
    from dihedra.errors import SelectionError
    from dihedra.selection.specs import select_torsions

    u = load("NUCLsel")
    with pytest.raises(SelectionError) as caught:
        select_torsions(u, ["nucleic-backbone"])
    text = str(caught.value)
    assert text.count("skipped") == 2 and "found CA" in text and ".;" not in text
    assert text.rstrip(".").endswith("more like these")
