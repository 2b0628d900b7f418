r"""Umbrella windows along a torsion: the unbiased profile by MBAR and by WHAM.

Input
-----
A table of windows (``WINDOWS.csv``), one row per biased simulation, with the columns

``trajectory``, ``topology``
    files of the window (relative paths are relative to the CSV);
``torsions``
    the biased torsion(s), a specification as in ``dihedra track --torsions`` (``0,1,2,3`` --
    quote it in the CSV --, ``rotatable``, a .toml file; several joined by ``;``);
``centre_deg``, ``k_kj_mol_rad2``
    the bias :math:`w_k(\phi) = \tfrac12 k_k\, d(\phi, c_k)^2`, d the minimum-image difference
    between the angle and the centre in radians (so ``|d| <= pi``), applied to every selected torsion.

Every window must select the same torsions (the same labels). The bias must be exactly this
function of the IUPAC torsion angle; e.g. in OpenMM a ``CustomTorsionForce`` with the energy
``0.5*k*min(dtheta, 2*pi-dtheta)^2; dtheta = abs(theta-theta0)``.

Samples
-------
Each window is tracked like a replica (:func:`dihedra.tracking.track` with ``keep_angles``). Each
selected torsion in each analysed frame is one sample, biased by its own w_k. With one biased
torsion per window (the usual case) this is exact. With several (e.g. a box of identical
molecules, each biased on its own torsion) the samples of one window are treated as draws from
p_k(phi) ~ p(phi) exp(-w_k(phi)/kT) each: exact when the molecules do not interact (a gas of
copies), an approximation when they do (the others' biases then shift a molecule's environment
slightly); the output says so.

Estimators
----------
Write beta = 1/kT, u_k(phi) = beta w_k(phi), N_k the samples of window k, and f_k the reduced free
energy of window k. Both estimators solve the same self-consistent equations

.. math::  f_i = -\ln \sum_g C_g\, c_{ig} \Big/ \sum_k N_k\, e^{f_k} c_{kg}, \qquad
           p_g \propto C_g \Big/ \sum_k N_k\, e^{f_k} c_{kg},

and differ in what g is:

* **MBAR** (Shirts & Chodera, J. Chem. Phys. 129 (2008) 124105): g runs over the samples,
  C_g = 1 and c_kg = exp(-u_k(phi_g)). The f_k come from ``pymbar.MBAR`` (pymbar 4). The
  unbiased profile is the histogram of all samples with the weights
  W_n ~ 1 / sum_k N_k exp(f_k - u_k(phi_n)).
* **WHAM** (Kumar, Rosenberg, Bouzida, Swendsen & Kollman, J. Comput. Chem. 13 (1992) 1011): g
  runs over the 1-degree bins of the pooled histogram, C_g its counts and c_kg the mean of
  exp(-u_k) over the bin (10 points per bin, exact for a density that is flat within the bin;
  the textbook choice, c at the bin centre, errs by up to a few tenths of kT where the bias is
  steep). Solved here with numpy by Newton's method on the convex function whose stationary point
  the WHAM equations are (the MBAR likelihood, with the bins as samples).

Errors: a block bootstrap, as for ordinary profiles: every window's frames are cut into 16
contiguous blocks, and each resample draws, for every window, 16 of its blocks with replacement.
Both f_k and the profile are re-estimated for every resample, so the errors include the
uncertainty of the window free energies, which accumulates along the coordinate. MBAR resamples
are solved by the same Newton method on the samples placed on a 0.05-degree grid (the grid moves a
sample by at most 0.025 degrees; the grid solution matches pymbar's f_k, checked on the full data
and reported as ``mbar_grid_check_kt``). The MBAR and WHAM profiles of each resample use the same
blocks, so their difference is tested against the error of each
(``|F_MBAR - F_WHAM| <= 2 sqrt(sigma_MBAR^2 + sigma_WHAM^2)`` per bin counts as agreement).

pymbar receives at most ``max_mbar_samples`` samples (default 100 000); with more, it gets every
s-th frame of every window, and its f_k are then refined on all samples by the grid solution of
the same equations (reported). The histogram always uses every sample.

Overlap
-------
Neighbouring windows (sorted by centre; the last and the first are neighbours when the windows go
round the circle) must overlap for either estimator to connect them. For every neighbouring pair
the MBAR overlap matrix element min(O_ij, O_ji) (pymbar's ``compute_overlap``) and the overlap
coefficient of the two biased histograms, sum_b min(h_i(b), h_j(b)), are reported; a pair with
an MBAR overlap below :data:`MIN_OVERLAP` = 0.03 is reported as poor (a common rule of thumb,
e.g. Klimovich, Shirts & Mobley, J. Comput.-Aided Mol. Des. 29 (2015) 397; from memory): add a
window between the two or raise the sampling there. A window whose samples lie around minus its
centre is reported too (a bias applied with the opposite sign convention).

Output
------
A complete results folder (``torsions.csv``, ``populations*.csv``, ``blocks.npz``,
``summary.json``) whose histograms and state counts are the MBAR-weighted sums (each window a
replica), so that ``dihedra couplings``, ``dihedra compare`` and figures work on it, plus the
profile files of ``dihedra profile`` (``profiles.csv``, ``minima.csv``, ``barriers.csv``,
``state_free_energies.csv``, ``profiles.json``; the ``histogram`` estimate is the MBAR profile, the
``kernel`` estimate its von Mises smoothing, both with the errors above), and

``windows.csv``
    per window: centre, force constant, samples, mean and spread of the sampled angle, statistical
    inefficiency g of the bias energy, f_k by MBAR and WHAM (kJ/mol, relative to the first
    window) with errors;
``window_overlap.csv``
    per neighbouring pair: MBAR overlap, histogram overlap, poor;
``windows_profiles.csv``
    per type and bin: F by MBAR and by WHAM with errors, their difference;
``windows.json``
    settings, checks, notices, cautions.

Conformer tables are left empty (a joint state of several torsions has no single weight when each
torsion carries its own bias). Populations in ``populations.csv`` use the blocking errors of the
weighted counts (window free energies held fixed: a lower bound); ``populations_by_type.csv``
carries the larger of that and the bootstrap error. Re-running ``dihedra profile`` on the folder
recomputes profiles from the weighted histograms with the window free energies held fixed, which
gives smaller (too small) errors than the ones written here.

Example
-------
A sketch (skipped as a doctest: it needs pymbar, ``pip install "dihedra[biased]"``, and a window
table of your own):

>>> from dihedra.analysis.windows import unbias_windows               # doctest: +SKIP
>>> res = unbias_windows("windows.csv", temperature_k=298.15, out="windows-results")  # doctest: +SKIP
>>> res.agreement                          # MBAR vs WHAM per type    # doctest: +SKIP
"""

from __future__ import annotations

import contextlib
import io
import logging
import os
import time
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from ..errors import DihedraError, InputFileError
from ..units import check_temperature, kt_kj_mol, wrap_deg

#: Columns of WINDOWS.csv.
WINDOW_COLUMNS = ("trajectory", "topology", "torsions", "centre_deg", "k_kj_mol_rad2")
#: Neighbouring windows with an MBAR overlap below this are reported as poorly overlapping.
MIN_OVERLAP = 0.03
#: Bootstrap resamples for the errors.
DEFAULT_BOOTSTRAP = 200
#: Histogram blocks per window (the bootstrap unit).
N_HIST_BLOCKS = 16
#: State-count blocks per window (for the blocking errors of populations.csv).
N_STATE_BLOCKS = 64
#: Samples handed to pymbar at most (thinned evenly in time within windows beyond this).
DEFAULT_MAX_MBAR_SAMPLES = 100_000
#: Points of the grid on which MBAR resamples are solved (0.05 degree).
GRID_POINTS = 7_200
#: Sub-points per 1-degree bin for the WHAM bias factors.
_WHAM_SUB = 10
#: MBAR and WHAM agree in a bin when their difference is within this many combined errors.
AGREEMENT_SIGMA = 2.0


# ----------------------------------------------------------------------------------------------
# Input
# ----------------------------------------------------------------------------------------------

def read_windows(path):
    """The window table with absolute paths: columns window, trajectory, topology, torsions,
    centre_deg (wrapped to (-180, 180]), k_kj_mol_rad2."""
    if not os.path.exists(path):
        raise InputFileError(f"window table {path} does not exist.")
    try:
        table = pd.read_csv(path, skipinitialspace=True, dtype={"torsions": str}, comment="#")
    except Exception as exc:  # noqa: BLE001
        raise InputFileError(f"window table {path} is not a readable CSV table: {exc}.") from None
    table.columns = [str(c).strip() for c in table.columns]
    missing = [c for c in WINDOW_COLUMNS if c not in table.columns]
    if missing:
        raise InputFileError(f"window table {path} lacks the column(s) {', '.join(missing)}; it needs "
                             f"{', '.join(WINDOW_COLUMNS)}.")
    if len(table) < 2:
        raise InputFileError(f"window table {path} has {len(table)} window(s); umbrella sampling needs "
                             "at least two.")
    base = os.path.dirname(os.path.abspath(path))
    out = pd.DataFrame({"window": np.arange(len(table))})
    for col in ("trajectory", "topology"):
        out[col] = [p if os.path.isabs(p) else os.path.normpath(os.path.join(base, p))
                    for p in table[col].astype(str).str.strip()]
    out["torsions"] = table["torsions"].astype(str).str.strip()
    for col in ("centre_deg", "k_kj_mol_rad2"):
        values = pd.to_numeric(table[col], errors="coerce")
        bad = ~np.isfinite(values) | ((values <= 0) if col == "k_kj_mol_rad2" else False)
        if bad.any():
            row = int(np.flatnonzero(bad)[0])
            what = "a positive number" if col == "k_kj_mol_rad2" else "a number of degrees"
            raise InputFileError(f"window table {path}, row {row + 1}: {col} must be {what}; got "
                                 f"{table[col].iloc[row]!r}.")
        out[col] = values.to_numpy(float)
    out["centre_deg"] = wrap_deg(out["centre_deg"].to_numpy())
    return out


def bias_kj_mol(angles_deg, centre_deg, k_kj_mol_rad2):
    """Umbrella bias 0.5 k d^2 (kJ/mol), d the minimum-image angle difference in radians.

    Broadcasts: angles (n,) against centres and force constants (K, 1) gives (K, n).
    """
    d = np.radians(wrap_deg(np.asarray(angles_deg, dtype=float) - np.asarray(centre_deg, dtype=float)))
    return 0.5 * np.asarray(k_kj_mol_rad2, dtype=float) * d ** 2


# ----------------------------------------------------------------------------------------------
# The self-consistent equations (WHAM, and MBAR on a grid)
# ----------------------------------------------------------------------------------------------

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
        step = np.concatenate([[0.0], step])
        t, slack = 1.0, 1e-12 * (abs(value) + 1.0)
        while True:
            a_new, ln_d_new, value_new = parts(f + t * step)
            if value_new <= value + slack or t < 1e-6:
                break
            t *= 0.5
        f, a, ln_d, value = f + t * step, a_new, ln_d_new, value_new
    log_p = np.full(len(counts), -np.inf)
    log_p[keep] = np.log(c_g) - ln_d
    log_p -= _logsumexp(log_p[keep], axis=0)
    return f, log_p


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


# ----------------------------------------------------------------------------------------------
# Samples of all windows
# ----------------------------------------------------------------------------------------------

@dataclass
class WindowData:
    """Samples of all windows, one entry per (frame, torsion).

    Attributes
    ----------
    windows : DataFrame
        The window table (:func:`read_windows`) plus n_frames.
    angle_deg, window, torsion, frame_pos, hist_block, state_block : ndarray (n_samples,)
        Angle, window, torsion position, frame position within its window, global histogram
        block (window * 16 + b) and global state block (window * 64 + b).
    tracks : list of TrackResult
        The per-window tracking results (torsion tables, summaries, notices).
    """

    windows: pd.DataFrame
    angle_deg: np.ndarray
    window: np.ndarray
    torsion: np.ndarray
    frame_pos: np.ndarray
    hist_block: np.ndarray
    state_block: np.ndarray
    tracks: list
    n_frames: np.ndarray
    notices: list = field(default_factory=list)


def collect_windows(windows, scheme="anti-gauche", start=None, stop=None, step=None, workers=1, log=None):
    """Track every window and gather its torsion angles as samples.

    Parameters
    ----------
    windows : DataFrame
        From :func:`read_windows`.
    scheme : str or StateScheme
    start, stop, step : int, optional
        Frame range applied to every window (e.g. ``start`` to drop equilibration).
    workers : int
    log : callable, optional
    """
    from ..tracking import track

    say = log or (lambda msg: None)
    tracks, parts, notices, n_frames = [], [], [], []
    for row in windows.itertuples(index=False):
        say(f"window {row.window + 1}/{len(windows)}: centre {row.centre_deg:g} deg, k {row.k_kj_mol_rad2:g} "
            f"kJ/mol/rad2: {row.trajectory}")
        specs = [s.strip() for s in row.torsions.split(";") if s.strip()]
        res = track(row.topology, [row.trajectory], torsions=specs, scheme=scheme, start=start, stop=stop,
                    step=step, workers=workers, keep_angles=True, progress=False,
                    n_state_blocks=N_STATE_BLOCKS, n_hist_blocks=N_HIST_BLOCKS)
        if tracks and res.torsion_set.labels != tracks[0].torsion_set.labels:
            first, here = tracks[0].torsion_set.labels, res.torsion_set.labels
            raise DihedraError(f"window {row.window + 1} selects {len(here)} torsion(s) ({here[0]}, ...) but window 1 "
                               f"selects {len(first)} ({first[0]}, ...); every window must bias the same torsions.")
        for note in res.notices:
            if note not in notices:
                notices.append(note)
        ang = res.angles()
        labels = res.torsion_set.labels
        values = ang[labels].to_numpy(dtype=float)  # (n_frames, n_torsions)
        n = values.shape[0]
        n_frames.append(n)
        pos = np.repeat(np.arange(n), values.shape[1])
        tors = np.tile(np.arange(values.shape[1]), n)
        flat = values.reshape(-1)
        ok = np.isfinite(flat)
        parts.append((flat[ok], np.full(ok.sum(), row.window), tors[ok], pos[ok],
                      row.window * N_HIST_BLOCKS + pos[ok] * N_HIST_BLOCKS // n,
                      row.window * N_STATE_BLOCKS + pos[ok] * N_STATE_BLOCKS // n))
        tracks.append(res)
    arrays = [np.concatenate([p[k] for p in parts]) for k in range(6)]
    table = windows.copy()
    table["n_frames"] = n_frames
    return WindowData(table, arrays[0], arrays[1].astype(np.int64), arrays[2].astype(np.int64),
                      arrays[3].astype(np.int64), arrays[4].astype(np.int64), arrays[5].astype(np.int64),
                      tracks, np.asarray(n_frames), notices)


# ----------------------------------------------------------------------------------------------
# Estimation for one torsion type
# ----------------------------------------------------------------------------------------------

@dataclass
class TypeEstimate:
    """MBAR and WHAM estimates for one torsion type.

    Attributes
    ----------
    weights : ndarray (n_type_samples,)
        MBAR weights of the type's samples (sum = number of samples).
    fine_mbar, fine_wham : ndarray (360,)
        Unbiased probability of each 1-degree bin.
    boot_fine_mbar, boot_fine_wham : ndarray (n_bootstrap, 360)
    state_counts, boot_state_counts : ndarray (n_states,), (n_bootstrap, n_states)
        MBAR-weighted state probabilities.
    f_mbar_kt, f_wham_kt, boot_f_mbar_kt, boot_f_wham_kt : window free energies (reduced)
    overlap : ndarray (K, K)
        MBAR overlap matrix.
    mbar_grid_check_kt : float
        Largest ``|f_grid - f_pymbar|`` over the windows.
    n_mbar_samples : int
        Samples handed to pymbar; thin_stride the stride in frames used.
    """

    weights: np.ndarray
    fine_mbar: np.ndarray
    fine_wham: np.ndarray
    boot_fine_mbar: np.ndarray
    boot_fine_wham: np.ndarray
    state_counts: np.ndarray
    boot_state_counts: np.ndarray
    f_mbar_kt: np.ndarray
    f_wham_kt: np.ndarray
    boot_f_mbar_kt: np.ndarray
    boot_f_wham_kt: np.ndarray
    overlap: np.ndarray
    mbar_grid_check_kt: float
    n_mbar_samples: int
    thin_stride: int
    biased_hist: np.ndarray


def estimate_type(angle_deg, window, frame_pos, hist_block, states, n_states, windows, kt, mult,
                  max_mbar_samples=DEFAULT_MAX_MBAR_SAMPLES):
    """MBAR (pymbar) and WHAM profiles of one type's samples, with block-bootstrap resamples.

    Parameters
    ----------
    angle_deg, window, frame_pos, hist_block, states : ndarray (n,)
        Samples: angle, window, frame position in the window, global histogram block, state code.
    windows : DataFrame
        centre_deg and k_kj_mol_rad2 per window (row k = window k).
    kt : float
    mult : ndarray (n_bootstrap, n_windows * 16)
        Block multiplicities of the resamples.
    """
    pymbar = _import_pymbar()
    centres = windows["centre_deg"].to_numpy(float)
    ks = windows["k_kj_mol_rad2"].to_numpy(float)
    n_win = len(windows)
    n_k = np.bincount(window, minlength=n_win).astype(float)
    if (n_k == 0).any():
        empty = int(np.flatnonzero(n_k == 0)[0])
        raise DihedraError(f"window {empty + 1} has no defined torsion angles of this type; check its files.")
    # biased histograms of each window (overlap coefficients, diagnostics)
    fine = _fine_bin(angle_deg)
    biased = np.zeros((n_win, 360))
    np.add.at(biased, (window, fine), 1.0)

    # --- MBAR with pymbar (thinned evenly in time if needed) ---
    stride = max(1, int(np.ceil(len(angle_deg) / max_mbar_samples)))
    sel = np.flatnonzero(frame_pos % stride == 0)
    u_sel = bias_kj_mol(angle_deg[sel][None, :], centres[:, None], ks[:, None]) / kt
    order = np.argsort(window[sel], kind="stable")
    sel, u_sel = sel[order], u_sel[:, order]
    n_sel = np.bincount(window[sel], minlength=n_win).astype(float)
    grid = _grid_index(angle_deg)
    log_c_grid = -bias_kj_mol(_grid_angles()[None, :], centres[:, None], ks[:, None]) / kt
    grid_counts = np.bincount(grid, minlength=GRID_POINTS)
    f_grid, _ = solve_free_energies(np.bincount(grid[sel], minlength=GRID_POINTS), n_sel, log_c_grid)
    mbar = pymbar.MBAR(u_sel, n_sel, initial_f_k=f_grid)
    f_pymbar = np.asarray(mbar.f_k, dtype=float) - mbar.f_k[0]
    check = float(np.max(np.abs(f_grid - f_pymbar)))
    overlap = np.asarray(mbar.compute_overlap()["matrix"], dtype=float)
    if stride > 1:   # pymbar saw a thinned set: the same equations on every sample (grid), from its f_k
        f_mbar, _ = solve_free_energies(grid_counts, n_k, log_c_grid, f_start=f_pymbar)
    else:
        f_mbar = f_pymbar

    def mbar_weights(f, n_all, angles=None, idx=None):
        if angles is not None:
            u_all = bias_kj_mol(angles[None, :], centres[:, None], ks[:, None]) / kt
            return np.exp(-_logsumexp((np.log(n_all) + f)[:, None] - u_all, axis=0))
        ln_d = _logsumexp((np.log(n_all) + f)[:, None] + log_c_grid, axis=0)
        return np.exp(-ln_d[idx])

    w = mbar_weights(f_mbar, n_k, angles=angle_deg)
    w *= len(w) / w.sum()
    fine_mbar = np.bincount(fine, weights=w, minlength=360)
    state_counts = np.bincount(states[states >= 0], weights=w[states >= 0], minlength=n_states)

    # --- WHAM on 1-degree bins ---
    log_c_wham = wham_log_factors(centres, ks, kt)
    block_bins = np.zeros((mult.shape[1], 360))
    np.add.at(block_bins, (hist_block, fine), 1.0)
    block_window = np.arange(mult.shape[1]) // N_HIST_BLOCKS
    f_wham, log_p_wham = solve_free_energies(block_bins.sum(axis=0), n_k, log_c_wham, f_start=f_mbar)
    fine_wham = np.exp(log_p_wham)

    # --- bootstrap: same blocks for both estimators ---
    n_boot = mult.shape[0]
    boot_fine_mbar = np.zeros((n_boot, 360))
    boot_fine_wham = np.zeros((n_boot, 360))
    boot_states = np.zeros((n_boot, n_states))
    boot_f_mbar = np.zeros((n_boot, n_win))
    boot_f_wham = np.zeros((n_boot, n_win))
    for b in range(n_boot):
        m = mult[b, hist_block]
        nk_b = np.bincount(window, weights=m, minlength=n_win)
        fb, _ = solve_free_energies(np.bincount(grid, weights=m, minlength=GRID_POINTS), nk_b, log_c_grid,
                                    f_start=f_mbar)
        wb = m * mbar_weights(fb, nk_b, idx=grid)
        boot_fine_mbar[b] = np.bincount(fine, weights=wb, minlength=360)
        boot_states[b] = np.bincount(states[states >= 0], weights=wb[states >= 0], minlength=n_states)
        boot_f_mbar[b] = fb
        counts_b = mult[b] @ block_bins
        nk_wham = np.bincount(block_window, weights=mult[b] * block_bins.sum(axis=1), minlength=n_win)
        fw, log_pw = solve_free_energies(counts_b, nk_wham, log_c_wham, f_start=f_wham)
        boot_fine_wham[b] = np.exp(log_pw)
        boot_f_wham[b] = fw
    return TypeEstimate(weights=w, fine_mbar=fine_mbar / fine_mbar.sum(), fine_wham=fine_wham,
                        boot_fine_mbar=boot_fine_mbar / boot_fine_mbar.sum(axis=1, keepdims=True),
                        boot_fine_wham=boot_fine_wham, state_counts=state_counts / state_counts.sum(),
                        boot_state_counts=boot_states / boot_states.sum(axis=1, keepdims=True),
                        f_mbar_kt=f_mbar, f_wham_kt=f_wham, boot_f_mbar_kt=boot_f_mbar,
                        boot_f_wham_kt=boot_f_wham, overlap=overlap, mbar_grid_check_kt=check,
                        n_mbar_samples=int(len(sel)), thin_stride=stride, biased_hist=biased)


# ----------------------------------------------------------------------------------------------
# Profiles in the format of dihedra profile
# ----------------------------------------------------------------------------------------------

def _profile(main_prob, boot_prob, kt, width, samples):
    """A histogram Profile1D from bin probabilities of the estimate and of its resamples."""
    from .profiles import Profile1D, bin_centres, bootstrap_spread, free_energy_from_counts

    density, free = free_energy_from_counts(main_prob, width, kt)
    _, boot_free = free_energy_from_counts(boot_prob, width, kt)
    err, frac = bootstrap_spread(boot_free)
    shift = np.nanmin(free) if np.isfinite(free).any() else 0.0
    return Profile1D(angle_deg=bin_centres(len(main_prob)), samples=samples, density_per_deg=density,
                     free_energy_kj_mol=free - shift, free_energy_err_kj_mol=err, sampled=main_prob > 0,
                     boot_free_energy=boot_free, boot_valid_fraction=frac)


def _kernel_profile(fine_main, fine_boot, kt, bandwidth_deg, samples):
    """The von Mises smoothing of a fine profile and of its resamples, as a Profile1D."""
    from scipy.ndimage import maximum_filter1d

    from .profiles import von_mises_smooth

    reach = max(1, int(np.ceil(bandwidth_deg)))
    sampled = maximum_filter1d((fine_main > 0).astype(np.int8), size=2 * reach + 1, mode="wrap") > 0
    main = np.where(sampled, von_mises_smooth(fine_main, bandwidth_deg), 0.0)
    boot = von_mises_smooth(fine_boot, bandwidth_deg) * sampled
    prof = _profile(main, boot, kt, 1.0, samples * main)
    prof.sampled = sampled & (main > 0)
    prof.bandwidth_deg = float(bandwidth_deg)
    return prof


def _state_rows(main, boot, labels, kt):
    """State populations and dG = -kT ln(p_B/p_A), A the most populated, with bootstrap errors."""
    from .profiles import bootstrap_spread

    ref = int(np.argmax(main))
    with np.errstate(divide="ignore", invalid="ignore"):
        dg = -kt * np.log(main / main[ref]) + 0.0   # no negative zero
        dgb = -kt * np.log(boot / boot[:, [ref]])
    dgb[~np.isfinite(dgb)] = np.nan
    dg_err, _ = bootstrap_spread(dgb)
    p_err, _ = bootstrap_spread(boot)
    return [{"state": s, "reference_state": labels[ref], "population": main[k], "population_err": p_err[k],
             "free_energy_kj_mol": dg[k] if main[k] > 0 else np.nan,
             "free_energy_err_kj_mol": dg_err[k] if main[k] > 0 else np.nan} for k, s in enumerate(labels)]


# ----------------------------------------------------------------------------------------------
# The whole analysis
# ----------------------------------------------------------------------------------------------

@dataclass
class WindowsResult:
    """Result of :func:`unbias_windows`.

    Attributes
    ----------
    result : TrackResult
        The MBAR-weighted results folder content.
    profiles : ProfileSet
        In the format of :func:`dihedra.analysis.profiles.compute_profiles` (histogram = MBAR).
    windows : DataFrame
        Per window (see the module notes).
    overlap : DataFrame
        Per neighbouring pair.
    comparison : DataFrame
        Per type and bin: MBAR and WHAM free energies with errors and their difference.
    agreement : DataFrame
        Per type: bins compared, largest ``|difference|`` and largest ``|difference|`` / combined error,
        fraction of bins within :data:`AGREEMENT_SIGMA` combined errors.
    info : dict
        Settings, checks and notices (windows.json).
    """

    result: object
    profiles: object
    windows: pd.DataFrame
    overlap: pd.DataFrame
    comparison: pd.DataFrame
    agreement: pd.DataFrame
    info: dict
    notices: list = field(default_factory=list)


def neighbour_pairs(centres_deg):
    """Pairs of neighbouring windows (indices) going round the circle in order of centre.

    The largest gap between consecutive centres is left out when it exceeds 1.5 times the median
    gap (the windows then cover an arc, and that gap is its open end); every other gap, however
    wide, is a pair whose overlap must be checked.
    """
    centres = np.asarray(centres_deg, dtype=float)
    order = np.argsort(centres, kind="stable")
    pairs = [(int(order[i]), int(order[(i + 1) % len(order)])) for i in range(len(order))]
    gaps = np.diff(np.append(centres[order], centres[order[0]] + 360.0))
    if len(order) == 2:
        return [pairs[int(np.argmin(gaps))]]
    widest = int(np.argmax(gaps))
    if gaps[widest] > 1.5 * np.median(gaps):
        pairs.pop(widest)
        pairs = pairs[widest:] + pairs[:widest]   # start after the open end
    return pairs


def unbias_windows(windows_csv, temperature_k, out=None, scheme="anti-gauche", bin_width_deg=5.0,
                   bandwidth_deg=None, n_bootstrap=DEFAULT_BOOTSTRAP, seed=None, start=None, stop=None,
                   step=None, workers=1, max_mbar_samples=DEFAULT_MAX_MBAR_SAMPLES, overwrite=False, log=None):
    """Unbiased torsion profiles from umbrella windows by MBAR and WHAM.

    Parameters
    ----------
    windows_csv : str
        The window table (see the module notes).
    temperature_k : float
        Temperature of the simulations (required; never assumed).
    out : str, optional
        Results folder to write.
    scheme : str or StateScheme
        State scheme for populations and state free energies.
    bin_width_deg : float
        Bin width of the profiles (a divisor of 360, multiple of 1 degree).
    bandwidth_deg : float, optional
        Kernel standard deviation (default: the rule of :mod:`dihedra.analysis.profiles` with the Kish
        effective sample size of the weights).
    n_bootstrap, seed : int
        Block-bootstrap resamples and seed (default the seed of :mod:`dihedra.analysis.profiles`).
    start, stop, step : int, optional
        Frame range applied to every window.
    workers : int
        Processes per window for the tracking pass.
    max_mbar_samples : int
        Samples handed to pymbar at most.
    overwrite : bool
    log : callable, optional

    Returns
    -------
    WindowsResult
    """
    from ..numerics.populations import conformer_populations, pool_by_type, replica_populations, torsion_populations
    from .profiles import (DEFAULT_SEED, ProfileSet, bootstrap_multiplicities, bootstrap_spread, check_bin_width,
                           default_bandwidth_deg, profile_features, rebin)
    from ..selection.schemes import get_scheme
    from ..numerics.statistics import statistical_inefficiency
    from ..trajectory.result import TrackResult

    t0 = time.time()
    say = log or (lambda msg: None)
    temperature_k = check_temperature(temperature_k)
    kt = kt_kj_mol(temperature_k)
    scheme = get_scheme(scheme)
    factor = check_bin_width(bin_width_deg, 1.0)
    n_bootstrap = int(n_bootstrap)
    if n_bootstrap < 20:
        raise DihedraError(f"the bootstrap needs at least 20 resamples for a usable error; got {n_bootstrap}.")
    if bandwidth_deg is not None and not (float(bandwidth_deg) > 0):
        raise DihedraError(f"the kernel bandwidth must be a positive number of degrees; got {bandwidth_deg!r}.")
    seed = DEFAULT_SEED if seed is None else int(seed)
    windows = read_windows(windows_csv)
    if out is not None:
        from ..io.outputs import StagedFolder
        inputs = [windows_csv, *windows["trajectory"], *windows["topology"],
                  *(t for t in windows["torsions"] if os.path.exists(t))]
        staging = StagedFolder.begin(out, overwrite=overwrite, inputs=inputs, command="windows")
    else:
        staging = None
    try:
        data = collect_windows(windows, scheme, start, stop, step, workers, log)
        notices = list(data.notices)
        first = data.tracks[0]
        tset = first.torsion_set
        labels, types = tset.labels, tset.types
        n_t, n_s, n_win = len(labels), scheme.n_states, len(windows)
        states = scheme.assign(data.angle_deg).astype(np.int64)
        rng = np.random.default_rng(seed)
        block_window = np.repeat(np.arange(n_win), N_HIST_BLOCKS)
        mult = bootstrap_multiplicities(block_window, n_bootstrap, rng)
        if n_t > 1:
            notices.append(f"each window biases {n_t} torsions; each is taken as an independent sample of its "
                           "own biased distribution (exact for non-interacting copies, an approximation when "
                           "the biased molecules interact).")
        mirrored = []
        weights = np.zeros(len(data.angle_deg))
        order = list(dict.fromkeys(types))
        estimates = {}
        for typ in order:
            say(f"MBAR and WHAM for type {typ} ({n_bootstrap} bootstrap resamples)")
            sel = np.isin(data.torsion, [k for k, t in enumerate(types) if t == typ])
            est = estimate_type(data.angle_deg[sel], data.window[sel], data.frame_pos[sel], data.hist_block[sel],
                                states[sel], n_s, windows, kt, mult, max_mbar_samples)
            weights[sel] = est.weights
            estimates[typ] = est
        # windows sampled around minus their centre (a sign-convention slip)
        for row in windows.itertuples(index=False):
            a = data.angle_deg[data.window == row.window]
            mean = float(np.degrees(np.arctan2(np.sin(np.radians(a)).mean(), np.cos(np.radians(a)).mean())))
            if abs(row.centre_deg) > 30 and abs(float(wrap_deg(mean - row.centre_deg))) > 90 \
                    and abs(float(wrap_deg(mean + row.centre_deg))) < 30:
                mirrored.append(row.window + 1)
        if mirrored:
            notices.append(f"window(s) {', '.join(map(str, mirrored))} sampled around minus their centre: was the "
                           "bias applied with the opposite sign convention? dihedra uses the IUPAC sign.")

        # ---- MBAR-weighted block sums: a results folder like track's ----
        hist = np.zeros((n_win * N_HIST_BLOCKS, n_t, 360))
        fine = _fine_bin(data.angle_deg)
        np.add.at(hist, (data.hist_block, data.torsion, fine), weights)
        sc = np.zeros((n_win * N_STATE_BLOCKS, n_t, n_s))
        ok = states >= 0
        np.add.at(sc, (data.state_block[ok], data.torsion[ok], states[ok]), weights[ok])
        block_frames = np.zeros(n_win * N_STATE_BLOCKS, dtype=np.int64)
        hist_frames = np.zeros(n_win * N_HIST_BLOCKS, dtype=np.int64)
        for k, n in enumerate(data.n_frames):
            pos = np.arange(n)
            block_frames += np.bincount(k * N_STATE_BLOCKS + pos * N_STATE_BLOCKS // n, minlength=len(block_frames))
            hist_frames += np.bincount(k * N_HIST_BLOCKS + pos * N_HIST_BLOCKS // n, minlength=len(hist_frames))
        block_replica = np.repeat(np.arange(n_win), N_STATE_BLOCKS)
        undefined = np.sum([t.blocks["undefined"] for t in data.tracks], axis=0)
        blocks = {
            "state_counts": sc, "block_replica": block_replica, "block_frames": block_frames,
            "block_weights": sc.sum(axis=2).mean(axis=1), "histograms": hist, "hist_block_replica": block_window,
            "hist_block_frames": hist_frames, "hist_block_weights": hist.sum(axis=2).mean(axis=1),
            "bin_edges_deg": np.linspace(-180.0, 180.0, 361), "undefined": undefined,
            "conformer_rows": np.empty((0, 4), dtype=np.int64), "conformer_weights": np.empty(0)}
        pops = torsion_populations(sc, block_replica, labels, types, scheme.labels)
        by_type = pool_by_type(pops)
        for typ, est in estimates.items():
            p_err, _ = bootstrap_spread(est.boot_state_counts)
            for k, s in enumerate(scheme.labels):
                m = (by_type["type"] == typ) & (by_type["state"] == s)
                by_type.loc[m, "population_err"] = np.fmax(by_type.loc[m, "population_err"].to_numpy(), p_err[k])
        by_rep = replica_populations(sc, block_replica, labels, types, scheme.labels)
        conf, conf_type = conformer_populations(np.empty((0, 4)), np.empty(0), block_replica, len(block_replica),
                                                [], [], labels, types, scheme.labels, [])
        torsions = first.torsions.copy()
        torsions["n_undefined_frames"] = undefined

        # ---- profiles ----
        prof_rows, min_rows, bar_rows, dg_rows, cmp_rows, agree_rows, bw_rows = [], [], [], [], [], [], []
        by_type_prof = {}
        width = float(bin_width_deg)
        for typ, est in estimates.items():
            n_samples = float(len(est.weights))
            coarse = rebin(est.fine_mbar, factor)
            hprof = _profile(coarse, rebin(est.boot_fine_mbar, factor), kt, width, coarse * n_samples)
            kish = est.weights.sum() ** 2 / np.sum(est.weights ** 2)
            bw = float(bandwidth_deg) if bandwidth_deg is not None else \
                default_bandwidth_deg(est.fine_mbar * n_samples, scheme, kish)
            kprof = _kernel_profile(est.fine_mbar, est.boot_fine_mbar, kt, bw, n_samples)
            by_type_prof[typ] = (hprof, kprof)
            bw_rows.append({"type": typ, "torsion": "", "bandwidth_deg": bw})
            for estimate, pr in (("histogram", hprof), ("kernel", kprof)):
                prof_rows.append(pd.DataFrame({
                    "type": typ, "torsion": "", "estimate": estimate, "angle_deg": pr.angle_deg,
                    "probability_density_per_deg": pr.density_per_deg, "free_energy_kj_mol": pr.free_energy_kj_mol,
                    "free_energy_err_kj_mol": np.where(pr.sampled, pr.free_energy_err_kj_mol, np.nan),
                    "sampled": pr.sampled, "n_samples": pr.samples,
                    "bandwidth_deg": pr.bandwidth_deg if pr.bandwidth_deg is not None else np.nan}))
            minima, barriers = profile_features(hprof, kt)
            min_rows += [{"type": typ, "torsion": "", "minimum": k, **m} for k, m in enumerate(minima, 1)]
            bar_rows += [{"type": typ, "torsion": "", "barrier": k, **b} for k, b in enumerate(barriers, 1)]
            dg_rows += [{"type": typ, "torsion": "", **r}
                        for r in _state_rows(est.state_counts, est.boot_state_counts, scheme.labels, kt)]
            # MBAR vs WHAM on the profile bins
            wprof = _profile(rebin(est.fine_wham, factor), rebin(est.boot_fine_wham, factor), kt, width,
                             coarse * n_samples)
            both = hprof.sampled & wprof.sampled
            # both are normalised densities: -kT ln p compares without any alignment; one common shift
            with np.errstate(divide="ignore"):
                f_m = -kt * np.log(hprof.density_per_deg)
                f_w = -kt * np.log(wprof.density_per_deg)
            shift = np.nanmin(np.where(hprof.sampled, f_m, np.nan))
            f_m, f_w = f_m - shift, f_w - shift
            with np.errstate(invalid="ignore"):
                diff = np.where(both, f_m - f_w, np.nan)
            sigma = np.hypot(hprof.free_energy_err_kj_mol, wprof.free_energy_err_kj_mol)
            cmp_rows.append(pd.DataFrame({
                "type": typ, "angle_deg": hprof.angle_deg, "free_energy_mbar_kj_mol": np.where(hprof.sampled, f_m, np.nan),
                "free_energy_mbar_err_kj_mol": np.where(hprof.sampled, hprof.free_energy_err_kj_mol, np.nan),
                "free_energy_wham_kj_mol": np.where(wprof.sampled, f_w, np.nan),
                "free_energy_wham_err_kj_mol": np.where(wprof.sampled, wprof.free_energy_err_kj_mol, np.nan),
                "difference_kj_mol": diff, "difference_err_kj_mol": np.where(both, sigma, np.nan),
                "sampled": both}))
            with np.errstate(invalid="ignore", divide="ignore"):
                z = np.abs(diff) / sigma
            zz = z[both & np.isfinite(z)]
            agree_rows.append({"type": typ, "n_bins": int(both.sum()),
                               "max_abs_difference_kj_mol": float(np.nanmax(np.abs(diff))) if both.any() else np.nan,
                               "max_difference_over_error": float(zz.max()) if len(zz) else np.nan,
                               "fraction_within": float(np.mean(zz <= AGREEMENT_SIGMA)) if len(zz) else np.nan,
                               "mbar_grid_check_kt": est.mbar_grid_check_kt,
                               "n_mbar_samples": est.n_mbar_samples, "mbar_thin_stride": est.thin_stride})
            if est.thin_stride > 1:
                notices.append(f"type {typ}: pymbar was given one frame in {est.thin_stride} "
                               f"({est.n_mbar_samples} samples, at most {max_mbar_samples}); its window free "
                               "energies were refined on every sample (0.05-degree grid).")
            unsampled = int((~hprof.sampled).sum())
            if unsampled:
                notices.append(f"type {typ}: {unsampled} of {len(hprof.sampled)} profile bins were sampled by no "
                               "window; they have no free energy (add windows there).")
        comparison = pd.concat(cmp_rows, ignore_index=True)
        agreement = pd.DataFrame(agree_rows)
        for row in agreement.itertuples(index=False):
            if row.fraction_within < 0.9:
                notices.append(f"type {row.type}: MBAR and WHAM differ by more than {AGREEMENT_SIGMA:g} combined "
                               f"errors in {100 * (1 - row.fraction_within):.0f} % of the bins (largest "
                               f"{row.max_abs_difference_kj_mol:.2f} kJ/mol); check the overlap and the sampling.")

        # ---- windows and overlap tables ----
        first_type = order[0]
        est0 = estimates[first_type]
        win_rows = []
        for row in data.windows.itertuples(index=False):
            k = row.window
            sel = data.window == k
            a = data.angle_deg[sel]
            rad = np.radians(a)
            mean = float(np.degrees(np.arctan2(np.sin(rad).mean(), np.cos(rad).mean())))
            spread = float(np.degrees(np.sqrt(-2.0 * np.log(max(np.hypot(np.sin(rad).mean(), np.cos(rad).mean()),
                                                                 1e-12)))))
            tors = data.torsion[sel]
            gs = []
            for t in np.unique(tors)[:10]:
                series = bias_kj_mol(a[tors == t], row.centre_deg, row.k_kj_mol_rad2)
                gs.append(statistical_inefficiency(series))
            win_rows.append({
                "window": k + 1, "centre_deg": row.centre_deg, "k_kj_mol_rad2": row.k_kj_mol_rad2,
                "trajectory": row.trajectory, "n_frames": int(row.n_frames), "n_samples": int(sel.sum()),
                "mean_angle_deg": mean, "circular_sd_deg": spread,
                "statistical_inefficiency": float(np.mean(gs)) if gs else np.nan,
                "n_effective": float(sel.sum() / np.mean(gs)) if gs else np.nan})
        wtab = pd.DataFrame(win_rows)
        for name, f, fb in (("mbar", est0.f_mbar_kt, est0.boot_f_mbar_kt), ("wham", est0.f_wham_kt, est0.boot_f_wham_kt)):
            err, _ = bootstrap_spread(fb - fb[:, :1])
            wtab[f"free_energy_{name}_kj_mol"] = f * kt
            wtab[f"free_energy_{name}_err_kj_mol"] = err * kt
        ov_rows = []
        biased = est0.biased_hist / est0.biased_hist.sum(axis=1, keepdims=True)
        for i, j in neighbour_pairs(windows["centre_deg"]):
            o = float(min(est0.overlap[i, j], est0.overlap[j, i]))
            ov_rows.append({"window_a": i + 1, "window_b": j + 1, "centre_a_deg": windows["centre_deg"][i],
                            "centre_b_deg": windows["centre_deg"][j], "mbar_overlap": o,
                            "histogram_overlap": float(np.minimum(biased[i], biased[j]).sum()),
                            "poor": bool(o < MIN_OVERLAP)})
        otab = pd.DataFrame(ov_rows)
        poor = otab[otab["poor"]]
        if len(poor):
            pairs = ", ".join(f"{r.window_a}-{r.window_b} ({r.centre_a_deg:g}/{r.centre_b_deg:g} deg: "
                              f"{r.mbar_overlap:.3f})" for r in poor.itertuples(index=False))
            notices.append(f"poor overlap (MBAR overlap < {MIN_OVERLAP:g}) between neighbouring windows {pairs}: "
                           "add windows between them or sample them longer; the profile there is unreliable.")
        if len(order) > 1:
            notices.append(f"the window table and overlap are given for the first type ({first_type}); profiles "
                           "and populations for every type.")

        # ---- assemble ----
        settings = {
            "temperature_k": temperature_k, "kt_kj_mol": kt, "bin_width_deg": width, "fine_bin_width_deg": 1.0,
            "n_bootstrap": n_bootstrap, "seed": seed, "estimate_histogram": "MBAR (pymbar) reweighted histogram",
            "bootstrap": f"{N_HIST_BLOCKS} blocks per window resampled with replacement within each window; "
                         "window free energies re-estimated for every resample",
            "bandwidth_rule": "given" if bandwidth_deg is not None else
                              "0.9 * within-arc standard deviation * (Kish effective samples)^(-1/5)",
            "bandwidths_deg": bw_rows, "scheme": scheme.name,
            "minimum_depth_rule": "as in dihedra profile", "state_free_energy_reference": "most populated state",
        }
        pset = ProfileSet(temperature_k=temperature_k, profiles=pd.concat(prof_rows, ignore_index=True),
                          minima=pd.DataFrame(min_rows, columns=["type", "torsion", "minimum", "angle_deg",
                                                                 "angle_err_deg", "free_energy_kj_mol",
                                                                 "free_energy_err_kj_mol"]),
                          barriers=pd.DataFrame(bar_rows, columns=[
                              "type", "torsion", "barrier", "from_minimum_deg", "to_minimum_deg", "angle_deg",
                              "angle_err_deg", "free_energy_kj_mol", "free_energy_err_kj_mol",
                              "height_from_first_kj_mol", "height_from_first_err_kj_mol",
                              "height_from_second_kj_mol", "height_from_second_err_kj_mol", "sampled"]),
                          state_free_energies=pd.DataFrame(dg_rows, columns=[
                              "type", "torsion", "state", "reference_state", "population", "population_err",
                              "free_energy_kj_mol", "free_energy_err_kj_mol"]),
                          by_type=by_type_prof, settings=settings, notices=notices)
        info = {
            "temperature_k": temperature_k, "kt_kj_mol": kt, "windows_file": os.path.abspath(windows_csv),
            "n_windows": n_win, "bias": "0.5 * k * d^2, d = minimum-image (IUPAC angle - centre) in radians, "
                                        "on every selected torsion",
            "estimators": {"mbar": "pymbar.MBAR (Shirts & Chodera 2008); resamples on a 0.05-degree grid",
                           "wham": "Kumar et al. 1992 on 1-degree bins, bin-averaged bias factors, Newton solver"},
            "agreement_rule": f"|F_MBAR - F_WHAM| <= {AGREEMENT_SIGMA:g} sqrt(err_MBAR^2 + err_WHAM^2)",
            "overlap_rule": f"MBAR overlap min(O_ij, O_ji) >= {MIN_OVERLAP:g} between neighbouring windows",
            "agreement": agreement.to_dict(orient="records"), "overlap": otab.to_dict(orient="records"),
            "max_mbar_samples": int(max_mbar_samples), "settings": settings, "notices": notices,
            "cautions": [
                "The profile is reliable only where neighbouring windows overlap; a poor pair cuts the "
                "profile into pieces whose relative height is not known.",
                "Each biased torsion counts as its own sample; torsions of interacting molecules are not "
                "strictly independent samples of their biased distributions.",
                "Windows must be equilibrated: drop the start of each with --start.",
            ],
        }
        summary = _summary(first, data, windows, scheme, temperature_k, tset, notices, start, stop, step,
                           time.time() - t0)
        result = TrackResult(torsion_set=tset, torsions=torsions, scheme=scheme, populations=pops,
                             populations_by_type=by_type, populations_by_replica=by_rep, conformers=conf,
                             conformers_by_type=conf_type, blocks=blocks, summary=summary, notices=notices)
        wres = WindowsResult(result=result, profiles=pset, windows=wtab, overlap=otab, comparison=comparison,
                             agreement=agreement, info=info, notices=notices)
        if staging is not None:
            write_windows(wres, staging.path)
            result.folder = staging.commit()
            staging = None
        return wres
    finally:
        if staging is not None:
            staging.discard()


def _summary(first, data, windows, scheme, temperature_k, tset, notices, start, stop, step, seconds):
    from .._version import __version__
    from ..trajectory.assemble import package_versions as _package_versions

    replicas = []
    for res, row in zip(data.tracks, windows.itertuples(index=False)):
        info = dict(res.summary["replicas"][0])
        info.update({"window": row.window + 1, "centre_deg": row.centre_deg, "k_kj_mol_rad2": row.k_kj_mol_rad2,
                     "topology": row.topology, "torsions": row.torsions})
        replicas.append(info)
    return {
        "dihedra_version": __version__, "created": time.strftime("%Y-%m-%dT%H:%M:%S%z"), "command": None,
        "kind": "umbrella windows (MBAR-weighted)", "topology": first.summary["topology"], "replicas": replicas,
        "n_torsions": len(tset), "n_frames_analysed": int(sum(r["frames_analysed"] for r in replicas)),
        "scheme": scheme.to_dict(),
        "parameters": {"start": start, "stop": stop, "step": step, "keep_angles": False,
                       "weights": "umbrella windows: per-sample MBAR weights", "n_state_blocks": N_STATE_BLOCKS,
                       "n_hist_blocks": N_HIST_BLOCKS, "bin_width_deg": 1.0, "temperature_k": temperature_k},
        "units": {"angle": "deg", "time": "ps", "population": "fraction", "energy": "kJ/mol"},
        "temperature_k": temperature_k, "notices": list(notices), "run_seconds": round(seconds, 3),
        "versions": _package_versions(),
    }


def write_windows(wres, folder):
    """Write the results folder of :func:`unbias_windows` into ``folder``; returns the paths."""
    from ..io.resultsdir import write_results
    from ..io.tables import write_json, write_table
    from .profiles import write_profiles

    write_results(wres.result, folder)
    paths = write_profiles(wres.profiles, folder)
    paths.append(write_table(wres.windows, folder, "windows.csv"))
    paths.append(write_table(wres.overlap, folder, "window_overlap.csv"))
    paths.append(write_table(wres.comparison, folder, "windows_profiles.csv"))
    paths.append(write_json(wres.info, folder, "windows.json"))
    return paths
