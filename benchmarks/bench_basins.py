"""Benchmark: what ``--scheme basins`` costs against a fixed scheme (not a test).

``basins`` needs the distribution before the states, so it reads the trajectory twice: a first
pass (fine histograms of the basin types; no time series) and the pass of the run. This script runs
``dihedra track`` on the bundled examples, each command in a fresh process, side by side:

(a) ``--scheme anti-gauche`` (the fixed scheme: one pass);
(b) ``--scheme auto`` (chemistry only: one pass plus the classification of the bonds);
(c) ``--scheme basins --temperature 298.15`` (two passes);

every run ``--repeat`` times in rounds (the fastest kept: the machine may be shared), with the
trajectory given ``--replicas`` times (``--allow-duplicates``: a longer run of the same frames).
It prints the wall time of each, the ratio to (a), and, from summary.json of (c), the seconds of
the first pass alone and of the whole run.

Usage::

    python benchmarks/bench_basins.py [--repeat 3] [--replicas 4] [--out /tmp/bench-basins]
"""

import argparse
import json
import os
import shutil
import subprocess
import sys
import time

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
EXAMPLES = {"butane_rb": ("butane_rb.pdb", "butane_rb.xtc"), "hexane": ("hexane.pdb", "hexane.xtc")}
SCHEMES = {"anti-gauche": ["--scheme", "anti-gauche"], "auto": ["--scheme", "auto"],
           "basins": ["--scheme", "basins", "--temperature", "298.15"]}


def run(system, scheme, replicas, out):
    pdb, xtc = (os.path.join(ROOT, "example_trajectories", f) for f in EXAMPLES[system])
    folder = os.path.join(out, f"{system}-{scheme}")
    shutil.rmtree(folder, ignore_errors=True)
    cmd = [sys.executable, "-m", "dihedra", "track", pdb, *([xtc] * replicas), "--torsions", "rotatable",
           *SCHEMES[scheme], "--out", folder, "--allow-duplicates"]
    env = dict(os.environ, PYTHONPATH=ROOT + os.pathsep + os.environ.get("PYTHONPATH", ""))
    started = time.perf_counter()
    subprocess.run(cmd, check=True, env=env, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    wall = time.perf_counter() - started
    with open(os.path.join(folder, "summary.json")) as fh:
        summary = json.load(fh)
    basins = (summary["parameters"].get("scheme_choice") or {}).get("basins") or {}
    return wall, summary["run_seconds"], (basins.get("first_pass") or {}).get("seconds")


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--repeat", type=int, default=3)
    ap.add_argument("--replicas", type=int, default=4)
    ap.add_argument("--out", default="/tmp/dihedra-bench-basins")
    args = ap.parse_args(argv)
    os.makedirs(args.out, exist_ok=True)
    best = {}
    for _ in range(args.repeat):
        for system in EXAMPLES:
            for scheme in SCHEMES:
                wall, inside, first = run(system, scheme, args.replicas, args.out)
                key = (system, scheme)
                if key not in best or wall < best[key][0]:
                    best[key] = (wall, inside, first)
    print(f"dihedra track, each trajectory given {args.replicas} times, best of {args.repeat} (seconds)")
    print(f"{'system':<10} {'scheme':<12} {'wall':>7} {'x fixed':>8} {'in run':>7} {'1st pass':>9}")
    for system in EXAMPLES:
        ref = best[(system, "anti-gauche")][0]
        for scheme in SCHEMES:
            wall, inside, first = best[(system, scheme)]
            extra = "" if first is None else f"{first:9.2f}"
            print(f"{system:<10} {scheme:<12} {wall:7.2f} {wall / ref:8.2f} {inside:7.2f} {extra}")


if __name__ == "__main__":
    main()
