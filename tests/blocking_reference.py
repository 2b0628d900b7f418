"""A plain NumPy implementation of Flyvbjerg-Petersen blocking (Flyvbjerg & Petersen, J. Chem.
Phys. 91 (1989) 461), written the straightforward way, level after level: the independent
reference for dihedra's compiled blocking analysis (dihedra.numerics.statistics.blocking_error)."""

import numpy as np

from dihedra.numerics.statistics import MIN_BLOCKS, merge_pairs, weighted_block_error


def reference_blocking(block_values, block_weights, block_replica, min_blocks=MIN_BLOCKS, weight_columns=None):
    """Mean, conservative standard error and effective samples (see blocking_error)."""
    if weight_columns is not None:
        block_weights = np.asarray(block_weights)[:, np.asarray(weight_columns)]
    v = np.asarray(block_values, dtype=float)
    w = np.asarray(block_weights, dtype=float)
    r = np.asarray(block_replica)
    w = w.reshape(w.shape + (1,) * (v.ndim - w.ndim))
    keep = w.reshape(len(w), -1).sum(axis=1) > 0
    v, w, r = v[keep], w[keep], r[keep]
    mean, first = weighted_block_error(v, w)
    best = np.where(len(w) >= min_blocks, first, np.nan)
    while True:
        v, w, r = merge_pairs(v, w, r)
        if len(w) < min_blocks:
            break
        _, se = weighted_block_error(v, w)
        best = np.fmax(best, se)
    # too few blocks for a plateau: plain block error (n_effective then tells how rough it is)
    best = np.where(np.isnan(best), first, best)
    # replicas are independent samples too: a disagreement between them is never hidden by
    # well-converged-looking blocks inside each (the last blocking level: one block per replica)
    v0 = np.asarray(block_values, dtype=float)[keep]
    w0 = np.asarray(block_weights, dtype=float)
    w0 = w0.reshape(w0.shape + (1,) * (v0.ndim - w0.ndim))[keep]
    replicas = np.unique(r0 := np.asarray(block_replica)[keep])
    if len(replicas) >= 2:
        v_rep = np.stack([v0[r0 == k].sum(axis=0) for k in replicas])
        w_rep = np.stack([w0[r0 == k].sum(axis=0) for k in replicas])
        _, se_rep = weighted_block_error(v_rep, w_rep)
        best = np.fmax(best, se_rep)
    n_samples = np.asarray(block_weights, dtype=float)
    n_samples = n_samples.reshape(n_samples.shape + (1,) * (np.ndim(block_values) - n_samples.ndim))
    n_samples = np.broadcast_to(n_samples.sum(axis=0), np.shape(mean))
    with np.errstate(invalid="ignore", divide="ignore"):
        n_eff = mean * (1.0 - mean) / best ** 2
        # no error (NaN) or an error of 0 (a state never entered or never left): p (1 - p) / se^2
        # is undefined there, so n_effective is NaN, never infinite
        n_eff = np.where(best > 0, np.minimum(n_eff, n_samples), np.nan)
    return mean, best, n_eff
