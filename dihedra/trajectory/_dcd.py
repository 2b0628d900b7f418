"""Compiled unpacking of DCD frames (numba), for :class:`dihedra.trajectory.trajread.DCDFrames`.

A DCD frame of N atoms without fixed atoms is, in 4-byte words: an optional unit cell record
(the Fortran record marker 48, six float64, 48 again: 14 words), then three records (marker 4N,
N float32, marker 4N) with the x, y and z coordinates (the layout read by ``read_dcdstep`` of
the molfile plugin that MDAnalysis' ``libdcd`` wraps). :func:`unpack_frames` copies the three
blocks of each frame of a batch into one (N, 3) array, checking every record marker, in one call
that releases Python's lock.
"""

from numba import njit


@njit(cache=True, nogil=True, boundscheck=False)
def unpack_frames(words, marks, starts, n_atoms, cell_words, positions):
    """Coordinates of the frames of a batch.

    Parameters
    ----------
    words : ndarray of float32
        The bytes of the frames, as 4-byte words in the machine's byte order.
    marks : ndarray of int32
        The same memory as ``words``, for the record markers.
    starts : ndarray of int64
        Word offset of each frame in ``words``.
    n_atoms, cell_words : int
        Atoms per frame; words of the unit cell record (14, or 0 without one).
    positions : ndarray of float32, shape (>= len(starts), n_atoms, 3)

    Returns
    -------
    int
        The number of frames unpacked: ``len(starts)``, or the first frame whose record markers
        are not those of this layout (a damaged frame, or a file in the other byte order).
    """
    size = 4 * n_atoms
    for f in range(len(starts)):
        s = starts[f] + cell_words
        for axis in range(3):
            if marks[s] != size or marks[s + 1 + n_atoms] != size:
                return f
            for i in range(n_atoms):
                positions[f, i, axis] = words[s + 1 + i]
            s += n_atoms + 2
    return len(starts)
