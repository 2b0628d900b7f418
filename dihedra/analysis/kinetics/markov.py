"""Reversible Markov state models of stacks of count matrices, at one lag at a time.

For each lag ``tau`` the reversible maximum-likelihood transition matrix is estimated from the
count matrix ``C(tau)`` on its largest strongly connected set, for all matrices of a stack at once
(:func:`reversible_transition_matrices`: Newton's method on a convex function, Bowman et al.,
J. Chem. Phys. 131 (2009) 124101; Prinz et al., J. Chem. Phys. 134 (2011) 174105). From it come
the implied timescales ``t_k(tau) = -tau / ln |lambda_k(tau)|`` and the mean first-passage times
``m_i = tau + sum_{k != j} T_ik(tau) m_k`` for target ``j``.
"""

from __future__ import annotations

import numpy as np

#: Default lags of the Markov analysis, in frames.
DEFAULT_LAGS = (1, 2, 5, 10, 20, 50)
#: At most this many implied timescales are reported per model.
MAX_TIMESCALES = 10
#: Mean first-passage times are computed for models with at most this many connected states.
MAX_MFPT_STATES = 60
#: Reversible maximum-likelihood estimator: Newton steps stop when every component of the gradient
#: is below this fraction of the number of counts.
MLE_TOLERANCE = 1e-12
#: ... or after this many steps.
MLE_MAX_STEPS = 200


def _reachability(adjacency):
    """Transitive closure (i reaches j, i reaches i) of a stack of directed graphs (p, n, n)."""
    p, n, _ = adjacency.shape
    reach = adjacency | np.eye(n, dtype=bool)
    for _ in range(max(1, int(np.ceil(np.log2(max(n, 2)))))):
        reach = np.matmul(reach.astype(np.float32), reach.astype(np.float32)) > 0
    return reach


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
