"""Benchmark of the post-processing of a large results folder: ``dihedra profile`` and
``dihedra kinetics`` on 10^7 and 10^8 state samples (not a test).

Uses the synthetic liquid of ``bench_track.py`` (5000 six-site chains: 15,000 C-C-C-C torsions,
an XTC of 4,000 frames, built once and cached in ``--data``). For each sample count it makes a
results folder with ``dihedra track`` (the 4,000-frame trajectory as as many replicas as needed,
or its first frames for fewer samples), then runs, each in a fresh process and as a user would:

* ``dihedra profile DIR --temperature 298.15``: histogram and kernel profiles with 200
  block-bootstrap resamples, minima, barriers and state free energies of every torsion and type;
* ``dihedra kinetics DIR --assignment crisp``: transitions, rates, dwell times, Markov models at
  six lags and mean first-passage times of every torsion, type and conformer type;
* with ``--core``, also ``dihedra kinetics DIR`` (core-set assignment from ``angles.parquet``,
  which the folder then keeps: ``track --keep-angles``).

It prints wall time, CPU time (user + system of the process and its threads) and peak memory of
each, and their sum against the project's target: profile + kinetics of 10^8 samples within
60 s on the 2-core machine. Figures go to ``bench-post.json`` in ``--data``.

Run from the repository root::

    python benchmarks/bench_post.py                      # 1e7 and 1e8 samples, about 5 min
    python benchmarks/bench_post.py --samples 1e8 --core
"""

from __future__ import annotations

import argparse
import json
import math
import os
import shutil
import sys
import tempfile

HERE = os.path.dirname(os.path.abspath(__file__))
REPO = os.path.dirname(HERE)
FRAMES = 4000  # frames of the cached trajectory


def make_folder(folder, top, xtc, samples, n_torsions, py, env, keep_angles, measure):
    """``dihedra track`` into ``folder`` with at least ``samples`` state samples; returns its shape."""
    per_copy = FRAMES * n_torsions
    copies = max(1, math.ceil(samples / per_copy))
    stop = FRAMES if copies > 1 else max(2, math.ceil(samples / n_torsions))
    cmd = [py, "-m", "dihedra", "track", top, *([xtc] * copies), "--torsions", "rotatable", "--stop", str(stop),
           "--temperature", "298.15", "--out", folder, "--overwrite"]
    if copies > 1:   # (the same file as several replicas: allowed for a benchmark of the sample count)
        cmd.append("--allow-duplicates")
    if keep_angles:
        cmd.append("--keep-angles")
    r = measure(cmd, env=env)
    return {"replicas": copies, "frames_per_replica": stop, "torsions": n_torsions,
            "samples": copies * stop * n_torsions, "track_wall_s": r["wall_s"]}


def post_processing(data, top, xtc, n_torsions, samples_list=(1e7, 1e8), core=False, py=sys.executable, env=None,
                    log=print):
    """Time profile and kinetics on folders of the given sample counts; returns the figures."""
    sys.path.insert(0, HERE)
    from bench_track import measure

    env = dict(env or os.environ)
    env["PYTHONPATH"] = REPO + os.pathsep + env.get("PYTHONPATH", "")
    results = []
    for samples in samples_list:
        folder = os.path.join(data, f"post-{samples:.0e}")
        shape = make_folder(folder, top, xtc, samples, n_torsions, py, env, core, measure)
        log(f"\n{shape['samples']:.3g} state samples ({shape['replicas']} replica(s) x {shape['frames_per_replica']} "
            f"frames x {n_torsions} torsions; track took {shape['track_wall_s']:.0f} s):")
        row = dict(shape)
        commands = [("profile", ["profile", folder, "--temperature", "298.15", "--per-torsion"]),
                    ("kinetics crisp", ["kinetics", folder, "--assignment", "crisp"])]
        if core:
            commands.append(("kinetics core", ["kinetics", folder]))
        for name, cmd in commands:
            r = measure([py, "-m", "dihedra", *cmd], env=env)
            row[name] = r
            log(f"  {name:<16} wall {r['wall_s']:7.1f} s   cpu {r['cpu_s']:7.1f} s   peak {r['peak_rss_mb']:7.0f} MB"
                f"   (load {os.getloadavg()[0]:.2f})")
        total = row["profile"]["wall_s"] + row["kinetics crisp"]["wall_s"]
        row["total_wall_s"] = total
        log(f"  profile + kinetics (crisp): {total:.1f} s wall"
            + ("  (target for 1e8 samples: 60 s)" if shape["samples"] >= 1e8 else ""))
        results.append(row)
        shutil.rmtree(folder, ignore_errors=True)
    return results


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--data", default=os.path.join(tempfile.gettempdir(), "dihedra-bench"),
                    help="folder of the synthetic system (shared with bench_track.py) and the results")
    ap.add_argument("--samples", type=float, nargs="+", default=[1e7, 1e8], help="state samples per folder")
    ap.add_argument("--core", action="store_true", help="also kinetics with core-set assignment (keeps angles)")
    args = ap.parse_args(argv)
    sys.path.insert(0, HERE)
    sys.path.insert(0, REPO)
    from bench_track import ensure_system

    data = os.path.abspath(args.data)
    molecules = 5000
    ensure_system(data, molecules, FRAMES)
    print(f"machine: {os.cpu_count()} cores, load average {os.getloadavg()[0]:.2f} at start")
    results = post_processing(data, os.path.join(data, "bench.pdb"), os.path.join(data, "bench.xtc"), 3 * molecules,
                              args.samples, args.core)
    with open(os.path.join(data, "bench-post.json"), "w") as fh:
        json.dump(results, fh, indent=2)
    print(f"\nnumbers written to {os.path.join(data, 'bench-post.json')}")


if __name__ == "__main__":
    main()
