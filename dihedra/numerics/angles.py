"""Torsion angles from coordinates: one pass over all torsions of a frame.

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

Arithmetic
----------
Coordinates are float32 (as trajectories store them); the bond vectors are their differences in
float64 and everything after is float64, rounded once to a float32 angle at the end. The minimum
image of an orthorhombic cell is ``v - L floor(v / L + 1/2)`` per component; in a triclinic cell
(rows a, b, c of MDAnalysis' ``triclinic_vectors``) the vector is reduced along c, b and a and the
shortest of the 27 neighbouring images is taken. The arctangent is evaluated here, not by the
C library: with ``lo = min(|x|, |y|)`` and ``hi = max(|x|, |y|)``, ``z = lo / hi`` (or
``(lo - hi) / (lo + hi)`` plus pi/4 when ``lo > 0.66 hi``), atan(z) is the rational approximation
of the Cephes library (Moshier, *Methods and Programs for Mathematical Functions*, 1989; 1 ulp in
double precision), and the octant is restored from the signs. Written once for the compiler
(:mod:`dihedra.numerics._kernels`, numba) and once in NumPy, with the same operations in the same order,
both give identical angles; the compiled one turns the arithmetic into SIMD code (about 5 ns per
torsion instead of about 40 with NumPy).

Speed (:class:`TorsionGeometry`)
--------------------------------
A trajectory pass evaluates the same torsions in every frame: the atom indices, the work buffers
and the box parameters are prepared once, and each frame costs a gather of the bond vectors
(one loop over torsions), the triclinic reduction if the cell needs it, and one SIMD loop for the
angles. The compiled kernels are used when numba is installed (a core dependency) unless the
environment variable ``DIHEDRA_NO_NUMBA=1`` asks for the NumPy path.
"""

import os

import numpy as np
_kernels = None


def compiled_kernels():
    """The numba kernels (:mod:`dihedra.numerics._kernels`), or ``None`` when numba is not installed or
    ``DIHEDRA_NO_NUMBA`` is set to a non-empty value other than ``0``."""
    global _kernels
    if os.environ.get("DIHEDRA_NO_NUMBA", "0") not in ("", "0"):
        return None
    if _kernels is None:
        try:
            from . import _kernels as mod
        except ImportError:  # numba missing: the NumPy path
            mod = False
        _kernels = mod
    return _kernels or None


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
        The float32 angles of :class:`TorsionGeometry` (the trajectory pass uses the same code).

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




# -- box ------------------------------------------------------------------------------------------

def box_parameters(dimensions):
    """Minimum-image parameters of a cell: ``(lengths, inverse, h, reach2)``.

    ``lengths`` and ``inverse`` (float64, 3) are L and 1 / L of an orthorhombic cell and zeros
    otherwise (no box, or a triclinic cell); ``h`` is the (3, 3) float64 matrix of cell vectors of
    a triclinic cell (rows a, b, c) or ``None``; ``reach2`` the squared length below which a
    reduced vector is surely its own minimum image, (0.49 w)^2 with w the smallest distance
    between lattice planes.
    """
    box = usable_box(dimensions)
    zeros = np.zeros(3)
    if box is None:
        return zeros, zeros, None, 0.0
    if np.all(box[3:] == 90.0):
        lengths = box[:3].astype(np.float64)
        return lengths, 1.0 / lengths, None, 0.0
    from MDAnalysis.lib.mdamath import triclinic_vectors
    h = np.asarray(triclinic_vectors(box), dtype=np.float64)
    volume = abs(np.linalg.det(h))
    spacing = min(volume / np.linalg.norm(np.cross(h[(k + 1) % 3], h[(k + 2) % 3])) for k in range(3))
    return zeros, zeros, h, float((0.49 * spacing) ** 2)


# -- NumPy twins of the compiled kernels (same operations, same order) ----------------------------

_P = (-8.750608600031904122785e-1, -1.615753718733365076637e1, -7.500855792314704667340e1,
      -1.228866684490136173410e2, -6.485021904942025371773e1)
_Q = (2.485846490142306297962e1, 1.650270098316988542046e2, 4.328810604912902668951e2,
      4.853903996359136964868e2, 1.945506571482613964425e2)


def gather_bonds(positions, indices):
    """Bond vectors A->B, B->C, C->D of every torsion, float64, shape (9, n_torsions)."""
    p = np.asarray(positions, dtype=np.float32)[np.asarray(indices)].astype(np.float64)  # (n, 4, 3)
    return np.concatenate([(p[:, 1] - p[:, 0]).T, (p[:, 2] - p[:, 1]).T, (p[:, 3] - p[:, 2]).T])


def minimum_image_triclinic(bonds, h, reach2):
    """In place: reduce along c, b, a, then (for squared lengths of at least ``reach2``) the
    shortest of the 27 neighbouring images."""
    for r in range(3):
        x, y, z = (bonds[3 * r + c].copy() for c in range(3))
        for row in (2, 1, 0):
            s = np.floor((x, y, z)[row] / h[row, row] + 0.5)
            x = x - s * h[row, 0]
            y = y - s * h[row, 1]
            z = z - s * h[row, 2]
        bx, by, bz = x, y, z
        best = (x * x + y * y) + z * z
        search = best >= reach2
        for i in range(-1, 2):
            for j in range(-1, 2):
                for k in range(-1, 2):
                    cx = ((x + i * h[0, 0]) + j * h[1, 0]) + k * h[2, 0]
                    cy = ((y + i * h[0, 1]) + j * h[1, 1]) + k * h[2, 1]
                    cz = ((z + i * h[0, 2]) + j * h[1, 2]) + k * h[2, 2]
                    d = (cx * cx + cy * cy) + cz * cz
                    shorter = (d < best) & search
                    best = np.where(shorter, d, best)
                    bx, by, bz = (np.where(shorter, c, b) for c, b in ((cx, bx), (cy, by), (cz, bz)))
        bonds[3 * r], bonds[3 * r + 1], bonds[3 * r + 2] = bx, by, bz
    return bonds


def dihedrals_deg(bonds, lengths, inverse, out=None):
    """Angles (float32 degrees on (-180, 180], NaN undefined) from bond vectors, orthorhombic
    minimum image first (zeros: none); see the module docstring."""
    u1, u2, u3, v1, v2, v3, w1, w2, w3 = (
        b - lengths[k % 3] * np.floor(b * inverse[k % 3] + 0.5) for k, b in enumerate(bonds))
    n1, n2, n3 = u2 * v3 - u3 * v2, u3 * v1 - u1 * v3, u1 * v2 - u2 * v1
    m1, m2, m3 = v2 * w3 - v3 * w2, v3 * w1 - v1 * w3, v1 * w2 - v2 * w1
    x = (n1 * m1 + n2 * m2) + n3 * m3
    y = np.sqrt((v1 * v1 + v2 * v2) + v3 * v3) * ((u1 * m1 + u2 * m2) + u3 * m3)
    ax, ay = np.abs(x), np.abs(y)
    swap = ay > ax
    lo, hi = np.where(swap, ax, ay), np.where(swap, ay, ax)
    big = lo > 0.66 * hi
    with np.errstate(invalid="ignore", divide="ignore"):
        z = np.where(big, lo - hi, lo) / np.where(big, lo + hi, hi)
    zz = z * z
    p = (((_P[0] * zz + _P[1]) * zz + _P[2]) * zz + _P[3]) * zz + _P[4]
    q = ((((zz + _Q[0]) * zz + _Q[1]) * zz + _Q[2]) * zz + _Q[3]) * zz + _Q[4]
    r = z + z * (zz * p / q)
    r = np.where(big, r + np.pi / 4.0, r)
    r = np.where(swap, np.pi / 2.0 - r, r)
    r = np.where(x < 0.0, np.pi - r, r)
    r = np.where(y < 0.0, -r, r)
    deg = (r * (180.0 / np.pi)).astype(np.float32)
    deg[(deg <= -180.0) | (deg > 180.0)] = 180.0
    deg[((ax == 0.0) & (ay == 0.0)) | np.isnan(x) | np.isnan(y)] = np.nan
    if out is None:
        return deg
    out[...] = deg
    return out


class TorsionGeometry:
    """Torsion angles of a fixed set of torsions, frame after frame.

    Parameters
    ----------
    indices : ndarray of int, shape (n_torsions, 4)
        Atom indices A, B, C, D of each torsion.
    compiled : bool, optional
        Use the numba kernels (default: when available, see :func:`compiled_kernels`); ``False``
        forces the NumPy path. Both give the same angles.

    Examples
    --------
    >>> import numpy as np
    >>> geo = TorsionGeometry([[0, 1, 2, 3]])
    >>> xyz = np.array([[1, 0, 0], [0, 0, 0], [0, 0, 1], [-1, 0, 1]], dtype=np.float32)
    >>> geo(xyz).tolist()
    [180.0]
    """

    def __init__(self, indices, compiled=None):
        self.indices = np.asarray(indices, dtype=np.int64).reshape(-1, 4)
        self.n_torsions = len(self.indices)
        kernels = compiled_kernels() if compiled in (None, True) else None
        if compiled and kernels is None:
            raise ImportError("the compiled torsion kernels need numba: pip install numba")
        self._kernels = kernels
        top = 3 * (int(self.indices.max()) + 1) if self.n_torsions else 0
        self._idx3 = (3 * self.indices).astype(np.uint32 if top < 2**32 else np.uint64)
        self._bonds = None
        self._out = None
        self._box_key = None
        self._box = box_parameters(None)

    def __getstate__(self):
        state = dict(self.__dict__, _bonds=None, _out=None)
        state["_kernels"] = self._kernels is not None   # a module does not pickle
        return state

    def __setstate__(self, state):
        state["_kernels"] = compiled_kernels() if state["_kernels"] else None
        self.__dict__.update(state)

    @property
    def compiled(self):
        """Whether the numba kernels are used."""
        return self._kernels is not None

    def _box_parameters(self, box):
        if box is None:
            key = None
        else:
            box = np.asarray(box)
            key = box.tobytes()
        if key != self._box_key:
            self._box = box_parameters(box)
            self._box_key = key
        return self._box

    def __call__(self, positions, box=None, out=None):
        """Angles in degrees on (-180, 180] (float32, NaN when undefined).

        Parameters
        ----------
        positions : ndarray, shape (n_atoms, 3)
            Coordinates (converted to float32 if they are not).
        box : array-like of 6 floats, optional
            Unit cell; ``None`` or an invalid cell means no periodic boundaries.
        out : ndarray of float32, shape (n_torsions,), optional
            Written in place and returned; by default an internal buffer that the next call
            overwrites.
        """
        if out is None:
            if self._out is None:
                self._out = np.empty(self.n_torsions, dtype=np.float32)
            out = self._out
        if self.n_torsions == 0:
            return out
        lengths, inverse, h, reach2 = self._box_parameters(box)
        pos = np.ascontiguousarray(positions, dtype=np.float32)
        k = self._kernels
        if k is None:
            bonds = gather_bonds(pos, self.indices)
            if h is not None:
                minimum_image_triclinic(bonds, h, reach2)
            return dihedrals_deg(bonds, lengths, inverse, out)
        if self._bonds is None:
            self._bonds = np.empty((9, self.n_torsions), dtype=np.float64)
        k.gather_bonds(pos.reshape(-1), self._idx3, self._bonds)
        if h is not None:
            k.minimum_image_triclinic(self._bonds, h, reach2)
        k.dihedrals_deg(self._bonds, lengths, inverse, out)
        return out
