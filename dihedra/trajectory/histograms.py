"""Fine angle histograms of the trajectory pass: which state each fine bin holds, and the
histogram blocks that workers of a parallel run hand back to the parent.

The fine bins have width w = 360 / n_bins on (-180, 180], each open at its left edge and closed at
its right. The bin of a float32 angle a is ``k - 1`` with ``k = ceil(a / w) + n_bins / 2``, exact for
bins open at the left edge. A bin (lo, hi] that no state boundary cuts has one state for all its
angles; the few bins that hold a boundary are marked :data:`MIXED`, and their angles follow the
exact rule of :meth:`StateScheme.assign <dihedra.selection.schemes.StateScheme.assign>`.
"""

from __future__ import annotations

import os

import numpy as np

from ..selection.schemes import UNDEFINED

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


def hist_part(block, dense):
    """One histogram block of a worker as ``[(block, cells, values)]`` (non-empty cells, int32
    indices) when that is smaller than half the dense block, else ``[(block, dense view)]``."""
    cells = np.flatnonzero(dense)
    if len(cells) * (4 + dense.itemsize) < dense.nbytes // 2 and dense.size < 2**31:
        return [(block, cells.astype(np.int32), dense.reshape(-1)[cells])]
    return [(block, dense[None])]


def narrow_counts(block, most):
    """An int32 histogram block as uint8 or uint16 when no count can exceed ``most`` (the
    frames that went into it), else as it is (weighted sums, long blocks)."""
    if block.dtype != np.int32:
        return block
    for small in (np.uint8, np.uint16):
        if most <= np.iinfo(small).max:
            return block.astype(small)
    return block




def merge_hist_parts(parts, shape, weighted):
    """The histogram blocks of the whole run, shape (n_hist_blocks, n_torsions, n_bins), from the
    parts of the workers: ``(block, file)`` saved by a worker, ``(first block, dense blocks)``, or
    ``(block, cells, values)``; a serial run's single part covering every block is used without a
    copy."""
    if (len(parts) == 1 and parts[0][0] == 0 and isinstance(parts[0][1], np.ndarray)
            and parts[0][1].shape == shape):
        return parts[0][1]
    hist = np.zeros(shape, dtype=np.float64 if weighted else np.int32)
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
    return hist
