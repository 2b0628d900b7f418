"""Wrong inputs never give a confident result: each is refused before any work, with one error line
(exit 2, no traceback, nothing written), or analysed with a plain notice.

Run through the command line in this process (``dihedra.cli.main``) on copies of the bundled
n-hexane example cut to 100 frames; the damaged XTC files are those of ``robustness_files``.
"""

import os
import shutil
import subprocess
import sys

import numpy as np
import pytest

from dihedra import example_path, load_results, track
from dihedra.cli import main
from dihedra.errors import DihedraError, InputFileError
from robustness_files import (cut_mid_frame, damaged_xtc_variants, leftovers, nan_overflow_xtc, refused, short_xtc,
                              working_copy)
from test_safe_outputs import snapshot

REPO = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))


@pytest.fixture(scope="module")
def base(tmp_path_factory):
    """The example cut to 100 frames, and a results folder of it with profiles and kinetics."""
    folder = tmp_path_factory.mktemp("robust")
    shutil.copy(example_path("hexane.pdb"), folder)
    short_xtc(example_path("hexane.pdb"), example_path("hexane.xtc"), str(folder / "hexane.xtc"), 100)
    shutil.copy(example_path("trappe_ua_torsion.toml"), folder)
    cwd = os.getcwd()
    os.chdir(folder)
    try:
        assert main(["track", "hexane.pdb", "hexane.xtc", "--torsions", "rotatable", "--out", "res", "--keep-angles",
                     "--temperature", "300"]) == 0
        assert main(["profile", "res", "--bootstrap", "20"]) == 0
        assert main(["kinetics", "res", "--bootstrap", "20"]) == 0
    finally:
        os.chdir(cwd)
    return folder


@pytest.fixture
def work(base, tmp_path, monkeypatch):
    """A fresh copy of the inputs and the results folder, as the current folder."""
    return working_copy(base, tmp_path, monkeypatch)


def no_staging(folder):
    return not leftovers(folder)


TRACK = ["track", "hexane.pdb", "hexane.xtc", "--torsions", "rotatable", "--out", "out"]


# ----------------------------------------------------------------------------------------------
# values
# ----------------------------------------------------------------------------------------------

@pytest.mark.parametrize("extra, fragment", [
    (["--dt-ps", "0"], "dt_ps"), (["--dt-ps", "-1"], "dt_ps"), (["--dt-ps", "nan"], "dt_ps"),
    (["--step", "-1"], "step"), (["--step", "0"], "step"),
    (["--temperature", "0"], "temperature"), (["--temperature", "-5"], "temperature"),
    (["--temperature", "nan"], "temperature"), (["--temperature", "inf"], "temperature"),
    (["--workers", "0"], "workers"), (["--workers", "-2"], "workers"),
    (["--threads", "3"], "--threads"), (["--start", "5000"], "are none of its 100 frames"),
])
def test_hostile_track_options_are_refused_before_any_work(work, capsys, extra, fragment):
    refused(capsys, TRACK + extra, fragment)
    assert not os.path.exists(work / "out") and no_staging(work)


@pytest.mark.parametrize("argv, fragment", [
    # (the folder holds profiles and kinetics already: --overwrite, so that the value is what is refused)
    (["profile", "res", "--bootstrap", "0"], "at least 20"), (["profile", "res", "--bootstrap", "-3"], "at least 20"),
    (["compare", "res", "--scan", "trappe_ua_torsion.toml", "--type", "all", "--bootstrap", "0"], "at least 20"),
    (["kinetics", "res", "--overwrite", "--bootstrap", "-1"], "bootstrap"),
    (["profile", "res", "--overwrite", "--temperature", "-1"], "temperature"),
    (["profile", "res", "--overwrite", "--bin-width", "7"], "bin"),
    (["kinetics", "res", "--overwrite", "--lag", "0"], "lags"),
    (["kinetics", "res", "--overwrite", "--lag-ps", "0"], "lag 0 ps"),
    (["kinetics", "res", "--overwrite", "--lag-ps", "-2"], "lag -2 ps"),
    (["kinetics", "res", "--overwrite", "--lag-ps", "nan"], "lag nan ps"),
    (["kinetics", "res", "--overwrite", "--lag-ps", "0.5"], "multiples"),
    (["kinetics", "res", "--overwrite", "--dt-ps", "0"], "dt"),
    (["refit", "res", "--target", "res", "--bootstrap", "0"], "n_bootstrap"),
    (["refit", "res", "--target", "res", "--bootstrap", "-3"], "n_bootstrap"),
    (["kinetics", "res", "--types", "nosuch", "--overwrite"], "nosuch"),
    (["figures", "res", "--types", "nosuch", "--format", "png"], "nosuch"),
    (["compare", "res", "--scan", "trappe_ua_torsion.toml", "--scan-angle-unit", "rad"], "parameter file"),
])
def test_hostile_analysis_options_are_refused(work, capsys, argv, fragment):
    before = snapshot(work / "res")
    refused(capsys, argv, fragment)
    assert snapshot(work / "res") == before


def test_kinetics_of_a_single_frame_is_refused(work, capsys):
    # one frame has no pair of consecutive frames: no transition, no dwell time (common practice);
    # one error line, even with a time step given, and the folder stays as it was
    track("hexane.pdb", ["hexane.xtc"], torsions="rotatable", stop=1, out="one")
    before = snapshot(work / "one")
    refused(capsys, ["kinetics", "one", "--dt-ps", "10"], "at least 2 frames in a replica", "1 frame (1 replica(s))")
    assert snapshot(work / "one") == before


@pytest.mark.parametrize("extra, fragment", [(["--workers", "0"], "workers"), (["--step", "-1"], "step"),
                                             (["--bootstrap", "0"], "at least 20")])
def test_hostile_window_options_are_refused_before_the_first_window(work, capsys, extra, fragment):
    with open("w.csv", "w") as fh:
        fh.write("trajectory,topology,torsions,centre_deg,k_kj_mol_rad2\n"
                 "hexane.xtc,hexane.pdb,rotatable,0,100\nhexane.xtc,hexane.pdb,rotatable,60,100\n")
    capsys.readouterr()
    assert main(["windows", "w.csv", "--temperature", "300", "--out", "wout", *extra]) == 2
    err = capsys.readouterr().err
    assert err.strip().splitlines() == [line for line in err.strip().splitlines() if line.startswith("dihedra: error:")]
    assert len(err.strip().splitlines()) == 1 and fragment in err and not os.path.exists("wout"), err


def test_the_api_refuses_the_same_values(work):
    from dihedra import TorsionStates, free_energy_profiles
    import MDAnalysis as mda

    for kwargs in ({"dt_ps": 0}, {"temperature_k": float("nan")}, {"step": -1}, {"workers": 0}, {"threads": 3},
                   {"bin_width_deg": 7}):
        with pytest.raises(DihedraError):
            track("hexane.pdb", ["hexane.xtc"], out="api-out", **kwargs)
        assert not os.path.exists("api-out")
    u = mda.Universe("hexane.pdb", "hexane.xtc")
    with pytest.raises(DihedraError, match="temperature"):
        TorsionStates(u.atoms, "rotatable", temperature_k=-1)
    with pytest.raises(DihedraError, match="step"):
        TorsionStates(u.atoms, "0,1,2,3").run(step=-1)
    with pytest.raises(DihedraError, match="at least 20"):
        free_energy_profiles(load_results("res"), n_bootstrap=0)


# ----------------------------------------------------------------------------------------------
# input files
# ----------------------------------------------------------------------------------------------

def test_weights_with_a_frame_given_twice_are_refused(work, capsys):
    rows = ["replica,frame,weight"] + [f"0,{f},1.0" for f in range(100)] + ["0,5,3.0"]
    (work / "w.csv").write_text("\n".join(rows) + "\n")
    refused(capsys, TRACK + ["--weights", "w.csv"], "replica 0, frame 5 2 times", "rows 6, 101")
    (work / "w.csv").write_text("replica,frame,weight\n" + "".join(f"0,{f + 0.5},1\n" for f in range(100)))
    refused(capsys, TRACK + ["--weights", "w.csv"], "not a whole number")


def test_a_scan_with_two_energies_at_one_angle_is_refused(work, capsys):
    points = "".join(f"{a},{abs(a) / 30}\n" for a in range(-180, 180, 30))
    (work / "scan.csv").write_text("angle_deg,energy_kj_mol\n" + points + "60,9.5\n")
    refused(capsys, ["compare", "res", "--scan", "scan.csv", "--type", "all"], "angle 60 deg 2 times")
    # -180 and 180 with the same energy are one point given twice (a closed scan): accepted
    from dihedra.analysis.scans import read_scan
    (work / "closed.csv").write_text("angle_deg,energy_kj_mol\n" + points + "180,6.0\n")
    assert len(read_scan("closed.csv").angle_deg) == 12
    (work / "one.csv").write_text("angle_deg\n" + "".join(f"{a}\n" for a in range(-180, 180, 30)))
    refused(capsys, ["compare", "res", "--scan", "one.csv", "--type", "all"], "1 column")


def test_experimental_couplings_of_coupled_atoms_the_torsion_has_not_are_refused(work, capsys):
    # a united-atom hexane torsion taken as an H-C-C-H one couples its end atoms C1,C4, not H1,H2
    (work / "exp.csv").write_text('torsion,coupled_atoms,J_hz,J_err_hz\nHEX:C1-C2-C3-C4,"H1,H2",5,0.5\n')
    before = snapshot(work / "res")
    refused(capsys, ["couplings", "res", "--relation", "karplus-1959", "--types", "HEX:C1-C2-C3-C4",
                     "--experimental", "exp.csv"], "'H1,H2'", "C1,C4")
    assert snapshot(work / "res") == before


@pytest.mark.parametrize("atoms, fragment", [("[0, 1, 2, 3.7]", "whole numbers"), ('["0", "1", "2", "3"]', "whole"),
                                             ('"0,1,2,3"', "list of four"), ("[0, 1, 2, 99999]", "out of range")])
def test_torsion_files_need_whole_atom_indices(work, capsys, atoms, fragment):
    (work / "t.toml").write_text(f'[[torsion]]\nname = "t"\natoms = {atoms}\n')
    refused(capsys, ["track", "hexane.pdb", "hexane.xtc", "--torsions", "t.toml", "--out", "out"], fragment)


def test_a_trajectory_given_as_topology_and_a_folder_as_csv(work, capsys):
    refused(capsys, ["track", "hexane.xtc", "hexane.xtc", "--torsions", "rotatable", "--out", "out"],
            "trajectory format")
    os.mkdir(work / "sub")
    refused(capsys, ["torsions", "hexane.pdb", "--torsions", "rotatable", "--csv", "sub"], "is a folder")


@pytest.mark.parametrize("ext", ["xtc", "dcd", "trr"])
@pytest.mark.parametrize("content", [b"", bytes(range(256)) * 64], ids=["empty", "garbage"])
def test_empty_and_garbage_trajectories(work, capsys, ext, content):
    (work / f"bad.{ext}").write_bytes(content)
    refused(capsys, ["track", "hexane.pdb", f"bad.{ext}", "--torsions", "rotatable", "--out", "out"])
    assert not os.path.exists(work / "out") and no_staging(work)


@pytest.mark.parametrize("label", list(damaged_xtc_variants()))
def test_a_damaged_xtc_frame_is_one_error_naming_the_readable_frames(work, capsys, label):
    damaged_xtc_variants()[label](str(work / "hexane.xtc"), str(work / "bad.xtc"))
    line = refused(capsys, ["track", "hexane.pdb", "bad.xtc", "--torsions", "rotatable", "--out", "out"], "damaged")
    frame = 0 if "frame 0" in label else 50
    assert f"frame {frame}" in line
    if frame:
        assert "frames 0-49 can be read" in line and "--stop 50" in line
    assert not os.path.exists(work / "out") and no_staging(work)


def test_a_garbled_xtc_frame_decoded_by_the_second_thread_is_the_same_error(work, capsys, monkeypatch):
    # the computing thread decodes the frames of every batch here (FrameWork.later_frames): the
    # frame it cannot decode is refused as when the reading thread meets it, the folder not made
    from dihedra.trajectory.frame_work import FrameWork
    from dihedra.trajectory.trajread import XTCFrames

    damaged_xtc_variants()["whose frame 50 has a garbled bit stream"](str(work / "hexane.xtc"), str(work / "bad.xtc"))
    args = ["track", "hexane.pdb", "bad.xtc", "--torsions", "rotatable", "--out", "out", "--threads", "2"]
    line = refused(capsys, args, "damaged")
    monkeypatch.setattr(FrameWork, "later_frames", lambda self, n: n)
    decoded = []
    original = XTCFrames.decode_later
    monkeypatch.setattr(XTCFrames, "decode_later", lambda self, later: (decoded.append(later.n), original(self, later)))
    assert refused(capsys, args, "damaged") == line and "frame 50" in line
    assert sum(decoded) >= 50
    assert not os.path.exists(work / "out") and no_staging(work)


@pytest.mark.parametrize("window", [700, 5000, 1 << 20])
def test_the_headers_of_an_xtc_checked_window_by_window(work, monkeypatch, window):
    # the frame headers are checked a few MB of the file at a time (here windows smaller than a
    # frame, of a few frames, of the whole file): the same frames, the same first damaged frame,
    # the same cut last frame as one map of the file
    from dihedra.errors import InputFileError
    from dihedra.trajectory import inputs

    whole = inputs.check_xtc(str(work / "hexane.xtc"))   # (one map: the file is smaller than the default)
    assert whole[0] > 50 and whole[1] is None
    monkeypatch.setattr(inputs, "SCAN_WINDOW", window)
    assert inputs.check_xtc(str(work / "hexane.xtc")) == whole
    headers = [v for v in damaged_xtc_variants() if "frame 50" in v and "bit stream" not in v]
    assert len(headers) >= 5
    for label in headers:   # (a garbled bit stream is found when the frame is decoded)
        damaged_xtc_variants()[label](str(work / "hexane.xtc"), str(work / "bad.xtc"))
        with pytest.raises(InputFileError, match="frame 50 .*frames 0-49 can be read"):
            inputs.check_xtc(str(work / "bad.xtc"))
    n = cut_mid_frame(str(work / "hexane.xtc"))
    frames, notice = inputs.check_xtc(str(work / "hexane.xtc"))
    assert frames == n and f"only the {n} complete frames" in notice


def test_an_xtc_written_with_nan_coordinates_never_crashes(work):
    # MDAnalysis' own reader corrupts its heap on this file (checked in a child process here);
    # dihedra refuses it with one line, in a child process too (a crash would be a signal)
    nan_overflow_xtc(str(work / "hexane.xtc"), str(work / "nan.xtc"))
    env = dict(os.environ, PYTHONPATH=REPO + os.pathsep + os.environ.get("PYTHONPATH", ""))
    run = subprocess.run([sys.executable, "-m", "dihedra", "track", "hexane.pdb", "nan.xtc", "--torsions",
                          "rotatable", "--out", "out", "--workers", "2", "--backend", "multiprocessing"],
                         capture_output=True, text=True, env=env,
                         timeout=120)
    assert run.returncode == 2, run.stderr
    assert run.stderr.strip().startswith("dihedra: error: trajectory nan.xtc is damaged: frame 10 has an "
                                         "overflowed coordinate range"), run.stderr
    assert "frames 0-9 can be read" in run.stderr


def test_an_xtc_cut_inside_its_last_frame_is_analysed_up_to_it(work, capsys):
    n = cut_mid_frame(str(work / "hexane.xtc"))
    assert main(TRACK) == 0
    err = capsys.readouterr().err
    assert f"only the {n} complete frames are used" in err
    assert load_results("out").summary["n_frames_analysed"] == n


def test_a_trajectory_of_nan_coordinates_gives_nan_populations(work, capsys):
    import MDAnalysis as mda
    import warnings

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        u = mda.Universe("hexane.pdb")
        with mda.Writer("nan.dcd", u.atoms.n_atoms) as w:
            for _ in range(20):
                u.atoms.positions = np.full((u.atoms.n_atoms, 3), np.nan, dtype=np.float32)
                w.write(u.atoms)
    res = track("hexane.pdb", ["nan.dcd"], torsions="rotatable")
    # no defined frame: nothing is known; never 0 +- 0 from infinitely many effective samples
    assert res.populations["population"].isna().all() and res.populations["population_err"].isna().all()
    assert (res.populations["n_effective"] == 0).all()
    assert res.populations_by_type["population_err"].isna().all()
    assert (res.populations_by_type["n_torsions"] == 0).all()
    assert any("no defined frame at all" in n for n in res.notices)


# ----------------------------------------------------------------------------------------------
# damaged results folders
# ----------------------------------------------------------------------------------------------

def _cut(path, keep=0.5):
    lines = open(path, encoding="utf-8").read().splitlines(True)
    text = "".join(lines[:max(2, int(len(lines) * keep))])
    open(path, "w", encoding="utf-8").write(text[:-7])


def _cut_at_line(path, keep=0.5):
    lines = open(path, encoding="utf-8").read().splitlines(True)
    open(path, "w", encoding="utf-8").write("".join(lines[:int(len(lines) * keep) + 1]))


def _truncate(path, keep):
    with open(path, "r+b") as fh:
        fh.truncate(int(os.path.getsize(path) * keep))


def _first_part(folder):
    return os.path.join(folder, sorted(os.listdir(folder))[0])


DAMAGE = {
    "corrupt summary.json": (lambda: open("res/summary.json", "w").write('{"scheme": [1, 2'), "summary.json"),
    "summary.json of another shape": (lambda: open("res/summary.json", "w").write("[1, 2]\n"), "summary.json"),
    "truncated blocks.npz": (lambda: _truncate("res/blocks.npz", 0.5), "blocks.npz"),
    "truncated histograms.parquet": (lambda: _truncate("res/histograms.parquet", 0.5), "histograms.parquet"),
    "torsions.csv cut in a line": (lambda: _cut("res/torsions.csv"), "torsions.csv"),
    "torsions.csv cut at a line": (lambda: _cut_at_line("res/torsions.csv"), "torsions.csv"),
    "populations.csv cut at a line": (lambda: _cut_at_line("res/populations.csv"), "populations.csv"),
    "populations_by_type.csv cut at a line": (lambda: _cut_at_line("res/populations_by_type.csv"),
                                              "populations_by_type.csv"),
    "empty torsions.csv": (lambda: open("res/torsions.csv", "w").close(), "torsions.csv"),
}


@pytest.mark.parametrize("label", list(DAMAGE))
@pytest.mark.parametrize("command", [["profile", "res", "--bootstrap", "20"], ["kinetics", "res", "--bootstrap", "20"],
                                     ["figures", "res", "--format", "png"], ["report", "res", "--no-figures"]],
                         ids=lambda c: c[0])
def test_a_damaged_results_folder_is_one_error_and_stays_as_it_is(work, capsys, label, command):
    spoil, name = DAMAGE[label]
    spoil()
    before = snapshot(work / "res")
    refused(capsys, command, name)
    assert snapshot(work / "res") == before


@pytest.mark.parametrize("command", [["figures", "res", "--format", "png"], ["report", "res"]], ids=lambda c: c[0])
def test_profiles_cut_short_give_no_figures(work, capsys, command):
    _cut_at_line("res/profiles.csv", 0.37)
    before = snapshot(work / "res")
    refused(capsys, command, "profiles.csv", "cut short")
    assert snapshot(work / "res") == before


@pytest.mark.parametrize("command", [["kinetics", "res", "--overwrite", "--assignment", "crisp"],
                                     ["kinetics", "res", "--overwrite"], ["figures", "res", "--format", "png"]],
                         ids=["crisp", "core", "figures"])
def test_a_damaged_parquet_file_is_one_error(work, capsys, command):
    for kind in ("states", "angles"):
        _truncate(_first_part(f"res/{kind}.parquet"), 0.4)
    before = snapshot(work / "res")
    refused(capsys, command, ".parquet")
    assert snapshot(work / "res") == before


def test_a_damaged_cores_file_is_one_error(work, capsys):
    shutil.rmtree("res/angles.parquet")   # kinetics reads the core bits of track when there are no angles
    _truncate(_first_part("res/cores.parquet"), 0.4)
    before = snapshot(work / "res")
    refused(capsys, ["kinetics", "res", "--overwrite"], "cores.parquet")
    assert snapshot(work / "res") == before


def test_load_results_checks_the_tables_against_the_blocks(work):
    _cut_at_line("res/torsions.csv", 0.5)
    with pytest.raises(InputFileError, match="block sums hold 300 torsions"):
        load_results("res")


# ----------------------------------------------------------------------------------------------
# names
# ----------------------------------------------------------------------------------------------

def test_paths_with_spaces_and_non_ascii_characters(work, capsys):
    data = work / "my data ñ"
    data.mkdir()
    shutil.copy("hexane.pdb", data / "hexane é.pdb")
    shutil.copy("hexane.xtc", data / "traj ü 1.xtc")
    out = work / "résultats 1"
    assert main(["track", str(data / "hexane é.pdb"), str(data / "traj ü 1.xtc"), "--torsions", "rotatable",
                 "--out", str(out), "--keep-angles", "--temperature", "300"]) == 0
    assert main(["profile", str(out), "--bootstrap", "20"]) == 0
    assert main(["report", str(out), "--no-figures"]) == 0
    assert load_results(out).summary["replicas"][0]["trajectory"].endswith("traj ü 1.xtc")
    assert (out / "report.html").exists()
