"""The command line: help, version, and one clear line for every kind of bad input."""

import json
import os
import subprocess
import sys

import numpy as np
import pytest

from conftest import chain_coordinates, write_system
from dihedra import __version__
from dihedra.cli import build_parser, main


@pytest.fixture(scope="module")
def system(tmp_path_factory):
    folder = tmp_path_factory.mktemp("cli")
    rng = np.random.default_rng(1)
    t = rng.uniform(-180, 180, size=(30, 4))
    return write_system(str(folder), chain_coordinates(t), box=[40, 40, 40, 90, 90, 90])


def run_cli(capsys, *args):
    code = main([str(a) for a in args])
    out, err = capsys.readouterr()
    return code, out, err


def assert_one_line_error(code, err, *fragments):
    assert code == 2
    lines = [line for line in err.strip().splitlines() if line.startswith("dihedra: error:")]
    assert len(lines) == 1, err
    assert "Traceback" not in err
    for f in fragments:
        assert f in lines[0], lines[0]


def test_help_and_version():
    res = subprocess.run([sys.executable, "-m", "dihedra", "--help"], capture_output=True, text=True)
    assert res.returncode == 0 and "track" in res.stdout and "torsions" in res.stdout
    res = subprocess.run([sys.executable, "-m", "dihedra", "--version"], capture_output=True, text=True)
    assert res.stdout.strip() == f"dihedra {__version__}"


def test_a_command_that_succeeded_ends_with_its_output_whole(system):
    # the process ends without the interpreter's teardown, after its exit handlers; a profiler
    # watching it still reports (it prints once the command has returned)
    top, _ = system
    command = ["-m", "dihedra", "torsions", top, "--torsions", "rotatable"]
    res = subprocess.run([sys.executable, *command], capture_output=True, text=True)
    assert res.returncode == 0 and res.stdout.rstrip().endswith("4 torsions of 1 types"), res.stdout[-300:]
    res = subprocess.run([sys.executable, "-m", "cProfile", "-s", "cumtime", *command], capture_output=True, text=True)
    assert res.returncode == 0 and "4 torsions of 1 types" in res.stdout and "Ordered by: cumulative time" in res.stdout


@pytest.mark.parametrize("command, option", [("figures", "--types"), ("kinetics", "--types"),
                                             ("report", "--types"), ("figures", "--torsions")])
def test_a_folder_after_a_many_valued_option_is_explained(tmp_path, capsys, command, option):
    # 'dihedra figures --types ALA:* DIR': the option takes DIR as one more value; the error says so
    # and how to give it (before the option, or after --, which then parses); --torsions: the
    # former name of figures' --types
    values = ["ALA:*", "GLY:*"]
    code, _, err = run_cli(capsys, command, option, *values, tmp_path)
    assert_one_line_error(code, err, "the following arguments are required: DIR",
                          f"{option} takes every value that follows it", f"give DIR before {option}", "--")
    assert build_parser(command).parse_args([command, option, *values, "--", str(tmp_path)]).folder == str(tmp_path)
    code, _, err = run_cli(capsys, command)   # no such option given: the plain message
    assert code == 2 and "takes every value" not in err


@pytest.mark.parametrize("small", [True, False])
def test_a_closed_output_pipe_ends_the_command_quietly(system, small):
    # 'dihedra torsions TOP | head': the reader gone before the table is written (here from the
    # start); the process ends as one killed by SIGPIPE is reported, 128 + 13 (common practice), without
    # an error; a small table fails at the last flush, a long one (300 rows) while it is printed
    top = system[0] if small else os.path.join(os.path.dirname(__file__), "..", "example_trajectories", "hexane.pdb")
    proc = subprocess.Popen([sys.executable, "-m", "dihedra", "torsions", top, "--torsions", "rotatable"],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    proc.stdout.close()
    err = proc.stderr.read()
    assert proc.wait(timeout=120) == 141 and err == "", err


def test_track_loads_mdanalysis_without_rdkit_and_rdkit_still_imports_after():
    # MDAnalysis loads RDKit (about 40 MB) for its converter when RDKit is installed; the track
    # command never converts, so its process imports MDAnalysis with RDKit held back
    pytest.importorskip("rdkit")
    code = ("import sys; from dihedra.cli import import_mdanalysis_without_rdkit as f; f(); "
            "import MDAnalysis; assert 'rdkit' not in sys.modules, 'rdkit loaded'; "
            "import MDAnalysis.converters.RDKitInferring as i; assert i.RDBONDORDER == {}; "
            "from rdkit import Chem; print(Chem.MolFromSmiles('CCCC').GetNumAtoms())")
    res = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True)
    assert res.returncode == 0, res.stderr
    assert res.stdout.strip() == "4"
    # a process that has MDAnalysis already (an API user's session) is left as it is
    code = ("import sys, MDAnalysis; from dihedra.cli import import_mdanalysis_without_rdkit as f; f(); "
            "import MDAnalysis.converters.RDKitInferring as i; print(len(i.RDBONDORDER) > 0)")
    res = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True)
    assert res.returncode == 0 and res.stdout.strip() == "True", res.stderr


def test_track_writes_folder_and_prints_populations(system, tmp_path, capsys):
    top, traj = system
    code, out, err = run_cli(capsys, "track", top, traj, "--torsions", "rotatable", "--out", tmp_path / "r")
    assert code == 0
    assert "anti" in out and "±" in out
    assert os.path.exists(tmp_path / "r" / "populations.csv")


def test_torsions_lists_without_a_trajectory(system, tmp_path, capsys):
    top, _ = system
    code, out, _ = run_cli(capsys, "torsions", top, "--torsions", "rotatable", "--csv", tmp_path / "t.csv")
    assert code == 0
    assert "BUT1:C1-C2-C3-C4" in out and "4 torsions of 1 types" in out
    assert (tmp_path / "t.csv").read_text().startswith("torsion,type,atom_indices,atom_names")


@pytest.mark.parametrize("args, fragments", [
    (["--torsions", "0,1,2,99"], ["atom index 99 is out of range", "16 atoms"]),
    (["--torsions", "0,1,1,2"], ["repeated atoms"]),
    (["--torsions", "backbone"], ["unknown torsion specification 'backbone'", "rotatable"]),
    (["--torsions", "0,1,2,3", "--scheme", "gauche"], ["unknown state scheme", "klyne-prelog", "auto or basins"]),
    (["--torsions", "0,1,2,3", "--start", "100"], ["frames from frame 100 to the end are none of its 30 frames",
                                                    "--start"]),
])
def test_bad_options_give_one_line_and_write_nothing(system, tmp_path, capsys, args, fragments):
    top, traj = system
    code, _, err = run_cli(capsys, "track", top, traj, "--out", tmp_path / "r", *args)
    assert_one_line_error(code, err, *fragments)
    assert "=None" not in err   # a range in words, not Python's None
    assert os.listdir(tmp_path) == []


@pytest.mark.parametrize("args, line", [
    (["track", "{top}", "{traj}", "--torsions", "rotatable", "--out", "{out}", "-q"],
     "dihedra: error: unrecognized arguments: -q (see 'dihedra track --help')."),
    (["-q"], "dihedra: error: unrecognized arguments: -q (see 'dihedra --help')."),
    (["track", "{top}", "{traj}", "--torsions", "rotatable", "--out", "{out}", "--stop", "x"],
     "dihedra: error: dihedra track: argument --stop: invalid int value: 'x' (see 'dihedra track --help')."),
])
def test_usage_errors_name_dihedra_once_and_the_help_to_read(system, tmp_path, capsys, args, line):
    top, traj = system
    code, _, err = run_cli(capsys, *[a.format(top=top, traj=traj, out=tmp_path / "r") for a in args])
    assert code == 2 and err.strip() == line
    assert os.listdir(tmp_path) == []


def test_missing_file_and_atom_count_mismatch(system, tmp_path, capsys):
    top, traj = system
    code, _, err = run_cli(capsys, "track", top, tmp_path / "nope.xtc", "--torsions", "0,1,2,3",
                           "--out", tmp_path / "r")
    assert_one_line_error(code, err, "does not exist")
    other = write_system(str(tmp_path), chain_coordinates(np.zeros((2, 3))), stem="small")
    code, _, err = run_cli(capsys, "track", top, other[1], "--torsions", "0,1,2,3", "--out", tmp_path / "r")
    assert_one_line_error(code, err, "has 16 atoms", "has 12")
    assert not os.path.exists(tmp_path / "r")


def xtc_offsets(top, traj):
    import MDAnalysis as mda
    return mda.Universe(top, traj).trajectory._xdr.offsets


def test_a_last_frame_cut_near_its_end_is_left_out_with_a_notice(system, tmp_path, capsys):
    # cut inside the last bytes of frame 20: MDAnalysis counts 21 frames and raises on the last;
    # dihedra analyses the 20 complete ones (a run cut while writing) and says so
    top, traj = system
    off = xtc_offsets(top, traj)
    data = open(traj, "rb").read()
    cut = tmp_path / "cut.xtc"
    cut.write_bytes(data[: off[21] - 4])
    code, _, err = run_cli(capsys, "track", top, cut, "--torsions", "0,1,2,3", "--out", tmp_path / "r")
    assert code == 0
    assert "ends with an incomplete frame" in err and "20 complete frames" in err
    assert json.load(open(tmp_path / "r" / "summary.json"))["n_frames_analysed"] == 20


def test_a_damaged_frame_names_the_frames_that_can_be_read(system, tmp_path, capsys):
    # frame 12 of 30 does not start with the magic number: an error naming frames 0-11 and --stop 12
    top, traj = system
    off = xtc_offsets(top, traj)
    data = bytearray(open(traj, "rb").read())
    data[off[12]:off[12] + 4] = (1996).to_bytes(4, "big")
    bad = tmp_path / "bad.xtc"
    bad.write_bytes(bytes(data))
    code, _, err = run_cli(capsys, "track", top, bad, "--torsions", "0,1,2,3", "--out", tmp_path / "r")
    assert_one_line_error(code, err, "damaged", "frame 12", "frames 0-11 can be read", "--stop 12")
    assert not os.path.exists(tmp_path / "r")


def test_trailing_partial_frame_is_reported(system, tmp_path, capsys):
    # cut early inside frame 20: MDAnalysis silently sees 20 frames; dihedra says so
    top, traj = system
    off = xtc_offsets(top, traj)
    data = open(traj, "rb").read()
    cut = tmp_path / "cut.xtc"
    cut.write_bytes(data[: off[20] + 60])
    code, _, err = run_cli(capsys, "track", top, cut, "--torsions", "0,1,2,3", "--out", tmp_path / "r")
    assert code == 0
    assert "ends with an incomplete frame" in err and "20 complete frames" in err


def test_selection_in_toml_must_give_four_atoms(system, tmp_path, capsys):
    top, traj = system
    toml = tmp_path / "t.toml"
    toml.write_text('[[torsion]]\nname = "x"\nselection = "resid 1 2"\n')
    code, _, err = run_cli(capsys, "track", top, traj, "--torsions", toml, "--out", tmp_path / "r")
    assert_one_line_error(code, err, "exactly four atoms", "gives 8")


def test_toml_named_torsions_by_selection(system, tmp_path, capsys):
    top, traj = system
    toml = tmp_path / "t.toml"
    toml.write_text('[[torsion]]\nname = "first-chain"\nselection = "resid 1"\n'
                    '[[torsion]]\nname = "second-chain"\natoms = [4, 5, 6, 7]\n')
    code, out, _ = run_cli(capsys, "torsions", top, "--torsions", toml)
    assert code == 0 and "first-chain" in out and "second-chain" in out



@pytest.mark.parametrize("option", ["--torsions", "--scheme"])
def test_toml_file_that_is_not_text_is_one_line_error(system, tmp_path, capsys, option):
    # TOML is UTF-8 (TOML 1.0 specification); bytes that are not UTF-8 are the user's file
    # at fault, said in one line, not a traceback from the decoder
    top, traj = system
    bad = tmp_path / "bad.toml"
    bad.write_bytes(b"\xff\xfe\x00[[torsion]]")
    args = ["--torsions", bad] if option == "--torsions" else ["--torsions", "0,1,2,3", "--scheme", bad]
    code, _, err = run_cli(capsys, "track", top, traj, *args, "--out", tmp_path / "r")
    assert_one_line_error(code, err, "bad.toml is not valid TOML", "utf-8")
    assert not os.path.exists(tmp_path / "r")

def test_existing_output_folder_is_left_untouched(system, tmp_path, capsys):
    top, traj = system
    out = tmp_path / "r"
    out.mkdir()
    (out / "keep.txt").write_text("mine")
    code, _, err = run_cli(capsys, "track", top, traj, "--torsions", "0,1,2,3", "--out", out)
    assert_one_line_error(code, err, "already exists", "--overwrite")
    assert os.listdir(out) == ["keep.txt"]
    # --overwrite replaces only a folder dihedra made, holding nothing but its own files
    code, _, err = run_cli(capsys, "track", top, traj, "--torsions", "0,1,2,3", "--out", out, "--overwrite")
    assert_one_line_error(code, err, "not made by dihedra")
    assert os.listdir(out) == ["keep.txt"]


def test_read_only_trajectory_folder_still_works_with_a_notice(system, tmp_path, capsys, monkeypatch):
    # MDAnalysis cannot write its offset cache beside a trajectory in a read-only folder; simulate
    # that (tests may run as root, where permissions do not stop writes)
    import MDAnalysis.coordinates.XDR as xdr
    top, traj = system

    class ReadOnlyLock:
        def __init__(self, *a, **k):
            pass

        def __enter__(self):
            raise PermissionError(13, "Permission denied")

        def __exit__(self, *a):
            return False

    monkeypatch.setattr(xdr.filelock, "FileLock", ReadOnlyLock)
    fresh = tmp_path / "copy.xtc"
    fresh.write_bytes(open(traj, "rb").read())
    code, out, err = run_cli(capsys, "track", top, fresh, "--torsions", "0,1,2,3", "--out", tmp_path / "r")
    assert code == 0
    assert "read-only" in err and "Traceback" not in err


def test_complete_xtc_gives_no_incomplete_frame_notice(system, capsys):
    from dihedra.trajectory.inputs import load_universe
    top, traj = system
    notices = []
    load_universe(top, traj, notices)
    assert notices == []


def test_types_take_shell_style_patterns(tmp_path, capsys):
    # fnmatch's patterns (Python's standard library), matched against the folder's own types
    import argparse

    from dihedra.cli.common import expand_types_option

    folder = tmp_path / "res"
    folder.mkdir()
    (folder / "torsions.csv").write_text("torsion,type\nL1:a,POPE:C22-C23\nL1:b,POPE:C210-C211\nL1:c,ALA:phi\n")
    args = argparse.Namespace(folder=str(folder), types=["POPE:C2*", "ALA:phi", "POPE:C22-C23"])
    expand_types_option(args)
    assert args.types == ["POPE:C22-C23", "POPE:C210-C211", "ALA:phi"]
    plain = argparse.Namespace(folder=str(folder), types=["ALA:phi"])
    expand_types_option(plain)
    assert plain.types == ["ALA:phi"]
    code, _, err = run_cli(capsys, "kinetics", folder, "--types", "GLY:*")
    assert_one_line_error(code, err, "GLY:*", "matches")
    every = argparse.Namespace(folder=str(folder), types=["all"])   # 'all': every type, in every command
    expand_types_option(every)
    assert every.types == ["POPE:C22-C23", "POPE:C210-C211", "ALA:phi"]
    (folder / "torsions.csv").write_text("torsion,type\nL1:a,all\nL1:c,ALA:phi\n")
    named = argparse.Namespace(folder=str(folder), types=["all"])   # (unless a type has that name)
    expand_types_option(named)
    assert named.types == ["all"]


def test_printed_errors_that_round_to_zero_carry_no_sign():
    from dihedra.analysis.refit.exports import _circular_sd_deg
    from dihedra.cli.common import format_pm

    # phases that agree in every bootstrap refit: sqrt(-2 ln 1) is a negative zero in IEEE 754,
    # which the refit's error no longer carries; the printing drops the sign of any such zero
    err = _circular_sd_deg(np.array([[180.0], [180.0], [180.0]]))[0]
    assert err == 0.0 and not np.signbit(err)
    assert format_pm(180.0, -0.0, 1) == "180.0 ± 0.0"
    assert format_pm(0.25, -0.0004) == "0.250 ± 0.000" and format_pm(-0.0004, 0.0002) == "0.000 ± 0.000"
    assert format_pm(-0.25, 0.01) == "-0.250 ± 0.010"   # a value that does not round to zero keeps its sign
