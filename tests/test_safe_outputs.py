"""No command deletes or overwrites a file it did not create.

Each case is run on real folders through the command line (``dihedra.cli.main``), and checks that
the command ends with one error line and exit status 2 and that every file that was there before
is still there, byte for byte.
"""

import hashlib
import json
import os
import shutil

import pytest

from dihedra import example_path
from dihedra.cli import main
from dihedra.errors import OutputExistsError
from dihedra.io.outputs import (MARKER, check_folder_target, file_set, read_marker, remove_listed_files, write_file,
                             write_text)
from dihedra.io.staging import StagedFolder, remove_dead_staging

HEXANE = ("hexane.pdb", "hexane.xtc")


def snapshot(folder):
    """Every file below ``folder`` with the SHA-256 of its bytes."""
    out = {}
    for root, _, files in os.walk(folder):
        for name in files:
            path = os.path.join(root, name)
            with open(path, "rb") as fh:
                out[os.path.relpath(path, folder)] = hashlib.sha256(fh.read()).hexdigest()
    return out


@pytest.fixture
def data(tmp_path):
    """A user's data folder: the example topology and trajectory and a notes file."""
    folder = tmp_path / "data folder ü"   # spaces and non-ASCII on purpose
    folder.mkdir()
    for name in HEXANE:
        shutil.copy(example_path(name), folder / name)
    (folder / "NOTES.md").write_text("my notes\n")
    return folder


def track_argv(data, out, *extra):
    return ["track", str(data / "hexane.pdb"), str(data / "hexane.xtc"), "--torsions", "rotatable",
            "--stop", "5", "--out", str(out), *extra]


def refused(argv, capsys, *needles):
    capsys.readouterr()
    assert main(argv) == 2
    err = capsys.readouterr().err.strip().splitlines()
    errors = [line for line in err if line.startswith("dihedra: error: ")]
    assert len(errors) == 1 and err[-1] == errors[0] and "Traceback" not in "\n".join(err), err
    for needle in needles:
        assert needle in errors[0], errors[0]
    return errors[0]


@pytest.mark.parametrize("target", ["data", "dot", "empty", "parent"])
def test_track_overwrite_never_replaces_the_data_folder_the_current_folder_or_a_parent(
        data, target, capsys, monkeypatch):
    before = snapshot(data.parent)
    sub = data / "sub"
    sub.mkdir()
    monkeypatch.chdir(sub if target == "parent" else data)
    out = {"data": str(data), "dot": ".", "empty": "", "parent": ".."}[target]
    refused(track_argv(data, out, "--overwrite"), capsys)
    sub.rmdir()
    assert snapshot(data.parent) == before
    assert not [n for n in os.listdir(data.parent) if n.startswith(".")]


def test_an_old_results_folder_with_a_users_files_is_not_replaced(data, capsys, tmp_path):
    out = tmp_path / "results"
    assert main(track_argv(data, out)) == 0
    marker = read_marker(out)
    assert marker["command"] == "track" and "populations.csv" in marker["files"]
    (out / "NOTES.md").write_text("what I saw\n")
    (out / "plots").mkdir()
    (out / "plots" / "mine.png").write_bytes(b"\x89PNG")
    before = snapshot(out)
    refused(track_argv(data, out, "--overwrite"), capsys, "NOTES.md", "plots/mine.png")
    assert snapshot(out) == before
    # without the user's files the folder is replaced (a new run id), and nothing else is left behind
    os.remove(out / "NOTES.md")
    shutil.rmtree(out / "plots")
    assert main(track_argv(data, out, "--overwrite")) == 0
    assert read_marker(out)["run_id"] != marker["run_id"]
    assert sorted(os.listdir(tmp_path)) == ["data folder ü", "results"]


def test_overwrite_refuses_a_folder_dihedra_did_not_make(tmp_path, capsys, data):
    mine = tmp_path / "mine"
    mine.mkdir()
    (mine / "populations.csv").write_text("a,b\n1,2\n")
    refused(track_argv(data, mine, "--overwrite"), capsys, MARKER)
    assert (mine / "populations.csv").read_text() == "a,b\n1,2\n"


def test_an_empty_folder_is_filled_without_overwrite(tmp_path, data):
    out = tmp_path / "made by make"
    out.mkdir()
    assert main(track_argv(data, out)) == 0
    assert read_marker(out) is not None


def test_two_runs_into_one_new_folder_the_second_is_refused(tmp_path):
    out = tmp_path / "twin"
    first = StagedFolder.begin(out, command="track")
    second = StagedFolder.begin(out, command="track")
    write_text(first.path, "a.txt", "first\n", marked=False)
    write_text(second.path, "a.txt", "second\n", marked=False)
    first.commit()
    with pytest.raises(OutputExistsError, match="appeared while this run was working"):
        second.commit()
    second.discard()
    assert (out / "a.txt").read_text() == "first\n"
    assert sorted(os.listdir(tmp_path)) == ["twin"]


def test_two_overwriting_runs_the_second_is_refused_and_the_first_result_kept(tmp_path):
    out = tmp_path / "twin"
    seed = StagedFolder.begin(out)
    seed.commit()
    first = StagedFolder.begin(out, overwrite=True)
    second = StagedFolder.begin(out, overwrite=True)
    write_text(first.path, "a.txt", "first\n", marked=False)
    first.commit()
    with pytest.raises(OutputExistsError, match="changed while this run was working"):
        second.commit()
    second.discard()
    assert (out / "a.txt").read_text() == "first\n"
    assert sorted(os.listdir(tmp_path)) == ["twin"]


def test_a_file_added_during_an_overwriting_run_makes_it_refuse(tmp_path):
    out = tmp_path / "res"
    StagedFolder.begin(out).commit()
    run = StagedFolder.begin(out, overwrite=True)
    (out / "late.txt").write_text("added while the run worked\n")
    with pytest.raises(OutputExistsError, match="changed while this run was working"):
        run.commit()
    run.discard()
    assert (out / "late.txt").exists()


def test_staging_folders_of_dead_runs_are_removed_and_live_ones_kept(tmp_path):
    import socket
    import re

    host = re.sub(r"[^0-9A-Za-z_]", "_", socket.gethostname())[:40]
    dead = tmp_path / f".res.partial-{host}-{2 ** 22 + 12345}-abc123"
    live = tmp_path / f".res.partial-{host}-{os.getpid()}-abc123"
    other_host = tmp_path / f".res.partial-elsewhere-{2 ** 22 + 12345}-abc123"
    for d in (dead, live, other_host):
        d.mkdir()
        (d / "x").write_text("x")
    assert remove_dead_staging(str(tmp_path), "res") == [dead.name]
    assert live.exists() and other_host.exists() and not dead.exists()


def test_analyses_never_replace_a_users_file_in_a_results_folder(tmp_path, data, capsys):
    out = tmp_path / "results"
    assert main(track_argv(data, out, "--temperature", "298.15")) == 0
    (out / "profiles.csv").write_text("my own profile\n")
    refused(["profile", str(out)], capsys, "profiles.csv")
    assert (out / "profiles.csv").read_text() == "my own profile\n"
    os.remove(out / "profiles.csv")
    assert main(["profile", str(out)]) == 0
    before = (out / "profiles.csv").read_bytes()
    # its own earlier output is replaced only when asked (and stops before computing anything)
    refused(["profile", str(out), "--bin-width", "10"], capsys, "--overwrite")
    assert (out / "profiles.csv").read_bytes() == before
    assert main(["profile", str(out), "--bin-width", "10", "--overwrite"]) == 0
    assert (out / "profiles.csv").read_bytes() != before
    assert "profiles.csv" in read_marker(out)["files"]


def test_write_file_replaces_only_the_files_it_listed(tmp_path):
    (tmp_path / "x.csv").write_text("keep\n")
    with pytest.raises(OutputExistsError):
        write_text(str(tmp_path), "x.csv", "new\n")
    assert (tmp_path / "x.csv").read_text() == "keep\n"
    write_file(str(tmp_path), "sub/y.csv", lambda p: open(p, "w").write("y\n"))
    write_file(str(tmp_path), "sub/y.csv", lambda p: open(p, "w").write("y2\n"))   # its own file
    assert (tmp_path / "sub" / "y.csv").read_text() == "y2\n"
    assert os.listdir(tmp_path / "sub") == ["y.csv"]
    assert read_marker(tmp_path)["files"] == ["sub/y.csv"]


def figures_argv(out, torsion_type, *extra):
    return ["figures", str(out), "--format", "png", "--types", torsion_type, *extra]


def test_figures_overwrite_replaces_the_earlier_set_and_only_dihedras_figures(tmp_path, data, capsys):
    out = tmp_path / "results"
    assert main(track_argv(data, out)) == 0
    assert main(["report", str(out), "--no-figures"]) == 0
    assert main(figures_argv(out, "HEX:C1-C2-C3-C4")) == 0
    old = out / "figures" / "convergence_HEX_C1-C2-C3-C4.png"
    assert old.exists()
    (out / "figures" / "notes.png").write_text("a user's own file in figures/\n")
    (out / "figures" / "populations.png").write_text("a figure the user edited\n")   # listed: dihedra's
    others = {k: v for k, v in snapshot(out).items() if not k.startswith("figures") and k != MARKER}
    assert "report.html" in others and "populations.csv" in others
    # without --overwrite nothing changes
    before = snapshot(out)
    refused(figures_argv(out, "HEX:C2-C3-C4-C5"), capsys, "--overwrite")
    assert snapshot(out) == before
    # with it, the earlier selection's figures go; the user's file and other commands' files stay
    assert main(figures_argv(out, "HEX:C2-C3-C4-C5", "--overwrite")) == 0
    assert not old.exists()
    assert "removed 1 earlier figure file(s)" in capsys.readouterr().err
    assert (out / "figures" / "convergence_HEX_C2-C3-C4-C5.png").exists()
    assert (out / "figures" / "notes.png").read_text() == "a user's own file in figures/\n"
    assert (out / "figures" / "populations.png").read_bytes().startswith(b"\x89PNG")   # replaced, as promised
    assert {k: v for k, v in snapshot(out).items() if k in others} == others
    listed = read_marker(out)["files"]
    assert sorted(f for f in listed if f.startswith("figures/")) == [
        "figures/convergence_HEX_C2-C3-C4-C5.png", "figures/populations.png", "figures/state_raster.png"]
    assert set(others) <= set(listed)
    # a user's file where the new set would put a figure: refused, and no figure of either set changed
    (out / "figures" / "populations.svg").write_text("a user's own drawing\n")
    before = snapshot(out)
    refused(figures_argv(out, "HEX:C1-C2-C3-C4", "--overwrite", "--format", "png,svg"), capsys, "populations.svg")
    assert snapshot(out) == before
    assert not [n for n in os.listdir(out / "figures") if n.endswith(".dihedra-tmp")]
    # a report written into figures/ is not a figure of the earlier set
    os.remove(out / "figures" / "populations.svg")
    assert main(["report", str(out), "--out", str(out / "figures" / "page.html"), "--no-figures"]) == 0
    assert main(figures_argv(out, "HEX:C1-C2-C3-C4", "--overwrite")) == 0
    assert (out / "figures" / "page.html").exists()


def test_remove_listed_files_deletes_only_listed_files_inside_the_folder(tmp_path):
    outside = tmp_path / "outside"
    outside.mkdir()
    (outside / "x.png").write_text("not dihedra's\n")
    folder = tmp_path / "results"
    for name in ("figures/a.png", "figures/b.png", "keep.csv"):
        write_text(str(folder), name, "dihedra's\n")
    (folder / "figures" / "mine.png").write_text("mine\n")
    os.symlink(outside, folder / "linked")
    marker = read_marker(folder)   # a hand-edited list that reaches out of the folder
    marker["files"] += ["../outside/x.png", "figures/../../outside/x.png", "linked/x.png", "figures/gone.png"]
    (folder / MARKER).write_text(json.dumps(marker))
    names = ["figures/a.png", "figures/mine.png", "../outside/x.png", "figures/../../outside/x.png",
             "linked/x.png", "figures/gone.png"]
    assert remove_listed_files(str(folder), names) == ["figures/a.png", "figures/gone.png"]
    assert sorted(os.listdir(folder / "figures")) == ["b.png", "mine.png"]
    assert (outside / "x.png").read_text() == "not dihedra's\n"
    assert not {"figures/a.png", "figures/gone.png"} & set(read_marker(folder)["files"])
    assert {"figures/b.png", "keep.csv"} <= set(read_marker(folder)["files"])


def test_report_out_never_overwrites_another_file(tmp_path, data, capsys):
    out = tmp_path / "results"
    assert main(track_argv(data, out)) == 0
    before = snapshot(data)
    refused(["report", str(out), "--out", str(data / "hexane.pdb"), "--no-figures"], capsys, "hexane.pdb")
    assert snapshot(data) == before
    page = tmp_path / "page.html"
    assert main(["report", str(out), "--out", str(page), "--no-figures"]) == 0
    assert main(["report", str(out), "--out", str(page), "--no-figures"]) == 0   # its own report
    assert main(["report", str(out), "--no-figures"]) == 0
    assert "report.html" in read_marker(out)["files"]
    # the results folder's own files are never a report's target, nor a torsion table's
    kept = snapshot(out)
    for name in ("summary.json", "populations.csv"):
        refused(["report", str(out), "--out", str(out / name), "--no-figures"], capsys, name, "not a report")
    refused(["torsions", str(data / "hexane.pdb"), "--torsions", "rotatable", "--csv", str(out / "torsions.csv")],
            capsys, "torsions.csv", "results folder")
    assert snapshot(out) == kept
    assert main(["report", str(out), "--out", str(out / "report.html"), "--no-figures"]) == 0   # its own report


def test_torsions_csv_replaces_only_its_own_table(data, capsys):
    before = snapshot(data)
    refused(["torsions", str(data / "hexane.pdb"), "--torsions", "rotatable", "--csv", str(data / "NOTES.md")],
            capsys, "NOTES.md")
    assert snapshot(data) == before
    table = data / "t.csv"
    assert main(["torsions", str(data / "hexane.pdb"), "--torsions", "rotatable", "--csv", str(table)]) == 0
    assert main(["torsions", str(data / "hexane.pdb"), "--torsions", "rotatable", "--csv", str(table)]) == 0
    capsys.readouterr()
    refused(["torsions", str(data / "hexane.pdb"), "--torsions", "rotatable", "--csv", str(data)], capsys)


def test_scan_output_replaces_only_a_scan(tmp_path):
    from dihedra.analysis.scans import check_scan_output

    (tmp_path / "top.pdb").write_text("ATOM\n")
    with pytest.raises(OutputExistsError):
        check_scan_output(tmp_path / "top.pdb", overwrite=True)
    (tmp_path / "old.csv").write_text("# content: dihedra torsion scan\nangle_deg,energy_kj_mol\n0,0\n")
    with pytest.raises(OutputExistsError, match="--overwrite"):
        check_scan_output(tmp_path / "old.csv")
    assert check_scan_output(tmp_path / "old.csv", overwrite=True) == str(tmp_path / "old.csv")


def test_windows_out_never_replaces_the_window_folder(tmp_path, capsys):
    windows = tmp_path / "windows"
    shutil.copytree(os.path.dirname(example_path("butane_windows/windows.csv")), windows)
    before = snapshot(windows)
    refused(["windows", str(windows / "windows.csv"), "--temperature", "300", "--out", str(windows),
             "--overwrite"], capsys, "input")
    assert snapshot(windows) == before


@pytest.mark.parametrize("out", [".", "../../..", ""])
def test_run_refuses_an_out_that_holds_its_inputs(tmp_path, data, out, capsys, monkeypatch):
    analysis = data / "a.toml"
    analysis.write_text(f'out = "{out}"\n[track]\ntopology = "hexane.pdb"\ntrajectories = ["hexane.xtc"]\n'
                        'torsions = ["rotatable"]\nstop = 5\n')
    monkeypatch.chdir(tmp_path)
    before = snapshot(data)
    assert main(["run", str(analysis), "--overwrite"]) == 2
    assert snapshot(data) == before


def test_run_without_overwrite_leaves_an_existing_folder_untouched(tmp_path, data, capsys):
    out = tmp_path / "results"
    assert main(track_argv(data, out)) == 0
    before = snapshot(out)
    analysis = data / "a.toml"
    analysis.write_text(f'out = "{out}"\n[track]\ntopology = "hexane.pdb"\ntrajectories = ["hexane.xtc"]\n'
                        'torsions = ["rotatable"]\nstop = 5\n[profile]\ntemperature_k = 300\n')
    refused(["run", str(analysis)], capsys, "already exists")
    assert snapshot(out) == before


def test_demo_does_not_replace_a_users_results_folder(tmp_path, data, capsys):
    out = tmp_path / "results"
    assert main(track_argv(data, out)) == 0
    before = snapshot(out)
    refused(["demo", "--out", str(out)], capsys, "not a previous demo folder")
    assert snapshot(out) == before


def test_check_folder_target_names_the_input_it_would_cover(tmp_path):
    (tmp_path / "in.pdb").write_text("x")
    with pytest.raises(OutputExistsError, match="in.pdb"):
        check_folder_target(tmp_path, overwrite=True, inputs=[tmp_path / "in.pdb"])
    assert json.loads(json.dumps(check_folder_target(tmp_path / "new"))) == str(tmp_path / "new")


def test_a_file_set_is_replaced_whole_or_not_at_all(tmp_path):
    """The files of one analysis are renamed into place together: an interruption (Ctrl-C while the
    second of three is written) leaves the earlier three as they were, and no temporary file."""
    folder = tmp_path / "res"
    folder.mkdir()
    for name in ("a.csv", "b.csv", "c.json"):
        write_text(folder, name, "old\n")

    def interrupted(tmp):
        raise KeyboardInterrupt

    with pytest.raises(KeyboardInterrupt):
        with file_set(folder):
            write_text(folder, "a.csv", "new\n")
            assert (folder / "a.csv").read_text() == "old\n"   # (not yet in place)
            write_file(folder, "b.csv", interrupted)
    assert [(folder / n).read_text() for n in ("a.csv", "b.csv", "c.json")] == ["old\n"] * 3
    assert sorted(os.listdir(folder)) == sorted([MARKER, "a.csv", "b.csv", "c.json"])
    with file_set(folder):
        for name in ("a.csv", "b.csv", "c.json", "d.csv"):
            write_text(folder, name, "new\n")
    assert [(folder / n).read_text() for n in ("a.csv", "b.csv", "c.json", "d.csv")] == ["new\n"] * 4
    assert "d.csv" in read_marker(folder)["files"]


def test_files_an_earlier_run_wrote_and_a_user_deleted_are_not_in_the_way(tmp_path):
    from dihedra.io.outputs import check_earlier_outputs

    folder = tmp_path / "res"
    folder.mkdir()
    for name in ("comparison.csv", "comparison.json"):
        write_text(folder, name, "x\n")
    with pytest.raises(OutputExistsError, match="comparison.csv, comparison.json"):
        check_earlier_outputs(folder, "dihedra compare", names=("comparison.csv", "comparison.json"))
    for name in ("comparison.csv", "comparison.json"):
        os.remove(folder / name)
    assert check_earlier_outputs(folder, "dihedra compare", names=("comparison.csv", "comparison.json")) == []


def test_temporary_files_of_a_killed_run_are_removed_by_the_next_write(tmp_path):
    # a process killed (kill -9) while it wrote leaves its temporary file; the next write of the same
    # file removes it when that process is gone (this machine's processes only), and never a live one's
    import subprocess
    import sys

    from dihedra.io.outputs import TMP_SUFFIX, host_tag

    folder = tmp_path / "res"
    folder.mkdir()
    write_text(folder, "profiles.csv", "old\n")
    dead = subprocess.run([sys.executable, "-c", "import os; print(os.getpid())"], capture_output=True, text=True)
    left = folder / f".profiles.csv.{host_tag()}-{int(dead.stdout)}-0123abcd{TMP_SUFFIX}"
    live = folder / f".profiles.csv.{host_tag()}-{os.getpid()}-4567cdef{TMP_SUFFIX}"
    other = folder / f".profiles.csv.elsewhere-{int(dead.stdout)}-89abcdef{TMP_SUFFIX}"
    for f in (left, live, other):
        f.write_text("half\n")
    write_text(folder, "profiles.csv", "new\n")
    assert not left.exists() and live.exists() and other.exists()
    assert (folder / "profiles.csv").read_text() == "new\n"


def test_an_interrupt_right_after_an_analysis_wrote_its_files_says_they_are_complete(tmp_path, data, capsys,
                                                                                     monkeypatch):
    # a Ctrl-C held while the new set is renamed into place is delivered just after: the message must
    # say the new files are complete, not that they were discarded
    from dihedra.analysis.kinetics.driver import KineticsResult

    out = tmp_path / "results"
    assert main(track_argv(data, out, "--stop", "50")) == 0
    save = KineticsResult.save

    def save_then_interrupted(self, folder):
        save(self, folder)
        raise KeyboardInterrupt

    monkeypatch.setattr(KineticsResult, "save", save_then_interrupted)
    capsys.readouterr()
    assert main(["kinetics", str(out)]) == 130
    err = capsys.readouterr().err.strip().splitlines()[-1]
    assert "after writing 7 new file(s) in" in err and "that is complete" in err, err
    assert (out / "kinetics.json").exists()
