"""Dropping the start of a run (``discard``): a number of frames, a time, or ``"auto"``.

Populations, profiles and kinetics all come from the one trajectory pass, so the start is dropped
where the frames are chosen: the pass is given the frames from the first kept one on, and every
table, histogram and time series of the run starts there. Frames and times count from the first
analysed frame of each replica (after ``start``/``step``).

``"auto"`` decides the start before the pass: a quick pass over at most :data:`QUICK_FRAMES`
evenly spaced frames of every replica keeps the state series in memory, and the equilibration
detection of :func:`dihedra.trajectory.convergence.convergence_tables` (Chodera, J. Chem. Theory
Comput. 12 (2016) 1799) on it gives the latest start over the torsion types whose start drifts (0
if none does); that time is dropped from every replica. The quick pass costs reading and
processing at most :data:`QUICK_FRAMES` frames per replica (the whole run when it is shorter:
then the run is read twice); its resolution is the spacing of those frames.
"""

from __future__ import annotations

import math
import re
import time
import warnings

import numpy as np

from ..errors import DihedraError
from .convergence import convergence_tables
from .timeblocks import pass_time_blocks
from .result import MemorySeries, TrackResult
from .series_output import MemorySeriesFactory
from .trackpass import TorsionPass

#: Frames per replica of the quick pass of ``discard="auto"``.
QUICK_FRAMES = 2000

_AMOUNT = re.compile(r"^\s*([0-9]*\.?[0-9]+(?:[eE][+-]?[0-9]+)?)\s*(ps|ns|frames?)?\s*$")


def parse_discard(value):
    """``None``, ``("auto", None)``, ``("frames", n)`` or ``("time", ps)`` from what a user gave.

    Accepted: ``None``, ``"auto"``, a whole number of frames (``500`` or ``"500"``,
    ``"500 frames"``), a time with its unit (``"250 ps"``, ``"1.5 ns"``).

    Examples
    --------
    >>> parse_discard("auto"), parse_discard(500), parse_discard("1.5 ns")
    (('auto', None), ('frames', 500), ('time', 1500.0))
    """
    if value is None:
        return None
    hint = ("discard must be 'auto', a whole number of frames (e.g. 500) or a time with its unit (e.g. '250 ps', "
            f"'1.5 ns'); got {value!r}.")
    if isinstance(value, bool):
        raise DihedraError(hint)
    if isinstance(value, (int, np.integer)):
        if value < 0:
            raise DihedraError(hint)
        return ("frames", int(value))
    if not isinstance(value, str):
        raise DihedraError(hint)
    if value.strip().lower() == "auto":
        return ("auto", None)
    m = _AMOUNT.match(value.lower())
    if not m:
        raise DihedraError(hint)
    number, unit = float(m.group(1)), m.group(2)
    if unit in ("ps", "ns"):
        return ("time", number * (1000.0 if unit == "ns" else 1.0))
    if number != int(number):
        raise DihedraError(hint)
    return ("frames", int(number))


def frames_to_drop(spec, n_frames, interval_ps, where="the run"):
    """How many of ``n_frames`` analysed frames (``interval_ps`` apart) ``spec`` drops."""
    kind, amount = spec
    # (a time step stored in single precision, as CHARMM and NAMD DCDs hold 0.99999991 ps for 1 ps,
    # must not drop a frame more: a relative 1e-5, well above float32's rounding, is taken as such)
    x = amount / interval_ps if kind != "frames" and interval_ps > 0 else 0.0
    k = int(amount) if kind == "frames" else int(math.ceil(x - max(1e-9, 1e-5 * x)))
    if k >= n_frames:
        what = f"{amount} frames" if kind == "frames" else f"{amount:g} ps ({k} frames)"
        raise DihedraError(f"discarding {what} leaves no frames: {where} has {n_frames} analysed frames; discard "
                           "less.")
    return max(0, k)


def detect_start(passes, tset, scheme, n_quick=QUICK_FRAMES):
    """The start to drop (ps from the first analysed frame) by a quick pass per replica.

    Parameters
    ----------
    passes : list of (universe, frames, weights, dt_ps)
        Per replica: its Universe, the analysed frame numbers, their weights (or ``None``) and
        the time step that replaces the trajectory's (or ``None``).
    tset, scheme
        Torsions and state scheme of the run.

    Returns
    -------
    t0_ps : float
    info : dict
        What the quick pass did: frames read per replica, their spacing, seconds, the types whose
        start drifts.
    """
    started = time.time()
    chunks, frame_counts, read, done = [], [], [], []
    for r, (universe, frames, weights, dt_ps) in enumerate(passes):
        stride = max(1, int(math.ceil(len(frames) / int(n_quick))))
        sub = np.asarray(frames)[::stride]
        tp = TorsionPass(universe, tset, scheme, n_state_blocks=min(64, len(sub)), n_hist_blocks=1,
                         weights=None if weights is None else np.asarray(weights)[::stride],
                         series=MemorySeriesFactory(), replica=r, dt_ps=dt_ps)
        with warnings.catch_warnings():
            warnings.filterwarnings("ignore", message="Reader has no dt information")
            warnings.filterwarnings("ignore", category=DeprecationWarning)
            tp.run(frames=sub)
        chunks.extend(tp.results.pop("series_parts", None) or [])
        done.append(tp)
        frame_counts.append(len(sub))
        read.append({"frames_read": int(len(sub)), "every_nth_frame": stride})
    result = TrackResult(torsion_set=tset, torsions=None, scheme=scheme, populations=None,
                         populations_by_type=None, populations_by_replica=None, conformers=None,
                         conformers_by_type=None, summary={}, series=MemorySeries.from_parts(chunks),
                         blocks={"block_replica": np.arange(len(passes)), "block_frames": np.asarray(frame_counts)})
    result.time_blocks = pass_time_blocks(done, tset.types, scheme.labels)
    conv = convergence_tables(result)
    info = {"method": f"quick pass over at most {n_quick} evenly spaced frames per replica, then equilibration "
                      "detection (Chodera 2016) per torsion type; the latest start that drifts",
            "replicas": read, "types_with_drift": conv.run["types_with_drift"],
            "seconds": round(time.time() - started, 3)}
    return float(conv.run["t0_ps"]), info


def interval_ps(universe, frames, dt_ps=None):
    """Time between the analysed ``frames`` of a trajectory in ps (``dt_ps`` replaces the trajectory's
    time step)."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        dt = float(dt_ps) if dt_ps is not None else float(universe.trajectory.dt)
    return dt * (int(frames[1] - frames[0]) if len(frames) > 1 else 1)


def plan_discard(discard, replicas, tset, scheme):
    """Frames to drop from the start of every replica, and the record of it for the summary.

    Parameters
    ----------
    discard : str, int or None
        See :func:`parse_discard`.
    replicas : list of (universe, frames, weights, dt_ps)
        Per replica: its Universe, the analysed frame numbers, their weights (or ``None``), the time
        step that replaces the trajectory's (or ``None``).

    Returns
    -------
    drop : list of int
        Frames to drop per replica (zeros without ``discard``).
    record : dict or None
        ``requested``, ``discarded_frames``, ``discarded_ps``, ``first_frame_kept`` per replica,
        and for ``"auto"`` the detected ``t0_ps`` and what the quick pass did.
    """
    spec = parse_discard(discard)
    if spec is None:
        return [0] * len(replicas), None
    record = {"requested": discard if isinstance(discard, str) else int(discard)}
    if spec[0] == "auto":
        t0, info = detect_start(replicas, tset, scheme)
        record.update(t0_ps=t0, **info)
        spec = ("time", t0)
    intervals = [interval_ps(u, frames, dt) for u, frames, _, dt in replicas]
    where = (lambda r: f"replica {r + 1}") if len(replicas) > 1 else (lambda r: "the run")
    drop = [frames_to_drop(spec, len(frames), iv, where(r))
            for r, ((_, frames, _, _), iv) in enumerate(zip(replicas, intervals))]
    record.update(discarded_frames=drop, discarded_ps=[k * iv for k, iv in zip(drop, intervals)],
                  first_frame_kept=[int(frames[k]) for k, (_, frames, _, _) in zip(drop, replicas)])
    return drop, record
