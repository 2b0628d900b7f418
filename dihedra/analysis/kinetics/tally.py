"""Tallies of discrete trajectories: lagged pair counts and dwell segments, chunk by chunk.

:class:`StateTally` takes the assigned states of many series (torsions, or conformer groups) side
by side, a chunk of frames at a time, and keeps only the counts and the last ``max(lags)`` frames
of each series. For every lag one ``bincount`` per chunk adds the pairs ``(t, t + tau)`` of all
series to dense ``(series, from, to)`` counts (sparse rows when the state space is large);
segments (maximal runs of one state) are found from the changes of state, the first and last of
every trajectory marked censored. A new replica starts unassigned (:meth:`StateTally.end_replica`),
so nothing joins two replicas.

:func:`tally_result` reads the time series of a tracking result once, through
:meth:`~dihedra.trajectory.result.TrackResult.iter_chunks`, in chunks of about
:data:`CHUNK_VALUES` values, by a few threads that each take whole molecules' columns; assigns
states (:mod:`.assignment`) and tallies torsions and conformer groups.
"""

from __future__ import annotations

import functools
import os
from types import SimpleNamespace

import numpy as np

from ...errors import DihedraError
from ...trajectory.result import release_memory
from .assignment import CoreCodes, _fill_rows, _joint_codes, _size_layout, codes_from_core_bits

#: Pair counts are kept as one dense (rows, v + 1, v + 1) array per lag when it has at most this
#: many cells (v states, one more for "unassigned"); otherwise as sparse rows.
DENSE_PAIR_CELLS = 1 << 24
#: Temporary arrays of the dense pair count hold about this many values (4 MB: they stay in the cache).
_CACHE_VALUES = 1 << 19
#: Sparse counts merge the rows added since the last merge when there are more than this many,
#: and more than the rows merged so far (so a merge sorts at most about twice the rows added).
_MERGE_ROWS = 500_000
#: Sparse pair counts are keyed by one integer per pair below this bound (int64).
_KEY_LIMIT = 2.0 ** 62


class _SparseCounts:
    """Counts of integer rows (e.g. series, from, to), merged lazily."""

    def __init__(self, width):
        self.width = width
        self._rows = [np.empty((0, width), dtype=np.int64)]
        self._counts = [np.empty(0, dtype=np.int64)]
        self._pending = 0

    def add(self, rows, counts):
        if len(rows):
            self._rows.append(np.asarray(rows, dtype=np.int64).reshape(-1, self.width))
            self._counts.append(np.asarray(counts, dtype=np.int64))
            self._pending += len(rows)
            # (the rows waiting to be merged were let grow to 2 million, 40 bytes each, merged at
            # the end with twice as much again: 180 MB per thread on 15,000 torsions)
            if self._pending > max(_MERGE_ROWS, len(self._rows[0])):
                self._compact()

    def _compact(self):
        rows, counts = _merge_rows(np.vstack(self._rows), np.concatenate(self._counts))
        self._rows, self._counts, self._pending = [rows], [counts], 0

    def result(self):
        """Unique rows (sorted) and their summed counts."""
        self._compact()
        return self._rows[0], self._counts[0]


def _row_keys(rows):
    """One int64 key per row (mixed radix, order-preserving), or None when the columns do not fit."""
    if len(rows) == 0 or rows.min() < 0:
        return None, None
    radix = [int(m) + 1 for m in rows.max(axis=0)]
    if float(np.prod([float(r) for r in radix])) >= 2.0 ** 62:
        return None, None
    key = np.zeros(len(rows), dtype=np.int64)
    for col, r in zip(rows.T, radix):
        key = key * r + col
    return key, radix


def _merge_rows(rows, counts):
    """Unique rows (sorted) and their summed counts."""
    if len(rows) == 0:
        return rows.reshape(0, rows.shape[1]), counts
    key, radix = _row_keys(rows)
    if key is None:
        uniq, inv = np.unique(rows, axis=0, return_inverse=True)
        return uniq, np.bincount(inv.reshape(-1), weights=counts, minlength=len(uniq)).astype(np.int64)
    uniq, inv = np.unique(key, return_inverse=True)
    summed = np.bincount(inv, weights=counts, minlength=len(uniq)).astype(np.int64)
    out, rem = [], uniq
    for r in reversed(radix):
        out.append(rem % r)
        rem = rem // r
    return np.column_stack(out[::-1]), summed


def _count_rows(columns):
    """Unique rows of the stacked 1-D int arrays ``columns`` and their counts."""
    if len(columns[0]) == 0:
        return np.empty((0, len(columns)), dtype=np.int64), np.empty(0, dtype=np.int64)
    return _merge_rows(np.column_stack(columns).astype(np.int64, copy=False), np.ones(len(columns[0]), dtype=np.int64))


class StateTally:
    """Streaming counts of discrete trajectories: lagged pair counts and dwell segments.

    Feed the assigned states of one replica chunk by chunk with :meth:`add`, and call
    :meth:`end_replica` at the end of every replica (which resets the carried state, so nothing
    joins two replicas). Memory holds only the counts and ``max(lags)`` frames per series.

    Parameters
    ----------
    n_series : int
        Number of discrete trajectories fed side by side (torsions, or conformer groups).
    lags : sequence of int
        Lags in frames of the Markov models (:attr:`lags_requested`); lag 1 is always counted too.
    n_states : int, optional
        Number of states (codes 0 .. n_states - 1); given, the pair counts are dense arrays
        (:attr:`pair_matrices_`), counted with one ``bincount`` per lag and chunk.
    pool : array-like of int (n_series,), optional
        Row of each series in the counts: series with the same row are tallied together (their
        segments are still found series by series). Default: one row per series.

    Attributes
    ----------
    pairs_ : dict of lag -> (ndarray (n_rows, 3), ndarray (n_rows,))
        Rows (row, from_state, to_state) and their counts (after :meth:`finish`).
    pair_matrices_ : dict of lag -> ndarray (n_rows, n_states, n_states), or None
        The same as dense arrays (when ``n_states`` was given and small enough).
    segments_ : (ndarray (n_rows, 4), ndarray (n_rows,))
        Rows (row, state, length_frames, censored) and the number of such segments.
    """

    def __init__(self, n_series, lags=(1,), n_states=None, pool=None):
        self.n_series = int(n_series)
        self.lags_requested = sorted({int(x) for x in lags})
        self.lags = sorted({1} | set(self.lags_requested))
        self._series_row = (np.arange(self.n_series, dtype=np.int64) if pool is None
                            else np.asarray(pool, dtype=np.int64).reshape(self.n_series))
        self.n_rows = int(self._series_row.max()) + 1 if self.n_series else 0
        self.n_states = None if n_states is None else int(n_states)
        width = None if self.n_states is None else self.n_states + 1
        self._dense = width is not None and self.n_rows * width * width <= DENSE_PAIR_CELLS
        if self._dense:
            self._pair_counts = {lag: np.zeros(self.n_rows * width * width, dtype=np.int64) for lag in self.lags}
        else:
            self._pairs = {lag: _SparseCounts(3) for lag in self.lags}
        self._segments = _SparseCounts(4)
        self._rows = np.arange(self.n_series, dtype=np.int64)
        self._reset()

    def _reset(self):
        s, lmax = self.n_series, max(self.lags)
        self._state = np.full(s, -1, dtype=np.int64)
        self._run = np.zeros(s, dtype=np.int64)
        self._first = np.ones(s, dtype=bool)
        self._tail = np.full((s, lmax), -1, dtype=np.int64)

    def add(self, assigned):
        """Add consecutive frames of the current replica.

        Parameters
        ----------
        assigned : ndarray of int, shape (n_frames, n_series)
            Assigned states (>= 0) or -1 (unassigned), e.g. from :func:`fill_forward`.
        """
        x = np.asarray(assigned)
        if x.ndim != 2 or x.shape[1] != self.n_series:
            raise ValueError(f"expected (n_frames, {self.n_series}) states, got shape {x.shape}")
        self.add_series(np.ascontiguousarray(x.T))

    def add_series(self, assigned):
        """:meth:`add` for states laid out series by series: shape (n_series, n_frames)."""
        xt = np.asarray(assigned)
        n = xt.shape[1]
        if n == 0:
            return
        lmax = self._tail.shape[1]
        if not self._dense:
            self._count_sparse(xt)
        else:  # a few series at a time, so that the temporary keys stay in the cache
            if xt.max() >= self.n_states:
                raise ValueError(f"state code {int(xt.max())} is not below n_states = {self.n_states}")
            step = max(1, _CACHE_VALUES // (n + lmax))
            for lo in range(0, self.n_series, step):
                self._count_dense(xt[lo:lo + step], lo)
        self._add_segments(xt)

    def _count_sparse(self, xt, lo=0):
        """Sparse pair counts of the series lo, lo + 1, ...: the codes of the chunk ranked first,
        then one int64 key (row, from rank, to rank) per pair, counted by one sort per lag.

        Joint conformer codes span n_states^size (14^8 for a residue of eight torsions), too wide
        for one key of (row, from, to), while a chunk holds a few thousand distinct codes. Sorting
        the pairs as rows of three columns instead took 10 of the 13 s of the pass over 10,000
        frames of adenylate kinase (crisp states)."""
        if not len(xt):
            return
        n, lmax = xt.shape[1], self._tail.shape[1]
        hi = lo + len(xt)
        full = np.concatenate([self._tail[lo:hi], xt.astype(np.int64, copy=False)], axis=1)
        codes, rank = np.unique(full, return_inverse=True)
        rows = self._series_row[lo:hi]
        first, width = int(rows.min()), len(codes)
        if (int(rows.max()) - first + 1) * float(width) ** 2 >= _KEY_LIMIT and len(xt) > 1:
            half = len(xt) // 2   # (too many codes for one key: half the series at a time)
            self._count_sparse(xt[:half], lo)
            self._count_sparse(xt[half:], lo + half)
            return
        self._tail[lo:hi] = full[:, -lmax:]
        rank = rank.reshape(full.shape)
        to_key = (rows - first)[:, None] * (width * width) + rank[:, lmax:]
        assigned = xt >= 0
        for lag in self.lags:
            ok = assigned & (full[:, lmax - lag:lmax - lag + n] >= 0)
            keys, counts = np.unique((to_key + rank[:, lmax - lag:lmax - lag + n] * width)[ok], return_counts=True)
            row, pair = np.divmod(keys, width * width)
            self._pairs[lag].add(np.column_stack([row + first, codes[pair // width], codes[pair % width]]), counts)

    def _count_dense(self, xt, lo):
        """Dense pair counts of the series lo, lo + 1, ... (one bincount per lag)."""
        n, lmax = xt.shape[1], self._tail.shape[1]
        hi = lo + len(xt)
        w = self.n_states + 1
        shifted = np.concatenate([self._tail[lo:hi], xt], axis=1) + 1  # int64; 0 = unassigned
        self._tail[lo:hi] = shifted[:, -lmax:] - 1
        rows = self._series_row[lo:hi]
        first, last = int(rows.min()), int(rows.max())
        base = ((rows - first) * (w * w))[:, None] + shifted[:, lmax:]
        np.multiply(shifted, w, out=shifted)
        cells = slice(first * w * w, (last + 1) * w * w)
        for lag in self.lags:
            key = base + shifted[:, lmax - lag:lmax - lag + n]
            self._pair_counts[lag][cells] += np.bincount(key.ravel(), minlength=(last - first + 1) * w * w)

    def _add_segments(self, xt):
        n = xt.shape[1]
        step = max(1, _CACHE_VALUES // (n + 1))
        found = []
        for lo in range(0, self.n_series, step):  # a few series at a time (the temporaries stay in the cache)
            prev = np.concatenate([self._state[lo:lo + step, None], xt[lo:lo + step]], axis=1)
            r, t = np.nonzero(prev[:, 1:] != prev[:, :-1])  # change at frame t (row-major order)
            found.append((r + lo, t, prev[r, t]))
        rows, ts, from_state = (np.concatenate(x).astype(np.int64, copy=False) for x in zip(*found))
        if len(rows):
            same = np.r_[False, rows[1:] == rows[:-1]]
            start = np.where(same, np.r_[0, ts[:-1]], -self._run[rows])
            length = ts - start
            first = np.where(same, np.r_[-1, from_state[:-1]] < 0, self._first[rows])
            keep = from_state >= 0
            self._segments.add(*_count_rows([self._series_row[rows[keep]], from_state[keep], length[keep],
                                             first[keep].astype(np.int64)]))
            last = np.r_[rows[1:] != rows[:-1], True]
            lr = rows[last]
            self._run += n
            self._run[lr] = n - ts[last]
            self._first[lr] = from_state[last] < 0
        else:
            self._run += n
        self._state = xt[:, -1].astype(np.int64)

    def end_replica(self):
        """Close the open segments (censored) and forget the carried state."""
        open_ = self._state >= 0
        if open_.any():
            rows = self._rows[open_]
            self._segments.add(*_count_rows([self._series_row[rows], self._state[open_], self._run[open_],
                                             np.ones(len(rows), dtype=np.int64)]))
        self._reset()

    def finish(self):
        """End the last replica and return ``self`` with :attr:`pairs_` and :attr:`segments_`."""
        self.end_replica()
        self.pair_matrices_ = None
        if self._dense:
            w = self.n_states + 1
            self.pair_matrices_ = {lag: c.reshape(self.n_rows, w, w)[:, 1:, 1:] for lag, c in self._pair_counts.items()}
            self.pairs_ = {}
            for lag, mat in self.pair_matrices_.items():
                nz = np.nonzero(mat)
                self.pairs_[lag] = (np.column_stack(nz).astype(np.int64), mat[nz])
        else:
            self.pairs_ = {lag: c.result() for lag, c in self._pairs.items()}
        self.segments_ = self._segments.result()
        return self


def _dense_counts(pairs, n_rows, n_states, row_map=None, code_map=None):
    """Dense (rows, states, states) pair counts from the sparse rows of a tally, for every lag.

    ``row_map`` maps tally rows to output rows (-1: left out); ``code_map`` gives the sorted codes
    kept as states (others left out).
    """
    out = {}
    for lag, (rows, counts) in pairs.items():
        r, a, b = rows[:, 0], rows[:, 1], rows[:, 2]
        if row_map is not None:
            r = row_map[r]
        if code_map is not None:
            a = np.searchsorted(code_map, a)
            b = np.searchsorted(code_map, b)
        keep = r >= 0
        mat = np.zeros((n_rows, n_states, n_states))
        np.add.at(mat, (r[keep], a[keep], b[keep]), counts[keep])
        out[lag] = mat
    return out


def _merge_tallies(done, parts, n_columns, n_states):
    """The tallies of the parts as one torsion tally (columns in their order) and one conformer tally."""
    if len(done) == 1:
        return done[0][0], done[0][1]
    first = done[0][0]
    lags = first.lags
    matrices = {lag: np.zeros((n_columns, n_states, n_states), dtype=np.int64) for lag in lags}
    seg_rows, seg_counts = [], []
    for (tally, _, _), (columns, _) in zip(done, parts):
        mats = tally.pair_matrices_ or _dense_counts(tally.pairs_, len(columns), n_states)
        for lag in lags:
            matrices[lag][columns] = mats[lag]
        rows, counts = tally.segments_
        seg_rows.append(np.column_stack([columns[rows[:, 0]], rows[:, 1:]]) if len(rows) else rows)
        seg_counts.append(counts)
    torsion = SimpleNamespace(lags=lags, lags_requested=first.lags_requested, pair_matrices_=matrices,
                              pairs_=None, segments_=_merge_rows(np.vstack(seg_rows), np.concatenate(seg_counts)))
    conf = [c for _, c, _ in done if c is not None]
    if not conf:
        return torsion, None
    pairs = {lag: _merge_rows(np.vstack([c.pairs_[lag][0] for c in conf]),
                              np.concatenate([c.pairs_[lag][1] for c in conf])) for lag in lags}
    segments = _merge_rows(np.vstack([c.segments_[0] for c in conf]), np.concatenate([c.segments_[1] for c in conf]))
    return torsion, SimpleNamespace(lags=lags, pairs_=pairs, segments_=segments,
                                    n_rows=max(c.n_rows for c in conf))


#: Work on about this many (frame, torsion) values at a time when streaming a time series (all
#: threads together).
CHUNK_VALUES = 2_000_000
#: Values decoded from the time series at a time (all threads together; the steps that follow take
#: CHUNK_VALUES at a time).
READ_VALUES = 8_000_000


def _frames_at_a_time(n_columns, n_decoded, n_parts, batch_frames=None):
    """Frames read and frames worked on at a time by each of ``n_parts`` parts of ``n_columns``
    torsions, side by side.

    Together the parts decode about READ_VALUES values (a frame of a packed time series decodes
    all ``n_decoded`` torsions of the file, whichever are asked for) and work on about
    CHUNK_VALUES, so that the memory of the pass grows neither with the frames nor with the
    threads (each of two parts took 10,000 frames of 530 protein torsions at once, and the work
    on them about 35 bytes a value in NumPy arrays alone)."""
    read = int(batch_frames) if batch_frames else max(64, READ_VALUES // (n_parts * max(1, n_decoded)))
    return read, min(read, max(1, CHUNK_VALUES // (n_parts * max(1, n_columns))))


def _replica_blocks(result, kind, labels, frames):
    """Yield (replica, values) of a time series: values (n_labels, n_frames) laid out series by
    series, consecutive frames of one replica, ``frames = (read, work)`` frames at a time: read
    through :meth:`~dihedra.trajectory.result.TrackResult.iter_chunks` ``read`` frames at a time
    and yielded ``work`` frames at a time (see :func:`_frames_at_a_time`)."""
    read, step = frames
    for chunk in result.iter_chunks(kind, labels, read):
        for a in range(0, len(chunk), step):
            yield chunk.replica, chunk.values[:, a:a + step]


def _core_blocks(result, labels, frames):
    """Yield (replica, core codes) from the state codes and the core bits of the pass
    (``cores.parquet``), read side by side in the same blocks."""
    damaged = DihedraError("the core bits (cores.parquet) do not match the states (states.parquet) frame by frame; "
                           "the results folder is damaged: run 'dihedra track' again.")
    bits = _replica_blocks(result, "cores", labels, frames)
    for rep, codes in _replica_blocks(result, "states", labels, frames):
        rep_bits, in_core = next(bits, (None, None))
        if rep != rep_bits or in_core is None or codes.shape != in_core.shape:
            raise damaged
        yield rep, codes_from_core_bits(codes, in_core)
    if next(bits, None) is not None:
        raise damaged


#: Threads that read and tally parts of the torsions side by side.
_THREADS = min(4, os.cpu_count() or 1)
#: ... each with at least this many torsions.
_MIN_PART = 256


def _column_parts(n_columns, members, n_parts):
    """Split the columns into about equal parts that keep every conformer group whole: (columns,
    groups) per part, each sorted."""
    n_parts = max(1, min(int(n_parts), n_columns // _MIN_PART))
    owner = np.full(n_columns, -1, dtype=np.int64)
    for g, m in enumerate(members):
        owner[np.asarray(m)] = g
    unit = np.where(owner >= 0, owner, len(members) + np.arange(n_columns))  # a group, or a lone torsion
    _, first, inverse = np.unique(unit, return_index=True, return_inverse=True)
    order = np.argsort(first)  # units in the order of their first column
    sizes = np.bincount(inverse.reshape(-1))[order]
    part_of_unit = np.empty(len(first), dtype=np.int64)
    part_of_unit[order] = np.minimum((np.cumsum(sizes) - sizes) * n_parts // n_columns, n_parts - 1)
    part = part_of_unit[inverse.reshape(-1)]
    return [(np.flatnonzero(part == k), np.array([g for g, m in enumerate(members) if part[m[0]] == k],
                                                dtype=np.int64)) for k in range(n_parts) if (part == k).any()]


def _tally_columns(part, result, labels, kind, scheme, margin, lags, members, pool, frames):
    """Read the columns of one part, ``frames = (read, work)`` frames at a time (see
    :func:`_frames_at_a_time`), assign states and tally torsions and conformer groups.

    Returns (torsion tally, conformer tally or None, frames read).
    """
    columns, groups = part
    local = {int(c): k for k, c in enumerate(columns)}
    n_s = scheme.n_states
    t_tally = StateTally(len(columns), lags, n_states=n_s)
    c_tally, layout = None, []
    if len(groups):
        part_members = [np.array([local[int(c)] for c in members[g]], dtype=np.int64) for g in groups]
        c_tally = StateTally(len(groups), lags, n_states=n_s ** max(len(m) for m in part_members),
                             pool=pool[groups])
        layout = _size_layout(part_members)
    carry = np.full(len(columns), -1, dtype=np.int64)
    current = None
    n_frames = 0
    core = _core_assigner(result, scheme, margin, [labels[c] for c in columns]) if kind == "angles" else None
    blocks = _core_blocks if kind == "cores" else functools.partial(_replica_blocks, kind=kind)
    for rep, block in blocks(result, labels=[labels[c] for c in columns], frames=frames):
        if rep != current:
            if current is not None:
                t_tally.end_replica()
                if c_tally is not None:
                    c_tally.end_replica()
            carry[:] = -1
            current = rep
        codes = core(block) if kind == "angles" else block
        assigned = _fill_rows(codes, carry)
        carry = assigned[:, -1].astype(np.int64)
        t_tally.add_series(assigned)
        if c_tally is not None:
            c_tally.add_series(_joint_codes(assigned, layout, n_s))
        n_frames += block.shape[1]
    t_tally.finish()
    if c_tally is not None:
        c_tally.finish()
    return t_tally, c_tally, n_frames


def _core_assigner(result, scheme, margin, labels):
    """Core codes of the angle rows of the torsions ``labels``: the scheme's cores, or for a set
    of schemes the cores of each torsion's own part."""
    parts = scheme.coded_parts()
    if len(parts) == 1:
        return CoreCodes(scheme, margin)
    type_of = dict(zip(result.torsion_set.labels, result.torsion_set.types))
    which = np.array([scheme.part_index(type_of[lab]) for lab in labels], dtype=np.int64)
    cores = {k: CoreCodes(parts[k], margin) for k in np.unique(which)}

    def assign(block):
        out = np.empty(block.shape, dtype=np.int8)
        for k, core in cores.items():
            rows = which == k
            out[rows] = core(block[rows])
        return out
    return assign


def tally_result(result, kind, labels, scheme, margin, lags, members, pool, batch_frames=None):
    """Read the ``kind`` time series of ``result`` once, assign states and tally every torsion and
    conformer group.

    The columns are read in parts that keep every conformer group whole, side by side in threads
    (NumPy and Arrow release the interpreter lock).

    Parameters
    ----------
    result : TrackResult
    kind : {"angles", "cores", "states"}
        Angles for core-set assignment (``margin`` degrees), or the state codes with the core
        bits of the pass (its margin), or the states for crisp assignment.
    labels : list of str
        Torsion labels (columns of the time series).
    scheme : StateScheme
    margin : float or None
    lags : list of int
    members : list of ndarray
        Columns (indices into ``labels``) of each conformer group, in chain order.
    pool : ndarray of int
        Conformer type of each group (the row of its counts).
    batch_frames : int, optional
        Frames read at a time (default: see :func:`_frames_at_a_time`).

    Returns
    -------
    torsion tally, conformer tally (or None), frames read
    """
    parts = _column_parts(len(labels), members, _THREADS)
    n_decoded = max(len(labels), len(result.torsions))

    def read(part):
        return _tally_columns(part, result, labels, kind, scheme, margin, lags, members, pool,
                              _frames_at_a_time(len(part[0]), n_decoded, len(parts), batch_frames))

    if len(parts) > 1:
        from concurrent.futures import ThreadPoolExecutor

        with ThreadPoolExecutor(len(parts)) as workers:
            done = list(workers.map(read, parts))
    else:
        done = [read(parts[0])]
    t_tally, c_tally = _merge_tallies(done, parts, len(labels), scheme.n_states)
    release_memory()   # (the buffers of the reads: 130 MB for 15,000 torsions, kept otherwise)
    return t_tally, c_tally, done[0][2]
