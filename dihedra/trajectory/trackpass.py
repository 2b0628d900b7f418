"""The trajectory pass: one streaming sweep that turns frames into torsion states.

:class:`TorsionPass` is an MDAnalysis :class:`~MDAnalysis.analysis.base.AnalysisBase` subclass.
For each frame it computes all torsion angles at once (:class:`dihedra.numerics.angles.TorsionGeometry`,
minimum image, float32 angles), assigns state codes with the scheme, adds the angles to a fine histogram
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
``results.conformer_dense`` : dict
    {width: (counts, weights)} for the classes of conformer groups of ``width`` torsions that are
    counted densely: counts (n_state_blocks, n_groups, n_states ** width) int32 (group order of
    the class), weights float64 or ``None`` when unweighted.
``results.conformer_counts`` : ndarray (n_rows, 4) int64 and ``results.conformer_weights``
    rows (block, group, joint_code, frames) of the joint states of the groups of classes too
    large to count densely.

Per frame
---------
One compiled kernel call (:mod:`dihedra.numerics._kernels`, numba; identical NumPy twins when numba is
missing) computes the angles (:class:`dihedra.numerics.angles.TorsionGeometry`), and a second one, in a
single loop over torsions, the fine bin, the state code, the histogram update of the current
block, the state count of the current block and the code row of the chunk buffer. The bin of a
float32 angle a is ``k - 1`` with ``k = ceil(a / width) + n_bins / 2``, exact for bins open at the
left edge. The state of an angle is looked up from its fine bin: a bin (lo, hi] that no state
boundary cuts has one state for all its angles, so ``code = table[bin]``; the few bins that hold a
boundary are marked, and their angles follow the exact rule of
:meth:`StateScheme.assign <dihedra.selection.schemes.StateScheme.assign>` (last boundary at or below the
angle, the arc's closed or open start), so the codes are exactly those of the scheme.

Memory
------
The histograms of every block a worker touches are allocated densely once (int32 counts, float64
when weighted): n_blocks x n_torsions x n_bins, fixed by the torsions, never by the frames. The
conformer counts of every state block are dense too (int32 per block, group and joint state)
unless a class of groups has too many joint states (then sorted rows of the current block). A
serial run hands its histogram array to the results without a copy.

Every 256 frames and per chunk
------------------------------
The fine bins, codes (and angles) of the last 256 frames are buffered one row per frame; when
the buffer is full, the bins go into the histograms, the joint states of each conformer group
into the conformer counts (compiled loop), and the codes (and angles) are transposed into the
chunk buffer, one row per torsion, as the time series store them. All of it runs where the
frames are processed (with ``threads=2``, in the second thread, while the first reads on). A full
chunk goes to the pass's time series writer (``series``; a row group of ``chunk_frames``
frames in states.parquet and angles.parquet), so Parquet is
encoded during the pass, by the process (and thread) that computed the frames: each worker of a
parallel run writes the files of its own frames, named by replica and first frame, and the
folder reads as one table in frame order. Memory stays bounded by the chunk buffer, the 256-frame
buffers and the block sums, whatever the number of frames.

Parallel runs
-------------
Partial results of workers merge by exact sums (``ResultsGroup``), so the multiprocessing, dask
and distributed (:mod:`dihedra.trajectory.distributed`) backends give the same integers as a serial run.
"""

from __future__ import annotations

import contextlib
import os

import numpy as np
from MDAnalysis.analysis.base import AnalysisBase
from MDAnalysis.analysis.results import ResultsGroup

from ..numerics.angles import TorsionGeometry
from ..errors import OutputWriteError
from ..selection.schemes import UNDEFINED
from .trajread import xtc_frames

#: Groups with more torsions than this get no conformer statistics (their joint states explode).
MAX_CONFORMER_TORSIONS = 12

#: Default size of a chunk (and of a Parquet row group) of the time series, in bytes of values.
CHUNK_BYTES = 64 << 20


#: Marks a fine bin that a state boundary cuts (its angles are assigned one by one).
_MIXED = np.int8(-128)

#: Temporary arrays of the chunk reductions stay below this many bytes.
_WORK_BYTES = 8 << 20

#: With a second thread, coordinates are copied into batches of about this many bytes.
BATCH_BYTES = 16 << 20

#: Frames whose fine bins are buffered before they are added to the histograms.
HIST_BUFFER_FRAMES = 256

#: Conformer classes with at most this many (block, group, joint state) cells are counted densely.
DENSE_CONFORMER_CELLS = 1 << 25


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
        ``ceil((angle + 180) / w)`` indexes it directly. Entry 0 is ``UNDEFINED`` (-1), the code
        of the bin index 0 that the pass gives to undefined angles.

    Examples
    --------
    >>> from dihedra.selection.schemes import get_scheme
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
    table = np.full(n_bins + 1, UNDEFINED, dtype=np.int8)
    table[1:] = np.where(pure, codes[:, -1], _MIXED)
    return table


class TorsionPass(AnalysisBase):
    """Stream a trajectory once and accumulate torsion states, histograms and block sums.

    Parameters
    ----------
    universe : MDAnalysis.Universe
    torsion_set : dihedra.selection.torsions.TorsionSet
    scheme : dihedra.selection.schemes.StateScheme
    n_state_blocks : int
        Blocks for population errors (merged pairwise by blocking analysis).
    n_hist_blocks : int
        Blocks of the angle histograms (for block-bootstrap errors of profiles).
    bin_width_deg : float
        Width of the fine histogram bins; 360 must be a multiple of it.
    weights : ndarray, optional
        One weight per analysed frame (in order), for reweighting biased runs.
    parts_dir : str, optional
        Scratch folder where a worker of a parallel run leaves its histogram blocks and
        conformer rows for the parent (without it they go back pickled).
    series : callable, optional
        ``series(labels, weighted, chunk_frames, kinds)`` makes the writer of the time series
        (an object with ``add(replica, index, values)`` and ``close()``), for example
        :class:`dihedra.io.series.ParquetSeriesFactory`; it must pickle for a parallel run, whose
        workers each make their own. ``None`` keeps no time series.
    keep_angles : bool
        Also write the angles (float32 degrees).
    chunk_frames : int, optional
        Frames per chunk and per Parquet row group (default: about 64 MB of values per chunk,
        32 MB with ``threads=2``, whose two chunk buffers then hold what one does).
    replica : int
        Replica number written with every frame.
    dt_ps : float, optional
        Replaces the trajectory's time step: time = frame * dt_ps.
    compiled : bool, optional
        Use the numba kernels (default: when numba is installed); ``False`` forces the NumPy
        path, which gives identical results.
    threads : int
        1: everything in the calling thread. 2: a second thread computes while the calling
        thread reads the next frames (the coordinates are copied into batches of frames; see
        *Overlap* above). Results are identical.
    defer_close : bool
        Leave the last row group and the footers of the time series files to a background
        thread when the pass ends (a serial run only): the caller computes the populations
        meanwhile and must call :meth:`finish_series` before the files are read.

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
                 bin_width_deg=1.0, weights=None, parts_dir=None, series=None, keep_angles=False,
                 chunk_frames=None, replica=0, dt_ps=None, compiled=None, threads=1,
                 defer_close=False, verbose=False):
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
        self.compiled = compiled
        self.threads = int(threads)
        self.series = series
        self.defer_close = bool(defer_close)
        self._writer = self._write_pool = self._pending_write = self._spare = None
        self._source = None
        self._last_chunk = False

    # -- parallel merge -------------------------------------------------------------------
    def _get_aggregator(self):
        s = ResultsGroup.ndarray_sum
        return ResultsGroup(lookup={
            "state_counts": s, "block_frames": s, "block_weights": s,
            "hist_block_frames": s, "hist_block_weights": s, "undefined": s,
            "hist_parts": ResultsGroup.flatten_sequence,
            "conformer_parts": ResultsGroup.flatten_sequence,
            "conformer_dense": ResultsGroup.flatten_sequence,
            "conformer_counts": ResultsGroup.ndarray_vstack,
            "conformer_weights": ResultsGroup.ndarray_hstack,
        })

    def _compute(self, indexed_frames, verbose=None, *, progressbar_kwargs=None):
        # the whole run's frame count is known here (before the slice of this worker replaces it)
        self._n_total = self.n_frames
        self._global_index = np.asarray(indexed_frames[:, 0], dtype=np.int64)
        # XTC through dihedra's decoder where it gives what MDAnalysis would (see trajread)
        self._source = None if self.compiled is False else xtc_frames(self._trajectory)
        try:
            try:
                if self._source is None:
                    super()._compute(indexed_frames, verbose=verbose, progressbar_kwargs=progressbar_kwargs)
                else:
                    self._compute_decoded(indexed_frames, verbose, progressbar_kwargs or {})
                if self._overlap is not None:
                    self._overlap.finish(self._staged)
            finally:
                if getattr(self, "_overlap", None) is not None:
                    self._overlap.stop()
                    self._overlap = None
                if self._source is not None:   # (a file handle: never pickled with the results)
                    self._source.close()
                    self._source = None
            # the last row group and the files' footers: now, or in the background
            self._last_chunk = self.defer_close
            self._flush()
            if self.defer_close:
                self._close_in_background()
            else:
                self._close_writer()
        except BaseException:
            try:   # the files are incomplete; whoever asked for them removes them
                self._close_writer()
            except Exception:  # noqa: BLE001 - the original error matters
                pass
            raise
        self._finish_worker()
        return self

    def _compute_decoded(self, indexed_frames, verbose, progressbar_kwargs):
        """``AnalysisBase._compute`` with the frames decoded in batches by ``self._source``
        (:class:`dihedra.trajectory.trajread.XTCFrames`) instead of one timestep at a time: the same
        frames, positions, boxes and times, handed to :meth:`_process` batch by batch (or, with
        the second thread, to it while the next batch is decoded)."""
        from MDAnalysis.lib.log import ProgressBar

        verbose = getattr(self, "_verbose", False) if verbose is None else verbose
        frames = np.asarray(indexed_frames[:, 1], dtype=np.int64)
        self._prepare_sliced_trajectory(slicer=frames)
        self._prepare()
        n = len(frames)
        if n == 0:
            return
        own = None if self._overlap is not None else self._batch
        size = len((own or self._staged).frame)
        with ProgressBar(total=n, verbose=verbose, **progressbar_kwargs) as bar:
            for lo in range(0, n, size):
                hi = min(n, lo + size)
                batch = own or self._staged
                self._source.read(frames[lo:hi], batch.positions, batch.dimensions, batch.frame, batch.time)
                batch.index[:hi - lo] = np.arange(lo, hi)
                batch.n = hi - lo
                self.frames[lo:hi] = batch.frame[:hi - lo]
                self.times[lo:hi] = batch.time[:hi - lo]
                if own is None:
                    self._staged = self._overlap.submit(batch)
                else:
                    self._process(batch)
                bar.update(hi - lo)
        self._batch = None

    # -- AnalysisBase template -----------------------------------------------------------------
    def _prepare(self):
        n_t = len(self.torsion_set)
        n_s = self.scheme.n_states
        n_bins = int(round(360.0 / self.bin_width_deg))
        if abs(n_bins * self.bin_width_deg - 360.0) > 1e-9:
            raise ValueError(f"bin_width_deg must divide 360; got {self.bin_width_deg}")
        self._n_bins = n_bins
        self._last_chunk = False
        if not hasattr(self, "_n_total"):  # _prepare called outside run()
            self._n_total = self.n_frames
            self._global_index = np.arange(self.n_frames)
        total = max(1, self._n_total)
        gi = self._global_index
        first, last = (int(gi[0]), int(gi[-1])) if len(gi) else (0, 0)
        # blocks this worker touches: its frames are one contiguous slice of the run
        if not len(gi):   # a worker without frames (more workers than frames): no blocks
            self._hb_lo, hb_hi, self._sb_lo, sb_hi = 0, -1, 0, -1
        elif first == 0 and last == total - 1:   # the whole run (serial): every block
            self._hb_lo, hb_hi, self._sb_lo, sb_hi = 0, self.n_hist_blocks - 1, 0, self.n_state_blocks - 1
        else:
            self._hb_lo, hb_hi = first * self.n_hist_blocks // total, last * self.n_hist_blocks // total
            self._sb_lo, sb_hi = first * self.n_state_blocks // total, last * self.n_state_blocks // total
        # per analysed frame of this worker: histogram block (local), state block, weight
        self._frame_hblock = (gi * self.n_hist_blocks // total - self._hb_lo).astype(np.intp)
        self._frame_sblock = (gi * self.n_state_blocks // total).astype(np.intp)
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
        self._state_counts, self._undefined = res.state_counts, res.undefined
        # dense histograms of every block of this worker, allocated once: the footprint is fixed
        # by torsions x blocks x bins, never by the number of frames
        self._hist = _touched_zeros((hb_hi - self._hb_lo + 1, n_t, n_bins), self._hist_dtype)
        res.hist_parts = [(self._hb_lo, self._hist)]
        res.conformer_counts = np.empty((0, 4), dtype=np.int64)
        res.conformer_weights = np.empty(0, dtype=np.float64)
        res.conformer_parts = []
        res.conformer_dense = []
        # per-frame work: geometry, bin -> state table, the scheme's exact rule for mixed bins
        self._geometry = TorsionGeometry(self.torsion_set.indices, compiled=self.compiled)
        self._kernels = self._geometry._kernels
        self._bin_table = bin_state_table(self.scheme, n_bins)
        self._has_mixed = bool((self._bin_table[1:] == _MIXED).any())
        self._boundaries = np.asarray(self.scheme.boundaries_deg, dtype=np.float64)
        self._start_closed = np.asarray(self.scheme.start_closed, dtype=np.bool_)
        self._arc_states = np.asarray(self.scheme.arc_states, dtype=np.int8)
        self._bonds = np.empty((9, n_t), dtype=np.float64)
        # k = ceil((a + shift_in) / width) + shift_out (see bin_and_code)
        self._shift_in, self._shift_out = (0.0, n_bins // 2) if n_bins % 2 == 0 else (180.0, 0)
        self._bin_args = (float(self.bin_width_deg), self._shift_in, self._shift_out, n_bins,
                          self._bin_table, self._boundaries, self._start_closed, self._arc_states,
                          _MIXED)
        self._frame_weight = (np.ones(len(gi), dtype=np.int64) if not weighted
                              else self.weights[gi].astype(np.float64))
        # fine bins of the last few frames, added to the block sums torsion by torsion
        if n_bins >= 2**16:
            raise ValueError(f"at most 65535 fine bins; got {n_bins} (bin_width_deg {self.bin_width_deg})")
        nf = int(max(1, min(HIST_BUFFER_FRAMES, self.n_frames)))
        self._bins = np.empty((nf, n_t), dtype=np.uint16)
        self._bins_hblock = np.empty(nf, dtype=np.intp)
        self._bins_weight = np.empty(nf, dtype=self._hist_dtype)
        self._n_bins_buf = 0
        # conformer groups of equal size are counted together; dense counts for every block of
        # this worker where they fit, else sorted rows of the current block
        _, members, _ = conformer_layout(self.torsion_set, n_s)
        self._conf_classes = _conformer_classes(members, n_s)
        n_sb = sb_hi - self._sb_lo + 1
        self._conf_dense = {}
        for key, (gids, mem, powers, size) in self._conf_classes.items():
            # dense or not by the whole run (every worker and a serial run decide alike)
            if self.n_state_blocks * len(gids) * size <= DENSE_CONFORMER_CELLS:
                counts = _touched_zeros((n_sb, len(gids), size), np.int32)
                wts = _touched_zeros(counts.shape, np.float64) if weighted else np.zeros((0, 0, 0))
                self._conf_dense[key] = (counts, wts)
        self._conf_cur_block = -1
        self._conf_cur = {}
        self._conf_rows, self._conf_wts = [], []
        # chunk buffers, at most as many rows as this worker has frames
        if self.chunk_frames is None:
            self.chunk_frames = default_chunk_frames(n_t, self.keep_angles, self.threads)
        cf = int(max(1, min(int(self.chunk_frames), self.n_frames)))
        # codes (and angles) of the buffered frames, one row per frame, beside the fine bins;
        # when the buffer is full they are counted and transposed into the chunk: one row per
        # torsion, as the time series files store them
        self._stage_codes = np.empty((nf, n_t), dtype=np.int8)
        self._stage_angles = np.empty((nf, n_t), dtype=np.float32) if self.keep_angles else None
        self._chunk_codes = np.empty((n_t, cf), dtype=np.int8)
        self._chunk_angles = np.empty((n_t, cf), dtype=np.float32) if self.keep_angles else None
        self._buf_frame = np.empty(cf, dtype=np.int64)
        self._buf_time = np.empty(cf, dtype=np.float64)
        self._buf_index = np.empty(cf, dtype=np.int64)
        self._n_buf = 0
        # frames are processed in batches: one frame at a time on views of the timestep, or,
        # with a second thread, batches of copied coordinates of about BATCH_BYTES
        n_atoms = self._universe.atoms.n_atoms
        self._one_frame = _Batch(1, 0)   # its positions are replaced by a view of each frame
        self._overlap = self._staged = self._batch = None
        size = int(max(1, min(BATCH_BYTES // max(1, 12 * n_atoms), self.n_frames)))
        if self.threads > 1:
            self._overlap = _Overlap(self._process, [_Batch(size, n_atoms) for _ in range(3)])
            self._staged = self._overlap.take()
        elif getattr(self, "_source", None) is not None:   # decoded frames, in one thread
            self._batch = _Batch(size, n_atoms)
        else:
            size = 1
        self._angle_rows = None if self.keep_angles else np.empty((size, n_t), dtype=np.float32)
        self._boxes = self._box_keys = None

    def _single_frame(self):
        ts = self._ts
        if self._overlap is None:   # this frame now, on views of the timestep (no copy)
            one = self._one_frame
            one.positions = ts.positions[None]
            one.dimensions[0] = ts.dimensions if ts.dimensions is not None else np.nan
            one.frame[0], one.time[0], one.index[0] = ts.frame, ts.time, self._frame_index
            one.n = 1
            self._process(one)
            return
        batch = self._staged
        k = batch.n
        np.copyto(batch.positions[k], ts.positions)
        batch.dimensions[k] = ts.dimensions if ts.dimensions is not None else np.nan
        batch.frame[k], batch.time[k], batch.index[k] = ts.frame, ts.time, self._frame_index
        batch.n = k + 1
        if batch.n == len(batch.frame):
            self._staged = self._overlap.submit(batch)

    def _process(self, batch):
        """Frames of a batch, in order, split where the histogram buffer or the chunk fills."""
        done = 0
        n_stage, n_chunk = len(self._bins), len(self._buf_frame)
        while done < batch.n:
            m = min(batch.n - done, n_stage - self._n_bins_buf, n_chunk - self._n_buf)
            self._process_frames(batch, done, m)
            done += m
            if self._n_bins_buf == n_stage:
                self._drain()
            if self._n_buf == n_chunk:
                self._flush()

    def _process_frames(self, batch, lo, m):
        row, nb = self._n_buf, self._n_bins_buf
        i = batch.index[lo:lo + m]
        bins, codes = self._bins[nb:nb + m], self._stage_codes[nb:nb + m]
        deg = self._angle_rows[:m] if self._stage_angles is None else self._stage_angles[nb:nb + m]
        weight, sblock = self._frame_weight[i], self._frame_sblock[i]
        if self._kernels is not None:
            boxes = self._box_rows(batch.dimensions[lo:lo + m])
            self._kernels.frames(batch.positions[lo:lo + m], self._geometry._idx3, self._bonds, *boxes,
                                 deg, *self._bin_args, bins, codes, self._state_counts, sblock, weight,
                                 self._undefined)
        else:
            for f in range(m):
                self._geometry(batch.positions[lo + f], batch.dimensions[lo + f], out=deg[f])
                self._bin_and_code(deg[f], bins[f], codes[f], self._state_counts[sblock[f]], weight[f])
        self._bins_hblock[nb:nb + m] = self._frame_hblock[i]
        self._bins_weight[nb:nb + m] = weight
        self._buf_frame[row:row + m] = batch.frame[lo:lo + m]
        self._buf_time[row:row + m] = (batch.time[lo:lo + m] if self.dt_ps is None
                                       else batch.frame[lo:lo + m] * float(self.dt_ps))
        self._buf_index[row:row + m] = self._global_index[i]
        self._n_buf, self._n_bins_buf = row + m, nb + m

    def _box_rows(self, dimensions):
        """Minimum-image parameters of the frames of a batch (lengths, inverse, cells, reach2,
        triclinic), recomputed only for rows whose box changed."""
        m = len(dimensions)
        if self._boxes is None or len(self._boxes[0]) < m:
            self._boxes = (np.zeros((m, 3)), np.zeros((m, 3)), np.zeros((m, 3, 3)), np.zeros(m),
                           np.zeros(m, dtype=bool))
            self._box_keys = [None] * m
        lengths, inverse, cells, reach2, triclinic = self._boxes
        for f in range(m):
            key = dimensions[f].tobytes()
            if key != self._box_keys[f]:
                lengths[f], inverse[f], h, reach2[f] = self._geometry._box_parameters(dimensions[f])
                triclinic[f] = h is not None
                cells[f] = h if h is not None else 0.0
                self._box_keys[f] = key
        return tuple(a[:m] for a in self._boxes)

    def _drain(self):
        """The buffered frames: fine bins into the histograms, joint states into the conformer
        counts, codes (and angles) transposed into the chunk."""
        m = self._n_bins_buf
        if m == 0:
            return
        self._add_histograms()
        r1 = self._n_buf
        r0 = r1 - m
        gi = self._buf_index[r0:r1]
        if self._conf_classes:
            w = np.ones(m) if self.weights is None else self.weights[gi]
            self._count_conformers(self._stage_codes[:m], gi * self.n_state_blocks // max(1, self._n_total), w)
        _transpose(self._stage_codes[:m], self._chunk_codes[:, r0:r1], self._kernels)
        if self._stage_angles is not None:
            _transpose(self._stage_angles[:m], self._chunk_angles[:, r0:r1], self._kernels)
        self._n_bins_buf = 0

    def _add_histograms(self):
        """Add the fine bins of the buffered frames to the histograms."""
        m = self._n_bins_buf
        if m == 0:
            return
        bins, hblock, weight = self._bins[:m], self._bins_hblock[:m], self._bins_weight[:m]
        if self._kernels is not None:
            self._kernels.add_histograms(bins, hblock, weight, self._hist)
        else:   # NumPy twin: np.add.at adds in frame order, like the kernel
            n_t = bins.shape[1]
            ok = bins > 0
            cell = (hblock[:, None] * n_t + np.arange(n_t)[None, :]) * self._n_bins + bins.astype(np.intp) - 1
            np.add.at(self._hist.reshape(-1), cell[ok], np.broadcast_to(weight[:, None], ok.shape)[ok])
        self._n_bins_buf = 0

    def _bin_and_code(self, deg, bins, codes, counts, w):
        """NumPy twin of :func:`dihedra.numerics._kernels.bin_and_code` (same bins, codes and counts)."""
        a = deg.astype(np.float64)
        ok = ~np.isnan(a)
        k = np.ceil((np.where(ok, a, 0.0) + self._shift_in) / self.bin_width_deg) + self._shift_out
        np.clip(k, 1, self._n_bins, out=k)
        bins[:] = np.where(ok, k, 0)
        codes[:] = self._bin_table[bins]
        mixed = np.flatnonzero(codes == _MIXED)
        if len(mixed):
            b, nb = self._boundaries, len(self._boundaries)
            x = a[mixed]
            j = np.searchsorted(b, x, side="right") - 1
            j[j < 0] = nb - 1
            j = np.where((x == b[j]) & ~self._start_closed[j], (j - 1) % nb, j)
            codes[mixed] = self._arc_states[j]
        t = np.flatnonzero(ok)
        np.add.at(counts, (t, codes[t]), counts.dtype.type(w))
        self._undefined += ~ok

    def _conclude(self):
        res = self.results
        # conformer rows that workers wrote to files: read, joined and summed where two workers
        # counted the same block
        rows, wts = [res.conformer_counts], [res.conformer_weights]
        for rows_path, wts_path in res.pop("conformer_parts", None) or []:
            rows.append(np.load(rows_path))
            wts.append(np.load(wts_path))
            os.remove(rows_path)
            os.remove(wts_path)
        # (rows of a serial run are sorted and unique already: nothing to do)
        if len(rows) > 1:
            rows, wts = [np.vstack(rows)], [np.concatenate(wts)]
        res.conformer_counts, res.conformer_weights = reduce_conformer_rows(rows[0], wts[0])
        res.conformer_dense = self._sum_dense_conformers(res.pop("conformer_dense", None) or [])
        # dense histograms of every worker (a serial run hands over its array without a copy)
        parts = res.pop("hist_parts", None)
        if parts is None:
            return
        n_t = len(self.torsion_set)
        shape = (self.n_hist_blocks, n_t, int(round(360.0 / self.bin_width_deg)))
        if (len(parts) == 1 and parts[0][0] == 0 and isinstance(parts[0][1], np.ndarray)
                and parts[0][1].shape == shape):
            res.histograms = parts[0][1]
            return
        hist = np.zeros(shape, dtype=np.float64 if self.weights is not None else np.int32)
        while parts:
            part = parts.pop()
            if len(part) == 2 and isinstance(part[1], str):   # (block, file of a worker)
                block, path = part
                hist[block] += np.load(path, mmap_mode="r")
                os.remove(path)
            elif len(part) == 2:   # (first block, dense blocks)
                lo, dense = part
                hist[lo:lo + len(dense)] += dense
            else:                # (block, cells, values)
                block, cells, values = part
                hist[block].reshape(-1)[cells] += values
            del part
        res.histograms = hist

    def _sum_dense_conformers(self, parts):
        """{width: (counts (n_state_blocks, n_groups, n_joint) int32, weights or None)} from the
        dense parts of the workers (one part covering every block, a serial run: no copy)."""
        out = {}
        weighted = self.weights is not None
        for width, lo, counts, wts in parts:
            if isinstance(counts, str):
                path, counts = counts, np.load(counts)
                os.remove(path)
            if isinstance(wts, str):
                path, wts = wts, np.load(wts)
                os.remove(path)
            if width not in out:
                if lo == 0 and len(counts) == self.n_state_blocks:
                    out[width] = (counts, wts)
                    continue
                full = np.zeros((self.n_state_blocks,) + counts.shape[1:], dtype=counts.dtype)
                out[width] = (full, np.zeros(full.shape) if weighted else None)
            total, total_w = out[width]
            total[lo:lo + len(counts)] += counts
            if weighted:
                total_w[lo:lo + len(counts)] += wts
        return out

    # -- chunk work --------------------------------------------------------------------------------
    def _flush(self):
        n = getattr(self, "_n_buf", 0)
        if n == 0:
            return
        self._drain()
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
        if self.series is not None:
            self._write_chunk(n)
        self._n_buf = 0

    def _count_conformers(self, codes, sblock, weights):
        weighted = self.weights is not None
        local = sblock - self._sb_lo
        sparse = [key for key in self._conf_classes if key not in self._conf_dense]
        for key, (counts, wts) in self._conf_dense.items():
            gids, members, powers, size = self._conf_classes[key]
            if self._kernels is not None:
                self._kernels.count_conformers(codes, local, members, powers, counts, weights,
                                               wts, weighted)
                continue
            for lo, hi, cell, ok in _joint_cells(codes, members, powers, size):
                # flat cell of (block, group, joint), frames of the chunk in rows
                flat = (local[lo:hi, None] * (len(gids) * size) + cell)[ok]
                np.add.at(counts.reshape(-1), flat, 1)
                if weighted:
                    np.add.at(wts.reshape(-1), flat,
                              np.broadcast_to(weights[lo:hi, None], ok.shape)[ok])
        if not sparse:
            return
        # classes too large for dense counts: rows per block, split where the block changes
        cuts = np.flatnonzero(np.diff(sblock)) + 1
        for lo, hi in zip(np.r_[0, cuts], np.r_[cuts, len(codes)]):
            b = int(sblock[lo])
            if b != self._conf_cur_block:
                self._retire_conformer_block()
                self._conf_cur_block = b
            for key in sparse:
                gids, members, powers, size = self._conf_classes[key]
                for f0, f1, cell, ok in _joint_cells(codes[lo:hi], members, powers, size):
                    wsub = np.broadcast_to(weights[lo + f0:lo + f1, None], ok.shape)[ok]
                    self._conf_add(key, cell[ok], wsub)

    def _conf_add(self, key, cell, weights):
        cur = self._conf_cur.get(key)
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
        for key, (cells, cnt, wts) in self._conf_cur.items():
            gids, _, _, size = self._conf_classes[key]
            rows = np.column_stack([np.full(len(cells), self._conf_cur_block, dtype=np.int64),
                                    gids[cells // size], cells % size, cnt])
            self._conf_rows.append(rows)
            self._conf_wts.append(wts)
        self._conf_cur = {}
        self._conf_cur_block = -1

    def _finish_worker(self):
        self._retire_conformer_block()
        weighted = self.weights is not None
        # a slice of a parallel run hands its large sums back to the parent through files in
        # parts_dir when there is one (written to the page cache, no pickling)
        parallel = self._hb_lo > 0 or len(self._hist) < self.n_hist_blocks
        stem = None
        if parallel and self.parts_dir is not None and len(self._global_index):
            stem = os.path.join(self.parts_dir, f"replica{self.replica:04d}-from{int(self._global_index[0]):012d}")
        # dense conformer counts stay dense: (width, first state block, counts, weights or None),
        # as arrays, or as files of a worker
        dense = []
        for key, (counts, wts) in self._conf_dense.items():
            wts = wts if weighted else None
            if stem is not None:
                counts_path = f"{stem}.conformers{key:03d}.npy"
                np.save(counts_path, counts)
                counts = counts_path
                if wts is not None:
                    np.save(f"{stem}.conformer_weights{key:03d}.npy", wts)
                    wts = f"{stem}.conformer_weights{key:03d}.npy"
            dense.append((key, self._sb_lo, counts, wts))
        self.results.conformer_dense = dense
        self._conf_dense = {}
        if self._conf_rows:
            # (one class of groups, the usual case: its rows as they are, no copy of 10^7 rows)
            rows = self._conf_rows[0] if len(self._conf_rows) == 1 else np.vstack(self._conf_rows)
            wts = self._conf_wts[0] if len(self._conf_wts) == 1 else np.concatenate(self._conf_wts)
            self._conf_rows, self._conf_wts = [], []
            rows, wts = reduce_conformer_rows(rows, wts)
            if stem is not None:
                paths = (stem + ".conformer_rows.npy", stem + ".conformer_weights.npy")
                np.save(paths[0], rows)
                np.save(paths[1], wts)
                self.results.conformer_parts = [paths]
            else:
                self.results.conformer_counts, self.results.conformer_weights = rows, wts
        self._conf_rows, self._conf_wts = [], []
        if parallel:
            # histogram blocks: files, or the non-empty cells where that is less than half the
            # bytes of the dense block
            if stem is not None:
                # (counts as uint8 / uint16 where the frames of this worker in the block fit:
                # a quarter or half of the bytes to write and to read; the parent adds them
                # into its int32 sums)
                per_block = np.bincount(self._frame_hblock, minlength=len(self._hist))
                parts = []
                for b in range(len(self._hist)):
                    path = f"{stem}.hist{self._hb_lo + b:04d}.npy"
                    np.save(path, _narrow_counts(self._hist[b], per_block[b]))
                    parts.append((self._hb_lo + b, path))
                self.results.hist_parts = parts
            else:
                self.results.hist_parts = [part for b in range(len(self._hist))
                                           for part in _hist_part(self._hb_lo + b, self._hist[b])]
        self._hist = None
        self._stage_codes = self._stage_angles = self._chunk_codes = self._chunk_angles = None
        self._bins = self._angle_rows = self._bonds = None
        self._one_frame = self._staged = None
        self._geometry = self._kernels = None   # modules do not pickle (results go back to the parent)

    # -- the time series ----------------------------------------------------------------------------
    def _write_chunk(self, n):
        """Hand the chunk to the time series writer: here, or, while a second thread computes the
        frames (``threads=2``), in a third thread, so that encoding a row group (a few tenths of
        a second for 10^4 torsions) does not hold up the frames; the next chunk then fills a
        second buffer (allocated at the first such hand-over: runs of one chunk never need it)."""
        self._wait_write()   # the previous chunk is written: its buffer is free, order is kept
        index = {"frame": self._buf_frame[:n].copy(), "time_ps": self._buf_time[:n].copy()}
        if self.weights is not None:
            index["weight"] = self.weights[self._buf_index[:n]]
        # views of the chunk: the writer writes a full chunk at once (its row groups are
        # chunk_frames long); only the last, partial chunk of the pass can wait in it until
        # close(), and nothing writes into that buffer after it
        values = {kind: buf[:, :n] for kind, buf in (("states", self._chunk_codes),
                                                      ("angles", self._chunk_angles)) if buf is not None}
        with _writing():
            if self._writer is None:
                self._writer = self.series(list(self.torsion_set.labels), self.weights is not None,
                                           self.chunk_frames, tuple(values))
            if self._overlap is None and not self._last_chunk:   # one thread, or the last chunk
                self._writer.add(self.replica, index, values)
                return
        self._pending_write = self._pool().submit(self._writer.add, self.replica, index, values)
        if self._last_chunk:   # (deferred: nothing writes into this buffer any more)
            return
        if self._spare is None:
            self._spare = (np.empty_like(self._chunk_codes),
                           None if self._chunk_angles is None else np.empty_like(self._chunk_angles))
        (self._chunk_codes, self._chunk_angles), self._spare = self._spare, (self._chunk_codes, self._chunk_angles)

    def _wait_write(self):
        pending, self._pending_write = self._pending_write, None
        if pending is not None:
            with _writing():
                pending.result()

    def _close_in_background(self):
        """Queue the closing of the files after the last row group (see ``defer_close``)."""
        if self._writer is None:
            return
        writer, self._writer = self._writer, None
        self._pending_write = _Both(self._pending_write, self._pool().submit(writer.close))

    def _pool(self):
        """The thread that writes row groups in the background (one: the chunks stay in order)."""
        if self._write_pool is None:
            from concurrent.futures import ThreadPoolExecutor
            self._write_pool = ThreadPoolExecutor(1, thread_name_prefix="dihedra-series")
        return self._write_pool

    def finish_series(self):
        """Wait until the time series files are complete (after a pass with ``defer_close``);
        raises :class:`~dihedra.errors.OutputWriteError` if writing them failed."""
        self._close_writer()

    def _close_writer(self):
        try:
            self._wait_write()
        finally:
            pool, self._write_pool, self._spare = self._write_pool, None, None
            if pool is not None:
                pool.shutdown()
        writer, self._writer = self._writer, None
        if writer is not None:
            with _writing():
                writer.close()


@contextlib.contextmanager
def _writing():
    """An ``OSError`` of the time series writer raised as :class:`~dihedra.errors.OutputWriteError`."""
    try:
        yield
    except OSError as exc:
        where = f" into {exc.filename}" if getattr(exc, "filename", None) else ""
        raise OutputWriteError(exc.errno, f"writing the time series{where} failed: {exc.strerror or exc}") from exc


class _Both:
    """Two futures waited for as one (the first one's error first)."""

    def __init__(self, first, second):
        self._futures = [f for f in (first, second) if f is not None]

    def result(self):
        try:
            for f in self._futures:
                f.result()
        finally:
            for f in self._futures:   # the second one too, whatever happened to the first
                f.exception()


class _Batch:
    """Coordinates, boxes, frame numbers, times and frame positions of a few frames."""

    def __init__(self, size, n_atoms):
        self.positions = np.empty((size, n_atoms, 3), dtype=np.float32)
        self.dimensions = np.empty((max(size, 1), 6), dtype=np.float32)
        self.frame = np.empty(max(size, 1), dtype=np.int64)
        self.time = np.empty(max(size, 1), dtype=np.float64)
        self.index = np.empty(max(size, 1), dtype=np.intp)
        self.n = 0


class _Overlap:
    """A second thread that processes batches of frames while the calling thread reads.

    Batches go through a queue in order; finished batches come back for reuse, so at most
    ``len(batches)`` are in memory. An error in the thread is raised in the calling thread at
    the next :meth:`submit` or at :meth:`finish`.
    """

    def __init__(self, process, batches):
        import queue
        import threading

        self._process = process
        self._todo = queue.Queue()
        self._free = queue.Queue()
        for b in batches:
            self._free.put(b)
        self._error = None
        self._thread = threading.Thread(target=self._run, name="dihedra-pass", daemon=True)
        self._thread.start()

    def _run(self):
        while True:
            batch = self._todo.get()
            if batch is None:
                return
            try:
                if self._error is None:
                    self._process(batch)
            except BaseException as exc:  # noqa: BLE001 - handed to the calling thread
                self._error = exc
            batch.n = 0
            self._free.put(batch)

    def _check(self):
        if self._error is not None:
            raise self._error

    def take(self):
        """An empty batch (waits until the thread has finished one)."""
        batch = self._free.get()
        self._check()
        return batch

    def submit(self, batch):
        """Queue a full batch and return an empty one."""
        self._check()
        self._todo.put(batch)
        return self.take()

    def finish(self, batch):
        """Queue the last (partial) batch and wait until every batch is processed."""
        if batch is not None and batch.n:
            self._todo.put(batch)
        self.stop()
        self._check()

    def stop(self):
        if self._thread.is_alive():
            self._todo.put(None)
            self._thread.join()


def default_chunk_frames(n_torsions, keep_angles, threads=1):
    """Frames per chunk (and Parquet row group): about ``CHUNK_BYTES`` of values, 64 to 100,000;
    half of that with a second thread, where a full chunk is written while the next fills a
    second buffer: the two hold what one chunk would, so the peak does not rise once a run
    outgrows its first chunk."""
    per_frame = max(1, int(n_torsions)) * (1 + 4 * bool(keep_angles))
    return int(max(64, min(100_000, CHUNK_BYTES // per_frame))) // (2 if threads > 1 else 1)


def _hist_part(block, dense):
    """One histogram block of a worker as ``[(block, cells, values)]`` (non-empty cells, int32
    indices) when that is smaller than half the dense block, else ``[(block, dense view)]``."""
    cells = np.flatnonzero(dense)
    if len(cells) * (4 + dense.itemsize) < dense.nbytes // 2 and dense.size < 2**31:
        return [(block, cells.astype(np.int32), dense.reshape(-1)[cells])]
    return [(block, dense[None])]


def _narrow_counts(block, most):
    """An int32 histogram block as uint8 or uint16 when no count can exceed ``most`` (the
    frames that went into it), else as it is (weighted sums, long blocks)."""
    if block.dtype != np.int32:
        return block
    for small in (np.uint8, np.uint16):
        if most <= np.iinfo(small).max:
            return block.astype(small)
    return block


def _transpose(src, dst, kernels=None):
    """``dst[:] = src.T`` (the compiled tile loop when ``kernels`` is given); returns ``dst``."""
    if kernels is not None:
        kernels.transpose_into(src, dst)
    else:
        dst[:] = src.T
    return dst


def _joint_cells(codes, members, powers, size):
    """Joint codes of conformer groups in slices of frames: yields ``(lo, hi, cell, ok)`` with
    ``cell = group * size + joint`` (frames lo..hi, groups) and ``ok`` where no member is
    undefined."""
    n = len(codes)
    n_g, width = members.shape
    step = max(1, _WORK_BYTES // (8 * n_g * width))
    offsets = np.arange(n_g, dtype=np.int64) * size
    for lo in range(0, n, step):
        sub = codes[lo:lo + step][:, members]                 # (f, n_g, width)
        ok = (sub >= 0).all(axis=2)
        cell = sub.astype(np.int64) @ powers + offsets[None, :]
        yield lo, min(n, lo + step), cell, ok


def _strictly_sorted(rows):
    """Whether (block, group, joint) rows increase strictly in lexicographic order."""
    if len(rows) < 2:
        return True
    a, b = rows[:-1, :3], rows[1:, :3]
    gt = b > a
    eq = b == a
    return bool(np.all(gt[:, 0] | (eq[:, 0] & (gt[:, 1] | (eq[:, 1] & gt[:, 2])))))


def _touched_zeros(shape, dtype):
    """``np.zeros`` with every page written now: the memory is resident from the start (a fixed
    footprint, and the page faults belong to the start-up rather than to the frames)."""
    out = np.empty(shape, dtype=dtype)
    out.fill(0)
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
    if _strictly_sorted(rows):   # already sorted and unique (a serial run): nothing to do
        return rows, weights
    order = np.lexsort((rows[:, 2], rows[:, 1], rows[:, 0]))
    rows, weights = rows[order], weights[order]
    new = np.ones(len(rows), dtype=bool)
    new[1:] = np.any(rows[1:, :3] != rows[:-1, :3], axis=1)
    starts = np.flatnonzero(new)
    counts = np.add.reduceat(rows[:, 3], starts)
    wsum = np.add.reduceat(weights, starts)
    return np.column_stack([rows[starts, :3], counts]), wsum
