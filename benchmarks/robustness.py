"""Robustness survey: run dihedra as a careless user would and count how it ends (not a test).

Every case is one command run in a fresh process, in a folder of its own that holds copies of
the inputs it needs (the bundled n-hexane example cut to 100 frames, a results folder made from
it, damaged files made here). Each case says what it expects:

``works``
    exit status 0 and no traceback (a notice may be expected too);
``error``
    exit status 2, exactly one ``dihedra: error:`` line and no traceback or "Exception ignored";
``interrupt``
    a signal at a random moment: exit status 130 (SIGINT) or 143 (SIGTERM) with one line.

After every case the script checks that *nothing was lost*: every file that was in the case's
folder before is still there, byte for byte (only the output named by the case may appear), and
no hidden staging folder (``.NAME.partial-...``) is left. A case counts as clean when it ended as
expected and lost nothing.

Run from the repository root (about ten minutes on 2 cores)::

    python benchmarks/robustness.py --markdown      # every case, then the counts (per group too)
    python benchmarks/robustness.py --only SIG      # the cases whose name contains 'SIG'
    python benchmarks/robustness.py --json out.json --repo ../older-checkout

The counts are reported in docs/robustness.md. A full disk is a small tmpfs (mounting needs root;
without it the file-size limit of the process stands in: the write then fails with EFBIG), and
so is a read-only results folder (mounted read-only: root ignores file permissions).
"""

from __future__ import annotations

import argparse
import hashlib
import json
import os
import random
import re
import resource
import shutil
import signal
import subprocess
import sys
import tempfile
import time

HERE = os.path.dirname(os.path.abspath(__file__))
REPO = os.path.dirname(HERE)
sys.path.insert(0, REPO)
#: the checkout of dihedra whose command line the cases run (--repo; default this one)
UNDER_TEST = REPO

from tests.robustness_files import (cut_mid_frame, damaged_xtc_variants, nan_overflow_xtc,  # noqa: E402
                                    short_xtc)

TIMEOUT_S = 120


class Case:
    def __init__(self, name, argv, expect="error", setup=None, output=None, notice=None, signal_after=None,
                 check=None, mount=None, limit_bytes=None, max_seconds=None):
        self.name, self.argv, self.expect = name, argv, expect
        self.setup, self.output, self.notice = setup, output, notice
        self.signal_after, self.check, self.mount = signal_after, check, mount
        self.limit_bytes, self.max_seconds = limit_bytes, max_seconds


# ----------------------------------------------------------------------------------------------
# Fixtures
# ----------------------------------------------------------------------------------------------

def build_fixtures(root):
    """Inputs shared (copied) by the cases: the example cut short, a results folder, damaged files."""
    from dihedra import example_path

    fx = os.path.join(root, "fixtures")
    os.makedirs(fx)
    shutil.copy(example_path("hexane.pdb"), fx)
    short_xtc(example_path("hexane.pdb"), example_path("hexane.xtc"), os.path.join(fx, "hexane.xtc"), 100)
    short_xtc(example_path("hexane.pdb"), example_path("hexane.xtc"), os.path.join(fx, "long.xtc"), 1000)
    shutil.copy(example_path("trappe_ua_torsion.toml"), fx)
    _dihedra(["track", "hexane.pdb", "hexane.xtc", "--torsions", "rotatable", "--out", "res", "--keep-angles",
              "--temperature", "300"], fx)
    _dihedra(["profile", "res", "--bootstrap", "20"], fx)
    _dihedra(["kinetics", "res", "--bootstrap", "20"], fx)
    return fx


def _dihedra(argv, cwd):
    env = dict(os.environ, PYTHONPATH=UNDER_TEST)
    out = subprocess.run([sys.executable, "-m", "dihedra", *argv], cwd=cwd, env=env, capture_output=True,
                         text=True, timeout=TIMEOUT_S)
    if out.returncode:
        raise RuntimeError(f"fixture step {' '.join(argv)} failed: {out.stderr}")


def copy_in(fx, case_dir, *names):
    for name in names:
        src = os.path.join(fx, name)
        dst = os.path.join(case_dir, name)
        if os.path.isdir(src):
            shutil.copytree(src, dst, symlinks=True)
        else:
            shutil.copy(src, dst)


def write(case_dir, name, text):
    with open(os.path.join(case_dir, name), "w", encoding="utf-8") as fh:
        fh.write(text)


def truncate(path, keep):
    """Keep the first ``keep`` (a fraction) of a file's bytes."""
    size = os.path.getsize(path)
    with open(path, "r+b") as fh:
        fh.truncate(int(size * keep))


def cut_lines(path, keep):
    with open(path, encoding="utf-8") as fh:
        lines = fh.read().splitlines(True)
    text = "".join(lines[:max(2, int(len(lines) * keep))])
    with open(path, "w", encoding="utf-8") as fh:
        fh.write(text[:-7])   # cut inside the last row too


# ----------------------------------------------------------------------------------------------
# The cases
# ----------------------------------------------------------------------------------------------

TRACK = ["track", "hexane.pdb", "hexane.xtc", "--torsions", "rotatable", "--out", "out"]


def cases():
    c = []
    base = ("hexane.pdb", "hexane.xtc")

    def inputs(*names):
        return lambda fx, d: copy_in(fx, d, *names)

    def res(fx, d):
        copy_in(fx, d, "res")

    # -- hostile values -------------------------------------------------------------------------
    for opt, value in [("--dt-ps", "0"), ("--dt-ps", "-1"), ("--dt-ps", "nan"), ("--step", "-1"), ("--step", "0"),
                       ("--temperature", "0"), ("--temperature", "-5"), ("--temperature", "nan"),
                       ("--temperature", "inf"), ("--workers", "0"), ("--workers", "-2"), ("--start", "5000"),
                       ("--threads", "3")]:
        c.append(Case(f"track {opt} {value}", TRACK + [opt, value], setup=inputs(*base)))
    for cmd in (["profile", "res"], ["compare", "res", "--scan", "trappe_ua_torsion.toml", "--type", "all"],
                ["kinetics", "res"]):
        for value in (("-3",) if cmd[0] == "kinetics" else ("0", "-3")):   # kinetics: 0 is no intervals
            c.append(Case(f"{cmd[0]} --bootstrap {value}", cmd + ["--bootstrap", value],
                          setup=lambda fx, d: copy_in(fx, d, "res", "trappe_ua_torsion.toml")))
    c.append(Case("profile --bin-width 7", ["profile", "res", "--bin-width", "7"], setup=res))
    c.append(Case("profile --temperature -1", ["profile", "res", "--temperature", "-1"], setup=res))
    c.append(Case("kinetics --dt-ps 0", ["kinetics", "res", "--dt-ps", "0"], setup=res))
    c.append(Case("kinetics --lag 0", ["kinetics", "res", "--lag", "0"], setup=res))

    # -- hostile input files --------------------------------------------------------------------
    def weights_dup(fx, d):
        copy_in(fx, d, *base)
        rows = ["replica,frame,weight"] + [f"0,{f},1.0" for f in range(100)] + ["0,5,3.0"]
        write(d, "w.csv", "\n".join(rows) + "\n")
    c.append(Case("weights with a duplicate (replica, frame)", TRACK + ["--weights", "w.csv"], setup=weights_dup))

    def weights_short(fx, d):
        copy_in(fx, d, *base)
        write(d, "w.csv", "weight\n" + "1\n" * 40)
    c.append(Case("weights with too few rows", TRACK + ["--weights", "w.csv"], setup=weights_short))

    def scan_dup(fx, d):
        copy_in(fx, d, "res")
        write(d, "scan.csv", "angle_deg,energy_kj_mol\n" + "".join(
            f"{a},{(a % 120) / 10}\n" for a in range(-180, 180, 30)) + "60,9.5\n")
    c.append(Case("scan with a duplicate angle", ["compare", "res", "--scan", "scan.csv", "--type", "all"],
                  setup=scan_dup))

    def scan_one(fx, d):
        copy_in(fx, d, "res")
        write(d, "scan.csv", "angle_deg\n" + "".join(f"{a}\n" for a in range(-180, 180, 30)))
    c.append(Case("scan with one column", ["compare", "res", "--scan", "scan.csv", "--type", "all"], setup=scan_one))

    for label, atoms in [("fractional", "[0, 1, 2, 3.7]"), ("string", '["0", "1", "2", "3"]'),
                         ("negative", "[0, 1, 2, -3]"), ("out of range", "[0, 1, 2, 99999]")]:
        def tors(fx, d, atoms=atoms):
            copy_in(fx, d, *base)
            write(d, "t.toml", f'[[torsion]]\nname = "t"\natoms = {atoms}\n')
        c.append(Case(f"torsion file with a {label} index", TRACK[:4] + ["t.toml", "--out", "out"], setup=tors))
    c.append(Case("torsions --csv DIRECTORY", ["torsions", "hexane.pdb", "--torsions", "rotatable", "--csv", "sub"],
                  setup=lambda fx, d: (copy_in(fx, d, *base), os.mkdir(os.path.join(d, "sub")))))
    c.append(Case("XTC given as topology", ["track", "hexane.xtc", "hexane.xtc", "--torsions", "rotatable",
                                            "--out", "out"], setup=inputs(*base)))
    c.append(Case("missing trajectory", TRACK[:2] + ["nothere.xtc"] + TRACK[3:], setup=inputs(*base)))
    for label, content in [("empty", b""), ("garbage", bytes(range(256)) * 64)]:
        for ext in ("xtc", "dcd", "trr"):
            def bad_traj(fx, d, content=content, ext=ext):
                copy_in(fx, d, "hexane.pdb")
                with open(os.path.join(d, f"bad.{ext}"), "wb") as fh:
                    fh.write(content)
            c.append(Case(f"{label} .{ext} trajectory", ["track", "hexane.pdb", f"bad.{ext}", "--torsions",
                                                          "rotatable", "--out", "out"], setup=bad_traj))

    def nan_xtc(fx, d):
        copy_in(fx, d, "hexane.pdb")
        nan_overflow_xtc(os.path.join(fx, "hexane.xtc"), os.path.join(d, "nan.xtc"))
    c.append(Case("XTC written with NaN coordinates (overflowed sizes)",
                  ["track", "hexane.pdb", "nan.xtc", "--torsions", "rotatable", "--out", "out"], setup=nan_xtc))
    for label in damaged_xtc_variants():
        def damaged(fx, d, label=label):
            copy_in(fx, d, "hexane.pdb")
            damaged_xtc_variants()[label](os.path.join(fx, "hexane.xtc"), os.path.join(d, "bad.xtc"))
        for extra in ([], ["--workers", "2"]):
            c.append(Case(f"XTC {label}" + (" (2 workers)" if extra else ""),
                          ["track", "hexane.pdb", "bad.xtc", "--torsions", "rotatable", "--out", "out", *extra],
                          setup=damaged))

    def cut_end(fx, d):
        copy_in(fx, d, *base)
        cut_mid_frame(os.path.join(d, "hexane.xtc"))
    c.append(Case("XTC ending in a frame cut in the middle", TRACK, expect="works", setup=cut_end,
                  output="out", notice="incomplete frame"))

    def nan_dcd(fx, d):
        import MDAnalysis as mda
        import numpy as np
        import warnings
        copy_in(fx, d, "hexane.pdb")
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            u = mda.Universe(os.path.join(d, "hexane.pdb"))
            with mda.Writer(os.path.join(d, "nan.dcd"), u.atoms.n_atoms) as w:
                for _ in range(20):
                    u.atoms.positions = np.full((u.atoms.n_atoms, 3), np.nan, dtype=np.float32)
                    w.write(u.atoms)
    c.append(Case("DCD of NaN coordinates", ["track", "hexane.pdb", "nan.dcd", "--torsions", "rotatable", "--out",
                                             "out"], expect="works", setup=nan_dcd, output="out",
                  notice="no defined frame", check=check_nan_populations))

    # -- damaged results folders ----------------------------------------------------------------
    everything = ("profile", "kinetics", "figures", "report")
    damage = {   # what is damaged, and the commands that read it
        "corrupt summary.json": (lambda d: write(d, "res/summary.json", '{"scheme": [1, 2'), everything),
        "summary.json of another shape": (lambda d: write(d, "res/summary.json", '[1, 2, 3]\n'), everything),
        "truncated blocks.npz": (lambda d: truncate(os.path.join(d, "res/blocks.npz"), 0.5), everything),
        "torsions.csv cut in half": (lambda d: cut_lines(os.path.join(d, "res/torsions.csv"), 0.5), everything),
        "populations.csv cut in half": (lambda d: cut_lines(os.path.join(d, "res/populations.csv"), 0.5),
                                        everything),
        "profiles.csv cut in half": (lambda d: cut_lines(os.path.join(d, "res/profiles.csv"), 0.5),
                                     ("figures", "report")),
        "corrupt Parquet file": (lambda d: [truncate(_first_parquet(os.path.join(d, f"res/{k}.parquet")), 0.4)
                                            for k in ("states", "angles")], ("kinetics", "figures", "report")),
        "empty torsions.csv": (lambda d: write(d, "res/torsions.csv", ""), everything),
    }
    commands = {"profile": ["profile", "res"], "kinetics": ["kinetics", "res"],
                "figures": ["figures", "res", "--format", "png"], "report": ["report", "res"]}
    for label, (spoil, readers) in damage.items():
        for name in readers:
            def damaged_res(fx, d, spoil=spoil):
                copy_in(fx, d, "res")
                spoil(d)
            c.append(Case(f"{name} on a folder with a {label}", commands[name], setup=damaged_res))

    # -- output faults --------------------------------------------------------------------------
    c.append(Case("track into a full disk", ["track", "../../fixtures/hexane.pdb", "../../fixtures/long.xtc",
                                             "--torsions", "rotatable", "--out", "full/out", "--keep-angles"],
                  mount=("full", 96 * 1024, False), limit_bytes=96 * 1024))
    c.append(Case("profile into a full disk", ["profile", "full/res"], mount=("full", None, False),
                  setup=None, limit_bytes=None))
    c.append(Case("profile in a read-only results folder", ["profile", "ro/res"], mount=("ro", None, True)))

    # -- clusters -------------------------------------------------------------------------------
    c.append(Case("unreachable --scheduler", TRACK + ["--scheduler", "tcp://127.0.0.1:9"], setup=inputs(*base),
                  max_seconds=20))

    # -- analysis files -------------------------------------------------------------------------
    def toml(body):
        def setup(fx, d):
            copy_in(fx, d, *base, "trappe_ua_torsion.toml")
            write(d, "one.csv", "angle_deg\n0\n120\n")
            write(d, "a.toml", body)
        return setup
    head = 'out = "out"\n[track]\ntopology = "hexane.pdb"\ntrajectories = ["hexane.xtc"]\ntemperature_k = 300\n'
    for label, body in [("a bad [profile] bin width", head + "[profile]\nbin_width_deg = 7\n"),
                        ("a missing [compare] scan", head + '[compare]\nscan = "nothere.csv"\n'),
                        ("a bad [kinetics] lag", head + "[kinetics]\nlags = [0]\n"),
                        ("a bad [kinetics] bootstrap", head + "[kinetics]\nn_bootstrap = -1\n"),
                        ("a bad [profile] bootstrap", head + "[profile]\nn_bootstrap = 0\n"),
                        ("a [compare] scan of one column", head + '[compare]\nscan = "one.csv"\n'),
                        ("a bad [track] dt", head.replace("temperature_k = 300", "dt_ps = -2")),
                        ("a bad [track] step", head + "step = -1\n"),
                        ("a bad [profile] temperature", head + "[profile]\ntemperature_k = -3\n"),
                        ("a bad [couplings] relation", head + '[couplings]\nrelation = ["nothere"]\n'),
                        ("a bad [figures] format", head + '[figures]\nformats = ["gif"]\n'),
                        ("an unknown key", head + "[profile]\nbinwidth = 5\n")]:
        c.append(Case(f"run with {label}", ["run", "a.toml"], setup=toml(body), check=check_no_track))

    def keyword_files(fx, d):
        toml(head.replace("temperature_k = 300", 'torsions = "rotatable"\nscheme = "klyne-prelog"'))(fx, d)
        write(d, "rotatable", "a user's note\n")
        write(d, "klyne-prelog", "another note\n")
    c.append(Case("run beside files named rotatable and klyne-prelog", ["run", "a.toml"], expect="works",
                  setup=keyword_files, output="out"))

    # -- names ----------------------------------------------------------------------------------
    def odd_names(fx, d):
        os.makedirs(os.path.join(d, "my data ñ"))
        shutil.copy(os.path.join(fx, "hexane.pdb"), os.path.join(d, "my data ñ", "hexane é.pdb"))
        shutil.copy(os.path.join(fx, "hexane.xtc"), os.path.join(d, "my data ñ", "traj ü 1.xtc"))
    c.append(Case("paths with spaces and non-ASCII characters",
                  ["track", "my data ñ/hexane é.pdb", "my data ñ/traj ü 1.xtc", "--torsions", "rotatable", "--out",
                   "résultats 1"], expect="works", setup=odd_names, output="résultats 1"))
    c.append(Case("profile of a folder named with spaces and non-ASCII characters",
                  ["profile", "résultats ü", "--bootstrap", "20"], expect="works",
                  setup=lambda fx, d: shutil.copytree(os.path.join(fx, "res"), os.path.join(d, "résultats ü")),
                  output="résultats ü"))

    # -- data loss --------------------------------------------------------------------------------
    c.append(Case("track --out . --overwrite", TRACK[:-1] + [".", "--overwrite"], setup=inputs(*base)))
    c.append(Case("track --out '' --overwrite", TRACK[:-1] + ["", "--overwrite"], setup=inputs(*base)))
    c.append(Case("track --out DATA-FOLDER --overwrite", ["track", "data/hexane.pdb", "data/hexane.xtc",
                                                          "--torsions", "rotatable", "--out", "data", "--overwrite"],
                  setup=lambda fx, d: (os.mkdir(os.path.join(d, "data")), copy_in(fx, os.path.join(d, "data"), *base))))

    def users_files(fx, d):
        copy_in(fx, d, *base, "res")
        write(d, "res/NOTES.md", "my notes\n")
    c.append(Case("track --overwrite a results folder holding a user's notes", TRACK[:-1] + ["res", "--overwrite"],
                  setup=users_files))
    c.append(Case("track into an existing folder without --overwrite", TRACK[:-1] + ["res"],
                  setup=lambda fx, d: copy_in(fx, d, *base, "res")))
    c.append(Case("report --out onto the topology", ["report", "res", "--no-figures", "--out", "hexane.pdb"],
                  setup=lambda fx, d: copy_in(fx, d, *base, "res")))

    # -- signals ----------------------------------------------------------------------------------
    rng = random.Random(18)
    for sig in (signal.SIGINT, signal.SIGTERM):
        for label, extra in [("serial, 2 threads", ["--threads", "2"]), ("serial, 1 thread", ["--threads", "1"]),
                             ("2 processes", ["--workers", "2"]), ("dask, 2 processes", ["--workers", "2",
                                                                                           "--backend", "dask"])]:
            for k in range(3):
                after = rng.uniform(0.0, 4.0)
                c.append(Case(f"{signal.Signals(sig).name} {after:.1f} s into a run ({label}), --overwrite of an "
                              f"old folder (#{k + 1})",
                              ["track", "hexane.pdb", *["long.xtc"] * 12, "--torsions", "rotatable",
                               "--keep-angles", "--out", "res", "--overwrite", *extra],
                              expect="interrupt", setup=lambda fx, d: copy_in(fx, d, "hexane.pdb", "long.xtc", "res"),
                              output="res", signal_after=(sig, after), max_seconds=60))
    return c


def _first_parquet(folder):
    return os.path.join(folder, sorted(os.listdir(folder))[0])


def check_nan_populations(case_dir):
    import pandas as pd

    pops = pd.read_csv(os.path.join(case_dir, "out", "populations.csv"))
    by_type = pd.read_csv(os.path.join(case_dir, "out", "populations_by_type.csv"))
    if pops["population"].notna().any() or (pops["n_effective"] > 0).any():
        return "populations of undefined torsions are not NaN / n_effective not 0"
    if by_type["population_err"].notna().any():
        return "pooled errors of undefined torsions are not NaN"
    return None


def check_no_track(case_dir, stderr=""):
    return "the track step ran before the error" if "replica 1/" in stderr else None


# ----------------------------------------------------------------------------------------------
# Running a case
# ----------------------------------------------------------------------------------------------

def snapshot(folder):
    out = {}
    for root, dirs, files in os.walk(folder):
        for name in files:
            path = os.path.join(root, name)
            if os.path.islink(path):
                continue
            with open(path, "rb") as fh:
                out[os.path.relpath(path, folder)] = hashlib.sha256(fh.read()).hexdigest()
    return out


def _mount(case_dir, fx, mount):
    """A small tmpfs (full disk) or a read-only copy of the results folder; False without root."""
    name, size, read_only = mount
    path = os.path.join(case_dir, name)
    os.makedirs(path)
    opts = f"size={size or 64 << 20}"
    if subprocess.run(["mount", "-t", "tmpfs", "-o", opts, "tmpfs", path], capture_output=True).returncode:
        return False
    if size is None:   # a results folder, then the disk filled up (or mounted read-only)
        shutil.copytree(os.path.join(fx, "res"), os.path.join(path, "res"))
        if read_only:
            subprocess.run(["mount", "-o", "remount,ro", path], check=True)
        else:
            with open(os.path.join(path, "filler"), "wb") as fh:
                try:
                    while True:
                        fh.write(b"\0" * 65536)
                except OSError:
                    pass
    return True


def _limit(limit_bytes):
    def pre():
        os.setsid()
        if limit_bytes:
            signal.signal(signal.SIGXFSZ, signal.SIG_IGN)
            resource.setrlimit(resource.RLIMIT_FSIZE, (limit_bytes, limit_bytes))
    return pre


def run_case(case, fx, work):
    mounted = []
    try:
        return _run_case(case, fx, work, mounted)
    finally:
        for path in mounted:
            subprocess.run(["umount", "-l", path], capture_output=True)


def _run_case(case, fx, work, mounts):
    d = os.path.join(work, re.sub(r"[^0-9A-Za-z]+", "-", case.name).strip("-"))
    os.makedirs(d)
    mounted = None
    limit = None
    if case.mount:
        if _mount(d, fx, case.mount):
            mounted = os.path.join(d, case.mount[0])
            mounts.append(mounted)
        elif case.limit_bytes:
            limit = case.limit_bytes
            os.makedirs(os.path.join(d, case.mount[0]), exist_ok=True)
        else:
            shutil.rmtree(d)
            return {"name": case.name, "outcome": "not tried (needs root to mount a file system)", "clean": None}
    if case.setup:
        case.setup(fx, d)
    before = snapshot(d)
    env = dict(os.environ, PYTHONPATH=UNDER_TEST, PYTHONIOENCODING="utf-8")
    t0 = time.time()
    proc = subprocess.Popen([sys.executable, "-m", "dihedra", *case.argv], cwd=d, env=env, stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, text=True, preexec_fn=_limit(limit))
    head = ""
    if case.signal_after:   # the signal comes a random time after the run has started its first replica
        sig, after = case.signal_after
        while True:
            line = proc.stderr.readline()
            head += line
            if not line or line.startswith("replica 1/"):
                break
        time.sleep(after)
        if proc.poll() is None:
            proc.send_signal(sig)
    try:
        stdout, stderr = proc.communicate(timeout=case.max_seconds or TIMEOUT_S)
        stderr = head + stderr
    except subprocess.TimeoutExpired:
        os.killpg(proc.pid, signal.SIGKILL)
        stdout, stderr = proc.communicate()
        stderr += "\n[killed: timeout]"
    seconds = time.time() - t0
    outcome, why = classify(case, proc.returncode, stdout, stderr, seconds)
    lost = lost_files(case, d, before, finished=proc.returncode == 0 or "was written (it is complete)" in stderr)
    if case.check and outcome == "as expected" and not lost:
        problem = case.check(d, stderr) if case.check is check_no_track else case.check(d)
        if problem:
            outcome, why = "wrong", problem
    result = {"name": case.name, "expect": case.expect, "returncode": proc.returncode, "seconds": round(seconds, 1),
              "outcome": outcome, "why": why, "lost": lost, "clean": outcome == "as expected" and not lost,
              "stderr_tail": stderr.strip().splitlines()[-3:]}
    if not result["clean"]:
        result["stderr"] = stderr
    shutil.rmtree(d, ignore_errors=True)
    return result


def classify(case, rc, stdout, stderr, seconds):
    tb = "Traceback" in stderr or "Exception ignored" in stderr
    errors = [line for line in stderr.splitlines() if line.startswith("dihedra: error:")]
    if rc is not None and rc < 0:
        return "crash", f"killed by signal {-rc}"
    if tb:
        return "traceback", "a traceback was printed"
    if case.max_seconds and seconds > case.max_seconds:
        return "slow", f"took {seconds:.0f} s"
    if case.expect == "works":
        if rc != 0:
            return "wrong", f"exit {rc}: {errors[:1]}"
        if case.notice and case.notice not in stderr + stdout:
            return "wrong", f"no notice containing {case.notice!r}"
        return "as expected", ""
    if case.expect == "interrupt":
        if rc == 0:   # the signal came after the end: a finished run is fine too
            return "as expected", "finished before the signal"
        if rc in (130, 143) and len(stderr.strip().splitlines()[-1:]) == 1:
            return "as expected", ""
        return "wrong", f"exit {rc}"
    if rc != 2:
        return "wrong", f"exit {rc}"
    if len(errors) != 1:
        return "wrong", f"{len(errors)} error lines"
    return "as expected", ""


def lost_files(case, d, before, finished):
    """Files of the case folder that changed (or went away), but the case's own output (which a
    finished run may replace), and staging folders left behind."""
    after = snapshot(d)
    lost = []
    for rel, digest in before.items():
        if after.get(rel) != digest:
            mine = finished and case.output and (rel == case.output or rel.startswith(case.output + os.sep))
            if not mine:
                lost.append(rel)
    for root, dirs, files in os.walk(d):
        for name in dirs:
            if ".partial-" in name or ".old-" in name:
                lost.append(os.path.relpath(os.path.join(root, name), d) + " (staging folder left)")
    return lost


GROUPS = [   # (group, test of the case name), first match wins
    ("signals at random moments", lambda n: n.startswith(("SIGINT", "SIGTERM"))),
    ("user's files (--out, --overwrite)", lambda n: "--out" in n or "--overwrite" in n),
    ("damaged results folders", lambda n: "on a folder with" in n),
    ("full disk, read-only folder", lambda n: "full disk" in n or "read-only" in n),
    ("trajectories", lambda n: "XTC" in n or "DCD" in n or "trajectory" in n),
    ("analysis files (dihedra run)", lambda n: n.startswith("run ")),
    ("cluster", lambda n: "scheduler" in n),
    ("names with spaces and non-ASCII", lambda n: "non-ASCII" in n),
    ("option values", lambda n: n.split()[1].startswith("--") if len(n.split()) > 1 else False),
    ("input files", lambda n: True),
]


def group_of(name):
    return next(g for g, test in GROUPS if test(name))


def markdown(results):
    """The counts per group of cases, as a Markdown table (for docs/robustness.md)."""
    rows = ["| cases | tried | ended as expected | clean error (exit 2, one line) | worked (exit 0) | "
            "stopped cleanly | nothing lost |", "| --- | --- | --- | --- | --- | --- | --- |"]
    order = [g for g, _ in GROUPS]
    groups = sorted({group_of(r["name"]) for r in results}, key=order.index)
    for g in groups + ["all"]:
        rs = [r for r in results if r["clean"] is not None and (g == "all" or group_of(r["name"]) == g)]
        ok = [r for r in rs if r["outcome"] == "as expected"]
        cells = [len(rs), len(ok), sum(r["expect"] == "error" for r in ok), sum(r["expect"] == "works" for r in ok),
                 sum(r["expect"] == "interrupt" for r in ok), sum(not r["lost"] for r in rs)]
        name = "**all**" if g == "all" else g
        rows.append(f"| {name} | " + " | ".join(str(x) for x in cells) + " |")
    return "\n".join(rows)


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--only", default=None, help="run the cases whose name contains this text")
    parser.add_argument("--json", default=None, help="write every outcome to this JSON file")
    parser.add_argument("--keep", action="store_true", help="keep the work folder")
    parser.add_argument("--markdown", action="store_true", help="also print the counts per group as a table")
    parser.add_argument("--repo", default=REPO, help="the dihedra checkout to run (default: this one), e.g. an "
                                                       "older version to compare with")
    args = parser.parse_args(argv)
    global UNDER_TEST
    UNDER_TEST = os.path.abspath(args.repo)
    work = tempfile.mkdtemp(prefix="dihedra-robustness-")
    try:
        fx = build_fixtures(work)
        todo = [c for c in cases() if args.only is None or args.only in c.name]
        results = []
        for case in todo:
            r = run_case(case, fx, os.path.join(work, "cases"))
            results.append(r)
            mark = {True: "ok  ", False: "FAIL", None: "skip"}[r["clean"]]
            extra = "" if r["clean"] in (True, None) else (f"  [{r['outcome']}: {r.get('why')}; lost "
                                                           f"{r.get('lost')[:3]}; {r.get('stderr_tail')}]")
            print(f"{mark} {r['name']} ({r.get('seconds', 0)} s){extra}", flush=True)
        tried = [r for r in results if r["clean"] is not None]
        counts = {
            "cases": len(results), "tried": len(tried),
            "ended as expected": sum(r["outcome"] == "as expected" for r in tried),
            "clean errors (exit 2, one line)": sum(r["outcome"] == "as expected" and r["expect"] == "error"
                                                   for r in tried),
            "worked (exit 0)": sum(r["outcome"] == "as expected" and r["expect"] == "works" for r in tried),
            "interrupted cleanly": sum(r["outcome"] == "as expected" and r["expect"] == "interrupt" for r in tried),
            "nothing lost": sum(not r["lost"] for r in tried),
            "tracebacks": sum(r["outcome"] == "traceback" for r in tried),
            "crashes": sum(r["outcome"] == "crash" for r in tried),
        }
        print(json.dumps(counts, indent=1))
        if args.markdown:
            print(markdown(results))
        if args.json:
            with open(args.json, "w", encoding="utf-8") as fh:
                json.dump({"counts": counts, "cases": results}, fh, indent=1)
        return 0 if counts["ended as expected"] == counts["tried"] == counts["nothing lost"] else 1
    finally:
        if not args.keep:
            shutil.rmtree(work, ignore_errors=True)


if __name__ == "__main__":
    sys.exit(main())
