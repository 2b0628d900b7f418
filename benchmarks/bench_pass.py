"""The trajectory pass alone, in one process (not a test): ``TorsionPass`` with two threads and its
Parquet time series (states.parquet, cores.parquet) over 1 and N frames, against MDAnalysis reading
the same frames in the same process; the marginal cost per frame, round by round, and its ratio.

Run from the repository root on the data of ``bench_track.py``::

    python benchmarks/bench_pass.py $TMPDIR/dihedra-bench/bench.pdb $TMPDIR/dihedra-bench/bench.dcd 1500
"""
import statistics
import sys
import tempfile
import time
import warnings

import MDAnalysis as mda

from dihedra import get_scheme, select_torsions
from dihedra.io.series import ParquetSeriesFactory
from dihedra.trajectory.trackpass import TorsionPass

warnings.simplefilter("ignore")
top, traj, n = sys.argv[1], sys.argv[2], int(sys.argv[3])
u = mda.Universe(top, traj)
tset = select_torsions(u, "rotatable")
scheme = get_scheme("anti-gauche")


def read(k):
    t = time.perf_counter()
    for ts in u.trajectory[:k]:
        ts.positions[0, 0]
    return time.perf_counter() - t


def run(k):
    with tempfile.TemporaryDirectory() as d:
        t = time.perf_counter()
        TorsionPass(u, tset, scheme, series=ParquetSeriesFactory(d), threads=2).run(stop=k)
        return time.perf_counter() - t


run(n)   # the numba cache and the page cache
ratios = []
for r in range(3):
    a = (read(n) - read(1)) / (n - 1)
    b = (run(n) - run(1)) / (n - 1)
    ratios.append(b / a)
    print(f"round {r + 1}: read {a * 1e3:.3f} ms/frame, pass {b * 1e3:.3f} ms/frame, ratio {b / a:.2f}", flush=True)
print("median", round(statistics.median(ratios), 2), "min", round(min(ratios), 2), "max", round(max(ratios), 2))
