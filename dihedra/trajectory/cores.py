"""Core membership of every frame, recorded by the trajectory pass for core-set kinetics.

Transition-based (core-set) kinetics (Buchete & Hummer, J. Phys. Chem. B 112 (2008) 6057) needs to
know, frame by frame, whether a torsion's angle lies in the *core* of its state: the state's
sector shrunk by a margin on both sides (:meth:`~dihedra.selection.schemes.StateScheme.core_codes`).
The state code says which sector; one more bit says whether the angle is in its core. The pass
records that bit for :data:`CORE_MARGIN_DEG` (``cores.parquet``, one bit per torsion and frame),
so that ``dihedra kinetics`` runs with its defaults on a folder
tracked without ``--keep-angles``; another margin needs the angles.

The bit comes from the fine bin the pass has already computed (a table per scheme part: in a core,
outside every core, or at a core's edge), and for the few angles in a bin that holds a core edge
from the exact rule on the angle, so it is exactly ``core_codes(angle, margin) >= 0``.
"""

from __future__ import annotations

import numpy as np

from ..numerics.angles import compiled_kernels

#: The core margin (degrees) whose core membership the pass records (the kinetics default).
CORE_MARGIN_DEG = 20.0

_OUT, _IN, _EDGE = 0, 1, 2


def core_bin_table(scheme, n_bins, margin_deg=CORE_MARGIN_DEG):
    """Core membership of every fine bin of a (coded) scheme: entry ``k`` (1..n_bins) for the bin
    (-180 + (k-1) w, -180 + k w], as the pass numbers them (0: undefined): 1 inside a core, 0
    outside every core, 2 where a core edge lies in the bin (decided per angle).

    Examples
    --------
    >>> from dihedra.selection.schemes import get_scheme
    >>> t = core_bin_table(get_scheme("anti-gauche"), 360)
    >>> int(t[0]), int(t[200]), int(t[210]), int(t[240]), int(t[300])  # undefined, (19,20], (29,30], (59,60], (119,120]
    (0, 2, 1, 1, 0)
    """
    width = 360.0 / n_bins
    lo = -180.0 + width * np.arange(n_bins)
    hi = lo + width
    probes = np.stack([lo + width * f for f in (1e-6, 0.25, 0.5, 0.75, 1.0 - 1e-6)] + [hi], axis=1)
    inside = scheme.core_codes(probes.reshape(-1), margin_deg).reshape(probes.shape) >= 0
    table = np.where(inside.all(axis=1), _IN, np.where(inside.any(axis=1), _EDGE, _OUT)).astype(np.int8)
    for _, start, end in scheme.merged_arcs():
        for edge in (start + margin_deg, end - margin_deg):
            e = (edge + 180.0) % 360.0 - 180.0
            table[(lo <= e) & (e <= hi)] = _EDGE
            if e == -180.0:
                table[-1] = _EDGE
    return np.r_[np.int8(_OUT), table]


def core_bin_bounds(scheme, n_bins, margin_deg=CORE_MARGIN_DEG):
    """Per fine bin (entries as in :func:`core_bin_table`) the angles of the bin that lie in a core:
    ``lo[k] <= angle <= hi[k]`` (float32; an empty range outside every core), and ``exact[k]``
    for the bins where that is not one range of the exact rule's (two core edges in one bin, an
    edge that float32 does not hold exactly): there the rule itself decides."""
    table = core_bin_table(scheme, n_bins, margin_deg)
    lo = np.where(table == _IN, -np.inf, np.inf)
    hi = np.where(table == _IN, np.inf, -np.inf)
    exact = np.zeros(len(table), dtype=bool)
    edges = []
    for _, start, end in scheme.merged_arcs():
        if end - start > 2 * margin_deg:
            edges += [((start + margin_deg + 180.0) % 360.0 - 180.0, "start"),
                      ((end - margin_deg + 180.0) % 360.0 - 180.0, "end")]
    width = 360.0 / n_bins
    for k in np.flatnonzero(table == _EDGE):
        b_lo, b_hi = -180.0 + (k - 1) * width, -180.0 + k * width
        inside = [(180.0 if e == -180.0 and k == n_bins else e, side) for e, side in edges
                  if b_lo <= e <= b_hi or (e == -180.0 and k == n_bins)]
        if len(inside) != 1 or float(np.float32(inside[0][0])) != inside[0][0]:
            exact[k] = True
            continue
        e, side = inside[0]
        lo[k], hi[k] = (e, np.inf) if side == "start" else (-np.inf, e)
    return lo.astype(np.float32), hi.astype(np.float32), exact


class CoreBits:
    """Whether each angle of a frame lies in the core of its state (margin :data:`CORE_MARGIN_DEG`),
    from the pass's fine bins and the angles: per bin the range of its angles that lies in a core
    (:func:`core_bin_bounds`), and the exact rule where a bin needs it.

    Parameters
    ----------
    scheme : StateScheme or SchemeSet
    types : list of str
        The type of every torsion (a set of schemes gives each type its part).
    n_bins : int
        Fine bins of the pass.
    """

    def __init__(self, scheme, types, n_bins, margin_deg=CORE_MARGIN_DEG):
        parts = scheme.coded_parts()
        self.parts, self.margin = parts, float(margin_deg)
        self.classes = (np.array([scheme.part_index(t) for t in types], dtype=np.intp) if len(parts) > 1
                        else np.zeros(len(types), dtype=np.intp))
        bounds = [core_bin_bounds(p, n_bins, self.margin) for p in parts]
        self.lo, self.hi, self.exact = (np.concatenate([b[j] for b in bounds]) for j in range(3))
        self._offset = (self.classes * (n_bins + 1)).astype(np.int64)
        self._exact8 = self.exact.astype(np.int64)

    def __call__(self, bins, deg, out, t0=0, t1=None):
        """``out[f, t]``: the angle ``deg[f, t]`` (fine bin ``bins[f, t]`` of the pass, 0 when
        undefined) is in its state's core; the columns are torsions ``t0 .. t1`` (all by default)."""
        t1 = len(self.classes) if t1 is None else t1
        # one compiled loop (the NumPy expression of it took 65 microseconds per frame of 15,000)
        n_exact = compiled_kernels().core_bits(bins, deg, self._offset[t0:t1], self.lo, self.hi, self._exact8,
                                               out.view(np.int8))
        if n_exact:
            index = bins.astype(np.int32)
            index += self._offset[t0:t1]
            frames, torsions = np.nonzero(self.exact.take(index))
            parts = self.classes[t0:t1][torsions]
            for p in np.unique(parts):
                sel = parts == p
                a = deg[frames[sel], torsions[sel]]
                out[frames[sel], torsions[sel]] = self.parts[p].core_codes(a, self.margin) >= 0
        return out
