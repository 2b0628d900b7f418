"""The formats dihedra names for MDAnalysis (trajectory/inputs.py known_formats) are the ones
MDAnalysis' own guessing picks for the same files (reference: MDAnalysis' get_parser_for and
get_reader_for, on its MDAnalysisTests data files)."""

import os
import warnings

import pytest

MDAnalysis = pytest.importorskip("MDAnalysis")
datafiles = pytest.importorskip("MDAnalysisTests.datafiles")

from MDAnalysis.core._get_readers import get_parser_for, get_reader_for  # noqa: E402

from dihedra.trajectory.inputs import known_formats, load_universe  # noqa: E402

PAIRS = [("PSF", "DCD"), ("TPR", "XTC"), ("GRO", "TRR"), ("PRMncdf", "NCDF"), ("PDB_small", None),
         ("CRD", None), ("PQR", None), ("PRM7", None), ("TXYZ", None), ("LAMMPSdata", None), ("GSD", None)]


@pytest.mark.parametrize("top, traj", PAIRS)
def test_known_formats_are_mdanalysis_own_guesses(top, traj):
    top = getattr(datafiles, top)
    traj = getattr(datafiles, traj) if traj else None
    kwargs = known_formats(top, traj)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        assert MDAnalysis.core._get_readers._PARSERS[kwargs["topology_format"]] is get_parser_for(top)
        if traj is not None:
            assert MDAnalysis.core._get_readers._READERS[kwargs["format"]] is get_reader_for(traj)


def test_unknown_extension_is_left_to_mdanalysis(tmp_path):
    odd = tmp_path / "system.top-file"
    odd.write_text("")
    assert known_formats(str(odd), str(tmp_path / "run.traj")) == {}
    assert known_formats(None) == {}


def test_universe_with_named_formats_matches_the_guessed_one():
    from MDAnalysisTests.datafiles import DCD, PSF

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        guessed = MDAnalysis.Universe(PSF, DCD)
    named = load_universe(PSF, DCD)
    assert type(named.trajectory) is type(guessed.trajectory)
    assert named.trajectory.n_frames == guessed.trajectory.n_frames == 98
    assert len(named.bonds) == len(guessed.bonds)
    assert (named.atoms.positions == guessed.atoms.positions).all()
    assert os.path.samefile(named.filename, guessed.filename)


def test_a_lammps_data_file_and_its_lammpstrj_dump_are_tracked(tmp_path):
    # MDAnalysisTests' LAMMPS chain: a data file without atom or residue names and a dump with
    # the usual .lammpstrj extension (read as MDAnalysis' LAMMPSDUMP format when named so);
    # the angle is MDAnalysis' own calc_dihedrals on the same frames
    import numpy as np

    import dihedra
    from MDAnalysis.lib.distances import calc_dihedrals

    top, dump = datafiles.LAMMPS_chain, datafiles.LAMMPSDUMP_chain1
    assert dump.endswith(".lammpstrj") and known_formats(top, dump)["format"] == "LAMMPSDUMP"
    notices = []
    u = load_universe(top, dump, notices=notices)
    assert any("no atom names and no residue names" in n for n in notices)
    res = dihedra.track(top, dump, torsions="0,1,2,3", keep_angles=True)
    assert res.torsion_set.types == ["MOL:T1-T1-T2-T2"]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        mda_universe = MDAnalysis.Universe(top, dump, format="LAMMPSDUMP")
        want = [np.degrees(calc_dihedrals(*ts.positions[[0, 1, 2, 3]][:, None, :], box=ts.dimensions))[0]
                for ts in mda_universe.trajectory]
    angles = res.angles()
    got = angles[res.torsion_set.labels[0]].to_numpy() if res.torsion_set.labels[0] in angles else angles.iloc[:, -1]
    np.testing.assert_allclose(got, want, atol=1e-3)
    assert u.atoms.n_atoms == mda_universe.atoms.n_atoms
