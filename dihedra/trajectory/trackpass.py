"""The trajectory pass: one streaming sweep that turns frames into torsion states.

:class:`TorsionPass` is an MDAnalysis :class:`~MDAnalysis.analysis.base.AnalysisBase` subclass.
For each frame it computes all torsion angles at once (:class:`dihedra.numerics.angles.TorsionGeometry`,
minimum image, float32 angles), assigns state codes with the scheme, adds the angles to a fine histogram
and appends the codes to a chunk buffer. Results:

``results.state_counts`` : ndarray, shape (n_state_blocks, n_torsions, n_states)
    (weighted) frames per block, torsion and state, in the narrowest unsigned type that holds a
    block's frames (float64 when weighted; ``BlockSums`` gives analyses int64); blocks are equal
    slices of the analysed frames, by frame position: serial and parallel runs fill the same cells.
``results.histograms`` : ndarray or BlockParts, shape (n_hist_blocks, n_torsions, n_bins)
    (weighted) fine periodic angle histogram per block, bins of ``bin_width_deg`` on (-180, 180],
    each bin open at its left edge and closed at its right: counts in the narrowest unsigned type
    that holds them (float64 when weighted); with ``parts_dir``, finished blocks stay in files
    there (a :class:`~dihedra.trajectory.result.BlockParts`, read into one array on demand).
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
One compiled kernel call per batch of frames (:mod:`dihedra.numerics._kernels`, numba) computes,
for a range of torsions, the angles (:class:`dihedra.numerics.angles.TorsionGeometry`), the fine
bins, the state codes and the state counts of the current block; with a second thread the range
is cut in two, the reading thread taking the first part (:mod:`dihedra.trajectory.frame_work`), or,
where decoding the frames (XTC) is the larger share, the second thread decodes some too. The bin of a
float32 angle a is ``k - 1`` with ``k = ceil(a / width) + n_bins / 2``, exact for bins open at the
left edge. The state of an angle is looked up from its fine bin: a bin (lo, hi] that no state
boundary cuts has one state for all its angles, so ``code = table[bin]``; the few bins that hold a
boundary are marked, and their angles follow the exact rule of
:meth:`StateScheme.assign <dihedra.selection.schemes.StateScheme.assign>` (last boundary at or below the
angle, the arc's closed or open start), so the codes are exactly those of the scheme.

Memory
------
The histogram blocks are allocated as the frames reach them (uint8 counts widened when a cell
could pass 255, float64 when weighted) and, with ``parts_dir``, saved there and dropped once
finished (:class:`~dihedra.trajectory.histograms.HistogramBlocks`): one or two blocks in memory,
whatever the number of blocks and frames. The conformer counts of every state block are dense (uint8
widened alike) unless a class of groups has too many joint states (then sorted rows of the block).

Core membership
---------------
Beside each state code the pass records one bit: whether the angle lies in the core of its state
(the sector shrunk by :data:`~dihedra.trajectory.cores.CORE_MARGIN_DEG` on both sides), from the
fine bin and, in the bins that hold a core edge, the angle (:class:`~dihedra.trajectory.cores.CoreBits`);
``cores.parquet`` stores it (one bit per torsion and frame), so that core-set kinetics needs no angle
series.

Every 64 frames and per chunk
-----------------------------
The fine bins, codes (and angles) of the last 64 frames are buffered one row per frame; when
the buffer is full, the bins go into the histograms, the joint states of each conformer group
into the conformer counts (compiled loop), and the codes (angles, core bits packed along the
torsions) are copied into the chunk buffer, one row per frame as the time series store them, all
where the frames are processed (with ``threads=2``, in the second thread). A full chunk goes to
the pass's time series writer (``series``; a row group of ``chunk_frames`` frames), so each
worker of a parallel run writes the files of its own frames, named by replica and first frame,
and the folder reads as one table in frame order. Memory stays bounded by the chunk buffer, the
64-frame buffers and the block sums, whatever the number of frames.

Parallel runs
-------------
Partial results of workers merge by exact sums (``ResultsGroup``), so the multiprocessing, dask
and distributed (:mod:`dihedra.trajectory.distributed`) backends give the same integers as a serial run.
"""

from __future__ import annotations

import os
import time

import numpy as np
from MDAnalysis.analysis.base import AnalysisBase
from MDAnalysis.analysis.results import ResultsGroup

from ..numerics.angles import TorsionGeometry
from ..numerics.counts import narrowest
from . import interrupts
from .conformer_counts import ConformerCounter, merge_dense, merge_rows
from .cores import CoreBits
from .frame_work import FrameWork
from .histograms import MIXED, HistogramBlocks, bin_state_tables, merge_hist_parts, sparse_piece
from .overlap import Batch, Overlap
from .series_output import ChunkBuffers, SeriesOutput, default_chunk_frames
from .timeblocks import TimeBlockCounter
from .trajread import frame_source

#: With a second thread, coordinates are copied into batches of about this many bytes.
BATCH_BYTES = 2 << 20

#: Batches of frames in the two threads' hands (read, waiting, computed); more where the frames are
#: pages of a mapped file (no coordinates to hold): the reader runs on while the other adds to the sums.
BATCHES = 3
BATCHES_MAPPED = 12

#: Frames whose fine bins are buffered before they are added to the histograms.
HIST_BUFFER_FRAMES = 64


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
        Frames per chunk and per Parquet row group (default: about 4 MB of values per chunk,
        2 MB with ``threads=2``, whose two chunk buffers then hold what one does; at least 32
        frames, at most 100,000).
    replica : int
        Replica number written with every frame.
    dt_ps : float, optional
        Replaces the trajectory's time step: time = frame * dt_ps.
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
    >>> int(tp.results.state_counts.sum())  # 10 frames x 300 torsions
    3000
    """

    _analysis_algorithm_is_parallelizable = True

    @classmethod
    def get_supported_backends(cls):
        return ("serial", "multiprocessing", "dask")

    def __init__(self, universe, torsion_set, scheme, *, n_state_blocks=64, n_hist_blocks=16,
                 bin_width_deg=1.0, weights=None, parts_dir=None, series=None, keep_angles=False,
                 chunk_frames=None, replica=0, dt_ps=None, threads=1, defer_close=False, verbose=False):
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
        self.threads = int(threads)
        self.series = series
        self.defer_close = bool(defer_close)
        self._output = self._chunk = None
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
            "series_parts": ResultsGroup.flatten_sequence,
            "time_block_counts": s,
        })

    def _compute(self, indexed_frames, verbose=None, *, progressbar_kwargs=None):
        # the whole run's frame count is known here (before the slice of this worker replaces it)
        self._n_total = self.n_frames
        self._global_index = np.asarray(indexed_frames[:, 0], dtype=np.int64)
        # XTC and DCD read in batches by dihedra where that gives what MDAnalysis would (trajread)
        self._source = frame_source(self._trajectory)
        try:
            try:
                if self._source is None:
                    super()._compute(indexed_frames, verbose=verbose, progressbar_kwargs=progressbar_kwargs)
                else:
                    self._compute_decoded(indexed_frames, verbose, progressbar_kwargs or {})
                if self._overlap is not None:
                    if self._staged is not None and self._staged.n:
                        self._work.first_part(self._staged)
                    self._overlap.finish(self._staged)
            finally:
                if getattr(self, "_overlap", None) is not None:
                    self._overlap.stop(abandon=True)   # (after finish(): already stopped)
                    self._overlap = None
                if self._source is not None:   # (a file handle: never pickled with the results)
                    self._source.close()
                    self._source = None
            # the last row group and the files' footers: now, or in the background
            self._last_chunk = self.defer_close
            self._flush()
            if self.defer_close:
                if self._output is not None:
                    self._output.close_in_background()
            else:
                self._close_output()
        except BaseException:
            try:   # the files are incomplete; whoever asked for them removes them
                self._close_output()
            except Exception:  # noqa: BLE001 - the original error matters
                pass
            raise
        self._finish_worker()
        return self

    def _compute_decoded(self, indexed_frames, verbose, progressbar_kwargs):
        """``AnalysisBase._compute`` with the frames read in batches by ``self._source`` (:mod:`.trajread`):
        the same frames, positions, boxes and times, handed to :meth:`_process` batch by batch."""
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
        mapped = getattr(self._source, "read_mapped", None) if (own or self._staged).buffer.ndim == 2 else None
        with ProgressBar(total=n, verbose=verbose, **progressbar_kwargs) as bar:
            for lo in range(0, n, size):
                hi = min(n, lo + size)
                batch = own or self._staged
                # the frames' words in the file mapped into memory (DCD), else read into the batch
                view = mapped(frames[lo:hi], batch.dimensions, batch.frame, batch.time) if mapped else None
                batch.positions = batch.buffer if view is None else view
                if view is None:
                    self._work.read(self._source, frames[lo:hi], batch, share=own is None)
                batch.index[:hi - lo] = np.arange(lo, hi)
                batch.n = hi - lo
                self.frames[lo:hi] = batch.frame[:hi - lo]
                self.times[lo:hi] = batch.time[:hi - lo]
                if own is None:
                    self._submit(batch)
                else:
                    self._process(batch)
                bar.update(hi - lo)
        self._batch = None

    # -- AnalysisBase template -----------------------------------------------------------------
    def _prepare(self):
        n_bins = int(round(360.0 / self.bin_width_deg))
        if abs(n_bins * self.bin_width_deg - 360.0) > 1e-9:
            raise ValueError(f"bin_width_deg must divide 360; got {self.bin_width_deg}")
        if n_bins >= 2**16:
            raise ValueError(f"at most 65535 fine bins; got {n_bins} (bin_width_deg {self.bin_width_deg})")
        self._n_bins = n_bins
        self._last_chunk = False
        if not hasattr(self, "_n_total"):  # _prepare called outside run()
            self._n_total = self.n_frames
            self._global_index = np.arange(self.n_frames)
        hb_hi, sb_hi = self._prepare_blocks()
        self._prepare_sums(hb_hi, sb_hi)
        self._prepare_kernels()
        self._prepare_buffers()

    def _prepare_blocks(self):
        """The blocks this worker touches (its frames are one contiguous slice of the run) and the
        histogram block, state block and weight of each of its frames."""
        total = max(1, self._n_total)
        gi = self._global_index
        first, last = (int(gi[0]), int(gi[-1])) if len(gi) else (0, 0)
        if not len(gi):   # a worker without frames (more workers than frames): no blocks
            self._hb_lo, hb_hi, self._sb_lo, sb_hi = 0, -1, 0, -1
        elif first == 0 and last == total - 1:   # the whole run (serial): every block
            self._hb_lo, hb_hi, self._sb_lo, sb_hi = 0, self.n_hist_blocks - 1, 0, self.n_state_blocks - 1
        else:
            self._hb_lo, hb_hi = first * self.n_hist_blocks // total, last * self.n_hist_blocks // total
            self._sb_lo, sb_hi = first * self.n_state_blocks // total, last * self.n_state_blocks // total
        self._frame_hblock = (gi * self.n_hist_blocks // total - self._hb_lo).astype(np.intp)
        self._frame_sblock = (gi * self.n_state_blocks // total).astype(np.intp)
        self._frame_weight = (np.ones(len(gi), dtype=np.int64) if self.weights is None
                              else self.weights[gi].astype(np.float64))
        return hb_hi, sb_hi

    def _prepare_sums(self, hb_hi, sb_hi):
        """The block sums of the results (state counts, frames and weights per block), the dense
        histograms of every block of this worker (allocated once: the footprint is fixed by
        torsions x blocks x bins, never by the number of frames) and the conformer counter."""
        n_t, n_s = len(self.torsion_set), self.scheme.n_states
        weighted = self.weights is not None
        self._hist_dtype = np.float64 if weighted else np.int64   # (of the weights of frames)
        res = self.results
        # (int32 during the pass: 2^31 frames per block and cell at most; int64 once it is done)
        res.state_counts = np.zeros((self.n_state_blocks, n_t, n_s), dtype=np.float64 if weighted else np.int32)
        res.block_frames = np.zeros(self.n_state_blocks, dtype=np.int64)
        res.block_weights = np.zeros(self.n_state_blocks, dtype=np.float64)
        res.hist_block_frames = np.zeros(self.n_hist_blocks, dtype=np.int64)
        res.hist_block_weights = np.zeros(self.n_hist_blocks, dtype=np.float64)
        res.undefined = np.zeros(n_t, dtype=np.int64)
        self._state_counts, self._undefined = res.state_counts, res.undefined
        # allocated as the frames reach them, uint8 counts widened when needed; with a scratch
        # folder, finished blocks wait there (histograms.HistogramBlocks)
        spill = None
        if self.parts_dir is not None and len(self._global_index):
            spill = self._stem()
        self._hist = HistogramBlocks(self._hb_lo, n_t, self._n_bins, weighted, spill=spill)
        self._n_local_hist = hb_hi - self._hb_lo + 1
        res.conformer_counts = np.empty((0, 4), dtype=np.int64)
        res.conformer_weights = np.empty(0, dtype=np.float64)
        res.conformer_parts = []
        res.conformer_dense = []
        res.series_parts = []
        self._geometry = TorsionGeometry(self.torsion_set.indices)
        self._kernels = self._geometry.kernels
        self._conformers = ConformerCounter(self.torsion_set, n_s, self.n_state_blocks, self._sb_lo,
                                            sb_hi - self._sb_lo + 1, weighted, self._kernels)
        # the time blocks of the convergence checks, counted here rather than read back
        self._time_blocks = None
        if self.series is not None:
            self._time_blocks = TimeBlockCounter(self.torsion_set.types, n_s, self._n_total, weighted)
            res.time_block_counts = self._time_blocks.counts

    def _prepare_kernels(self):
        """The per-frame work: bond buffer, bin -> state table, the scheme's exact rule for the
        bins that a boundary cuts, and the arguments of the compiled frame kernel."""
        n_bins = self._n_bins
        self._bin_table, scheme_args = bin_state_tables(self.scheme, self.torsion_set.types, n_bins)
        # k = ceil((a + shift_in) / width) + shift_out (see bin_and_code)
        shift_in, shift_out = (0.0, n_bins // 2) if n_bins % 2 == 0 else (180.0, 0)
        self._bin_args = (float(self.bin_width_deg), shift_in, shift_out, n_bins, self._bin_table,
                          *scheme_args, MIXED)
        # the core membership of every frame (cores.parquet) goes with the time series
        self._core_bits = None if self.series is None else CoreBits(self.scheme, self.torsion_set.types, n_bins)
        tb = self._time_blocks
        self._work = FrameWork(self._geometry, self._bin_args, self._state_counts, self._undefined,
                               self._frame_sblock, self._frame_weight, self._core_bits,
                               type_key=None if tb is None else tb.type_key,
                               n_keys=self.scheme.n_states if tb is None else tb.n_types * tb.n_states)
        layout = getattr(getattr(self, "_source", None), "layout", None)
        if layout is not None:   # frames read as the file lays them out (DCD: no unpacking)
            self._work.use_layout(*layout(self._geometry.indices))
        self._handed = time.perf_counter()

    def _prepare_buffers(self):
        """The buffers of the last few frames (fine bins, codes, angles; one row per frame), the
        chunk buffers (one row per frame, as the time series store them; at most as many
        rows as this worker has frames) and the batches of frames (one frame at a time on
        views of the timestep, or, with a second thread, copies of about BATCH_BYTES)."""
        n_t = len(self.torsion_set)
        nf = int(max(1, min(HIST_BUFFER_FRAMES, self.n_frames)))
        self._bins = np.empty((nf, n_t), dtype=np.uint16)
        self._bins_hblock = np.empty(nf, dtype=np.intp)
        self._bins_weight = np.empty(nf, dtype=self._hist_dtype)
        self._n_bins_buf = 0
        if self.chunk_frames is None:
            self.chunk_frames = default_chunk_frames(n_t, self.keep_angles, self.threads)
        cf = int(max(1, min(int(self.chunk_frames), self.n_frames)))
        self._stage_codes = np.empty((nf, n_t), dtype=np.int8)
        self._stage_types = np.zeros((nf, self._work.n_keys), dtype=np.int32)   # per type and state
        self._stage_angles = np.empty((nf, n_t), dtype=np.float32) if self.keep_angles else None
        cores = self._core_bits is not None   # 0/1 int8 per frame; in the chunk, bits packed along the torsions
        self._stage_cores = np.empty((nf, n_t), dtype=np.int8) if cores else None
        self._chunk = ChunkBuffers(cf, n_t, self.keep_angles, cores)
        self._buf_frame = np.empty(cf, dtype=np.int64)
        self._buf_time = np.empty(cf, dtype=np.float64)
        self._buf_index = np.empty(cf, dtype=np.int64)
        self._n_buf = 0
        self._output = (None if self.series is None else
                        SeriesOutput(self.series, self.torsion_set.labels, self.weights is not None, self.chunk_frames))
        n_atoms = self._universe.atoms.n_atoms
        self._one_frame = Batch(1, 0)   # its positions are replaced by a view of each frame
        self._overlap = self._staged = self._batch = None
        size = int(max(1, min(BATCH_BYTES // max(1, 12 * n_atoms), self.n_frames)))
        words = getattr(getattr(self, "_source", None), "frame_words", None)
        if self.threads > 1:
            n_batches = BATCHES_MAPPED if getattr(self._source, "read_mapped", None) and words else BATCHES
            if hasattr(self._source, "batches_in_use"):
                self._source.batches_in_use = n_batches
            self._overlap = Overlap(self._process, [Batch(size, n_atoms, words) for _ in range(n_batches)])
            self._staged = self._overlap.take()
        elif getattr(self, "_source", None) is not None:   # decoded frames, in one thread
            self._batch = Batch(size, n_atoms, words)

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
            self._submit(batch)

    def _submit(self, batch):
        """Hand a full batch to the second thread, after the reading thread's share of its
        torsion work (:class:`~dihedra.trajectory.frame_work.FrameWork`; the seconds since the
        last hand-over, reading included, balance the two threads)."""
        self._work.first_part(batch)
        now = time.perf_counter()
        self._work.balance(0, now - self._handed, batch.n)
        self._staged = self._overlap.submit(batch)
        self._handed = time.perf_counter()

    def _process(self, batch):
        """Frames of a batch, in order: the torsion work the reading thread left, then the frames
        into the buffers, split where the histogram buffer or the chunk fills."""
        interrupts.check()   # (an interrupt whose raise Python swallowed is not lost)
        started = time.perf_counter()
        left = self._work.decode_left(self._source, batch)   # (frames the reading thread left undecoded)
        self.times[batch.index[batch.n - left:batch.n]] = batch.time[batch.n - left:batch.n]
        self._work.second_part(batch)
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
        batch.boxes = None
        self._work.balance(1, time.perf_counter() - started, batch.n)

    def _process_frames(self, batch, lo, m):
        row, nb = self._n_buf, self._n_bins_buf
        i = batch.index[lo:lo + m]
        self._work.copy_out(batch, lo, m, self._bins[nb:nb + m], self._stage_codes[nb:nb + m],
                            None if self._stage_angles is None else self._stage_angles[nb:nb + m],
                            None if self._stage_cores is None else self._stage_cores[nb:nb + m],
                            self._stage_types[nb:nb + m])
        self._bins_hblock[nb:nb + m] = self._frame_hblock[i]
        self._bins_weight[nb:nb + m] = self._frame_weight[i]
        self._buf_frame[row:row + m] = batch.frame[lo:lo + m]
        self._buf_time[row:row + m] = (batch.time[lo:lo + m] if self.dt_ps is None
                                       else batch.frame[lo:lo + m] * float(self.dt_ps))
        self._buf_index[row:row + m] = self._global_index[i]
        self._n_buf, self._n_bins_buf = row + m, nb + m

    def _drain(self):
        """The buffered frames: fine bins into the histograms, joint states into the conformer
        counts, codes (angles, core bits) copied into the chunk."""
        m = self._n_bins_buf
        if m == 0:
            return
        self._add_histograms()
        r1 = self._n_buf
        r0 = r1 - m
        gi = self._buf_index[r0:r1]
        if self._conformers:
            w = np.ones(m) if self.weights is None else self.weights[gi]
            self._conformers.count(self._stage_codes[:m], gi * self.n_state_blocks // max(1, self._n_total), w)
        if self._time_blocks is not None:
            self._time_blocks.add_counts(self._stage_types[:m], gi, None if self.weights is None else self.weights[gi])
        self._chunk.fill(r0, r1, self._stage_codes[:m], *(None if a is None else a[:m]
                                                           for a in (self._stage_angles, self._stage_cores)))
        self._n_bins_buf = 0

    def _add_histograms(self):
        """Add the fine bins of the buffered frames to the histograms."""
        m = self._n_bins_buf
        if m == 0:
            return
        self._hist.add(self._bins[:m], self._bins_hblock[:m], self._bins_weight[:m], self._kernels)
        self._n_bins_buf = 0

    def _conclude(self):
        res = self.results
        if res.state_counts.dtype != np.float64:   # (no cell holds more than its block's frames)
            res.state_counts = narrowest(res.state_counts, int(res.block_frames.max(initial=0)))
        # conformer rows and dense counts of the workers (files or arrays), summed per block
        res.conformer_counts, res.conformer_weights = merge_rows(
            res.conformer_counts, res.conformer_weights, res.pop("conformer_parts", None) or [])
        res.conformer_dense = merge_dense(res.pop("conformer_dense", None) or [], self.n_state_blocks,
                                          self.weights is not None)
        # dense histograms of every worker (a serial run hands over its array without a copy)
        parts = res.pop("hist_parts", None)
        if parts is not None:
            shape = (self.n_hist_blocks, len(self.torsion_set), int(round(360.0 / self.bin_width_deg)))
            res.histograms = merge_hist_parts(parts, shape, self.weights is not None)

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
        if self._output is not None:
            self._write_chunk(n)
        self._n_buf = 0

    def _stem(self):
        """Stem of the files this pass leaves in ``parts_dir`` (replica and first frame)."""
        return os.path.join(self.parts_dir, f"replica{self.replica:04d}-from{int(self._global_index[0]):012d}")

    def _finish_worker(self):
        # a slice of a parallel run hands its large sums back to the parent through files in
        # parts_dir when there is one (written to the page cache, no pickling)
        parallel = self._hb_lo > 0 or self._n_local_hist < self.n_hist_blocks
        stem = None
        if parallel and self.parts_dir is not None and len(self._global_index):
            stem = self._stem()
        res = self.results
        dense, rows, wts, files = self._conformers.hand_over(stem)
        res.conformer_dense, res.conformer_parts = dense, files
        if len(rows):
            res.conformer_counts, res.conformer_weights = rows, wts
        # the histogram blocks: files in parts_dir, or arrays (their non-empty cells when a
        # worker sends them back pickled and that is smaller)
        res.hist_parts = [(block, sparse_piece(piece) if parallel and not isinstance(piece, str) else piece, most)
                          for block, piece, most in self._hist.finish()]
        if self._output is not None and self._output.collected is not None:
            res.series_parts = [self._output.collected]
        self._hist = self._conformers = None
        self._stage_codes = self._stage_angles = self._stage_types = self._chunk = None
        self._stage_cores = self._core_bits = self._time_blocks = None
        self._bins = None
        self._one_frame = self._staged = None
        # modules do not pickle (results go back to the parent)
        self._geometry = self._kernels = self._work = None

    # -- the time series ----------------------------------------------------------------------------
    def _write_chunk(self, n):
        """Hand the chunk to the time series writer: here, or, with a second thread computing the
        frames, in a third thread while the next chunk fills the other buffers (ChunkBuffers)."""
        self._output.wait()   # the previous chunk is written: its buffer is free, order is kept
        index = {"frame": self._buf_frame[:n].copy(), "time_ps": self._buf_time[:n].copy(),
                 "position": self._buf_index[:n].copy()}
        if self.weights is not None:
            index["weight"] = self.weights[self._buf_index[:n]]
        # views of the chunk: the writer writes a full chunk at once; only the last, partial
        # chunk of the pass can wait in it until close(), and nothing writes into it after
        background = self._overlap is not None or self._last_chunk
        self._output.add(self.replica, index, self._chunk.values(n), background=background)
        if background and not self._last_chunk:   # (deferred: nothing writes into this buffer any more)
            self._chunk.swap()

    def finish_series(self):
        """Wait until the time series are complete (after a pass with ``defer_close``); raises
        :class:`~dihedra.errors.OutputWriteError` if writing them failed."""
        self._close_output()

    def _close_output(self):
        if self._chunk is not None:
            self._chunk.drop_spare()
        if self._output is not None:
            self._output.close()
