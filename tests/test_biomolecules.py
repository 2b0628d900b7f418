"""Honest numbers on real biomolecules: the protein and nucleic-acid files that MDAnalysisTests
ships (reference data of the MDAnalysis test suite) run as a new user would run them.

* CHARMM adenylate kinase PSF/DCD (98 frames of a closed-to-open transition),
* AMBER parm7/NetCDF (tz2, a file whose NetCDF stores time 0 in every frame),
* the RNA PSF/PDB (one frame).
"""

import os
import warnings

import numpy as np
import pandas as pd
import pytest

import dihedra
from dihedra.cli import main
from dihedra.errors import DihedraError

mda = pytest.importorskip("MDAnalysis")
data = pytest.importorskip("MDAnalysisTests.datafiles")

warnings.filterwarnings("ignore", category=DeprecationWarning)
warnings.filterwarnings("ignore", category=UserWarning)


def test_a_zero_time_step_is_unknown_and_kinetics_asks_for_dt(tmp_path, capsys):
    # tz2.truncoct.nc stores time 0 in every frame: the time step is unknown, not 0 ps
    out = str(tmp_path / "nc")
    assert main(["track", data.PRM7, data.NCDFtruncoct, "--torsions", "protein-backbone",
                 "--keep-angles", "--out", out]) == 0
    printed = capsys.readouterr()
    assert "time step unknown" in printed.err and "--dt-ps" in printed.err
    res = dihedra.load_results(out)
    rep = res.summary["replicas"][0]
    assert rep["time_step_known"] is False
    assert "0 ps" in rep["time_step_source"]
    with pytest.raises(DihedraError, match="--dt-ps"):
        dihedra.state_kinetics(res)
    assert main(["kinetics", out]) == 2
    assert "--dt-ps" in capsys.readouterr().err
    # with the time step given, the times are those frames x dt
    ok = dihedra.state_kinetics(res, dt_ps=2.0, lags=[1], n_bootstrap=0)
    assert ok.parameters["frame_interval_ps"] == 2.0


def test_a_time_step_that_varies_is_unknown():
    from dihedra.trajectory.assemble import time_step_problem

    assert time_step_problem(1.0, [0.0, 1.0, 2.0, 3.0]) is None
    # float32 times of an XTC file (MDAnalysisTests' adk_oplsaa.xtc: 100.0000076 ps apart)
    assert time_step_problem(100.0, np.float32([0.0, 100.0000076, 200.0000153, 300.0])) is None
    assert "vary" in time_step_problem(1.0, [0.0, 1.0, 2.0, 10.0])
    assert time_step_problem(-1.0, [0.0, -1.0]) is not None
    assert time_step_problem(float("nan"), [0.0, 1.0]) is not None
