"""Benchmark of the trajectory pass against the cost of reading the trajectory (not a test).

Builds (once, cached in ``--data``) a synthetic liquid of united-atom six-site chains, 5000
chains by default: 30,000 atoms, 15,000 C-C-C-C torsions (``rotatable``), with atoms wrapped into
the box one by one, torsions that hop between anti and gauche and a PDB topology with CONECT
bonds, as an XTC of 4 N frames (N = ``--frames``, default 1,500) and the same frames as a DCD
(written by MDAnalysis from the XTC: the same coordinates). Both files must stay in the page cache
(the DCD of 6,000 frames is 2.2 GB) for (a) to be the cost of decoding, not of the disk.

For each format it runs, each command in a fresh process, over 1 frame, N frames and 4 N frames,
every run ``--repeat`` times in rounds (each round runs every command once, so that a slow spell
of the machine touches all kinds alike):

(a)  bare MDAnalysis iteration reading the coordinates (the floor of the targets; its 1-frame run
     is the Universe's own load time: Python, MDAnalysis, the topology);
(a2) dihedra's own batch reader alone (the XTC decoder, the DCD reader of ``trajread``);
(b)  ``dihedra track`` as a user runs it (``--workers auto``: on two cores one process whose
     second thread computes while the first reads);
(b0) the same reading through MDAnalysis' iteration (``DIHEDRA_NO_XTC_DECODER=1`` /
     ``DIHEDRA_NO_DCD_READER=1``), as every other format is read;
(b1) ``--threads 1``;
(c2) ``--workers 2`` as a user asks for it (at most two: dihedra decides);
(c)  ``--workers 2 --backend multiprocessing``: exactly two worker processes;
(d)  ``--scheduler ADDRESS`` on a local dask.distributed cluster of 2 worker processes (only
     with ``--with-dask``).

It prints, per format and kind, the marginal cost per frame ``(T(N) - T(1)) / (N - 1)`` (for (c)
and (d) ``T(2)`` is the start: one frame per worker) in wall and CPU time (user + system of every
process and thread), its ratio to (a) round by round (median [min, max] over the rounds: the
spread the machine's noise leaves) and the cost per torsion-frame in ns; the same from 4 N
frames; the ratio between N and 4 N frames, ``(T(4N) - T(N)) / (3 N)``, where the tables no
longer grow; the Theil-Sen slope (``scipy.stats.theilslopes``, 90 % interval) through every run;
the fixed cost of a run, ``T_b(1) - T_a(1)`` (a 1-frame run against the Universe's load), with
the seconds by phase that ``summary.json`` records, and the same for the first run of a file
(``DIHEDRA_NO_HASH_CACHE=1``: its SHA-256 computed, not remembered); and the peak memory in MB
of 10^6 bytes (the command's own high-water mark, or the sum of the resident set sizes of its
process tree, polled every 20 ms, where that is larger) of (b) at 1, N, 2 N and 4 N frames. The
time to compile the kernels with an empty numba cache (once per installation) is measured
separately.

Post-processing: ``dihedra track`` over as many copies of the 4 N-frame XTC (as replicas) as make
at least ``--post-samples`` (default 10^8) state samples, then ``dihedra profile`` and ``dihedra
kinetics --assignment crisp`` on that folder, timed separately.

Run from the repository root::

    python benchmarks/bench_track.py --repeat 3 --skip post   # the trajectory pass, about 10 min
    python benchmarks/bench_track.py --repeat 3               # with post-processing
"""

from __future__ import annotations

import argparse
import contextlib
import json
import os
import subprocess
import sys
import tempfile
import threading
import time

import numpy as np

REPO = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))


# --------------------------------------------------------------------------------------------
# Synthetic system
# --------------------------------------------------------------------------------------------

def build_system(folder, n_mol, n_frames, seed=1, log=print):
    """Write ``bench.pdb`` (CONECT bonds, CRYST1) and ``bench.xtc`` of six-site chains."""
    import warnings

    import MDAnalysis as mda

    rng = np.random.default_rng(seed)
    per = 6
    n_atoms = n_mol * per
    u = mda.Universe.empty(n_atoms, n_residues=n_mol, atom_resindex=np.repeat(np.arange(n_mol), per),
                           trajectory=True)
    u.add_TopologyAttr("name", [f"C{k + 1}" for k in range(per)] * n_mol)
    u.add_TopologyAttr("type", ["C"] * n_atoms)
    u.add_TopologyAttr("element", ["C"] * n_atoms)
    u.add_TopologyAttr("resname", ["HEX"] * n_mol)
    u.add_TopologyAttr("resid", np.arange(1, n_mol + 1))
    u.add_TopologyAttr("masses", [15.035, 14.027, 14.027, 14.027, 14.027, 15.035] * n_mol)
    base = np.arange(n_mol)[:, None] * per
    bonds = np.stack([base + np.arange(per - 1), base + np.arange(1, per)], axis=-1).reshape(-1, 2)
    u.add_TopologyAttr("bonds", [tuple(map(int, b)) for b in bonds])
    # liquid n-hexane density, 0.655 g/cm3
    side = (n_mol * 86.18 / (0.655 * 6.02214076e23) * 1e24) ** (1 / 3)
    box = np.array([side, side, side, 90, 90, 90], dtype=np.float32)
    centres = rng.uniform(0, side, (n_mol, 3))
    rot, _ = np.linalg.qr(rng.normal(size=(n_mol, 3, 3)))
    wells = np.array([180.0, 65.0, -65.0])
    states = rng.choice(wells, size=(n_mol, 3))
    bond, angle = 1.54, np.radians(114.0)

    def frame():
        phi = np.radians(states + rng.normal(0, 12.0, states.shape))
        p = np.zeros((n_mol, per, 3))
        p[:, 1] = [bond, 0, 0]
        p[:, 2] = p[:, 1] + [-bond * np.cos(angle), bond * np.sin(angle), 0]
        for k in range(per - 3):   # natural extension reference frame (common practice)
            a, b, c = p[:, k], p[:, k + 1], p[:, k + 2]
            bc = (c - b) / bond
            n = np.cross(b - a, bc)
            n /= np.linalg.norm(n, axis=1)[:, None]
            m = np.cross(n, bc)
            p[:, k + 3] = (c - bond * np.cos(angle) * bc + bond * np.sin(angle) * (
                np.cos(phi[:, k])[:, None] * m + np.sin(phi[:, k])[:, None] * n))
        p -= p.mean(axis=1, keepdims=True)
        p = np.einsum("mij,maj->mai", rot, p) + centres[:, None, :]
        return np.mod(p.reshape(-1, 3), side)        # every atom wrapped on its own

    u.atoms.positions = frame()
    u.dimensions = box
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        u.atoms.write(os.path.join(folder, "bench.pdb"))
        t0 = time.time()
        with mda.Writer(os.path.join(folder, "bench.xtc.partial"), n_atoms, format="XTC") as w:
            for f in range(n_frames):
                hop = rng.random(states.shape) < 0.02
                states[hop] = rng.choice(wells, size=int(hop.sum()))
                centres[:] = np.mod(centres + rng.normal(0, 0.3, centres.shape), side)
                u.atoms.positions = frame()
                u.dimensions = box
                u.trajectory.ts.time = 2.0 * f
                w.write(u.atoms)
                if f % 500 == 499:
                    log(f"  wrote {f + 1}/{n_frames} frames ({time.time() - t0:.0f} s)")
    os.replace(os.path.join(folder, "bench.xtc.partial"), os.path.join(folder, "bench.xtc"))
    with open(os.path.join(folder, "bench.json"), "w") as fh:
        json.dump({"molecules": n_mol, "frames": n_frames, "seed": seed}, fh)


def ensure_system(folder, n_mol, n_frames, log=print):
    meta = os.path.join(folder, "bench.json")
    if os.path.exists(meta):
        with open(meta) as fh:
            have = json.load(fh)
        # (a longer file serves too: the frames are drawn in order, so its first frames are the
        # same as those of a shorter one)
        if have.get("molecules") == n_mol and have.get("frames", 0) >= n_frames:
            return
    os.makedirs(folder, exist_ok=True)
    log(f"building the synthetic system in {folder}: {n_mol} chains, {6 * n_mol} atoms, "
        f"{3 * n_mol} torsions, {n_frames} frames")
    build_system(folder, n_mol, n_frames, log=log)


# --------------------------------------------------------------------------------------------
# Measuring a command
# --------------------------------------------------------------------------------------------

def _children(pid):
    try:
        with open(f"/proc/{pid}/task/{pid}/children") as fh:
            return [int(x) for x in fh.read().split()]
    except OSError:
        return []


def _tree(pid):
    out, todo = [], [pid]
    while todo:
        p = todo.pop()
        out.append(p)
        todo.extend(_children(p))
    return out


def _rss_bytes(pid):
    try:
        with open(f"/proc/{pid}/statm") as fh:
            return int(fh.read().split()[1]) * os.sysconf("SC_PAGE_SIZE")
    except (OSError, IndexError, ValueError):
        return 0


def _cpu_seconds(pid):
    try:
        with open(f"/proc/{pid}/stat") as fh:
            fields = fh.read().rsplit(")", 1)[1].split()
        return (int(fields[11]) + int(fields[12])) / os.sysconf("SC_CLK_TCK")
    except (OSError, IndexError, ValueError):
        return 0.0


def measure(cmd, extra_pids=(), env=None):
    """Run ``cmd``; return wall seconds, CPU seconds (tree + extra processes) and the peak memory in
    MB of 10^6 bytes (the unit of the targets): the larger of the command's own high-water mark
    (``ru_maxrss`` from ``wait4``, exact) and the sum of the resident sizes of its process tree,
    polled every 20 ms (workers of a parallel run)."""
    extra_cpu0 = sum(_cpu_seconds(p) for p in extra_pids)
    before = os.times()
    t0 = time.perf_counter()
    proc = subprocess.Popen(cmd, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, env=env, cwd=REPO)
    peak = [0]
    done = threading.Event()

    def poll():
        while not done.is_set():
            total = sum(_rss_bytes(p) for p in _tree(proc.pid)) + sum(_rss_bytes(p) for p in extra_pids)
            peak[0] = max(peak[0], total)
            time.sleep(0.02)

    err = []
    threads = [threading.Thread(target=poll, daemon=True),
               threading.Thread(target=lambda: err.append(proc.stderr.read()), daemon=True)]
    for th in threads:
        th.start()
    _, status, usage = os.wait4(proc.pid, 0)   # (its rusage: Popen.wait would drop it)
    proc.returncode = os.waitstatus_to_exitcode(status)
    wall = time.perf_counter() - t0
    done.set()
    for th in threads:
        th.join()
    after = os.times()
    if proc.returncode != 0:
        raise RuntimeError(f"command failed ({proc.returncode}): {' '.join(cmd)}\n{b''.join(err).decode()[-3000:]}")
    cpu = (after.children_user - before.children_user) + (after.children_system - before.children_system)
    cpu += sum(_cpu_seconds(p) for p in extra_pids) - extra_cpu0
    high_water = usage.ru_maxrss * (1 if sys.platform == "darwin" else 1024)   # (bytes on macOS, kB elsewhere)
    return {"wall_s": wall, "cpu_s": cpu, "peak_rss_mb": max(peak[0], high_water) / 1e6}


FLOOR = """
import sys, warnings
warnings.simplefilter("ignore")
import MDAnalysis as mda
u = mda.Universe(sys.argv[1], sys.argv[2])
total = 0.0
for ts in u.trajectory[:int(sys.argv[3])]:
    total += float(ts.positions[0, 0])
"""


READER_FLOOR = """
import sys, warnings
warnings.simplefilter("ignore")
import numpy as np
import MDAnalysis as mda
from dihedra.trajectory.trajread import frame_source
from dihedra.trajectory.trackpass import BATCH_BYTES
u = mda.Universe(sys.argv[1], sys.argv[2])
src = frame_source(u.trajectory)
assert src is not None, "dihedra's batch reader is not available here"
n, stop = u.atoms.n_atoms, int(sys.argv[3])
size = max(1, min(BATCH_BYTES // (12 * n), stop))
pos, dims = np.empty((size, n, 3), np.float32), np.empty((size, 6), np.float32)
frame, t = np.empty(size, np.int64), np.empty(size)
total = 0.0
for lo in range(0, stop, size):
    hi = min(stop, lo + size)
    src.read(np.arange(lo, hi), pos, dims, frame, t)
    total += float(pos[0, 0, 0])
"""

JIT_PROBE = """
import sys, time, warnings
warnings.simplefilter("ignore")
import MDAnalysis as mda
from dihedra.selection.schemes import get_scheme
from dihedra.selection.specs import select_torsions
from dihedra.trajectory.trackpass import TorsionPass
u = mda.Universe(sys.argv[1], sys.argv[2])
tset = select_torsions(u, "rotatable")
out = []
for _ in range(2):
    t0 = time.process_time()
    TorsionPass(u, tset, get_scheme("anti-gauche")).run(stop=2)
    out.append(time.process_time() - t0)
print(*out)
"""

#: Frames of the start-up run of each kind (2 workers: one frame each).
START_FRAMES = {"c": 2, "d": 2}

#: What each kind is, for the table.
LABELS = {"a": "(a) MDAnalysis reading only", "a2": "(a2) dihedra's batch reader only",
          "b": "(b) dihedra track (default)", "b0": "(b0) track, reading by MDAnalysis",
          "b1": "(b1) track --threads 1", "c2": "(c2) track --workers 2 (decided)",
          "c": "(c) track --workers 2 --backend mp", "d": "(d) --scheduler, 2 dask workers"}

#: The variable that sends each format through MDAnalysis' iteration.
NO_READER = {"xtc": "DIHEDRA_NO_XTC_DECODER", "dcd": "DIHEDRA_NO_DCD_READER"}


def ensure_dcd(folder, n_frames, log=print):
    """``bench.dcd``: the frames of ``bench.xtc`` written by MDAnalysis as DCD (same coordinates)."""
    import warnings

    import MDAnalysis as mda

    meta = os.path.join(folder, "bench-dcd.json")
    if os.path.exists(meta):
        with open(meta) as fh:
            if json.load(fh).get("frames", 0) >= n_frames:
                return
    log(f"writing {n_frames} frames of bench.xtc as bench.dcd")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        u = mda.Universe(os.path.join(folder, "bench.pdb"), os.path.join(folder, "bench.xtc"))
        with mda.Writer(os.path.join(folder, "bench.dcd.partial"), u.atoms.n_atoms, format="DCD",
                        dt=u.trajectory.dt) as w:
            for ts in u.trajectory[:n_frames]:
                w.write(u.atoms)
    os.replace(os.path.join(folder, "bench.dcd.partial"), os.path.join(folder, "bench.dcd"))
    with open(meta, "w") as fh:
        json.dump({"frames": n_frames}, fh)


def robust_slopes(samples, frames_of):
    """Theil-Sen slope (seconds per frame) of the wall time of every kind against its frame count,
    over every measurement, with the 90 % interval: {kind: {slope, low, high, runs}}."""
    from scipy.stats import theilslopes

    points = {}
    for name, values in samples.items():
        kind, length = name.split(":")
        k = START_FRAMES.get(kind, 1) if length == "1" else frames_of[length]
        points.setdefault(kind, []).extend((k, wall) for wall, _ in values)
    out = {}
    for kind, pts in points.items():
        x, y = np.array(pts, dtype=float).T
        if len(np.unique(x)) < 2:
            continue
        slope, _, low, high = theilslopes(y, x, 0.90)
        out[kind] = {"slope": float(slope), "low": float(low), "high": float(high), "runs": len(pts)}
    return out


def spread(values):
    """median, min, max."""
    v = sorted(values)
    return v[len(v) // 2], v[0], v[-1]


def run_format(fmt, args, data, py, env, pids, scheduler, n_torsions):
    """Every kind of run over one trajectory format; returns the figures."""
    n = args.frames
    frames_of = {"N": n, "2N": 2 * n, "4N": 4 * n}
    top, traj = os.path.join(data, "bench.pdb"), os.path.join(data, f"bench.{fmt}")
    out = os.path.join(data, "out")

    def track_cmd(stop, *extra):
        return [py, "-m", "dihedra", "track", top, traj, "--torsions", "rotatable", "--stop", str(stop),
                "--out", out, "--overwrite", *extra]

    plan = {"a": lambda k: [py, "-c", FLOOR, top, traj, str(k)], "b": track_cmd}
    if "a2" not in args.skip:
        plan["a2"] = lambda k: [py, "-c", READER_FLOOR, top, traj, str(k)]
    if "b0" not in args.skip:
        plan["b0"] = track_cmd
    if "b1" not in args.skip:
        plan["b1"] = lambda k: track_cmd(k, "--threads", "1")
    if "c2" not in args.skip:
        plan["c2"] = lambda k: track_cmd(k, "--workers", "2")
    if "c" not in args.skip:
        plan["c"] = lambda k: track_cmd(k, "--workers", "2", "--backend", "multiprocessing")
    if scheduler is not None:
        plan["d"] = lambda k: track_cmd(k, "--scheduler", scheduler)
    env_of = {"b0": dict(env, **{NO_READER[fmt]: "1"})}
    lengths = ["1", "N"] + (["4N"] if "memory" not in args.skip else [])
    measure(plan["a"](4 * n), env=env)   # the page cache
    # the numba cache (a run long enough for every specialisation of the kernels: the cut of the
    # torsion work moves, and a compiling run peaks far higher) and the hash cache
    measure(track_cmd(n), env=env)
    measure(track_cmd(n, "--threads", "1"), env=env)
    samples, rounds = {}, []
    for round_ in range(args.repeat):
        got = {}
        for kind, cmd in plan.items():
            for length in lengths:
                k = START_FRAMES.get(kind, 1) if length == "1" else frames_of[length]
                r = measure(cmd(k), extra_pids=pids if kind == "d" else (), env=env_of.get(kind, env))
                got[f"{kind}:{length}"] = r
                samples.setdefault(f"{kind}:{length}", []).append((r["wall_s"], r["cpu_s"]))
                print(f"  {fmt} round {round_ + 1} {kind}:{length:<3} wall {r['wall_s']:7.2f} s  cpu {r['cpu_s']:7.2f} s"
                      f"  peak {r['peak_rss_mb']:6.0f} MB  (load {os.getloadavg()[0]:.2f})", flush=True)
                if kind == "b" and length == "1":
                    with open(os.path.join(out, "summary.json")) as fh:
                        got["phases"] = json.load(fh).get("phase_seconds", {})
        if round_ == 0 and "memory" not in args.skip:
            got["b:2N"] = measure(track_cmd(2 * n), env=env)
            first = dict(env, DIHEDRA_NO_HASH_CACHE="1")
            got["b:1:first"] = measure(track_cmd(1), env=first)
            with open(os.path.join(out, "summary.json")) as fh:
                got["phases_first"] = json.load(fh).get("phase_seconds", {})
        rounds.append(got)
    return report_format(fmt, n, n_torsions, plan, lengths, rounds, samples, frames_of)


def report_format(fmt, n, n_torsions, plan, lengths, rounds, samples, frames_of):
    """Print and return the figures of one format."""
    res = {"rounds": rounds}
    print(f"\n{fmt.upper()}: marginal cost per frame over N = {n} frames, (T(N) - T(1)) / (N - 1) (c, d: from T(2)); "
          f"ratio to (a) round by round, median [min, max] over {len(rounds)} round(s); {n_torsions} torsions")
    print(f"  {'':<38} {'wall ms/frame':>13} {'ratio':>18} {'cpu ratio':>10} {'ns/torsion-frame':>17} {'peak MB':>8}")
    for hi in [x for x in lengths if x != "1"]:
        n_hi = frames_of[hi]
        if hi != "N":
            print(f"  from 4N = {n_hi} frames:")
        for kind in plan:
            def marg(r, key, kind=kind):
                k0 = START_FRAMES.get(kind, 1)
                return (r[f"{kind}:{hi}"][key] - r[f"{kind}:1"][key]) / (n_hi - k0)
            walls = [marg(r, "wall_s") for r in rounds]
            ratios = [marg(r, "wall_s") / marg(r, "wall_s", "a") for r in rounds]
            cpus = [marg(r, "cpu_s") / marg(r, "cpu_s", "a") for r in rounds]
            w, (rm, rlo, rhi), c = spread(walls)[0], spread(ratios), spread(cpus)[0]
            peak = spread([r[f"{kind}:{hi}"]["peak_rss_mb"] for r in rounds])[0]
            res[f"{kind}:{hi}"] = {"wall_ms": w * 1e3, "ratio": rm, "ratio_min": rlo, "ratio_max": rhi,
                                   "cpu_ratio": c, "ns_per_torsion_frame": w / n_torsions * 1e9, "peak_mb": peak}
            print(f"  {LABELS[kind]:<38} {w * 1e3:13.3f} {rm:6.2f} [{rlo:4.2f}, {rhi:4.2f}] {c:10.2f} "
                  f"{w / n_torsions * 1e9:17.1f} {peak:8.0f}")
    slopes = robust_slopes(samples, frames_of)
    fa = slopes["a"]
    print("  Theil-Sen slope of wall time against frames through every run (90 % interval):")
    for kind, r in slopes.items():
        print(f"    {LABELS[kind]:<36} {r['slope'] * 1e3:7.3f} ms/frame [{r['low'] * 1e3:.3f}, {r['high'] * 1e3:.3f}]"
              f"  ratio {r['slope'] / fa['slope']:5.2f} [{r['low'] / fa['high']:.2f}, {r['high'] / fa['low']:.2f}]")
    res["theil_sen"] = slopes
    if "N" in lengths and "4N" in lengths:   # once the tables no longer grow with the frames
        n_lo, n_hi = frames_of["N"], frames_of["4N"]
        print(f"  between N and 4N, (T(4N) - T(N)) / {n_hi - n_lo}, ratio to (a) round by round:")
        for kind in plan:
            if not all(f"{kind}:N" in r and f"{kind}:4N" in r for r in rounds):
                continue
            steady = [(r[f"{kind}:4N"]["wall_s"] - r[f"{kind}:N"]["wall_s"])
                      / (r["a:4N"]["wall_s"] - r["a:N"]["wall_s"]) for r in rounds]
            sm, slo, shi = spread(steady)
            print(f"    {LABELS[kind]:<36} {sm:5.2f} [{slo:.2f}, {shi:.2f}]")
            res[f"{kind}:N-4N"] = {"ratio": sm, "ratio_min": slo, "ratio_max": shi}
    fixed = [r["b:1"]["wall_s"] - r["a:1"]["wall_s"] for r in rounds]
    fm, flo, fhi = spread(fixed)
    a1 = spread([r["a:1"]["wall_s"] for r in rounds])[0]
    print(f"  fixed cost: 1-frame run of (b) minus the Universe's load (a, 1 frame: {a1:.2f} s): "
          f"{fm:.2f} s [{flo:.2f}, {fhi:.2f}]; seconds by phase: {rounds[-1].get('phases')}")
    res["fixed_s"] = {"median": fm, "min": flo, "max": fhi, "universe_s": a1, "phases": rounds[-1].get("phases")}
    if "b:1:first" in rounds[0]:
        first = rounds[0]["b:1:first"]["wall_s"] - rounds[0]["a:1"]["wall_s"]
        print(f"  the first run of a file (its SHA-256 computed, not remembered): {first:.2f} s more than (a); "
              f"phases {rounds[0].get('phases_first')}")
        res["fixed_first_s"] = first
        peaks = [rounds[0]["b:1"]["peak_rss_mb"], rounds[0]["b:N"]["peak_rss_mb"], rounds[0]["b:2N"]["peak_rss_mb"],
                 rounds[0]["b:4N"]["peak_rss_mb"]]
        print(f"  peak memory of (b) at 1, N, 2N, 4N frames: {', '.join(f'{p:.0f}' for p in peaks)} MB "
              f"(4N / N = {peaks[3] / peaks[1]:.3f})")
        res["peak_b_mb"] = peaks
    return res


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--data", default=os.path.join(tempfile.gettempdir(), "dihedra-bench"),
                    help="folder for the synthetic system and the results (kept between runs)")
    ap.add_argument("--molecules", type=int, default=5000, help="six-site chains (3 torsions each)")
    ap.add_argument("--frames", type=int, default=1500, help="N: frames of the ratio runs (default 1500)")
    ap.add_argument("--repeat", type=int, default=3, help="rounds of every run (default 3)")
    ap.add_argument("--formats", nargs="+", default=["xtc", "dcd"], choices=["xtc", "dcd"])
    ap.add_argument("--with-dask", action="store_true", help="also (d): a local dask.distributed cluster")
    ap.add_argument("--post-samples", type=float, default=1e8, help="state samples for post-processing")
    ap.add_argument("--skip", action="append", default=[], choices=["a2", "b0", "b1", "c", "c2", "memory", "jit", "post"],
                    help="leave out a part (repeatable)")
    args = ap.parse_args(argv)

    py = sys.executable
    # the commands and the dask workers (started from this process) import dihedra from here
    os.environ["PYTHONPATH"] = REPO + os.pathsep + os.environ.get("PYTHONPATH", "")
    sys.path.insert(0, REPO)
    env = dict(os.environ)
    n = args.frames
    data = os.path.abspath(args.data)
    ensure_system(data, args.molecules, 4 * n)
    if "dcd" in args.formats:
        ensure_dcd(data, 4 * n)
    top, xtc = os.path.join(data, "bench.pdb"), os.path.join(data, "bench.xtc")
    n_torsions = 3 * args.molecules
    print(f"machine: {os.cpu_count()} cores, load average {os.getloadavg()[0]:.2f} at start")
    print(f"system: {6 * args.molecules} atoms, {n_torsions} torsions; N = {n}, 4N = {4 * n} frames; "
          f"{args.repeat} round(s); formats {', '.join(args.formats)}")
    summary = {"n_torsions": n_torsions, "n_atoms": 6 * args.molecules, "frames": n}
    with contextlib.ExitStack() as stack:
        pids, scheduler = (), None
        if args.with_dask:
            from distributed import Client, LocalCluster
            cluster = stack.enter_context(LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                                       host="127.0.0.1", dashboard_address=None))
            client = stack.enter_context(Client(cluster))
            pids = list(client.run(os.getpid).values())
            scheduler = cluster.scheduler_address
        for fmt in args.formats:
            summary[fmt] = run_format(fmt, args, data, py, env, pids, scheduler, n_torsions)
    if "jit" not in args.skip:
        # the first pass of a process loads the compiled kernels from numba's cache, or compiles
        # them when the cache is empty (once per installation): CPU seconds of the first pass
        # minus those of a second one, in the same process
        jit = {}
        for label, extra in (("cached", {}), ("compiled", {"NUMBA_CACHE_DIR": None})):
            with tempfile.TemporaryDirectory() as cache:
                probe_env = dict(env, **{k: cache for k in extra})
                done = subprocess.run([py, "-c", JIT_PROBE, top, xtc], env=probe_env, cwd=REPO,
                                      capture_output=True, text=True, check=True)
            first, second = map(float, done.stdout.split())
            jit[label] = first - second
        summary["jit_cpu_s"] = jit
        print(f"\nloading the compiled kernels from numba's cache: {jit['cached']:.2f} s cpu; with an empty cache "
              f"(the first run of an installation) they are compiled instead: {jit['compiled']:.1f} s cpu.")
    print("targets: DCD (b)/(a) <= 1.3, XTC (b)/(a) <= 0.4; (b, 1 frame) - (a, 1 frame) <= 1.5 s; peak < 450 MB; "
          "(c2) never slower than (b)")
    if "post" not in args.skip:
        post_samples(args, data, top, xtc, n, n_torsions, py, env, summary)
    print(f"load average at the end: {os.getloadavg()[0]:.2f}")
    with open(os.path.join(data, "bench-result.json"), "w") as fh:
        json.dump(summary, fh, indent=2)
    print(f"numbers written to {os.path.join(data, 'bench-result.json')}")


def post_samples(args, data, top, xtc, n, n_torsions, py, env, summary):
    """Profiles and kinetics on a folder of at least ``--post-samples`` state samples
    (``bench_post.py``, which also measures other sample counts when run by itself)."""
    from bench_post import post_processing

    print()
    print("post-processing (benchmarks/bench_post.py):")
    summary["post"] = post_processing(data, top, xtc, n_torsions, [args.post_samples], py=py, env=env)

if __name__ == "__main__":
    main()
