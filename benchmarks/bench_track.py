"""Benchmark of the trajectory pass against the cost of reading the trajectory (not a test).

Builds (once, cached in ``--data``) a synthetic liquid of united-atom six-site chains, 5000
chains by default: 30,000 atoms, 15,000 C-C-C-C torsions (``rotatable``), an XTC of 4 N frames
(N = ``--frames``, default 4000: at 1,000 frames the start-up and the costs that grow only until
the block sums fill are still a large part of a run, and the start-up of a parallel run varies
by a second or more, which a difference over 1,000 frames cannot absorb; the 1,000-frame
marginal cost is measured and printed too. The file, 114 kB per frame, 1.8 GB for 16,000
frames, must stay in the page cache for (a) to be the cost of decoding, not of the disk: the
wall and CPU times of (a) show whether it did) with atoms wrapped into the box one by one,
torsions that hop between anti and gauche and a PDB topology with CONECT bonds. Then it runs,
each command in a fresh process, over the first frame only, over 1,000 frames and over N frames,
every run ``--repeat`` times (the
fastest kept, as the machine may be shared; in rounds, each round running every command once, so
that a slow spell of the machine touches all kinds alike):

(a) bare MDAnalysis iteration reading the coordinates (the I/O floor of the issue);
(a2) dihedra's own XTC decoder (``dihedra.trajectory.trajread``, which ``track`` uses for XTC) reading the
    same frames in batches, nothing else;
(b) ``dihedra track`` serial, as a user runs it: one process; on a machine with two usable
    cores its default is a second thread that computes while the first reads;
(b0) the same with ``DIHEDRA_NO_XTC_DECODER=1``: the frames read by MDAnalysis' iteration, as
    for every other format;
(b1) ``dihedra track --threads 1``: one process, one thread (the compiled kernels use no threads);
(c) ``dihedra track --workers 2`` (multiprocessing);
(d) ``dihedra track --scheduler ADDRESS`` on a local dask.distributed cluster of 2 worker
    processes started beforehand (as a site's job system would);

and prints the marginal cost per frame, ``(T(N) - T(1)) / (N - 1)``, of each as a ratio to that
of (a), in wall time and in CPU time (user + system of every process and thread involved; on a
shared machine the CPU ratio of serial runs is the steadier one), with the peak memory (sum of
the resident set sizes of the command's process tree, and of the cluster workers for (d), polled
every 20 ms). Every run is also made over 4 N frames ((b) over 2 N too): the peak memory of (b)
at 1x, 2x and 4x the frames, the marginal cost at 4 N, ``(T(4N) - T(1)) / (4N - 1)``, and from
the difference of two lengths, ``(T(4N) - T(N)) / 3N``, which leaves out most of the costs that
depend on the frame count only until the block sums are filled (conformer rows, table rows,
compressed histogram size); and, over every run of a command at once (1, N, 2N, 4N frames, each
repeat), the Theil-Sen slope of wall time against frames with its 90 % interval, which shows how
much the machine's noise leaves undecided. The start-up (subtracted with T(1)) includes loading the compiled kernels from
numba's cache; the time to compile them with an empty cache (once per installation) is measured
separately.

Post-processing: ``dihedra track`` over as many copies of the 4 N-frame trajectory (as replicas)
as make at least ``--post-samples`` (default 10^8) state samples, then ``dihedra profile`` and
``dihedra kinetics --assignment crisp`` on that folder, timed separately.

Run from the repository root::

    python benchmarks/bench_track.py                 # everything, about 30 min on 2 cores
    python benchmarks/bench_track.py --skip post     # the trajectory pass only
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
    """Run ``cmd``; return wall seconds, CPU seconds (tree + extra processes), peak RSS bytes."""
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

    th = threading.Thread(target=poll, daemon=True)
    th.start()
    _, err = proc.communicate()
    wall = time.perf_counter() - t0
    done.set()
    th.join()
    after = os.times()
    if proc.returncode != 0:
        raise RuntimeError(f"command failed ({proc.returncode}): {' '.join(cmd)}\n{err.decode()[-3000:]}")
    cpu = (after.children_user - before.children_user) + (after.children_system - before.children_system)
    cpu += sum(_cpu_seconds(p) for p in extra_pids) - extra_cpu0
    return {"wall_s": wall, "cpu_s": cpu, "peak_rss_mb": peak[0] / 2**20}


FLOOR = """
import sys, warnings
warnings.simplefilter("ignore")
import MDAnalysis as mda
u = mda.Universe(sys.argv[1], sys.argv[2])
total = 0.0
for ts in u.trajectory[:int(sys.argv[3])]:
    total += float(ts.positions[0, 0])
"""


DECODER_FLOOR = """
import sys, warnings
warnings.simplefilter("ignore")
import numpy as np
import MDAnalysis as mda
from dihedra.trajectory.trajread import xtc_frames
from dihedra.trajectory.trackpass import BATCH_BYTES
u = mda.Universe(sys.argv[1], sys.argv[2])
src = xtc_frames(u.trajectory)
assert src is not None, "dihedra's XTC decoder is not available here"
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


#: The shortest run the issue asks about; measured too when N is longer.
SHORT = 1000

#: Frames of the start-up run of each kind (2 workers: one frame each).
START_FRAMES = {"c": 2, "d": 2}

JIT_PROBE = """
import sys, time, warnings
warnings.simplefilter("ignore")
import MDAnalysis as mda
from dihedra.selection.schemes import get_scheme
from dihedra.selection.specs import select_torsions
from dihedra.io.series import ParquetSeriesFactory
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


PASS_PROBE = """
import json, os, shutil, statistics, sys, tempfile, time, warnings
warnings.simplefilter("ignore")
import MDAnalysis as mda
from dihedra.selection.schemes import get_scheme
from dihedra.selection.specs import select_torsions
from dihedra.io.series import ParquetSeriesFactory
from dihedra.trajectory.trackpass import TorsionPass
top, xtc, n, repeat = sys.argv[1], sys.argv[2], int(sys.argv[3]), int(sys.argv[4])
u = mda.Universe(top, xtc)
tset = select_torsions(u, "rotatable")
scheme = get_scheme("anti-gauche")

def clock():
    return time.perf_counter(), time.process_time()

def read(stop):
    t = clock()
    for ts in u.trajectory[:stop]:
        ts.positions
    return t

def run(stop, threads):
    parts = tempfile.mkdtemp()
    t = clock()
    TorsionPass(u, tset, scheme, series=ParquetSeriesFactory(parts), threads=threads).run(stop=stop)
    shutil.rmtree(parts)
    return t

def since(t):
    w, c = clock()
    return w - t[0], c - t[1]

run(2, 1), run(2, 2)   # load the kernels
out = {k: [] for k in ("read", "pass1", "pass2")}
for _ in range(repeat):   # interleaved, so that a change of load hits all three alike
    for stop in (n, 4 * n):
        for key, f in (("read", lambda: read(stop)), ("pass1", lambda: run(stop, 1)),
                       ("pass2", lambda: run(stop, 2))):
            out[key].append((stop, *since(f())))
print(json.dumps(out))
"""


def pass_alone(top, xtc, n, repeat, py, env):
    """The pass in one process against reading the same frames, interleaved ``repeat`` times:
    per-frame cost from two lengths, (T(4N) - T(N)) / 3N, medians over the repeats."""
    done = subprocess.run([py, "-c", PASS_PROBE, top, xtc, str(n), str(repeat)], env=env, cwd=REPO,
                          capture_output=True, text=True, check=True)
    raw = json.loads(done.stdout.strip().splitlines()[-1])
    res = {}
    for key, rows in raw.items():
        by_len = {}
        for stop, wall, cpu in rows:
            by_len.setdefault(stop, []).append((wall, cpu))
        pairs = list(zip(by_len[n], by_len[4 * n]))
        res[key] = {kind: sorted((b[i] - a[i]) / (3 * n) for a, b in pairs)[len(pairs) // 2]
                    for i, kind in enumerate(("wall", "cpu"))}
    return res


def robust_slopes(samples, n):
    """Theil-Sen slope (seconds per frame) of the wall time of every kind against its frame count,
    over every measurement, with the 90 % interval: {kind: {slope, low, high, runs}}."""
    from scipy.stats import theilslopes

    frames_of = {"S": SHORT, "N": n, "2N": 2 * n, "4N": 4 * n}
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


# --------------------------------------------------------------------------------------------
# Main
# --------------------------------------------------------------------------------------------

def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--data", default=os.path.join(tempfile.gettempdir(), "dihedra-bench"),
                    help="folder for the synthetic system and the results (kept between runs)")
    ap.add_argument("--molecules", type=int, default=5000, help="six-site chains (3 torsions each)")
    ap.add_argument("--frames", type=int, default=4000,
                    help="N: frames of the ratio runs (at least 1000; default 4000, and 1000 measured too)")
    ap.add_argument("--repeat", type=int, default=2,
                    help="measure every run this many times and keep the fastest (default 2)")
    ap.add_argument("--post-samples", type=float, default=1e8, help="state samples for post-processing")
    ap.add_argument("--skip", action="append", default=[], choices=["a2", "b0", "b1", "c", "d", "memory", "alone", "jit", "post"],
                    help="leave out a part (repeatable)")
    args = ap.parse_args(argv)

    py = sys.executable
    # the commands and the dask workers (started from this process) import dihedra from here
    os.environ["PYTHONPATH"] = REPO + os.pathsep + os.environ.get("PYTHONPATH", "")
    sys.path.insert(0, REPO)
    env = dict(os.environ)
    n = args.frames
    frames_of = {"S": SHORT, "N": n, "2N": 2 * n, "4N": 4 * n}
    data = os.path.abspath(args.data)
    ensure_system(data, args.molecules, 4 * n)
    top, xtc = os.path.join(data, "bench.pdb"), os.path.join(data, "bench.xtc")
    out = os.path.join(data, "out")
    n_torsions = 3 * args.molecules

    def track_cmd(stop, *extra, trajs=(xtc,)):
        return [py, "-m", "dihedra", "track", top, *trajs, "--torsions", "rotatable", "--stop", str(stop),
                "--out", out, "--overwrite", *extra]

    def floor_cmd(stop):
        return [py, "-c", FLOOR, top, xtc, str(stop)]

    from dihedra.numerics.angles import compiled_kernels
    print(f"machine: {os.cpu_count()} cores, load average {os.getloadavg()[0]:.2f} at start")
    print(f"system: {6 * args.molecules} atoms, {n_torsions} torsions, XTC of {4 * n} frames; N = {n}; "
          f"each run measured {args.repeat} time(s), the fastest kept")
    print(f"compiled kernels (numba): {'yes' if compiled_kernels() is not None else 'NO (NumPy path)'}; "
          "they use no threads of their own. (b) is the default: with two usable cores a second thread "
          f"computes while the first reads (usable cores here: {len(os.sched_getaffinity(0))}; CPU time "
          "counts both threads); (b1) is --threads 1.")
    # warm the page cache, the XTC offset cache and the numba cache
    measure(floor_cmd(4 * n), env=env)
    measure(track_cmd(1), env=env)
    runs = {}
    samples = {}   # every measurement: name -> [(wall, cpu), ...]

    def record(name, r):
        samples.setdefault(name, []).append((r["wall_s"], r["cpu_s"]))
        best = runs.setdefault(name, dict(r))
        for key in r:
            best[key] = min(best[key], r[key])
        print(f"  {name:<10} wall {r['wall_s']:8.2f} s  cpu {r['cpu_s']:8.2f} s  peak {r['peak_rss_mb']:8.0f} MB"
              f"  (load {os.getloadavg()[0]:.2f})", flush=True)

    plan = [("a", lambda k: floor_cmd(k)), ("b", lambda k: track_cmd(k))]
    env_of = {}
    if "a2" not in args.skip:
        plan.append(("a2", lambda k: [py, "-c", DECODER_FLOOR, top, xtc, str(k)]))
    if "b0" not in args.skip:
        plan.append(("b0", lambda k: track_cmd(k)))
        env_of["b0"] = dict(env, DIHEDRA_NO_XTC_DECODER="1")
    if "b1" not in args.skip:
        plan.append(("b1", lambda k: track_cmd(k, "--threads", "1")))
    if "c" not in args.skip:
        plan.append(("c", lambda k: track_cmd(k, "--workers", "2")))
    with contextlib.ExitStack() as stack:
        if "d" not in args.skip:
            from distributed import Client, LocalCluster
            cluster = stack.enter_context(LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                                       host="127.0.0.1", dashboard_address=None))
            client = stack.enter_context(Client(cluster))
            pids = list(client.run(os.getpid).values())
            measure(track_cmd(1, "--scheduler", cluster.scheduler_address), env=env)  # workers import
            plan.append(("d", lambda k: track_cmd(k, "--scheduler", cluster.scheduler_address)))
        # every run once per round, the rounds one after another: a slow spell of the machine
        # then touches every kind alike instead of all repeats of one
        # S: the 1,000 frames of the smallest case, when N is longer
        lengths = ["1"] + (["S"] if n > SHORT else []) + ["N"] + (["4N"] if "memory" not in args.skip else [])
        jobs = []
        for kind, cmd in plan:
            for length in lengths:
                # start-up of a parallel run: one frame per worker, so that every worker starts
                # (with one frame, MDAnalysis gives the whole run to one worker)
                k = START_FRAMES.get(kind, 1) if length == "1" else frames_of[length]
                jobs.append((f"{kind}:{length}", cmd(k), pids if kind == "d" else (), env_of.get(kind, env)))
        for round_ in range(args.repeat):
            for name, cmd, extra, job_env in jobs:
                record(name, measure(cmd, extra_pids=extra, env=job_env))
            if round_ == 0 and "memory" not in args.skip:
                record("b:2N", measure(track_cmd(2 * n), env=env))
    alone = None
    if "alone" not in args.skip:
        alone = pass_alone(top, xtc, n, max(3, args.repeat), py, env)
    jit = {}
    if "jit" not in args.skip:
        # the first pass of a process loads the compiled kernels from numba's cache, or compiles
        # them when the cache is empty (once per installation): CPU seconds of the first pass
        # minus those of a second one, in the same process
        for label, extra in (("cached", {}), ("compiled", {"NUMBA_CACHE_DIR": None})):
            with tempfile.TemporaryDirectory() as cache:
                probe_env = dict(env, **{k: cache for k in extra})
                done = subprocess.run([py, "-c", JIT_PROBE, top, xtc], env=probe_env, cwd=REPO,
                                      capture_output=True, text=True, check=True)
            first, second = map(float, done.stdout.split())
            jit[label] = first - second

    def marginal(kind, key, lo="1", hi="N", n_lo=None, n_hi=n):
        if n_lo is None:
            n_lo = START_FRAMES.get(kind, 1) if lo == "1" else n
        return (runs[f"{kind}:{hi}"][key] - runs[f"{kind}:{lo}"][key]) / (n_hi - n_lo)

    rows = [("(a) MDAnalysis reading only", "a"), ("(b) dihedra track, serial (default)", "b"),
            ("(a2) dihedra's XTC decoder reading only", "a2"),
            ("(b0) track reading through MDAnalysis", "b0"),
            ("(b1) dihedra track --threads 1", "b1"), ("(c) dihedra track --workers 2", "c"),
            ("(d) --scheduler, 2 dask workers", "d")]
    summary = {"n_torsions": n_torsions, "n_atoms": 6 * args.molecules, "frames": n, "runs": runs,
               "samples": samples}
    for hi, n_hi in [(h, frames_of[h]) for h in lengths if h in ("S", "N")]:
        print()
        print(f"marginal cost per frame (T(M) - T(1)) / (M - 1) over M = {n_hi} frames, ratio to (a) "
              f"MDAnalysis reading ({n_torsions} torsions; for (c) and (d) (T(M) - T(2)) / (M - 2): one frame "
              "per worker):")
        print(f"  {'':<40} {'wall ms/frame':>14} {'ratio':>7} {'cpu ms/frame':>13} {'ratio':>7} {'peak MB':>8}")
        floor_w = marginal("a", "wall_s", hi=hi, n_hi=n_hi)
        floor_c = marginal("a", "cpu_s", hi=hi, n_hi=n_hi)
        tag = "" if hi == "N" else f"_{n_hi}"
        for label, kind in rows:
            if f"{kind}:{hi}" not in runs:
                continue
            w, c = marginal(kind, "wall_s", hi=hi, n_hi=n_hi), marginal(kind, "cpu_s", hi=hi, n_hi=n_hi)
            summary[f"ratio_{kind}_wall{tag}"] = w / floor_w
            summary[f"ratio_{kind}_cpu{tag}"] = c / floor_c
            print(f"  {label:<40} {w * 1e3:14.3f} {w / floor_w:7.2f} {c * 1e3:13.3f} {c / floor_c:7.2f} "
                  f"{runs[f'{kind}:{hi}']['peak_rss_mb']:8.0f}")
    if "b:4N" in runs:
        for lo, n_lo, text in (("1", 1, f"(T(4N) - T(1)) / (4N - 1), 4N = {4 * n}"),
                               ("N", n, "(T(4N) - T(N)) / 3N, costs that stop growing with the frames left out")):
            fw, fc = marginal("a", "wall_s", lo, "4N", n_lo, 4 * n), marginal("a", "cpu_s", lo, "4N", n_lo, 4 * n)
            print(f"  from {text}: (a) wall {fw * 1e3:.3f} ms, cpu {fc * 1e3:.3f} ms per frame")
            for label, kind in rows[1:]:
                if f"{kind}:4N" not in runs:
                    continue
                k_lo = START_FRAMES.get(kind, 1) if lo == "1" else n
                bw = marginal(kind, "wall_s", lo, "4N", k_lo, 4 * n)
                bc = marginal(kind, "cpu_s", lo, "4N", k_lo, 4 * n)
                summary[f"ratio_{kind}_wall_{lo}_4N"], summary[f"ratio_{kind}_cpu_{lo}_4N"] = bw / fw, bc / fc
                print(f"    {label:<36} wall {bw * 1e3:7.3f} ms = {bw / fw:5.2f};"
                      f"  cpu {bc * 1e3:7.3f} ms = {bc / fc:5.2f}")
        robust = robust_slopes(samples, n)
        summary["theil_sen"] = robust
        print("  every run at once, the slope of wall time against frames over all runs of 1, N (2N) and 4N "
              "frames (Theil-Sen, scipy.stats.theilslopes; 90 % interval: with a noisy machine it shows what the "
              "figures above can tell apart):")
        fa = robust["a"]
        for label, kind in rows:
            if kind in robust:
                r = robust[kind]
                print(f"    {label:<36} {r['slope'] * 1e3:7.3f} ms/frame [{r['low'] * 1e3:.3f}, {r['high'] * 1e3:.3f}]"
                      f"  ratio {r['slope'] / fa['slope']:5.2f} [{r['low'] / fa['high']:.2f}, {r['high'] / fa['low']:.2f}]")
        peaks = [runs[f"b:{k}"]["peak_rss_mb"] for k in ("N", "2N", "4N")]
        summary["peak_b_mb"] = peaks
        print(f"peak memory of (b) at 1x, 2x, 4x frames: {peaks[0]:.0f}, {peaks[1]:.0f}, {peaks[2]:.0f} MB "
              f"(4x / 1x = {peaks[2] / peaks[0]:.3f}; 1 frame: {runs['b:1']['peak_rss_mb']:.0f} MB)")
    if alone:
        summary["pass_alone_ms_per_frame"] = alone
        r = alone["read"]
        print("the pass alone in one process (TorsionPass, time series written), interleaved with reading the "
              "same frames, (T(4N) - T(N)) / 3N, median of the repeats:")
        for key, label in (("read", "MDAnalysis reading only"), ("pass1", "pass, 1 thread"),
                           ("pass2", "pass, --threads 2")):
            x = alone[key]
            print(f"  {label:<28} wall {x['wall'] * 1e3:.3f} ms/frame ({x['wall'] / r['wall']:.2f})   "
                  f"cpu {x['cpu'] * 1e3:.3f} ms/frame ({x['cpu'] / r['cpu']:.2f})")
    if jit:
        summary["jit_cpu_s"] = jit
        print(f"start-up of (b): {runs['b:1']['wall_s']:.1f} s wall, {runs['b:1']['cpu_s']:.1f} s cpu (subtracted "
              f"above); of it, loading the compiled kernels from numba's cache: {jit['cached']:.2f} s cpu. "
              f"With an empty cache (the first run of an installation) they are compiled instead: "
              f"{jit['compiled']:.1f} s cpu.")
    print("targets: (b)/(a) <= 1.15, (c)/(a) <= 0.65, peak 4x/1x within 10 %")

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
