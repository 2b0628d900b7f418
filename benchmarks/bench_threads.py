"""Where the CPU of the trajectory pass goes, thread by thread (not a test): ``TorsionPass`` with
two threads and its Parquet time series over N frames, the CPU seconds of each thread (read from
``/proc/self/task``, Linux only) per frame, the wall seconds per frame, and how many cores the
pass kept busy on average (all threads' CPU over the wall time). A pass bound by the cores shows
close to the machine's count; one bound by waiting between the threads shows less.

Run from the repository root on the data of ``bench_track.py``::

    python benchmarks/bench_threads.py $TMPDIR/dihedra-bench/bench.pdb $TMPDIR/dihedra-bench/bench.xtc 6000

The reading thread is ``MainThread``, the computing one ``dihedra-pass``, the writer of the time
series ``dihedra-series_0``.
"""
import os
import sys
import tempfile
import threading
import time
import warnings

import MDAnalysis as mda

from dihedra import get_scheme, select_torsions
from dihedra.io.series import ParquetSeriesFactory
from dihedra.trajectory.trackpass import TorsionPass

warnings.simplefilter("ignore")
TICK = os.sysconf("SC_CLK_TCK")


class ThreadClock:
    """CPU seconds (user + system) of every thread of this process, polled every 10 ms: a thread
    that has ended keeps its last reading."""

    def __init__(self):
        self.seconds = {}   # tid -> seconds
        self.names = {}     # tid -> Python's name of the thread, once seen
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._poll, name="bench-clock", daemon=True)

    def _poll(self):
        while not self._stop.is_set():
            names = {t.native_id: t.name for t in threading.enumerate()}
            for tid in os.listdir("/proc/self/task"):
                try:
                    with open(f"/proc/self/task/{tid}/stat") as fh:
                        fields = fh.read().rsplit(")", 1)[1].split()
                except OSError:
                    continue
                if int(tid) in names:
                    self.names[tid] = names[int(tid)]
                self.seconds[tid] = (int(fields[11]) + int(fields[12])) / TICK
            time.sleep(0.01)

    def __enter__(self):
        self._thread.start()
        return self

    def __exit__(self, *exc):
        self._stop.set()
        self._thread.join()

    def by_name(self):
        out = {}
        for tid, s in self.seconds.items():
            name = self.names.get(tid, "?")
            out[name] = out.get(name, 0.0) + s
        return out


def main():
    top, traj, n = sys.argv[1], sys.argv[2], int(sys.argv[3])
    u = mda.Universe(top, traj)
    tset = select_torsions(u, "rotatable")
    scheme = get_scheme("anti-gauche")
    read = []
    for _ in range(2):   # (the second from the page cache)
        t = time.perf_counter()
        for ts in u.trajectory[:n]:
            ts.positions[0, 0]
        read.append((time.perf_counter() - t) / n)
    read = min(read)
    with tempfile.TemporaryDirectory() as d:   # the numba cache and the page cache
        TorsionPass(u, tset, scheme, series=ParquetSeriesFactory(d), threads=2).run(stop=min(n, 200))
    for r in range(3):
        with tempfile.TemporaryDirectory() as d, ThreadClock() as clock:
            time.sleep(0.05)   # (a first reading of every thread)
            before = clock.by_name()
            t = time.perf_counter()
            TorsionPass(u, tset, scheme, series=ParquetSeriesFactory(d), threads=2).run(stop=n)
            wall = time.perf_counter() - t
            time.sleep(0.05)
            after = clock.by_name()
        cpu = {k: v - before.get(k, 0.0) for k, v in after.items() if k != "bench-clock"}
        cpu = {k: v for k, v in cpu.items() if v > 0.005 * wall}
        total = sum(cpu.values())
        per = ", ".join(f"{k} {v / n * 1e3:.3f}" for k, v in sorted(cpu.items(), key=lambda x: -x[1]))
        print(f"round {r + 1}: wall {wall / n * 1e3:.3f} ms/frame ({wall / n / read:.2f} of MDAnalysis' read, "
              f"{read * 1e3:.3f} ms); CPU ms/frame by thread: {per}; all {total / n * 1e3:.3f}; "
              f"cores busy {total / wall:.2f}", flush=True)


if __name__ == "__main__":
    main()
