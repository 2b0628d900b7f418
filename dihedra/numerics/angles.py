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
shortest of the 27 neighbouring images is taken. The arctangent is evaluated by the
compiled kernel (:mod:`dihedra.numerics._kernels`, numba) itself rather than by the C library, so
that the compiler can turn the whole loop into SIMD code (about 5 ns per torsion): with
``lo = min(|x|, |y|)`` and ``hi = max(|x|, |y|)``, ``z = lo / hi`` (or ``(lo - hi) / (lo + hi)``
plus pi/4 when ``lo > 0.66 hi``), atan(z) is the rational approximation of the Cephes library
(Moshier, *Methods and Programs for Mathematical Functions*, 1989; 1 ulp in double precision),
and the octant is restored from the signs. The tests check the angles against MDAnalysis'
``calc_dihedrals`` and RDKit.

Speed (:class:`TorsionGeometry`)
--------------------------------
A trajectory pass evaluates the same torsions in every frame: the atom indices, the work buffers
and the box parameters are prepared once, and each frame costs a gather of the bond vectors
(one loop over torsions), the triclinic reduction if the cell needs it, and one SIMD loop for the
angles. The kernels are compiled on first use and cached on disk (numba, a core dependency).
"""

import numpy as np

_loaded = None


def compiled_kernels():
    """The compiled kernels (:mod:`dihedra.numerics._kernels`), imported on first use (importing
    numba and loading the cached machine code take about a second)."""
    global _loaded
    if _loaded is None:
        from . import _kernels as mod
        _loaded = mod
    return _loaded


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


class TorsionGeometry:
    """Torsion angles of a fixed set of torsions, frame after frame.

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
        self.n_torsions = len(self.indices)
        top = 3 * (int(self.indices.max()) + 1) if self.n_torsions else 0
        #: 3 x the atom indices, as the kernels take them
        self.idx3 = (3 * self.indices).astype(np.uint32 if top < 2**32 else np.uint64)
        self._bonds = None
        self._out = None
        self._box_key = None
        self._box = box_parameters(None)

    def __getstate__(self):
        return dict(self.__dict__, _bonds=None, _out=None)

    @property
    def kernels(self):
        """The compiled kernels (:mod:`dihedra.numerics._kernels`)."""
        return compiled_kernels()

    def box_parameters(self, box):
        """:func:`box_parameters` of ``box``, remembered while the box stays the same."""
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
        lengths, inverse, h, reach2 = self.box_parameters(box)
        pos = np.ascontiguousarray(positions, dtype=np.float32)
        k = self.kernels
        if self._bonds is None:
            self._bonds = np.empty((9, self.n_torsions), dtype=np.float64)
        k.gather_bonds(pos.reshape(-1), self.idx3, 1, self._bonds)
        if h is not None:
            k.minimum_image_triclinic(self._bonds, h, reach2)
        k.dihedrals_deg(self._bonds, lengths, inverse, out)
        return out
