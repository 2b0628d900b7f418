"""Small complete results folders for the figure, report and pipeline tests (a helper, not a test).

Two replicas of four-site chains whose torsion follows a three-state Markov jump process between
anti (180), gauche+ (65) and gauche- (-65) with Gaussian spread inside each well; written as XTC
and run through every step of the command line (track with angles, profile with a pair, compare
against a cosine-series scan and made-up reference populations, kinetics, couplings against made-up
experimental values). The session fixture builds it once.
"""

import os

import numpy as np
import pytest
from conftest import chain_coordinates, write_system

CENTRES_DEG = (180.0, 65.0, -65.0)
N_MOLECULES = 6
N_FRAMES = 300
TEMPERATURE_K = 300.0

#: A three-fold cosine series (kJ/mol): a static "scan" with minima at 180 and +-60 (a made-up torsion).
SCAN_TOML = """form = "cosine-series"
energy_unit = "kJ/mol"
[[term]]
k = 1.5
n = 1
phase_deg = 0
[[term]]
k = 6.0
n = 3
phase_deg = 0
"""


def jump_angles(n_frames, n_molecules, seed, stay=0.95, spread_deg=12.0):
    """Angles (n_frames, n_molecules) of a discrete-time three-state jump process."""
    rng = np.random.default_rng(seed)
    centres = np.array(CENTRES_DEG)
    state = rng.integers(0, 3, n_molecules)
    out = np.empty((n_frames, n_molecules))
    for t in range(n_frames):
        move = rng.random(n_molecules) > stay
        state = np.where(move, (state + rng.integers(1, 3, n_molecules)) % 3, state)
        out[t] = centres[state] + rng.normal(0.0, spread_deg, n_molecules)
    return (out + 180.0) % 360.0 - 180.0


def make_system(folder, n_replicas=2, n_frames=N_FRAMES, n_molecules=N_MOLECULES):
    """Topology and replica trajectories in ``folder``; returns (topology, [trajectories])."""
    trajs = []
    top = None
    for r in range(n_replicas):
        coords = chain_coordinates(jump_angles(n_frames, n_molecules, seed=10 + r), seed=3)
        top, traj = write_system(folder, coords, stem=f"rep{r}")
        trajs.append(traj)
    return top, trajs


def build_folder(base, full=True):
    """A results folder in ``base``/results made through the command line; returns its path.

    ``full`` adds profile (with a 2-D pair), compare, kinetics and couplings.
    """
    from dihedra.cli import main

    os.makedirs(base, exist_ok=True)
    top, trajs = make_system(base)
    out = os.path.join(base, "results")
    assert main(["track", top, *trajs, "--torsions", "rotatable", "--keep-angles", "--temperature",
                 str(TEMPERATURE_K), "--out", out]) == 0
    if not full:
        return out
    scan = os.path.join(base, "scan.toml")
    with open(scan, "w") as fh:
        fh.write(SCAN_TOML)
    experimental = os.path.join(base, "experimental.csv")
    with open(experimental, "w") as fh:
        fh.write("torsion,J_hz,J_err_hz\nBUT1:C1-C2-C3-C4,4.0,0.3\nBUT2:C1-C2-C3-C4,4.4,0.3\n"
                 "BUT3:C1-C2-C3-C4,12.0,0.2\n")
    assert main(["profile", out, "--pair", "BUT1:C1-C2-C3-C4", "BUT2:C1-C2-C3-C4", "--bootstrap", "40"]) == 0
    reference = os.path.join(base, "reference_populations.csv")
    with open(reference, "w") as fh:
        fh.write("type,state,population,population_err\nBUT:C1-C2-C3-C4,anti,0.40,0.03\n"
                 "BUT:C1-C2-C3-C4,gauche+,0.30,0.03\nBUT:C1-C2-C3-C4,gauche+|gauche-,0.60,0.05\n")
    assert main(["compare", out, "--scan", scan, "--bootstrap", "40", "--reference-populations", reference]) == 0
    assert main(["kinetics", out, "--bootstrap", "50", "--lag-ps", "1", "2", "5"]) == 0
    assert main(["couplings", out, "--relation", "karplus-1959", "--types", "BUT:C1-C2-C3-C4",
                 "--experimental", experimental]) == 0
    return out


@pytest.fixture(scope="session")
def full_folder(tmp_path_factory):
    """A results folder with every step run (read only: tests copy it before writing)."""
    return build_folder(str(tmp_path_factory.mktemp("full")))


@pytest.fixture(scope="session")
def track_only_folder(tmp_path_factory):
    """A results folder with only the outputs of 'dihedra track'."""
    return build_folder(str(tmp_path_factory.mktemp("trackonly")), full=False)


@pytest.fixture(scope="session")
def protein_folder(tmp_path_factory):
    """The CHARMM adenylate kinase of MDAnalysisTests (214 residues, 98 frames): backbone tracked with
    the angles, a Ramachandran map of alanine, kinetics with the default options (read only)."""
    from MDAnalysisTests import datafiles as data

    from dihedra.cli import main

    out = str(tmp_path_factory.mktemp("protein") / "results")
    assert main(["track", data.PSF, data.DCD, "--torsions", "protein-backbone", "--keep-angles", "--temperature",
                 "300", "--out", out]) == 0
    assert main(["profile", out, "--pair", "ALA:phi", "ALA:psi", "--types-only", "--bootstrap", "40"]) == 0
    assert main(["kinetics", out, "--bootstrap", "50"]) == 0
    return out
