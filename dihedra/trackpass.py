"""The trajectory pass: one streaming sweep that turns frames into torsion states.

:class:`TorsionPass` is an MDAnalysis :class:`~MDAnalysis.analysis.base.AnalysisBase` subclass.
For each frame it computes all torsion angles at once (:class:`dihedra.angles.TorsionGeometry`,
minimum image, float32), assigns state codes with the scheme, adds the angles to a fine histogram
and appends the codes to a chunk buffer. Results:

``results.state_counts`` : ndarray, shape (n_state_blocks, n_torsions, n_states)
    (weighted) number of frames per block, torsion and state; blocks are equal slices of the
    analysed frames, fixed by frame position, so serial and parallel runs fill the same cells.
``results.histograms`` : ndarray, shape (n_hist_blocks, n_torsions, n_bins)
    (weighted) fine periodic angle histogram per block, bins of ``bin_width_deg`` on (-180, 180],
    each bin open at its left edge and closed at its right (int32 counts, float64 when weighted).
``results.block_frames`` / ``results.hist_block_frames`` : ndarray (n_blocks,)
    frames per block; ``results.block_weights`` / ``results.hist_block_weights`` the weight sums.
``results.undefined`` : ndarray (n_torsions,)
    frames in which each torsion was undefined (collinear atoms, NaN coordinates); such frames
    are counted here and never binned.
``results.conformer_counts`` : ndarray (n_rows, 4) int64 and ``results.conformer_weights``
    rows (block, group, joint_code, frames) of the joint states of each conformer group.
``results.parts`` : list of str
    Chunk files of the state time series (and angles with ``keep_angles``) in ``parts_dir``,
    which :func:`dihedra.resultsdir.merge_parts` turns into ``states.parquet``.

Per frame
---------
The state of an angle is looked up from its fine bin: a bin (lo, hi] that no state boundary cuts
has one state for all its angles, so ``code = table[bin]``; the few bins that hold a boundary are
marked and their angles go through :meth:`StateScheme.assign <dihedra.schemes.StateScheme.assign>`,
so the codes are exactly those of the scheme. The bin index is computed in float64 from the
float32 angle, ``k = ceil((angle + 180) / width)``, exact for the documented open-left bins. The
histogram of the current block is one dense array updated in place; a finished block is kept as
its non-empty cells only, so a worker holds one dense block however many blocks it fills.

Per chunk
---------
State counts per block and the conformer rows are computed from the chunk buffer of codes, with a
few vectorised calls per state and per group size, instead of per frame. The chunk is written as
a raw array file (one row per torsion) into ``parts_dir``; the parent process converts the chunk
files, in frame order, into one Parquet file with row groups of ``chunk_frames`` frames, the same
for any number of workers. Workers therefore never encode Parquet, and memory stays bounded by
one chunk buffer and the block sums, whatever the number of frames.

Parallel runs
-------------
Partial results of workers merge by exact sums (``ResultsGroup``), so the multiprocessing, dask
and distributed (:mod:`dihedra.distributed`) backends give the same integers as a serial run.
"""

from __future__ import annotations

import json
import os

import numpy as np
from MDAnalysis.analysis.base import AnalysisBase
from MDAnalysis.analysis.results import ResultsGroup

from .angles import TorsionGeometry
from .schemes import UNDEFINED

#: Groups with more torsions than this get no conformer statistics (their joint states explode).
MAX_CONFORMER_TORSIONS = 12

#: Default size of a chunk (and of a Parquet row group) of the time series, in bytes of values.
CHUNK_BYTES = 64 << 20

#: Name of the file in ``parts_dir`` that describes the chunk files (labels, weights, row groups).
LAYOUT_FILE = "layout.json"

#: Marks a fine bin that a state boundary cuts (its angles are assigned one by one).
_MIXED = np.int8(-128)

#: Temporary arrays of the chunk reductions stay below this many bytes.
_WORK_BYTES = 8 << 20


def conformer_layout(torsion_set, n_states, max_torsions=MAX_CONFORMER_TORSIONS):
    """Groups for conformer counting.

    Returns
    -------
    groups : list of str
        Group names with between 2 and ``max_torsions`` torsions.
    members : list of ndarray
        Torsion positions of each group, in chain order.
    skipped : list of str
        Groups left out because they have too many torsions.
    """
    by_group = {}
    for pos, t in enumerate(torsion_set.torsions):
        by_group.setdefault(t.group, []).append((t.order, pos))
    groups, members, skipped = [], [], []
    for name, items in by_group.items():
        if len(items) < 2:
            continue
        if len(items) > max_torsions or n_states ** len(items) >= 2 ** 62:
            skipped.append(name)
            continue
        groups.append(name)
        members.append(np.array([p for _, p in sorted(items)], dtype=np.int64))
    return groups, members, skipped


def bin_state_table(scheme, n_bins):
    """State code of every fine bin, or a mark for bins that a state boundary cuts.

    Parameters
    ----------
    scheme : StateScheme
    n_bins : int
        Bins of width 360 / n_bins on (-180, 180], open at the left edge.

    Returns
    -------
    ndarray of int8, shape (n_bins + 1,)
        Entry ``k`` (1..n_bins) belongs to bin ``k - 1``, the bin (-180 + (k-1) w, -180 + k w];
        ``ceil((angle + 180) / w)`` indexes it directly. Entry 0 is never used.

    Examples
    --------
    >>> from dihedra.schemes import get_scheme
    >>> t = bin_state_table(get_scheme("anti-gauche"), 360)
    >>> int(t[60]), int(t[59]), int(t[300]), int(t[301])  # bins (-121,-120], (-122,-121], (119,120], (120,121]
    (-128, 0, 1, 0)
    """
    width = 360.0 / n_bins
    lo = -180.0 + width * np.arange(n_bins)
    hi = lo + width
    probes = np.stack([lo + width * f for f in (1e-6, 0.25, 0.5, 0.75, 1.0 - 1e-6)] + [hi], axis=1)
    codes = scheme.assign(probes.reshape(-1)).reshape(probes.shape)
    pure = np.all(codes == codes[:, :1], axis=1)
    for b in scheme.boundaries_deg:
        pure &= ~((lo < b) & (b < hi))
    table = np.full(n_bins + 1, _MIXED, dtype=np.int8)
    table[1:] = np.where(pure, codes[:, -1], _MIXED)
    return table


class TorsionPass(AnalysisBase):
    """Stream a trajectory once and accumulate torsion states, histograms and block sums.

    Parameters
    ----------
    universe : MDAnalysis.Universe
    torsion_set : dihedra.torsions.TorsionSet
    scheme : dihedra.schemes.StateScheme
    n_state_blocks : int
        Blocks for population errors (merged pairwise by blocking analysis).
    n_hist_blocks : int
        Blocks of the angle histograms (for block-bootstrap errors of profiles).
    bin_width_deg : float
        Width of the fine histogram bins; 360 must be a multiple of it.
    weights : ndarray, optional
        One weight per analysed frame (in order), for reweighting biased runs.
    parts_dir : str, optional
        Folder for the chunk files of the time series; ``None`` writes no time series. With a
        distributed scheduler it must be on a file system that the workers and the calling
        process share.
    keep_angles : bool
        Also write the angles (float32 degrees).
    chunk_frames : int, optional
        Frames per chunk and per Parquet row group (default: about 64 MB of values per chunk).
    replica : int
        Replica number written with every frame.
    dt_ps : float, optional
        Replaces the trajectory's time step: time = frame * dt_ps.

    Examples
    --------
    >>> import MDAnalysis as mda
    >>> from dihedra import example_path, select_torsions, get_scheme
    >>> u = mda.Universe(example_path("hexane.pdb"), example_path("hexane.xtc"))
    >>> tp = TorsionPass(u, select_torsions(u, "rotatable"), get_scheme("anti-gauche")).run(stop=10)
    >>> tp.results.state_counts.sum()  # 10 frames x 300 torsions
    np.int64(3000)
    """

    _analysis_algorithm_is_parallelizable = True

    @classmethod
    def get_supported_backends(cls):
        return ("serial", "multiprocessing", "dask")

    def __init__(self, universe, torsion_set, scheme, *, n_state_blocks=64, n_hist_blocks=16,
                 bin_width_deg=1.0, weights=None, parts_dir=None, keep_angles=False,
                 chunk_frames=None, replica=0, dt_ps=None, verbose=False):
        super().__init__(universe.trajectory, verbose=verbose)
        self._universe = universe
        self.torsion_set = torsion_set
        self.scheme = scheme
        self.n_state_blocks = int(n_state_blocks)
        self.n_hist_blocks = int(n_hist_blocks)
        self.bin_width_deg = float(bin_width_deg)
        self.weights = None if weights is None else np.asarray(weights, dtype=np.float64)
        self.parts_dir = parts_dir
        self.keep_angles = bool(keep_angles)
        self.chunk_frames = chunk_frames
        self.replica = int(replica)
        self.dt_ps = dt_ps

    # -- parallel merge -------------------------------------------------------------------
    def _get_aggregator(self):
        s = ResultsGroup.ndarray_sum
        return ResultsGroup(lookup={
            "state_counts": s, "block_frames": s, "block_weights": s,
            "hist_block_frames": s, "hist_block_weights": s, "undefined": s,
            "hist_parts": ResultsGroup.flatten_sequence,
            "conformer_counts": ResultsGroup.ndarray_vstack,
            "conformer_weights": ResultsGroup.ndarray_hstack,
            "parts": ResultsGroup.flatten_sequence,
        })

    def _compute(self, indexed_frames, verbose=None, *, progressbar_kwargs=None):
        # the whole run's frame count is known here (before the slice of this worker replaces it)
        self._n_total = self.n_frames
        self._global_index = np.asarray(indexed_frames[:, 0], dtype=np.int64)
        super()._compute(indexed_frames, verbose=verbose, progressbar_kwargs=progressbar_kwargs)
        self._flush()
        self._retire_hist_block()
        self._retire_conformer_block()
        self._finish_worker()
        return self

    # -- AnalysisBase template -----------------------------------------------------------------
    def _prepare(self):
        n_t = len(self.torsion_set)
        n_s = self.scheme.n_states
        n_bins = int(round(360.0 / self.bin_width_deg))
        if abs(n_bins * self.bin_width_deg - 360.0) > 1e-9:
            raise ValueError(f"bin_width_deg must divide 360; got {self.bin_width_deg}")
        self._n_bins = n_bins
        if not hasattr(self, "_n_total"):  # _prepare called outside run()
            self._n_total = self.n_frames
            self._global_index = np.arange(self.n_frames)
        weighted = self.weights is not None
        self._count_dtype = np.float64 if weighted else np.int64
        self._hist_dtype = np.float64 if weighted else np.int32
        res = self.results
        res.state_counts = np.zeros((self.n_state_blocks, n_t, n_s), dtype=self._count_dtype)
        res.block_frames = np.zeros(self.n_state_blocks, dtype=np.int64)
        res.block_weights = np.zeros(self.n_state_blocks, dtype=np.float64)
        res.hist_block_frames = np.zeros(self.n_hist_blocks, dtype=np.int64)
        res.hist_block_weights = np.zeros(self.n_hist_blocks, dtype=np.float64)
        res.undefined = np.zeros(n_t, dtype=np.int64)
        res.hist_parts = []
        res.conformer_counts = np.empty((0, 4), dtype=np.int64)
        res.conformer_weights = np.empty(0, dtype=np.float64)
        res.parts = []
        # per-frame work: geometry plan, bin -> state table, preallocated buffers
        self._geometry = TorsionGeometry(self.torsion_set.indices)
        self._bin_table = bin_state_table(self.scheme, n_bins)
        self._has_mixed = bool((self._bin_table[1:] == _MIXED).any())
        self._hist_base = np.arange(n_t, dtype=np.intp) * n_bins - 1   # + k (1..n_bins) = flat cell
        self._deg64 = np.empty(n_t, dtype=np.float64)
        self._nan = np.empty(n_t, dtype=bool)
        self._k = np.empty(n_t, dtype=np.intp)
        self._cell = np.empty(n_t, dtype=np.intp)
        self._hist_cur = None
        self._hist_cur_block = -1
        self._one = np.int32(1)
        # conformer groups of equal size are counted together
        _, members, _ = conformer_layout(self.torsion_set, n_s)
        self._conf_classes = _conformer_classes(members, n_s)
        self._conf_cur_block = -1
        self._conf_cur = {}
        self._conf_rows, self._conf_wts = [], []
        # chunk buffers, at most as many rows as this worker has frames
        if self.chunk_frames is None:
            per_frame = max(1, n_t) * (1 + 4 * self.keep_angles)
            self.chunk_frames = int(max(64, min(100_000, CHUNK_BYTES // per_frame)))
        cf = int(max(1, min(int(self.chunk_frames), self.n_frames)))
        self._buf_codes = np.empty((cf, n_t), dtype=np.int8)
        self._buf_angles = np.empty((cf, n_t), dtype=np.float32) if self.keep_angles else None
        self._buf_frame = np.empty(cf, dtype=np.int64)
        self._buf_time = np.empty(cf, dtype=np.float64)
        self._buf_index = np.empty(cf, dtype=np.int64)
        self._n_buf = 0

    def _single_frame(self):
        ts = self._ts
        gi = int(self._global_index[self._frame_index])
        hb = gi * self.n_hist_blocks // max(1, self._n_total)
        if hb != self._hist_cur_block:
            self._retire_hist_block()
            self._start_hist_block(hb)
        w = self._one if self.weights is None else np.float64(self.weights[gi])
        deg = self._geometry(ts.positions, ts.dimensions)
        row = self._n_buf
        codes = self._buf_codes[row]
        d, k, cell = self._deg64, self._k, self._cell
        np.copyto(d, deg)
        nan = np.isnan(d, out=self._nan)
        undefined = nan.any()
        if undefined:
            d[nan] = 0.0
        d += 180.0
        if self.bin_width_deg != 1.0:
            d /= self.bin_width_deg
        np.ceil(d, out=d)
        np.copyto(k, d, casting="unsafe")     # 1..n_bins: bin k-1
        np.take(self._bin_table, k, out=codes)
        if self._has_mixed:
            mixed = codes == _MIXED
            if mixed.any():
                codes[mixed] = self.scheme.assign(deg[mixed].astype(np.float64))
        np.add(self._hist_base, k, out=cell)
        if undefined:
            codes[nan] = UNDEFINED
            self.results.undefined += nan
            np.add.at(self._hist_cur, cell[~nan], w)
        else:
            np.add.at(self._hist_cur, cell, w)   # fast with a scalar of the array's dtype
        if self._buf_angles is not None:
            self._buf_angles[row] = deg
        self._buf_frame[row] = ts.frame
        self._buf_time[row] = ts.time if self.dt_ps is None else ts.frame * float(self.dt_ps)
        self._buf_index[row] = gi
        self._n_buf = row + 1
        if self._n_buf == len(self._buf_codes):
            self._flush()

    def _conclude(self):
        # dense histograms from the non-empty cells of every block (of every worker)
        res = self.results
        parts = res.pop("hist_parts", None)
        if parts is None:
            return
        n_t = len(self.torsion_set)
        dtype = np.float64 if self.weights is not None else np.int32
        hist = np.zeros((self.n_hist_blocks, n_t, int(round(360.0 / self.bin_width_deg))), dtype=dtype)
        while parts:
            block, cells, values = parts.pop()
            hist[block].reshape(-1)[cells] += values
        res.histograms = hist

    # -- histogram blocks ------------------------------------------------------------------------
    def _start_hist_block(self, block):
        size = len(self.torsion_set) * self._n_bins
        if self._hist_cur is None:
            self._hist_cur = np.zeros(size, dtype=self._hist_dtype)
        else:
            self._hist_cur.fill(0)
        self._hist_cur_block = block

    def _retire_hist_block(self):
        if self._hist_cur_block < 0:
            return
        cells = np.flatnonzero(self._hist_cur)
        small = self._hist_cur.size < 2**31
        self.results.hist_parts.append((self._hist_cur_block, cells.astype(np.int32 if small else np.int64),
                                        self._hist_cur[cells].copy()))
        self._hist_cur_block = -1

    # -- chunk work --------------------------------------------------------------------------------
    def _flush(self):
        n = getattr(self, "_n_buf", 0)
        if n == 0:
            return
        codes = self._buf_codes[:n]
        gi = self._buf_index[:n]
        total = max(1, self._n_total)
        sblock = gi * self.n_state_blocks // total
        hblock = gi * self.n_hist_blocks // total
        w = (np.ones(n) if self.weights is None else self.weights[gi])
        res = self.results
        np.add.at(res.block_frames, sblock, 1)
        np.add.at(res.block_weights, sblock, w)
        np.add.at(res.hist_block_frames, hblock, 1)
        np.add.at(res.hist_block_weights, hblock, w)
        # frames come in order: split the chunk where the state block changes
        cuts = np.flatnonzero(np.diff(sblock)) + 1
        for lo, hi in zip(np.r_[0, cuts], np.r_[cuts, n]):
            b = int(sblock[lo])
            self._count_states(codes[lo:hi], None if self.weights is None else w[lo:hi], b)
            self._count_conformers(codes[lo:hi], w[lo:hi], b)
        if self.parts_dir is not None:
            self._write_chunk(n)
        self._n_buf = 0

    def _count_states(self, codes, weights, block):
        counts = self.results.state_counts[block]
        n, n_t = codes.shape
        step = max(1, _WORK_BYTES // (8 * max(1, n_t)))
        for lo in range(0, n, step):
            sub = codes[lo:lo + step]
            for s in range(self.scheme.n_states):
                hit = sub == s
                if weights is None:
                    counts[:, s] += np.count_nonzero(hit, axis=0)
                else:
                    counts[:, s] += weights[lo:lo + step] @ hit.astype(np.float64)

    def _count_conformers(self, codes, weights, block):
        if not self._conf_classes:
            return
        if block != self._conf_cur_block:
            self._retire_conformer_block()
            self._conf_cur_block = block
        n = len(codes)
        for key, (gids, members, powers, size) in self._conf_classes.items():
            n_g, width = members.shape
            step = max(1, _WORK_BYTES // (8 * n_g * width))
            for lo in range(0, n, step):
                sub = codes[lo:lo + step][:, members]                 # (f, n_g, width)
                ok = (sub >= 0).all(axis=2)
                joint = sub.astype(np.int64) @ powers                 # (f, n_g)
                cell = joint + (np.arange(n_g, dtype=np.int64) * size)[None, :]
                cell, wsub = cell[ok], np.broadcast_to(weights[lo:lo + step, None], ok.shape)[ok]
                self._conf_add(key, cell, wsub, n_g * size)

    def _conf_add(self, key, cell, weights, n_cells):
        cur = self._conf_cur.get(key)
        if n_cells <= (4 << 20):  # dense counts for the current block
            if cur is None:
                cur = (np.zeros(n_cells, dtype=np.int64), np.zeros(n_cells, dtype=np.float64))
                self._conf_cur[key] = cur
            np.add(cur[0], np.bincount(cell, minlength=n_cells), out=cur[0])
            np.add(cur[1], np.bincount(cell, weights=weights, minlength=n_cells), out=cur[1])
        else:  # sparse: merge sorted unique cells
            cells, inv = np.unique(cell, return_inverse=True)
            cnt = np.bincount(inv, minlength=len(cells))
            wts = np.bincount(inv, weights=weights, minlength=len(cells))
            if cur is not None:
                cells = np.concatenate([cur[0], cells])
                cells, inv = np.unique(cells, return_inverse=True)
                cnt = np.bincount(inv, weights=np.concatenate([cur[1], cnt]), minlength=len(cells))
                wts = np.bincount(inv, weights=np.concatenate([cur[2], wts]), minlength=len(cells))
            self._conf_cur[key] = (cells, cnt.astype(np.int64), wts)

    def _retire_conformer_block(self):
        if self._conf_cur_block < 0:
            return
        for key, cur in self._conf_cur.items():
            gids, _, _, size = self._conf_classes[key]
            if len(cur) == 2:
                cells = np.flatnonzero(cur[0])
                cnt, wts = cur[0][cells], cur[1][cells]
            else:
                cells, cnt, wts = cur
            rows = np.column_stack([np.full(len(cells), self._conf_cur_block, dtype=np.int64),
                                    gids[cells // size], cells % size, cnt])
            self._conf_rows.append(rows)
            self._conf_wts.append(wts)
        self._conf_cur = {}
        self._conf_cur_block = -1

    def _finish_worker(self):
        if self._conf_rows:
            rows = np.vstack(self._conf_rows)
            wts = np.concatenate(self._conf_wts)
            self.results.conformer_counts, self.results.conformer_weights = reduce_conformer_rows(rows, wts)
        self._conf_rows, self._conf_wts = [], []
        self._hist_cur = None
        self._buf_codes = self._buf_angles = None

    # -- chunk files -------------------------------------------------------------------------------
    def _write_chunk(self, n):
        first = int(self._buf_index[0])
        stem = os.path.join(self.parts_dir, f"replica{self.replica:04d}-from{first:012d}")
        if not os.path.exists(os.path.join(self.parts_dir, LAYOUT_FILE)):
            self._write_layout()
        index = {"frame": self._buf_frame[:n], "time_ps": self._buf_time[:n]}
        if self.weights is not None:
            index["weight"] = self.weights[self._buf_index[:n]]
        paths = [stem + ".index.npz"]
        np.savez(paths[0], **index)
        for kind, buf in (("states", self._buf_codes), ("angles", self._buf_angles)):
            if buf is None:
                continue
            path = f"{stem}.{kind}.npy"
            np.save(path, _transpose(buf[:n]))   # one contiguous row per torsion
            paths.append(path)
        self.results.parts.extend(paths)

    def _write_layout(self):
        layout = {"labels": list(self.torsion_set.labels), "weighted": self.weights is not None,
                  "row_group_frames": int(self.chunk_frames), "keep_angles": self.keep_angles}
        path = os.path.join(self.parts_dir, LAYOUT_FILE)
        tmp = f"{path}.{os.getpid()}.{id(self)}.tmp"
        with open(tmp, "w") as fh:
            json.dump(layout, fh)
        os.replace(tmp, path)


def _transpose(block, tile=1024):
    """``block.T`` as a contiguous copy, tile by tile (faster than one strided copy)."""
    n, m = block.shape
    out = np.empty((m, n), dtype=block.dtype)
    for lo in range(0, m, tile):
        out[lo:lo + tile] = block[:, lo:lo + tile].T
    return out


def _conformer_classes(members, n_states):
    """Groups of equal size, counted together: {size: (group ids, members, powers, n_joint)}."""
    by_size = {}
    for g, m in enumerate(members):
        by_size.setdefault(len(m), []).append(g)
    classes = {}
    for width, gids in by_size.items():
        gids = np.asarray(gids, dtype=np.int64)
        classes[width] = (gids, np.vstack([members[g] for g in gids]),
                          n_states ** np.arange(width, dtype=np.int64), n_states ** width)
    return classes


def reduce_conformer_rows(rows, weights):
    """Sum duplicate (block, group, joint) rows of conformer counts.

    Returns the rows sorted by block, group and joint code, with ``frames`` summed, and the
    summed weights.
    """
    rows = np.asarray(rows, dtype=np.int64).reshape(-1, 4)
    weights = np.asarray(weights, dtype=np.float64)
    if len(rows) == 0:
        return np.empty((0, 4), dtype=np.int64), np.empty(0)
    order = np.lexsort((rows[:, 2], rows[:, 1], rows[:, 0]))
    rows, weights = rows[order], weights[order]
    new = np.ones(len(rows), dtype=bool)
    new[1:] = np.any(rows[1:, :3] != rows[:-1, :3], axis=1)
    starts = np.flatnonzero(new)
    counts = np.add.reduceat(rows[:, 3], starts)
    wsum = np.add.reduceat(weights, starts)
    return np.column_stack([rows[starts, :3], counts]), wsum
