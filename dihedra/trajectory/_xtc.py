"""Compiled decoder of XTC frames (numba): the coordinates of many frames in one call, without
Python's lock.

XTC is the compressed trajectory format of GROMACS (XDR, big-endian): per frame a header (magic
number 1995, atoms, step, time), the 3 x 3 box in nm and the coordinates, integers of
``precision`` per nm packed with the compression of F. van Hoesel (three coordinates as one
multi-byte integer, then runs of small differences to the previous atom, whose bit size adapts).
This module decodes it with the integer operations of MDAnalysis' reader (its ``libmdaxdr``, the
``xdrfile`` library of GROMACS) and the same float32 rounding, ``float(int) * (1 / precision)``
and then ``* 10`` to Angstrom, so the positions are the same bits (tested against MDAnalysis on
the XTC files of MDAnalysisTests and on our own). It differs in how it runs: the bit stream is
read through a 64-bit window, the three coordinates of an atom are split from one 64-bit integer
by multiplying with float64 reciprocals (corrected to the exact quotient) where the library
divides byte by byte, and a whole batch of frames is decoded in one compiled call that releases
Python's lock, so another thread runs meanwhile.

Only :mod:`dihedra.trajectory.trajread` uses it.
"""

import sys

import numpy as np
from numba import njit

_OPTS = dict(cache=True, nogil=True, error_model="numpy", boundscheck=False)
#: the helpers are inlined by numba (no call, no reference counting of the arrays they take)
_INLINE = dict(_OPTS, inline="always")

#: sizes of the small integers by bit count (the table of the xdrfile library)
MAGICINTS = np.array([
    0, 0, 0, 0, 0, 0, 0, 0, 0, 8, 10, 12, 16, 20, 25, 32, 40, 50, 64,
    80, 101, 128, 161, 203, 256, 322, 406, 512, 645, 812, 1024, 1290,
    1625, 2048, 2580, 3250, 4096, 5060, 6501, 8192, 10321, 13003,
    16384, 20642, 26007, 32768, 41285, 52015, 65536, 82570, 104031,
    131072, 165140, 208063, 262144, 330280, 416127, 524287, 660561,
    832255, 1048576, 1321122, 1664510, 2097152, 2642245, 3329021,
    4194304, 5284491, 6658042, 8388607, 10568983, 13316085, 16777216], dtype=np.int64)
_FIRSTIDX = 9
_LASTIDX = len(MAGICINTS)
# The bit size of small integers may step to LASTIDX, one past the table (the library then reads
# beyond it); a run of small integers at that size is not decoded here (BAD_DATA: the caller
# falls back to MDAnalysis). The table gets one more entry so that the index stays valid.
_MAGIC = np.concatenate([MAGICINTS, MAGICINTS[-1:]])

#: status codes of :func:`decode_frames` and :func:`scan_frames`: BAD_HEADER is a header that no
#: writer of finite coordinates makes (the integer range overflowed, as when NaN coordinates are
#: written; a precision that is not a positive number; a size index or byte count out of range),
#: BAD_DATA a bit stream that runs past its atoms or its bytes, UNSUPPORTED a valid frame whose
#: small-integer size steps past the library's table (read by MDAnalysis instead)
OK, BAD_MAGIC, BAD_ATOMS, TRUNCATED, BAD_DATA, BAD_HEADER, UNSUPPORTED = 0, 1, 2, 3, 4, 5, 6

#: largest magnitude of an integer coordinate a writer stores (the library's MAXABS, INT_MAX - 2)
MAXABS = 2147483645

#: bytes of a frame before the coordinates: magic, atoms, step, time, box, atoms again
HEADER_BYTES = 56

#: zero words after the bit stream of a frame: a damaged stream is caught at the end of the atom
#: where it runs past its bytes, and one atom reads at most 822 bits (three 32-bit integers, the
#: run flag and length, ten small-integer triplets of at most 72 bits)
PAD_WORDS = 16

#: whether a uint64 loaded from memory has its first byte lowest (then words are byte-swapped)
_LITTLE = sys.byteorder == "little"

_U0 = np.uint64(0)
_U1 = np.uint64(1)
_U8 = np.uint64(8)
_U63 = np.uint64(63)
_U64 = np.uint64(64)
_MASK32 = np.uint64(0xFFFFFFFF)
_M8 = np.uint64(0x00FF00FF00FF00FF)
_M16 = np.uint64(0x0000FFFF0000FFFF)


@njit(**_INLINE)
def _int32(buf, p):
    """Big-endian signed 32-bit integer at byte ``p``."""
    v = ((np.int64(buf[p]) << 24) | (np.int64(buf[p + 1]) << 16) | (np.int64(buf[p + 2]) << 8)
         | np.int64(buf[p + 3]))
    if v >= 2147483648:
        v -= 4294967296
    return v


@njit(**_INLINE)
def _float32(buf, p):
    """Big-endian IEEE float32 at byte ``p``."""
    bits = np.uint32(_int32(buf, p) & 0xFFFFFFFF)
    return np.array([bits], dtype=np.uint32).view(np.float32)[0]


@njit(**_INLINE)
def _bswap(x):
    x = ((x & _M8) << _U8) | ((x >> _U8) & _M8)
    x = ((x & _M16) << np.uint64(16)) | ((x >> np.uint64(16)) & _M16)
    return (x << np.uint64(32)) | (x >> np.uint64(32))


@njit(**_OPTS)
def _words(buf, lo, nbytes, words):
    """The bit stream ``buf[lo:lo + nbytes]`` as big-endian 64-bit words, :data:`PAD_WORDS` zero
    words after. On a little-endian machine the whole words are loaded as uint64 from a view of
    the bytes (an unaligned load on x86-64 and arm64) and byte-swapped: ten times faster than
    assembling them byte by byte (0.003 instead of 0.029 ms for a frame of 30,000 atoms)."""
    n = nbytes // 8
    if _LITTLE:
        whole = buf[lo:lo + 8 * n].view(np.uint64)
        for j in range(n):
            words[j] = _bswap(whole[j])
    else:
        for j in range(n):
            w = _U0
            base = lo + 8 * j
            for b in range(8):
                w |= np.uint64(buf[base + b]) << np.uint64(56 - 8 * b)
            words[j] = w
    w = _U0
    for b in range(nbytes - 8 * n):
        w |= np.uint64(buf[lo + 8 * n + b]) << np.uint64(56 - 8 * b)
    words[n] = w
    for j in range(n + 1, n + 1 + PAD_WORDS):
        words[j] = _U0


@njit(**_INLINE)
def _bits(words, pos, n):
    """The ``n`` (1-64) bits at bit position ``pos`` of the MSB-first stream held in ``words``."""
    wi = pos >> 6
    o = np.uint64(pos & 63)
    x = (words[wi] << o) | ((words[wi + 1] >> _U1) >> (_U63 - o))
    return x >> (_U64 - np.uint64(n))


@njit(**_INLINE)
def _packed(words, pos, nbits):
    """The integer of ``nbits`` (1-57) bits at ``pos`` whose bytes come least significant first,
    the last one ``nbits - 8 * (nbytes - 1)`` bits wide (the byte order of ``decodeints``)."""
    x = _bits(words, pos, nbits)
    full = (nbits - 1) >> 3
    r = np.uint64(nbits - 8 * full)
    top = x & ((_U1 << r) - _U1)
    if full == 0:
        return np.int64(top)
    low = _bswap(x >> r) >> np.uint64(64 - 8 * full)
    return np.int64(low | (top << np.uint64(8 * full)))


@njit(**_INLINE)
def _divmod(n, d, inv):
    """``divmod(n, d)`` for ``0 <= n < 2^52`` through the float64 reciprocal ``inv = 1 / d``
    (off by at most one, then corrected: exact)."""
    q = np.int64(np.float64(n) * inv)
    r = n - q * d
    if r < 0:
        q -= 1
        r += d
    elif r >= d:
        q += 1
        r -= d
    return q, r


@njit(**_INLINE)
def _divmod_limbs(a2, a1, a0, d):
    """``divmod(N, d)`` of N = a2 2^64 + a1 2^32 + a0 (32-bit limbs, a2 < 2^8) by d < 2^24 + 1:
    the quotient's limbs and the remainder (long division, each step below 2^56)."""
    t = a2
    q2 = t // d
    r = t - q2 * d
    t = (r << 32) | a1
    q1 = t // d
    r = t - q1 * d
    t = (r << 32) | a0
    q0 = t // d
    r = t - q0 * d
    # q1 and q0 may exceed 32 bits only through a carry into the next limb: normalise
    q1 += q0 >> 32
    q0 &= 0xFFFFFFFF
    q2 += q1 >> 32
    q1 &= 0xFFFFFFFF
    return q2, q1, q0, r


@njit(**_INLINE)
def _unpack_wide(words, pos, nbits, s1, s2):
    """As :func:`_unpack3` for integers of 53-72 bits (sizes near 2^24), by long division."""
    lo = _U0
    hi = _U0
    k = 0
    left = nbits
    while left > 0:
        nb = 8 if left > 8 else left
        v = _bits(words, pos, nb)
        pos += nb
        left -= nb
        if k < 8:
            lo |= v << np.uint64(8 * k)
        else:
            hi |= v << np.uint64(8 * (k - 8))
        k += 1
    a2 = np.int64(hi)
    a1 = np.int64(lo >> np.uint64(32))
    a0 = np.int64(lo & _MASK32)
    a2, a1, a0, z = _divmod_limbs(a2, a1, a0, s2)
    a2, a1, a0, y = _divmod_limbs(a2, a1, a0, s1)
    return a0, y, z, pos


@njit(**_INLINE)
def _unpack3(words, pos, nbits, s1, s2, inv1, inv2):
    """The three integers packed into one ``nbits``-bit integer N:
    ``(N // (s1 s2), N // s2 % s1, N % s2)`` and the new bit position."""
    if nbits > 52:
        return _unpack_wide(words, pos, nbits, s1, s2)
    n = _packed(words, pos, nbits)
    q, z = _divmod(n, s2, inv2)
    x, y = _divmod(q, s1, inv1)
    return np.int64(np.uint64(x) & _MASK32), y, z, pos + nbits


@njit(**_OPTS)
def _bits_of_product(s0, s1, s2, scratch):
    """Bits of the product of three sizes below 2^24 (up to 72 bits: byte by byte), as the
    library's ``sizeofints``."""
    nb = 1
    scratch[0] = 1
    for i in range(3):
        size = s0 if i == 0 else (s1 if i == 1 else s2)
        tmp = np.int64(0)
        b = 0
        while b < nb:
            tmp = scratch[b] * size + tmp
            scratch[b] = tmp & 0xFF
            tmp >>= 8
            b += 1
        while tmp != 0:
            scratch[b] = tmp & 0xFF
            b += 1
            tmp >>= 8
        nb = b
    return _bit_length(scratch[nb - 1]) + 8 * (nb - 1)


@njit(**_INLINE)
def _bit_length(x):
    n = 0
    while x > 0 and n < 64:
        n += 1
        x >>= 1
    return n


@njit(**_OPTS)
def _coordinates(words, nbits_total, n_atoms, out, f, m0, m1, m2, s0, s1, s2, smallidx, inv, scratch):
    """Decode the compressed coordinates of frame ``f`` into ``out[f]`` (Angstrom). Returns
    ``OK`` or ``BAD_DATA``."""
    ten = np.float32(10.0)
    large = (s0 | s1 | s2) > 0xFFFFFF
    b0 = b1 = b2 = 0
    bitsize = 0
    if large:
        b0 = min(_bit_length(s0), 32)
        b1 = min(_bit_length(s1), 32)
        b2 = min(_bit_length(s2), 32)
    else:
        bitsize = _bits_of_product(s0, s1, s2, scratch)
    inv1 = 1.0 / np.float64(s1)
    inv2 = 1.0 / np.float64(s2)
    tmp = smallidx - 1
    if tmp < _FIRSTIDX:
        tmp = _FIRSTIDX
    smaller = _MAGIC[tmp] // 2
    smallnum = _MAGIC[smallidx] // 2
    size = _MAGIC[smallidx]
    inv_small = 1.0 / np.float64(size)
    pos = np.int64(0)
    run = 0
    i = 0
    while i < n_atoms:
        if large:
            x = np.int64(_bits(words, pos, b0)) if b0 else np.int64(0)
            pos += b0
            y = np.int64(_bits(words, pos, b1)) if b1 else np.int64(0)
            pos += b1
            z = np.int64(_bits(words, pos, b2)) if b2 else np.int64(0)
            pos += b2
        else:
            x, y, z, pos = _unpack3(words, pos, bitsize, s1, s2, inv1, inv2)
        i += 1
        px = x + m0
        py = y + m1
        pz = z + m2
        flag = _bits(words, pos, 1)
        pos += 1
        is_smaller = 0
        if flag == _U1:
            run = np.int64(_bits(words, pos, 5))
            pos += 5
            is_smaller = run % 3
            run -= is_smaller
            is_smaller -= 1
        if run > 0:
            if i + run // 3 > n_atoms:
                return BAD_DATA
            if smallidx >= _LASTIDX:
                return UNSUPPORTED
            for k in range(0, run, 3):
                x, y, z, pos = _unpack3(words, pos, smallidx, size, size, inv_small, inv_small)
                i += 1
                x += px - smallnum
                y += py - smallnum
                z += pz - smallnum
                if k == 0:
                    # the first two atoms of a run are stored swapped (water molecules)
                    x, px = px, x
                    y, py = py, y
                    z, pz = pz, z
                    out[f, i - 2, 0] = (np.float32(px) * inv) * ten
                    out[f, i - 2, 1] = (np.float32(py) * inv) * ten
                    out[f, i - 2, 2] = (np.float32(pz) * inv) * ten
                else:
                    px = x
                    py = y
                    pz = z
                out[f, i - 1, 0] = (np.float32(x) * inv) * ten
                out[f, i - 1, 1] = (np.float32(y) * inv) * ten
                out[f, i - 1, 2] = (np.float32(z) * inv) * ten
        else:
            out[f, i - 1, 0] = (np.float32(px) * inv) * ten
            out[f, i - 1, 1] = (np.float32(py) * inv) * ten
            out[f, i - 1, 2] = (np.float32(pz) * inv) * ten
        smallidx += is_smaller
        if smallidx < _FIRSTIDX or smallidx > _LASTIDX:
            return BAD_DATA
        if is_smaller < 0:
            smallnum = smaller
            if smallidx > _FIRSTIDX:
                smaller = _MAGIC[smallidx - 1] // 2
            else:
                smaller = 0
        elif is_smaller > 0:
            smaller = smallnum
            smallnum = _MAGIC[smallidx] // 2
        if is_smaller != 0:
            size = _MAGIC[smallidx]
            inv_small = 1.0 / np.float64(size)
        if pos > nbits_total:
            return BAD_DATA
    return OK


@njit(**_INLINE)
def max_frame_bytes(n_atoms):
    """The largest byte count of compressed coordinates a writer makes for ``n_atoms`` atoms (the
    library's buffer holds 1.2 times three 32-bit integers per atom)."""
    return np.int64(16) * n_atoms + 64


@njit(**_INLINE)
def _frame_bytes(buf, p, end, n_atoms):
    """Check the header of the frame at byte ``p`` (``buf[:end]`` holds the bytes read); return
    ``(status, bytes of the frame)``. Every field that sizes or steers the decoding is checked:
    the magic number, both atom counts, and for compressed frames the precision, the integer
    range (a writer's conversion of NaN leaves the smallest integer there, and the sizes then
    overflow), the first size index and the byte count (padded to 4 bytes; at most
    :func:`max_frame_bytes`)."""
    if p + HEADER_BYTES > end:
        return TRUNCATED, 0
    if _int32(buf, p) != 1995:
        return BAD_MAGIC, 0
    if _int32(buf, p + 4) != n_atoms or _int32(buf, p + 52) != n_atoms:
        return BAD_ATOMS, 0
    if n_atoms <= 9:
        return OK, HEADER_BYTES + 12 * n_atoms
    if p + HEADER_BYTES + 36 > end:
        return TRUNCATED, 0
    precision = _float32(buf, p + HEADER_BYTES)
    if not (precision > 0 and precision < np.inf):
        return BAD_HEADER, 0
    for k in range(3):
        lo = _int32(buf, p + HEADER_BYTES + 4 + 4 * k)
        hi = _int32(buf, p + HEADER_BYTES + 16 + 4 * k)
        if lo < -MAXABS - 1 or hi > MAXABS + 1 or hi < lo:
            return BAD_HEADER, 0
    smallidx = _int32(buf, p + HEADER_BYTES + 28)
    nbytes = _int32(buf, p + HEADER_BYTES + 32)
    if smallidx < _FIRSTIDX or smallidx >= _LASTIDX or nbytes < 0 or nbytes > max_frame_bytes(n_atoms):
        return BAD_HEADER, 0
    return OK, HEADER_BYTES + 36 + 4 * ((np.int64(nbytes) + 3) // 4)


@njit(**_OPTS)
def scan_frames(buf, n_atoms):
    """Walk the frames of a whole XTC file by their headers (:func:`_frame_bytes`), without
    decoding them.

    Parameters
    ----------
    buf : ndarray of uint8
        The bytes of the file (a memory map: only the headers are read).
    n_atoms : int
        The atom count every frame must have.

    Returns
    -------
    status, n_frames, offset : int, int, int
        ``OK``, the number of frames and the size of the file when every frame is whole; else
        the status of frame ``n_frames`` (the first one that is not; ``TRUNCATED`` when the
        file ends inside it) and its byte offset.
    """
    end = len(buf)
    p = np.int64(0)
    f = 0
    while p < end:
        status, size = _frame_bytes(buf, p, end, n_atoms)
        if status == OK and p + size > end:
            status = TRUNCATED
        if status != OK:
            return status, f, p
        f += 1
        p += size
    return OK, f, p


@njit(**_OPTS)
def check_frames(buf, starts, n_atoms):
    """The headers of the frames that begin at ``starts[f]`` of ``buf`` (:func:`_frame_bytes`),
    each whole in ``buf``: ``(OK, len(starts))``, or the status of the first frame that is not
    and its position in ``starts``."""
    end = len(buf)
    for f in range(len(starts)):
        status, size = _frame_bytes(buf, starts[f], end, n_atoms)
        if status == OK and starts[f] + size > end:
            status = TRUNCATED
        if status != OK:
            return status, f
    return OK, len(starts)


@njit(**_OPTS)
def decode_frames(buf, starts, n_atoms, positions, boxes, steps, times, words):
    """Decode the XTC frames that begin at byte ``starts[f]`` of ``buf``.

    Parameters
    ----------
    buf : ndarray of uint8
        The bytes of the frames.
    starts : ndarray of int64
        Byte offset in ``buf`` of each frame.
    n_atoms : int
    positions : ndarray of float32, shape (n_frames, n_atoms, 3)
        Receives the coordinates in Angstrom.
    boxes : ndarray of float32, shape (n_frames, 3, 3)
        Receives the box vectors in nm, as stored.
    steps : ndarray of int64
    times : ndarray of float32
        Receive the step and the time (ps) of each frame.
    words : ndarray of uint64
        Work space: at least (largest frame in bytes) / 8 + 1 + :data:`PAD_WORDS` words.

    Returns
    -------
    status, frame : int, int
        ``OK`` and the number of frames, or an error code and the frame where it happened.
    """
    scratch = np.zeros(32, dtype=np.int64)
    ten = np.float32(10.0)
    end = len(buf)
    for f in range(len(starts)):
        p = starts[f]
        status, size = _frame_bytes(buf, p, end, n_atoms)
        if status != OK:
            return status, f
        if p + size > end:
            return TRUNCATED, f
        steps[f] = _int32(buf, p + 8)
        times[f] = _float32(buf, p + 12)
        for i in range(3):
            for j in range(3):
                boxes[f, i, j] = _float32(buf, p + 16 + 4 * (3 * i + j))
        p += HEADER_BYTES
        if n_atoms <= 9:   # stored as plain floats (nm)
            for a in range(n_atoms):
                for k in range(3):
                    positions[f, a, k] = _float32(buf, p + 4 * (3 * a + k)) * ten
            continue
        inv = np.float32(1.0 / np.float64(_float32(buf, p)))
        m0 = _int32(buf, p + 4)
        m1 = _int32(buf, p + 8)
        m2 = _int32(buf, p + 12)
        s0 = (_int32(buf, p + 16) - m0 + 1) & 0xFFFFFFFF
        s1 = (_int32(buf, p + 20) - m1 + 1) & 0xFFFFFFFF
        s2 = (_int32(buf, p + 24) - m2 + 1) & 0xFFFFFFFF
        smallidx = _int32(buf, p + 28)
        nbytes = _int32(buf, p + 32)
        p += 36
        if nbytes // 8 + 1 + PAD_WORDS > len(words):
            return BAD_DATA, f
        _words(buf, p, nbytes, words)
        status = _coordinates(words, np.int64(nbytes) * 8, n_atoms, positions, f, m0, m1, m2,
                              s0, s1, s2, smallidx, inv, scratch)
        if status != OK:
            return status, f
    return OK, len(starts)
