"""The cases of the robustness survey (``benchmarks/robustness.py``): each a command line, the
files it needs, and how it should end (see the survey's notes)."""

from __future__ import annotations

import os
import random
import shutil
import signal

from tests.robustness_files import cut_mid_frame, damaged_xtc_variants, nan_overflow_xtc


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


BASE = ("hexane.pdb", "hexane.xtc")


def inputs(*names):
    return lambda fx, d: copy_in(fx, d, *names)


def res(fx, d):
    copy_in(fx, d, "res")


def _value_cases(c):
    """The cases of hostile values."""
    for opt, value in [("--dt-ps", "0"), ("--dt-ps", "-1"), ("--dt-ps", "nan"), ("--step", "-1"), ("--step", "0"),
                       ("--temperature", "0"), ("--temperature", "-5"), ("--temperature", "nan"),
                       ("--temperature", "inf"), ("--workers", "0"), ("--workers", "-2"), ("--start", "5000"),
                       ("--threads", "3")]:
        c.append(Case(f"track {opt} {value}", TRACK + [opt, value], setup=inputs(*BASE)))
    # (the fixture folder holds profiles and kinetics: --overwrite, so that the value is what is refused)
    for cmd in (["profile", "res", "--overwrite"], ["kinetics", "res", "--overwrite"],
                ["compare", "res", "--scan", "trappe_ua_torsion.toml", "--types", "all"]):
        for value in (("-3",) if cmd[0] == "kinetics" else ("0", "-3")):   # kinetics: 0 is no intervals
            c.append(Case(f"{cmd[0]} --bootstrap {value}", cmd + ["--bootstrap", value],
                          setup=lambda fx, d: copy_in(fx, d, "res", "trappe_ua_torsion.toml")))
    c.append(Case("profile --bin-width 7", ["profile", "res", "--overwrite", "--bin-width", "7"], setup=res))
    c.append(Case("profile --temperature -1", ["profile", "res", "--overwrite", "--temperature", "-1"], setup=res))
    c.append(Case("kinetics --dt-ps 0", ["kinetics", "res", "--overwrite", "--dt-ps", "0"], setup=res))
    c.append(Case("kinetics --lag 0", ["kinetics", "res", "--overwrite", "--lag", "0"], setup=res))
    for value in ("0", "-2", "nan"):
        c.append(Case(f"kinetics --lag-ps {value}", ["kinetics", "res", "--lag-ps", value, "--overwrite"], setup=res))
    for value in ("0", "-3"):
        c.append(Case(f"refit --bootstrap {value}", ["refit", "res", "--target", "res", "--bootstrap", value],
                      setup=res))
    for cmd in (["kinetics", "res", "--overwrite"], ["figures", "res", "--format", "png"]):
        c.append(Case(f"{cmd[0]} --types nosuch", cmd + ["--types", "nosuch"], setup=res))


def _file_cases(c):
    """The cases of hostile input files."""
    def weights_dup(fx, d):
        copy_in(fx, d, *BASE)
        rows = ["replica,frame,weight"] + [f"0,{f},1.0" for f in range(100)] + ["0,5,3.0"]
        write(d, "w.csv", "\n".join(rows) + "\n")
    c.append(Case("weights with a duplicate (replica, frame)", TRACK + ["--weights", "w.csv"], setup=weights_dup))

    def weights_short(fx, d):
        copy_in(fx, d, *BASE)
        write(d, "w.csv", "weight\n" + "1\n" * 40)
    c.append(Case("weights with too few rows", TRACK + ["--weights", "w.csv"], setup=weights_short))

    def one_frame(fx, d):   # a folder of a single frame: kinetics has no pair of frames to count
        copy_in(fx, d, *BASE)
        from dihedra import track
        track(os.path.join(d, "hexane.pdb"), [os.path.join(d, "hexane.xtc")], torsions="rotatable", stop=1,
              out=os.path.join(d, "one"))
    c.append(Case("kinetics of a single frame", ["kinetics", "one", "--dt-ps", "10"], setup=one_frame))

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

    def coupled_atoms(fx, d):
        copy_in(fx, d, "res")
        write(d, "exp.csv", 'torsion,coupled_atoms,J_hz,J_err_hz\nHEX:C1-C2-C3-C4,"H1,H2",5,0.5\n')
    c.append(Case("experimental couplings of coupled atoms the torsion has not",
                  ["couplings", "res", "--relation", "karplus-1959", "--types", "HEX:C1-C2-C3-C4",
                   "--experimental", "exp.csv"], setup=coupled_atoms))

    for label, atoms in [("fractional", "[0, 1, 2, 3.7]"), ("string", '["0", "1", "2", "3"]'),
                         ("negative", "[0, 1, 2, -3]"), ("out of range", "[0, 1, 2, 99999]")]:
        def tors(fx, d, atoms=atoms):
            copy_in(fx, d, *BASE)
            write(d, "t.toml", f'[[torsion]]\nname = "t"\natoms = {atoms}\n')
        c.append(Case(f"torsion file with a {label} index", TRACK[:4] + ["t.toml", "--out", "out"], setup=tors))
    c.append(Case("torsions --csv DIRECTORY", ["torsions", "hexane.pdb", "--torsions", "rotatable", "--csv", "sub"],
                  setup=lambda fx, d: (copy_in(fx, d, *BASE), os.mkdir(os.path.join(d, "sub")))))
    c.append(Case("XTC given as topology", ["track", "hexane.xtc", "hexane.xtc", "--torsions", "rotatable",
                                            "--out", "out"], setup=inputs(*BASE)))
    c.append(Case("missing trajectory", TRACK[:2] + ["nothere.xtc"] + TRACK[3:], setup=inputs(*BASE)))
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
        for extra in ([], ["--workers", "2", "--backend", "multiprocessing"]):
            c.append(Case(f"XTC {label}" + (" (2 workers)" if extra else ""),
                          ["track", "hexane.pdb", "bad.xtc", "--torsions", "rotatable", "--out", "out", *extra],
                          setup=damaged))

    def cut_end(fx, d):
        copy_in(fx, d, *BASE)
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


def _folder_cases(c):
    """The cases of damaged results folders."""
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
        "corrupt cores.parquet (no angles)": (lambda d: [shutil.rmtree(os.path.join(d, "res/angles.parquet")),
                                                         truncate(_first_parquet(os.path.join(d, "res/cores.parquet")),
                                                                  0.4)], ("kinetics",)),
    }
    commands = {"profile": ["profile", "res", "--overwrite"], "kinetics": ["kinetics", "res", "--overwrite"],
                "figures": ["figures", "res", "--format", "png"], "report": ["report", "res"]}
    for label, (spoil, readers) in damage.items():
        for name in readers:
            def damaged_res(fx, d, spoil=spoil):
                copy_in(fx, d, "res")
                spoil(d)
            c.append(Case(f"{name} on a folder with a {label}", commands[name], setup=damaged_res))


def _fault_cases(c):
    """The cases of output faults."""
    c.append(Case("track into a full disk", ["track", "../../fixtures/hexane.pdb", "../../fixtures/long.xtc",
                                             "--torsions", "rotatable", "--out", "full/out", "--keep-angles"],
                  mount=("full", 96 * 1024, False), limit_bytes=96 * 1024))
    c.append(Case("profile into a full disk", ["profile", "full/res"], mount=("full", None, False),
                  setup=None, limit_bytes=None))
    c.append(Case("profile in a read-only results folder", ["profile", "ro/res"], mount=("ro", None, True)))


def _cluster_cases(c):
    """The cases of clusters."""
    c.append(Case("unreachable --scheduler", TRACK + ["--scheduler", "tcp://127.0.0.1:9"], setup=inputs(*BASE),
                  max_seconds=20))


def _run_cases(c):
    """The cases of analysis files."""
    def toml(body):
        def setup(fx, d):
            copy_in(fx, d, *BASE, "trappe_ua_torsion.toml")
            write(d, "one.csv", "angle_deg\n0\n120\n")
            write(d, "a.toml", body)
        return setup
    head = 'out = "out"\n[track]\ntopology = "hexane.pdb"\ntrajectories = ["hexane.xtc"]\ntemperature_k = 300\n'
    for label, body in [("a bad [profile] bin width", head + "[profile]\nbin_width_deg = 7\n"),
                        ("a missing [compare] scan", head + '[compare]\nscan = "nothere.csv"\n'),
                        ("a bad [kinetics] lag", head + "[kinetics]\nlags = [0]\n"),
                        ("a bad [kinetics] bootstrap", head + "[kinetics]\nn_bootstrap = -1\n"),
                        ("a bad [kinetics] lag in ps", head + "[kinetics]\nlags_ps = [0]\n"),
                        ("a bad [refit] bootstrap", head + '[refit]\ntarget = "one.csv"\nn_bootstrap = 0\n'),
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


def _name_cases(c):
    """The cases of names."""
    def odd_names(fx, d):
        os.makedirs(os.path.join(d, "my data ñ"))
        shutil.copy(os.path.join(fx, "hexane.pdb"), os.path.join(d, "my data ñ", "hexane é.pdb"))
        shutil.copy(os.path.join(fx, "hexane.xtc"), os.path.join(d, "my data ñ", "traj ü 1.xtc"))
    c.append(Case("paths with spaces and non-ASCII characters",
                  ["track", "my data ñ/hexane é.pdb", "my data ñ/traj ü 1.xtc", "--torsions", "rotatable", "--out",
                   "résultats 1"], expect="works", setup=odd_names, output="résultats 1"))
    c.append(Case("profile of a folder named with spaces and non-ASCII characters",
                  ["profile", "résultats ü", "--bootstrap", "20", "--overwrite"], expect="works",
                  setup=lambda fx, d: shutil.copytree(os.path.join(fx, "res"), os.path.join(d, "résultats ü")),
                  output="résultats ü"))


def _loss_cases(c):
    """The cases of data loss."""
    c.append(Case("track --out . --overwrite", TRACK[:-1] + [".", "--overwrite"], setup=inputs(*BASE)))
    c.append(Case("track --out '' --overwrite", TRACK[:-1] + ["", "--overwrite"], setup=inputs(*BASE)))
    c.append(Case("track --out DATA-FOLDER --overwrite", ["track", "data/hexane.pdb", "data/hexane.xtc",
                                                          "--torsions", "rotatable", "--out", "data", "--overwrite"],
                  setup=lambda fx, d: (os.mkdir(os.path.join(d, "data")), copy_in(fx, os.path.join(d, "data"), *BASE))))

    def users_files(fx, d):
        copy_in(fx, d, *BASE, "res")
        write(d, "res/NOTES.md", "my notes\n")
    c.append(Case("track --overwrite a results folder holding a user's notes", TRACK[:-1] + ["res", "--overwrite"],
                  setup=users_files))
    c.append(Case("track into an existing folder without --overwrite", TRACK[:-1] + ["res"],
                  setup=lambda fx, d: copy_in(fx, d, *BASE, "res")))
    c.append(Case("report --out onto the topology", ["report", "res", "--no-figures", "--out", "hexane.pdb"],
                  setup=lambda fx, d: copy_in(fx, d, *BASE, "res")))


def _signal_cases(c):
    """The cases of signals."""
    rng = random.Random(18)
    for sig in (signal.SIGINT, signal.SIGTERM):
        for label, extra in [("serial, 2 threads", ["--threads", "2"]), ("serial, 1 thread", ["--threads", "1"]),
                             ("2 processes", ["--workers", "2", "--backend", "multiprocessing"]),
                             ("dask, 2 processes", ["--workers", "2", "--backend", "dask"])]:
            for k in range(3):
                after = rng.uniform(0.0, 4.0)
                c.append(Case(f"{signal.Signals(sig).name} {after:.1f} s into a run ({label}), --overwrite of an "
                              f"old folder (#{k + 1})",
                              ["track", "hexane.pdb", *["long.xtc"] * 36, "--torsions", "rotatable",
                               "--allow-duplicates", "--keep-angles", "--out", "res", "--overwrite", *extra],
                              expect="interrupt", setup=lambda fx, d: copy_in(fx, d, "hexane.pdb", "long.xtc", "res"),
                              output="res", signal_after=(sig, after), max_seconds=60))


def cases():
    """Every case, in groups."""
    c = []
    for group in (_value_cases, _file_cases, _folder_cases, _fault_cases, _cluster_cases, _run_cases, _name_cases, _loss_cases, _signal_cases):
        group(c)
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
