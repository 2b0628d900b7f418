"""Torsion angles from coordinates: one vectorised pass for all torsions of a frame.

The angle of A-B-C-D follows the IUPAC sign convention (Moss, Pure Appl. Chem. 68 (1996) 2193):
positive when A-B turns clockwise to eclipse C-D, seen along B->C. It is reported in degrees on
(-180, 180]. With the bond vectors b1 = B - A, b2 = C - B, b3 = D - C and the normals
n1 = b1 x b2, n2 = b2 x b3,

.. math::

    \\phi = \\operatorname{atan2}\\left(|b_2|\\, b_1 \\cdot n_2,\\; n_1 \\cdot n_2\\right),

which equals MDAnalysis' ``calc_dihedrals`` and is well conditioned near 0 and 180 degrees
(Blondel & Karplus, J. Comput. Chem. 17 (1996) 1132). When the frame has a periodic box, each bond
vector is reduced to its minimum image first, so a molecule split across the boundary gives the
same angle as a whole one; frames without a box use plain geometry. Collinear atoms (both atan2
arguments zero) or NaN coordinates give NaN.

Speed (:class:`TorsionGeometry`)
--------------------------------
A trajectory pass evaluates the same torsions in every frame, so the work that does not depend on
the coordinates is done once. Torsions that share three atoms (A-B-C-D followed by B-C-D-E, as
along an alkyl chain or a protein backbone) are laid end to end into one atom sequence; each bond
vector and each normal of that sequence is then computed once and serves up to three torsions.
The coordinates are gathered once per frame into three contiguous float32 rows (x, y, z), and
every step is one NumPy call over the whole sequence, without per-frame allocations. When the
sequence is a contiguous block of atoms (molecules stored in chain order) not even the gather is
needed. The arithmetic is in float32, like the coordinates themselves: the angles agree with a
float64 evaluation to about 1e-4 degrees, far below the precision of stored trajectories (an XTC
file keeps 0.001 nm).
"""

import numpy as np
from MDAnalysis.lib.distances import calc_dihedrals, minimize_vectors

_RAD_TO_DEG = np.float32(180.0 / np.pi)


def usable_box(dimensions):
    """The box ``[lx, ly, lz, alpha, beta, gamma]`` if it describes a real cell, else ``None``."""
    if dimensions is None:
        return None
    box = np.asarray(dimensions, dtype=np.float32)
    if box.shape != (6,) or not np.all(np.isfinite(box)) or np.any(box[:3] <= 0) or np.any(box[3:] <= 0):
        return None
    return box


def torsion_angles_deg(positions, indices, box=None):
    """Torsion angles in degrees on (-180, 180].

    Parameters
    ----------
    positions : ndarray, shape (n_atoms, 3)
        Coordinates in angstrom.
    indices : ndarray of int, shape (n_torsions, 4)
        Atom indices A, B, C, D of each torsion.
    box : array-like of 6 floats, optional
        Unit cell ``[lx, ly, lz, alpha, beta, gamma]`` (MDAnalysis ``dimensions``); ``None`` or an
        invalid cell means no periodic boundaries.

    Returns
    -------
    ndarray of float64, shape (n_torsions,)
        Computed in float32 by :class:`TorsionGeometry` (the trajectory pass uses the same code).

    Examples
    --------
    >>> import numpy as np
    >>> xyz = np.array([[1, 0, 0], [0, 0, 0], [0, 1, 0], [1, 1, 0]], dtype=float)
    >>> torsion_angles_deg(xyz, np.array([[0, 1, 2, 3]])).round(6).tolist()  # cis
    [0.0]
    """
    return TorsionGeometry(indices)(np.asarray(positions, dtype=np.float32), box).astype(np.float64)


def radians_to_convention_deg(rad):
    """Radians on [-pi, pi] to degrees on (-180, 180] (NaN stays NaN)."""
    deg = np.degrees(np.asarray(rad, dtype=np.float64))
    deg[deg <= -180.0] += 360.0
    return deg


def chain_layout(indices):
    """Lay torsions end to end: torsions that share three atoms become neighbours.

    A torsion A-B-C-D is followed by B-C-D-E when one exists; a dihedral does not change when its
    four atoms are read backwards, so either reading may join a run. Runs start at chain ends and
    are concatenated into one atom sequence.

    Parameters
    ----------
    indices : ndarray of int, shape (n_torsions, 4)

    Returns
    -------
    sequence : ndarray of int64, shape (n_atoms_in_sequence,)
        Atom indices; a run of k torsions contributes k + 3 atoms.
    start : ndarray of int64, shape (n_torsions,)
        Position in ``sequence`` of the first atom of each torsion (in the input order): torsion
        t is ``sequence[start[t]:start[t] + 4]`` (possibly read backwards).

    Examples
    --------
    >>> seq, start = chain_layout([[0, 1, 2, 3], [1, 2, 3, 4], [9, 8, 7, 6]])
    >>> seq.tolist(), start.tolist()
    ([0, 1, 2, 3, 4, 9, 8, 7, 6], [0, 1, 5])
    """
    idx = np.asarray(indices, dtype=np.int64).reshape(-1, 4)
    forms = []   # both readings of every torsion
    for q in idx.tolist():
        q = tuple(q)
        forms.append((q, q[::-1]))
    by_head = {}
    tail_count = {}
    for t, pair in enumerate(forms):
        for o, q in enumerate(pair):
            by_head.setdefault(q[:3], []).append((t, o))
            tail_count[q[1:]] = tail_count.get(q[1:], 0) + 1
    used = np.zeros(len(forms), dtype=bool)
    sequence, start = [], np.zeros(len(forms), dtype=np.int64)

    def follow(t, o):
        q = forms[t][o]
        start[t] = len(sequence)
        sequence.extend(q)
        used[t] = True
        while True:
            nxt = next(((s, so) for s, so in by_head.get(q[1:], ()) if not used[s]), None)
            if nxt is None:
                return
            t, o = nxt
            q = forms[t][o]
            start[t] = len(sequence) - 3
            sequence.append(q[3])
            used[t] = True

    def leads_in(t, o):
        # does a reading of another torsion end where this reading begins?
        head = forms[t][o][:3]
        own = sum(1 for q in forms[t] if q[1:] == head)
        return tail_count.get(head, 0) - own > 0

    # runs start at chain ends; what is left (rings) starts anywhere
    for t in range(len(forms)):
        if used[t]:
            continue
        for o in (0, 1):
            if not leads_in(t, o):
                follow(t, o)
                break
    for t in range(len(forms)):
        if not used[t]:
            follow(t, 0)
    return np.asarray(sequence, dtype=np.int64), start


class TorsionGeometry:
    """Torsion angles of a fixed set of torsions, frame after frame, in float32.

    The layout (:func:`chain_layout`) and the work buffers are made once; each call then costs a
    fixed number of NumPy operations over the atom sequence.

    Parameters
    ----------
    indices : ndarray of int, shape (n_torsions, 4)
        Atom indices A, B, C, D of each torsion.

    Examples
    --------
    >>> import numpy as np
    >>> geo = TorsionGeometry([[0, 1, 2, 3]])
    >>> xyz = np.array([[1, 0, 0], [0, 0, 0], [0, 0, 1], [-1, 0, 1]], dtype=np.float32)
    >>> geo(xyz).tolist()
    [180.0]
    """

    def __init__(self, indices):
        self.indices = np.asarray(indices, dtype=np.int64).reshape(-1, 4)
        seq, start = chain_layout(self.indices)
        self.n_torsions = len(start)
        self.sequence = seq
        self.start = start
        n = len(seq)
        self._contiguous = n > 0 and bool(np.all(np.diff(seq) == 1))
        self._flat = (3 * seq[None, :] + np.arange(3)[:, None]).astype(np.intp)
        self._all_at_start = bool(np.array_equal(start, np.arange(len(start))))
        self._buffers = None

    def _alloc(self):
        n = len(self.sequence)
        f4 = np.float32
        self._buffers = {
            "xyz": np.empty((3, n), f4),
            "v": np.empty((5, max(n - 1, 0)), f4),   # bond vectors, rows x y z x y
            "tmp": np.empty((3, max(n - 1, 0)), f4),
            "c": np.empty((3, max(n - 2, 0)), f4),   # normals of consecutive bonds
            "x": np.empty(max(n - 3, 0), f4),
            "y": np.empty(max(n - 3, 0), f4),
            "s": np.empty(max(n - 3, 0), f4),
            "out": np.empty(self.n_torsions, f4),
        }

    def __call__(self, positions, box=None, out=None):
        """Angles in degrees on (-180, 180] (float32, NaN when undefined).

        Parameters
        ----------
        positions : ndarray, shape (n_atoms, 3), float32
        box : array-like of 6 floats, optional
            Unit cell; ``None`` or an invalid cell means no periodic boundaries.
        out : ndarray of float32, shape (n_torsions,), optional
            Written in place and returned; by default an internal buffer that the next call
            overwrites.
        """
        if self.n_torsions == 0:
            return np.empty(0, dtype=np.float32) if out is None else out
        if self._buffers is None:
            self._alloc()
        B = self._buffers
        n = len(self.sequence)
        pos = np.asarray(positions)
        if pos.dtype != np.float32:
            pos = pos.astype(np.float32)
        if self._contiguous:
            s0 = int(self.sequence[0])
            xyz = pos[s0:s0 + n].T                      # a strided view, no copy
        else:
            xyz = B["xyz"]
            np.take(pos.reshape(-1), self._flat, out=xyz, mode="clip")
        v, tmp, c = B["v"], B["tmp"], B["c"]
        vec = v[:3]
        np.subtract(xyz[:, 1:], xyz[:, :-1], out=vec)
        box = usable_box(box)
        if box is not None:
            if np.all(box[3:] == 90.0):
                lengths = box[:3, None]
                np.multiply(vec, 1.0 / lengths, out=tmp)
                np.rint(tmp, out=tmp)
                if tmp.any():
                    tmp *= lengths
                    vec -= tmp
            else:
                vec[...] = minimize_vectors(np.ascontiguousarray(vec.T), box).T
        v[3:] = v[:2]
        a, b = v[:, :-1], v[:, 1:]
        np.multiply(a[1:4], b[2:5], out=c)               # c_j = v_j x v_(j+1)
        np.multiply(a[2:5], b[1:4], out=tmp[:, :n - 2])
        c -= tmp[:, :n - 2]
        m = n - 3
        x, y, s = B["x"], B["y"], B["s"]
        t3 = tmp[:, :m]
        np.multiply(c[:, :m], c[:, 1:], out=t3)          # x_j = c_j . c_(j+1)
        np.add(t3[0], t3[1], out=x)
        x += t3[2]
        np.multiply(vec[:, :m], c[:, 1:], out=t3)        # v_j . c_(j+1)
        np.add(t3[0], t3[1], out=y)
        y += t3[2]
        mid = vec[:, 1:m + 1]
        np.multiply(mid, mid, out=t3)                    # |v_(j+1)|
        np.add(t3[0], t3[1], out=s)
        s += t3[2]
        np.sqrt(s, out=s)
        y *= s
        res = B["out"] if out is None else out
        if self._all_at_start and m == self.n_torsions:
            xs, ys = x, y
        else:
            xs = np.take(x, self.start, mode="clip")
            ys = np.take(y, self.start, mode="clip")
        np.arctan2(ys, xs, out=res)
        res *= _RAD_TO_DEG
        np.add(res, np.float32(360.0), out=res, where=res <= -180.0)
        np.minimum(res, np.float32(180.0), out=res)
        undefined = (xs == 0) & (ys == 0)
        if undefined.any():
            res[undefined] = np.nan
        return res
