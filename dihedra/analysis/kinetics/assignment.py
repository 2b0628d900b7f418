"""State assignment: which state each frame of a torsion (or conformer) is in.

*Core sets* (default; Buchete & Hummer, J. Phys. Chem. B 112 (2008) 6057): every state's sector
shrunk by a margin on both sides is its core (:class:`CoreCodes`, the codes of
:meth:`dihedra.selection.schemes.StateScheme.core_codes` through a lookup table), and the
trajectory keeps the state of the last core it visited (:func:`fill_forward`). *Crisp*: the state
codes of the time series as they are, undefined frames filled forward the same way. Conformer
codes are the joint states of the torsions of a group (:func:`_joint_codes`).
"""

from __future__ import annotations

import numpy as np

from ...errors import DihedraError
from ...selection.schemes import NO_CORE
from ...trajectory.cores import CORE_MARGIN_DEG

#: Default core margin in degrees (each sector shrunk by this much on both sides); the trajectory
#: pass records the core membership of every frame for this margin (``cores.parquet``).
DEFAULT_CORE_MARGIN_DEG = CORE_MARGIN_DEG
#: The ways of assigning states (see the module notes of :mod:`dihedra.analysis.kinetics`).
ASSIGNMENTS = ("core", "crisp")


def fill_forward(codes, last=None):
    """Transition-based assignment: every frame takes the last assigned state seen so far.

    Parameters
    ----------
    codes : array-like of int, shape (n_frames,) or (n_frames, n_series)
        Core codes (state >= 0; negative = outside every core or undefined), or crisp codes.
    last : array-like of int, shape () or (n_series,), optional
        Assigned state of each series at the frame before ``codes[0]`` (the carry from the previous
        chunk of the same replica); -1 or ``None`` for the start of a trajectory.

    Returns
    -------
    ndarray of int64, same shape as ``codes``
        Assigned states; -1 before the first assigned frame.

    Examples
    --------
    >>> fill_forward([-2, 0, -2, -2, 1, -2, 0]).tolist()
    [-1, 0, 0, 0, 1, 1, 0]
    """
    c = np.asarray(codes)
    one_d = c.ndim == 1
    c2 = c.reshape(len(c), -1)
    first = None if last is None else np.broadcast_to(np.asarray(last, dtype=np.int64), (c2.shape[1],))
    out = _fill_rows(c2.T, first).T.astype(np.int64)
    return out.reshape(len(c)) if one_d else out


def _fill_rows(codes, last=None):
    """:func:`fill_forward` along axis 1 of (n_series, n_frames) codes; the codes unchanged where
    none is negative.

    Small codes (0..126, as states of a scheme) are filled with one running maximum of
    ``frame * 128 + code`` (int32), whose low 7 bits are the last assigned code; others by index.
    """
    c = np.asarray(codes)
    negative = c < 0
    if not negative.any():
        return c
    s, n = c.shape
    carry = np.full(s, -1, dtype=np.int64) if last is None else np.maximum(np.asarray(last, dtype=np.int64), -1)
    if c.max() < 127 and n < (1 << 23) and carry.max() < 127:
        key = np.where(negative, np.int32(-1), np.arange(n, dtype=np.int32)[None, :] * np.int32(128) + c)
        np.maximum.accumulate(key, axis=1, out=key)
        out = (key & 127).astype(np.int8)
        before = key < 0
    else:
        idx = np.where(negative, np.int32(-1), np.arange(n, dtype=np.int32)[None, :])
        np.maximum.accumulate(idx, axis=1, out=idx)
        out = np.take_along_axis(c, np.maximum(idx, 0), axis=1).astype(np.int64)
        before = idx < 0
    if before.any():
        out[before] = np.broadcast_to(carry.astype(out.dtype)[:, None], out.shape)[before]
    return out


def check_core_margin(scheme, margin_deg):
    """Refuse a margin that leaves some state of ``scheme`` without a core; return it as float."""
    try:
        margin = float(margin_deg)
    except (TypeError, ValueError):
        raise DihedraError(f"core margin must be a number of degrees; got {margin_deg!r}.") from None
    if not np.isfinite(margin) or margin < 0:
        raise DihedraError(f"core margin must be a non-negative number of degrees; got {margin_deg!r}.")
    widest = {}
    for part in scheme.coded_parts():   # every scheme of a set of schemes
        for state, start, end in part.merged_arcs():
            widest[state] = max(widest.get(state, 0.0), end - start)
    for state, width in widest.items():
        if width - 2 * margin <= 0:
            raise DihedraError(f"core margin {margin:g} deg leaves no core for state "
                               f"{scheme.labels[state]!r} (its widest sector is {width:g} deg); use "
                               f"--core-margin below {width / 2:g} or --assignment crisp.")
    return margin


class CoreCodes:
    """:meth:`StateScheme.core_codes` of a scheme and margin through a lookup table (same codes).

    ``core_codes`` takes a floating-point modulo per arc and value (about 130 ns a value);
    here a value's bin of 1/``per_degree`` degree gives its code from a table, and only values
    in bins next to a core edge (about 0.05 % of them) go through ``core_codes`` itself. NaN
    gives :data:`~dihedra.selection.schemes.UNDEFINED`.
    """

    def __init__(self, scheme, margin_deg, per_degree=100):
        from ...units import wrap_deg

        self.scheme, self.margin, self.per_degree = scheme, float(margin_deg), int(per_degree)
        n = 360 * self.per_degree
        centres = -180.0 + (np.arange(n) + 0.5) / self.per_degree
        table = np.empty(n + 1, dtype=np.int8)
        table[:n] = scheme.core_codes(centres, self.margin)
        ambiguous = np.zeros(n + 1, dtype=bool)
        ambiguous[n] = True  # 180 exactly
        for _, start, end in scheme.merged_arcs():
            for edge in (start + self.margin, end - self.margin):
                k = int(np.floor((float(wrap_deg(edge)) + 180.0) * self.per_degree))
                ambiguous[np.arange(k - 1, k + 2) % n] = True  # the edge's bin and its neighbours
        self.sentinel = np.int8(-128)
        table[ambiguous] = self.sentinel
        self.table = table

    def __call__(self, angles_deg):
        a = np.asarray(angles_deg)
        if a.dtype.kind != "f" or (a.size and not (a.min() > -180.0 and a.max() <= 180.0)):
            return self.scheme.core_codes(a, self.margin)  # not wrapped, or NaN: the exact function
        b = ((a + np.float32(180.0)) * np.float32(self.per_degree)).astype(np.int32)
        codes = self.table[np.minimum(b, len(self.table) - 1)]
        odd = codes == self.sentinel
        if odd.any():
            codes[odd] = self.scheme.core_codes(a[odd], self.margin)
        return codes


def codes_from_core_bits(states, in_core):
    """Core codes from the state codes and the core bits the pass recorded: the state where the
    angle was in its core, :data:`~dihedra.selection.schemes.NO_CORE` between cores, undefined
    (negative) states as they are.

    Examples
    --------
    >>> codes_from_core_bits(np.array([0, 1, 1, -1]), np.array([True, False, True, False])).tolist()
    [0, -2, 1, -1]
    """
    s = np.asarray(states)
    return np.where(np.asarray(in_core, dtype=bool) | (s < 0), s, NO_CORE).astype(np.int8)


def _core_table(scheme, margin):
    """The cores of the scheme's sectors, as recorded in ``kinetics.json``: [{state, from_deg,
    to_deg}] (degrees on (-180, 180]; a sector no wider than twice the margin has none)."""
    rows = []
    parts = scheme.coded_parts()
    for part in parts:
        for state, start, end in part.merged_arcs():
            if end - start > 2 * margin:
                lo, hi = (float((x + 180.0) % 360.0 - 180.0) for x in (start + margin, end - margin))
                rows.append({"state": scheme.labels[state], "from_deg": lo, "to_deg": hi,
                             **({"scheme": part.name} if len(parts) > 1 else {})})
    return rows


def _joint_codes(assigned, layout, n_states):
    """Conformer codes (groups, n_frames) from assigned torsion states (torsions, n_frames).

    ``layout`` lists (rows, members) per group size: member j of a group weighs n_states^j;
    a group with an unassigned torsion is unassigned (-1).
    """
    n = assigned.shape[1]
    out = np.empty((sum(len(rows) for rows, _ in layout), n), dtype=np.int64)
    for rows, members in layout:
        code = np.zeros((len(rows), n), dtype=np.int64)
        bad = np.zeros((len(rows), n), dtype=bool)
        for j in range(members.shape[1]):
            x = assigned[members[:, j]]
            code += x.astype(np.int64) * n_states ** j
            bad |= x < 0
        code[bad] = -1
        out[rows] = code
    return out


def _size_layout(members):
    """Groups of conformer members by size: [(rows, (g, k) member array)]."""
    sizes = np.array([len(m) for m in members])
    return [(np.flatnonzero(sizes == k), np.array([members[r] for r in np.flatnonzero(sizes == k)], dtype=np.int64))
            for k in np.unique(sizes)]
