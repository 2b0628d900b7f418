"""State dynamics: transitions, dwell times, rates, Markov timescales and Eyring barriers.

This module turns state time series (one discrete trajectory per torsion and replica) into the
kinetics of torsion states and conformers. Plain functions take arrays and return arrays or tidy
DataFrames; :func:`kinetics` reads a results folder chunk by chunk and writes four tables.

State assignment
----------------
*Transition-based (core-set) assignment* (default; Buchete & Hummer, J. Phys. Chem. B 112 (2008)
6057). Every state has a core: its sector of the scheme shrunk by a margin ``m`` on both sides
(:meth:`dihedra.selection.schemes.StateScheme.core_codes`). The trajectory keeps the state of the last core
it visited until it enters another core; frames before the first core visit are unassigned. Noise
inside a well and recrossings of the barrier that do not reach the other core are therefore not
transitions. The default margin is :data:`DEFAULT_CORE_MARGIN_DEG` = 20 degrees: with the
``anti-gauche`` scheme the cores are gauche+ (20, 100], gauche- [-100, -20) and anti beyond
+-140, that is 80-degree cores around the minima of an sp3-sp3 torsion, and 40-degree buffers
around the crisp boundaries (0 and +-120 degrees).

*Crisp assignment* uses the state codes of ``states.parquet`` as they are (every frame in the
state whose sector holds its angle). It counts every recrossing of a boundary and overestimates
rates; it is kept for comparison.

In both, a frame whose torsion is undefined (collinear atoms, NaN coordinates) keeps the state of
the frame before it. A new replica starts unassigned, so no transition ever joins two replicas.

Conformers are the joint states of the torsions of one group (molecule or residue), in chain order
(the ``group``/``order`` columns of ``torsions.csv``), built from the per-torsion assignments; a
conformer is unassigned until every torsion of the group is assigned.

Counts and rates
----------------
With frames ``dt`` apart, ``C_ij(tau)`` counts the pairs of frames ``(t, t + tau)`` of one discrete
trajectory in states ``i`` and ``j`` (sliding window, both assigned). Pooled results (per torsion
type, per conformer type) sum the counts of every trajectory of the pool (one per torsion, or per
group, and replica). The transitions are ``n_ij = C_ij(1)`` for ``i != j``, and the time at risk in
``i`` is ``T_i = dt sum_j C_ij(1)``. The rate constants are the maximum-likelihood estimates of a
Markov jump process,

    k_ij = n_ij / T_i,   se(k_ij) = sqrt(n_ij) / T_i,

with an exact 95 % Poisson interval (Garwood 1936) that stays meaningful when ``n_ij`` is 0. The
equilibrium populations the rates imply, ``pi`` with ``pi K = 0`` for the generator
``K_ij = k_ij``, ``K_ii = -sum_j k_ij``, are reported next to the directly counted fractions of
frames; a large difference means unconverged or non-stationary sampling.

Dwell times (lifetimes)
-----------------------
A segment is a maximal run of one state in one discrete trajectory; its dwell time is its number of
frames times ``dt``. The first segment of each trajectory (started before the first frame, or, with
core assignment, at the first core visit) and the last one (still running at the last frame) are
*right-censored*: their observed length is a lower bound of the dwell time. All segments enter the
Kaplan-Meier estimate of the survival function ``S(t)``: complete segments as events, censored ones
as survivors at their observed length (ties: events before censorings). ``mean_ps`` is the area
under ``S`` up to the longest observed segment (the restricted mean; flagged ``mean_restricted``
when that segment is censored, in which case it slightly underestimates), ``median_ps`` the first
time with ``S <= 1/2``, and ``ci_low_ps``/``ci_high_ps`` a 95 % interval of the mean: for pooled
rows (types, conformers) a percentile bootstrap that resamples segments (complete and censored)
with replacement; for single torsions, by default, ``mean exp(+-1.96 se / mean)`` with the
Kaplan-Meier variance of the restricted mean, ``se^2 = sum_i A_i^2 d_i / (Y_i (Y_i - d_i))``
(``A_i`` the area under ``S`` beyond duration ``i``, ``Y_i`` the segments at risk, ``d_i`` the
complete ones ending there; Klein & Moeschberger, *Survival Analysis*, 2003, sect. 4.5), because a
bootstrap of 1000 Kaplan-Meier curves per state of each of 10^4 torsions costs minutes
(``--torsion-bootstrap`` bootstraps them too; ``kinetics.json`` records which). The Markov reading,
``mean_from_rates_ps = T_i / sum_j n_ij = 1 / sum_j k_ij``, is reported next to it.

Markov state model
------------------
For each lag ``tau`` (``--lag``, in frames) the reversible maximum-likelihood transition matrix is
estimated from ``C(tau)`` on its largest strongly connected set, for all torsions at once: the
estimate solves ``X_ij = (c_ij + c_ji) / (q_i + q_j)`` with ``q_i = c_i / sum_j X_ij`` (Bowman et
al. 2009; Prinz et al. 2011, eq. 25), found by Newton's method on a convex function of ``ln q``
(:func:`reversible_transition_matrices`; the tests compare it with deeptime). Implied timescales
``t_k(tau) = -tau / ln |lambda_k(tau)|`` (eigenvalues ``lambda_1 = 1 > |lambda_2| >= ...``) become
flat in ``tau`` once the model is Markovian; choose ``tau`` there. Mean first-passage times solve
``m_i = tau + sum_{k != j} T_ik(tau) m_k`` for target ``j``. For a two-state chain the timescale is
``-tau / ln(1 - p12 - p21)``.

Computation
-----------
The time series is read once, in chunks of about ``CHUNK_VALUES`` values, by a few threads that
each take whole molecules' columns (Parquet reads only the columns asked for; NumPy and Arrow
release the interpreter lock). For every lag one ``bincount`` per chunk adds the pairs of all
torsions to dense ``(torsion, from, to)`` counts; segments are found from the changes of state.
Everything after that is array arithmetic over all torsions at once (rates, populations,
Kaplan-Meier statistics, Markov models) and the tables are built column by column, so the cost
grows with the number of samples, not with a per-torsion loop: 1.2 x 10^8 samples (15,000
torsions x 8,000 frames) take 10-17 s on two cores shared with other jobs (docs/performance.md).

Transition-state theory
-----------------------
The Eyring equation with transmission coefficient ``kappa = 1`` (IUPAC Gold Book),

    k = (k_B T / h) exp(-dG / (R T)),

turns each rate into a free-energy barrier ``dG = -R T ln(k h / (k_B T))`` (constants CODATA 2018,
:mod:`dihedra.units`), shown next to the barrier of the free-energy profile (``barriers.csv``
written by ``dihedra profile``) when the folder has one. TST counts every crossing of the barrier
top as a reaction, so it gives an upper bound on the rate: an observed rate below the TST rate of
the profile barrier is expected (recrossings, friction). The prefactor ``k_B T / h`` is not the
torsional attempt frequency either, so the two barriers are a consistency check, not two
measurements of one quantity.

Example
-------
>>> from dihedra.analysis.kinetics import analyse_state_series
>>> import numpy as np
>>> traj = np.array([0, 0, 0, 1, 1, 0, 0, 0, 1, 1, 1])
>>> tables = analyse_state_series([traj], ["a", "b"], dt_ps=1.0, lags=[1])
>>> tables["transitions"][["from_state", "to_state", "count"]].values.tolist()
[['a', 'b', 2], ['b', 'a', 1]]

References
----------
N.-V. Buchete & G. Hummer, J. Phys. Chem. B 112 (2008) 6057 (core sets, transition-based
assignment). E. L. Kaplan & P. Meier, J. Am. Stat. Assoc. 53 (1958) 457. J. P. Klein & M. L.
Moeschberger, Survival Analysis, 2nd ed., Springer (2003). G. R. Bowman et al., J. Chem. Phys. 131
(2009) 124101. J.-H. Prinz et al., J. Chem. Phys. 134 (2011) 174105 (Markov models, reversible
estimator, implied timescales). H. Eyring, J. Chem. Phys. 3
(1935) 107. F. Garwood, Biometrika 28 (1936) 437.
"""

from __future__ import annotations

import functools
import os
import time
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from ..errors import DihedraError, InputFileError, one_of
from ..io.series import ParquetSeries
from ..units import H_J_S, K_B_J_PER_K, R_KJ_PER_MOL_K, check_temperature

#: Default core margin in degrees (each sector shrunk by this much on both sides).
DEFAULT_CORE_MARGIN_DEG = 20.0
#: Default lags of the Markov analysis, in frames.
DEFAULT_LAGS = (1, 2, 5, 10, 20, 50)
#: Default number of bootstrap samples for dwell-time intervals.
DEFAULT_BOOTSTRAP = 1000
#: At most this many implied timescales are reported per model.
MAX_TIMESCALES = 10
#: Mean first-passage times are computed for models with at most this many connected states.
MAX_MFPT_STATES = 60
#: Work on about this many (frame, torsion) values at a time when streaming a folder.
CHUNK_VALUES = 8_000_000
#: The median dwell time is the first with S <= 1/2; products of (1 - d/Y) that are exactly 1/2
#: may round to either side, so the test allows a relative 1e-9.
HALF_SURVIVAL = 0.5 * (1.0 + 1e-9)
#: Two-sided 95 % point of the standard normal distribution.
Z_95 = 1.959963984540054

ASSIGNMENTS = ("core", "crisp")
OUTPUT_FILES = ("transitions.csv", "lifetimes.csv", "timescales.csv", "mfpt.csv", "kinetics.json")

TST_CAUTION = ("transition-state theory gives an upper bound on the rate (every crossing of the barrier top "
               "counts, recrossings are ignored), so observed rates below the Eyring rate of the profile "
               "barrier are expected; and k_B T / h is not the attempt frequency of a torsion, so read the "
               "Eyring barrier of a rate next to the profile barrier as a consistency check, not as a "
               "measurement of the barrier.")


# ---------------------------------------------------------------------------------------------
# Assignment
# ---------------------------------------------------------------------------------------------
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
    for state, start, end in scheme.merged_arcs():
        widest[state] = max(widest.get(state, 0.0), end - start)
    for state, width in widest.items():
        if width - 2 * margin <= 0:
            raise DihedraError(f"core margin {margin:g} deg leaves no core for state "
                               f"{scheme.labels[state]!r} (its widest sector is {width:g} deg); use "
                               f"--core-margin below {width / 2:g} or --assignment crisp.")
    return margin


# ---------------------------------------------------------------------------------------------
# Streaming tally of pair counts and segments
# ---------------------------------------------------------------------------------------------
#: Pair counts are kept as one dense (rows, v + 1, v + 1) array per lag when it has at most this
#: many cells (v states, one more for "unassigned"); otherwise as sparse rows.
DENSE_PAIR_CELLS = 1 << 24
#: Temporary arrays of the dense pair count hold about this many values (4 MB: they stay in the cache).
_CACHE_VALUES = 1 << 19


class _SparseCounts:
    """Counts of integer rows (e.g. series, from, to), merged lazily."""

    def __init__(self, width):
        self.width = width
        self._rows = [np.empty((0, width), dtype=np.int64)]
        self._counts = [np.empty(0, dtype=np.int64)]
        self._pending = 0

    def add(self, rows, counts):
        if len(rows):
            self._rows.append(np.asarray(rows, dtype=np.int64).reshape(-1, self.width))
            self._counts.append(np.asarray(counts, dtype=np.int64))
            self._pending += len(rows)
            if self._pending > 2_000_000:
                self._compact()

    def _compact(self):
        rows, counts = _merge_rows(np.vstack(self._rows), np.concatenate(self._counts))
        self._rows, self._counts, self._pending = [rows], [counts], 0

    def result(self):
        """Unique rows (sorted) and their summed counts."""
        self._compact()
        return self._rows[0], self._counts[0]


def _row_keys(rows):
    """One int64 key per row (mixed radix, order-preserving), or None when the columns do not fit."""
    if len(rows) == 0 or rows.min() < 0:
        return None, None
    radix = [int(m) + 1 for m in rows.max(axis=0)]
    if float(np.prod([float(r) for r in radix])) >= 2.0 ** 62:
        return None, None
    key = np.zeros(len(rows), dtype=np.int64)
    for col, r in zip(rows.T, radix):
        key = key * r + col
    return key, radix


def _merge_rows(rows, counts):
    """Unique rows (sorted) and their summed counts."""
    if len(rows) == 0:
        return rows.reshape(0, rows.shape[1]), counts
    key, radix = _row_keys(rows)
    if key is None:
        uniq, inv = np.unique(rows, axis=0, return_inverse=True)
        return uniq, np.bincount(inv.reshape(-1), weights=counts, minlength=len(uniq)).astype(np.int64)
    uniq, inv = np.unique(key, return_inverse=True)
    summed = np.bincount(inv, weights=counts, minlength=len(uniq)).astype(np.int64)
    out, rem = [], uniq
    for r in reversed(radix):
        out.append(rem % r)
        rem = rem // r
    return np.column_stack(out[::-1]), summed


def _count_rows(columns):
    """Unique rows of the stacked 1-D int arrays ``columns`` and their counts."""
    if len(columns[0]) == 0:
        return np.empty((0, len(columns)), dtype=np.int64), np.empty(0, dtype=np.int64)
    return _merge_rows(np.column_stack(columns).astype(np.int64, copy=False), np.ones(len(columns[0]), dtype=np.int64))


class StateTally:
    """Streaming counts of discrete trajectories: lagged pair counts and dwell segments.

    Feed the assigned states of one replica chunk by chunk with :meth:`add`, and call
    :meth:`end_replica` at the end of every replica (which resets the carried state, so nothing
    joins two replicas). Memory holds only the counts and ``max(lags)`` frames per series.

    Parameters
    ----------
    n_series : int
        Number of discrete trajectories fed side by side (torsions, or conformer groups).
    lags : sequence of int
        Lags in frames of the Markov models (:attr:`lags_requested`); lag 1 is always counted too.
    n_states : int, optional
        Number of states (codes 0 .. n_states - 1); given, the pair counts are dense arrays
        (:attr:`pair_matrices_`), counted with one ``bincount`` per lag and chunk.
    pool : array-like of int (n_series,), optional
        Row of each series in the counts: series with the same row are tallied together (their
        segments are still found series by series). Default: one row per series.

    Attributes
    ----------
    pairs_ : dict of lag -> (ndarray (n_rows, 3), ndarray (n_rows,))
        Rows (row, from_state, to_state) and their counts (after :meth:`finish`).
    pair_matrices_ : dict of lag -> ndarray (n_rows, n_states, n_states), or None
        The same as dense arrays (when ``n_states`` was given and small enough).
    segments_ : (ndarray (n_rows, 4), ndarray (n_rows,))
        Rows (row, state, length_frames, censored) and the number of such segments.
    """

    def __init__(self, n_series, lags=(1,), n_states=None, pool=None):
        self.n_series = int(n_series)
        self.lags_requested = sorted({int(x) for x in lags})
        self.lags = sorted({1} | set(self.lags_requested))
        self._series_row = (np.arange(self.n_series, dtype=np.int64) if pool is None
                            else np.asarray(pool, dtype=np.int64).reshape(self.n_series))
        self.n_rows = int(self._series_row.max()) + 1 if self.n_series else 0
        self.n_states = None if n_states is None else int(n_states)
        width = None if self.n_states is None else self.n_states + 1
        self._dense = width is not None and self.n_rows * width * width <= DENSE_PAIR_CELLS
        if self._dense:
            self._pair_counts = {lag: np.zeros(self.n_rows * width * width, dtype=np.int64) for lag in self.lags}
        else:
            self._pairs = {lag: _SparseCounts(3) for lag in self.lags}
        self._segments = _SparseCounts(4)
        self._rows = np.arange(self.n_series, dtype=np.int64)
        self._reset()

    def _reset(self):
        s, lmax = self.n_series, max(self.lags)
        self._state = np.full(s, -1, dtype=np.int64)
        self._run = np.zeros(s, dtype=np.int64)
        self._first = np.ones(s, dtype=bool)
        self._tail = np.full((s, lmax), -1, dtype=np.int64)

    @property
    def last_state(self):
        """Assigned state of every series at the last frame fed (-1 if none yet)."""
        return self._state.copy()

    def add(self, assigned):
        """Add consecutive frames of the current replica.

        Parameters
        ----------
        assigned : ndarray of int, shape (n_frames, n_series)
            Assigned states (>= 0) or -1 (unassigned), e.g. from :func:`fill_forward`.
        """
        x = np.asarray(assigned)
        if x.ndim != 2 or x.shape[1] != self.n_series:
            raise ValueError(f"expected (n_frames, {self.n_series}) states, got shape {x.shape}")
        self.add_series(np.ascontiguousarray(x.T))

    def add_series(self, assigned):
        """:meth:`add` for states laid out series by series: shape (n_series, n_frames)."""
        xt = np.asarray(assigned)
        n = xt.shape[1]
        if n == 0:
            return
        lmax = self._tail.shape[1]
        if not self._dense:
            full = np.concatenate([self._tail, xt.astype(np.int64, copy=False)], axis=1)
            for lag in self.lags:
                a = full[:, lmax - lag:lmax - lag + n]
                ok = (a >= 0) & (xt >= 0)
                rows = np.broadcast_to(self._series_row[:, None], xt.shape)[ok]
                self._pairs[lag].add(*_count_rows([rows, a[ok], xt[ok].astype(np.int64)]))
            self._tail = full[:, -lmax:].copy()
        else:  # a few series at a time, so that the temporary keys stay in the cache
            if xt.max() >= self.n_states:
                raise ValueError(f"state code {int(xt.max())} is not below n_states = {self.n_states}")
            step = max(1, _CACHE_VALUES // (n + lmax))
            for lo in range(0, self.n_series, step):
                self._count_dense(xt[lo:lo + step], lo)
        self._add_segments(xt)

    def _count_dense(self, xt, lo):
        """Dense pair counts of the series lo, lo + 1, ... (one bincount per lag)."""
        n, lmax = xt.shape[1], self._tail.shape[1]
        hi = lo + len(xt)
        w = self.n_states + 1
        shifted = np.concatenate([self._tail[lo:hi], xt], axis=1) + 1  # int64; 0 = unassigned
        self._tail[lo:hi] = shifted[:, -lmax:] - 1
        rows = self._series_row[lo:hi]
        first, last = int(rows.min()), int(rows.max())
        base = ((rows - first) * (w * w))[:, None] + shifted[:, lmax:]
        np.multiply(shifted, w, out=shifted)
        cells = slice(first * w * w, (last + 1) * w * w)
        for lag in self.lags:
            key = base + shifted[:, lmax - lag:lmax - lag + n]
            self._pair_counts[lag][cells] += np.bincount(key.ravel(), minlength=(last - first + 1) * w * w)

    def _add_segments(self, xt):
        n = xt.shape[1]
        step = max(1, _CACHE_VALUES // (n + 1))
        found = []
        for lo in range(0, self.n_series, step):  # a few series at a time (the temporaries stay in the cache)
            prev = np.concatenate([self._state[lo:lo + step, None], xt[lo:lo + step]], axis=1)
            r, t = np.nonzero(prev[:, 1:] != prev[:, :-1])  # change at frame t (row-major order)
            found.append((r + lo, t, prev[r, t]))
        rows, ts, from_state = (np.concatenate(x).astype(np.int64, copy=False) for x in zip(*found))
        if len(rows):
            same = np.r_[False, rows[1:] == rows[:-1]]
            start = np.where(same, np.r_[0, ts[:-1]], -self._run[rows])
            length = ts - start
            first = np.where(same, np.r_[-1, from_state[:-1]] < 0, self._first[rows])
            keep = from_state >= 0
            self._segments.add(*_count_rows([self._series_row[rows[keep]], from_state[keep], length[keep],
                                             first[keep].astype(np.int64)]))
            last = np.r_[rows[1:] != rows[:-1], True]
            lr = rows[last]
            self._run += n
            self._run[lr] = n - ts[last]
            self._first[lr] = from_state[last] < 0
        else:
            self._run += n
        self._state = xt[:, -1].astype(np.int64)

    def end_replica(self):
        """Close the open segments (censored) and forget the carried state."""
        open_ = self._state >= 0
        if open_.any():
            rows = self._rows[open_]
            self._segments.add(*_count_rows([self._series_row[rows], self._state[open_], self._run[open_],
                                             np.ones(len(rows), dtype=np.int64)]))
        self._reset()

    def finish(self):
        """End the last replica and return ``self`` with :attr:`pairs_` and :attr:`segments_`."""
        self.end_replica()
        self.pair_matrices_ = None
        if self._dense:
            w = self.n_states + 1
            self.pair_matrices_ = {lag: c.reshape(self.n_rows, w, w)[:, 1:, 1:] for lag, c in self._pair_counts.items()}
            self.pairs_ = {}
            for lag, mat in self.pair_matrices_.items():
                nz = np.nonzero(mat)
                self.pairs_[lag] = (np.column_stack(nz).astype(np.int64), mat[nz])
        else:
            self.pairs_ = {lag: c.result() for lag, c in self._pairs.items()}
        self.segments_ = self._segments.result()
        return self


def transition_counts(dtrajs, lag=1, n_states=None):
    """Sliding-window count matrix ``C_ij(lag)`` of discrete trajectories (-1 = unassigned).

    Each trajectory counts on its own; none is joined to the next.

    Returns
    -------
    ndarray (n_states, n_states) of int64
    """
    dtrajs = [np.asarray(d, dtype=np.int64) for d in dtrajs]
    n = n_states or (max((int(d.max()) for d in dtrajs if len(d)), default=-1) + 1)
    c = np.zeros((n, n), dtype=np.int64)
    for d in dtrajs:
        a, b = d[:-lag] if lag else d, d[lag:]
        ok = (a >= 0) & (b >= 0)
        np.add.at(c, (a[ok], b[ok]), 1)
    return c


# ---------------------------------------------------------------------------------------------
# Rates, dwell times, Markov models, Eyring
# ---------------------------------------------------------------------------------------------
def rates_from_counts(counts_lag1, dt_ps):
    """Rate constants of a Markov jump process from lag-1 counts.

    Parameters
    ----------
    counts_lag1 : ndarray (..., n, n)
        ``C_ij(1)`` including the diagonal (frames that stay); a stack of matrices is allowed.
    dt_ps : float
        Time between frames in ps.

    Returns
    -------
    dict with ``rate_per_ps``, ``rate_err_per_ps``, ``rate_ci_low_per_ps``, ``rate_ci_high_per_ps``
    (..., n, n) arrays (diagonal 0; NaN for rows never visited) and ``time_ps`` (..., n), the time
    at risk.
    """
    c = np.asarray(counts_lag1, dtype=float)
    t = c.sum(axis=-1) * float(dt_ps)
    n = np.where(np.eye(c.shape[-1], dtype=bool), 0.0, c)
    out = _rate_statistics(n, np.broadcast_to(t[..., :, None], n.shape))
    for key in ("rate_per_ps", "rate_err_per_ps", "rate_ci_low_per_ps", "rate_ci_high_per_ps"):
        a = np.where(np.eye(c.shape[-1], dtype=bool), 0.0, out[key])
        out[key] = np.where((t > 0)[..., :, None], a, np.nan)
    out["time_ps"] = t
    return out


def _rate_statistics(n, t):
    """k = n / T, its standard error sqrt(n) / T and the exact 95 % Poisson interval (Garwood):
    chi2_{0.025}(2 n) / 2 and chi2_{0.975}(2 n + 2) / 2 events, that is the inverse regularised
    incomplete gamma function at n and n + 1."""
    from scipy.special import gammaincinv

    n = np.asarray(n, dtype=float)
    with np.errstate(invalid="ignore", divide="ignore"):
        tt = np.where(t > 0, t, np.nan)
        return {"rate_per_ps": n / tt, "rate_err_per_ps": np.sqrt(n) / tt,
                "rate_ci_low_per_ps": np.where(n > 0, gammaincinv(np.maximum(n, 1.0), 0.025), 0.0) / tt,
                "rate_ci_high_per_ps": gammaincinv(n + 1.0, 0.975) / tt}


def _reachability(adjacency):
    """Transitive closure (i reaches j, i reaches i) of a stack of directed graphs (p, n, n)."""
    p, n, _ = adjacency.shape
    reach = adjacency | np.eye(n, dtype=bool)
    for _ in range(max(1, int(np.ceil(np.log2(max(n, 2)))))):
        reach = np.matmul(reach.astype(np.float32), reach.astype(np.float32)) > 0
    return reach


def _stationary_stack(rate_matrix, visited):
    """:func:`stationary_from_rates` for a stack, over the visited states of each matrix.

    Parameters
    ----------
    rate_matrix : ndarray (p, n, n)
        Rates (NaN taken as 0); unvisited states have no rates in or out.
    visited : ndarray of bool (p, n)

    Returns
    -------
    ndarray (p, n)
        Populations (0 for unvisited states; NaN for all states of a matrix whose visited states
        are not strongly connected).
    """
    k = np.nan_to_num(np.asarray(rate_matrix, dtype=float))
    p, n, _ = k.shape
    vis = np.asarray(visited, dtype=bool)
    both = vis[:, :, None] & vis[:, None, :]
    connected = (_reachability(k > 0) | ~both).all(axis=(1, 2))
    q = k - np.eye(n) * k.sum(axis=2)[:, :, None]
    m = np.swapaxes(q, 1, 2).copy()
    unvisited = ~vis
    m[unvisited] = 0.0
    m = m + np.eye(n) * unvisited[:, :, None]
    first = np.argmax(vis, axis=1)
    rows = np.arange(p)
    m[rows, first] = vis.astype(float)  # normalisation over the visited states replaces one equation
    rhs = np.zeros((p, n))
    rhs[rows, first] = 1.0
    good = connected & vis.any(axis=1)
    m[~good] = np.eye(n)
    pi = np.linalg.solve(m, rhs[..., None])[..., 0]
    pi = np.clip(pi, 0.0, None)
    with np.errstate(invalid="ignore", divide="ignore"):
        pi = pi / pi.sum(axis=1, keepdims=True)
    pi[~good] = np.nan
    return pi


def stationary_from_rates(rate_matrix):
    """Equilibrium populations ``pi`` with ``pi K = 0`` of the generator built from rates.

    Returns NaN for every state when the rate graph is not strongly connected (some state is
    never left or never entered), since the populations are then not fixed by the rates.
    """
    k = np.asarray(rate_matrix, dtype=float)
    if len(k) == 0:
        return np.empty(0)
    return _stationary_stack(k[None], np.ones((1, len(k)), dtype=bool))[0]


def kaplan_meier(durations, events, censored):
    """Kaplan-Meier survival of dwell times with right-censoring; vectorised over rows.

    Parameters
    ----------
    durations : ndarray (K,)
        Distinct durations, increasing.
    events, censored : ndarray (..., K)
        Number of complete and of censored segments at each duration.

    Returns
    -------
    mean, median : ndarrays of shape ``events.shape[:-1]``
        Restricted mean (area under S up to the last duration) and median (NaN if S never reaches
        1/2).
    """
    d = np.asarray(durations, dtype=float)
    e = np.asarray(events, dtype=float)
    c = np.asarray(censored, dtype=float)
    total = e + c
    at_risk = np.cumsum(total[..., ::-1], axis=-1)[..., ::-1]
    with np.errstate(invalid="ignore", divide="ignore"):
        h = np.where(at_risk > 0, e / at_risk, 0.0)
    s = np.cumprod(1.0 - h, axis=-1)
    s_before = np.concatenate([np.ones(s.shape[:-1] + (1,)), s[..., :-1]], axis=-1)
    widths = np.diff(np.r_[0.0, d])
    mean = np.sum(s_before * widths, axis=-1)
    below = s <= HALF_SURVIVAL
    idx = np.argmax(below, axis=-1)
    median = np.where(below.any(axis=-1), d[idx] if d.size else np.nan, np.nan)
    empty = total.sum(axis=-1) == 0
    return np.where(empty, np.nan, mean), np.where(empty, np.nan, median)


def _segmented_sum(values, starts):
    """Sums of ``values`` over consecutive groups that begin at ``starts``."""
    return np.add.reduceat(values, starts) if len(values) else np.zeros(0)


def kaplan_meier_groups(group_start, durations, events, censored):
    """Kaplan-Meier statistics of many groups of dwell times at once.

    Parameters
    ----------
    group_start : ndarray of int (g,)
        Index of the first row of each group (groups are consecutive and non-empty).
    durations : ndarray (r,)
        Distinct durations, increasing within each group.
    events, censored : ndarray (r,)
        Complete and censored segments at each duration.

    Returns
    -------
    dict of (g,) arrays: ``mean`` (restricted mean: area under S up to the longest duration),
    ``median`` (first duration with S <= 1/2, else NaN), ``mean_se`` (standard error of the
    restricted mean from its Kaplan-Meier variance, sum_i A_i^2 d_i / (Y_i (Y_i - d_i)) with A_i
    the area under S beyond duration i, Y_i the segments at risk and d_i the complete ones there;
    Klein & Moeschberger, Survival Analysis (2003), section 4.5), ``restricted`` (the longest
    segment is censored).
    """
    d = np.asarray(durations, dtype=float)
    e = np.asarray(events, dtype=float)
    c = np.asarray(censored, dtype=float)
    starts = np.asarray(group_start, dtype=np.int64)
    n_rows = len(d)
    group = np.repeat(np.arange(len(starts)), np.diff(np.r_[starts, n_rows]))
    first = np.zeros(n_rows, dtype=bool)
    first[starts] = True
    total = e + c
    cum = np.cumsum(total)
    before = cum - total - (cum - total)[starts][group]  # segments of the group with a shorter duration
    at_risk = _segmented_sum(total, starts)[group] - before
    with np.errstate(invalid="ignore", divide="ignore"):
        h = np.where(at_risk > 0, e / at_risk, 0.0)
        log_keep = np.log1p(-np.minimum(h, 1.0))
    dead = h >= 1.0
    log_cum = np.cumsum(np.where(dead, 0.0, log_keep))
    log_cum -= (log_cum - np.where(dead, 0.0, log_keep))[starts][group]
    dead_cum = np.cumsum(dead)
    dead_cum -= (dead_cum - dead)[starts][group]
    surv = np.where(dead_cum > 0, 0.0, np.exp(log_cum))
    surv_before = np.where(first, 1.0, np.r_[1.0, surv[:-1]])
    width = d - np.where(first, 0.0, np.r_[0.0, d[:-1]])
    area = surv_before * width
    mean = _segmented_sum(area, starts)
    area_cum = np.cumsum(area)
    area_cum -= (area_cum - area)[starts][group]
    beyond = mean[group] - area_cum  # A_i: area under S from duration i to the longest one
    with np.errstate(invalid="ignore", divide="ignore"):
        term = np.where(at_risk > e, beyond ** 2 * e / (at_risk * (at_risk - e)), 0.0)
    below = np.where(surv <= HALF_SURVIVAL, np.arange(n_rows), n_rows)
    first_below = np.minimum.reduceat(below, starts) if n_rows else np.zeros(0, dtype=np.int64)
    median = np.where(first_below < n_rows, d[np.minimum(first_below, max(n_rows - 1, 0))], np.nan)
    last = np.r_[starts[1:], n_rows] - 1
    return {"mean": mean, "median": median, "mean_se": np.sqrt(_segmented_sum(term, starts)),
            "restricted": c[last] > 0}


def dwell_statistics(lengths, censored, counts=None, dt_ps=1.0, n_bootstrap=DEFAULT_BOOTSTRAP,
                     rng=None):
    """Dwell-time statistics of one state from its segments.

    Parameters
    ----------
    lengths : array-like of int
        Segment lengths in frames.
    censored : array-like of bool
        Whether each segment is censored (first or last segment of a trajectory).
    counts : array-like of int, optional
        Multiplicity of each (length, censored) row (default 1).
    dt_ps : float
        Time between frames.
    n_bootstrap : int
        Bootstrap samples for the 95 % interval of the mean (0 = none).
    rng : numpy.random.Generator, optional

    Returns
    -------
    dict with mean_ps, median_ps, ci_low_ps, ci_high_ps, n_segments (complete), n_censored,
    mean_restricted (the longest segment is censored).
    """
    lengths = np.asarray(lengths, dtype=np.int64)
    cens = np.asarray(censored, dtype=bool)
    counts = np.ones(len(lengths), dtype=np.int64) if counts is None else np.asarray(counts, dtype=np.int64)
    out = {"mean_ps": np.nan, "median_ps": np.nan, "ci_low_ps": np.nan, "ci_high_ps": np.nan,
           "n_segments": int(counts[~cens].sum()), "n_censored": int(counts[cens].sum()),
           "mean_restricted": False}
    if counts.sum() == 0:
        return out
    d, inv = np.unique(lengths, return_inverse=True)
    ev = np.bincount(inv, weights=np.where(cens, 0, counts), minlength=len(d))
    ce = np.bincount(inv, weights=np.where(cens, counts, 0), minlength=len(d))
    mean, median = kaplan_meier(d, ev, ce)
    out.update(mean_ps=float(mean) * dt_ps, median_ps=float(median) * dt_ps,
               mean_restricted=bool(ce[-1] > 0))
    if n_bootstrap and ev.sum() > 0:
        out["ci_low_ps"], out["ci_high_ps"] = (x * dt_ps for x in _bootstrap_mean_interval(d, ev, ce, n_bootstrap,
                                                                                          rng or np.random.default_rng(0)))
    return out


def _bootstrap_mean_interval(durations, events, censored, n_bootstrap, rng):
    """95 % percentile bootstrap interval (frames) of the restricted mean, resampling segments."""
    k = len(durations)
    draws = _resample_counts(np.r_[events, censored].astype(np.int64), int(n_bootstrap), rng)
    boot, _ = kaplan_meier(durations, draws[:, :k], draws[:, k:])
    low, high = np.percentile(boot, [2.5, 97.5])
    return float(low), float(high)


def _resample_counts(cell_counts, n_samples, rng):
    """Bootstrap resamples of items grouped in cells: (n_samples, n_cells) counts, each row summing to
    the number of items (multinomial; by drawing item indices when there are few items)."""
    total = int(cell_counts.sum())
    n_cells = len(cell_counts)
    if total <= 4 * n_cells:
        items = np.repeat(np.arange(n_cells), cell_counts)
        picks = items[rng.integers(0, total, size=(n_samples, total))]
        flat = (picks + np.arange(n_samples)[:, None] * n_cells).ravel()
        return np.bincount(flat, minlength=n_samples * n_cells).reshape(n_samples, n_cells)
    return rng.multinomial(total, cell_counts / total, size=n_samples)
#: Reversible maximum-likelihood estimator: Newton steps stop when every component of the gradient
#: is below this fraction of the number of counts.
MLE_TOLERANCE = 1e-12
#: ... or after this many steps.
MLE_MAX_STEPS = 200


def _mle_objective(u, off, lin):
    """Convex objective of the reversible MLE in u = ln(c_i / x_i) (see reversible_transition_matrices)."""
    lse = np.logaddexp(u[:, :, None], u[:, None, :])
    return 0.5 * (off * lse).sum(axis=(1, 2)) + (lin * u).sum(axis=1)


def reversible_transition_matrices(counts, tol=MLE_TOLERANCE, max_steps=MLE_MAX_STEPS):
    """Reversible maximum-likelihood transition matrices of a stack of count matrices.

    The estimate maximises sum_ij c_ij ln T_ij under detailed balance pi_i T_ij = pi_j T_ji. Its
    symmetric flux matrix X = diag(pi) T satisfies X_ij = (c_ij + c_ji) / (q_i + q_j) with
    q_i = c_i / x_i, c_i = sum_j c_ij, x_i = sum_j X_ij (Bowman et al., J. Chem. Phys. 131 (2009)
    124101; Prinz et al., J. Chem. Phys. 134 (2011) 174105, eq. 25). The consistency condition
    x_i = c_i / q_i is the gradient of a convex function of u = ln q,

        Phi(u) = sum_{i<j} s_ij ln(e^u_i + e^u_j) + sum_i (c_ii - c_i) u_i,   s = C + C^T,

    which is minimised here by Newton's method with a backtracking line search, for all matrices
    at once (instead of the slowly converging self-consistent iteration). Then T_ij = X_ij / x_i
    and pi = x / sum(x).

    Parameters
    ----------
    counts : ndarray (p, n, n)
        Count matrices, each strongly connected (every state left and entered).

    Returns
    -------
    transition_matrix : ndarray (p, n, n)
    stationary : ndarray (p, n)
    """
    c = np.asarray(counts, dtype=float)
    p, n, _ = c.shape
    s = c + np.swapaxes(c, 1, 2)
    eye = np.eye(n, dtype=bool)
    off = np.where(eye, 0.0, s)
    rows = c.sum(axis=2)
    lin = np.diagonal(c, axis1=1, axis2=2) - rows
    u = np.log(rows / s.sum(axis=2))  # first guess: x_i = sum_j s_ij
    u -= u[:, -1:]
    scale = tol * c.sum(axis=(1, 2))
    todo = np.arange(p)
    for _ in range(int(max_steps)):
        if not len(todo) or n < 2:
            break
        ut, ot, lt = u[todo], off[todo], lin[todo]
        sig = 0.5 * (1.0 + np.tanh(0.5 * (ut[:, :, None] - ut[:, None, :])))
        grad = (ot * sig).sum(axis=2) + lt
        done = np.abs(grad).max(axis=1) <= scale[todo]
        w = ot * sig * (1.0 - sig)
        hess = np.where(eye, w.sum(axis=2)[:, :, None], -w)
        step = np.zeros_like(ut)
        step[:, :-1] = np.linalg.solve(hess[:, :-1, :-1], -grad[:, :-1, None])[..., 0]
        alpha = np.ones(len(todo))
        f0 = _mle_objective(ut, ot, lt)
        slope = (grad * step).sum(axis=1)
        slack = 1e-13 * (np.abs(f0) + 1.0)  # changes below round-off of the objective do not count
        for _ in range(30):  # backtracking (Armijo)
            trial = ut + alpha[:, None] * step
            worse = _mle_objective(trial, ot, lt) > f0 + 1e-4 * alpha * slope + slack
            if not worse.any():
                break
            alpha = np.where(worse, 0.5 * alpha, alpha)
        u[todo] = np.where(done[:, None], ut, ut + alpha[:, None] * step)
        todo = todo[~done]
    q = np.exp(u)
    flux = s / (q[:, :, None] + q[:, None, :])
    x = flux.sum(axis=2)
    return flux / x[:, :, None], x / x.sum(axis=1, keepdims=True)


def _implied_timescales(transition, stationary, lag_frames, k):
    """Implied timescales (frames) of reversible transition matrices, slowest first: (p, k), NaN-padded.

    The eigenvalues are those of the symmetric matrix D^1/2 T D^-1/2 (D = diag(pi)), ordered by
    magnitude as usual; the first (1, the stationary one) is left out.
    """
    root = np.sqrt(stationary)
    a = root[:, :, None] * transition / root[:, None, :]
    a = 0.5 * (a + np.swapaxes(a, 1, 2))
    lam = np.abs(np.linalg.eigvalsh(a))
    lam = -np.sort(-lam, axis=1)[:, 1:k + 1]
    with np.errstate(divide="ignore", invalid="ignore"):
        ts = -lag_frames / np.log(lam)
    return np.where(np.isfinite(ts) & (ts > 0), ts, np.nan)


def _mean_first_passage(transition, lag_frames):
    """Mean first-passage times (frames) m[:, i, j] from i to j: m_j = 0, m_i = tau + sum_{k != j} T_ik m_k."""
    p, n, _ = transition.shape
    out = np.zeros((p, n, n))
    eye = np.eye(n - 1)
    for j in range(n):
        keep = np.r_[0:j, j + 1:n]
        sub = transition[:, keep][:, :, keep]
        out[:, keep, j] = np.linalg.solve(eye - sub, np.full((p, n - 1, 1), float(lag_frames)))[..., 0]
    return out


def _largest_connected_sets(counts):
    """Largest strongly connected set of each count matrix of a stack: bool (p, n).

    Ties in size go to the set with more counts, then to the one with the lowest state.
    """
    c = np.asarray(counts, dtype=float)
    p, n, _ = c.shape
    out = np.zeros((p, n), dtype=bool)
    if n == 0:
        return out
    if n > 32:  # large state spaces: scipy, one matrix at a time
        from scipy.sparse.csgraph import connected_components

        for k in range(p):
            if c[k].sum() == 0:
                continue
            _, comp = connected_components(c[k] > 0, directed=True, connection="strong")
            sizes = np.bincount(comp)
            weights = np.bincount(comp, weights=c[k].sum(axis=1))
            lowest = np.full(len(sizes), n)
            np.minimum.at(lowest, comp, np.arange(n))
            best = max(range(len(sizes)), key=lambda j: (sizes[j], weights[j], -lowest[j]))
            out[k] = comp == best
        return out
    reach = _reachability(c > 0)
    same = reach & np.swapaxes(reach, 1, 2)  # i and j in one strongly connected set
    size = same.sum(axis=2)
    weight = (same * c.sum(axis=2)[:, None, :]).sum(axis=2)
    lowest = np.argmax(same, axis=2)
    best = np.lexsort((-lowest, weight, size), axis=-1)[:, -1] if n > 1 else np.zeros(p, dtype=np.int64)
    out = same[np.arange(p), best]
    out[c.sum(axis=(1, 2)) == 0] = False
    return out


def _markov_stack(counts, lag_frames, mfpt=True):
    """Reversible Markov models of a stack of count matrices (p, n, n) at one lag.

    Returns
    -------
    list of (members, active, transition_matrix, stationary, timescales_frames, mfpt_frames)
        One entry per set of matrices with the same largest connected set ``active`` (at least
        two states): the matrices ``members`` (g,), their (g, k, k) transition matrices, (g, k)
        stationary vectors, (g, min(k - 1, MAX_TIMESCALES)) implied timescales (slowest first;
        NaN where not finite and positive) and (g, k, k) mean first-passage times (NaN when not
        computed). Matrices with fewer than two connected states are in no entry.
    """
    c = np.asarray(counts, dtype=float)
    p, n, _ = c.shape
    active = _largest_connected_sets(c)
    usable = np.flatnonzero(active.sum(axis=1) >= 2)
    if not len(usable):
        return []
    patterns, which = np.unique(np.packbits(active[usable], axis=1), axis=0, return_inverse=True)
    out = []
    for k in range(len(patterns)):
        members = usable[which.reshape(-1) == k]
        idx = np.flatnonzero(active[members[0]])
        sub = c[members][:, idx][:, :, idx]
        t, pi = reversible_transition_matrices(sub)
        ts = _implied_timescales(t, pi, lag_frames, min(len(idx) - 1, MAX_TIMESCALES))
        m = _mean_first_passage(t, lag_frames) if mfpt and len(idx) <= MAX_MFPT_STATES else np.full(t.shape, np.nan)
        out.append((members, idx, t, pi, ts, m))
    return out


def markov_model(counts, lag_frames):
    """Reversible maximum-likelihood Markov model of a count matrix.

    Parameters
    ----------
    counts : ndarray (n, n)
        Count matrix at lag ``lag_frames``.
    lag_frames : int

    Returns
    -------
    dict or None
        ``active`` (indices of the largest strongly connected set, :func:`largest_connected_set`),
        ``transition_matrix`` (:func:`reversible_transition_matrices`), ``stationary``,
        ``timescales_frames`` (slowest first) and ``mfpt_frames`` (n_active, n_active; NaN when
        not computed); ``None`` when fewer than two states are connected.
    """
    models = _markov_stack(np.asarray(counts, dtype=float)[None], lag_frames)
    if not models:
        return None
    _, active, t, pi, ts, m = models[0]
    return {"active": active, "transition_matrix": t[0], "stationary": pi[0],
            "timescales_frames": ts[0][np.isfinite(ts[0])], "mfpt_frames": m[0]}


def largest_connected_set(counts):
    """States of the largest strongly connected set of a count matrix (ties: more counts win).

    Two states are connected when transitions were seen both ways (directly or through other
    states of the set); the Markov model is estimated on this set only.
    """
    c = np.asarray(counts, dtype=float)
    if c.size == 0 or c.sum() == 0:
        return np.empty(0, dtype=np.int64)
    return np.flatnonzero(_largest_connected_sets(c[None])[0])


def eyring_rate_per_s(barrier_kj_mol, temperature_k, kappa=1.0):
    """Eyring rate ``kappa (k_B T / h) exp(-dG / RT)`` in 1/s (CODATA 2018 constants).

    Examples
    --------
    >>> f"{eyring_rate_per_s(12.1, 298.15):.3g}"
    '4.71e+10'
    """
    t = check_temperature(temperature_k)
    g = np.asarray(barrier_kj_mol, dtype=float)
    return kappa * K_B_J_PER_K * t / H_J_S * np.exp(-g / (R_KJ_PER_MOL_K * t))


def eyring_barrier_kj_mol(rate_per_s, temperature_k, kappa=1.0):
    """Free-energy barrier ``-RT ln(k h / (kappa k_B T))`` in kJ/mol of a rate in 1/s (NaN if k <= 0)."""
    t = check_temperature(temperature_k)
    k = np.asarray(rate_per_s, dtype=float)
    with np.errstate(divide="ignore", invalid="ignore"):
        g = -R_KJ_PER_MOL_K * t * np.log(k * H_J_S / (kappa * K_B_J_PER_K * t))
    return np.where(k > 0, g, np.nan)


# ---------------------------------------------------------------------------------------------
# From counts to tables
# ---------------------------------------------------------------------------------------------
TRANSITION_COLUMNS = ["level", "name", "type", "from_state", "to_state", "count", "time_in_from_ps",
                      "rate_per_ps", "rate_err_per_ps", "rate_ci_low_per_ps", "rate_ci_high_per_ps",
                      "eyring_barrier_kj_mol", "profile_barrier_kj_mol", "profile_barrier_err_kj_mol",
                      "tst_rate_from_profile_per_ps", "n_trajectories"]
LIFETIME_COLUMNS = ["level", "name", "type", "state", "mean_ps", "median_ps", "ci_low_ps", "ci_high_ps",
                    "n_segments", "n_censored", "mean_restricted", "mean_from_rates_ps", "time_in_state_ps",
                    "population_counted", "population_from_rates", "n_trajectories"]
TIMESCALE_COLUMNS = ["level", "name", "type", "lag_frames", "lag_ps", "index", "timescale_ps",
                     "n_states_connected"]
#: Observed dwell-time distribution (pooled per type and conformer type): segments of each length,
#: complete ones and right-censored ones (first/last segment of a trajectory).
DWELL_COLUMNS = ["level", "name", "type", "state", "dwell_ps", "n_complete", "n_censored"]
MFPT_COLUMNS = ["level", "name", "type", "lag_frames", "lag_ps", "from_state", "to_state",
                "transition_probability", "mfpt_ps"]
TABLE_COLUMNS = {"transitions": TRANSITION_COLUMNS, "lifetimes": LIFETIME_COLUMNS, "timescales": TIMESCALE_COLUMNS,
                 "mfpt": MFPT_COLUMNS, "dwell_times": DWELL_COLUMNS}


@dataclass
class _Stack:
    """Subjects (torsions, types or conformer types) that share one state space, analysed at once.

    Attributes
    ----------
    level : str
    names, types : ndarray of str (p,)
    labels : ndarray of str (v,)
        Label of each state of the shared space.
    counts : dict of lag -> ndarray (p, v, v)
        Pair counts (lag 1 and every lag of the Markov models).
    segments : tuple of ndarrays (subject, state, length_frames, censored, count)
    n_trajectories : ndarray (p,)
    all_pairs : bool
        List every ordered pair of visited states (else only observed transitions).
    dwell : bool
        Also the observed dwell-time distribution.
    bootstrap : bool
        Percentile bootstrap intervals of the mean dwell times (else the Kaplan-Meier variance).
    """

    level: str
    names: np.ndarray
    types: np.ndarray
    labels: np.ndarray
    counts: dict
    segments: tuple
    n_trajectories: np.ndarray
    all_pairs: bool = True
    dwell: bool = False
    bootstrap: bool = True


def _merged_segments(subject, state, length, censored, count):
    """Segments summed per (subject, state, length, censored), sorted."""
    rows, summed = _merge_rows(np.column_stack([subject, state, length, censored]).astype(np.int64),
                               np.asarray(count, dtype=np.int64))
    return tuple(rows.T) + (summed,)


def _stack_tables(stack, dt_ps, lags, n_bootstrap, rng):
    """Column arrays of the five tables for one :class:`_Stack` ({table: {column: array}})."""
    c1 = np.asarray(stack.counts[1], dtype=float)
    p, v, _ = c1.shape
    dwell = _dwell_cells(stack.segments, v)
    seg_frames = np.zeros((p, v))
    np.add.at(seg_frames, (dwell["subject"], dwell["state"]), dwell["length"] * (dwell["complete"] + dwell["censored"]))
    has_segment = np.zeros((p, v), dtype=bool)
    has_segment[dwell["subject"], dwell["state"]] = True
    visited = has_segment | (c1.sum(axis=2) > 0) | (c1.sum(axis=1) > 0)
    t = c1.sum(axis=2) * float(dt_ps)
    with np.errstate(invalid="ignore", divide="ignore"):
        rate_matrix = np.where((t > 0)[:, :, None] & ~np.eye(v, dtype=bool), c1 / t[:, :, None], 0.0)
    out = {}

    def head(who):
        return {"level": np.full(len(who), stack.level, dtype=object), "name": stack.names[who],
                "type": stack.types[who]}

    # transitions
    keep = visited[:, :, None] & visited[:, None, :] & ~np.eye(v, dtype=bool) & (t > 0)[:, :, None]
    if not stack.all_pairs:
        keep &= c1 > 0
    ps, i, j = np.nonzero(keep)
    out["transitions"] = {**head(ps), "from_state": stack.labels[i], "to_state": stack.labels[j],
                          "count": c1[ps, i, j].astype(np.int64), "time_in_from_ps": t[ps, i],
                          **_rate_statistics(c1[ps, i, j], t[ps, i]), "n_trajectories": stack.n_trajectories[ps]}
    # lifetimes and populations
    pi = _stationary_stack(rate_matrix, visited)
    exits = c1.sum(axis=2) - np.diagonal(c1, axis1=1, axis2=2)
    total_frames = seg_frames.sum(axis=1, keepdims=True)
    with np.errstate(invalid="ignore", divide="ignore"):
        counted = np.where(total_frames > 0, seg_frames / total_frames, seg_frames)
        from_rates = np.where(exits > 0, t / exits, np.nan)
    ps, i = np.nonzero(visited)
    out["lifetimes"] = {**head(ps), "state": stack.labels[i],
                        **_lifetime_columns(dwell, ps * v + i, stack.bootstrap, dt_ps, n_bootstrap, rng),
                        "mean_from_rates_ps": from_rates[ps, i], "time_in_state_ps": seg_frames[ps, i] * dt_ps,
                        "population_counted": counted[ps, i], "population_from_rates": pi[ps, i],
                        "n_trajectories": stack.n_trajectories[ps]}
    if stack.dwell:
        out["dwell_times"] = {**head(dwell["subject"]), "state": stack.labels[dwell["state"]],
                              "dwell_ps": dwell["length"] * float(dt_ps), "n_complete": dwell["complete"],
                              "n_censored": dwell["censored"]}
    # Markov models at every lag, then ordered subject by subject, lags in order
    parts = {"timescales": [], "mfpt": []}
    for order, lag in enumerate(lags):
        counts = np.where(visited[:, :, None] & visited[:, None, :], np.asarray(stack.counts[lag], dtype=float), 0.0)
        for members, act, tm, _, ts, mf in _markov_stack(counts, lag):
            g, k = len(members), len(act)
            finite = np.isfinite(ts)
            who, col = np.nonzero(finite)
            parts["timescales"].append((members[who], order, {
                "lag_frames": lag, "lag_ps": lag * dt_ps, "index": np.cumsum(finite, axis=1)[who, col],
                "timescale_ps": ts[who, col] * dt_ps, "n_states_connected": k}))
            a, b = np.repeat(np.arange(k), k), np.tile(np.arange(k), k)
            parts["mfpt"].append((np.repeat(members, k * k), order, {
                "lag_frames": lag, "lag_ps": lag * dt_ps, "from_state": np.tile(stack.labels[act[a]], g),
                "to_state": np.tile(stack.labels[act[b]], g), "transition_probability": tm.reshape(-1),
                "mfpt_ps": np.where(np.eye(k, dtype=bool), np.nan, mf * dt_ps).reshape(-1)}))
    for name, columns in (("timescales", TIMESCALE_COLUMNS), ("mfpt", MFPT_COLUMNS)):
        got = parts[name]
        who = np.concatenate([x[0] for x in got]) if got else np.zeros(0, dtype=np.int64)
        order = np.concatenate([np.full(len(x[0]), x[1]) for x in got]) if got else np.zeros(0, dtype=np.int64)
        sort = np.lexsort((order, who))  # stable: rows of one model keep their order
        cols = {c: np.concatenate([np.broadcast_to(x[2][c], (len(x[0]),)) for x in got])[sort] if got
                else np.zeros(0) for c in columns[3:]}
        out[name] = {**head(who[sort]), **cols}
    return out


def _dwell_cells(segments, n_states):
    """Segments per (subject, state, length): complete and censored numbers, sorted."""
    subj, state, length, cens, count = (np.asarray(x, dtype=np.int64) for x in segments)
    if not len(subj):
        z = np.zeros(0, dtype=np.int64)
        return {"subject": z, "state": z, "length": z, "complete": z, "censored": z, "starts": z}
    span = int(length.max()) + 1
    key = (subj * n_states + state) * span + length
    uniq, inv = np.unique(key, return_inverse=True)
    complete = np.bincount(inv, weights=np.where(cens > 0, 0, count), minlength=len(uniq)).astype(np.int64)
    censored = np.bincount(inv, weights=np.where(cens > 0, count, 0), minlength=len(uniq)).astype(np.int64)
    cell = uniq // span
    return {"subject": cell // n_states, "state": cell % n_states, "length": uniq % span, "complete": complete,
            "censored": censored, "cell": cell, "starts": np.flatnonzero(np.r_[True, cell[1:] != cell[:-1]])}


def _lifetime_columns(dwell, cells, bootstrap, dt_ps, n_bootstrap, rng):
    """Dwell-time statistics of the cells (subject * n_states + state) ``cells``, in this order."""
    n = len(cells)
    out = {"mean_ps": np.full(n, np.nan), "median_ps": np.full(n, np.nan), "ci_low_ps": np.full(n, np.nan),
           "ci_high_ps": np.full(n, np.nan), "n_segments": np.zeros(n, dtype=np.int64),
           "n_censored": np.zeros(n, dtype=np.int64), "mean_restricted": np.zeros(n, dtype=bool)}
    starts = dwell["starts"]
    if not len(starts):
        return out
    ev, ce = dwell["complete"].astype(float), dwell["censored"].astype(float)
    km = kaplan_meier_groups(starts, dwell["length"].astype(float), ev, ce)
    known = dwell["cell"][starts]
    pos = np.minimum(np.searchsorted(known, cells), len(known) - 1)
    has = known[pos] == cells
    g = pos[has]
    n_ev = _segmented_sum(ev, starts)
    out["mean_ps"][has] = km["mean"][g] * dt_ps
    out["median_ps"][has] = km["median"][g] * dt_ps
    out["n_segments"][has] = n_ev[g].astype(np.int64)
    out["n_censored"][has] = _segmented_sum(ce, starts)[g].astype(np.int64)
    out["mean_restricted"][has] = km["restricted"][g]
    if not n_bootstrap:
        return out
    with_events = np.flatnonzero(has)[n_ev[g] > 0]
    if bootstrap:  # percentile bootstrap, group by group (pooled levels: few groups)
        ends = np.r_[starts[1:], len(ev)]
        for k in with_events:
            sl = slice(starts[pos[k]], ends[pos[k]])
            low, high = _bootstrap_mean_interval(dwell["length"][sl].astype(float), ev[sl], ce[sl], n_bootstrap, rng)
            out["ci_low_ps"][k], out["ci_high_ps"][k] = low * dt_ps, high * dt_ps
    else:  # Kaplan-Meier variance of the restricted mean, interval symmetric in ln(mean)
        mean, se = km["mean"][pos[with_events]], km["mean_se"][pos[with_events]]
        spread = np.exp(Z_95 * se / mean)
        out["ci_low_ps"][with_events] = mean / spread * dt_ps
        out["ci_high_ps"][with_events] = mean * spread * dt_ps
    return out


def _frames(columns_list, columns):
    """One DataFrame from the column dicts of several stacks (in order); absent columns are NaN."""
    parts = [c for c in columns_list if c is not None and len(c.get(columns[0], ())) > 0]
    if not parts:
        return pd.DataFrame({c: pd.Series(dtype=object) for c in columns})

    def column(part, name):
        n = len(part[columns[0]])
        value = part.get(name, np.nan)
        return np.asarray(value) if np.ndim(value) else np.full(n, value)

    return pd.DataFrame({c: np.concatenate([column(p, c) for p in parts]) for c in columns}, columns=columns)


def _tables(parts):
    """The five DataFrames from the column dicts of several stacks."""
    return {name: _frames([p.get(name) for p in parts], columns) for name, columns in TABLE_COLUMNS.items()}


def analyse_state_series(dtrajs, state_labels, dt_ps, lags=DEFAULT_LAGS, n_bootstrap=DEFAULT_BOOTSTRAP,
                         seed=0, name="series"):
    """Kinetics of discrete trajectories given as arrays (each one a separate trajectory).

    Parameters
    ----------
    dtrajs : list of 1-D int arrays
        Assigned states (codes into ``state_labels``; -1 = unassigned); pooled, never joined.
    state_labels : sequence of str
    dt_ps : float
        Time between frames in ps.
    lags : sequence of int
        Lags in frames for the Markov models.

    Returns
    -------
    dict of DataFrames ``transitions``, ``lifetimes``, ``timescales``, ``mfpt``, ``dwell_times``
    (level ``pooled``).
    """
    n_states = len(state_labels)
    tally = StateTally(1, lags, n_states=n_states)
    for d in dtrajs:
        tally.add_series(np.asarray(d, dtype=np.int64).reshape(1, -1))
        tally.end_replica()
    tally.finish()
    stack = _Stack("pooled", np.array([name], dtype=object), np.array([""], dtype=object),
                   np.array(list(state_labels), dtype=object), tally.pair_matrices_ or
                   _dense_counts(tally.pairs_, 1, n_states), tuple(tally.segments_[0].T) + (tally.segments_[1],),
                   np.array([len(dtrajs)]), all_pairs=True, dwell=True, bootstrap=True)
    return _tables([_stack_tables(stack, float(dt_ps), tally.lags_requested, n_bootstrap,
                                  np.random.default_rng(seed))])


def _dense_counts(pairs, n_rows, n_states, row_map=None, code_map=None):
    """Dense (rows, states, states) pair counts from the sparse rows of a tally, for every lag.

    ``row_map`` maps tally rows to output rows (-1: left out); ``code_map`` gives the sorted codes
    kept as states (others left out).
    """
    out = {}
    for lag, (rows, counts) in pairs.items():
        r, a, b = rows[:, 0], rows[:, 1], rows[:, 2]
        if row_map is not None:
            r = row_map[r]
        if code_map is not None:
            a = np.searchsorted(code_map, a)
            b = np.searchsorted(code_map, b)
        keep = r >= 0
        mat = np.zeros((n_rows, n_states, n_states))
        np.add.at(mat, (r[keep], a[keep], b[keep]), counts[keep])
        out[lag] = mat
    return out


# ---------------------------------------------------------------------------------------------
# The results-folder driver
# ---------------------------------------------------------------------------------------------
@dataclass
class KineticsResult:
    """Kinetics of a results folder.

    Attributes
    ----------
    transitions, lifetimes, timescales, mfpt : DataFrame
        The tables of ``transitions.csv``, ``lifetimes.csv``, ``timescales.csv``, ``mfpt.csv``
        (``level`` is ``torsion``, ``type`` or ``conformer``).
    dwell_times : DataFrame
        ``dwell_times.csv``: the observed dwell-time distribution per type and conformer type
        (level, name, type, state, dwell_ps, n_complete, n_censored).
    parameters : dict
        Assignment, core margin, lags, time step and temperature with their sources.
    notices : list of str
    folder : str or None
    """

    transitions: pd.DataFrame
    lifetimes: pd.DataFrame
    timescales: pd.DataFrame
    mfpt: pd.DataFrame
    parameters: dict
    dwell_times: pd.DataFrame = None
    notices: list = field(default_factory=list)
    folder: str | None = None


def frame_interval_ps(summary, dt_ps=None):
    """Time between analysed frames (ps) and a sentence on where it came from.

    ``dt_ps`` (time between stored frames, as ``track --dt-ps``) overrides the trajectory's own; it is
    multiplied by the frame step of the analysis. Raises a :class:`DihedraError` when a replica has
    no usable time step and none is given, or when the replicas disagree.
    """
    reps = summary.get("replicas", [])
    if not reps:
        raise InputFileError("summary.json lists no replicas; rerun 'dihedra track'.")
    values = []
    if dt_ps is not None:
        dt = float(dt_ps)
        if not np.isfinite(dt) or dt <= 0:
            raise DihedraError(f"--dt-ps must be a positive number of picoseconds; got {dt_ps!r}.")
        values = [dt * int(r.get("frame_step", 1)) for r in reps]
        source = f"--dt-ps {dt:g} ps per stored frame"
    else:
        unknown = [k for k, r in enumerate(reps) if not r.get("time_step_known", False)]
        if unknown:
            raise DihedraError(f"the trajectory of replica {unknown[0]} ({reps[unknown[0]]['trajectory']}) "
                               "stores no usable time step; give the time between stored frames with "
                               "--dt-ps PS.")
        values = [float(r["time_between_analysed_frames_ps"]) for r in reps]
        source = ("time step given to 'track --dt-ps'" if reps[0].get("time_step_source") == "--dt-ps"
                  else "time step stored in the trajectory")
    if max(values) - min(values) > 1e-6 * max(values):
        raise DihedraError(f"the replicas have different times between analysed frames "
                           f"({', '.join(f'{v:g}' for v in values)} ps); analyse them in separate "
                           "folders or use --step so that they match.")
    return values[0], source


def _select_torsions(torsions, types):
    if not types:
        return np.arange(len(torsions))
    valid = list(dict.fromkeys(torsions["type"]))
    missing = [t for t in types if t not in valid]
    if missing:
        shown = ", ".join(valid[:8]) + (" ..." if len(valid) > 8 else "")
        raise DihedraError(f"no torsions of type {missing[0]!r} in this folder; its types are {shown}.")
    return np.flatnonzero(torsions["type"].isin(types).to_numpy())


def _conformer_groups(result, selected):
    """Conformer groups whose torsions are all selected: names, group types, members (column idx)."""
    from ..numerics.populations import _short_type_names
    from ..trajectory.conformer_counts import conformer_layout

    groups, members, _ = conformer_layout(result.torsion_set, result.scheme.n_states)
    col = {int(p): k for k, p in enumerate(selected)}
    keep = [(g, m) for g, m in zip(groups, members) if all(int(p) in col for p in m)]
    if not keep:
        return [], [], [], []
    types = result.torsion_set.types
    resnames = [t.resname for t in result.torsion_set.torsions]
    long_types = [" | ".join(types[p] for p in m) for _, m in keep]
    short = _short_type_names(long_types, resnames, [m for _, m in keep])
    return ([g for g, _ in keep], short, long_types,
            [np.array([col[int(p)] for p in m], dtype=np.int64) for _, m in keep])


def _profile_barriers(folder, scheme):
    """Barriers of the free-energy profile from ``barriers.csv``: {(level, name, from, to): kJ/mol}.

    Returns ``None`` when the folder has no ``barriers.csv``.
    """
    path = os.path.join(folder, "barriers.csv")
    if not os.path.exists(path):
        return None
    try:
        table = pd.read_csv(path)
    except Exception:  # noqa: BLE001 - an unreadable optional file only empties a column
        return {}
    return _read_barrier_table(table, scheme)


def _profile_temperature(folder):
    """Temperature of ``profiles.json`` (``dihedra profile``), or None."""
    import json

    try:
        with open(os.path.join(folder, "profiles.json")) as fh:
            value = json.load(fh).get("temperature_k")
        return None if value is None else float(value)
    except (OSError, ValueError, TypeError, AttributeError):
        return None


def _read_barrier_table(table, scheme):
    """Map the barriers of ``barriers.csv`` (``dihedra profile``) onto transitions between states.

    Each row is the barrier between two neighbouring minima of a profile (per ``type``, or per
    ``torsion`` when that column is filled), with ``from_minimum_deg``, ``to_minimum_deg`` and the
    heights above each, ``height_from_first_kj_mol`` and ``height_from_second_kj_mol``. The minima
    are assigned states with the crisp scheme: the first height is the barrier of the transition
    first -> second, the second the reverse. Barriers between minima of the same state are skipped;
    of several barriers between the same two states the lowest is kept (the dominant path).

    Returns
    -------
    dict
        ``(level, name, from_state, to_state) -> (height_kj_mol, height_err_kj_mol)``.
    """
    needed = {"type", "from_minimum_deg", "to_minimum_deg", "height_from_first_kj_mol",
              "height_from_second_kj_mol"}
    if not needed <= set(table.columns) or not len(table):
        return {}
    torsion = table["torsion"] if "torsion" in table.columns else pd.Series([np.nan] * len(table))
    named = np.array([isinstance(t, str) and bool(t) for t in torsion], dtype=bool)
    level = np.where(named, "torsion", "type")
    name = np.where(named, torsion.astype(object).to_numpy(), table["type"].astype(object).to_numpy())
    a = scheme.assign(table["from_minimum_deg"].to_numpy(dtype=float)).astype(np.int64)
    b = scheme.assign(table["to_minimum_deg"].to_numpy(dtype=float)).astype(np.int64)
    ok = (a >= 0) & (b >= 0) & (a != b)
    labels = np.array(scheme.labels, dtype=object)
    parts = []
    for i, j, which in ((a, b, "first"), (b, a, "second")):
        value = table[f"height_from_{which}_kj_mol"].to_numpy(dtype=float)
        err_col = f"height_from_{which}_err_kj_mol"
        err = table[err_col].to_numpy(dtype=float) if err_col in table.columns else np.full(len(table), np.nan)
        use = ok & np.isfinite(value)
        parts.append(pd.DataFrame({"level": level[use], "name": name[use], "from": labels[i[use]],
                                   "to": labels[j[use]], "value": value[use], "err": err[use],
                                   "row": np.flatnonzero(use), "side": 0 if which == "first" else 1}))
    rows = pd.concat(parts, ignore_index=True).sort_values(["row", "side"], kind="stable")
    # the lowest barrier of each transition; on ties the first in the table
    rows = rows.sort_values("value", kind="stable").drop_duplicates(["level", "name", "from", "to"], keep="first")
    return {(lv, nm, f, t): (float(v), float(e)) for lv, nm, f, t, v, e in
            zip(rows["level"], rows["name"], rows["from"], rows["to"], rows["value"], rows["err"])}


def _folder_contents(folder):
    """What kinetics needs of a results folder: summary.json and torsions.csv (not the block sums).

    Returns a namespace with ``folder``, ``summary``, ``scheme``, ``torsions`` and ``torsion_set``
    (the attributes of :class:`~dihedra.tracking.TrackResult` that :func:`kinetics` uses).
    """
    import json
    from types import SimpleNamespace

    from ..selection.schemes import StateScheme
    from ..selection.torsions import TorsionSet

    folder = os.fspath(folder)
    if not os.path.isdir(folder):
        raise InputFileError(f"results folder {folder} does not exist (run 'dihedra track ... --out {folder}' first).")
    missing = [n for n in ("summary.json", "torsions.csv") if not os.path.exists(os.path.join(folder, n))]
    if missing:
        raise InputFileError(f"{folder} is not a complete dihedra results folder: missing {', '.join(missing)}.")
    with open(os.path.join(folder, "summary.json")) as fh:
        summary = json.load(fh)
    torsions = pd.read_csv(os.path.join(folder, "torsions.csv"), keep_default_na=False, na_values=[""])
    torsions["segid"] = torsions["segid"].fillna("").astype(str)
    return SimpleNamespace(folder=os.path.abspath(folder), summary=summary,
                           scheme=StateScheme.from_dict(summary["scheme"]), torsions=torsions,
                           torsion_set=TorsionSet.from_frame(torsions))


#: Values decoded from the time series at a time (the steps that follow take CHUNK_VALUES at a time).
READ_VALUES = 16_000_000


def _replica_blocks(source, kind, labels, batch_frames=None):
    """Yield (replica, values) of a time series: values (n_labels, n_frames) laid out series by
    series, consecutive frames of one replica, about CHUNK_VALUES at a time (read through the
    series source of the result, READ_VALUES at a time)."""
    n = max(1, len(labels))
    batch = int(batch_frames) if batch_frames else max(64, READ_VALUES // n)
    step = min(batch, max(1, CHUNK_VALUES // n))
    for chunk in source.iter_chunks(kind, labels, batch):
        for a in range(0, len(chunk), step):
            yield chunk.replica, chunk.values[:, a:a + step]


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


#: Threads that read and tally parts of the torsions side by side.
_THREADS = min(4, os.cpu_count() or 1)
#: ... each with at least this many torsions.
_MIN_PART = 256


def _column_parts(n_columns, members, n_parts):
    """Split the columns into about equal parts that keep every conformer group whole: (columns,
    groups) per part, each sorted."""
    n_parts = max(1, min(int(n_parts), n_columns // _MIN_PART))
    owner = np.full(n_columns, -1, dtype=np.int64)
    for g, m in enumerate(members):
        owner[np.asarray(m)] = g
    unit = np.where(owner >= 0, owner, len(members) + np.arange(n_columns))  # a group, or a lone torsion
    _, first, inverse = np.unique(unit, return_index=True, return_inverse=True)
    order = np.argsort(first)  # units in the order of their first column
    sizes = np.bincount(inverse.reshape(-1))[order]
    part_of_unit = np.empty(len(first), dtype=np.int64)
    part_of_unit[order] = np.minimum((np.cumsum(sizes) - sizes) * n_parts // n_columns, n_parts - 1)
    part = part_of_unit[inverse.reshape(-1)]
    return [(np.flatnonzero(part == k), np.array([g for g, m in enumerate(members) if part[m[0]] == k],
                                                dtype=np.int64)) for k in range(n_parts) if (part == k).any()]


class CoreCodes:
    """:meth:`StateScheme.core_codes` of a scheme and margin through a lookup table (same codes).

    ``core_codes`` takes a floating-point modulo per arc and value (about 130 ns a value);
    here a value's bin of 1/``per_degree`` degree gives its code from a table, and only values
    in bins next to a core edge (about 0.05 % of them) go through ``core_codes`` itself. NaN
    gives :data:`~dihedra.selection.schemes.UNDEFINED`.
    """

    def __init__(self, scheme, margin_deg, per_degree=100):
        from ..units import wrap_deg

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


def _tally_columns(part, source, labels, kind, scheme, margin, lags, members, pool, batch_frames):
    """Read the columns of one part, assign states and tally torsions and conformer groups.

    Returns (torsion tally, conformer tally or None, frames read).
    """
    columns, groups = part
    local = {int(c): k for k, c in enumerate(columns)}
    n_s = scheme.n_states
    t_tally = StateTally(len(columns), lags, n_states=n_s)
    c_tally, layout = None, []
    if len(groups):
        part_members = [np.array([local[int(c)] for c in members[g]], dtype=np.int64) for g in groups]
        c_tally = StateTally(len(groups), lags, n_states=n_s ** max(len(m) for m in part_members),
                             pool=pool[groups])
        layout = _size_layout(part_members)
    carry = np.full(len(columns), -1, dtype=np.int64)
    current = None
    n_frames = 0
    core = CoreCodes(scheme, margin) if kind == "angles" else None
    for rep, block in _replica_blocks(source, kind, [labels[c] for c in columns], batch_frames):
        if rep != current:
            if current is not None:
                t_tally.end_replica()
                if c_tally is not None:
                    c_tally.end_replica()
            carry[:] = -1
            current = rep
        codes = core(block) if kind == "angles" else block
        assigned = _fill_rows(codes, carry)
        carry = assigned[:, -1].astype(np.int64)
        t_tally.add_series(assigned)
        if c_tally is not None:
            c_tally.add_series(_joint_codes(assigned, layout, n_s))
        n_frames += block.shape[1]
    t_tally.finish()
    if c_tally is not None:
        c_tally.finish()
    return t_tally, c_tally, n_frames


def _merge_tallies(done, parts, n_columns, n_states):
    """The tallies of the parts as one torsion tally (columns in their order) and one conformer tally."""
    from types import SimpleNamespace

    if len(done) == 1:
        return done[0][0], done[0][1]
    first = done[0][0]
    lags = first.lags
    matrices = {lag: np.zeros((n_columns, n_states, n_states), dtype=np.int64) for lag in lags}
    seg_rows, seg_counts = [], []
    for (tally, _, _), (columns, _) in zip(done, parts):
        mats = tally.pair_matrices_ or _dense_counts(tally.pairs_, len(columns), n_states)
        for lag in lags:
            matrices[lag][columns] = mats[lag]
        rows, counts = tally.segments_
        seg_rows.append(np.column_stack([columns[rows[:, 0]], rows[:, 1:]]) if len(rows) else rows)
        seg_counts.append(counts)
    torsion = SimpleNamespace(lags=lags, lags_requested=first.lags_requested, pair_matrices_=matrices,
                              pairs_=None, segments_=_merge_rows(np.vstack(seg_rows), np.concatenate(seg_counts)))
    conf = [c for _, c, _ in done if c is not None]
    if not conf:
        return torsion, None
    pairs = {lag: _merge_rows(np.vstack([c.pairs_[lag][0] for c in conf]),
                              np.concatenate([c.pairs_[lag][1] for c in conf])) for lag in lags}
    segments = _merge_rows(np.vstack([c.segments_[0] for c in conf]), np.concatenate([c.segments_[1] for c in conf]))
    return torsion, SimpleNamespace(lags=lags, pairs_=pairs, segments_=segments,
                                    n_rows=max(c.n_rows for c in conf))


def kinetics(folder, assignment="core", core_margin_deg=DEFAULT_CORE_MARGIN_DEG, lags=DEFAULT_LAGS,
             types=None, dt_ps=None, temperature_k=None, n_bootstrap=DEFAULT_BOOTSTRAP, seed=0,
             conformers=True, write=True, batch_frames=None, log=None, torsion_bootstrap=False):
    """Transitions, dwell times, rates, Markov timescales and Eyring barriers of a results folder.

    The time series is read once, in chunks; counts and segments are tallied for all torsions (and
    conformer groups) at once, and every statistic is computed for all torsions together (see
    the module notes).

    Parameters
    ----------
    folder : str
        Results folder of ``dihedra track`` (``--keep-angles`` for core assignment).
    assignment : {"core", "crisp"}
        Transition-based core-set assignment from ``angles.parquet`` (default), or the crisp states
        of ``states.parquet``.
    core_margin_deg : float
        Margin by which every sector is shrunk on both sides to make its core (default 20).
    lags : sequence of int
        Lags in frames for the Markov models and implied timescales.
    types : list of str, optional
        Only torsions of these types (conformers only for groups made entirely of them).
    dt_ps : float, optional
        Time between stored frames in ps; required when the trajectory stores none.
    temperature_k : float, optional
        For the Eyring barriers; default the temperature recorded by ``track``. Without either the
        Eyring columns stay empty.
    n_bootstrap : int
        Bootstrap samples of the dwell-time intervals (0: no intervals).
    seed : int
        Seed of the bootstrap.
    conformers : bool
        Also analyse conformers (joint states of the torsions of each group).
    write : bool
        Write the tables and ``kinetics.json`` into ``folder`` (each through a temporary name).
    batch_frames : int, optional
        Frames read at a time (default: about READ_VALUES values per read).
    log : callable, optional
        Receives progress lines.
    torsion_bootstrap : bool
        Bootstrap the dwell-time intervals of every single torsion too (slow for thousands of
        torsions); by default torsion rows take their interval from the Kaplan-Meier variance.

    Returns
    -------
    KineticsResult
    """
    say = log or (lambda msg: None)
    t0 = time.time()
    one_of("assignment", assignment, ASSIGNMENTS)
    result = _folder_contents(folder)
    folder = result.folder
    scheme = result.scheme
    summary = result.summary
    notices = []
    margin = check_core_margin(scheme, core_margin_deg) if assignment == "core" else None
    lags_req = sorted({int(x) for x in (lags or DEFAULT_LAGS)})
    if any(x < 1 for x in lags_req):
        raise DihedraError(f"lags must be positive numbers of frames; got {list(lags)}.")
    dt, dt_source = frame_interval_ps(summary, dt_ps)
    temp, temp_source = _temperature(temperature_k, summary)
    n_boot = int(n_bootstrap)
    if n_boot < 0:
        raise DihedraError(f"the number of bootstrap samples must be >= 0; got {n_bootstrap}.")
    kind = "angles" if assignment == "core" else "states"
    path = os.path.join(folder, f"{kind}.parquet")
    if not os.path.exists(path):
        if kind == "angles":
            raise InputFileError(f"{folder} has no angles.parquet, which core assignment needs: rerun "
                                 "'dihedra track ... --keep-angles', or use --assignment crisp.")
        raise InputFileError(f"{folder} has no states.parquet; rerun 'dihedra track'.")
    torsions = result.torsions
    selected = _select_torsions(torsions, types)
    labels = torsions["torsion"].astype(str).to_numpy()[selected].tolist()
    ttypes = torsions["type"].astype(str).to_numpy()[selected].tolist()
    frames_per_rep = [int(r["frames_analysed"]) for r in summary["replicas"]]
    lags_used = [x for x in lags_req if x < max(frames_per_rep)]
    if len(lags_used) < len(lags_req):
        dropped = [x for x in lags_req if x not in lags_used]
        notices.append(f"lag(s) {', '.join(map(str, dropped))} frames are not shorter than the longest "
                       f"replica ({max(frames_per_rep)} frames) and were left out.")
    if summary.get("parameters", {}).get("weights"):
        notices.append("the folder was made with per-frame weights (a biased run); kinetics ignore the "
                       "weights, and the dynamics of a biased run are not those of the unbiased system.")
    if conformers:
        g_names, g_short, g_long, g_members = _conformer_groups(result, selected)
    else:
        g_names, g_short, g_long, g_members = [], [], [], []
    n_s = scheme.n_states
    conf_types = list(dict.fromkeys(g_short))
    pool = pd.Categorical(g_short, categories=conf_types).codes.astype(np.int64)
    say(f"reading {kind}.parquet: {len(selected)} torsions, {len(g_names)} conformer groups, "
        f"{len(frames_per_rep)} replica(s)")
    read = functools.partial(_tally_columns, source=ParquetSeries(folder), labels=labels, kind=kind, scheme=scheme, margin=margin,
                             lags=lags_used, members=g_members, pool=pool, batch_frames=batch_frames)
    parts = _column_parts(len(selected), g_members, _THREADS)
    if len(parts) > 1:  # parts of the columns side by side in threads (NumPy and Arrow release the lock)
        from concurrent.futures import ThreadPoolExecutor

        with ThreadPoolExecutor(len(parts)) as workers:
            done = list(workers.map(read, parts))
    else:
        done = [read(parts[0])]
    t_tally, c_tally = _merge_tallies(done, parts, len(selected), n_s)
    n_frames_read = done[0][2]
    say(f"{n_frames_read} frames read; estimating rates, dwell times and Markov models")
    rng = np.random.default_rng(seed)
    n_rep = len(frames_per_rep)
    state_labels = np.array(scheme.labels, dtype=object)
    lags_all = t_tally.lags
    # every torsion: one stack over the scheme's states
    seg_rows, seg_counts = t_tally.segments_
    t_counts = t_tally.pair_matrices_ or _dense_counts(t_tally.pairs_, len(selected), n_s)
    parts = [_stack_tables(_Stack("torsion", np.array(labels, dtype=object), np.array(ttypes, dtype=object),
                                  state_labels, t_counts, tuple(seg_rows.T) + (seg_counts,),
                                  np.full(len(selected), n_rep), bootstrap=torsion_bootstrap),
                           dt, lags_used, n_boot, rng)]
    # pooled per type: sums of the torsions' counts and segments
    type_names = list(dict.fromkeys(ttypes))
    type_of = pd.Categorical(ttypes, categories=type_names).codes.astype(np.int64)
    pooled = {}
    for lag in lags_all:
        pooled[lag] = np.zeros((len(type_names), n_s, n_s))
        np.add.at(pooled[lag], type_of, t_counts[lag])
    parts.append(_stack_tables(_Stack("type", np.array(type_names, dtype=object), np.array(type_names, dtype=object),
                                      state_labels, pooled,
                                      _merged_segments(type_of[seg_rows[:, 0]], *seg_rows[:, 1:].T, seg_counts),
                                      np.bincount(type_of, minlength=len(type_names)) * n_rep, dwell=True),
                               dt, lags_used, n_boot, rng))
    # conformer types, each over the joint states it visited
    if c_tally is not None:
        c_rows, c_counts = c_tally.segments_
        for k, gt in enumerate(conf_types):
            first = int(np.flatnonzero(pool == k)[0])
            size = len(g_members[first])
            r1, n1 = c_tally.pairs_[1]
            mine = r1[:, 0] == k
            seg = c_rows[:, 0] == k
            codes = np.unique(np.r_[r1[mine, 1], r1[mine, 2], c_rows[seg, 1]])
            if not len(codes):
                continue
            names = np.array(["|".join(scheme.labels[(int(s) // n_s ** j) % n_s] for j in range(size))
                              for s in codes], dtype=object)
            row_map = np.full(max(len(conf_types), c_tally.n_rows), -1, dtype=np.int64)
            row_map[k] = 0
            counts = _dense_counts(c_tally.pairs_, 1, len(codes), row_map, codes)
            segments = (np.zeros(seg.sum(), dtype=np.int64), np.searchsorted(codes, c_rows[seg, 1]),
                        c_rows[seg, 2], c_rows[seg, 3], c_counts[seg])
            parts.append(_stack_tables(_Stack("conformer", np.array([gt], dtype=object),
                                              np.array([g_long[first]], dtype=object), names, counts, segments,
                                              np.array([int((pool == k).sum()) * n_rep]), all_pairs=False,
                                              dwell=True), dt, lags_used, n_boot, rng))
    tables = _tables(parts)
    _add_tst(tables["transitions"], temp, _profile_barriers(folder, scheme), notices)
    profile_temp = _profile_temperature(folder)
    if profile_temp is not None and temp is not None and abs(profile_temp - temp) > 1e-6:
        notices.append(f"the profile barriers were computed at {profile_temp:g} K but the Eyring barriers "
                       f"at {temp:g} K; compare them at one temperature.")
    if temp is None:
        notices.append("no temperature given and none recorded by 'track': the Eyring columns are empty "
                       "(give --temperature K).")
    elif temp_source.startswith("summary"):
        notices.append(f"Eyring barriers use the temperature recorded by 'track', {temp:g} K.")
    params = {
        "folder": folder,
        "assignment": assignment,
        "core_margin_deg": margin,
        "core_sectors_deg": _core_table(scheme, margin) if margin is not None else None,
        "lags_frames": lags_used,
        "frame_interval_ps": dt,
        "frame_interval_source": dt_source,
        "temperature_k": temp,
        "temperature_source": temp_source,
        "types": list(types) if types else None,
        "n_torsions": len(selected),
        "n_conformer_groups": len(g_names),
        "n_replicas": n_rep,
        "frames_per_replica": frames_per_rep,
        "n_bootstrap": n_boot,
        "seed": int(seed),
        "scheme": scheme.name,
        "units": {"time": "ps", "rate": "1/ps", "energy": "kJ/mol", "angle": "deg"},
        "lifetime_censoring": "first and last segment of every trajectory right-censored (Kaplan-Meier)",
        "rate_estimator": "k_ij = n_ij / T_i (lag-1 counts), se = sqrt(n_ij) / T_i, 95 % exact Poisson interval",
        "markov_estimator": "reversible maximum likelihood (Newton's method on the convex dual), largest "
                            "strongly connected set",
        "lifetime_intervals": ("percentile bootstrap of segments for every row" if torsion_bootstrap else
                               "percentile bootstrap of segments for types and conformers; Kaplan-Meier variance "
                               "of the restricted mean (interval symmetric in ln mean) for single torsions"),
        "caution": TST_CAUTION,
    }
    out = KineticsResult(notices=notices, parameters=params, folder=folder, **tables)
    if write:
        write_kinetics(out, folder, seconds=time.time() - t0)
    return out


def _temperature(temperature_k, summary):
    if temperature_k is not None:
        return check_temperature(temperature_k), "--temperature"
    recorded = summary.get("temperature_k")
    if recorded is not None:
        return check_temperature(recorded), "summary.json (recorded by track)"
    return None, "none"


def _core_table(scheme, margin):
    rows = []
    for state, start, end in scheme.merged_arcs():
        if end - start > 2 * margin:
            lo, hi = (float((x + 180.0) % 360.0 - 180.0) for x in (start + margin, end - margin))
            rows.append({"state": scheme.labels[state], "from_deg": lo, "to_deg": hi})
    return rows


def _add_tst(transitions, temperature_k, barriers, notices):
    """Fill the Eyring and profile-barrier columns of the transitions table in place."""
    if len(transitions) == 0:
        return
    if temperature_k is not None:
        transitions["eyring_barrier_kj_mol"] = eyring_barrier_kj_mol(
            transitions["rate_per_ps"].to_numpy(dtype=float) * 1e12, temperature_k)
    if barriers is None:
        notices.append("no barriers.csv in the folder (run 'dihedra profile'): the profile_barrier_kj_mol "
                       "column is empty.")
        return
    keys = zip(*(transitions[c].to_numpy(dtype=object) for c in ("level", "name", "from_state", "to_state")))
    values = np.array([barriers.get(k, (np.nan, np.nan)) for k in keys], dtype=float).reshape(-1, 2)
    transitions["profile_barrier_kj_mol"] = values[:, 0]
    transitions["profile_barrier_err_kj_mol"] = values[:, 1]
    if not np.isfinite(transitions["profile_barrier_kj_mol"]).any():
        notices.append("barriers.csv has no barrier that matches a transition of this analysis; the "
                       "profile_barrier_kj_mol column is empty.")
    elif temperature_k is not None:
        transitions["tst_rate_from_profile_per_ps"] = eyring_rate_per_s(
            transitions["profile_barrier_kj_mol"].to_numpy(dtype=float), temperature_k) / 1e12


def write_kinetics(result, folder, seconds=None):
    """Write the four tables and ``kinetics.json`` into ``folder``, each through a temporary name."""
    from .._version import __version__
    from ..io.tables import write_json, write_table

    written = []
    tables = [("transitions.csv", result.transitions), ("lifetimes.csv", result.lifetimes),
              ("timescales.csv", result.timescales), ("mfpt.csv", result.mfpt)]
    if result.dwell_times is not None:
        tables.append(("dwell_times.csv", result.dwell_times))
    for name, frame in tables:
        write_table(frame, folder, name)
        written.append(name)
    doc = {"dihedra_version": __version__, "created": time.strftime("%Y-%m-%dT%H:%M:%S%z"),
           "parameters": result.parameters, "notices": list(result.notices), "files": written,
           "run_seconds": None if seconds is None else round(seconds, 3)}
    write_json(doc, folder, "kinetics.json")
    return written

