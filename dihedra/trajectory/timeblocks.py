"""The state time series of a run coarsened into time blocks, per torsion type and state.

The convergence checks (:mod:`dihedra.trajectory.convergence`) need, for every torsion type, the
fraction of its torsions in each state as a function of time. Thousands of torsions over 10^6
frames are too many points for that, so :func:`time_blocks` reads the state series once, chunk by
chunk (:meth:`TrackResult.iter_chunks <dihedra.trajectory.result.TrackResult.iter_chunks>`), and
sums it into at most ``n_time_blocks`` consecutive blocks of frames per replica: counts of shape
(n_blocks, n_types, n_states), weighted when the run is. The cost is one read of the series and,
per chunk and state, one comparison and two sums over its values (a few ns per torsion and frame);
the memory, one chunk and the (small) block counts.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np


@dataclass
class ReplicaBlocks:
    """The time blocks of one replica.

    Attributes
    ----------
    replica : int
    counts : ndarray, shape (n_blocks, n_types, n_states)
        (Weighted) torsion-frames of each type in each state per block.
    weights : ndarray, shape (n_blocks,)
        (Weighted) frames per block.
    frames : ndarray of int, shape (n_blocks,)
        Frames per block.
    first : ndarray of int, shape (n_blocks,)
        Position (analysed frame, from 0) of the first frame of each block.
    time_ps : ndarray, shape (n_blocks,)
        Time of the first frame of each block, from the replica's first analysed frame.
    n_frames : int
    interval_ps : float
        Time between analysed frames.
    """

    replica: int
    counts: np.ndarray
    weights: np.ndarray
    frames: np.ndarray
    first: np.ndarray
    time_ps: np.ndarray
    n_frames: int
    interval_ps: float

    @property
    def simulated_ps(self):
        """Simulated time of the analysed frames (frames x interval)."""
        return self.n_frames * self.interval_ps


@dataclass
class TimeBlocks:
    """Time blocks of every replica, with the types and states they count."""

    types: list
    n_torsions: np.ndarray
    states: list
    replicas: list


def frames_per_replica(blocks):
    """{replica: analysed frames} from the block sums of a run."""
    rep = np.asarray(blocks["block_replica"])
    frames = np.asarray(blocks["block_frames"])
    return {int(r): int(frames[rep == r].sum()) for r in np.unique(rep)}


def time_blocks(result, n_time_blocks=500):
    """Sum the state series of ``result`` into at most ``n_time_blocks`` blocks per replica.

    Parameters
    ----------
    result : TrackResult
        With the state time series.
    n_time_blocks : int
        Blocks per replica (fewer when a replica has fewer frames).

    Returns
    -------
    TimeBlocks
    """
    types = list(dict.fromkeys(result.torsion_set.types))
    type_of = dict(zip(result.torsion_set.labels, (types.index(t) for t in result.torsion_set.types)))
    n_states = len(result.scheme.labels)
    n_frames = frames_per_replica(result.blocks)
    acc = {r: _Accumulator(n, min(n, int(n_time_blocks)), len(types), n_states) for r, n in n_frames.items()}
    layout = None
    for chunk in result.iter_chunks("states"):
        if layout is None or layout[0] != chunk.columns:
            layout = _layout(chunk.columns, type_of)
        acc[chunk.replica].add(chunk, layout[1], layout[2], n_states)
    n_torsions = np.bincount([type_of[c] for c in result.torsion_set.labels], minlength=len(types))
    return TimeBlocks(types=types, n_torsions=n_torsions, states=list(result.scheme.labels),
                      replicas=[acc[r].finish(r) for r in sorted(acc)])


def _layout(columns, type_of):
    """The columns sorted by type, and where each type's rows start in that order."""
    tix = np.array([type_of[c] for c in columns], dtype=np.int64)
    perm = np.argsort(tix, kind="stable")
    present = np.unique(tix)
    starts = np.searchsorted(tix[perm], present)
    return list(columns), perm, (starts, present)


class _Accumulator:
    """The block sums of one replica, filled chunk by chunk."""

    def __init__(self, n_frames, n_blocks, n_types, n_states):
        n_blocks = max(1, n_blocks)
        self.n_frames, self.n_blocks = int(n_frames), n_blocks
        self.counts = np.zeros((n_blocks, n_types, n_states))
        self.weights = np.zeros(n_blocks)
        self.frames = np.zeros(n_blocks, dtype=np.int64)
        self.time = np.full(n_blocks, np.nan)
        self.t_first = self.t_last = None

    def add(self, chunk, perm, type_rows, n_states):
        n = len(chunk)
        if n == 0:
            return
        pos = chunk.position
        block = pos * self.n_blocks // max(1, self.n_frames)
        cuts = np.flatnonzero(np.r_[True, block[1:] != block[:-1]])
        ub = block[cuts]
        starts, present = type_rows
        values = chunk.values[perm]
        w = None if chunk.weight is None else np.asarray(chunk.weight, dtype=float)
        for s in range(n_states):
            per_type = np.add.reduceat(values == s, starts, axis=0, dtype=np.float64)   # (types, n)
            if w is not None:
                per_type *= w
            self.counts[ub[:, None], present[None, :], s] += np.add.reduceat(per_type, cuts, axis=1).T
        self.weights[ub] += np.add.reduceat(np.ones(n) if w is None else w, cuts)
        self.frames[ub] += np.diff(np.r_[cuts, n])
        first_time = chunk.time_ps[cuts]
        self.time[ub] = np.where(np.isnan(self.time[ub]), first_time, self.time[ub])
        if self.t_first is None:
            self.t_first = (int(pos[0]), float(chunk.time_ps[0]))
        self.t_last = (int(pos[-1]), float(chunk.time_ps[-1]))

    def finish(self, replica):
        first = np.ceil(np.arange(self.n_blocks) * self.n_frames / self.n_blocks).astype(np.int64)
        interval = 1.0
        if self.t_first is not None and self.t_last[0] > self.t_first[0]:
            interval = (self.t_last[1] - self.t_first[1]) / (self.t_last[0] - self.t_first[0])
        t0 = self.t_first[1] if self.t_first is not None else 0.0
        time = np.where(np.isnan(self.time), first * interval + t0, self.time) - t0
        return ReplicaBlocks(replica=int(replica), counts=self.counts, weights=self.weights, frames=self.frames,
                             first=first, time_ps=time, n_frames=self.n_frames, interval_ps=float(interval))
