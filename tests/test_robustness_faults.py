"""Faults end cleanly: a full disk, a read-only folder, an unreachable scheduler, and SIGINT or
SIGTERM at a random moment of a serial or parallel run, each end with one line, no staging folder
left, and the old results folder as it was (or, for a signal after the new folder was moved into
place, the new one complete).

A full disk and a read-only folder are simulated by making dihedra's writers fail with the error
the system gives (ENOSPC, EROFS, EACCES): mounting a small or read-only file system needs root.
The signals are sent to real processes (``python -m dihedra track ...``).
"""

import errno
import os
import random
import shutil
import signal
import subprocess
import sys
import threading
import time

import pytest

from dihedra import example_path, load_results
from dihedra.cli import main
from robustness_files import leftovers, refused, working_copy
from test_safe_outputs import snapshot

REPO = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))


@pytest.fixture(scope="module")
def base(tmp_path_factory):
    """The example (1000 frames) and a results folder made from its first 100 frames."""
    folder = tmp_path_factory.mktemp("faults")
    for name in ("hexane.pdb", "hexane.xtc"):
        shutil.copy(example_path(name), folder)
    cwd = os.getcwd()
    os.chdir(folder)
    try:
        assert main(["track", "hexane.pdb", "hexane.xtc", "--torsions", "rotatable", "--stop", "100", "--out", "res",
                     "--keep-angles", "--temperature", "300"]) == 0
    finally:
        os.chdir(cwd)
    return folder


@pytest.fixture
def work(base, tmp_path, monkeypatch):
    """A fresh copy of the inputs and the results folder, as the current folder."""
    return working_copy(base, tmp_path, monkeypatch)


def failing(code, text):
    def fail(*args, **kwargs):
        raise OSError(code, text, "where-it-was-writing")
    return fail


# ----------------------------------------------------------------------------------------------
# a full disk, a read-only folder
# ----------------------------------------------------------------------------------------------

@pytest.mark.parametrize("where", ["time series", "table", "block sums"])
@pytest.mark.parametrize("workers", [1, 2])
def test_a_full_disk_while_tracking(work, capsys, monkeypatch, where, workers):
    from dihedra.io import series, tables
    import dihedra.tracking as tracking

    target = {"time series": (series.TimeSeriesWriter, "add"), "table": (tables, "write_csv"),
              "block sums": (tracking, "save_blocks")}[where]
    monkeypatch.setattr(*target, failing(errno.ENOSPC, "No space left on device"))
    before = snapshot(work / "res")
    refused(capsys, ["track", "hexane.pdb", "hexane.xtc", "--torsions", "rotatable", "--stop", "300",
                       "--out", "res", "--overwrite", "--workers", str(workers), "--backend",
                       "multiprocessing" if workers > 1 else "serial"], "No space left on device",
              "free some space")
    assert snapshot(work / "res") == before and not leftovers(work)


@pytest.mark.parametrize("code, text, hint", [(errno.ENOSPC, "No space left on device", "free some space"),
                                              (errno.EROFS, "Read-only file system", "read-only"),
                                              (errno.EACCES, "Permission denied", "permissions")])
def test_an_analysis_that_cannot_write_leaves_the_folder_as_it_was(work, capsys, monkeypatch, code, text, hint):
    from dihedra.io import tables

    monkeypatch.setattr(tables, "write_csv", failing(code, text))
    before = snapshot(work / "res")
    refused(capsys, ["profile", "res", "--bootstrap", "20"], text, hint)
    assert snapshot(work / "res") == before
    assert not [n for n in os.listdir(work / "res") if n.endswith(".dihedra-tmp")]


def test_a_folder_that_cannot_be_made(work, capsys, monkeypatch):
    from dihedra.io import staging

    monkeypatch.setattr(staging.tempfile, "mkdtemp", failing(errno.EACCES, "Permission denied"))
    refused(capsys, ["track", "hexane.pdb", "hexane.xtc", "--torsions", "rotatable", "--stop", "10", "--out",
                       "new"], "Permission denied")
    assert not os.path.exists(work / "new")


def test_an_unreachable_scheduler_fails_at_once(work, monkeypatch):
    """Nothing listens on the port: refused before a client is made (a client would retry for
    its whole timeout and complain when collected)."""
    distributed = pytest.importorskip("distributed")
    from dihedra import track
    from dihedra.errors import DihedraError

    made = []

    class Recorded(distributed.Client):
        def __init__(self, *args, **kwargs):
            made.append(args)
            raise OSError("a client was made")

    monkeypatch.setattr(distributed, "Client", Recorded)
    with pytest.raises(DihedraError, match="cannot reach a dask scheduler"):
        track("hexane.pdb", ["hexane.xtc"], scheduler="tcp://127.0.0.1:9", out="out")
    assert made == [] and not os.path.exists("out")


# ----------------------------------------------------------------------------------------------
# signals sent to real processes
# ----------------------------------------------------------------------------------------------

BACKENDS = {"serial, 2 threads": ["--threads", "2"], "serial, 1 thread": ["--threads", "1"],
            "2 processes": ["--workers", "2", "--backend", "multiprocessing"],
            "dask, 2 processes": ["--workers", "2", "--backend", "dask"]}


@pytest.mark.parametrize("sig", [signal.SIGINT, signal.SIGTERM], ids=lambda s: signal.Signals(s).name)
@pytest.mark.parametrize("backend", list(BACKENDS))
def test_a_signal_at_a_random_moment_stops_the_run_cleanly(work, sig, backend):
    if "dask" in backend:
        pytest.importorskip("dask")
    before = snapshot(work / "res")
    env = dict(os.environ, PYTHONPATH=REPO + os.pathsep + os.environ.get("PYTHONPATH", ""))
    argv = [sys.executable, "-m", "dihedra", "track", "hexane.pdb", *["hexane.xtc"] * 12, "--torsions", "rotatable",
            "--keep-angles", "--allow-duplicates", "--out", "res", "--overwrite", *BACKENDS[backend]]
    proc = subprocess.Popen(argv, env=env, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    stuck = threading.Timer(60, proc.kill)   # bounded in time even if the run never starts
    stuck.start()
    head = proc.stderr.readline()            # the run has started its first replica
    stuck.cancel()
    assert proc.poll() is None or proc.returncode == 0, f"the run ended before the signal:\n{head}"
    delay = random.uniform(0.0, 2.5)
    time.sleep(delay)
    proc.send_signal(sig)
    try:
        out, err = proc.communicate(timeout=15)
    except subprocess.TimeoutExpired:
        proc.kill()
        pytest.fail(f"{signal.Signals(sig).name} {delay:.2f} s into the run: still running 15 s later")
    err = head + err
    where = f"{signal.Signals(sig).name} {delay:.2f} s into the run ({backend}); stderr:\n{err}"
    assert "Traceback" not in err and "Exception ignored" not in err, where
    assert not leftovers(work), where
    if proc.returncode == 0:   # it had finished: the new folder is complete
        load_results(work / "res")
        return
    assert proc.returncode == 128 + sig, where
    assert err.strip().splitlines()[-1].startswith("dihedra: interrupted"), where
    if "that is complete" in err:   # after the final move: the new folder, whole
        load_results(work / "res")
    else:
        assert snapshot(work / "res") == before, where


@pytest.mark.parametrize("delay", [0.05, 0.2, 0.4, 0.7, 1.0])
def test_ctrl_c_while_the_command_line_is_still_loading(work, delay):
    """SIGINT in the first second, while the libraries are imported or the run has just begun:
    one line, no traceback, nothing changed (or, before Python itself is up, the process ends by
    the signal). Eight replicas, so that the run is still going at the last of these moments."""
    before = snapshot(work / "res")
    env = dict(os.environ, PYTHONPATH=REPO + os.pathsep + os.environ.get("PYTHONPATH", ""))
    argv = [sys.executable, "-m", "dihedra", "track", "hexane.pdb", *["hexane.xtc"] * 8, "--allow-duplicates",
            "--torsions", "rotatable", "--out", "res", "--overwrite"]
    proc = subprocess.Popen(argv, env=env, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    time.sleep(delay)
    proc.send_signal(signal.SIGINT)
    try:
        _, err = proc.communicate(timeout=60)
    except subprocess.TimeoutExpired:
        proc.kill()
        pytest.fail(f"SIGINT {delay} s after the start: still running 60 s later")
    where = f"SIGINT {delay} s after the start, exit {proc.returncode}; stderr:\n{err}"
    assert "Traceback" not in err and "Exception ignored" not in err, where
    assert proc.returncode in (130, -signal.SIGINT), where
    if proc.returncode == 130:
        assert err.strip().splitlines()[-1].startswith("dihedra: interrupted"), where
    assert snapshot(work / "res") == before and not leftovers(work), where


def test_the_staging_folder_of_a_killed_run_is_removed_by_the_next_run(work, capsys):
    """SIGKILL (or a crash) cannot be caught: the staging folder stays until the next run into the
    same folder on this machine removes it (its process is gone)."""
    env = dict(os.environ, PYTHONPATH=REPO + os.pathsep + os.environ.get("PYTHONPATH", ""))
    argv = [sys.executable, "-m", "dihedra", "track", "hexane.pdb", *["hexane.xtc"] * 6, "--torsions", "rotatable",
            "--keep-angles", "--allow-duplicates", "--out", "res", "--overwrite"]
    proc = subprocess.Popen(argv, env=env, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True)
    stuck = threading.Timer(60, proc.kill)
    stuck.start()
    proc.stderr.readline()                   # the run has started its first replica
    stuck.cancel()
    proc.kill()
    proc.communicate(timeout=15)
    assert proc.returncode == -signal.SIGKILL
    assert [n for n in leftovers(work) if ".partial-" in n], "the killed run left no staging folder to clean"
    assert main(["track", "hexane.pdb", "hexane.xtc", "--torsions", "rotatable", "--stop", "50", "--out", "res",
                 "--overwrite"]) == 0
    assert not leftovers(work)
    assert load_results(work / "res").summary["replicas"][0]["frames_analysed"] == 50


class _SignalInFinaliser:
    """Raises SIGINT in this process from a finaliser: Python reports the handler's raise there as
    "Exception ignored" and swallows it (as in an MDAnalysis reader collected by a pass)."""

    def __del__(self):
        os.kill(os.getpid(), signal.SIGINT)


def test_a_signal_whose_raise_python_swallowed_still_stops_the_command(monkeypatch, capsys):
    import argparse
    import types

    import dihedra.cli as cli

    def command(args):
        _SignalInFinaliser()
        return 0
    monkeypatch.setattr(cli, "build_parser",
                        lambda *a: types.SimpleNamespace(parse_args=lambda argv: argparse.Namespace(func=command)))
    assert cli.main(["anything"]) == 128 + signal.SIGINT
    err = capsys.readouterr().err
    assert "Exception ignored" not in err and "Traceback" not in err, err
    assert err.strip().splitlines() == ["dihedra: interrupted (SIGINT); stopped (after the command had finished: "
                                        "its output is complete)."]


def test_a_swallowed_signal_stops_the_final_move_of_a_results_folder(tmp_path):
    from dihedra.io.staging import StagedFolder
    from dihedra.trajectory import interrupts

    staged = StagedFolder.begin(str(tmp_path / "res"), command="track")
    interrupts.received.append(signal.SIGTERM)   # noted by the handler, its raise lost
    try:
        with pytest.raises(KeyboardInterrupt):
            staged.commit()
    finally:
        interrupts.received.clear()
    staged.discard()
    assert os.listdir(tmp_path) == []


def test_a_signal_during_a_cluster_run_leaves_no_staging_folder(work):
    """Ctrl-C of a run on a dask.distributed cluster: the command stops at once; the workers may go
    on with the groups in hand, but do not make the removed staging folder again."""
    distributed = pytest.importorskip("distributed")
    before = snapshot(work / "res")
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=False, protocol="tcp://",
                                  host="127.0.0.1", dashboard_address=None) as cluster, \
            distributed.Client(cluster) as client:
        env = dict(os.environ, PYTHONPATH=REPO + os.pathsep + os.environ.get("PYTHONPATH", ""))
        argv = [sys.executable, "-m", "dihedra", "track", "hexane.pdb", *["hexane.xtc"] * 12, "--torsions",
                "rotatable", "--keep-angles", "--allow-duplicates", "--out", "res", "--overwrite", "--scheduler",
                cluster.scheduler_address]
        proc = subprocess.Popen(argv, env=env, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
        stuck = threading.Timer(60, proc.kill)
        stuck.start()
        head = proc.stderr.readline()
        stuck.cancel()
        time.sleep(random.uniform(0.3, 1.5))
        proc.send_signal(signal.SIGINT)
        try:
            out, err = proc.communicate(timeout=15)
        except subprocess.TimeoutExpired:
            proc.kill()
            pytest.fail("SIGINT to a cluster run: still running 15 s later")
        deadline = time.time() + 30   # the groups the workers had in hand
        while time.time() < deadline and any(client.processing().values()):
            time.sleep(0.2)
        time.sleep(0.5)
    err = head + err
    assert proc.returncode == 128 + signal.SIGINT, err
    assert "Traceback" not in err and "Exception ignored" not in err, err
    assert err.strip().splitlines()[-1].startswith("dihedra: interrupted"), err
    assert not leftovers(work), (os.listdir(work), err)
    assert snapshot(work / "res") == before
