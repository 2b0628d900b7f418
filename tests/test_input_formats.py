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
