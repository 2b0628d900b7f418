r"""MBAR and WHAM estimates for one torsion type, with block-bootstrap errors, and their profiles.

Errors: a block bootstrap, as for ordinary profiles: every window's frames are cut into 16
contiguous blocks, and each resample draws, for every window, 16 of its blocks with replacement.
Both f_k and the profile are re-estimated for every resample, so the errors include the
uncertainty of the window free energies, which accumulates along the coordinate. MBAR resamples
are solved on the 0.05-degree grid (:mod:`.solver`); the grid solution matches pymbar's f_k, checked
on the full data and reported as ``mbar_grid_check_kt``. The MBAR and WHAM profiles of each
resample use the same blocks, so their difference is tested against the error of each
(``|F_MBAR - F_WHAM| <= 2 sqrt(sigma_MBAR^2 + sigma_WHAM^2)`` per bin counts as agreement).

pymbar receives at most ``max_mbar_samples`` samples (default 100 000); with more, it gets every
s-th frame of every window, and its f_k are then refined on all samples by the grid solution of
the same equations (reported). The histogram always uses every sample.

The profiles of a type have the format of :func:`dihedra.analysis.profiles.free_energy_profiles`:
the ``histogram`` estimate is the MBAR profile, the ``kernel`` estimate its von Mises smoothing
(bandwidth by the rule of :mod:`dihedra.analysis.profiles.estimation` with the Kish effective
sample size of the weights), both with the errors above.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from ...errors import DihedraError
from ..profiles import (BARRIER_COLUMNS, MINIMA_COLUMNS, STATE_DG_COLUMNS, ProfileSet, default_bandwidth_deg,
                        kernel_profile_of_probabilities, profile_features, profile_of_probabilities, rebin,
                        state_free_energies_of_probabilities)
from ..profiles.features import with_spread_between_torsions
from .samples import N_HIST_BLOCKS
from .solver import (GRID_POINTS, _fine_bin, _grid_angles, _grid_index, _import_pymbar, _logsumexp, bias_kj_mol,
                     biased_histograms, solve_free_energies, wham_log_factors)

#: Samples handed to pymbar at most (thinned evenly in time within windows beyond this).
DEFAULT_MAX_MBAR_SAMPLES = 100_000
#: MBAR and WHAM agree in a bin when their difference is within this many combined errors.
AGREEMENT_SIGMA = 2.0


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
        MBAR overlap matrix (NaN when not assessed: see ``with_pymbar`` of :func:`estimate_type`).
    mbar_grid_check_kt : float
        Largest ``|f_grid - f_pymbar|`` over the windows (NaN without pymbar).
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

    @property
    def effective_samples(self):
        """Kish's effective sample size of the weights, (sum w)^2 / sum w^2 (Kish, Survey Sampling, 1965)."""
        return float(self.weights.sum() ** 2 / np.sum(self.weights ** 2))


def estimate_type(angle_deg, window, frame_pos, hist_block, states, n_states, windows, kt, mult,
                  max_mbar_samples=DEFAULT_MAX_MBAR_SAMPLES, with_pymbar=True):
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
    with_pymbar : bool
        False where the samples contradict the window table (:mod:`.restraints`): the window free
        energies are then the grid solution of the same equations, without pymbar (whose solver can
        take many minutes on biases that contradict the samples), and the overlap matrix is NaN
        (not assessed).
    """
    pymbar = _import_pymbar() if with_pymbar else None
    centres = windows["centre_deg"].to_numpy(float)
    ks = windows["k_kj_mol_rad2"].to_numpy(float)
    n_win = len(windows)
    n_k = np.bincount(window, minlength=n_win).astype(float)
    if (n_k == 0).any():
        empty = int(np.flatnonzero(n_k == 0)[0])
        raise DihedraError(f"window {empty + 1} has no defined torsion angles of this type; check its files.")
    # biased histograms of each window (overlap coefficients, diagnostics)
    fine = _fine_bin(angle_deg)
    biased = biased_histograms(angle_deg, window, n_win)
    grid = _grid_index(angle_deg)
    log_c_grid = -bias_kj_mol(_grid_angles()[None, :], centres[:, None], ks[:, None]) / kt
    if pymbar is None:   # the table contradicts the samples: the same equations on the grid, nothing assessed
        f_mbar, _ = solve_free_energies(np.bincount(grid, minlength=GRID_POINTS), n_k, log_c_grid)
        overlap, check, n_mbar, stride = np.full((n_win, n_win), np.nan), np.nan, 0, 1
    else:
        f_mbar, overlap, check, n_mbar, stride = _pymbar_free_energies(pymbar, angle_deg, window, frame_pos, n_k,
                                                                       grid, log_c_grid, centres, ks, kt,
                                                                       max_mbar_samples)
    w = _sample_weights(f_mbar, n_k, angle_deg, centres, ks, kt)
    w *= len(w) / w.sum()
    fine_mbar = np.bincount(fine, weights=w, minlength=360)
    state_counts = np.bincount(states[states >= 0], weights=w[states >= 0], minlength=n_states)

    # --- WHAM on 1-degree bins ---
    log_c_wham = wham_log_factors(centres, ks, kt)
    block_bins = np.zeros((mult.shape[1], 360))
    np.add.at(block_bins, (hist_block, fine), 1.0)
    f_wham, log_p_wham = solve_free_energies(block_bins.sum(axis=0), n_k, log_c_wham, f_start=f_mbar)
    fine_wham = np.exp(log_p_wham)

    boot = _bootstrap_type(mult, window, hist_block, fine, grid, states, n_states, n_win, log_c_grid, f_mbar,
                           block_bins, log_c_wham, f_wham)
    boot_fine_mbar, boot_fine_wham, boot_states, boot_f_mbar, boot_f_wham = boot
    return TypeEstimate(weights=w, fine_mbar=fine_mbar / fine_mbar.sum(), fine_wham=fine_wham,
                        boot_fine_mbar=boot_fine_mbar / boot_fine_mbar.sum(axis=1, keepdims=True),
                        boot_fine_wham=boot_fine_wham, state_counts=state_counts / state_counts.sum(),
                        boot_state_counts=boot_states / boot_states.sum(axis=1, keepdims=True),
                        f_mbar_kt=f_mbar, f_wham_kt=f_wham, boot_f_mbar_kt=boot_f_mbar,
                        boot_f_wham_kt=boot_f_wham, overlap=overlap, mbar_grid_check_kt=check,
                        n_mbar_samples=n_mbar, thin_stride=stride, biased_hist=biased)


def _pymbar_free_energies(pymbar, angle_deg, window, frame_pos, n_k, grid, log_c_grid, centres, ks, kt,
                          max_mbar_samples):
    """Window free energies by pymbar (thinned evenly in time if needed), refined on every sample.

    Returns f_k (reduced, f_0 = 0), pymbar's overlap matrix, the largest ``|f_grid - f_pymbar|``, the
    samples handed to pymbar and the stride in frames used.
    """
    n_win = len(n_k)
    stride = max(1, int(np.ceil(len(angle_deg) / max_mbar_samples)))
    sel = np.flatnonzero(frame_pos % stride == 0)
    u_sel = bias_kj_mol(angle_deg[sel][None, :], centres[:, None], ks[:, None]) / kt
    order = np.argsort(window[sel], kind="stable")
    sel, u_sel = sel[order], u_sel[:, order]
    n_sel = np.bincount(window[sel], minlength=n_win).astype(float)
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
    return f_mbar, overlap, check, int(len(sel)), stride


def _sample_weights(f, n_all, angles, centres, ks, kt):
    """MBAR weights W_n ~ 1 / sum_k N_k exp(f_k - u_k(phi_n)) of samples at their exact angles (the
    largest 1)."""
    u_all = bias_kj_mol(angles[None, :], centres[:, None], ks[:, None]) / kt
    return _relative_exp(-_logsumexp((np.log(n_all) + f)[:, None] - u_all, axis=0))


def _grid_weights(f, n_all, log_c_grid, idx):
    """MBAR weights of samples placed on the grid points ``idx`` (ln c_kg = ``log_c_grid``; the largest 1)."""
    ln_d = _logsumexp((np.log(n_all) + f)[:, None] + log_c_grid, axis=0)
    return _relative_exp(-ln_d[idx])


def _relative_exp(log_w):
    """exp(log_w - max log_w): weights relative to the largest. Their scale cancels where they are
    used, and biases much stiffer than the samples' spread make them span more than a float holds."""
    return np.exp(log_w - np.max(log_w))


def _bootstrap_type(mult, window, hist_block, fine, grid, states, n_states, n_win, log_c_grid, f_mbar, block_bins,
                    log_c_wham, f_wham):
    """MBAR and WHAM of every bootstrap resample (the same blocks for both estimators).

    Returns the (unnormalised) MBAR bin weights, the WHAM bin probabilities, the MBAR state weights
    and the window free energies of both, one row per resample.
    """
    n_boot = mult.shape[0]
    block_window = np.arange(mult.shape[1]) // N_HIST_BLOCKS
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
        wb = m * _grid_weights(fb, nk_b, log_c_grid, grid)
        boot_fine_mbar[b] = np.bincount(fine, weights=wb, minlength=360)
        boot_states[b] = np.bincount(states[states >= 0], weights=wb[states >= 0], minlength=n_states)
        boot_f_mbar[b] = fb
        counts_b = mult[b] @ block_bins
        nk_wham = np.bincount(block_window, weights=mult[b] * block_bins.sum(axis=1), minlength=n_win)
        fw, log_pw = solve_free_energies(counts_b, nk_wham, log_c_wham, f_start=f_wham)
        boot_fine_wham[b] = np.exp(log_pw)
        boot_f_wham[b] = fw
    return boot_fine_mbar, boot_fine_wham, boot_states, boot_f_mbar, boot_f_wham


# ----------------------------------------------------------------------------------------------
# Profiles in the format of dihedra profile
# ----------------------------------------------------------------------------------------------

class TypeTables:
    """The profile tables of a window analysis in the format of ``dihedra profile``, and the
    comparison of MBAR with WHAM, filled type by type (:meth:`add`)."""

    def __init__(self, scheme, kt, factor, bin_width_deg, bandwidth_deg):
        self.scheme, self.kt, self.factor = scheme, kt, factor
        self.width = float(bin_width_deg)
        self.bandwidth_deg = bandwidth_deg
        self.profiles, self.minima, self.barriers, self.states = [], [], [], []
        self.comparison, self.agreement, self.bandwidths = [], [], []
        self.by_type = {}

    def add(self, typ, est):
        """Add the rows of type ``typ`` (its :class:`TypeEstimate`); returns its MBAR histogram profile."""
        hprof = self._profiles(typ, est)
        self._compare(typ, est, hprof)
        return hprof

    def _profiles(self, typ, est):
        kt = self.kt
        n_samples = float(len(est.weights))
        coarse = rebin(est.fine_mbar, self.factor)
        hprof = profile_of_probabilities(coarse, rebin(est.boot_fine_mbar, self.factor), kt, self.width,
                                         coarse * n_samples)
        bw = float(self.bandwidth_deg) if self.bandwidth_deg is not None else \
            default_bandwidth_deg(est.fine_mbar * n_samples, self.scheme, est.effective_samples)
        kprof = kernel_profile_of_probabilities(est.fine_mbar, est.boot_fine_mbar, kt, bw, n_samples)
        self.by_type[typ] = (hprof, kprof)
        self.bandwidths.append({"type": typ, "torsion": "", "bandwidth_deg": bw})
        for estimate, pr in (("histogram", hprof), ("kernel", kprof)):
            self.profiles.append(pd.DataFrame({
                "type": typ, "torsion": "", "estimate": estimate, "angle_deg": pr.angle_deg,
                "probability_density_per_deg": pr.density_per_deg, "free_energy_kj_mol": pr.free_energy_kj_mol,
                "free_energy_err_kj_mol": np.where(pr.sampled, pr.free_energy_err_kj_mol, np.nan),
                "sampled": pr.sampled, "n_samples": pr.samples,
                "bandwidth_deg": pr.bandwidth_deg if pr.bandwidth_deg is not None else np.nan}))
        minima, barriers = profile_features(hprof, kt)
        self.minima += [{"type": typ, "torsion": "", "minimum": k, **m} for k, m in enumerate(minima, 1)]
        self.barriers += [{"type": typ, "torsion": "", "barrier": k, **b} for k, b in enumerate(barriers, 1)]
        self.states += [{"type": typ, "torsion": "", **r} for r in state_free_energies_of_probabilities(
            est.state_counts, est.boot_state_counts, self.scheme.labels, kt)]
        return hprof

    def _compare(self, typ, est, hprof):
        """MBAR vs WHAM on the profile bins."""
        kt = self.kt
        coarse = rebin(est.fine_mbar, self.factor)
        wprof = profile_of_probabilities(rebin(est.fine_wham, self.factor), rebin(est.boot_fine_wham, self.factor),
                                         kt, self.width, coarse * float(len(est.weights)))
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
        self.comparison.append(pd.DataFrame({
            "type": typ, "angle_deg": hprof.angle_deg, "free_energy_mbar_kj_mol": np.where(hprof.sampled, f_m, np.nan),
            "free_energy_mbar_err_kj_mol": np.where(hprof.sampled, hprof.free_energy_err_kj_mol, np.nan),
            "free_energy_wham_kj_mol": np.where(wprof.sampled, f_w, np.nan),
            "free_energy_wham_err_kj_mol": np.where(wprof.sampled, wprof.free_energy_err_kj_mol, np.nan),
            "difference_kj_mol": diff, "difference_err_kj_mol": np.where(both, sigma, np.nan),
            "sampled": both}))
        with np.errstate(invalid="ignore", divide="ignore"):
            z = np.abs(diff) / sigma
        zz = z[both & np.isfinite(z)]
        self.agreement.append({"type": typ, "n_bins": int(both.sum()),
                               "max_abs_difference_kj_mol": float(np.nanmax(np.abs(diff))) if both.any() else np.nan,
                               "max_difference_over_error": float(zz.max()) if len(zz) else np.nan,
                               "fraction_within": float(np.mean(zz <= AGREEMENT_SIGMA)) if len(zz) else np.nan,
                               "mbar_grid_check_kt": est.mbar_grid_check_kt,
                               "n_mbar_samples": est.n_mbar_samples, "mbar_thin_stride": est.thin_stride})

    def profile_set(self, temperature_k, settings, notices, populations_by_type=None):
        """The profiles as a :class:`~dihedra.analysis.profiles.ProfileSet`; the errors of the state
        populations and free energies never below those of ``populations_by_type`` (as ``dihedra
        profile`` gives them)."""
        states = with_spread_between_torsions(pd.DataFrame(self.states, columns=STATE_DG_COLUMNS),
                                              populations_by_type, self.kt)
        return ProfileSet(temperature_k=temperature_k, profiles=pd.concat(self.profiles, ignore_index=True),
                          minima=pd.DataFrame(self.minima, columns=MINIMA_COLUMNS),
                          barriers=pd.DataFrame(self.barriers, columns=BARRIER_COLUMNS),
                          state_free_energies=states, by_type=self.by_type, settings=settings, notices=notices)
