r"""Minima and barriers of stacks of periodic profiles, with bootstrap errors: the pure numerical
pieces of the profile features, shared by :mod:`dihedra.analysis.profiles.features` and the
data-driven state scheme ``basins`` (:mod:`dihedra.trajectory.basins`).

* **minima** -- local minima (periodic) whose depth below the lower of their two flanking
  barriers is at least max(0.5 kT, 3 sigma), sigma the combined error of minimum and barrier;
  shallower dips are merged into their neighbours. A flanking barrier is the highest sampled bin
  towards the neighbouring minimum: an unsampled stretch bounds the barrier only from below.
  Positions and values are refined with a least-squares cubic through the five bins around
  the extreme bin (a three-point parabola where that fails; never beyond the bin's own value:
  :func:`dihedra.numerics._kernels.window_extremum`). Errors are bootstrap spreads, at least the
  counting floors of the bins involved where the profiles carry them (histogram profiles).
* **barriers** -- the highest point between each pair of neighbouring minima; a barrier whose
  region holds unsampled bins has ``sampled = False``, no height, and lies in the middle of its
  unsampled bins.

Stacks are handled at once: minima by vectorised candidate pruning with a range-maximum table
(:class:`_RangeMax`), the extreme bin of every resample and its refinement arc by arc by a compiled
kernel (:func:`_window_extremum`).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..units import wrap_deg
from .density import _circular_deviation_deg, bootstrap_spread

#: A minimum must be at least this many kT deep (and 3 sigma) to count.
MIN_DEPTH_KT = 0.5
#: ... and this many combined standard errors.
MIN_DEPTH_SIGMA = 3.0
#: A bin must be sampled in this fraction of bootstrap resamples to hold a minimum.
MIN_RESAMPLED_FRACTION = 0.9

# ----------------------------------------------------------------------------------------------
# Minima, barriers
# ----------------------------------------------------------------------------------------------

def _arc(n, a, b):
    """Indices strictly between a and b going up the circle (the whole circle but a if a == b)."""
    if a == b:
        return (a + 1 + np.arange(n - 1)) % n
    length = (b - a) % n
    return (a + 1 + np.arange(length - 1)) % n


def _arc_length(n, a, b):
    """Number of indices strictly between a and b going up the circle (n - 1 if a == b)."""
    return np.where(a == b, n - 1, (np.asarray(b) - a) % n - 1)


class _RangeMax:
    """Position and value of the first maximum of ``values[row, lo..hi]`` on a circle, in O(1).

    A sparse table over each row written twice (so that arcs that wrap are contiguous): level k
    holds the first maximum of every run of 2^k entries; a query combines two runs that cover
    the range, preferring the left one on ties (the first occurrence in arc order).
    """

    def __init__(self, values):
        values = np.asarray(values, dtype=float)
        m, n = values.shape
        twice = np.concatenate([values, values], axis=1)
        length = 2 * n
        n_levels = max(1, int(np.floor(np.log2(length))) + 1)
        self.value = np.full((n_levels, m, length), -np.inf)
        self.where = np.zeros((n_levels, m, length), dtype=np.int64)
        self.value[0] = twice
        self.where[0] = np.arange(length)
        for k in range(1, n_levels):
            half, size = 2 ** (k - 1), 2 ** k
            last = length - size + 1
            left_v, right_v = self.value[k - 1, :, :last], self.value[k - 1, :, half:half + last]
            left = left_v >= right_v
            self.value[k, :, :last] = np.where(left, left_v, right_v)
            self.where[k, :, :last] = np.where(left, self.where[k - 1, :, :last],
                                               self.where[k - 1, :, half:half + last])
        self.n = n

    def arc(self, rows, a, length):
        """First maximum over the ``length`` (>= 1) indices after ``a`` going up the circle."""
        lo = np.asarray(a) + 1
        hi = lo + np.asarray(length) - 1
        k = np.floor(np.log2(np.maximum(length, 1))).astype(np.int64)
        right_start = hi - 2 ** k + 1
        lv, rv = self.value[k, rows, lo], self.value[k, rows, right_start]
        left = lv >= rv
        pos = np.where(left, self.where[k, rows, lo], self.where[k, rows, right_start]) % self.n
        return pos, np.where(left, lv, rv)


def _minima_stack(free, err, kt, usable=None, min_depth_kt=MIN_DEPTH_KT, min_depth_sigma=MIN_DEPTH_SIGMA):
    """:func:`find_minima` for a stack of profiles (m, n); returns a list of index arrays."""
    free = np.atleast_2d(np.asarray(free, dtype=float))
    m, n = free.shape
    g = np.where(np.isfinite(free), free, np.inf)
    ok = np.isfinite(g) if usable is None else np.isfinite(g) & np.atleast_2d(np.asarray(usable, dtype=bool))
    e = np.where(np.isfinite(err), np.atleast_2d(err), 0.0)
    cand = ok & (g < np.roll(g, 1, axis=1)) & (g <= np.roll(g, -1, axis=1))
    lonely = ~cand.any(axis=1) & ok.any(axis=1)
    cand[np.flatnonzero(lonely), np.argmin(np.where(ok, g, np.inf), axis=1)[lonely]] = True
    count = cand.sum(axis=1)
    width = max(1, int(count.max()) if m else 1)
    # candidates of each row, ascending, padded at the end
    order = np.argsort(~cand, axis=1, kind="stable")[:, :width]
    cands = np.where(np.arange(width)[None, :] < count[:, None], order, -1)
    # the walls of a candidate are the highest *sampled* bins towards its neighbours: an unsampled
    # stretch says only that the barrier there is at least as high as what was sampled around it
    # (counted as infinitely high, sparse bins on a barrier's slope beside unsampled ones passed
    # as deep minima)
    table = _RangeMax(np.where(np.isfinite(free), free, -np.inf))
    need_floor = min_depth_kt * kt
    active = np.flatnonzero(count > 1)
    while len(active):
        c, cnt = cands[active], count[active]
        slot = np.arange(width)[None, :]
        valid = slot < cnt[:, None]
        nxt = np.where(slot + 1 < cnt[:, None], slot + 1, 0)
        prv = np.where(slot > 0, slot - 1, cnt[:, None] - 1)
        a = np.where(valid, c, 0)
        b = np.take_along_axis(a, nxt, axis=1)
        rows = np.broadcast_to(active[:, None], a.shape)
        length = _arc_length(n, a, b)
        gap_j, gap_top = table.arc(rows, a, np.maximum(length, 1))
        # nothing sampled between two candidates (or no bin at all): the higher of the two bounds it
        none = (length <= 0) | ~np.isfinite(gap_top)
        higher = np.where(g[rows, a] >= g[rows, b], a, b)
        gap_j = np.where(none, higher, gap_j)
        gap_top = np.where(none, g[rows, higher], gap_top)
        left_j, right_j = np.take_along_axis(gap_j, prv, axis=1), gap_j
        left_top, right_top = np.take_along_axis(gap_top, prv, axis=1), gap_top
        gi = g[rows, a]
        take_left = (left_top < right_top) | ((left_top == right_top) & (left_j <= right_j))
        top = np.where(take_left, left_top, right_top)
        j = np.where(take_left, left_j, right_j)
        need = np.maximum(need_floor, min_depth_sigma * np.hypot(e[rows, a], e[rows, j]))
        with np.errstate(invalid="ignore"):
            deficit = np.where(valid, top - gi - need, np.inf)
        worst = np.argmin(deficit, axis=1)
        drop = deficit[np.arange(len(active)), worst] < 0
        rows_drop, slot_drop = active[drop], worst[drop]
        keep = np.ones_like(cands[rows_drop], dtype=bool)
        keep[np.arange(len(rows_drop)), slot_drop] = False
        moved = np.argsort(~keep, axis=1, kind="stable")
        cands[rows_drop] = np.take_along_axis(cands[rows_drop], moved, axis=1)
        count[rows_drop] -= 1
        cands[rows_drop, count[rows_drop]] = -1
        active = rows_drop[count[rows_drop] > 1]
    return [cands[r, :count[r]].copy() for r in range(m)]


def find_minima(free, err, kt, usable=None, min_depth_kt=MIN_DEPTH_KT, min_depth_sigma=MIN_DEPTH_SIGMA):
    """Indices of the minima of a periodic profile (see the module notes for the depth rule).

    Unsampled (NaN) bins are no minima and no walls: a candidate's depth is measured against the
    highest sampled bin between it and each neighbouring candidate. Only bins where ``usable`` is true (default:
    all sampled bins) can be minima; :func:`profile_features` passes the bins sampled in at least
    :data:`MIN_RESAMPLED_FRACTION` of the bootstrap resamples, so that a stray visit to an
    otherwise empty region is not taken for a minimum. Returns indices in increasing angle.

    A candidate is a bin lower than its left neighbour and not higher than its right one; while
    any candidate is shallower than the rule allows (its depth below the lower of the highest
    points between it and its two neighbouring candidates), the shallowest is dropped.
    """
    free = np.asarray(free, dtype=float)
    if not np.isfinite(free).any():
        return []
    return [int(i) for i in _minima_stack(free[None, :], np.asarray(err, dtype=float)[None, :], kt,
                                          None if usable is None else np.asarray(usable)[None, :],
                                          min_depth_kt, min_depth_sigma)[0]]


def _window_extremum(values, rows, start, length, kind):
    """Refined extremum of arcs of a stack of profiles, for every resample.

    Parameters
    ----------
    values : ndarray (m, n, r)
        Profiles, their resamples last (r = 1 for the estimate); +inf = unsampled.
    rows, start, length : ndarray (f,)
        Profile of each arc, the bin before it and its number of bins (>= 1): the arc is
        ``start + 1, ..., start + length`` going up the circle.
    kind : {"min", "max"}

    Returns
    -------
    position (bins), value, ok, bin : ndarrays (r, f)
        The first extremum in arc order (``bin``; an unsampled bin, +inf or NaN, counts as lowest
        for "max"; for "min", an arc holding a NaN or no sampled bin has its first bin), refined by
        a least-squares cubic through the five bins around it (a three-point parabola where that
        fails; never beyond the bin's own value); for "max", ok is false where the arc holds an
        unsampled bin; for "min", where it holds no sampled one. Arc by arc, the resamples side by
        side, by :func:`dihedra.numerics._kernels.window_extremum` (where the rule is stated).
    """
    from .angles import compiled_kernels

    values = np.ascontiguousarray(values, dtype=np.float64)
    r = values.shape[2]
    f = len(rows)
    pos, val = np.empty((r, f)), np.empty((r, f))
    ok, k = np.empty((r, f), dtype=bool), np.empty((r, f), dtype=np.int64)
    rows, start, length = (np.ascontiguousarray(x, dtype=np.int64) for x in (rows, start, length))
    compiled_kernels().window_extremum(values, rows, start, length, kind == "max", pos, val, ok, k)
    return pos, val, ok, k


def _spread_columns(samples):
    """:func:`bootstrap_spread` standard deviation of each column of (n_bootstrap, f)."""
    return bootstrap_spread(samples)[0]


#: Columns of the minima and barrier tables produced by :func:`_features_stack`.
MINIMUM_FIELDS = ("angle_deg", "angle_err_deg", "free_energy_kj_mol", "free_energy_err_kj_mol")
BARRIER_FIELDS = ("from_minimum_deg", "to_minimum_deg", "angle_deg", "angle_err_deg", "free_energy_kj_mol",
                  "free_energy_err_kj_mol", "height_from_first_kj_mol", "height_from_first_err_kj_mol",
                  "height_from_second_kj_mol", "height_from_second_err_kj_mol", "sampled")


@dataclass
class _Arcs:
    """The minima of a stack of profiles (m, n) and the arcs between them, one entry per minimum.

    ``row`` is the profile of each minimum, ``first`` (m,) the index of the first minimum of each
    profile, ``number`` 0, 1, ... within its profile, ``n_min`` (m,) the minima per profile; ``cur``
    the bin of each minimum, ``nxt`` that of the next one going up the circle (index
    ``nxt_feature``), ``arc_len`` the bins strictly between the two (where the barrier lies);
    ``win_start`` / ``win_len`` the window of each minimum between the barriers on its two sides
    (the arc ``win_start + 1, ..., win_start + win_len``). ``g`` is the profile with unsampled
    bins at +inf.
    """

    g: np.ndarray
    row: np.ndarray
    first: np.ndarray
    number: np.ndarray
    n_min: np.ndarray
    cur: np.ndarray
    nxt: np.ndarray
    nxt_feature: np.ndarray
    arc_len: np.ndarray
    win_start: np.ndarray
    win_len: np.ndarray


def _feature_arcs(free, err, kt, usable):
    """The minima of a stack of profiles ``free`` (m, n) and the arcs between them (:class:`_Arcs`)."""
    m, n = free.shape
    mins = _minima_stack(free, err, kt, usable=usable)
    n_min = np.array([len(x) for x in mins], dtype=np.int64)
    row = np.repeat(np.arange(m), n_min)
    first = np.r_[0, np.cumsum(n_min)[:-1]]
    number = np.arange(len(row)) - first[row]
    cur = np.concatenate(mins).astype(np.int64) if len(row) else np.zeros(0, dtype=np.int64)
    nxt = cur[first[row] + (number + 1) % n_min[row]] if len(row) else cur
    prv_feature = first[row] + (number - 1) % n_min[row] if len(row) else cur
    nxt_feature = first[row] + (number + 1) % n_min[row] if len(row) else cur
    # barrier between each minimum and the next one (going up the circle)
    g = np.where(np.isfinite(free), free, np.inf)
    # the walls of a candidate are the highest *sampled* bins towards its neighbours: an unsampled
    # stretch says only that the barrier there is at least as high as what was sampled around it
    # (counted as infinitely high, sparse bins on a barrier's slope beside unsampled ones passed
    # as deep minima)
    table = _RangeMax(np.where(np.isfinite(free), free, -np.inf))
    arc_len = _arc_length(n, cur, nxt)
    bar_idx, _ = table.arc(row, cur, np.maximum(arc_len, 1))
    bar_idx = np.where(arc_len > 0, bar_idx, cur)
    # window of each minimum: between the barriers on its two sides
    b_before = bar_idx[prv_feature] if len(row) else bar_idx
    win_len = _arc_length(n, b_before, bar_idx)
    win_start = np.where(win_len > 0, b_before, cur - 1)
    win_len = np.where(win_len > 0, win_len, 1)
    return _Arcs(g=g, row=row, first=first, number=number, n_min=n_min, cur=cur, nxt=nxt,
                 nxt_feature=nxt_feature, arc_len=arc_len, win_start=win_start, win_len=win_len)


def _bin_angle(stack, pos):
    """Angle (degrees on (-180, 180]) of a refined position in bins of the profiles of ``stack``."""
    return wrap_deg(stack.angle_deg[0] + np.asarray(pos) * stack.width_deg)


def _floors(stack, row, a, b=None):
    """The counting floor of a feature's error: the floors of the bins ``a`` and ``b`` of the rows
    ``row`` of ``stack`` combined (``b`` None: ``a`` alone; the same bin: 0, a difference of a
    value with itself); 0 where the stack has no floors (kernel profiles, reweighted ones)."""
    floor = getattr(stack, "err_floor_kj_mol", None)
    if floor is None or not len(row):
        return np.zeros(len(row))
    floor = np.nan_to_num(np.atleast_2d(floor), nan=0.0)
    fa = floor[row, a]
    if b is None:
        return fa
    return np.where(a == b, 0.0, np.hypot(fa, floor[row, b]))


def _at_least(spread, floor):
    """The bootstrap spread, at least ``floor`` where that is positive (a spread without enough
    resamples, NaN, then takes the floor; without a floor it stays as it is)."""
    return np.where(floor > 0, np.fmax(spread, floor), spread)


def _minimum_rows(stack, arcs, boot):
    """The minima table of a stack (see :func:`_features_stack`), and the values the barriers need:
    the refined minimum of each window and of each resample (NaN where missing), the lowest
    minimum of each profile and of each resample, the angle and the bin of each minimum, and the
    bin of each profile's lowest minimum.

    The error of a minimum's free energy is the bootstrap spread, at least the counting floors of
    its bin and of the lowest minimum's bin combined (:func:`_floors`)."""
    m = len(arcs.g)
    row, first = arcs.row, arcs.first
    pm, vm, _, km = _window_extremum(arcs.g[:, :, None], row, arcs.win_start, arcs.win_len, "min")
    pb, vb, okb, _ = _window_extremum(boot, row, arcs.win_start, arcs.win_len, "min")
    pm, vm, km = pm[0], vm[0], km[0]
    vb = np.where(okb, vb, np.nan)
    gmin_main = np.full(m, np.nan)
    gmin_boot = np.full((boot.shape[2], m), np.nan)
    ref_bin = np.zeros(m, dtype=np.int64)
    if len(row):  # lowest minimum of each profile (and of each resample, ignoring missing ones)
        has = arcs.n_min > 0
        gmin_main[has] = np.minimum.reduceat(vm, first[has])
        gmin_boot[:, has] = np.fmin.reduceat(vb, first[has], axis=1)
        order = np.lexsort((vm, row))
        lowest = order[np.r_[0, np.flatnonzero(np.diff(row[order])) + 1]]
        ref_bin[row[lowest]] = km[lowest]
    ang_min = _bin_angle(stack, pm)
    minima = {"row": row, "number": arcs.number + 1, "angle_deg": ang_min,
              "angle_err_deg": _spread_columns(_circular_deviation_deg(_bin_angle(stack, pb), ang_min)),
              "free_energy_kj_mol": vm - gmin_main[row],
              "free_energy_err_kj_mol": _at_least(_spread_columns(vb - gmin_boot[:, row]),
                                                  _floors(stack, row, km, ref_bin[row]))}
    return minima, (vm, vb, gmin_main, gmin_boot, ang_min, km, ref_bin)


def _barrier_rows(stack, arcs, boot, lows):
    """The barrier table of a stack (see :func:`_features_stack`); ``lows`` from :func:`_minimum_rows`.
    Errors are bootstrap spreads, at least the counting floors of the bins involved."""
    vm, vb, gmin_main, gmin_boot, ang_min, km, ref_bin = lows
    free = np.atleast_2d(stack.free_energy_kj_mol)
    n = free.shape[1]
    row, cur, nxt, nxt_feature, arc_len = arcs.row, arcs.cur, arcs.nxt, arcs.nxt_feature, arcs.arc_len
    sampled = arc_len > 0
    if len(row):
        arc_ok = _window_extremum(arcs.g[:, :, None], row, cur, np.maximum(arc_len, 1), "max")
        sampled &= arc_ok[2][0]
    pmx, vmx, kmx = ((arc_ok[0][0], arc_ok[1][0], arc_ok[3][0]) if len(row)
                     else (np.zeros(0), np.zeros(0), np.zeros(0, dtype=np.int64)))
    pbx, vbx, okbx, _ = _window_extremum(boot, row, cur, np.maximum(arc_len, 1), "max")
    vbx = np.where(okbx, vbx, np.nan)
    va, vbb = vb, vb[:, nxt_feature]
    nan = np.full(len(row), np.nan)
    ang_max = _bin_angle(stack, pmx)
    # an unsampled barrier is placed in the middle of its unsampled bins
    middle = np.zeros(len(row), dtype=np.int64)
    for f in np.flatnonzero(~sampled):
        arc = _arc(n, cur[f], nxt[f])
        bad = arc[~np.isfinite(free[row[f], arc])]
        middle[f] = bad[len(bad) // 2] if len(bad) else cur[f]

    def err(spread, other):
        return np.where(sampled, _at_least(spread, _floors(stack, row, kmx, other)), nan)

    return {
        "row": row, "number": arcs.number + 1, "from_minimum_deg": ang_min,
        "to_minimum_deg": ang_min[nxt_feature] if len(row) else nan,
        "angle_deg": np.where(sampled, ang_max, stack.angle_deg[middle]),
        "angle_err_deg": np.where(sampled, _spread_columns(_circular_deviation_deg(_bin_angle(stack, pbx), ang_max)),
                                  nan),
        "free_energy_kj_mol": np.where(sampled, vmx - gmin_main[row], nan),
        "free_energy_err_kj_mol": err(_spread_columns(vbx - gmin_boot[:, row]), ref_bin[row]),
        "height_from_first_kj_mol": np.where(sampled, vmx - vm, nan),
        "height_from_first_err_kj_mol": err(_spread_columns(vbx - va), km),
        "height_from_second_kj_mol": np.where(sampled, vmx - vm[nxt_feature] if len(row) else nan, nan),
        "height_from_second_err_kj_mol": err(_spread_columns(vbx - vbb), km[nxt_feature] if len(row) else km),
        "sampled": sampled}


def _features_stack(stack, kt):
    """Minima and barriers of a stack of histogram profiles (see :func:`profile_features`).

    A profile without any error (no sampled bin has one: its samples lie in fewer than two blocks,
    :data:`~dihedra.numerics.density.MIN_BOOTSTRAP_BLOCKS`) gives its minima and barriers no errors
    either (NaN), whatever its resamples (all alike) say.

    Returns
    -------
    minima, barriers : dict of ndarrays
        ``row`` (profile of the stack), ``number`` (1, 2, ... within the profile) and the fields
        of :data:`MINIMUM_FIELDS` / :data:`BARRIER_FIELDS`, profile by profile in angle order.
    """
    free = np.atleast_2d(stack.free_energy_kj_mol)
    err = np.atleast_2d(stack.free_energy_err_kj_mol)
    arcs = _feature_arcs(free, err, kt, np.atleast_2d(stack.boot_valid_fraction) >= MIN_RESAMPLED_FRACTION)
    boot = stack.boot_free_energy.reshape(free.shape + (-1,))
    minima, lows = _minimum_rows(stack, arcs, boot)
    barriers = _barrier_rows(stack, arcs, boot, lows)
    no_error = ~np.isfinite(np.where(np.atleast_2d(stack.sampled), err, np.nan)).any(axis=1)
    if no_error.any():
        for table in (minima, barriers):
            for name in [f for f in table if "_err_" in f]:
                table[name] = np.where(no_error[table["row"]], np.nan, table[name])
    return minima, barriers
