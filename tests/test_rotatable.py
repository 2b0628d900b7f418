"""The 'rotatable' specification against RDKit substructure counts on small molecules."""

import os
import warnings

import numpy as np
import pytest

Chem = pytest.importorskip("rdkit.Chem")
from rdkit.Chem import AllChem  # noqa: E402

mda = pytest.importorskip("MDAnalysis")

from dihedra.selection.specs import select_torsions  # noqa: E402

# our definition as a SMARTS pattern: a non-ring bond between two non-terminal atoms, neither of
# which is a linear (sp, triple-bonded) centre with two neighbours (common practice; RDKit SMARTS)
ROTATABLE_SMARTS = Chem.MolFromSmarts("[!D1;!$([D2]#*)]-,=,:;!@[!D1;!$([D2]#*)]")


def universe_from_smiles(smiles, tmp_path, name="mol"):
    mol = Chem.AddHs(Chem.MolFromSmiles(smiles))
    AllChem.EmbedMolecule(mol, randomSeed=7)
    path = tmp_path / f"{name}.pdb"
    Chem.MolToPDBFile(mol, str(path))  # writes CONECT records for every bond
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return mol, mda.Universe(str(path))


@pytest.mark.parametrize("smiles", ["CC", "CCCC", "CCCCCC", "c1ccccc1", "Cc1ccccc1", "CC#CC",
                                    "c1ccccc1-c1ccccc1", "OCC(O)CO", "CC(C)C", "C1CCCCC1CC"])
def test_rotatable_bonds_match_rdkit_substructure_count(smiles, tmp_path):
    mol, u = universe_from_smiles(smiles, tmp_path)
    expected = len(mol.GetSubstructMatches(ROTATABLE_SMARTS))
    tset = select_torsions(u, "rotatable") if expected else None
    if expected == 0:
        with pytest.raises(Exception, match="select no torsions"):
            select_torsions(u, "rotatable")
    else:
        assert len(tset) == expected


def test_ethane_gets_an_h_c_c_h_torsion(tmp_path):
    # dihedra's rule for the outer atoms (docs/tracking.md, rotatable bonds): heavy atoms first, so
    # where an end carries only hydrogens, as in ethane, an H-C-C-H torsion
    _, u = universe_from_smiles("CC", tmp_path)
    (t,) = select_torsions(u, "rotatable").torsions
    elements = [u.atoms[i].element for i in t.indices]
    assert elements == ["H", "C", "C", "H"]


def test_butane_central_torsion_uses_the_carbon_chain(tmp_path):
    _, u = universe_from_smiles("CCCC", tmp_path)
    tset = select_torsions(u, "rotatable")
    heavy = [t for t in tset if all(u.atoms[i].element == "C" for i in t.indices)]
    assert len(heavy) == 1
    assert [u.atoms[i].element for i in tset.torsions[0].indices].count("C") >= 3


def test_copies_of_a_molecule_share_types_and_have_unique_labels(tmp_path):
    # four copies of butane, one residue each: 3 types (2 methyl rotors + C-C-C-C), 12 torsions
    mol = Chem.AddHs(Chem.MolFromSmiles("CCCC"))
    AllChem.EmbedMolecule(mol, randomSeed=1)
    block = Chem.MolToPDBBlock(mol)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        one = mda.Universe(__import__("io").StringIO(block), format="PDB")
        copies = []
        for k in range(4):
            c = one.copy()
            c.atoms.translate([10.0 * k, 0, 0])
            c.residues.resids = [k + 1]
            copies.append(c.atoms)
        u = mda.Merge(*copies)
    tset = select_torsions(u, "rotatable")
    assert len(tset) == 12
    assert len(set(tset.labels)) == 12
    assert len(set(tset.types)) == 3


def test_topology_without_bonds_guesses_them_with_a_notice(tmp_path):
    mol, u = universe_from_smiles("CCCC", tmp_path)
    plain = tmp_path / "nobonds.pdb"
    with open(tmp_path / "mol.pdb") as src, open(plain, "w") as dst:
        dst.writelines(line for line in src if not line.startswith("CONECT"))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        u2 = mda.Universe(str(plain))
    tset = select_torsions(u2, "rotatable")
    assert len(tset) == 3
    assert any("guessed" in n for n in tset.notices)


def test_guessed_bonds_do_not_depend_on_how_the_frame_is_wrapped(tmp_path):
    """A bond-less topology whose molecules lie split across the periodic box (each atom wrapped
    into the box on its own, as raw trajectories store them) gets the same bonds, hence the same
    torsions, as the whole molecules: bonds are guessed with the minimum image (common practice)."""
    pdb = os.path.join(os.path.dirname(__file__), "..", "example_trajectories", "hexane.pdb")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        whole = mda.Universe(pdb)
    whole.delete_bonds(whole.bonds)   # (the bonds of the CONECT records: a topology without bonds)
    split = whole.copy()
    split.atoms.translate([11.0, 7.0, 13.0])
    split.atoms.wrap(compound="atoms")
    crossing = np.abs(np.diff(split.atoms.positions, axis=0)).max(axis=1) > split.dimensions[0] / 2
    assert crossing.sum() > 10   # (the test means something: many molecules are split)
    a, b = select_torsions(whole, "rotatable"), select_torsions(split, "rotatable")
    assert len(a) == 300 and [t.indices for t in a.torsions] == [t.indices for t in b.torsions]
    assert any("minimum image" in n for n in b.notices)
