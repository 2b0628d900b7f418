"""The analysis class on the atoms a user has: TorsionStates gives the tables that `dihedra track`
writes, with every MDAnalysis backend, and every analysis takes it as its input.

Real data: MDAnalysisTests' CHARMM adenylate kinase PSF/DCD (reference data of the MDAnalysis
test suite); the backbone torsions follow the IUPAC-IUB definitions (J. Mol. Biol. 52 (1970) 1)."""

import os
import warnings

import numpy as np
import pandas as pd
import pytest
from series_reading import read_wide

import dihedra
from dihedra.cli import main
from dihedra.errors import DihedraError, SelectionError

mda = pytest.importorskip("MDAnalysis")
datafiles = pytest.importorskip("MDAnalysisTests.datafiles")

warnings.filterwarnings("ignore", category=DeprecationWarning)
KW = dict(torsions="protein-backbone", scheme="klyne-prelog")


@pytest.fixture(scope="module")
def universe():
    return mda.Universe(datafiles.PSF, datafiles.DCD)


@pytest.fixture(scope="module")
def serial(universe):
    return dihedra.TorsionStates(universe.select_atoms("protein"), **KW).run(stop=50)


@pytest.fixture(scope="module")
def folder(tmp_path_factory):
    out = tmp_path_factory.mktemp("states") / "res"
    assert main(["track", datafiles.PSF, datafiles.DCD, "--torsions", "protein-backbone", "--scheme",
                 "klyne-prelog", "--stop", "50", "--out", str(out)]) == 0
    return str(out)


def test_results_equal_the_tables_that_track_writes(serial, folder):
    for name in ("populations", "populations_by_type", "conformers", "conformers_by_type"):
        written = pd.read_csv(os.path.join(folder, f"{name}.csv"))
        got = getattr(serial.results, name)
        assert isinstance(got, pd.DataFrame)
        pd.testing.assert_frame_equal(got.reset_index(drop=True), written, check_dtype=False, obj=name)
    written = read_wide(folder, "states")
    pd.testing.assert_frame_equal(serial.results.states, written, obj="states")
    assert len(serial.results.torsions) == len(pd.read_csv(os.path.join(folder, "torsions.csv")))


@pytest.mark.parametrize("backend", ["multiprocessing", "dask"])
def test_every_backend_gives_the_serial_result(universe, serial, backend):
    other = dihedra.TorsionStates(universe.select_atoms("protein"), **KW).run(stop=50, backend=backend,
                                                                                   n_workers=2)
    for name in ("populations", "populations_by_type", "conformers", "states"):
        pd.testing.assert_frame_equal(serial.results[name], other.results[name], obj=name)
    for key, value in serial.tracking_result.blocks.items():
        np.testing.assert_array_equal(value, other.tracking_result.blocks[key], err_msg=key)


def test_an_atom_group_limits_the_torsions(universe):
    part = dihedra.TorsionStates(universe.select_atoms("resid 1-10"), **KW).run(stop=5)
    residues = {int(r) for r in part.results.torsions["resid"]}
    assert residues <= set(range(1, 11)) and len(residues) == 10
    # the psi and omega of residue 10 reach into residue 11: left out, with a notice
    assert "ARG10:psi" not in set(part.results.torsions["torsion"])
    assert any("outside the atom group" in n for n in part.results.notices)
    with pytest.raises(SelectionError, match="none of the"):
        dihedra.TorsionStates(universe.select_atoms("name CA"), **KW)


def test_track_takes_a_universe(universe, serial):
    res = dihedra.track(universe.select_atoms("protein"), stop=50, **KW)
    pd.testing.assert_frame_equal(res.populations, serial.results.populations)
    assert res.summary["topology"]["path"] == os.path.abspath(datafiles.PSF)
    with pytest.raises(DihedraError, match="no trajectories"):
        dihedra.track(universe, [datafiles.DCD], **KW)


def test_analyses_take_the_analysis_object(serial, folder):
    # the kinetics of the in-memory result equal those of the folder it would have written
    from dihedra.analysis.kinetics import state_kinetics

    memory = state_kinetics(serial, assignment="crisp", lags=[1, 2], n_bootstrap=20)
    saved = state_kinetics(dihedra.load_results(folder), assignment="crisp", lags=[1, 2], n_bootstrap=20)
    for name in ("transitions", "lifetimes", "timescales"):
        pd.testing.assert_frame_equal(getattr(memory, name), getattr(saved, name), obj=name)


def test_time_series_only_on_request(universe):
    ts = dihedra.TorsionStates(universe.atoms, keep_states=False, **KW).run(stop=5)
    assert "states" not in ts.results and not ts.tracking_result.has_series("states")
    with pytest.raises(DihedraError, match="no states time series"):
        ts.tracking_result.states()
    angles = dihedra.TorsionStates(universe.atoms, keep_angles=True, **KW).run(stop=5).results.angles
    assert angles.shape == (5, 3 + len(ts.results.torsions))
    assert angles.iloc[:, 3:].abs().max().max() <= 180


def test_weights_must_match_the_frames(universe):
    with pytest.raises(DihedraError, match="one weight per analysed frame"):
        dihedra.TorsionStates(universe.atoms, weights=np.ones(7), **KW).run(stop=5)
    with pytest.raises(DihedraError, match="AtomGroup or Universe"):
        dihedra.TorsionStates("protein.psf", **KW)


@pytest.mark.parametrize("kwargs", [dict(start=5000), dict(start=50, stop=10), dict(frames=[]),
                                    dict(frames=np.zeros(3, dtype=bool))])
def test_a_frame_range_without_frames_is_one_clear_error(universe, kwargs):
    # AnalysisBase would start the pass on no frames and fail deep inside it (an IndexError)
    with pytest.raises(DihedraError, match="none of its|selects no frame"):
        dihedra.TorsionStates(universe.atoms).run(**kwargs)


def test_state_series_with_labels_counts_as_the_populations(serial):
    # the labelled series is the coded one read through scheme.labels: each torsion's share of
    # frames per label is its population (unweighted run: frames counted, by definition)
    res = serial.tracking_result
    coded, named = res.states(), res.states(labels=True)
    first = res.torsion_set.labels[0]
    assert list(named[first].cat.categories) == list(res.scheme.labels)
    assert (named[first].cat.codes.to_numpy() == coded[first].to_numpy()).all()
    share = named[first].value_counts(normalize=True)
    pops = res.populations[res.populations["torsion"] == first].set_index("state")["population"]
    for state, p in pops.items():
        assert share.get(state, 0.0) == pytest.approx(p)


def test_weights_that_leave_few_frames_are_said():
    # Kish's effective sample size (sum w)^2 / sum w^2 (Kish, Survey Sampling, 1965): equal weights
    # keep every frame; one heavy frame among 1000 leaves about one; a replica of zeros gives nothing
    from dihedra.trajectory.weights import weight_notices

    assert weight_notices([np.ones(500), np.ones(500)]) == []
    heavy = np.full(1000, 1e-6)
    heavy[3] = 1.0
    notes = weight_notices([heavy])
    assert len(notes) == 1 and "about 1 effective frames of 1000 (Kish)" in notes[0]
    notes = weight_notices([np.ones(500), np.zeros(500)])
    assert any("replica(s) 2 are all 0" in n for n in notes)
    assert weight_notices([None, None]) == []
