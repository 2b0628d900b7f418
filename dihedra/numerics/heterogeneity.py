"""Heterogeneity of estimates pooled over items: Cochran's Q, I^2 and the DerSimonian-Laird
between-item variance.

When a type is pooled over its torsions (or a conformer over its groups), the torsions are either
copies of one thing (the molecules of a liquid: their populations differ only by sampling noise)
or different things that share a name (the isoleucines of a protein, each in its own surrounding).
The random-effects model of meta-analysis tells the two apart: item i estimates its own true
value theta_i = mu + u_i with a within-item variance v_i, and the u_i have a between-item variance
tau^2 (0 for copies).

* Cochran's Q = sum w_i (y_i - ybar_w)^2 with w_i = 1 / v_i, chi-square with k - 1 degrees of
  freedom when tau^2 = 0 (Cochran, Biometrics 10 (1954) 101);
* the DerSimonian-Laird method-of-moments estimate tau^2 = max(0, (Q - (k - 1)) / (sum w - sum w^2 /
  sum w)) (DerSimonian & Laird, Control. Clin. Trials 7 (1986) 177);
* I^2 = max(0, (Q - (k - 1)) / Q), the share of the spread between items that sampling noise does
  not explain (Higgins & Thompson, Stat. Med. 21 (2002) 1539).

Examples
--------
>>> r = dersimonian_laird([0.1, 0.5, 0.9], [0.01, 0.01, 0.01])
>>> round(r.q, 6), round(r.i_squared, 4), round(r.tau_squared, 4)
(32.0, 0.9375, 0.15)
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

#: Below this p-value of Cochran's Q, pooled items count as heterogeneous (the 5 % level).
HETEROGENEITY_P = 0.05


@dataclass(frozen=True)
class RandomEffects:
    """Result of :func:`dersimonian_laird` (NaN where undefined)."""

    q: float
    df: int
    p_value: float
    i_squared: float
    tau_squared: float
    mean: float
    se: float


def dersimonian_laird(y, v):
    """Cochran's Q, its p-value, I^2, the DerSimonian-Laird tau^2 and the random-effects mean.

    Parameters
    ----------
    y : array-like, shape (k,)
        The item estimates.
    v : array-like, shape (k,)
        Their within-item variances (squared standard errors), all > 0.

    Returns
    -------
    RandomEffects
        ``q`` (Cochran's Q with inverse-variance weights), ``df`` = k - 1, ``p_value`` (upper
        tail of chi-square with df degrees of freedom), ``i_squared`` (fraction, 0 .. 1),
        ``tau_squared`` (DerSimonian & Laird 1986), ``mean`` and ``se`` of the random-effects
        weighted mean (weights 1 / (v_i + tau^2)).

    References
    ----------
    DerSimonian & Laird, Meta-analysis in clinical trials, Control. Clin. Trials 7 (1986) 177.
    Higgins & Thompson, Quantifying heterogeneity in a meta-analysis, Stat. Med. 21 (2002) 1539.
    """
    from scipy.special import chdtrc   # (chi2.sf of scipy.stats, without importing scipy.stats)

    y = np.asarray(y, dtype=float)
    v = np.asarray(v, dtype=float)
    k = len(y)
    if k < 2 or not np.all(v > 0):
        raise ValueError("dersimonian_laird needs two or more items with positive variances.")
    w = 1.0 / v
    mean_fixed = np.sum(w * y) / np.sum(w)
    q = float(np.sum(w * (y - mean_fixed) ** 2))
    df = k - 1
    tau2 = max(0.0, (q - df) / (np.sum(w) - np.sum(w ** 2) / np.sum(w)))
    w_star = 1.0 / (v + tau2)
    return RandomEffects(q=q, df=df, p_value=float(chdtrc(df, q)),
                         i_squared=max(0.0, (q - df) / q) if q > 0 else 0.0, tau_squared=float(tau2),
                         mean=float(np.sum(w_star * y) / np.sum(w_star)), se=float(np.sqrt(1.0 / np.sum(w_star))))


def pooled_mean_error(y, se):
    """The plain mean of items, its standard error, and the heterogeneity between the items.

    The pooled value is the plain mean over the items (the population of a type is the fraction
    of all its torsions' frames in the state). Its error is sqrt(sum se_i^2) / k for exchangeable
    items, and sqrt(sum se_i^2 + k tau^2) / k when Cochran's Q finds them heterogeneous (p below
    :data:`HETEROGENEITY_P`), tau^2 by DerSimonian & Laird. Q and tau^2 use the mean of the
    within-item variances for every item: the blocking variances of single torsions are too rough
    to serve as weights (with them, Q of identical copies in a liquid is inflated), and with a
    common variance DerSimonian & Laird's weights equal the plain mean's. Items whose error is 0
    (never entered or never left a state) then need no special case: if all are 0 and the values
    differ, Q is infinite and tau^2 is the variance between the items.

    Parameters
    ----------
    y, se : array-like, shape (k,)
        Item values and their standard errors (NaN: not estimable).

    Returns
    -------
    dict
        ``mean``, ``se`` (NaN where any item's error is NaN), ``q``, ``q_p_value``, ``i_squared``,
        ``tau`` (the between-item standard deviation), ``heterogeneous`` (bool); the heterogeneity
        terms are NaN for a single item or when nothing varies.

    Examples
    --------
    >>> r = pooled_mean_error([0.0, 1.0, 1.0, 0.0], [0.0, 0.0, 0.0, 0.0])   # residues stuck apart
    >>> r["mean"], round(r["se"], 4), r["i_squared"], r["heterogeneous"]
    (0.5, 0.2887, 1.0, True)
    >>> r = pooled_mean_error([0.30, 0.31, 0.29], [0.02, 0.02, 0.02])    # copies of one molecule
    >>> round(r["se"], 5) == round(0.02 * 3 ** 0.5 / 3, 5), r["i_squared"], r["heterogeneous"]
    (True, 0.0, False)
    """
    y = np.asarray(y, dtype=float)
    se = np.asarray(se, dtype=float)
    k = len(y)
    out = {"mean": float(np.mean(y)) if k else np.nan, "se": np.nan, "q": np.nan, "q_p_value": np.nan,
           "i_squared": np.nan, "tau": np.nan, "heterogeneous": False}
    if k == 0 or np.any(np.isnan(se)):
        return out
    within = float(np.sum(se ** 2))
    out["se"] = float(np.sqrt(within) / k)
    if k < 2:
        return out
    spread = float(np.var(y, ddof=1))
    v_common = within / k
    if v_common > 0:
        r = dersimonian_laird(y, np.full(k, v_common))
        q, p, i2, tau2 = r.q, r.p_value, r.i_squared, r.tau_squared
    elif spread > 0:   # no within-item noise at all, yet the items differ
        q, p, i2, tau2 = np.inf, 0.0, 1.0, spread
    else:              # all items identical and without noise: nothing to say
        return out
    heterogeneous = bool(p < HETEROGENEITY_P)
    out.update(q=float(q), q_p_value=float(p), i_squared=float(i2), tau=float(np.sqrt(tau2)),
               heterogeneous=heterogeneous)
    if heterogeneous:
        out["se"] = float(np.sqrt(within + k * tau2) / k)
    return out
