"""Torsion angles from coordinates: one vectorised call for all torsions of a frame.

The angle of A-B-C-D follows the IUPAC sign convention (Moss, Pure Appl. Chem. 68 (1996) 2193):
positive when A-B turns clockwise to eclipse C-D, seen along B->C. It is reported in degrees on
(-180, 180]. When the frame has a periodic box, each bond vector (B-A, C-B, D-C) is reduced to its
minimum image first, so a molecule split across the boundary gives the same angle as a whole one;
frames without a box use plain geometry. Collinear atoms or NaN coordinates give NaN.
"""

import numpy as np
from MDAnalysis.lib.distances import calc_dihedrals


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

    Examples
    --------
    >>> import numpy as np
    >>> xyz = np.array([[1, 0, 0], [0, 0, 0], [0, 1, 0], [1, 1, 0]], dtype=float)
    >>> torsion_angles_deg(xyz, np.array([[0, 1, 2, 3]])).round(6).tolist()  # cis
    [0.0]
    """
    idx = np.asarray(indices)
    pos = np.asarray(positions)
    rad = calc_dihedrals(pos[idx[:, 0]], pos[idx[:, 1]], pos[idx[:, 2]], pos[idx[:, 3]],
                         box=usable_box(box))
    return radians_to_convention_deg(rad)


def radians_to_convention_deg(rad):
    """Radians on [-pi, pi] to degrees on (-180, 180] (NaN stays NaN)."""
    deg = np.degrees(np.asarray(rad, dtype=np.float64))
    deg[deg <= -180.0] += 360.0
    return deg
