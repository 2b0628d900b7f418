"""Schemes from the chemistry of the central bond (--scheme auto) and scheme maps, on molecules
built with RDKit (embedded, written as PDB with CONECT records) and on the united-atom examples.

Expected classes follow the textbook rules named in dihedra.selection.chemistry: sp3-sp3 bonds
3-fold (Eliel & Wilen, Stereochemistry of Organic Compounds, 1994, ch. 10), amides 2-fold cis/trans
(Pauling, Corey & Branson, PNAS 37 (1951) 205), rotors of three identical atoms one state (their
symmetry; common practice), ring torsions flagged (Cremer & Pople, JACS 97 (1975) 1354)."""

import os

import numpy as np
import pytest

from dihedra import example_path
from dihedra.errors import DihedraError

Chem = pytest.importorskip("rdkit.Chem")
from rdkit.Chem import AllChem  # noqa: E402

import MDAnalysis as mda  # noqa: E402

from dihedra.selection.chemistry import classify_torsions  # noqa: E402
from dihedra.selection.choice import choose_schemes  # noqa: E402
from dihedra.selection.schemes import get_scheme  # noqa: E402
from dihedra.selection.specs import select_torsions  # noqa: E402

#: An aryl amide with a methyl (methoxy) and a CF3 group: N-(2-methoxyethyl)-4-(trifluoromethyl)benzamide.
DRUG = "COCCNC(=O)c1ccc(cc1)C(F)(F)F"


def write_molecule(folder, smiles, name="mol", n_confs=1, seed=7):
    """Embed ``smiles`` with hydrogens (RDKit), write name.pdb with CONECT records (atom names:
    element + index) and, with several conformers, name.dcd. Returns the paths."""
    mol = Chem.AddHs(Chem.MolFromSmiles(smiles))
    ids = AllChem.EmbedMultipleConfs(mol, numConfs=n_confs, randomSeed=seed)
    for a in mol.GetAtoms():
        a.SetMonomerInfo(Chem.AtomPDBResidueInfo(f"{a.GetSymbol()}{a.GetIdx() + 1}"[:4], residueName="LIG",
                                                 residueNumber=1, isHeteroAtom=True))
    pdb = os.path.join(folder, name + ".pdb")
    with open(pdb, "w") as fh:
        fh.write(Chem.MolToPDBBlock(mol, confId=ids[0]))
    if n_confs == 1:
        return pdb, None
    u = mda.Universe(pdb)
    dcd = os.path.join(folder, name + ".dcd")
    with mda.Writer(dcd, u.atoms.n_atoms) as w:
        for cid in ids:
            u.atoms.positions = mol.GetConformer(cid).GetPositions()
            w.write(u.atoms)
    return pdb, dcd


def _by_names(table, u, *names):
    """The row of the torsion whose four atoms have these names."""
    want = " ".join(names)
    for k, t in enumerate(table["torsion"]):
        if t.split(":")[1].replace("-", " ") == want:
            return table.iloc[k]
    raise AssertionError(f"no torsion {want} in {list(table['torsion'])}")


def test_alkanes_get_three_fold_states():
    for name in ("hexane.pdb", "butane_rb.pdb"):   # united atom: CHx sites, hydrogens implicit
        u = mda.Universe(example_path(name))
        table = classify_torsions(u, select_torsions(u, "rotatable"))
        assert set(table["bond"]) == {"sp3-sp3"} and set(table["periodicity"]) == {3}
        assert set(table["scheme"]) == {"anti-gauche"}


def test_drug_like_molecule_gets_a_sensible_scheme_for_every_rotatable_torsion(tmp_path):
    pdb, _ = write_molecule(str(tmp_path), DRUG)
    u = mda.Universe(pdb)
    table = classify_torsions(u, select_torsions(u, "rotatable"))
    assert len(table) == 7 and table["reason"].str.len().min() > 20
    amide = _by_names(table, u, "C4", "N5", "C6", "O7")
    # measured through the carbonyl O: a trans amide (C-C(=O)-N-C near 180, as RDKit embeds a
    # secondary amide) has O=C-N-C near 0, and must read trans (IUPAC-IUB 1970: cis = C-C(=O)-N-C near 0)
    assert (amide["bond"], amide["periodicity"], amide["scheme"]) == ("amide", 2, "cis-trans-o")
    atoms = [int(u.select_atoms(f"name {n}")[0].ix) for n in ("C4", "N5", "C6", "O7")]
    from MDAnalysis.lib.distances import calc_dihedrals

    phi = np.degrees(calc_dihedrals(*(u.atoms.positions[[i]] for i in atoms)))
    scheme = get_scheme("cis-trans-o")
    assert abs(phi[0]) < 30 and scheme.labels[scheme.assign(phi)[0]] == "trans"
    methyl = table[table["torsion"].str.contains("C1-O2-C3") & table["torsion"].str.contains(":H")].iloc[0]
    assert methyl["scheme"] == "symmetric-rotor" and "three identical atoms" in methyl["reason"]
    cf3 = table[table["torsion"].str.contains("F")].iloc[0]
    assert cf3["scheme"] == "symmetric-rotor" and cf3["periodicity"] == 6 and "CF3" in cf3["reason"]
    assert _by_names(table, u, "C1", "O2", "C3", "C4")["scheme"] == "anti-gauche"
    assert _by_names(table, u, "O2", "C3", "C4", "N5")["periodicity"] == 3
    assert _by_names(table, u, "C3", "C4", "N5", "C6")[["bond", "scheme"]].tolist() == ["sp2-sp3", "klyne-prelog"]
    aryl = _by_names(table, u, "O7", "C6", "C8", "C9")
    assert aryl["bond"] == "sp2-sp2" and aryl["scheme"] == "coplanar-perpendicular"
    # one state on the methyl rotor
    choice = choose_schemes("auto", u, select_torsions(u, "rotatable"))
    assert choice.by_type[methyl["type"]].n_states == 1


def test_ring_torsions_are_flagged_and_triple_bonds_recognised(tmp_path):
    pdb, _ = write_molecule(str(tmp_path), "CC#CCc1ccccc1", name="ring")
    u = mda.Universe(pdb)
    ring = [a.index for a in u.atoms if a.element == "C"][4:8]   # four consecutive ring carbons
    tset = select_torsions(u, [",".join(map(str, ring)), "0,1,2,3"])
    table = classify_torsions(u, tset)
    assert table["bond"].tolist() == ["ring", "sp"]
    assert "6-membered ring" in table["reason"].iloc[0] and "flagged" in table["reason"].iloc[0]
    choice = choose_schemes("auto", u, tset)
    assert any("lie in rings" in n for n in choice.notices)


def test_bond_orders_of_the_topology_are_used():
    # an RDKit molecule as a Universe carries bond orders (1, 2): N-methylacetamide
    mol = Chem.AddHs(Chem.MolFromSmiles("CC(=O)NC"))
    AllChem.EmbedMolecule(mol, randomSeed=1)
    u = mda.Universe(mol)
    for attr, value in (("resnames", ["NMA"]), ("resids", [1])):
        if not hasattr(u.residues, attr):
            u.add_TopologyAttr(attr, value)
    table = classify_torsions(u, select_torsions(u, "rotatable"))
    # (the rotatable rule takes the carbonyl O as the outer atom: cis-trans measured through it)
    assert sorted(table["scheme"]) == ["cis-trans-o", "symmetric-rotor", "symmetric-rotor"]
    assert table["bond"].tolist().count("amide") == 1
    amide = table[table["bond"] == "amide"].iloc[0]
    assert amide["centres"].startswith("C sp2 (bond orders)") or amide["centres"].endswith("C sp2 (bond orders)")


def test_scheme_map_mixes_schemes_in_one_run(tmp_path):
    from dihedra import TorsionStates

    pdb, dcd = write_molecule(str(tmp_path), DRUG, n_confs=12)
    scheme_map = tmp_path / "map.toml"
    scheme_map.write_text('name = "drug"\ndefault = "klyne-prelog"\n'
                          '[[rule]]\nbond = "amide"\nscheme = "cis-trans"\n'
                          '[[rule]]\ntypes = ["LIG:C1-O2-*", "LIG:O2-C3-*"]\nscheme = "anti-gauche"\n'
                          '[[rule]]\nbond = ["sp2-sp3", "sp3-sp3"]\nscheme = "auto"\n')
    u = mda.Universe(pdb, dcd)
    ts = TorsionStates(u, torsions="rotatable", scheme=str(scheme_map)).run()
    schemes = dict(zip(ts.results.torsions["name"], ts.results.torsions["scheme"]))
    assert schemes["C4-N5-C6-O7"] == "cis-trans-o"   # (the rule's cis-trans, through the carbonyl O)
    assert schemes["C1-O2-C3-C4"] == "anti-gauche" and schemes["O2-C3-C4-N5"] == "anti-gauche"
    assert schemes["C3-C4-N5-C6"] == "klyne-prelog"          # sp2-sp3 by auto
    assert schemes["O7-C6-C8-C9"] == "klyne-prelog"          # sp2-sp2: the default of the map
    assert ts.scheme.name == "drug"
    pops = ts.results.populations
    amide = pops[pops["torsion"].str.contains("C4-N5-C6-O7")]
    assert set(amide["state"]) == {"cis", "trans"} and set(amide["scheme"]) == {"cis-trans-o"}
    assert amide.set_index("state").loc["trans", "population"] > 0.9   # RDKit embeds secondary amides trans
    assert set(ts.results.populations_by_type["scheme"]) >= {"cis-trans-o", "anti-gauche", "klyne-prelog"}
    reasons = ts.results.schemes.set_index("type")["reason"]
    assert reasons["LIG:C4-N5-C6-O7"].iloc[0].startswith("rule 1 (bond = amide)")


def test_scheme_map_errors_name_the_problem(tmp_path):
    u = mda.Universe(example_path("butane_rb.pdb"))
    tset = select_torsions(u, "rotatable")
    bad = tmp_path / "bad.toml"
    bad.write_text('[[rule]]\nbond = "amide"\nschema = "cis-trans"\n')
    with pytest.raises(DihedraError, match="unknown key"):
        choose_schemes(str(bad), u, tset)
    bad.write_text('[[rule]]\ntypes = "BUT:*"\nscheme = "no-such-scheme"\n')
    with pytest.raises(DihedraError, match="unknown state scheme"):
        choose_schemes(str(bad), u, tset)
    good = tmp_path / "good.toml"
    good.write_text('[[rule]]\ntypes = "BUT:*"\nscheme = "basins"\n')
    choice = choose_schemes(str(good), u, tset)
    assert choice.needs_data and choice.basin_types == ["BUT:C1-C2-C3-C4"]


def test_torsions_command_lists_scheme_and_reason(tmp_path, capsys):
    import pandas as pd

    from dihedra.cli import main

    pdb, _ = write_molecule(str(tmp_path), DRUG)
    csv = str(tmp_path / "auto.csv")
    main(["torsions", pdb, "--torsions", "rotatable", "--scheme", "auto", "--csv", csv])
    out = capsys.readouterr().out
    assert "cis-trans" in out and "symmetric-rotor" in out and "Pauling" in out
    table = pd.read_csv(csv)
    assert {"bond", "periodicity", "scheme", "scheme_reason"} <= set(table.columns)
    assert table["scheme_reason"].notna().all() and len(table) == 7
    assert np.all(table["periodicity"].isin([2, 3, 6]))
    code = main(["track", pdb, pdb, "--torsions", "rotatable", "--scheme", "basins", "--out", str(tmp_path / "x")])
    assert code == 2 and "temperature" in capsys.readouterr().err
    assert not os.path.exists(tmp_path / "x")


def test_a_double_bond_with_a_symmetric_end_has_one_state(tmp_path):
    # propene: H-C(H)=C-C; the two H of =CH2 are the same atom kind, so H1-C1=C2-C3 at 0 or 180
    # is one molecule (no Z/E isomerism without two different substituents on each end: IUPAC
    # rule E-2, common practice); 2-butene keeps cis/trans
    for smiles, expected in (("C=CC", "symmetric-rotor"), ("CC=CC", "cis-trans")):
        pdb, _ = write_molecule(str(tmp_path), smiles, name=smiles.replace("=", "d"))
        u = mda.Universe(pdb)
        table = classify_torsions(u, select_torsions(u, "rotatable"))
        double = table[table["bond"] == "double"]
        assert len(double) >= 1 and set(double["scheme"]) == {expected}, smiles
