"""Uncertainty of time averages from correlated samples.

Two estimators, both standard:

* Statistical inefficiency g of a time series (Chodera, Swope, Pitera, Seok & Dill, J. Chem.
  Theory Comput. 3 (2007) 26): g = 1 + 2 sum_{t=1}^{N-1} (1 - t/N) C_t, with the sum stopped at the
  first non-positive autocorrelation C_t; the effective number of samples is N/g and the standard
  error of the mean is sqrt(var / (N/g)). Used where the full series is at hand.
* Block averaging (Flyvbjerg & Petersen, J. Chem. Phys. 91 (1989) 461) on the per-block sums the
  trajectory pass keeps, so that errors never need the raw series: blocks are merged pairwise
  (within one replica only) and the standard error is taken as the largest over the levels that
  keep at least :data:`MIN_BLOCKS` blocks (the conservative reading of the blocking plateau,
  common practice). With several replicas, the spread of the replica means is a last level: the
  error is never smaller than the one it implies, so replicas stuck in different states show it.
  In a run of few correlation times even the coarsest level is biased low; the error is raised
  by the bias an exponential autocorrelation implies (:mod:`dihedra.numerics.blocking_bias`).

Weighted (reweighted) samples use the ratio estimator with per-block weight sums.
"""

import numpy as np

#: Fewest blocks a blocking level may have to enter the error estimate.
MIN_BLOCKS = 8


def statistical_inefficiency(x, mintime=3):
    """Statistical inefficiency g >= 1 of a time series (Chodera et al. 2007).

    Parameters
    ----------
    x : array-like, shape (N,)
    mintime : int
        The sum over lags runs at least up to this lag before stopping at the first
        non-positive autocorrelation (as in Chodera et al.).

    Returns
    -------
    float
        g; 1.0 for a constant or too short series (constant: every value the same, whatever
        the rounding of their mean).
    """
    return float(statistical_inefficiencies(np.asarray(x, dtype=float).reshape(-1, 1), mintime)[0])


def statistical_inefficiencies(x, mintime=3):
    """:func:`statistical_inefficiency` of every column of ``x`` (N, k), in one FFT call.

    >>> rng = np.random.default_rng(1)
    >>> x = np.c_[rng.normal(size=200), np.repeat(rng.normal(size=20), 10), np.ones(200)]
    >>> g = statistical_inefficiencies(x)
    >>> bool(g[0] < 1.5 and g[1] > 5), float(g[2])
    (True, 1.0)
    """
    x = np.asarray(x, dtype=float)
    n, k = x.shape
    g = np.ones(k)
    if n < 2 or k == 0:
        return g
    # a constant column has g = 1 (its deviations from a rounded mean are not a signal)
    cols = np.flatnonzero(x.max(axis=0) != x.min(axis=0))
    if not len(cols):
        return g
    dx = x[:, cols] - x[:, cols].mean(axis=0)
    var = np.einsum("ij,ij->j", dx, dx) / n
    # autocorrelation by FFT, C_t for t = 1..N-1
    size = 1 << (2 * n - 1).bit_length()
    f = np.fft.rfft(dx, size, axis=0)
    acov = np.fft.irfft(f * np.conj(f), size, axis=0)[1:n] / (n - np.arange(1, n))[:, None]
    c = acov / var
    # the sum runs up to (not including) the first lag t > mintime with C_t <= 0
    t = np.arange(1, n)
    stop = (c <= 0) & (t > mintime)[:, None]
    end = np.where(stop.any(axis=0), stop.argmax(axis=0), n - 1)
    terms = np.where(np.arange(n - 1)[:, None] < end, c * (1.0 - t / n)[:, None], 0.0)
    g[cols] = np.maximum(1.0, 1.0 + 2.0 * terms.sum(axis=0))
    return g


def weighted_block_error(block_values, block_weights):
    """Standard error of a weighted mean from independent block means (ratio estimator).

    Parameters
    ----------
    block_values : ndarray, shape (n_blocks, ...)
        Per-block sums of the observable times the weight (for a population: weighted count of
        frames in the state).
    block_weights : ndarray, shape (n_blocks,) or broadcastable
        Per-block sums of weights (frame counts when unweighted).

    Returns
    -------
    mean, se : ndarrays of shape block_values.shape[1:]
        se is NaN with fewer than two non-empty blocks.
    """
    v = np.asarray(block_values, dtype=float)
    w = np.asarray(block_weights, dtype=float)
    w = w.reshape(w.shape + (1,) * (v.ndim - w.ndim))
    total_w = w.sum(axis=0)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = v.sum(axis=0) / total_w
        nonempty = (np.broadcast_to(w, v.shape) > 0).sum(axis=0)
        resid = v - w * mean
        var = (resid ** 2).sum(axis=0) / total_w ** 2 * nonempty / (nonempty - 1)
    se = np.sqrt(var)
    se = np.where(nonempty >= 2, se, np.nan)
    return mean, se


def merge_pairs(values, weights, replica):
    """Merge neighbouring blocks of the same replica pairwise (one blocking step)."""
    a, b, r = _pairs(replica)
    return values[a] + values[b], weights[a] + weights[b], r


def _pairs(replica):
    """Blocks merged by one blocking step: first and second block of each pair, and the pair's
    replica (replicas in increasing order, the blocks of one in their order, an odd last one
    left out)."""
    replica = np.asarray(replica)
    out_a, out_b, out_r = [], [], []
    for r in np.unique(replica):
        sel = np.flatnonzero(replica == r)
        n_pairs = len(sel) // 2
        out_a.append(sel[0:2 * n_pairs:2])
        out_b.append(sel[1:2 * n_pairs:2])
        out_r.append(np.full(n_pairs, r, dtype=replica.dtype))
    if not out_a:
        return np.empty(0, dtype=np.intp), np.empty(0, dtype=np.intp), replica[:0]
    return np.concatenate(out_a), np.concatenate(out_b), np.concatenate(out_r)


def blocking_error(block_values, block_weights, block_replica, min_blocks=MIN_BLOCKS, weight_columns=None,
                   pool=None, short_run=True, levels=False):
    """Mean and conservative standard error by Flyvbjerg-Petersen blocking.

    Parameters
    ----------
    block_values : ndarray, shape (n_blocks, ...)
        Weighted sums per block (e.g. frames in a state per block and torsion).
    block_weights : ndarray, shape (n_blocks,) or (n_blocks, ...) broadcastable to the values
        Weight sums per block (frames per block when unweighted).
    block_replica : ndarray of int, shape (n_blocks,)
        Replica of each block; blocks of different replicas are never merged.
    min_blocks : int
        Levels with fewer non-empty blocks are not used.

    Returns
    -------
    mean : ndarray, shape block_values.shape[1:]
    se : ndarray, same shape
        The largest standard error over the usable levels (NaN if none).
    n_effective : ndarray, same shape
        Effective number of independent samples implied for an indicator (0/1) observable,
        p (1 - p) / se**2, capped at the number of samples; NaN where it is undefined: no error
        (fewer than two blocks with samples) or an error of 0 (a state never entered, or never
        left, in any block).

    Other Parameters
    ----------------
    weight_columns : ndarray of int, optional
        With 2-D ``block_values`` (n_blocks, n_columns): ``block_weights`` is (n_blocks, n_w) and
        column k of the values takes the weights ``block_weights[:, weight_columns[k]]`` (read
        there, without building the (n_blocks, n_columns) copy).
    pool : ndarray of int, optional
        Columns (of the flattened values) with the same non-negative number share one fitted
        correlation time for the short-run correction (copies of one torsion); by default each
        column is fitted alone.
    short_run : bool
        Raise the errors for the bias of a run of few correlation times
        (:func:`dihedra.numerics.blocking_bias.corrected_errors`); ``False`` gives the
        Flyvbjerg-Petersen estimate alone.
    levels : bool
        Also return a :class:`BlockingLevels` (the error of every usable level, for a correction
        pooled over several calls).

    Notes
    -----
    Every column goes through all the levels in one compiled call
    (:func:`dihedra.numerics._kernels.blocking_columns`): the blocks of each level are merged
    pairwise within their replica, the standard error of each level is that of
    :func:`weighted_block_error`, and the largest over the levels with at least ``min_blocks``
    blocks is kept (the plain block error where no level has enough); the replicas, independent
    samples, give one more estimate from one block each, so that replicas that disagree are
    never hidden by blocks that look converged inside each. Then, unless ``short_run=False``,
    the error is raised where the levels show a run of few correlation times
    (:mod:`dihedra.numerics.blocking_bias`: the coarsest level of a run of 8 correlation times
    gives about 0.58 of the true error).
    """
    from .angles import compiled_kernels

    mean, se, n_eff, found = _compiled_blocking(compiled_kernels(), block_values, block_weights, block_replica,
                                                min_blocks, weight_columns)
    if short_run:
        se, n_eff = short_run_errors(mean, se, n_eff, found, pool)
    return (mean, se, n_eff, found) if levels else (mean, se, n_eff)


class BlockingLevels:
    """The usable levels of a blocking analysis: ``se`` (n_levels, ...) the error of each level
    (finest first, the shape of the values after the first axis), ``n_blocks`` (n_levels,) and
    ``n_replicas``."""

    def __init__(self, se, n_blocks, n_replicas):
        self.se, self.n_blocks, self.n_replicas = se, np.asarray(n_blocks), int(n_replicas)

    @classmethod
    def joined(cls, parts, axis=0):
        """The levels of several calls over the same blocks, their columns joined along ``axis``
        of the values."""
        return cls(np.concatenate([p.se for p in parts], axis=1 + axis), parts[0].n_blocks, parts[0].n_replicas)


def short_run_errors(mean, se, n_eff, found, pool=None):
    """``se`` and ``n_eff`` of :func:`blocking_error` raised for the bias of a short run, from
    the levels ``found`` (a :class:`BlockingLevels`); ``pool`` as there."""
    from .blocking_bias import MIN_LEVELS, corrected_errors

    if len(found.n_blocks) < MIN_LEVELS:   # (too few levels to see a short run)
        return se, n_eff
    shape = np.shape(se)
    flat = np.asarray(se, dtype=float).reshape(-1)
    level_se = found.se.reshape(len(found.n_blocks), -1)
    raised, _ = corrected_errors(flat, level_se, found.n_blocks, found.n_replicas,
                                 None if pool is None else np.asarray(pool).reshape(-1))
    changed = raised > flat
    if not changed.any():
        return se, n_eff
    m = np.asarray(mean, dtype=float).reshape(-1)
    n_eff = np.array(n_eff, dtype=float).reshape(-1)
    n_eff[changed] = np.fmin(m[changed] * (1.0 - m[changed]) / raised[changed] ** 2, n_eff[changed])
    return raised.reshape(shape), n_eff.reshape(shape)


def _blocking_levels(replica, min_blocks=MIN_BLOCKS):
    """The merges of :func:`blocking_error` for blocks of the given replicas: ``(pair_a, pair_b,
    sizes)``, level after level while a level keeps at least ``min_blocks`` blocks; level k merges
    blocks ``pair_a[j]`` and ``pair_b[j]`` of level k - 1 (``j`` in that level's slice)."""
    r = np.asarray(replica)
    pair_a, pair_b, sizes = [], [], []
    while True:
        a, b, r = _pairs(r)
        if len(a) < min_blocks:
            break
        pair_a.append(a)
        pair_b.append(b)
        sizes.append(len(a))
    empty = np.empty(0, dtype=np.int64)
    return (np.concatenate(pair_a).astype(np.int64) if pair_a else empty,
            np.concatenate(pair_b).astype(np.int64) if pair_b else empty,
            np.asarray(sizes, dtype=np.int64))


def _compiled_blocking(kernels, block_values, block_weights, block_replica, min_blocks,
                       weight_columns=None):
    v = np.asarray(block_values, dtype=float)
    shape = v.shape[1:]
    n_blocks = len(v)
    v = np.ascontiguousarray(v.reshape(n_blocks, -1))
    w = np.asarray(block_weights, dtype=float)
    given = weight_columns is not None
    if not given:
        # weights broadcast over the values: each values column points at its weights column
        w = w.reshape(w.shape + (1,) * (np.ndim(block_values) - w.ndim))
        index = np.arange(int(np.prod(w.shape[1:], dtype=np.int64))).reshape(w.shape[1:])
        weight_columns = np.broadcast_to(index, shape).reshape(-1)
    w = np.ascontiguousarray(w.reshape(n_blocks, -1))
    # (always a writable copy: a read-only view, as np.broadcast_to gives, would make numba load
    # a second machine code of the kernel: up to a tenth of a second)
    weight_columns = np.array(weight_columns, dtype=np.int64)
    r = np.asarray(block_replica)
    # blocks with weight in the columns used (as the NumPy code sees them)
    kept = np.flatnonzero((w[:, np.unique(weight_columns)] if given else w).sum(axis=1) > 0)
    pair_a, pair_b, sizes = _blocking_levels(r[kept], min_blocks)
    replicas, rep_index = np.unique(r[kept], return_inverse=True)
    mean, se, n_eff = (np.empty(v.shape[1]) for _ in range(3))
    level_se = np.empty((1 + len(sizes), v.shape[1]))
    use_first = len(kept) >= min_blocks
    kernels.blocking_columns(v, w, weight_columns, kept.astype(np.int64), pair_a, pair_b, sizes,
                             use_first, rep_index.astype(np.int64).reshape(-1),
                             len(replicas), mean, se, n_eff, level_se)
    n_blocks = np.concatenate([[len(kept)], sizes])
    if not use_first:
        level_se, n_blocks = level_se[1:], n_blocks[1:]
    found = BlockingLevels(level_se.reshape((len(n_blocks),) + shape), n_blocks, len(replicas))
    return mean.reshape(shape), se.reshape(shape), n_eff.reshape(shape), found
