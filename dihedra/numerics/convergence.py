"""Is a time average converged? Equilibration detection, replica agreement and a forecast of the
sampling still needed, on plain arrays (the series of one observable, the populations of replicas).

Methods
-------
* **Equilibration detection** (Chodera, J. Chem. Theory Comput. 12 (2016) 1799): the start t0 of
  the production part is the one that maximises the number of effectively uncorrelated samples
  after it, N_eff(t0) = (N - t0) / g(t0), with g(t0) the statistical inefficiency of the series
  from t0 on (:func:`~dihedra.numerics.statistics.statistical_inefficiency`, Chodera, Swope,
  Pitera, Seok & Dill, J. Chem. Theory Comput. 3 (2007) 26). :func:`detect_start` scans t0 on a
  grid of about 100 points and refines around the best one on grids ten times finer each time,
  so a series of M points costs about 100 + 21 log10(M / 200) inefficiencies of at most M points
  (O(M log M) each): about 130 at 2,000 points, 160 at 100,000.
* **Is the dropped start really different?** The argmax above always finds some t0, also in a
  stationary series. :func:`drift_z` compares the mean before t0 with the mean after it, both with
  the error the stationary part implies (its g and variance); :data:`DRIFT_Z` is the threshold,
  set from synthetic stationary series (AR(1) and two-state Markov chains) so that fewer than
  about 1 % of them are flagged.
* **Replica agreement**: a chi-square test of the replicas' populations of one state, each with
  its own autocorrelation-aware standard error (:func:`replica_chi_square`):
  chi2 = sum_r (p_r - p_w)^2 / se_r^2 with p_w the inverse-variance weighted mean, R - 1 degrees
  of freedom (the usual test of the homogeneity of independent estimates; e.g. Bevington &
  Robinson, Data Reduction and Error Analysis, 3rd ed., 2003, ch. 11).
* **Forecast**: the standard error of a mean falls as sqrt(g var / N) (Chodera et al. 2007), so
  the simulated time needed for a target error is the time so far times (se / target)^2
  (:func:`time_needed`).
"""

from __future__ import annotations

from typing import NamedTuple

import numpy as np

from .statistics import statistical_inefficiencies, statistical_inefficiency

#: ``|z|`` of the difference between the mean before and after a detected t0 above which the start
#: is reported as not equilibrated (see :func:`drift_z`).
DRIFT_Z = 4.0

#: A start counts as unequilibrated only when including it shifts the mean by more than this many
#: standard errors (otherwise its bias is lost in the noise and nothing needs discarding).
DRIFT_SHIFT_SE = 1.0

#: Fewest effective samples after t0 for a verdict on the start.
MIN_START_SAMPLES = 20

#: Candidate starts scanned on the first, coarse grid of :func:`detect_start`.
N_CANDIDATES = 100

#: Each refinement of :func:`detect_start` searches around the best start so far on a grid this
#: many times finer (about twice as many points), until the grid is single points.
REFINE = 10

#: :func:`equilibration` takes the earliest start whose N_eff is within this fraction of the
#: largest: the estimate of g is noisy (10-20 %), so the plain maximum often lands well after
#: the end of a drift, where N_eff is no larger in truth.
N_EFF_TOLERANCE = 0.05


def series_error(x, var_floor=0.0):
    """Mean, standard error and statistical inefficiency of a time series.

    Parameters
    ----------
    x : array-like, shape (n,)
    var_floor : float
        Smallest variance used (so that a series that never moved, for example a replica stuck
        in one state, does not claim an error of zero).

    Returns
    -------
    mean, se, g : float
        se = sqrt(g var / n) (Chodera et al. 2007); NaN for an empty series.

    Examples
    --------
    >>> mean, se, g = series_error([0.0, 1.0, 0.0, 1.0])
    >>> round(mean, 3), g
    (0.5, 1.0)
    """
    mean, se, g = series_errors(np.asarray(x, dtype=float).reshape(-1, 1), var_floor)
    return float(mean[0]), float(se[0]), float(g[0])


def series_errors(x, var_floor=0.0):
    """:func:`series_error` of every column of ``x`` (n, k), with ``var_floor`` a number or one
    per column: arrays of the k means, standard errors and statistical inefficiencies."""
    x = np.asarray(x, dtype=float)
    n, k = x.shape
    if n == 0:
        return np.full(k, np.nan), np.full(k, np.nan), np.full(k, np.nan)
    var = np.where(x.max(axis=0) == x.min(axis=0), 0.0, x.var(axis=0))   # (constant: 0, not the rounding)
    var = np.maximum(var, np.asarray(var_floor, dtype=float))
    g = statistical_inefficiencies(x) if n > 1 else np.ones(k)
    return x.mean(axis=0), np.sqrt(g * var / n), g


def detect_start(x, min_kept=None, n_candidates=N_CANDIDATES, tolerance=0.0):
    """The start of the stationary part of a series (Chodera 2016).

    Parameters
    ----------
    x : array-like, shape (n,)
    min_kept : int, optional
        Points that must stay after t0 (default: half of the series, at least 5).
    n_candidates : int
        Points of the first, coarse grid of t0; the best one is then refined on grids
        :data:`REFINE` times finer each, down to single points (a series of a few thousand points
        goes from the coarse grid to single points at once).
    tolerance : float
        0 (the default): the t0 of the largest N_eff, as published. Above 0: the earliest t0 whose
        N_eff is at least (1 - tolerance) times the largest.

    Returns
    -------
    t0 : int
        Index of the first point of the stationary part.
    g : float
        Statistical inefficiency of ``x[t0:]``.
    n_effective : float
        (n - t0) / g, the largest over the candidates.

    Examples
    --------
    A series that relaxes from 3 to 0 over its first 100 points, in noise of unit variance: the
    start is where what is left of the relaxation drowns in the noise.

    >>> rng = np.random.default_rng(0)
    >>> x = np.r_[np.linspace(3.0, 0.0, 100), np.zeros(400)] + rng.normal(size=500)
    >>> detect_start(x)
    (68, 1.0, 432.0)
    """
    x = np.asarray(x, dtype=float)
    n = x.size
    if min_kept is None:
        min_kept = max(5, n - n // 2)
    last = n - max(1, int(min_kept))
    if last <= 0:
        return 0, statistical_inefficiency(x) if n > 1 else 1.0, float(n)
    step = max(1, (last + 1) // int(n_candidates))
    scores = {}

    def score(t0):
        if t0 not in scores:
            g = statistical_inefficiency(x[t0:])
            scores[t0] = ((n - t0) / g, g)
        return scores[t0][0]

    def pick(candidates):
        candidates = list(candidates)
        top = max(score(t) for t in candidates)
        return next(t for t in candidates if score(t) >= (1.0 - tolerance) * top)

    best = pick(range(0, last + 1, step))
    while step > 1:   # around the best, on a grid REFINE times finer, down to single points
        fine = max(1, step // REFINE)
        reach = (step - 1) // fine * fine
        best = pick(range(max(0, best - reach), min(last, best + reach) + 1, fine))
        step = fine
    n_eff, g = scores[best]
    return int(best), float(g), float(n_eff)


def drift_z(x, t0, var_floor=0.0):
    """How far the mean before ``t0`` lies from the mean after it, in standard errors.

    Both errors are those of the stationary part ``x[t0:]`` (its statistical inefficiency g and
    variance) for the number of points of each part: z = ``|m_before - m_after|`` /
    sqrt(g var (1/t0 + 1/(n - t0))). Zero for t0 = 0.

    Examples
    --------
    >>> x = np.r_[np.ones(10), np.tile([0.0, 1.0], 45)]
    >>> round(drift_z(x, 10), 2)   # 0.5 / sqrt(g 0.25 (1/10 + 1/90)), g = 1
    3.0
    """
    x = np.asarray(x, dtype=float)
    n = x.size
    t0 = int(t0)
    if t0 <= 0 or t0 >= n:
        return 0.0
    after = x[t0:]
    var = max(float(np.var(after)), float(var_floor))
    g = statistical_inefficiency(after) if after.size > 1 else 1.0
    diff = abs(float(x[:t0].mean()) - float(after.mean()))
    if diff == 0:
        return 0.0
    if var == 0:
        return float("inf")
    return diff / float(np.sqrt(g * var * (1.0 / t0 + 1.0 / (n - t0))))


class Start(NamedTuple):
    """The start of a series (:func:`equilibration`)."""

    t0: int                  #: first point of the stationary part (Chodera 2016)
    g: float                 #: statistical inefficiency after t0
    n_effective: float       #: (n - t0) / g
    z: float                 #: :func:`drift_z` at t0
    shift_se: float          #: shift of the mean by the points before t0, in standard errors
    before: float            #: mean before t0 (NaN for t0 = 0)
    after: float             #: mean from t0 on
    drifts: bool             #: whether the start counts as unequilibrated


def equilibration(x, var_floor=0.0):
    """Detect the start of the stationary part of ``x`` and say whether the part before it matters.

    The start t0 is that of :func:`detect_start` (Chodera 2016), sought in the first half of the
    series, the earliest within :data:`N_EFF_TOLERANCE` of the largest N_eff. The part before it
    counts as unequilibrated (``drifts``) when all of: its mean differs from the rest by more than
    :data:`DRIFT_Z` standard errors (:func:`drift_z`); keeping it shifts the mean of the whole
    series by more than :data:`DRIFT_SHIFT_SE` standard errors; and the rest holds at least
    :data:`MIN_START_SAMPLES` effective samples.

    Examples
    --------
    >>> rng = np.random.default_rng(0)
    >>> x = np.r_[np.linspace(3.0, 0.0, 100), np.zeros(400)] + rng.normal(size=500)
    >>> s = equilibration(x)
    >>> s.t0, s.drifts, round(s.z, 1)
    (68, True, 15.5)
    """
    x = np.asarray(x, dtype=float)
    n = x.size
    t0, g, n_eff = detect_start(x, tolerance=N_EFF_TOLERANCE)
    after = float(x[t0:].mean()) if n else np.nan
    if t0 == 0:
        return Start(0, g, n_eff, 0.0, 0.0, np.nan, after, False)
    before = float(x[:t0].mean())
    z = drift_z(x, t0, var_floor)
    var = max(float(np.var(x[t0:])), float(var_floor))
    se_after = np.sqrt(g * var / (n - t0))
    shift = abs(before - after) * t0 / n
    shift_se = float(shift / se_after) if se_after > 0 else (np.inf if shift > 0 else 0.0)
    drifts = bool(z > DRIFT_Z and shift_se > DRIFT_SHIFT_SE and n_eff >= MIN_START_SAMPLES)
    return Start(int(t0), float(g), float(n_eff), float(z), shift_se, before, after, drifts)


def replica_chi_square(values, errors):
    """Chi-square test that independent estimates of one quantity agree.

    Parameters
    ----------
    values, errors : array-like, shape (n_replicas,)
        Each replica's estimate and its standard error (positive).

    Returns
    -------
    chi2 : float
        sum_r (v_r - v_w)^2 / e_r^2, v_w the inverse-variance weighted mean.
    dof : int
        n_replicas - 1.
    p_value : float
        Probability of a chi2 at least this large when the replicas sample one distribution
        (``scipy.special.chdtrc``, the ``sf`` of ``scipy.stats.chi2``); 1.0 with fewer than two
        replicas.

    Examples
    --------
    >>> chi2, dof, p = replica_chi_square([0.50, 0.52], [0.01, 0.01])
    >>> round(chi2, 2), dof, round(p, 3)
    (2.0, 1, 0.157)
    """
    v = np.asarray(values, dtype=float)
    e = np.asarray(errors, dtype=float)
    if v.size < 2:
        return 0.0, 0, 1.0
    # chi2.sf of scipy.stats is scipy.special's chdtrc (the same numbers); scipy.special comes with
    # MDAnalysis, scipy.stats would add 0.2-0.6 s to every run
    from scipy.special import chdtrc

    dof = int(v.size - 1)
    if np.all(v == v[0]):
        return 0.0, dof, 1.0
    w = 1.0 / np.maximum(e, 1e-12) ** 2
    mean = float(np.sum(w * v) / np.sum(w))
    stat = float(np.sum(w * (v - mean) ** 2))
    return stat, dof, float(chdtrc(dof, stat))


def time_needed(se, target, time_so_far):
    """Simulated time for a target standard error, from se ~ 1 / sqrt(time) (Chodera et al.
    2007: se = sqrt(g var / N)).

    Examples
    --------
    Halving the error takes four times the sampling:

    >>> time_needed(0.02, 0.01, 1000.0)
    4000.0
    """
    return float(time_so_far) * (float(se) / float(target)) ** 2


def combine_errors(errors, weights):
    """Standard error of a weighted mean of independent estimates (weights summing to anything):
    sqrt(sum (w_r / W)^2 se_r^2)."""
    w = np.asarray(weights, dtype=float)
    e = np.asarray(errors, dtype=float)
    total = w.sum()
    if total <= 0:
        return float("nan")
    return float(np.sqrt(np.sum((w / total) ** 2 * e ** 2)))
