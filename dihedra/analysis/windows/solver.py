r"""The self-consistent equations of MBAR and WHAM for umbrella windows along a torsion.

The bias of window k is :math:`w_k(\phi) = \tfrac12 k_k\, d(\phi, c_k)^2`, d the minimum-image
difference between the angle and the centre in radians (so ``|d| <= pi``). Write beta = 1/kT,
u_k(phi) = beta w_k(phi), N_k the samples of window k, and f_k the reduced free energy of window
k. Both estimators solve the same self-consistent equations

.. math::  f_i = -\ln \sum_g C_g\, c_{ig} \Big/ \sum_k N_k\, e^{f_k} c_{kg}, \qquad
           p_g \propto C_g \Big/ \sum_k N_k\, e^{f_k} c_{kg},

and differ in what g is:

* **MBAR** (Shirts & Chodera, J. Chem. Phys. 129 (2008) 124105): g runs over the samples,
  C_g = 1 and c_kg = exp(-u_k(phi_g)). The f_k come from ``pymbar.MBAR`` (pymbar 4); resamples
  are solved by :func:`solve_free_energies` on the samples placed on a 0.05-degree grid
  (:data:`GRID_POINTS`; the grid moves a sample by at most 0.025 degrees).
* **WHAM** (Kumar, Rosenberg, Bouzida, Swendsen & Kollman, J. Comput. Chem. 13 (1992) 1011): g
  runs over the 1-degree bins of the pooled histogram, C_g its counts and c_kg the mean of
  exp(-u_k) over the bin (:func:`wham_log_factors`: 10 points per bin, exact for a density that
  is flat within the bin; the textbook choice, c at the bin centre, errs by up to a few tenths of
  kT where the bias is steep).

:func:`solve_free_energies` solves them with numpy by Newton's method on the convex function whose
stationary point the equations are (the MBAR likelihood, with the bins or grid points as samples).
"""

from __future__ import annotations

import contextlib
import io
import logging

import numpy as np

from ...errors import DihedraError
from ...units import wrap_deg

#: Points of the grid on which MBAR resamples are solved (0.05 degree).
GRID_POINTS = 7_200
#: Sub-points per 1-degree bin for the WHAM bias factors.
_WHAM_SUB = 10


def bias_kj_mol(angles_deg, centre_deg, k_kj_mol_rad2):
    """Umbrella bias 0.5 k d^2 (kJ/mol), d the minimum-image angle difference in radians.

    Broadcasts: angles (n,) against centres and force constants (K, 1) gives (K, n).
    """
    d = np.radians(wrap_deg(np.asarray(angles_deg, dtype=float) - np.asarray(centre_deg, dtype=float)))
    return 0.5 * np.asarray(k_kj_mol_rad2, dtype=float) * d ** 2



def _logsumexp(a, axis):
    """ln sum exp(a) along ``axis`` (stable)."""
    m = np.max(a, axis=axis, keepdims=True)
    m = np.where(np.isfinite(m), m, 0.0)
    return np.squeeze(m, axis=axis) + np.log(np.sum(np.exp(a - m), axis=axis))


def solve_free_energies(counts, n_k, log_c, f_start=None, tol=1e-9, max_iter=100):
    """Reduced free energies f_k of the windows from pooled counts (WHAM / grid MBAR).

    Solves f_i = -ln sum_g C_g c_ig / sum_k N_k exp(f_k) c_kg by Newton's method on the convex
    function A(f) = sum_g C_g ln sum_k N_k exp(f_k) c_kg - sum_k N_k f_k (gauge f_0 = 0), halving
    a step that would raise A.

    Parameters
    ----------
    counts : ndarray (G,)
        Pooled (weighted) counts C_g of the bins or grid points.
    n_k : ndarray (K,)
        Samples of each window (all must be positive).
    log_c : ndarray (K, G)
        ln c_kg, the log bias factors (-u_k at a point, or the log bin mean of exp(-u_k)).
    f_start : ndarray (K,), optional
    tol : float
        Converged when every ``|dA/df_k| / N_k`` is below ``tol``.

    Returns
    -------
    f : ndarray (K,), with f[0] = 0
    log_density : ndarray (G,)
        ln p_g normalised over g (ln C_g - ln D_g, -inf where C_g = 0).
    """
    counts = np.asarray(counts, dtype=float)
    n_k = np.asarray(n_k, dtype=float)
    keep = counts > 0
    c_g = counts[keep]
    lc = np.asarray(log_c, dtype=float)[:, keep]
    ln_n = np.log(n_k)
    f = np.zeros(len(n_k)) if f_start is None else np.asarray(f_start, dtype=float) - f_start[0]

    def parts(f):
        # a trial step far past the optimum may overflow (windows that barely overlap under their
        # biases): its value is then not finite and the line search rejects it
        with np.errstate(over="ignore", invalid="ignore"):
            a = (ln_n + f)[:, None] + lc
            ln_d = _logsumexp(a, axis=0)
            return a, ln_d, float(c_g @ ln_d - n_k @ f)

    a, ln_d, value = parts(f)
    for _ in range(max_iter):
        pi = np.exp(a - ln_d[None, :])                    # (K, G), columns sum to 1
        grad = pi @ c_g - n_k
        if np.max(np.abs(grad[1:]) / n_k[1:]) < tol:
            break
        weighted = pi * c_g[None, :]
        hess = np.diag(weighted.sum(axis=1)) - weighted @ pi.T
        try:
            step = np.linalg.solve(hess[1:, 1:], -grad[1:])
        except np.linalg.LinAlgError:
            step = -grad[1:] / np.maximum(np.diag(hess)[1:], 1e-300)
        trial = _line_search(parts, f, np.concatenate([[0.0], step]), value)
        if trial is None:   # no step lowers A: f is as well determined as the windows' overlap allows
            break
        f, (a, ln_d, value) = trial
    log_p = np.full(len(counts), -np.inf)
    log_p[keep] = np.log(c_g) - ln_d
    log_p -= _logsumexp(log_p[keep], axis=0)
    return f, log_p


def _line_search(parts, f, step, value):
    """``(f + t step, parts(f + t step))`` for the longest t of 1, 1/2, ... 1e-6 that does not raise A
    (``value``); None when every one does or overflows (a NaN compares false): windows that do not
    overlap under their biases leave f undetermined along some direction, where Newton steps run off."""
    slack = 1e-12 * (abs(value) + 1.0)
    t = 1.0
    while t >= 1e-6:
        trial = parts(f + t * step)
        if trial[2] <= value + slack:
            return f + t * step, trial
        t *= 0.5
    return None


def wham_log_factors(centres_deg, k_kj_mol_rad2, kt, n_bins=360):
    """ln of the bin mean of exp(-w_k/kT) over ``n_bins`` equal bins: array (K, n_bins)."""
    width = 360.0 / n_bins
    sub = -180.0 + width * (np.arange(n_bins)[:, None] + (np.arange(_WHAM_SUB)[None, :] + 0.5) / _WHAM_SUB)
    u = bias_kj_mol(sub.reshape(-1)[None, :], np.asarray(centres_deg)[:, None],
                    np.asarray(k_kj_mol_rad2)[:, None]) / kt
    return _logsumexp(-u.reshape(len(centres_deg), n_bins, _WHAM_SUB), axis=2) - np.log(_WHAM_SUB)


def _grid_index(angles_deg, n_grid=GRID_POINTS):
    """Nearest point of the grid -180 + (i + 0.5) 360/n_grid."""
    width = 360.0 / n_grid
    return np.clip(np.floor((np.asarray(angles_deg) + 180.0) / width).astype(np.int64), 0, n_grid - 1)


def _grid_angles(n_grid=GRID_POINTS):
    return -180.0 + (np.arange(n_grid) + 0.5) * 360.0 / n_grid


def _fine_bin(angles_deg, n_bins=360):
    """Bin of each angle, bins open at the left edge as in the trajectory pass."""
    width = 360.0 / n_bins
    return np.clip(np.ceil((np.asarray(angles_deg) + 180.0) / width).astype(np.int64) - 1, 0, n_bins - 1)


def biased_histograms(angle_deg, window, n_windows):
    """Samples of each window (0-based ``window`` of each angle) in 1-degree bins: (n_windows, 360)."""
    hist = np.zeros((n_windows, 360))
    np.add.at(hist, (window, _fine_bin(angle_deg)), 1.0)
    return hist


def _import_pymbar():
    try:
        for name in ("pymbar", "pymbar.timeseries", "pymbar.mbar_solvers"):
            logging.getLogger(name).setLevel(logging.ERROR)
        with contextlib.redirect_stdout(io.StringIO()), contextlib.redirect_stderr(io.StringIO()):
            import pymbar
    except ImportError:
        raise DihedraError("the MBAR estimate needs pymbar 4; install it with pip install \"dihedra[biased]\" "
                           "(or pip install pymbar).") from None
    return pymbar
