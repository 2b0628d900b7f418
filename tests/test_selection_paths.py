"""The fast paths of the torsion selection give what the plain rules give, on MDAnalysisTests
files (adenylate kinase as CHARMM PSF and GROMACS TPR, water with H-H bonds in rings) and the
bundled hexane: the outer atoms ranked once against the rule's keys compared choice by choice,
the bridges found without terminal atoms against those of the whole bond graph, and the labels
and types of torsions against MDAnalysis' own atom attributes."""

import warnings

import numpy as np
import pytest

mda = pytest.importorskip("MDAnalysis")
datafiles = pytest.importorskip("MDAnalysisTests.datafiles")

import dihedra  # noqa: E402
from dihedra.selection import rotatable  # noqa: E402
from dihedra.selection.specs import select_torsions, torsions_from_toml  # noqa: E402
from dihedra.selection.torsions import torsions_from_quads  # noqa: E402


def _universe(name):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        if name == "hexane":
            return mda.Universe(dihedra.example_path("hexane.pdb"))
        return mda.Universe(getattr(datafiles, name))


def _graph(u):
    adjacency = rotatable._bond_graph(u, [])
    degree = np.array([len(a) for a in adjacency])
    owner = np.repeat(np.arange(len(adjacency)), degree)
    flat = np.array([j for nbrs in adjacency for j in nbrs], dtype=np.int64)
    return adjacency, degree, owner, flat


@pytest.mark.parametrize("name", ["PSF", "TPR", "PSF_TRICLINIC", "hexane"])
def test_bridges_without_terminal_atoms_are_the_inner_bridges_of_the_whole_graph(name):
    adjacency, degree, _, _ = _graph(_universe(name))
    whole = {(b, c) for b, c in rotatable._bridges(adjacency) if degree[b] >= 2 and degree[c] >= 2}
    assert rotatable._bridges(adjacency, skip=(degree < 2).tolist()) == whole


@pytest.mark.parametrize("name", ["PSF", "TPR", "hexane"])
def test_outer_atoms_ranked_once_match_the_rule_applied_bond_by_bond(name):
    u = _universe(name)
    adjacency, degree, owner, flat = _graph(u)
    inner = np.array(sorted(b for b in rotatable._bridges(adjacency, skip=(degree < 2).tolist())),
                     dtype=np.int64).reshape(-1, 2)
    heavy, masses = rotatable._is_heavy(u), rotatable._masses(u)
    outer = rotatable._outer_by_keys(adjacency, heavy, masses, owner, flat)
    expected = np.array([(outer(b, c), b, c, outer(c, b)) for b, c in inner.tolist()], dtype=np.int64)
    assert len(expected) > 10
    np.testing.assert_array_equal(rotatable._quads(adjacency, inner, heavy, masses, owner, flat), expected)
    # a NaN mass: no total order, the rule is applied bond by bond
    masses[0] = np.nan
    assert rotatable._outer_choices(len(adjacency), owner, flat, heavy, masses) is None


def test_labels_and_types_follow_mdanalysis_atom_attributes():
    u = _universe("PSF")
    tset = select_torsions(u, "rotatable")
    crossing = 0
    for t in tset:
        atoms = u.atoms[list(t.indices)]
        owner = atoms[1].residue
        parts, types = [], []
        for a in atoms:
            same = a.residue.ix == owner.ix
            crossing += not same
            parts.append(a.name if same else f"{a.resname}{a.resid}.{a.name}")
            types.append(a.name if same else f"{a.name}({a.resid - owner.resid:+d})")
        assert t.label.split("#")[0] == f"{owner.resname}{owner.resid}:{'-'.join(parts)}"
        assert t.type == f"{owner.resname}:{'-'.join(types)}"
    assert crossing > 100   # the peptide bonds: torsions across residues are checked too
    assert [t.indices for t in torsions_from_quads(u, [t.indices for t in tset])] == [t.indices for t in tset]


def test_a_torsion_file_may_name_the_type(tmp_path):
    u = _universe("hexane")
    path = tmp_path / "t.toml"
    path.write_text('[[torsion]]\nname = "middle"\natoms = [1, 2, 3, 4]\ntype = "alkane-middle"\n')
    (t,) = torsions_from_toml(u, str(path)).torsions
    assert (t.label, t.type, t.indices) == ("middle", "alkane-middle", (1, 2, 3, 4))


def test_torsions_given_by_atoms_that_are_not_bonded_in_a_chain_get_a_notice(tmp_path):
    # hexane's first chain is atoms 0-5 bonded in order (the example's CONECT records); atom 6
    # begins the second molecule
    u = _universe("hexane")
    chained = select_torsions(u, ["0,1,2,3", "1,2,3,4"])
    assert not any("not a chain of bonded atoms" in n for n in chained.notices)
    across = select_torsions(u, ["0,1,2,6"])
    assert any("1 torsion(s) are not a chain of bonded atoms" in n and "0 1 2 6" in n for n in across.notices)
    path = tmp_path / "t.toml"
    path.write_text('[[torsion]]\nname = "skew"\natoms = [0, 2, 1, 3]\n'
                    '[[torsion]]\nname = "ok"\natoms = [2, 3, 4, 5]\n')
    assert any("1 torsion(s)" in n and "skew" in n for n in select_torsions(u, str(path)).notices)
