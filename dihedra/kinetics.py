"""State dynamics: transitions, dwell times, rates, Markov timescales and Eyring barriers.

This module turns state time series (one discrete trajectory per torsion and replica) into the
kinetics of torsion states and conformers. Plain functions take arrays and return arrays or tidy
DataFrames; :func:`kinetics` reads a results folder chunk by chunk and writes four tables.

State assignment
----------------
*Transition-based (core-set) assignment* (default; Buchete & Hummer, J. Phys. Chem. B 112 (2008)
6057). Every state has a core: its sector of the scheme shrunk by a margin ``m`` on both sides
(:meth:`dihedra.schemes.StateScheme.core_codes`). The trajectory keeps the state of the last core
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
time with ``S <= 1/2``, and ``ci_low_ps``/``ci_high_ps`` a 95 % percentile bootstrap interval of
the mean that resamples segments (complete and censored) with replacement. The Markov reading,
``mean_from_rates_ps = T_i / sum_j n_ij = 1 / sum_j k_ij``, is reported next to it.

Markov state model
------------------
For each lag ``tau`` (``--lag``, in frames) the reversible maximum-likelihood transition matrix is
estimated from ``C(tau)`` with deeptime (on its largest connected set). Implied timescales
``t_k(tau) = -tau / ln |lambda_k(tau)|`` (eigenvalues ``lambda_1 = 1 > |lambda_2| >= ...``) become
flat in ``tau`` once the model is Markovian; choose ``tau`` there. Mean first-passage times solve
``m_i = tau + sum_{k != j} T_ik(tau) m_k`` for target ``j``. For a two-state chain the timescale is
``-tau / ln(1 - p12 - p21)``.

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
>>> from dihedra.kinetics import analyse_state_series
>>> import numpy as np
>>> traj = np.array([0, 0, 0, 1, 1, 0, 0, 0, 1, 1, 1])
>>> tables = analyse_state_series([traj], ["a", "b"], dt_ps=1.0, lags=[1])
>>> tables["transitions"][["from_state", "to_state", "count"]].values.tolist()
[['a', 'b', 2], ['b', 'a', 1]]

References
----------
N.-V. Buchete & G. Hummer, J. Phys. Chem. B 112 (2008) 6057 (core sets, transition-based
assignment). E. L. Kaplan & P. Meier, J. Am. Stat. Assoc. 53 (1958) 457. J.-H. Prinz et al.,
J. Chem. Phys. 134 (2011) 174105 (Markov models, implied timescales). H. Eyring, J. Chem. Phys. 3
(1935) 107. F. Garwood, Biometrika 28 (1936) 437.
"""

from __future__ import annotations

import os
import time
import warnings
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from .errors import DihedraError, InputFileError, one_of
from .units import H_J_S, K_B_J_PER_K, R_KJ_PER_MOL_K, check_temperature

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
CHUNK_VALUES = 4_000_000

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
    c2 = c.reshape(len(c), -1).astype(np.int64)
    n, s = c2.shape
    first = np.full(s, -1, dtype=np.int64) if last is None else np.broadcast_to(
        np.asarray(last, dtype=np.int64), (s,))
    full = np.vstack([first[None, :], c2])
    full[full < 0] = -1
    idx = np.where(full >= 0, np.arange(n + 1)[:, None], 0)
    np.maximum.accumulate(idx, axis=0, out=idx)
    out = np.take_along_axis(full, idx, axis=0)[1:]
    return out.reshape(n) if one_d else out


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


def _merge_rows(rows, counts):
    if len(rows) == 0:
        return rows.reshape(0, rows.shape[1]), counts
    uniq, inv = np.unique(rows, axis=0, return_inverse=True)
    return uniq, np.bincount(inv.reshape(-1), weights=counts, minlength=len(uniq)).astype(np.int64)


def _count_rows(columns):
    """Unique rows of the stacked 1-D int arrays ``columns`` and their counts."""
    if len(columns[0]) == 0:
        return np.empty((0, len(columns)), dtype=np.int64), np.empty(0, dtype=np.int64)
    maxima = [int(c.max()) + 1 for c in columns]
    size = int(np.prod([float(m) for m in maxima]))
    if size <= max(4 * len(columns[0]), 1 << 16):  # dense bincount on a mixed-radix key
        key = np.zeros(len(columns[0]), dtype=np.int64)
        for c, m in zip(columns, maxima):
            key = key * m + c
        cnt = np.bincount(key, minlength=size)
        nz = np.flatnonzero(cnt)
        out, rem = [], nz
        for m in reversed(maxima):
            out.append(rem % m)
            rem = rem // m
        return np.column_stack(out[::-1]), cnt[nz]
    return _merge_rows(np.column_stack(columns), np.ones(len(columns[0]), dtype=np.int64))


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

    Attributes
    ----------
    pairs_ : dict of lag -> (ndarray (n_rows, 3), ndarray (n_rows,))
        Rows (series, from_state, to_state) and their counts (after :meth:`finish`).
    segments_ : (ndarray (n_rows, 4), ndarray (n_rows,))
        Rows (series, state, length_frames, censored) and the number of such segments.
    """

    def __init__(self, n_series, lags=(1,)):
        self.n_series = int(n_series)
        self.lags_requested = sorted({int(x) for x in lags})
        self.lags = sorted({1} | set(self.lags_requested))
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
        x = np.asarray(assigned, dtype=np.int64)
        if x.ndim != 2 or x.shape[1] != self.n_series:
            raise ValueError(f"expected (n_frames, {self.n_series}) states, got shape {x.shape}")
        n = x.shape[0]
        if n == 0:
            return
        xt = np.ascontiguousarray(x.T)  # (S, n)
        lmax = self._tail.shape[1]
        full = np.concatenate([self._tail, xt], axis=1)
        v = int(full.max()) + 1
        size = self.n_series * v * v
        dense = 0 < size <= max(4 * xt.size, 1 << 16)
        if dense:  # small state space: one bincount of (series, from, to) keys per lag
            key_to = xt + (self._rows * v * v)[:, None]
            to_ok = xt >= 0
        for lag in self.lags:
            a = full[:, lmax - lag:lmax - lag + n]
            if dense:
                key = (key_to + a * v)[to_ok & (a >= 0)]
                cnt = np.bincount(key, minlength=size)
                nz = np.flatnonzero(cnt)
                rows = np.column_stack([nz // (v * v), (nz // v) % v, nz % v])
                self._pairs[lag].add(rows, cnt[nz])
                continue
            ok = (a >= 0) & (xt >= 0)
            rows = np.broadcast_to(self._rows[:, None], xt.shape)[ok]
            self._pairs[lag].add(*_count_rows([rows, a[ok], xt[ok]]))
        self._tail = full[:, -lmax:].copy()
        self._add_segments(xt)

    def _add_segments(self, xt):
        n = xt.shape[1]
        prev = np.concatenate([self._state[:, None], xt], axis=1)
        rows, ts = np.nonzero(prev[:, 1:] != prev[:, :-1])  # change at frame ts (row-major order)
        if len(rows):
            from_state = prev[rows, ts]
            same = np.r_[False, rows[1:] == rows[:-1]]
            start = np.where(same, np.r_[0, ts[:-1]], -self._run[rows])
            length = ts - start
            first = np.where(same, np.r_[-1, from_state[:-1]] < 0, self._first[rows])
            keep = from_state >= 0
            self._segments.add(*_count_rows([rows[keep], from_state[keep], length[keep],
                                             first[keep].astype(np.int64)]))
            last = np.r_[rows[1:] != rows[:-1], True]
            lr = rows[last]
            self._run += n
            self._run[lr] = n - ts[last]
            self._first[lr] = from_state[last] < 0
        else:
            self._run += n
        self._state = xt[:, -1].copy()

    def end_replica(self):
        """Close the open segments (censored) and forget the carried state."""
        open_ = self._state >= 0
        if open_.any():
            rows = self._rows[open_]
            self._segments.add(*_count_rows([rows, self._state[open_], self._run[open_],
                                             np.ones(len(rows), dtype=np.int64)]))
        self._reset()

    def finish(self):
        """End the last replica and return ``self`` with :attr:`pairs_` and :attr:`segments_`."""
        self.end_replica()
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
    counts_lag1 : ndarray (n, n)
        ``C_ij(1)`` including the diagonal (frames that stay).
    dt_ps : float
        Time between frames in ps.

    Returns
    -------
    dict with ``rate_per_ps``, ``rate_err_per_ps``, ``rate_ci_low_per_ps``, ``rate_ci_high_per_ps``
    (n, n) arrays (diagonal 0; NaN for rows never visited) and ``time_ps`` (n,), the time at risk.
    """
    from scipy.stats import chi2

    c = np.asarray(counts_lag1, dtype=float)
    t = c.sum(axis=1) * float(dt_ps)
    n = c.copy()
    np.fill_diagonal(n, 0.0)
    with np.errstate(invalid="ignore", divide="ignore"):
        tt = np.where(t > 0, t, np.nan)[:, None]
        rate = n / tt
        err = np.sqrt(n) / tt
        low = np.where(n > 0, chi2.ppf(0.025, 2 * n) / 2, 0.0) / tt
        high = chi2.ppf(0.975, 2 * n + 2) / 2 / tt
    for a in (rate, err, low, high):
        np.fill_diagonal(a, 0.0)
        a[t <= 0] = np.nan
    return {"rate_per_ps": rate, "rate_err_per_ps": err, "rate_ci_low_per_ps": low,
            "rate_ci_high_per_ps": high, "time_ps": t}


def stationary_from_rates(rate_matrix):
    """Equilibrium populations ``pi`` with ``pi K = 0`` of the generator built from rates.

    Returns NaN for every state when the rate graph is not strongly connected (some state is
    never left or never entered), since the populations are then not fixed by the rates.
    """
    from scipy.sparse.csgraph import connected_components

    k = np.nan_to_num(np.asarray(rate_matrix, dtype=float))
    n = len(k)
    if n == 0:
        return np.empty(0)
    if n == 1:
        return np.ones(1)
    n_comp, _ = connected_components(k > 0, directed=True, connection="strong")
    if n_comp != 1:
        return np.full(n, np.nan)
    q = k - np.diag(k.sum(axis=1))
    a = np.vstack([q.T, np.ones(n)])
    b = np.r_[np.zeros(n), 1.0]
    pi, *_ = np.linalg.lstsq(a, b, rcond=None)
    return np.clip(pi, 0.0, None) / np.clip(pi, 0.0, None).sum()


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
    below = s <= 0.5
    idx = np.argmax(below, axis=-1)
    median = np.where(below.any(axis=-1), d[idx] if d.size else np.nan, np.nan)
    empty = total.sum(axis=-1) == 0
    return np.where(empty, np.nan, mean), np.where(empty, np.nan, median)


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
        rng = rng or np.random.default_rng(0)
        draws = _resample_counts(np.r_[ev, ce].astype(np.int64), int(n_bootstrap), rng)
        boot, _ = kaplan_meier(d, draws[:, :len(d)], draws[:, len(d):])
        out["ci_low_ps"], out["ci_high_ps"] = (float(x) * dt_ps for x in np.percentile(boot, [2.5, 97.5]))
    return out


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


def markov_model(counts, lag_frames):
    """Reversible maximum-likelihood Markov model of a count matrix (deeptime).

    Parameters
    ----------
    counts : ndarray (n, n)
        Count matrix at lag ``lag_frames``.
    lag_frames : int

    Returns
    -------
    dict or None
        ``active`` (indices of the largest strongly connected set, :func:`largest_connected_set`),
        ``transition_matrix``,
        ``stationary``, ``timescales_frames`` (slowest first) and ``mfpt_frames`` (n_active,
        n_active; NaN when not computed); ``None`` when fewer than two states are connected.
    """
    try:
        from deeptime.markov import TransitionCountModel
        from deeptime.markov.msm import MaximumLikelihoodMSM
        from deeptime.markov.tools.analysis import mfpt
    except ImportError:  # pragma: no cover - depends on the environment
        raise DihedraError("the Markov-state analysis needs deeptime; install it with "
                           "pip install \"dihedra[kinetics]\".") from None
    c = np.asarray(counts, dtype=float)
    active = largest_connected_set(c)
    if len(active) < 2:
        return None
    sub = c[np.ix_(active, active)]
    try:
        with warnings.catch_warnings(), np.errstate(divide="ignore", invalid="ignore"):
            warnings.simplefilter("ignore")
            model = MaximumLikelihoodMSM(reversible=True).fit(
                TransitionCountModel(sub, lagtime=int(lag_frames))).fetch_model()
            active = active[np.asarray(model.count_model.state_symbols, dtype=np.int64)]
            t = np.asarray(model.transition_matrix)
            n = len(active)
            if n < 2:
                return None
            ts = np.asarray(model.timescales(k=min(n - 1, MAX_TIMESCALES)), dtype=float)
            m = np.full((n, n), np.nan)
            if n <= MAX_MFPT_STATES:
                for j in range(n):
                    m[:, j] = mfpt(t, j, tau=int(lag_frames))
    except ValueError:  # deeptime refuses degenerate count matrices
        return None
    ts = ts[np.isfinite(ts) & (ts > 0)]
    return {"active": active, "transition_matrix": t, "stationary": np.asarray(model.stationary_distribution),
            "timescales_frames": ts, "mfpt_frames": m}


def largest_connected_set(counts):
    """States of the largest strongly connected set of a count matrix (ties: more counts win).

    Two states are connected when transitions were seen both ways (directly or through other
    states of the set); the Markov model is estimated on this set only.
    """
    from scipy.sparse.csgraph import connected_components

    c = np.asarray(counts, dtype=float)
    if c.size == 0 or c.sum() == 0:
        return np.empty(0, dtype=np.int64)
    _, comp = connected_components(c > 0, directed=True, connection="strong")
    sizes = np.bincount(comp)
    weights = np.bincount(comp, weights=c.sum(axis=1))
    best = max(range(len(sizes)), key=lambda k: (sizes[k], weights[k]))
    return np.flatnonzero(comp == best)


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


@dataclass
class _Subject:
    """One discrete-trajectory pool: a torsion, a torsion type or a conformer type."""

    level: str
    name: str
    type: str
    series: np.ndarray
    label_of: object  # state code -> label
    all_pairs: bool = True  # list every ordered pair of visited states (else only observed ones)


def _split_by_series(rows, counts, series_index, n_subjects):
    """Group sparse rows by subject: series -> subject via ``series_index`` (one subject each)."""
    if len(rows) == 0:
        return [(rows[:, 1:], counts)] * n_subjects if n_subjects else []
    subj = series_index[rows[:, 0]]
    order = np.argsort(subj, kind="stable")
    subj, r, c = subj[order], rows[order, 1:], counts[order]
    bounds = np.searchsorted(subj, np.arange(n_subjects + 1))
    return [(r[bounds[k]:bounds[k + 1]], c[bounds[k]:bounds[k + 1]]) for k in range(n_subjects)]


def _subject_tables(subjects, tally, dt_ps, n_bootstrap, rng, n_replicas):
    """Table rows (dicts) for subjects that each own a disjoint set of the series of ``tally``."""
    out = {"transitions": [], "lifetimes": [], "timescales": [], "mfpt": [], "dwell_times": []}
    if not subjects:
        return out
    n_series = tally.n_series
    owner = np.full(n_series, -1, dtype=np.int64)
    for k, s in enumerate(subjects):
        owner[s.series] = k
    pair_parts = {lag: _split_by_series(*tally.pairs_[lag], owner, len(subjects)) for lag in tally.lags}
    seg_parts = _split_by_series(*tally.segments_, owner, len(subjects))
    for k, subj in enumerate(subjects):
        seg_rows, seg_counts = seg_parts[k]
        pairs1, c1 = pair_parts[1][k]
        states = np.unique(np.r_[seg_rows[:, 0] if len(seg_rows) else np.empty(0, np.int64),
                                 pairs1.reshape(-1)])
        states = states[states >= 0]
        if len(states) == 0:
            continue
        n = len(states)
        labels = [subj.label_of(int(s)) for s in states]
        head = {"level": subj.level, "name": subj.name, "type": subj.type}
        n_traj = len(subj.series) * n_replicas
        cmat = _dense(pairs1, c1, states)
        rates = rates_from_counts(cmat, dt_ps)
        # transitions
        for i in range(n):
            if rates["time_ps"][i] <= 0:
                continue
            for j in range(n):
                if i == j or (not subj.all_pairs and cmat[i, j] == 0):
                    continue
                out["transitions"].append({**head, "from_state": labels[i], "to_state": labels[j],
                                           "count": int(cmat[i, j]), "time_in_from_ps": rates["time_ps"][i],
                                           **{key: rates[key][i, j] for key in
                                              ("rate_per_ps", "rate_err_per_ps", "rate_ci_low_per_ps",
                                               "rate_ci_high_per_ps")},
                                           "n_trajectories": n_traj})
        # lifetimes and populations
        pi = stationary_from_rates(np.nan_to_num(rates["rate_per_ps"]))
        frames = np.zeros(n)
        if len(seg_rows):
            np.add.at(frames, np.searchsorted(states, seg_rows[:, 0]), seg_rows[:, 1] * seg_counts)
        counted = frames / frames.sum() if frames.sum() > 0 else frames
        exits = cmat.sum(axis=1) - np.diag(cmat)
        for i in range(n):
            sel = seg_rows[:, 0] == states[i]
            st = dwell_statistics(seg_rows[sel, 1], seg_rows[sel, 2].astype(bool), seg_counts[sel], dt_ps,
                                  n_bootstrap, rng)
            if subj.level != "torsion":  # the observed distribution, for pooled levels only (size)
                lengths, inv = np.unique(seg_rows[sel, 1], return_inverse=True)
                cens = seg_rows[sel, 2].astype(bool)
                n_cens = np.bincount(inv.reshape(-1), weights=seg_counts[sel] * cens, minlength=len(lengths))
                n_all = np.bincount(inv.reshape(-1), weights=seg_counts[sel], minlength=len(lengths))
                out["dwell_times"].extend({**head, "state": labels[i], "dwell_ps": float(n_f) * dt_ps,
                                           "n_complete": int(a - c), "n_censored": int(c)}
                                          for n_f, a, c in zip(lengths, n_all, n_cens))
            out["lifetimes"].append({**head, "state": labels[i], **st,
                                     "mean_from_rates_ps": rates["time_ps"][i] / exits[i] if exits[i] > 0
                                     else np.nan,
                                     "time_in_state_ps": frames[i] * dt_ps,
                                     "population_counted": counted[i], "population_from_rates": pi[i],
                                     "n_trajectories": n_traj})
        # Markov models at every lag
        for lag in tally.lags_requested:
            prs, cs = pair_parts[lag][k]
            msm = markov_model(_dense(prs, cs, states), lag)
            if msm is None:
                continue
            lag_head = {**head, "lag_frames": lag, "lag_ps": lag * dt_ps}
            for idx, tsc in enumerate(msm["timescales_frames"], start=1):
                out["timescales"].append({**lag_head, "index": idx, "timescale_ps": tsc * dt_ps,
                                          "n_states_connected": len(msm["active"])})
            act = msm["active"]
            for a, i in enumerate(act):
                for b, j in enumerate(act):
                    out["mfpt"].append({**lag_head, "from_state": labels[i], "to_state": labels[j],
                                        "transition_probability": msm["transition_matrix"][a, b],
                                        "mfpt_ps": np.nan if a == b else msm["mfpt_frames"][a, b] * dt_ps})
    return out


def _dense(rows, counts, states):
    n = len(states)
    c = np.zeros((n, n))
    if len(rows):
        np.add.at(c, (np.searchsorted(states, rows[:, 0]), np.searchsorted(states, rows[:, 1])), counts)
    return c


def _frames(records, columns):
    return pd.DataFrame(records, columns=columns)


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
    dict of DataFrames ``transitions``, ``lifetimes``, ``timescales``, ``mfpt`` (level ``pooled``).
    """
    tally = StateTally(1, lags)
    for d in dtrajs:
        tally.add(np.asarray(d, dtype=np.int64).reshape(-1, 1))
        tally.end_replica()
    tally.finish()
    subj = _Subject("pooled", name, "", np.array([0]), lambda s: state_labels[s])
    rec = _subject_tables([subj], tally, float(dt_ps), n_bootstrap, np.random.default_rng(seed),
                          n_replicas=len(dtrajs))
    return _tables_from_records(rec)


def _tables_from_records(rec):
    return {"transitions": _frames(rec["transitions"], TRANSITION_COLUMNS),
            "lifetimes": _frames(rec["lifetimes"], LIFETIME_COLUMNS),
            "timescales": _frames(rec["timescales"], TIMESCALE_COLUMNS),
            "mfpt": _frames(rec["mfpt"], MFPT_COLUMNS),
            "dwell_times": _frames(rec["dwell_times"], DWELL_COLUMNS)}


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
    from .populations import _short_type_names
    from .trackpass import conformer_layout

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
    if not needed <= set(table.columns):
        return {}
    out = {}
    for row in table.to_dict("records"):
        torsion = row.get("torsion")
        key = ("torsion", torsion) if isinstance(torsion, str) and torsion else ("type", row["type"])
        a, b = scheme.assign([row["from_minimum_deg"], row["to_minimum_deg"]])
        if a < 0 or b < 0 or a == b:
            continue
        for i, j, which in ((a, b, "first"), (b, a, "second")):
            value = row[f"height_from_{which}_kj_mol"]
            err = row.get(f"height_from_{which}_err_kj_mol", np.nan)
            if value is None or not np.isfinite(value):
                continue
            k = key + (scheme.labels[int(i)], scheme.labels[int(j)])
            if k not in out or value < out[k][0]:
                out[k] = (float(value), float(err))
    return out


def kinetics(folder, assignment="core", core_margin_deg=DEFAULT_CORE_MARGIN_DEG, lags=DEFAULT_LAGS,
             types=None, dt_ps=None, temperature_k=None, n_bootstrap=DEFAULT_BOOTSTRAP, seed=0,
             conformers=True, write=True, batch_frames=None, log=None):
    """Transitions, dwell times, rates, Markov timescales and Eyring barriers of a results folder.

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
        Bootstrap samples of the dwell-time intervals.
    seed : int
        Seed of the bootstrap.
    conformers : bool
        Also analyse conformers (joint states of the torsions of each group).
    write : bool
        Write the tables and ``kinetics.json`` into ``folder`` (each through a temporary name).
    batch_frames : int, optional
        Frames read at a time (default: about 4 million values per chunk).
    log : callable, optional
        Receives progress lines.

    Returns
    -------
    KineticsResult
    """
    from .resultsdir import iter_table, load_results

    say = log or (lambda msg: None)
    t0 = time.time()
    one_of("assignment", assignment, ASSIGNMENTS)
    result = load_results(folder)
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
    labels = [torsions["torsion"].iloc[p] for p in selected]
    ttypes = [torsions["type"].iloc[p] for p in selected]
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
    if lags_used and not _have_deeptime():
        notices.append("deeptime is not installed: no Markov models, implied timescales or mean "
                       "first-passage times (pip install \"dihedra[kinetics]\").")
        lags_used = []
    n_s = scheme.n_states
    powers = [n_s ** np.arange(len(m), dtype=np.int64) for m in g_members]
    t_tally = StateTally(len(selected), lags_used)
    c_tally = StateTally(len(g_names), lags_used) if g_names else None
    say(f"reading {kind}.parquet: {len(selected)} torsions, {len(g_names)} conformer groups, "
        f"{len(frames_per_rep)} replica(s)")
    batch = batch_frames or max(64, CHUNK_VALUES // max(1, len(selected)))
    carry = np.full(len(selected), -1, dtype=np.int64)
    current = None
    n_frames_read = 0
    for chunk in iter_table(path, columns=labels, batch_frames=batch):
        reps = chunk["replica"].to_numpy()
        values = chunk[labels].to_numpy()
        cuts = np.flatnonzero(np.diff(reps)) + 1
        for lo, hi in zip(np.r_[0, cuts], np.r_[cuts, len(reps)]):
            rep = int(reps[lo])
            if rep != current:
                if current is not None:
                    t_tally.end_replica()
                    if c_tally is not None:
                        c_tally.end_replica()
                carry[:] = -1
                current = rep
            block = values[lo:hi]
            codes = scheme.core_codes(block, margin) if kind == "angles" else block
            assigned = fill_forward(codes, carry)
            carry = assigned[-1].copy()
            t_tally.add(assigned)
            if c_tally is not None:
                joint = np.stack([assigned[:, m] @ pw for m, pw in zip(g_members, powers)], axis=1)
                bad = np.stack([(assigned[:, m] < 0).any(axis=1) for m in g_members], axis=1)
                joint[bad] = -1
                c_tally.add(joint)
            n_frames_read += hi - lo
    t_tally.finish()
    if c_tally is not None:
        c_tally.finish()
    say(f"{n_frames_read} frames read; estimating rates, dwell times and Markov models")
    rng = np.random.default_rng(seed)
    state_label = lambda s: scheme.labels[s]  # noqa: E731
    n_rep = len(frames_per_rep)
    rec = _subject_tables([_Subject("torsion", lab, typ, np.array([k]), state_label)
                           for k, (lab, typ) in enumerate(zip(labels, ttypes))], t_tally, dt, n_boot, rng, n_rep)
    type_names = list(dict.fromkeys(ttypes))
    ttypes_arr = np.array(ttypes, dtype=object)
    rec_t = _subject_tables([_Subject("type", t, t, np.flatnonzero(ttypes_arr == t), state_label)
                             for t in type_names], t_tally, dt, n_boot, rng, n_rep)
    for key in rec:
        rec[key].extend(rec_t[key])
    if c_tally is not None:
        short_arr = np.array(g_short, dtype=object)
        subjects = []
        for gt in dict.fromkeys(g_short):
            idx = np.flatnonzero(short_arr == gt)
            size = len(g_members[idx[0]])
            subjects.append(_Subject("conformer", gt, g_long[idx[0]], idx,
                                     lambda s, k=size: "|".join(scheme.labels[(s // n_s ** j) % n_s]
                                                                for j in range(k)),
                                     all_pairs=False))
        rec_c = _subject_tables(subjects, c_tally, dt, n_boot, rng, n_rep)
        for key in rec:
            rec[key].extend(rec_c[key])
    tables = _tables_from_records(rec)
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
        "markov_estimator": "deeptime MaximumLikelihoodMSM(reversible=True), largest connected set",
        "caution": TST_CAUTION,
    }
    out = KineticsResult(notices=notices, parameters=params, folder=folder, **tables)
    if write:
        write_kinetics(out, folder, seconds=time.time() - t0)
    return out


def _have_deeptime():
    import importlib.util

    return importlib.util.find_spec("deeptime") is not None


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
    values = np.array([barriers.get(tuple(row), (np.nan, np.nan)) for row in
                       transitions[["level", "name", "from_state", "to_state"]].itertuples(index=False)],
                      dtype=float).reshape(-1, 2)
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
    from . import __version__
    from .resultsdir import write_json, write_table

    written = []
    tables = [("transitions.csv", result.transitions), ("lifetimes.csv", result.lifetimes),
              ("timescales.csv", result.timescales), ("mfpt.csv", result.mfpt)]
    if result.dwell_times is not None:
        tables.append(("dwell_times.csv", result.dwell_times))
    for name, frame in tables:
        tmp = f".{name}.partial"
        write_table(frame, folder, tmp)
        os.replace(os.path.join(folder, tmp), os.path.join(folder, name))
        written.append(name)
    doc = {"dihedra_version": __version__, "created": time.strftime("%Y-%m-%dT%H:%M:%S%z"),
           "parameters": result.parameters, "notices": list(result.notices), "files": written,
           "run_seconds": None if seconds is None else round(seconds, 3)}
    write_json(doc, folder, ".kinetics.json.partial")
    os.replace(os.path.join(folder, ".kinetics.json.partial"), os.path.join(folder, "kinetics.json"))
    return written

