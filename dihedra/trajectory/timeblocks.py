"""The state time series of a run coarsened into time blocks, per torsion type and state.

The convergence checks (:mod:`dihedra.trajectory.convergence`) need, for every torsion type, the
fraction of its torsions in each state as a function of time. Thousands of torsions over 10^6
frames are too many points for that, so :func:`time_blocks` reads the state series once, chunk by
chunk (:meth:`TrackResult.iter_chunks <dihedra.trajectory.result.TrackResult.iter_chunks>`), and
sums it into at most ``n_time_blocks`` consecutive blocks of frames per replica: counts of shape
(n_blocks, n_types, n_states), weighted when the run is. The cost is one read of the series and,
per chunk and state, one comparison and two sums over its values (a few ns per torsion and frame);
the memory, one chunk and the (small) block counts.

The trajectory pass counts the same blocks while it runs (:class:`TimeBlockCounter`: per frame,
the torsions of each type in each state, counted by the frame kernel beside each state code in
both threads, added into the blocks every 64 frames), so that :func:`pass_time_blocks` gives a run's time blocks without reading
its series back (about 1 ms per frame of 15,000 torsions); the counts are the same integers, so
the tables are identical (weighted runs: equal to float64 rounding, the products of counts and
weights summed in another order).
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
    n_time_blocks: int = 500


#: Torsion columns read at a time.
COLUMNS_PER_READ = 4096

#: Time blocks per replica that the trajectory pass counts (the default of the convergence checks).
N_TIME_BLOCKS = 500


def frames_per_replica(blocks):
    """{replica: analysed frames} from the block sums of a run."""
    rep = np.asarray(blocks["block_replica"])
    frames = np.asarray(blocks["block_frames"])
    return {int(r): int(frames[rep == r].sum()) for r in np.unique(rep)}


def time_blocks(result, n_time_blocks=N_TIME_BLOCKS):
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
    labels = list(result.torsion_set.labels)
    # a few thousand columns at a time: Arrow's reader holds buffers for every column it reads
    # (about 400 MB for 15,000 columns at once); the frames' weights and times are counted once
    for g0 in range(0, max(1, len(labels)), COLUMNS_PER_READ):
        for chunk in result.iter_chunks("states", columns=labels[g0:g0 + COLUMNS_PER_READ]):
            if layout is None or layout[0] != chunk.columns:
                layout = _layout(chunk.columns, type_of)
            acc[chunk.replica].add(chunk, layout[1], layout[2], n_states, frames_too=g0 == 0)
    n_torsions = np.bincount([type_of[c] for c in result.torsion_set.labels], minlength=len(types))
    return TimeBlocks(types=types, n_torsions=n_torsions, states=list(result.scheme.labels),
                      replicas=[acc[r].finish(r) for r in sorted(acc)], n_time_blocks=int(n_time_blocks))


def result_time_blocks(result, n_time_blocks=N_TIME_BLOCKS):
    """The time blocks of ``result``: those its trajectory pass counted (``result.time_blocks``)
    when they have ``n_time_blocks`` blocks, else read from its state series (:func:`time_blocks`)."""
    tb = getattr(result, "time_blocks", None)
    if tb is not None and tb.n_time_blocks == int(n_time_blocks):
        return tb
    return time_blocks(result, n_time_blocks)


def pass_time_blocks(passes, types, states):
    """The time blocks that trajectory passes counted (one pass per replica, in replica order,
    as the blocks of their results are numbered), or None when a pass did not count them.

    Parameters
    ----------
    passes : list of TorsionPass
        After ``run``: ``results.time_block_counts`` and the passes' frames and times.
    types : list of str
        The type of every torsion.
    states : list of str
        The scheme's state labels.
    """
    names = list(dict.fromkeys(types))
    position = {name: k for k, name in enumerate(names)}
    n_torsions = np.bincount([position[t] for t in types], minlength=len(names)) if len(types) else np.zeros(0, int)
    out = []
    for r, tp in enumerate(passes):
        counts = tp.results.get("time_block_counts")
        n = len(tp.frames)
        acc = _Accumulator(n, min(n, N_TIME_BLOCKS), len(names), len(states))
        if counts is None or counts.shape != acc.counts.shape:
            return None
        acc.counts += counts
        # the series' times: the trajectory's, or frame x dt_ps (as the pass writes them)
        time = (np.asarray(tp.times, dtype=np.float64) if tp.dt_ps is None
                else np.asarray(tp.frames) * float(tp.dt_ps))
        acc.add_frames(np.arange(n), time, None if tp.weights is None else np.asarray(tp.weights, dtype=float))
        out.append(acc.finish(r))
    return TimeBlocks(types=names, n_torsions=n_torsions, states=list(states), replicas=out,
                      n_time_blocks=N_TIME_BLOCKS)


class TimeBlockCounter:
    """The convergence time blocks of one replica, counted by the trajectory pass: per block of
    frames (``position * n_blocks // n_frames``, as :func:`time_blocks` places them), the
    (weighted) torsion-frames of each type in each state.

    Parameters
    ----------
    types : list of str
        The type of every torsion of the pass.
    n_states : int
    n_frames : int
        Analysed frames of the replica (all workers).
    weighted : bool
    """

    def __init__(self, types, n_states, n_frames, weighted=False):
        names = {t: k for k, t in enumerate(dict.fromkeys(types))}
        tix = np.array([names[t] for t in types], dtype=np.int64)
        self.n_types, self.n_states = len(names), int(n_states)
        #: per torsion, type index x states: where its state adds in a frame's row of counts
        self.type_key = tix * self.n_states
        self.n_frames = max(1, int(n_frames))
        self.n_blocks = max(1, min(int(n_frames), N_TIME_BLOCKS))
        self.weighted = bool(weighted)
        self.counts = np.zeros((self.n_blocks, self.n_types, self.n_states),
                               dtype=np.float64 if weighted else np.int64)

    def add_counts(self, per, positions, weights):
        """Add frames given as their counts: ``per`` (frames, types x states), the torsions of
        each type in each state (as the frame kernel counts them with :attr:`type_key`)."""
        m = len(per)
        if m == 0 or self.n_types == 0:
            return
        per = per.reshape(m, self.n_types, self.n_states)
        block = np.asarray(positions, dtype=np.int64) * self.n_blocks // self.n_frames
        cuts = np.flatnonzero(np.r_[True, block[1:] != block[:-1]])
        if self.weighted:
            per = per * np.asarray(weights, dtype=np.float64)[:, None, None]
        self.counts[block[cuts]] += np.add.reduceat(per, cuts, axis=0)


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

    def add(self, chunk, perm, type_rows, n_states, frames_too=True):
        """Add the state counts of a chunk's columns (and, with ``frames_too``, its frames'
        weights, numbers and times: once per frame when the columns come in groups)."""
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
        ends = np.r_[starts[1:], len(values)]
        for s in range(n_states):
            hit = (values == s).view(np.uint8)
            # (type by type, in int32: a float64 copy of all the torsions' hits took 128 MB and
            # ten times as long per chunk of 15,000 torsions)
            per_type = np.stack([np.add.reduce(hit[a:e], axis=0, dtype=np.int32)
                                 for a, e in zip(starts, ends)]).astype(np.float64)
            if w is not None:
                per_type *= w
            self.counts[ub[:, None], present[None, :], s] += np.add.reduceat(per_type, cuts, axis=1).T
        if frames_too:
            self.add_frames(pos, chunk.time_ps, w)

    def add_frames(self, pos, time_ps, w=None):
        """Add frames (positions in the replica, increasing; times; weights or None) to the
        frames, weights and first times of their blocks."""
        n = len(pos)
        if n == 0:
            return
        block = pos * self.n_blocks // max(1, self.n_frames)
        cuts = np.flatnonzero(np.r_[True, block[1:] != block[:-1]])
        ub = block[cuts]
        self.weights[ub] += np.add.reduceat(np.ones(n) if w is None else w, cuts)
        self.frames[ub] += np.diff(np.r_[cuts, n])
        first_time = time_ps[cuts]
        self.time[ub] = np.where(np.isnan(self.time[ub]), first_time, self.time[ub])
        if self.t_first is None:
            self.t_first = (int(pos[0]), float(time_ps[0]))
        self.t_last = (int(pos[-1]), float(time_ps[-1]))

    def finish(self, replica):
        first = np.ceil(np.arange(self.n_blocks) * self.n_frames / self.n_blocks).astype(np.int64)
        interval = 1.0
        if self.t_first is not None and self.t_last[0] > self.t_first[0]:
            interval = (self.t_last[1] - self.t_first[1]) / (self.t_last[0] - self.t_first[0])
        t0 = self.t_first[1] if self.t_first is not None else 0.0
        time = np.where(np.isnan(self.time), first * interval + t0, self.time) - t0
        return ReplicaBlocks(replica=int(replica), counts=self.counts, weights=self.weights, frames=self.frames,
                             first=first, time_ps=time, n_frames=self.n_frames, interval_ps=float(interval))
