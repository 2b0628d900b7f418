"""The trajectory pass: one streaming sweep that turns frames into torsion states.

:class:`TorsionPass` is an MDAnalysis :class:`~MDAnalysis.analysis.base.AnalysisBase` subclass.
For each frame it makes one vectorised call for all torsions (angles with the minimum image,
:func:`dihedra.angles.torsion_angles_deg`), assigns state codes with the scheme, and adds the
frame to running sums:

``results.state_counts`` : ndarray, shape (n_state_blocks, n_torsions, n_states)
    (weighted) number of frames per block, torsion and state; blocks are equal slices of the
    analysed frames, fixed by frame position, so serial and parallel runs fill the same cells.
``results.histograms`` : ndarray, shape (n_hist_blocks, n_torsions, n_bins)
    (weighted) fine periodic angle histogram per block, bins of ``bin_width_deg`` on (-180, 180],
    each bin open at its left edge and closed at its right.
``results.block_frames`` / ``results.hist_block_frames`` : ndarray (n_blocks,)
    frames per block; ``results.block_weights`` / ``results.hist_block_weights`` the weight sums.
``results.undefined`` : ndarray (n_torsions,)
    frames in which each torsion was undefined (collinear atoms, NaN coordinates); such frames
    are counted here and never binned.
``results.conformer_counts`` : ndarray (n_rows, 4) int64 and ``results.conformer_weights``
    rows (block, group, joint_code, frames) of the joint states of each conformer group.
``results.parts`` : list of str
    Parquet files holding the state time series (and angles with ``keep_angles``), written in row
    groups of ``chunk_frames`` frames, one file per worker.

Memory does not grow with the number of frames: only the chunk buffer and the block sums live in
memory. Partial results of parallel workers merge by exact sums (``ResultsGroup.ndarray_sum``),
so the multiprocessing and dask backends give the same integers as a serial run.
"""

from __future__ import annotations

import os

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
from MDAnalysis.analysis.base import AnalysisBase
from MDAnalysis.analysis.results import ResultsGroup

from .angles import radians_to_convention_deg, usable_box
from .schemes import UNDEFINED

#: Groups with more torsions than this get no conformer statistics (their joint states explode).
MAX_CONFORMER_TORSIONS = 12


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
        Folder for the Parquet time series; ``None`` writes no time series.
    keep_angles : bool
        Also write the angles (float32 degrees).
    chunk_frames : int, optional
        Frames per Parquet row group (default: about 16 MB of states per chunk).
    replica : int
        Replica number written with every frame.
    time_offset_ps, dt_ps : float, optional
        ``dt_ps`` replaces the trajectory's time step: time = time_offset_ps + frame * dt_ps.

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
            "state_counts": s, "histograms": s, "block_frames": s, "block_weights": s,
            "hist_block_frames": s, "hist_block_weights": s, "undefined": s,
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
        self._close()
        self._compact_conformers()
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
        count_dtype = np.float64 if weighted else np.int64
        hist_dtype = np.float64 if weighted else np.int32
        self.results.state_counts = np.zeros((self.n_state_blocks, n_t, n_s), dtype=count_dtype)
        self.results.histograms = np.zeros((self.n_hist_blocks, n_t, n_bins), dtype=hist_dtype)
        self.results.block_frames = np.zeros(self.n_state_blocks, dtype=np.int64)
        self.results.block_weights = np.zeros(self.n_state_blocks, dtype=np.float64)
        self.results.hist_block_frames = np.zeros(self.n_hist_blocks, dtype=np.int64)
        self.results.hist_block_weights = np.zeros(self.n_hist_blocks, dtype=np.float64)
        self.results.undefined = np.zeros(n_t, dtype=np.int64)
        self.results.conformer_counts = np.empty((0, 4), dtype=np.int64)
        self.results.conformer_weights = np.empty(0, dtype=np.float64)
        self.results.parts = []
        idx = self.torsion_set.indices
        self._a, self._b, self._c, self._d = (np.ascontiguousarray(idx[:, k]) for k in range(4))
        self._flat_state = np.arange(n_t, dtype=np.int64) * n_s
        self._flat_hist = np.arange(n_t, dtype=np.int64) * n_bins
        self._rad = np.empty(n_t, dtype=np.float64)
        # conformer groups: joint code = sum code_k * n_states**k along the chain
        groups, members, _ = conformer_layout(self.torsion_set, n_s)
        self._conf_members = members
        self._conf_pow = [n_s ** np.arange(len(m), dtype=np.int64) for m in members]
        # chunk buffers
        if self.chunk_frames is None:
            self.chunk_frames = int(max(64, min(10000, (16 << 20) // max(1, n_t))))
        cf = int(self.chunk_frames)
        self._buf_codes = np.empty((cf, n_t), dtype=np.int8)
        self._buf_angles = np.empty((cf, n_t), dtype=np.float32) if self.keep_angles else None
        self._buf_frame = np.empty(cf, dtype=np.int64)
        self._buf_time = np.empty(cf, dtype=np.float64)
        self._buf_block = np.empty(cf, dtype=np.int64)
        self._buf_weight = np.empty(cf, dtype=np.float64)
        self._n_buf = 0
        self._writers = None
        self._conf_parts = []

    def _single_frame(self):
        ts = self._ts
        gi = int(self._global_index[self._frame_index])
        n_total = max(1, self._n_total)
        sb = gi * self.n_state_blocks // n_total
        hb = gi * self.n_hist_blocks // n_total
        w = 1 if self.weights is None else float(self.weights[gi])
        from MDAnalysis.lib.distances import calc_dihedrals
        pos = ts.positions
        calc_dihedrals(pos[self._a], pos[self._b], pos[self._c], pos[self._d],
                       box=usable_box(ts.dimensions), result=self._rad)
        deg = radians_to_convention_deg(self._rad)
        codes = self.scheme.assign(deg)
        valid = codes != UNDEFINED
        res = self.results
        if valid.all():
            bins = np.ceil((deg + 180.0) / self.bin_width_deg).astype(np.int64) - 1
            np.clip(bins, 0, self._n_bins - 1, out=bins)
            res.state_counts[sb].reshape(-1)[self._flat_state + codes] += w
            res.histograms[hb].reshape(-1)[self._flat_hist + bins] += w
        else:
            res.undefined += ~valid
            d = np.where(valid, deg, 0.0)
            bins = np.ceil((d + 180.0) / self.bin_width_deg).astype(np.int64) - 1
            np.clip(bins, 0, self._n_bins - 1, out=bins)
            res.state_counts[sb].reshape(-1)[(self._flat_state + codes)[valid]] += w
            res.histograms[hb].reshape(-1)[(self._flat_hist + bins)[valid]] += w
        res.block_frames[sb] += 1
        res.block_weights[sb] += w
        res.hist_block_frames[hb] += 1
        res.hist_block_weights[hb] += w
        row = self._n_buf
        self._buf_codes[row] = codes
        if self._buf_angles is not None:
            self._buf_angles[row] = deg
        self._buf_frame[row] = ts.frame
        self._buf_time[row] = ts.time if self.dt_ps is None else ts.frame * float(self.dt_ps)
        self._buf_block[row] = sb
        self._buf_weight[row] = w
        self._n_buf += 1
        if self._n_buf == len(self._buf_codes):
            self._flush()

    def _conclude(self):
        pass

    # -- chunked output ----------------------------------------------------------------------
    def _flush(self):
        n = getattr(self, "_n_buf", 0)
        if n == 0:
            return
        codes = self._buf_codes[:n]
        self._count_conformers(codes, self._buf_block[:n], self._buf_weight[:n])
        if self.parts_dir is not None:
            self._write_chunk(n)
        self._n_buf = 0

    def _count_conformers(self, codes, blocks, weights):
        if not self._conf_members:
            return
        n_s = self.scheme.n_states
        rows, wts = [], []
        for g, (members, powers) in enumerate(zip(self._conf_members, self._conf_pow)):
            sub = codes[:, members].astype(np.int64)
            joint = sub @ powers
            ok = (sub >= 0).all(axis=1)
            if not ok.all():
                joint, b, w = joint[ok], blocks[ok], weights[ok]
            else:
                b, w = blocks, weights
            key = b * (n_s ** len(members)) + joint
            uniq, inv = np.unique(key, return_inverse=True)
            cnt = np.bincount(inv)
            wsum = np.bincount(inv, weights=w)
            size = n_s ** len(members)
            rows.append(np.column_stack([uniq // size, np.full(len(uniq), g), uniq % size, cnt]))
            wts.append(wsum)
        self._conf_parts.append((np.vstack(rows), np.concatenate(wts)))

    def _compact_conformers(self):
        parts = getattr(self, "_conf_parts", [])
        if not parts:
            return
        rows = np.vstack([p[0] for p in parts])
        wts = np.concatenate([p[1] for p in parts])
        self.results.conformer_counts, self.results.conformer_weights = reduce_conformer_rows(rows, wts)
        self._conf_parts = []

    def _schema(self, value_type):
        fields = [pa.field("replica", pa.int16()), pa.field("frame", pa.int64()),
                  pa.field("time_ps", pa.float64())]
        if self.weights is not None:
            fields.append(pa.field("weight", pa.float64()))
        fields += [pa.field(label, value_type) for label in self.torsion_set.labels]
        return pa.schema(fields)

    def _write_chunk(self, n):
        if self._writers is None:
            first = int(self._global_index[0]) if len(self._global_index) else 0
            stem = os.path.join(self.parts_dir, f"replica{self.replica:04d}-from{first:012d}")
            self._writers = {"states": pq.ParquetWriter(stem + ".states.parquet", self._schema(pa.int8()))}
            self.results.parts = [stem + ".states.parquet"]
            if self.keep_angles:
                self._writers["angles"] = pq.ParquetWriter(stem + ".angles.parquet", self._schema(pa.float32()))
                self.results.parts.append(stem + ".angles.parquet")
        head = [pa.array(np.full(n, self.replica, dtype=np.int16)), pa.array(self._buf_frame[:n].copy()),
                pa.array(self._buf_time[:n].copy())]
        if self.weights is not None:
            head.append(pa.array(self._buf_weight[:n].copy()))
        for kind, buf in (("states", self._buf_codes), ("angles", self._buf_angles)):
            if kind not in self._writers:
                continue
            block = np.ascontiguousarray(buf[:n].T)  # one contiguous row per torsion
            cols = head + [pa.array(block[k]) for k in range(block.shape[0])]
            self._writers[kind].write_table(pa.Table.from_arrays(cols, schema=self._writers[kind].schema))

    def _close(self):
        for w in (self._writers or {}).values():
            w.close()
        self._writers = None


def reduce_conformer_rows(rows, weights):
    """Sum duplicate (block, group, joint) rows of conformer counts."""
    if len(rows) == 0:
        return np.empty((0, 4), dtype=np.int64), np.empty(0)
    keys, inv = np.unique(rows[:, :3], axis=0, return_inverse=True)
    inv = inv.reshape(-1)
    counts = np.bincount(inv, weights=rows[:, 3]).astype(np.int64)
    wsum = np.bincount(inv, weights=weights)
    return np.column_stack([keys, counts]), wsum
