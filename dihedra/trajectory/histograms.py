"""Fine angle histograms of the trajectory pass: which state each fine bin holds, and the
histogram blocks that workers of a parallel run hand back to the parent.

The fine bins have width w = 360 / n_bins on (-180, 180], each open at its left edge and closed at
its right. The bin of a float32 angle a is ``k - 1`` with ``k = ceil(a / w) + n_bins / 2``, exact for
bins open at the left edge. A bin (lo, hi] that no state boundary cuts has one state for all its
angles; the few bins that hold a boundary are marked :data:`MIXED`, and their angles follow the
exact rule of :meth:`StateScheme.assign <dihedra.selection.schemes.StateScheme.assign>`.
"""

from __future__ import annotations

import numpy as np

from ..numerics.counts import counter_type, fit_counts, narrowest
from ..selection.schemes import UNDEFINED
from .result import BlockParts

#: Marks a fine bin that a state boundary cuts (its angles are assigned one by one).
MIXED = np.int8(-128)


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
    table[1:] = np.where(pure, codes[:, -1], MIXED)
    return table


def bin_state_tables(scheme, types, n_bins):
    """The bin tables of every scheme a torsion may follow and which one each torsion follows.

    Returns ``(table, (classes, boundaries, n_boundaries, start_closed, arc_states))``: ``table``
    (n_classes, n_bins + 1) as :func:`bin_state_table` per class; ``classes`` (n_torsions,) the
    class of each torsion (one class for a plain scheme; a :class:`SchemeSet` has one per part,
    chosen by torsion type); the arcs of each class padded to the longest."""
    parts = scheme.coded_parts()
    if len(parts) > 1:
        index = {t: scheme.part_index(t) for t in dict.fromkeys(types)}
        classes = np.array([index[t] for t in types], dtype=np.int64)
    else:
        classes = np.zeros(len(types), dtype=np.int64)
    width = max(len(p.boundaries_deg) for p in parts)
    boundaries = np.full((len(parts), width), np.inf)
    start_closed = np.zeros((len(parts), width), dtype=np.bool_)
    arc_states = np.zeros((len(parts), width), dtype=np.int8)
    for k, p in enumerate(parts):
        m = len(p.boundaries_deg)
        boundaries[k, :m] = p.boundaries_deg
        start_closed[k, :m] = p.start_closed
        arc_states[k, :m] = p.arc_states
    table = np.stack([bin_state_table(p, n_bins) for p in parts])
    return table, (classes, boundaries, np.array([len(p.boundaries_deg) for p in parts], dtype=np.int64),
                   start_closed, arc_states)


class HistogramBlocks:
    """The fine histograms of the blocks that one pass (or one worker) fills.

    Frames come in order, so the blocks fill one after another: a block is allocated when its
    first frame arrives (``np.zeros``: its pages are mapped as they are written), counted in
    uint8 and widened when a cell could pass the type's maximum
    (:mod:`dihedra.numerics.counts`), and *retired* when a frame of a later block arrives.
    With ``spill`` (a file stem in the run's scratch folder), a retired block is saved there
    (``.npy``, in the narrowest type of its largest count) and its array, zeroed, serves the next
    block (a fresh array is mapped from the system page by page: about 1,300 page faults for a
    block of 15,000 torsions, several times the cost of zeroing it), so that the pass holds one or
    two blocks whatever the number of blocks and frames; without it, retired blocks stay in
    memory.

    Parameters
    ----------
    first : int
        Number of the first block of this pass in the run (a worker's slice starts later).
    n_torsions, n_bins : int
    weighted : bool
        float64 sums of weights instead of counts.
    spill : str, optional
        Stem of the files of retired blocks.
    """

    def __init__(self, first, n_torsions, n_bins, weighted, spill=None):
        self.first = int(first)
        self.shape = (int(n_torsions), int(n_bins))
        self.weighted = bool(weighted)
        self.spill = spill
        self._open = {}      # local block -> (array, top (1,))
        self._retired = []   # (global block, array or file, largest count)
        self._spare = None   # the array of the last block saved to a file, for the next block

    def add(self, bins, block, weights, kernels):
        """Add buffered frames: ``bins`` (n_frames, n_torsions) fine bins (0: undefined),
        ``block`` their local block numbers (ascending), ``weights`` per frame."""
        cuts = np.flatnonzero(np.diff(block)) + 1
        for lo, hi in zip(np.r_[0, cuts], np.r_[cuts, len(block)]):
            b = int(block[lo])
            self._retire(below=b)
            hist, top = self._open.get(b) or (None, None)
            if hist is None:
                hist = self._new_block()
                top = np.zeros(1, dtype=np.float64 if self.weighted else np.int64)
            hist = fit_counts(hist, int(top[0]) + (hi - lo)) if not self.weighted else hist
            self._open[b] = (hist, top)
            kernels.add_histograms(bins[lo:hi], weights[lo:hi], hist, top)

    def _new_block(self):
        dtype = np.dtype(np.float64 if self.weighted else np.uint8)
        spare, self._spare = self._spare, None
        if spare is not None and spare.dtype == dtype:
            spare.fill(0)
            return spare
        return np.zeros(self.shape, dtype=dtype)

    def _retire(self, below):
        for b in sorted(k for k in self._open if k < below):
            hist, top = self._open.pop(b)
            most = top[0] if self.weighted else int(top[0])
            if self.spill is not None:
                path = f"{self.spill}.hist{self.first + b:04d}.npy"
                np.save(path, narrowest(hist, most))
                hist, self._spare = path, hist
            self._retired.append((self.first + b, hist, most))

    def finish(self):
        """Retire every block; returns the parts ``[(block, array or file, largest count)]``."""
        self._retire(below=np.iinfo(np.int64).max)
        parts, self._retired, self._spare = self._retired, [], None
        return parts


def sparse_piece(dense):
    """One block as ``(cells, values)`` (its non-empty cells, int32 indices) when that is less
    than half the bytes of the dense block (a worker's pieces sent back without files), else as
    it is."""
    cells = np.flatnonzero(dense)
    if len(cells) * (4 + dense.itemsize) < dense.nbytes // 2 and dense.size < 2**31:
        return cells.astype(np.int32), dense.reshape(-1)[cells]
    return dense


def merge_hist_parts(parts, shape, weighted):
    """The histogram blocks of the whole run, shape (n_hist_blocks, n_torsions, n_bins), from the
    parts ``(block, piece, largest count)`` of every pass or worker (a piece is an array, an
    ``.npy`` file or non-empty cells; see :class:`~dihedra.trajectory.result.BlockParts`).

    Counts are summed in the narrowest type that holds the sum of the pieces' largest counts
    (:func:`dihedra.numerics.counts.counter_type`). Pieces in files stay there until the
    histograms are read or written block by block (a :class:`BlockParts`); pieces in memory
    are added into one array."""
    bound = {}
    for block, _, most in parts:
        bound[block] = bound.get(block, 0) + most
    dtype = np.dtype(np.float64) if weighted else counter_type(int(max(bound.values(), default=0)))
    stacked = BlockParts([(block, piece) for block, piece, _ in parts], shape, dtype)
    if any(isinstance(piece, str) for _, piece, _ in parts):
        return stacked
    return stacked.materialize()
