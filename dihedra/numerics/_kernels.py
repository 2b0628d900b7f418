"""Compiled kernels (numba): the per-frame work of the trajectory pass, the blocking analysis
of the populations (:func:`blocking_columns`, used by :func:`dihedra.numerics.statistics.blocking_error`)
and the extremum of arcs of free-energy profiles (:func:`window_extremum`, used by
:mod:`dihedra.numerics.extrema`).

This module is imported through :func:`dihedra.numerics.angles.compiled_kernels` (importing numba
takes a moment, so only where the kernels are used). The kernels use no fused multiply-adds and no
fast-math: the results do not depend on the machine's vector width. They are tested against
independent references (MDAnalysis' ``calc_dihedrals``, RDKit, exact counts) in
``tests/test_kernels.py``. The functions are compiled on first use and the machine code is cached
on disk (``cache=True``): the first run of a new installation spends a few seconds compiling,
later runs load the cache in milliseconds.

The loops are written for the compiler: the arithmetic of the torsion angles is one loop without
branches over contiguous arrays (LLVM turns it into SIMD code), while the gather of coordinates
and the histogram update, which are memory accesses that SIMD does not help, are plain loops.
"""

import math

import numpy as np
from numba import njit

# arctangent on [0, 0.66]: the rational approximation of Cephes (S. L. Moshier, Cephes Math
# Library, atan.c), accurate to 1 ulp in double precision
_P0, _P1, _P2, _P3, _P4 = (-8.750608600031904122785e-1, -1.615753718733365076637e1,
                           -7.500855792314704667340e1, -1.228866684490136173410e2,
                           -6.485021904942025371773e1)
_Q0, _Q1, _Q2, _Q3, _Q4 = (2.485846490142306297962e1, 1.650270098316988542046e2,
                           4.328810604912902668951e2, 4.853903996359136964868e2,
                           1.945506571482613964425e2)
_PI = math.pi
_HALF_PI = math.pi / 2.0
_QUARTER_PI = math.pi / 4.0
_RAD_TO_DEG = 180.0 / math.pi
_SPLIT = 0.66

_OPTS = dict(cache=True, nogil=True, error_model="numpy", boundscheck=False)


@njit(**_OPTS)
def gather_bonds(flat, idx3, stride, bonds):
    """Bond vectors A->B, B->C, C->D of every torsion in float64 (rows 0-2, 3-5, 6-8).

    ``flat`` is a frame's float32 coordinates as one array, ``idx3`` (uint32 or uint64, shape
    (n, 4)) the position of each atom's x in it and ``stride`` the distance from x to y and from
    y to z: 3 x the atom indices and 1 for coordinates raveled atom by atom (x, y, z per atom);
    the positions in a DCD frame's words and the length of a record for its x, y and z records.
    (Taking two bond vectors over from the previous torsion of a chain is slower than loading
    them again: the loop is bound by instructions, not by memory.)
    """
    n = idx3.shape[0]
    for t in range(n):
        a = idx3[t, 0]
        b = idx3[t, 1]
        c = idx3[t, 2]
        d = idx3[t, 3]
        for k in range(3):
            o = k * stride
            xa = np.float64(flat[a + o])
            xb = np.float64(flat[b + o])
            xc = np.float64(flat[c + o])
            xd = np.float64(flat[d + o])
            bonds[k, t] = xb - xa
            bonds[3 + k, t] = xc - xb
            bonds[6 + k, t] = xd - xc


@njit(**_OPTS)
def minimum_image_triclinic(bonds, h, reach2):
    """Minimum image of every bond vector in a triclinic cell (rows of ``h`` are a, b, c, lower
    triangular as MDAnalysis' ``triclinic_vectors``): reduce along c, b, a, then, unless the
    squared length is below ``reach2`` (then no other image can be shorter), take the shortest of
    the 27 neighbouring images (the first found in the order i, j, k = -1, 0, 1)."""
    n = bonds.shape[1]
    for t in range(n):
        for r in range(3):
            x = bonds[3 * r, t]
            y = bonds[3 * r + 1, t]
            z = bonds[3 * r + 2, t]
            s = np.floor(z / h[2, 2] + 0.5)
            x -= s * h[2, 0]
            y -= s * h[2, 1]
            z -= s * h[2, 2]
            s = np.floor(y / h[1, 1] + 0.5)
            x -= s * h[1, 0]
            y -= s * h[1, 1]
            z -= s * h[1, 2]
            s = np.floor(x / h[0, 0] + 0.5)
            x -= s * h[0, 0]
            y -= s * h[0, 1]
            z -= s * h[0, 2]
            bonds[3 * r, t] = x
            bonds[3 * r + 1, t] = y
            bonds[3 * r + 2, t] = z
            bx, by, bz = x, y, z
            best = (x * x + y * y) + z * z
            if best < reach2:
                continue
            for i in range(-1, 2):
                for j in range(-1, 2):
                    for k in range(-1, 2):
                        cx = ((x + i * h[0, 0]) + j * h[1, 0]) + k * h[2, 0]
                        cy = ((y + i * h[0, 1]) + j * h[1, 1]) + k * h[2, 1]
                        cz = ((z + i * h[0, 2]) + j * h[1, 2]) + k * h[2, 2]
                        d = (cx * cx + cy * cy) + cz * cz
                        if d < best:
                            best = d
                            bx, by, bz = cx, cy, cz
            bonds[3 * r, t] = bx
            bonds[3 * r + 1, t] = by
            bonds[3 * r + 2, t] = bz


@njit(**_OPTS)
def dihedrals_deg(bonds, lengths, inverse, out):
    """Torsion angles in degrees on (-180, 180] (float32, NaN when undefined) from bond vectors.

    Each component first gets the orthorhombic minimum image ``v - L floor(v / L + 1/2)``
    (``lengths`` and ``inverse`` 1 / L; zeros make it the identity, for no box or a triclinic
    cell already reduced by :func:`minimum_image_triclinic`). Then
    phi = atan2(|b2| b1 . (b2 x b3), (b1 x b2) . (b2 x b3)), with the arctangent computed here
    (see the module docstring of :mod:`dihedra.numerics.angles`).
    """
    n = bonds.shape[1]
    lx, ly, lz = lengths[0], lengths[1], lengths[2]
    ix, iy, iz = inverse[0], inverse[1], inverse[2]
    for t in range(n):
        u1 = bonds[0, t]
        u2 = bonds[1, t]
        u3 = bonds[2, t]
        v1 = bonds[3, t]
        v2 = bonds[4, t]
        v3 = bonds[5, t]
        w1 = bonds[6, t]
        w2 = bonds[7, t]
        w3 = bonds[8, t]
        u1 = u1 - lx * np.floor(u1 * ix + 0.5)
        u2 = u2 - ly * np.floor(u2 * iy + 0.5)
        u3 = u3 - lz * np.floor(u3 * iz + 0.5)
        v1 = v1 - lx * np.floor(v1 * ix + 0.5)
        v2 = v2 - ly * np.floor(v2 * iy + 0.5)
        v3 = v3 - lz * np.floor(v3 * iz + 0.5)
        w1 = w1 - lx * np.floor(w1 * ix + 0.5)
        w2 = w2 - ly * np.floor(w2 * iy + 0.5)
        w3 = w3 - lz * np.floor(w3 * iz + 0.5)
        n1 = u2 * v3 - u3 * v2
        n2 = u3 * v1 - u1 * v3
        n3 = u1 * v2 - u2 * v1
        m1 = v2 * w3 - v3 * w2
        m2 = v3 * w1 - v1 * w3
        m3 = v1 * w2 - v2 * w1
        x = (n1 * m1 + n2 * m2) + n3 * m3
        y = math.sqrt((v1 * v1 + v2 * v2) + v3 * v3) * ((u1 * m1 + u2 * m2) + u3 * m3)
        ax = abs(x)
        ay = abs(y)
        swap = ay > ax
        lo = ax if swap else ay
        hi = ay if swap else ax
        big = lo > _SPLIT * hi
        num = lo - hi if big else lo
        den = lo + hi if big else hi
        z = num / den
        zz = z * z
        p = (((_P0 * zz + _P1) * zz + _P2) * zz + _P3) * zz + _P4
        q = ((((zz + _Q0) * zz + _Q1) * zz + _Q2) * zz + _Q3) * zz + _Q4
        r = z + z * (zz * p / q)
        r = r + _QUARTER_PI if big else r
        r = _HALF_PI - r if swap else r
        r = _PI - r if x < 0.0 else r
        r = -r if y < 0.0 else r
        deg = np.float32(r * _RAD_TO_DEG)
        deg = np.float32(180.0) if deg <= -180.0 else deg
        deg = np.float32(180.0) if deg > 180.0 else deg
        undefined = ((ax == 0.0) & (ay == 0.0)) | (x != x) | (y != y)
        out[t] = np.float32(np.nan) if undefined else deg


@njit(**_OPTS)
def bin_and_code(deg, width, shift_in, shift_out, n_bins, table, classes, boundaries, n_boundaries,
                 start_closed, arc_states, mixed, bins, codes, counts, weight, undefined, type_key, type_row):
    """One frame: fine bin, state code and state count of every torsion.

    ``bins`` receives k = ceil((a + shift_in) / width) + shift_out, clipped to 1..n_bins (0 for
    an undefined angle): the bin (-180 + (k-1) width, -180 + k width]. With an even number of
    bins, shift_in = 0 and shift_out = n_bins / 2, which is exact for float32 angles, also next
    to 0 and to bin edges; else shift_in = 180, shift_out = 0. Torsion t follows the scheme of
    class ``classes[t]`` (one class per scheme of a set; a single scheme is class 0): ``codes``
    receives ``table[class, k]`` (``table[:, 0]`` = -1, undefined); a bin whose entry is
    ``mixed`` is cut by a state boundary of that class, and its angles follow the exact rule of
    :meth:`dihedra.selection.schemes.StateScheme.assign` with the class's first
    ``n_boundaries[class]`` entries of ``boundaries``, ``start_closed`` and ``arc_states`` (last
    boundary at or below the angle; a boundary owned by the previous arc moves one arc back).
    ``counts[t, code]`` (the current state block) gets ``weight``; an undefined angle adds 1 to
    ``undefined[t]`` instead. ``type_row[type_key[t] + code]`` counts the frame's torsions of each
    type in each state (``type_key[t]`` = type index x number of states).
    """
    n = deg.shape[0]
    for t in range(n):   # SIMD
        a = np.float64(deg[t])
        ok = a == a
        k = np.ceil(((a if ok else 0.0) + shift_in) / width) + shift_out
        k = 1.0 if k < 1.0 else k
        k = n_bins if k > n_bins else k
        bins[t] = np.uint16(k) if ok else np.uint16(0)
    for t in range(n):
        c = classes[t]
        code = table[c, bins[t]]
        if code == mixed:
            a = np.float64(deg[t])
            nb = n_boundaries[c]
            j = -1
            for m in range(nb):
                if boundaries[c, m] <= a:
                    j = m
            if j < 0:
                j = nb - 1
            if a == boundaries[c, j] and not start_closed[c, j]:
                j = (j - 1) % nb
            code = arc_states[c, j]
        codes[t] = code
        if code >= 0:
            counts[t, code] += weight
            type_row[type_key[t] + code] += 1
        else:
            undefined[t] += 1


@njit(**_OPTS)
def add_histograms(bins, weights, hist, top):
    """Add buffered frames of one block to its histograms: ``hist[t, bins[f, t] - 1]`` gets
    ``weights[f]`` for every frame f and torsion t with ``bins[f, t] > 0``; ``top[0]`` is raised
    to the largest cell written (the caller widens ``hist`` before a cell could pass its type's
    maximum, see :mod:`dihedra.numerics.counts`).

    Torsion by torsion: the histogram row of a torsion stays in the cache for all the buffered
    frames (frame by frame, each torsion would touch a new cache line in every frame).
    """
    n_f, n_t = bins.shape
    most = top[0]
    for t in range(n_t):
        for f in range(n_f):
            k = bins[f, t]
            if k > 0:
                v = hist[t, k - 1] + weights[f]
                hist[t, k - 1] = v
                if v > most:
                    most = v
    top[0] = most


@njit(**_OPTS)
def count_conformers(codes, local_block, members, powers, dense, weights, dense_weights,
                     weighted):
    """Joint states of conformer groups of one size, over the frames of a chunk.

    ``codes`` (n_frames, n_torsions) int8, ``local_block`` (n_frames,) block of each frame
    relative to ``dense``, ``members`` (n_groups, width) torsion positions, ``powers`` n_s ** j.
    ``dense`` (n_blocks, n_groups, n_s ** width) frames; ``dense_weights`` the same with weights.
    Frames in which a member is undefined are left out for that group.
    """
    n_f = codes.shape[0]
    n_g, width = members.shape
    for f in range(n_f):
        b = local_block[f]
        w = weights[f]
        for g in range(n_g):
            joint = 0
            ok = True
            for j in range(width):
                c = codes[f, members[g, j]]
                if c < 0:
                    ok = False
                joint += np.int64(c) * powers[j]
            if ok:
                dense[b, g, joint] += 1
                if weighted:
                    dense_weights[b, g, joint] += w


@njit(**_OPTS)
def frames(positions, idx3, stride, bonds, lengths, inverse, cells, reach2, triclinic, deg, width,
           shift_in, shift_out, n_bins, table, classes, boundaries, n_boundaries, start_closed, arc_states,
           mixed, bins, codes, counts, state_block, weights, undefined, type_key, type_counts):
    """Several frames in one call (no Python between them): for frame f (``positions[f]``, its
    coordinates as :func:`gather_bonds` takes them, with ``idx3`` and ``stride``), the angles
    (:func:`gather_bonds`, :func:`minimum_image_triclinic` if ``triclinic[f]``,
    :func:`dihedrals_deg` with ``lengths[f]`` / ``inverse[f]``) into ``deg[f]``, then
    :func:`bin_and_code` into ``bins[f]``, ``codes[f]``, ``counts[state_block[f]]`` and
    ``type_counts[f]``."""
    for f in range(positions.shape[0]):
        gather_bonds(positions[f].reshape(-1), idx3, stride, bonds)
        if triclinic[f]:
            minimum_image_triclinic(bonds, cells[f], reach2[f])
        dihedrals_deg(bonds, lengths[f], inverse[f], deg[f])
        bin_and_code(deg[f], width, shift_in, shift_out, n_bins, table, classes, boundaries, n_boundaries,
                     start_closed, arc_states, mixed, bins[f], codes[f], counts[state_block[f]], weights[f],
                     undefined, type_key, type_counts[f])


@njit(**_OPTS)
def core_bits(bins, deg, offset, lo, hi, exact, out):
    """``out[f, t] = lo[k] <= deg[f, t] <= hi[k]`` with ``k = bins[f, t] + offset[t]`` (the fine
    bin in the table of the torsion's scheme part); returns how many entries fall in bins that
    need the exact rule (``exact[k]``), which the caller then decides."""
    n_exact = 0
    for f in range(bins.shape[0]):
        b, d, o = bins[f], deg[f], out[f]
        for t in range(b.shape[0]):
            k = np.int64(b[t]) + offset[t]
            a = d[t]
            o[t] = (a >= lo[k]) & (a <= hi[k])
            n_exact += exact[k]
    return n_exact


@njit(**_OPTS)
def _block_mean_error(v, w, n, width, mean, se):
    """Mean and standard error of the block sums ``v[:n, :width]`` / ``w[:n, :width]``, column by
    column (the operations of :func:`dihedra.numerics.statistics.weighted_block_error`, in its order: sums
    over the blocks in turn; the inner loops run over columns, which SIMD takes together)."""
    total_w = np.zeros(width)
    total_v = np.zeros(width)
    nonempty = np.zeros(width, dtype=np.int64)
    ss = np.zeros(width)
    for i in range(n):
        for c in range(width):
            total_w[c] += w[i, c]
            total_v[c] += v[i, c]
            nonempty[c] += w[i, c] > 0
    for c in range(width):
        mean[c] = total_v[c] / total_w[c]
    for i in range(n):
        for c in range(width):
            r = v[i, c] - w[i, c] * mean[c]
            ss[c] += r * r
    for c in range(width):
        if nonempty[c] < 2:
            se[c] = np.nan
        else:
            se[c] = math.sqrt(ss[c] / (total_w[c] * total_w[c]) * nonempty[c] / (nonempty[c] - 1))


@njit(**_OPTS)
def blocking_columns(values, weights, weight_column, kept, pair_a, pair_b, level_sizes, use_first,
                     replica, n_replicas, mean, se, n_eff, level_se):
    """Flyvbjerg-Petersen blocking of every column of ``values`` (n_blocks, n_columns) with the
    weight sums ``weights[:, weight_column[c]]`` for column c (``weights`` of shape (n_blocks,
    n_weight_columns): one column of weights may serve several of values, without a copy), as
    :func:`dihedra.numerics.statistics.blocking_error` does it.

    ``kept`` are the blocks with weight; ``pair_a``, ``pair_b`` the blocks merged at each level
    (indices into the previous level, the levels' sizes in ``level_sizes``, every one of them used);
    ``use_first``: the first level is used too; ``replica`` (0 .. n_replicas - 1) of each kept
    block for the last level, one block per replica, when ``n_replicas >= 2``. ``level_se`` (1 +
    len(level_sizes), n_columns) receives the standard error of every level: row 0 the kept
    blocks as they are, row k the k-th merged level. Columns go in tiles through all the levels
    while the tile stays in the cache.
    """
    n_cols = values.shape[1]
    n0 = len(kept)
    tile = 128
    rows = max(n0, n_replicas, 1)
    cur_v = np.empty((rows, tile))
    cur_w = np.empty((rows, tile))
    nxt_v = np.empty((rows, tile))
    nxt_w = np.empty((rows, tile))
    first = np.empty(tile)
    best = np.empty(tile)
    merged_se = np.empty(tile)
    replica_se = np.empty(tile)
    n_samples = np.empty(tile)
    for c0 in range(0, n_cols, tile):
        width = min(n_cols, c0 + tile) - c0
        for i in range(n0):
            for c in range(width):
                cur_v[i, c] = values[kept[i], c0 + c]
                cur_w[i, c] = weights[kept[i], weight_column[c0 + c]]
        # every block left out has no weight: the kept blocks hold all samples
        n_samples[:width] = 0.0
        for i in range(n0):
            for c in range(width):
                n_samples[c] += cur_w[i, c]
        _block_mean_error(cur_v, cur_w, n0, width, mean[c0:c0 + width], first)
        for c in range(width):
            best[c] = first[c] if use_first else np.nan
            level_se[0, c0 + c] = first[c]
        # the replica level (one block per replica) from the kept blocks, before they are merged
        if n_replicas >= 2:
            nxt_v[:n_replicas, :width] = 0.0
            nxt_w[:n_replicas, :width] = 0.0
            for i in range(n0):
                for c in range(width):
                    nxt_v[replica[i], c] += cur_v[i, c]
                    nxt_w[replica[i], c] += cur_w[i, c]
            _block_mean_error(nxt_v, nxt_w, n_replicas, width, n_eff[c0:c0 + width], replica_se)
        off = 0
        level = 0
        for n in level_sizes:
            level += 1
            for i in range(n):
                a = pair_a[off + i]
                b = pair_b[off + i]
                for c in range(width):
                    nxt_v[i, c] = cur_v[a, c] + cur_v[b, c]
                    nxt_w[i, c] = cur_w[a, c] + cur_w[b, c]
            off += n
            cur_v, nxt_v = nxt_v, cur_v
            cur_w, nxt_w = nxt_w, cur_w
            _block_mean_error(cur_v, cur_w, n, width, n_eff[c0:c0 + width], merged_se)
            for c in range(width):
                best[c] = _fmax(best[c], merged_se[c])
                level_se[level, c0 + c] = merged_se[c]
        for c in range(width):
            b = best[c]
            if b != b:
                b = first[c]
            if n_replicas >= 2:
                b = _fmax(b, replica_se[c])
            se[c0 + c] = b
            m = mean[c0 + c]
            if b > 0:
                e = m * (1.0 - m) / (b * b)
                n_eff[c0 + c] = e if e <= n_samples[c] or e != e else n_samples[c]
            else:   # no error (NaN), or none seen (0: never entered or never left): undefined
                n_eff[c0 + c] = np.nan


@njit(**_OPTS)
def _fmax(a, b):
    """``np.fmax``: the larger, NaN only if both are NaN."""
    if b > a or a != a:
        return b if b == b else a
    return a


@njit(**_OPTS)
def _refine_extremum(y0, y1, y2, y3, y4, sign):
    """Offset (bins, from the middle bin) and value of the extremum refined from five bins
    ``y0 .. y4`` at x = -2..2 around an extreme bin, a minimum for ``sign`` 1.0, a maximum for -1.0
    (the rule of :func:`window_extremum`)."""
    if np.isfinite(y0) and np.isfinite(y1) and np.isfinite(y2) and np.isfinite(y3) and np.isfinite(y4):
        d0 = y0 - y2
        d1 = y1 - y2
        d3 = y3 - y2
        d4 = y4 - y2
        c0 = y2 + (12.0 * (d1 + d3) - 3.0 * (d0 + d4)) / 35.0
        c1 = ((y0 - y4) + 8.0 * (y3 - y1)) / 12.0
        c2 = (2.0 * (d0 + d4) - (d1 + d3)) / 14.0
        c3 = ((y4 - y0) - 2.0 * (y3 - y1)) / 12.0
        disc = c2 * c2 - 3.0 * c1 * c3   # the extremum of the cubic: c1 + 2 c2 x + 3 c3 x^2 = 0
        if disc > 0.0:
            x = -c1 / (c2 + sign * math.sqrt(disc))   # the root with f''(x) = 2 sign sqrt(disc), stable as c3 -> 0
            if np.isfinite(x) and abs(x) <= 1.0:
                v = c0 + x * (c1 + x * (c2 + x * c3))
                if sign * (y2 - v) >= 0.0:
                    return x, v
    bend = (y1 - y2) + (y3 - y2)
    if np.isfinite(y1) and np.isfinite(y2) and np.isfinite(y3) and sign * bend > 0.0:
        delta = min(max(0.5 * (y1 - y3) / bend, -0.5), 0.5)
        return delta, y2 - 0.25 * (y1 - y3) * delta
    return 0.0, y2


@njit(**_OPTS)
def window_extremum(values, rows, start, length, want_max, pos, val, ok, at):
    """The extremum of arcs of profiles, for every resample: arc ``a`` is the bins
    ``start[a] + 1, ..., start[a] + length[a]`` (going up the circle of ``n`` bins) of profile
    ``rows[a]`` of ``values`` (m, n, r), resample s its last index. Into ``at`` (r, f): the first
    bin (in arc order) holding the arc's minimum (its maximum with ``want_max``; an unsampled bin,
    +inf or NaN, counts as lowest there); an arc holding a NaN has no minimum: its first bin then
    stands for it. ``ok`` (r, f): for a minimum, the arc holds a sampled bin and no NaN; for a
    maximum, every bin of it is sampled. Into ``pos`` (bins) and ``val``: that bin refined
    (:func:`_refine_extremum`) by

    * the least-squares cubic through the five bins around it, x = -2..2 (Savitzky-Golay weights,
      common practice: c0 = (-3, 12, 17, 12, -3)/35, c1 = (1, -8, 0, 8, -1)/12, c2 = (2, -1, -2,
      -1, 2)/14, c3 = (-1, 2, 0, -2, 1)/12, summed as differences so that five equal values give
      exactly a flat cubic, no extremum placed by rounding): its local extremum of the right kind
      where all five are sampled, the extremum lies within one bin and its value does not lie
      beyond the bin's own (above it for a minimum);
    * else the parabola through the three bins around it where it bends the right way (vertex
      clipped to within half a bin);
    * else the bin itself.

    A parabola through five bins puts the extremum of an asymmetric well off by a fixed amount
    (the cubic term of the well enters its slope): 0.75 degrees at the gauche minimum of butane
    (Ryckaert-Bellemans) with 5-degree bins, where the cubic is off by 0.03.
    """
    n = values.shape[1]
    r = values.shape[2]
    sign = -1.0 if want_max else 1.0
    best = np.empty(r)
    where = np.empty(r, dtype=np.int64)
    flag = np.empty(r, dtype=np.bool_)   # max: every bin sampled so far; min: a NaN seen
    for a in range(rows.shape[0]):
        row = rows[a]
        first = (start[a] + 1) % n
        head = values[row, first]
        for s in range(r):   # (the resamples, contiguous, in the inner loops)
            y = head[s]
            where[s] = first
            if want_max:
                flag[s] = np.isfinite(y)
                best[s] = y if flag[s] else -np.inf
            else:
                flag[s] = y != y
                best[s] = y
        for t in range(1, length[a]):
            col = (first + t) % n
            line = values[row, col]
            if want_max:
                for s in range(r):   # (selects, no branches: SIMD)
                    y = line[s]
                    finite = np.isfinite(y)
                    flag[s] = flag[s] and finite
                    better = finite and y > best[s]
                    best[s] = y if better else best[s]
                    where[s] = col if better else where[s]
            else:
                for s in range(r):
                    y = line[s]
                    flag[s] = flag[s] or y != y
                    better = y < best[s]   # (false for NaN)
                    best[s] = y if better else best[s]
                    where[s] = col if better else where[s]
        for s in range(r):
            k = where[s]
            if want_max:
                good = flag[s]
            else:
                if flag[s]:
                    k = first
                good = not flag[s] and np.isfinite(best[s])
            ok[s, a] = good
            at[s, a] = k
            x, v = _refine_extremum(values[row, (k - 2) % n, s], values[row, (k - 1) % n, s], values[row, k, s],
                                    values[row, (k + 1) % n, s], values[row, (k + 2) % n, s], sign)
            pos[s, a] = k + x
            val[s, a] = v
