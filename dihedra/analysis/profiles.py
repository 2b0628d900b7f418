r"""Free-energy profiles of torsions from the histograms of a results folder.

Method
------
The probability density of a torsion angle, p(phi), is estimated from the fine (1 degree) angle
histograms that the trajectory pass keeps per block (``blocks.npz``), and turned into a free-energy
profile by Boltzmann inversion

.. math::  F(\phi) = -k_B T \ln p(\phi) + C ,

with ``C`` chosen so that the lowest sampled value is 0. A torsion angle needs no Jacobian term
(the volume element of a dihedral angle is d(phi)). ``k_B T`` is ``R T`` in kJ/mol with R from
CODATA 2018 (:mod:`dihedra.units`). The temperature is always given explicitly: ``--temperature``,
or the value ``track`` recorded (then the command says so); never a default.

Two density estimates are made, both periodic in phi:

* **histogram** -- the fine bins are summed into bins of ``bin_width_deg`` (default
  :data:`DEFAULT_BIN_WIDTH_DEG` = 5 degrees: narrow against a torsion well of 20-40 degrees,
  wide enough for a few hundred samples per bin at a barrier 5 kT high in a typical run);
  p = n_bin / (N w). Bins open at their left edge and closed at their right, as in the pass.
* **kernel** -- a von Mises kernel density, K(d) ~ exp(kappa cos d), evaluated on the fine grid by
  circular convolution of the fine histogram (a binned kernel estimate). The bandwidth is stated
  as the kernel standard deviation sigma in degrees, kappa = 1/sigma^2 (sigma in radians). Default
  rule (Silverman's rule of thumb applied within states): sigma = 0.9 s n_eff^(-1/5), where s is
  the population-weighted within-arc standard deviation of the angle about the circular mean of
  each arc of the run's state scheme, and n_eff is the effective number of independent samples
  (the median over states of the blocking estimate ``n_effective`` in populations.csv, summed over
  the torsions of a type); never below the fine bin width. The bandwidth used is written with
  every kernel row (``bandwidth_deg``) and printed.

Unsampled regions: a histogram bin without samples has ``sampled = False`` and an empty free
energy (NaN in memory, an empty cell in the CSV), never 0 or infinity. A kernel grid point counts
as sampled when the fine histogram has samples within one bandwidth of it.

Errors: a block bootstrap. The trajectory pass cuts each replica into 16 equal, contiguous
blocks of frames; a bootstrap resample draws blocks with replacement *within each replica*
(blocks are long, so the autocorrelation inside them is kept, and replicas are never mixed).
``free_energy_err_kj_mol`` is the standard deviation over resamples of -kT ln p (the normalised
density; the free-energy origin carries no error) over the resamples in which the bin is sampled.
The errors of minima, barriers and state free energies come from the same resamples.

Features of each histogram profile:

* **minima** -- local minima (periodic; unsampled bins count as infinitely high) whose depth
  below the lower of their two flanking barriers is at least max(0.5 kT, 3 sigma), sigma the
  combined error of minimum and barrier; shallower dips are merged into their neighbours.
  Positions and values are refined with a least-squares parabola through the five bins around
  the extreme bin (a three-point parabola where that fails).
* **barriers** -- the highest point between each pair of neighbouring minima, with its free energy
  above the global minimum and its height above each of the two minima. A barrier whose region
  holds unsampled bins is reported with ``sampled = False`` and no height (it is higher than any
  sampled value; the data cannot say how much).
* **state free energies** -- dG_B = -kT ln(p_B / p_A) for each state B of the run's scheme, relative
  to the most populated state A, from the state counts of the pass (bootstrapped on blocks of the
  same length as the histogram blocks).

Computation: torsions are handled in stacks of 256, every step one array operation over the
stack (the block bootstrap as one matrix product, free energies and their spread, kernel smoothing
of the blocks by FFT, minima by vectorised candidate pruning with a range-maximum table, extrema
of every resample by gathering all arcs of similar length at once, state free energies), a few
stacks at a time in threads; the per-torsion kernel error is accumulated from sums over resamples
without keeping them (:func:`_kernel_columns`), and the tables are built column by column.

2-D profiles F(phi_a, phi_b) for a pair of torsions need the angle time series
(``angles.parquet``, written by ``track --keep-angles``); it is read in chunks, so memory does not
grow with the trajectory. Pairs given as torsion types pool every group (molecule or residue)
that holds one torsion of each type.

Example
-------
>>> from dihedra import track, example_path
>>> from dihedra.analysis.profiles import compute_profiles
>>> res = track(example_path("hexane.pdb"), [example_path("hexane.xtc")], stop=200)
>>> prof = compute_profiles(res, temperature_k=298.15, per_torsion=False)
>>> sorted(prof.minima["angle_deg"].round(-1).abs().unique().tolist())  # doctest: +SKIP
[70.0, 180.0]

References
----------
Boltzmann inversion of torsion distributions: e.g. Tschoep et al., Acta Polym. 49 (1998) 61.
Block bootstrap: Kuensch, Ann. Stat. 17 (1989) 1217. Binned kernel density estimates: Silverman,
Appl. Stat. 31 (1982) 93; rule of thumb: Silverman, Density Estimation (1986), eq. 3.31.
"""

from __future__ import annotations

import functools
import os
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from ..errors import DihedraError
from ..io.tables import write_json, write_table
from ..units import check_temperature, from_kj_mol, canonical_energy_unit, kt_kj_mol, wrap_deg

#: Default width of the histogram bins of 1-D profiles (degrees).
DEFAULT_BIN_WIDTH_DEG = 5.0
#: Default width of the bins of 2-D profiles (degrees).
DEFAULT_PAIR_BIN_WIDTH_DEG = 10.0
#: Bootstrap resamples for the error band.
DEFAULT_BOOTSTRAP = 200
#: Seed of the bootstrap (results are reproducible; change with ``seed``).
DEFAULT_SEED = 20240607
#: A minimum must be at least this many kT deep (and 3 sigma) to count.
MIN_DEPTH_KT = 0.5
#: ... and this many combined standard errors.
MIN_DEPTH_SIGMA = 3.0
#: A bin must be sampled in this fraction of bootstrap resamples to hold a minimum.
MIN_RESAMPLED_FRACTION = 0.9
#: Smoothed block histograms below this fraction of their largest value count as zero (round-off
#: of the Fourier transform, about 1e-16 of the largest value, would otherwise decide whether a
#: resample without data near a point enters its error, and with what free energy).
KERNEL_FLOOR = 1e-9
#: Energy units a profile can be written in.
PROFILE_ENERGY_UNITS = ("kJ/mol", "kcal/mol", "kT")
#: Torsions per stack (bounds memory: n_bootstrap x stack x 360 single-precision values, 74 MB).
_BATCH = 256
#: Resampled kernel values (single precision) handled at a time per thread (stays in the cache).
_KERNEL_CHUNK = 1 << 19
#: Threads that profile stacks of torsions side by side.
_THREADS = min(4, os.cpu_count() or 1)


# ----------------------------------------------------------------------------------------------
# Small helpers
# ----------------------------------------------------------------------------------------------

def resolve_temperature(temperature_k, summary=None, log=None):
    """The temperature to use: the one given, else the one ``track`` recorded (announced).

    Raises :class:`DihedraError` when neither exists: dihedra never assumes a temperature.
    """
    if temperature_k is not None:
        return check_temperature(temperature_k)
    recorded = (summary or {}).get("temperature_k")
    if recorded is not None:
        if log is not None:
            log(f"using the temperature recorded by track: {float(recorded):g} K")
        return check_temperature(recorded)
    raise DihedraError("a temperature is required: give --temperature K (this results folder records "
                       "none; 'track --temperature K' would have recorded one).")


def unit_suffix(unit):
    """Column-name suffix of an energy unit (``kj_mol``, ``kcal_mol``, ``kt``, ``hartree``, ``ev``)."""
    return canonical_energy_unit(unit).lower().replace("/", "_")


def check_bin_width(bin_width_deg, fine_width_deg=1.0, what="bin width"):
    """Return the number of fine bins per bin, refusing widths that do not tile the circle."""
    try:
        width = float(bin_width_deg)
    except (TypeError, ValueError):
        raise DihedraError(f"the {what} must be a number of degrees; got {bin_width_deg!r}.") from None
    factor = width / fine_width_deg
    n_fine = int(round(360.0 / fine_width_deg))
    if not np.isfinite(factor) or factor < 1 or abs(factor - round(factor)) > 1e-9 \
            or n_fine % int(round(factor)):
        ok = [d for d in (1, 2, 3, 4, 5, 6, 9, 10, 12, 15, 20, 30) if d >= fine_width_deg]
        raise DihedraError(f"the {what} must be a multiple of the fine histogram bin "
                           f"({fine_width_deg:g} deg) that divides 360 (e.g. "
                           f"{', '.join(f'{d:g}' for d in ok[:8])}); got {bin_width_deg!r}.")
    return int(round(factor))


def rebin(hist, factor):
    """Sum ``factor`` neighbouring bins along the last axis."""
    hist = np.asarray(hist)
    n = hist.shape[-1]
    return hist.reshape(hist.shape[:-1] + (n // factor, factor)).sum(axis=-1)


def bin_centres(n_bins):
    """Centres (degrees) of ``n_bins`` equal bins on (-180, 180]."""
    width = 360.0 / n_bins
    return -180.0 + width * (np.arange(n_bins) + 0.5)


def bootstrap_multiplicities(block_replica, n_bootstrap, rng):
    """How often each block enters each bootstrap resample: array (n_bootstrap, n_blocks).

    Blocks are drawn with replacement within each replica, as many as the replica has.
    """
    replica = np.asarray(block_replica)
    out = np.zeros((int(n_bootstrap), len(replica)))
    for r in np.unique(replica):
        idx = np.flatnonzero(replica == r)
        out[:, idx] = rng.multinomial(len(idx), np.full(len(idx), 1.0 / len(idx)), size=int(n_bootstrap))
    return out


def free_energy_from_counts(counts, width, kt):
    """Density (per degree, or per degree^2 for 2-D) and -kT ln p along the last axis; NaN where empty."""
    counts = np.asarray(counts, dtype=float)
    total = counts.sum(axis=-1, keepdims=True)
    with np.errstate(divide="ignore", invalid="ignore"):
        density = counts / (total * width)
        free = -kt * np.log(density)
    free[~(counts > 0)] = np.nan
    return density, free


def bootstrap_spread(samples):
    """Standard deviation over axis 0 of the finite values, and the fraction that is finite."""
    samples = np.asarray(samples, dtype=float)
    finite = np.isfinite(samples)
    n = finite.sum(axis=0)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = np.where(finite, samples, 0.0).sum(axis=0) / n
        var = np.where(finite, (samples - mean) ** 2, 0.0).sum(axis=0) / (n - 1)
    sd = np.where(n >= 2, np.sqrt(var), np.nan)
    return sd, n / max(1, samples.shape[0])


def _circular_deviation_deg(a, b):
    return (np.asarray(a) - np.asarray(b) + 180.0) % 360.0 - 180.0


# ----------------------------------------------------------------------------------------------
# Density estimates
# ----------------------------------------------------------------------------------------------

@dataclass
class Profile1D:
    """One periodic 1-D profile (histogram or kernel estimate), free energies in kJ/mol.

    Attributes
    ----------
    angle_deg : ndarray (n,)
        Grid points (bin centres).
    samples : ndarray (n,)
        (Weighted) samples per bin; for the kernel estimate the smoothed count per fine bin.
    density_per_deg, free_energy_kj_mol, free_energy_err_kj_mol : ndarray (n,)
        p, F - min F (NaN where unsampled) and its bootstrap standard error.
    sampled : ndarray of bool (n,)
    boot_free_energy : ndarray (n_bootstrap, n)
        -kT ln p of each resample (unshifted), for the errors of features.
    boot_valid_fraction : ndarray (n,)
        Fraction of resamples in which the bin is sampled.
    bandwidth_deg : float or None
        Kernel standard deviation (kernel estimate only).
    """

    angle_deg: np.ndarray
    samples: np.ndarray
    density_per_deg: np.ndarray
    free_energy_kj_mol: np.ndarray
    free_energy_err_kj_mol: np.ndarray
    sampled: np.ndarray
    boot_free_energy: np.ndarray
    boot_valid_fraction: np.ndarray
    bandwidth_deg: float | None = None

    @property
    def width_deg(self):
        return 360.0 / len(self.angle_deg)


def _row_min(free):
    """Lowest finite value of each row of ``free`` (..., n); 0 for a row without one."""
    filled = np.where(np.isfinite(free), free, np.inf)
    low = filled.min(axis=-1)
    return np.where(np.isfinite(low), low, 0.0)


def _resampled_free_energy(boot, width, kt):
    """-kT ln p of resampled counts laid out (m, n_bins, n_bootstrap); +inf where a bin is empty.

    Computed in place: ``boot`` is overwritten and returned.
    """
    total = boot.sum(axis=1, keepdims=True) * width
    with np.errstate(divide="ignore", invalid="ignore"):
        np.divide(boot, total, out=boot)
        np.log(boot, out=boot)
    np.multiply(boot, -kt, out=boot)
    np.copyto(boot, np.inf, where=np.isnan(boot))  # a resample without samples
    return boot


def _spread_last(samples):
    """:func:`bootstrap_spread` over the last axis (resamples last): sd and fraction finite."""
    finite = np.isfinite(samples)
    n = finite.sum(axis=-1)
    x = np.where(finite, samples, 0.0)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = x.sum(axis=-1) / n
        x -= mean[..., None]
        x *= finite
        var = np.einsum("...i,...i->...", x, x) / (n - 1)
    return np.where(n >= 2, np.sqrt(var), np.nan), n / max(1, samples.shape[-1])


def _histogram_stack(block_counts, mult, kt, width):
    """Histogram profiles of a stack of torsions or types, as one Profile1D with a leading axis.

    ``block_counts`` (n_blocks, m, n_bins); the fields of the result are (m, n_bins) arrays and
    ``boot_free_energy`` is (m, n_bins, n_bootstrap), resamples last, +inf where a resample has
    no sample in a bin (:func:`_unstack` gives single profiles in the documented layout).
    """
    block_counts = np.asarray(block_counts, dtype=float)
    counts = block_counts.sum(axis=0)
    density, free = free_energy_from_counts(counts, width, kt)
    boot_free = _resampled_free_energy(np.tensordot(block_counts, mult, axes=(0, 1)), width, kt)
    err, frac = _spread_last(boot_free)
    return Profile1D(angle_deg=bin_centres(counts.shape[-1]), samples=counts, density_per_deg=density,
                     free_energy_kj_mol=free - _row_min(free)[:, None], free_energy_err_kj_mol=err,
                     sampled=counts > 0, boot_free_energy=boot_free, boot_valid_fraction=frac)


def _unstack(stack):
    """The profiles of a stack (see :func:`_histogram_stack`) as a list of Profile1D."""
    bws = stack.bandwidth_deg
    out = []
    for k in range(len(stack.samples)):
        boot = stack.boot_free_energy[k].T.copy()
        boot[~np.isfinite(boot)] = np.nan
        out.append(Profile1D(angle_deg=stack.angle_deg, samples=stack.samples[k],
                             density_per_deg=stack.density_per_deg[k], free_energy_kj_mol=stack.free_energy_kj_mol[k],
                             free_energy_err_kj_mol=stack.free_energy_err_kj_mol[k], sampled=stack.sampled[k],
                             boot_free_energy=boot, boot_valid_fraction=stack.boot_valid_fraction[k],
                             bandwidth_deg=None if bws is None else float(bws[k])))
    return out


def _profiles_from_blocks(block_counts, mult, kt, width):
    """Histogram profiles for a stack: block_counts (n_blocks, m, n_bins) -> list of Profile1D."""
    return _unstack(_histogram_stack(block_counts, mult, kt, width))


def _von_mises_transform(bandwidths_deg, n):
    """Real FFT (m, n // 2 + 1) of normalised von Mises kernels on n points, one per bandwidth."""
    kappa = 1.0 / np.radians(np.asarray(bandwidths_deg, dtype=float)) ** 2
    d = 2.0 * np.pi * np.arange(n) / n
    kernel = np.exp(kappa[:, None] * (np.cos(d) - 1.0))
    kernel /= kernel.sum(axis=-1, keepdims=True)
    return np.fft.rfft(kernel, axis=-1)


def von_mises_smooth(counts, bandwidth_deg):
    """Circular convolution of fine-bin counts (last axis) with a von Mises kernel.

    ``bandwidth_deg`` is the kernel standard deviation; kappa = 1 / sigma^2 (radians).
    """
    counts = np.asarray(counts, dtype=float)
    n = counts.shape[-1]
    out = np.fft.irfft(np.fft.rfft(counts, axis=-1) * _von_mises_transform([bandwidth_deg], n)[0], n, axis=-1)
    return np.clip(out, 0.0, None)


def _circular_reach(occupied, reach):
    """Points within ``reach[k]`` bins (periodic) of an occupied bin of row k: (m, n) bool."""
    occupied = np.asarray(occupied, dtype=bool)
    m, n = occupied.shape
    reach = np.minimum(np.broadcast_to(np.asarray(reach, dtype=np.int64), (m,)), n)
    ext = np.concatenate([np.zeros((m, 1), dtype=np.int32),
                          np.cumsum(np.tile(occupied, 3), axis=1, dtype=np.int32)], axis=1)
    i = np.arange(n)[None, :] + n
    hi = np.take_along_axis(ext, i + reach[:, None] + 1, axis=1)
    lo = np.take_along_axis(ext, i - reach[:, None], axis=1)
    return hi > lo


def _kernel_setup(fine_block_counts, bandwidths, fine_width):
    """Common part of the kernel estimates: counts, smoothed counts, sampled mask, smoothed blocks."""
    fine_block_counts = np.asarray(fine_block_counts, dtype=float)
    n = fine_block_counts.shape[-1]
    bws = np.asarray(bandwidths, dtype=float)
    transform = _von_mises_transform(bws, n)
    counts = fine_block_counts.sum(axis=0)
    smooth = np.clip(np.fft.irfft(np.fft.rfft(counts, axis=-1) * transform, n, axis=-1), 0.0, None)
    reach = np.maximum(1, np.ceil(bws / fine_width)).astype(np.int64)
    sampled = _circular_reach(counts > 0, reach)
    smooth = np.where(sampled, smooth, 0.0)
    smooth_blocks = np.fft.irfft(np.fft.rfft(fine_block_counts, axis=-1) * transform, n, axis=-1)
    # values below KERNEL_FLOOR of a block's largest one are round-off of the transform: zero
    floor = KERNEL_FLOOR * smooth_blocks.max(axis=-1, keepdims=True)
    smooth_blocks = np.where(smooth_blocks > floor, smooth_blocks, 0.0)
    return bws, smooth, sampled, smooth_blocks


def _kernel_stack(fine_block_counts, mult, kt, bandwidths, fine_width):
    """Kernel profiles of a stack of fine block histograms (n_blocks, m, n_fine), as one Profile1D.

    Smoothing is linear, so the resamples are the resampled sums of the smoothed blocks.
    """
    bws, smooth, sampled, smooth_blocks = _kernel_setup(fine_block_counts, bandwidths, fine_width)
    density, free = free_energy_from_counts(smooth, fine_width, kt)
    bsmooth = np.clip(np.tensordot(smooth_blocks * sampled, mult, axes=(0, 1)), 0.0, None)  # (m, n, n_boot)
    bfree = _resampled_free_energy(bsmooth, fine_width, kt)
    err, frac = _spread_last(bfree)
    return Profile1D(angle_deg=bin_centres(smooth.shape[-1]), samples=smooth, density_per_deg=density,
                     free_energy_kj_mol=free - _row_min(free)[:, None], free_energy_err_kj_mol=err,
                     sampled=sampled & (smooth > 0), boot_free_energy=bfree, boot_valid_fraction=frac,
                     bandwidth_deg=bws)


def _kernel_columns(fine_block_counts, mult, kt, bandwidths, fine_width):
    """Kernel profiles of a stack without keeping the resamples (per-torsion rows).

    Returns the bandwidths (m,) and (m, n) arrays: smoothed counts, density, free energy (shifted),
    its error (NaN where not sampled) and the sampled mask.

    The error is the bootstrap standard deviation of :func:`_kernel_stack`, computed without
    keeping the resampled free energies. With s_j the smoothed blocks (masked to the sampled
    points), s = sum_j s_j and S = sum_x s(x), resample b has density sum_j m_bj s_j(x) / T_b,
    T_b = sum_x sum_j m_bj s_j(x); relative to the estimate its ln is ln g_b(x) - ln t_b with
    g_b(x) = sum_j m_bj s_j(x) / s(x) (one matrix product in single precision) and
    t_b = T_b / S, so sums over resamples of ln g, (ln g)^2 and ln g ln t give the variance
    (relative accuracy about 1e-5). Points where some resample has no positive density are
    recomputed exactly in double precision, leaving those resamples out as :func:`bootstrap_spread`
    does.
    """
    bws, smooth, sampled, smooth_blocks = _kernel_setup(fine_block_counts, bandwidths, fine_width)
    density, free = free_energy_from_counts(smooth, fine_width, kt)
    ok = sampled & (smooth > 0)
    masked = smooth_blocks * sampled
    n_boot = len(mult)
    total = mult @ masked.sum(axis=-1)  # T_b, (n_boot, m)
    m, n = smooth.shape
    s1, s2, s3 = np.empty((m, n)), np.empty((m, n)), np.empty((m, n))
    with np.errstate(divide="ignore", invalid="ignore"):
        log_t = np.log(total / smooth.sum(axis=-1))
        scaled = (masked * np.where(ok, 1.0 / smooth, 0.0)).astype(np.float32)
        mult32, log_t32 = mult.astype(np.float32), log_t.astype(np.float32)
        step = max(1, _KERNEL_CHUNK // (n_boot * n))  # torsions whose resamples stay in the cache
        for lo in range(0, m, step):
            hi = min(m, lo + step)
            g = mult32 @ scaled[:, lo:hi].reshape(len(mult32[0]), -1)  # ln g_b(x), (n_boot, k n)
            np.log(g, out=g)
            s1[lo:hi] = g.sum(axis=0).reshape(hi - lo, n)
            s2[lo:hi] = np.einsum("bk,bk->k", g, g).reshape(hi - lo, n)
            s3[lo:hi] = np.einsum("bm,bmx->mx", log_t32[:, lo:hi], g.reshape(n_boot, hi - lo, n))
        sum_t, sum_t2 = log_t.sum(axis=0)[:, None], (log_t ** 2).sum(axis=0)[:, None]
        dev = s1 - sum_t
        var = (s2 - 2.0 * s3 + sum_t2 - dev * dev / n_boot) / (n_boot - 1)
        err = kt * np.sqrt(np.clip(var, 0.0, None))
    bad = ok & ~(np.isfinite(s1) & np.isfinite(s3))
    if bad.any():  # some resample is empty there: the resamples themselves, as in _kernel_stack
        k, x = np.nonzero(bad)
        boot = np.clip(mult @ masked[:, k, x], 0.0, None)
        with np.errstate(divide="ignore", invalid="ignore"):
            bfree = -kt * (np.log(boot) - np.log(total[:, k] * fine_width))
        bfree[~(boot > 0)] = np.nan
        err[k, x] = bootstrap_spread(bfree)[0]
    err = np.where(ok, err, np.nan)
    return bws, smooth, density, free - _row_min(free)[:, None], err, ok


def _kernel_profiles(fine_block_counts, mult, kt, bandwidths, fine_width):
    """Kernel profiles for a stack of fine block histograms (n_blocks, m, n_fine)."""
    return _unstack(_kernel_stack(fine_block_counts, mult, kt, bandwidths, fine_width))


def default_bandwidths_deg(fine_counts, scheme, n_effective, fine_width_deg=1.0):
    """The default kernel bandwidths (standard deviations, degrees) of a stack of torsions or types.

    sigma = 0.9 s n_eff^(-1/5), s = population-weighted within-arc standard deviation of the
    angle (each arc of ``scheme`` about its own circular mean), at least ``fine_width_deg``.

    Parameters
    ----------
    fine_counts : ndarray (m, n_fine)
    scheme : StateScheme
    n_effective : ndarray (m,)

    Returns
    -------
    ndarray (m,)
    """
    counts = np.atleast_2d(np.asarray(fine_counts, dtype=float))
    centres = bin_centres(counts.shape[-1])
    var = np.zeros(len(counts))
    wsum = np.zeros(len(counts))
    for _, start, end in scheme.merged_arcs():
        rel = np.mod(centres - start, 360.0)
        sel = (rel > 0) & (rel <= (end - start))
        w = counts[:, sel]
        ws = w.sum(axis=1)
        ang = np.radians(centres[sel])
        mean = np.degrees(np.arctan2(w @ np.sin(ang), w @ np.cos(ang)))
        dev = _circular_deviation_deg(centres[sel][None, :], mean[:, None])
        use = ws > 0
        var += np.where(use, (w * dev ** 2).sum(axis=1), 0.0)
        wsum += np.where(use, ws, 0.0)
    with np.errstate(invalid="ignore", divide="ignore"):
        s = np.where(wsum > 0, np.sqrt(var / wsum), 0.0)
    n_eff = np.maximum(np.broadcast_to(np.asarray(n_effective, dtype=float), s.shape), 2.0)
    out = np.maximum(0.9 * s * n_eff ** (-0.2), fine_width_deg)
    return np.where(counts.sum(axis=1) > 0, out, float(fine_width_deg))


def default_bandwidth_deg(fine_counts, scheme, n_effective, fine_width_deg=1.0):
    """The default kernel bandwidth (standard deviation, degrees) for one torsion or type.

    sigma = 0.9 s n_eff^(-1/5), s = population-weighted within-arc standard deviation of the
    angle (each arc of ``scheme`` about its own circular mean), at least ``fine_width_deg``.
    """
    return float(default_bandwidths_deg(np.asarray(fine_counts, dtype=float)[None, :], scheme,
                                        [n_effective], fine_width_deg)[0])


def effective_samples(populations, torsions):
    """Effective independent samples of each torsion (median over states of ``n_effective``).

    States with a population below 0.02 or above 0.98 are left out (their blocking estimate is
    poor); a torsion without such states uses its sample count.
    """
    pop = populations["population"].to_numpy(dtype=float)
    neff = populations["n_effective"].to_numpy(dtype=float)
    ok = (pop > 0.02) & (pop < 0.98) & np.isfinite(neff)
    median = populations.loc[ok].groupby("torsion", sort=False)["n_effective"].median()
    first = populations.groupby("torsion", sort=False)["n_samples"].first()
    out = median.reindex(torsions).to_numpy(dtype=float)
    fallback = first.reindex(torsions).to_numpy(dtype=float)
    out = np.where(np.isnan(out), fallback, out)
    return np.where(np.isnan(out), 1.0, out)


# ----------------------------------------------------------------------------------------------
# Features: minima, barriers
# ----------------------------------------------------------------------------------------------

def _arc(n, a, b):
    """Indices strictly between a and b going up the circle (the whole circle but a if a == b)."""
    if a == b:
        return (a + 1 + np.arange(n - 1)) % n
    length = (b - a) % n
    return (a + 1 + np.arange(length - 1)) % n


def _arc_length(n, a, b):
    """Number of indices strictly between a and b going up the circle (n - 1 if a == b)."""
    return np.where(a == b, n - 1, (np.asarray(b) - a) % n - 1)


class _RangeMax:
    """Position and value of the first maximum of ``values[row, lo..hi]`` on a circle, in O(1).

    A sparse table over each row written twice (so that arcs that wrap are contiguous): level k
    holds the first maximum of every run of 2^k entries; a query combines two runs that cover
    the range, preferring the left one on ties (the first occurrence in arc order).
    """

    def __init__(self, values):
        values = np.asarray(values, dtype=float)
        m, n = values.shape
        twice = np.concatenate([values, values], axis=1)
        length = 2 * n
        n_levels = max(1, int(np.floor(np.log2(length))) + 1)
        self.value = np.full((n_levels, m, length), -np.inf)
        self.where = np.zeros((n_levels, m, length), dtype=np.int64)
        self.value[0] = twice
        self.where[0] = np.arange(length)
        for k in range(1, n_levels):
            half, size = 2 ** (k - 1), 2 ** k
            last = length - size + 1
            left_v, right_v = self.value[k - 1, :, :last], self.value[k - 1, :, half:half + last]
            left = left_v >= right_v
            self.value[k, :, :last] = np.where(left, left_v, right_v)
            self.where[k, :, :last] = np.where(left, self.where[k - 1, :, :last], self.where[k - 1, :, half:half + last])
        self.n = n

    def arc(self, rows, a, length):
        """First maximum over the ``length`` (>= 1) indices after ``a`` going up the circle."""
        lo = np.asarray(a) + 1
        hi = lo + np.asarray(length) - 1
        k = np.floor(np.log2(np.maximum(length, 1))).astype(np.int64)
        right_start = hi - 2 ** k + 1
        lv, rv = self.value[k, rows, lo], self.value[k, rows, right_start]
        left = lv >= rv
        pos = np.where(left, self.where[k, rows, lo], self.where[k, rows, right_start]) % self.n
        return pos, np.where(left, lv, rv)


def _minima_stack(free, err, kt, usable=None, min_depth_kt=MIN_DEPTH_KT, min_depth_sigma=MIN_DEPTH_SIGMA):
    """:func:`find_minima` for a stack of profiles (m, n); returns a list of index arrays."""
    free = np.atleast_2d(np.asarray(free, dtype=float))
    m, n = free.shape
    g = np.where(np.isfinite(free), free, np.inf)
    ok = np.isfinite(g) if usable is None else np.isfinite(g) & np.atleast_2d(np.asarray(usable, dtype=bool))
    e = np.where(np.isfinite(err), np.atleast_2d(err), 0.0)
    cand = ok & (g < np.roll(g, 1, axis=1)) & (g <= np.roll(g, -1, axis=1))
    lonely = ~cand.any(axis=1) & ok.any(axis=1)
    cand[np.flatnonzero(lonely), np.argmin(np.where(ok, g, np.inf), axis=1)[lonely]] = True
    count = cand.sum(axis=1)
    width = max(1, int(count.max()) if m else 1)
    # candidates of each row, ascending, padded at the end
    order = np.argsort(~cand, axis=1, kind="stable")[:, :width]
    cands = np.where(np.arange(width)[None, :] < count[:, None], order, -1)
    table = _RangeMax(g)
    need_floor = min_depth_kt * kt
    active = np.flatnonzero(count > 1)
    while len(active):
        c, cnt = cands[active], count[active]
        slot = np.arange(width)[None, :]
        valid = slot < cnt[:, None]
        nxt = np.where(slot + 1 < cnt[:, None], slot + 1, 0)
        prv = np.where(slot > 0, slot - 1, cnt[:, None] - 1)
        a = np.where(valid, c, 0)
        b = np.take_along_axis(a, nxt, axis=1)
        rows = np.broadcast_to(active[:, None], a.shape)
        length = _arc_length(n, a, b)
        gap_j, _ = table.arc(rows, a, np.maximum(length, 1))
        gap_j = np.where(length > 0, gap_j, -1)          # an empty gap: the candidate itself
        left_j, right_j = np.take_along_axis(gap_j, prv, axis=1), gap_j
        gi = g[rows, a]
        left_j = np.where(left_j < 0, a, left_j)
        right_j = np.where(right_j < 0, a, right_j)
        left_top, right_top = g[rows, left_j], g[rows, right_j]
        take_left = (left_top < right_top) | ((left_top == right_top) & (left_j <= right_j))
        top = np.where(take_left, left_top, right_top)
        j = np.where(take_left, left_j, right_j)
        need = np.maximum(need_floor, min_depth_sigma * np.hypot(e[rows, a], e[rows, j]))
        with np.errstate(invalid="ignore"):
            deficit = np.where(valid, top - gi - need, np.inf)
        worst = np.argmin(deficit, axis=1)
        drop = deficit[np.arange(len(active)), worst] < 0
        rows_drop, slot_drop = active[drop], worst[drop]
        keep = np.ones_like(cands[rows_drop], dtype=bool)
        keep[np.arange(len(rows_drop)), slot_drop] = False
        moved = np.argsort(~keep, axis=1, kind="stable")
        cands[rows_drop] = np.take_along_axis(cands[rows_drop], moved, axis=1)
        count[rows_drop] -= 1
        cands[rows_drop, count[rows_drop]] = -1
        active = rows_drop[count[rows_drop] > 1]
    return [cands[r, :count[r]].copy() for r in range(m)]


def find_minima(free, err, kt, usable=None, min_depth_kt=MIN_DEPTH_KT, min_depth_sigma=MIN_DEPTH_SIGMA):
    """Indices of the minima of a periodic profile (see the module notes for the depth rule).

    Unsampled (NaN) bins count as infinitely high. Only bins where ``usable`` is true (default:
    all sampled bins) can be minima; :func:`profile_features` passes the bins sampled in at least
    :data:`MIN_RESAMPLED_FRACTION` of the bootstrap resamples, so that a stray visit to an
    otherwise empty region is not taken for a minimum. Returns indices in increasing angle.

    A candidate is a bin lower than its left neighbour and not higher than its right one; while
    any candidate is shallower than the rule allows (its depth below the lower of the highest
    points between it and its two neighbouring candidates), the shallowest is dropped.
    """
    free = np.asarray(free, dtype=float)
    if not np.isfinite(free).any():
        return []
    return [int(i) for i in _minima_stack(free[None, :], np.asarray(err, dtype=float)[None, :], kt,
                                          None if usable is None else np.asarray(usable)[None, :],
                                          min_depth_kt, min_depth_sigma)[0]]


def _parabola(left, mid, right):
    """Vertex offset (in bins, within +-0.5) and value of a parabola through three points."""
    left, mid, right = (np.asarray(x, dtype=float) for x in (left, mid, right))
    with np.errstate(invalid="ignore", divide="ignore"):
        denom = left - 2.0 * mid + right
        delta = 0.5 * (left - right) / denom
        good = np.isfinite(delta) & np.isfinite(left) & np.isfinite(right) & (denom != 0)
        delta = np.where(good, np.clip(delta, -0.5, 0.5), 0.0)
        value = np.where(good, mid - 0.25 * (left - right) * delta, mid)
    return delta, value


#: Least-squares quadratic over the bins -2..+2 around an extremum: coefficients = _FIT @ values.
_FIT_X = np.arange(-2, 3, dtype=float)
_FIT = np.linalg.pinv(np.vander(_FIT_X, 3, increasing=True))


def _refine_at(y5, idx, kind):
    """Refined position (bins) and value of extrema from the five values around them (..., 5).

    A least-squares parabola through the five bins around ``idx`` (less sensitive to the noise of
    single bins than the bin itself); a three-point parabola where the five are not all sampled or
    the fit bends the wrong way; the bin itself where neither works.
    """
    with np.errstate(invalid="ignore", divide="ignore", over="ignore"):  # unsampled neighbours: inf or NaN
        c = y5 @ _FIT.T  # (..., 3): c0 + c1 x + c2 x^2
        x5 = -c[..., 1] / (2.0 * c[..., 2])
        v5 = c[..., 0] + c[..., 1] * x5 + c[..., 2] * x5 ** 2
        bend = c[..., 2] > 0 if kind == "min" else c[..., 2] < 0
        good5 = np.isfinite(y5).all(axis=-1) & bend & (np.abs(x5) <= 1.0)
        delta3, v3 = _parabola(y5[..., 1], y5[..., 2], y5[..., 3])
    return np.where(good5, idx + x5, idx + delta3), np.where(good5, v5, v3)


def _refine(values, idx, kind):
    """Refined position (bins) and value of the extremum at ``idx`` of each row of ``values``."""
    n = values.shape[-1]
    rows = np.arange(values.shape[0])
    y5 = values[rows[:, None], (idx[:, None] + _FIT_X.astype(int)[None, :]) % n]
    return _refine_at(y5, idx, kind)


def _extremum(values, window, kind):
    """Refined extremum of each row of ``values`` (..., n) inside ``window`` (indices).

    Returns (position in bins, value, ok); for maxima a row with an unsampled bin in the window is
    not ok (the barrier is not known there).
    """
    values = np.atleast_2d(values)
    values = np.where(np.isfinite(values), values, np.inf)
    window = np.asarray(window)
    pos, value, ok = _window_extremum(values.T[None], np.zeros(1, dtype=np.int64), np.array([window[0] - 1]),
                                      np.array([len(window)]), kind)
    return pos[:, 0], value[:, 0], ok[:, 0]


#: Values gathered per step of :func:`_window_extremum` (bounds its memory: 8 bytes each).
_GATHER_VALUES = 8_000_000


def _window_extremum(values, rows, start, length, kind):
    """Refined extremum of arcs of a stack of profiles, for every resample.

    Parameters
    ----------
    values : ndarray (m, n, r)
        Profiles, their resamples last (r = 1 for the estimate); +inf = unsampled.
    rows, start, length : ndarray (f,)
        Profile of each arc, the bin before it and its number of bins (>= 1): the arc is
        ``start + 1, ..., start + length`` going up the circle.
    kind : {"min", "max"}

    Returns
    -------
    position (bins), value, ok : ndarrays (r, f)
        The first extremum in arc order, refined; for "max", ok is false where the arc holds an
        unsampled bin; for "min", where it holds no sampled one.

    Notes
    -----
    Arcs are gathered in groups of similar length, each group as an (arcs, length, r) array whose
    middle axis is in arc order (each gathered item is the contiguous vector of resamples of one
    bin); a shorter arc repeats its last bin, which changes neither its extreme value nor the first
    position of it.
    """
    m, n, r = values.shape
    flat = np.ascontiguousarray(values).reshape(m * n, r)
    f = len(rows)
    out = [np.empty((r, f)), np.empty((r, f)), np.empty((r, f), dtype=bool)]
    by_length = np.argsort(length, kind="stable")
    sorted_len = length[by_length]
    resample = np.arange(r)
    lo = 0
    while lo < f:
        top = int(sorted_len[lo])
        # arcs up to 1.25 x (and 8 bins) longer share one padded array
        hi = int(np.searchsorted(sorted_len, max(top + 8, int(1.25 * top)), side="right"))
        span = int(sorted_len[hi - 1])
        hi = min(hi, lo + max(1, _GATHER_VALUES // max(1, r * span)))
        sel = by_length[lo:hi]
        rw, st, ln = rows[sel], start[sel], length[sel]
        t = np.minimum(np.arange(span)[None, :], ln[:, None] - 1)
        cols = (st[:, None] + 1 + t) % n
        sub = np.take(flat, rw[:, None] * n + cols, axis=0)  # (arcs, span, r)
        if kind == "min":  # unsampled bins are +inf (see _resampled_free_energy), never the minimum
            best = sub.min(axis=1)
            ok = np.isfinite(best)
        else:
            finite = np.isfinite(sub)
            ok = finite.all(axis=1)
            np.copyto(sub, -np.inf, where=~finite)
            best = sub.max(axis=1)
        k = (sub == best[:, None, :]).argmax(axis=1)  # first position of the extreme value
        idx = np.take_along_axis(cols, k, axis=1)  # (arcs, r)
        y5 = flat[rw[:, None, None] * n + (idx[..., None] + _FIT_X.astype(int)) % n, resample[None, :, None]]
        pos, value = _refine_at(y5, idx, kind)
        out[0][:, sel], out[1][:, sel], out[2][:, sel] = pos.T, value.T, ok.T
        lo = hi
    return tuple(out)


def _spread_columns(samples):
    """:func:`bootstrap_spread` standard deviation of each column of (n_bootstrap, f)."""
    return bootstrap_spread(samples)[0]


#: Columns of the minima and barrier tables produced by :func:`_features_stack`.
MINIMUM_FIELDS = ("angle_deg", "angle_err_deg", "free_energy_kj_mol", "free_energy_err_kj_mol")
BARRIER_FIELDS = ("from_minimum_deg", "to_minimum_deg", "angle_deg", "angle_err_deg", "free_energy_kj_mol",
                  "free_energy_err_kj_mol", "height_from_first_kj_mol", "height_from_first_err_kj_mol",
                  "height_from_second_kj_mol", "height_from_second_err_kj_mol", "sampled")


def _features_stack(stack, kt):
    """Minima and barriers of a stack of histogram profiles (see :func:`profile_features`).

    Returns
    -------
    minima, barriers : dict of ndarrays
        ``row`` (profile of the stack), ``number`` (1, 2, ... within the profile) and the fields
        of :data:`MINIMUM_FIELDS` / :data:`BARRIER_FIELDS`, profile by profile in angle order.
    """
    free = np.atleast_2d(stack.free_energy_kj_mol)
    m, n = free.shape
    w = stack.width_deg
    centres = stack.angle_deg
    boot = stack.boot_free_energy.reshape((m, n, -1))
    mins = _minima_stack(free, stack.free_energy_err_kj_mol, kt,
                         usable=np.atleast_2d(stack.boot_valid_fraction) >= MIN_RESAMPLED_FRACTION)
    n_min = np.array([len(x) for x in mins], dtype=np.int64)
    row = np.repeat(np.arange(m), n_min)
    first = np.r_[0, np.cumsum(n_min)[:-1]]
    number = np.arange(len(row)) - first[row]
    cur = np.concatenate(mins).astype(np.int64) if len(row) else np.zeros(0, dtype=np.int64)
    nxt = cur[first[row] + (number + 1) % n_min[row]] if len(row) else cur
    prv_feature = first[row] + (number - 1) % n_min[row] if len(row) else cur
    # barrier between each minimum and the next one (going up the circle)
    g = np.where(np.isfinite(free), free, np.inf)
    table = _RangeMax(g)
    arc_len = _arc_length(n, cur, nxt)
    bar_idx, _ = table.arc(row, cur, np.maximum(arc_len, 1))
    bar_idx = np.where(arc_len > 0, bar_idx, cur)
    # window of each minimum: between the barriers on its two sides
    b_before = bar_idx[prv_feature] if len(row) else bar_idx
    win_len = _arc_length(n, b_before, bar_idx)
    win_start = np.where(win_len > 0, b_before, cur - 1)
    win_len = np.where(win_len > 0, win_len, 1)

    def angle(pos):
        return wrap_deg(centres[0] + np.asarray(pos) * w)

    pm, vm, _ = _window_extremum(g[:, :, None], row, win_start, win_len, "min")
    pb, vb, okb = _window_extremum(boot, row, win_start, win_len, "min")
    pm, vm = pm[0], vm[0]
    vb = np.where(okb, vb, np.nan)
    gmin_main = np.full(m, np.nan)
    gmin_boot = np.full((boot.shape[2], m), np.nan)
    if len(row):  # lowest minimum of each profile (and of each resample, ignoring missing ones)
        has = n_min > 0
        gmin_main[has] = np.minimum.reduceat(vm, first[has])
        gmin_boot[:, has] = np.fmin.reduceat(vb, first[has], axis=1)
    ang_min = angle(pm)
    minima = {"row": row, "number": number + 1, "angle_deg": ang_min,
              "angle_err_deg": _spread_columns(_circular_deviation_deg(angle(pb), ang_min)),
              "free_energy_kj_mol": vm - gmin_main[row],
              "free_energy_err_kj_mol": _spread_columns(vb - gmin_boot[:, row])}
    # barriers
    sampled = arc_len > 0
    if len(row):
        arc_ok = _window_extremum(g[:, :, None], row, cur, np.maximum(arc_len, 1), "max")
        sampled &= arc_ok[2][0]
    pmx, vmx = (arc_ok[0][0], arc_ok[1][0]) if len(row) else (np.zeros(0), np.zeros(0))
    pbx, vbx, okbx = _window_extremum(boot, row, cur, np.maximum(arc_len, 1), "max")
    vbx = np.where(okbx, vbx, np.nan)
    nxt_feature = first[row] + (number + 1) % n_min[row] if len(row) else cur
    va, vbb = vb, vb[:, nxt_feature]
    nan = np.full(len(row), np.nan)
    ang_max = angle(pmx)
    # an unsampled barrier is placed in the middle of its unsampled bins
    middle = np.zeros(len(row), dtype=np.int64)
    for f in np.flatnonzero(~sampled):
        arc = _arc(n, cur[f], nxt[f])
        bad = arc[~np.isfinite(free[row[f], arc])]
        middle[f] = bad[len(bad) // 2] if len(bad) else cur[f]
    barriers = {
        "row": row, "number": number + 1, "from_minimum_deg": ang_min,
        "to_minimum_deg": ang_min[nxt_feature] if len(row) else nan,
        "angle_deg": np.where(sampled, ang_max, centres[middle]),
        "angle_err_deg": np.where(sampled, _spread_columns(_circular_deviation_deg(angle(pbx), ang_max)), nan),
        "free_energy_kj_mol": np.where(sampled, vmx - gmin_main[row], nan),
        "free_energy_err_kj_mol": np.where(sampled, _spread_columns(vbx - gmin_boot[:, row]), nan),
        "height_from_first_kj_mol": np.where(sampled, vmx - vm, nan),
        "height_from_first_err_kj_mol": np.where(sampled, _spread_columns(vbx - va), nan),
        "height_from_second_kj_mol": np.where(sampled, vmx - vm[nxt_feature] if len(row) else nan, nan),
        "height_from_second_err_kj_mol": np.where(sampled, _spread_columns(vbx - vbb), nan),
        "sampled": sampled}
    return minima, barriers


def profile_features(profile, kt):
    """Minima and barriers of a histogram profile, with bootstrap errors.

    Returns
    -------
    minima : list of dict
        angle_deg, angle_err_deg, free_energy_kj_mol (above the global minimum), its error.
    barriers : list of dict
        from_minimum_deg, to_minimum_deg, angle_deg, angle_err_deg, free_energy_kj_mol (above the
        global minimum) and error, height_from_first_kj_mol / height_from_second_kj_mol with
        errors, sampled.
    """
    stack = Profile1D(angle_deg=profile.angle_deg, samples=np.atleast_2d(profile.samples),
                      density_per_deg=np.atleast_2d(profile.density_per_deg),
                      free_energy_kj_mol=np.atleast_2d(profile.free_energy_kj_mol),
                      free_energy_err_kj_mol=np.atleast_2d(profile.free_energy_err_kj_mol),
                      sampled=np.atleast_2d(profile.sampled),
                      boot_free_energy=np.where(np.isfinite(profile.boot_free_energy), profile.boot_free_energy,
                                                np.inf).T[None],
                      boot_valid_fraction=np.atleast_2d(profile.boot_valid_fraction))
    minima, barriers = _features_stack(stack, kt)
    return ([{f: _scalar(minima[f][k]) for f in MINIMUM_FIELDS} for k in range(len(minima["row"]))],
            [{f: _scalar(barriers[f][k]) for f in BARRIER_FIELDS} for k in range(len(barriers["row"]))])


def _scalar(x):
    return bool(x) if isinstance(x, (bool, np.bool_)) else float(x)


# ----------------------------------------------------------------------------------------------
# State free energies
# ----------------------------------------------------------------------------------------------

def _merge_blocks_to(values, replica, per_replica):
    """Merge neighbouring blocks pairwise (within replicas) until at most ``per_replica`` remain."""
    from ..numerics.statistics import merge_pairs

    values = np.asarray(values, dtype=float)
    replica = np.asarray(replica)
    weights = np.ones(len(replica))
    while max(np.bincount(replica - replica.min())) > per_replica:
        values, weights, replica = merge_pairs(values, weights, replica)
    return values, replica


def state_blocks(result, n_bootstrap=DEFAULT_BOOTSTRAP, seed=DEFAULT_SEED):
    """State counts merged into blocks as long as the histogram blocks, and bootstrap multiplicities.

    Returns
    -------
    counts : ndarray (n_blocks, n_torsions, n_states)
    replica : ndarray (n_blocks,)
    mult : ndarray (n_bootstrap, n_blocks)   (drawn with ``seed + 1``)
    """
    blocks = result.blocks
    per_rep = int(np.max(np.bincount(np.asarray(blocks["hist_block_replica"]))))
    counts, replica = _merge_blocks_to(blocks["state_counts"], blocks["block_replica"], per_rep)
    mult = bootstrap_multiplicities(replica, n_bootstrap, np.random.default_rng(seed + 1))
    return counts, replica, mult


def _state_free_energy_stack(state_counts, kt, mult):
    """:func:`state_free_energies` for a stack: state_counts (n_blocks, m, n_states).

    Returns
    -------
    dict of ndarrays: ``has`` (m,) (some samples), ``reference`` (m,) (most populated state), and
    (m, n_states) ``population``, ``population_err``, ``free_energy_kj_mol``, ``free_energy_err_kj_mol``.
    """
    counts = np.asarray(state_counts, dtype=float)
    main = counts.sum(axis=0)
    total = main.sum(axis=1)
    boot = np.tensordot(mult, counts, axes=(1, 0))  # (n_boot, m, n_states)
    rows = np.arange(main.shape[0])
    with np.errstate(invalid="ignore", divide="ignore"):
        p = main / total[:, None]
        pb = boot / boot.sum(axis=-1, keepdims=True)
        ref = np.argmax(np.where(np.isnan(p), -np.inf, p), axis=1)
        dg = -kt * np.log(p / p[rows, ref][:, None]) + 0.0
        dgb = -kt * np.log(pb / pb[:, rows, ref][..., None])
    dgb[~np.isfinite(dgb)] = np.nan
    dg_err, _ = bootstrap_spread(dgb)
    p_err, _ = bootstrap_spread(pb)
    return {"has": total > 0, "reference": ref, "population": p, "population_err": p_err,
            "free_energy_kj_mol": np.where(p > 0, dg, np.nan),
            "free_energy_err_kj_mol": np.where(p > 0, dg_err, np.nan)}


def state_free_energies(state_counts, block_replica, state_labels, kt, mult):
    """dG_B = -kT ln(p_B / p_A) per state, A the most populated, with bootstrap errors.

    Parameters
    ----------
    state_counts : ndarray (n_blocks, n_states)
    mult : ndarray (n_bootstrap, n_blocks)

    Returns
    -------
    list of dict: state, reference_state, population, population_err, free_energy_kj_mol, error.
    """
    st = _state_free_energy_stack(np.asarray(state_counts, dtype=float)[:, None, :], kt, mult)
    if not st["has"][0]:
        return []
    ref = int(st["reference"][0])
    return [{"state": label, "reference_state": state_labels[ref], "population": st["population"][0, s],
             "population_err": st["population_err"][0, s], "free_energy_kj_mol": st["free_energy_kj_mol"][0, s],
             "free_energy_err_kj_mol": st["free_energy_err_kj_mol"][0, s]}
            for s, label in enumerate(state_labels)]


# ----------------------------------------------------------------------------------------------
# The analysis of a results folder
# ----------------------------------------------------------------------------------------------

@dataclass
class ProfileSet:
    """Profiles of a results folder; every free energy in kJ/mol (see :func:`write_profiles`).

    Attributes
    ----------
    temperature_k : float
    profiles : DataFrame
        type, torsion (empty for pooled rows), estimate (``histogram`` / ``kernel``), angle_deg,
        probability_density_per_deg, free_energy_kj_mol, free_energy_err_kj_mol, sampled,
        n_samples, bandwidth_deg (kernel rows). The text columns are categorical.
    minima, barriers, state_free_energies : DataFrame
        From the histogram profiles, per type and per torsion (``torsion`` empty when pooled).
    profiles_2d : DataFrame or None
        See :func:`pair_profiles`.
    by_type : dict
        type -> (histogram :class:`Profile1D`, kernel :class:`Profile1D`) of the pooled profiles.
    settings : dict
        Temperature, bin width, bandwidth rule, bootstrap, seed, feature rules (for the JSON).
    notices : list of str
    """

    temperature_k: float
    profiles: pd.DataFrame
    minima: pd.DataFrame
    barriers: pd.DataFrame
    state_free_energies: pd.DataFrame
    by_type: dict
    settings: dict
    profiles_2d: pd.DataFrame | None = None
    notices: list = field(default_factory=list)


def _fine_width(blocks):
    edges = np.asarray(blocks.get("bin_edges_deg", np.linspace(-180, 180, 361)))
    return float(edges[1] - edges[0])


def _type_members(result):
    types = list(result.torsion_set.types)
    order = list(dict.fromkeys(types))
    codes = pd.Categorical(types, categories=order).codes
    by_code = np.argsort(codes, kind="stable")
    bounds = np.searchsorted(codes[by_code], np.arange(len(order) + 1))
    return order, {t: by_code[bounds[k]:bounds[k + 1]] for k, t in enumerate(order)}


def _pooled_counts(values, order, members, batch=1024):
    """Sum of ``values`` (n_blocks, n_torsions, ...) over the members of each type: (n_blocks, n_types, ...)."""
    out = np.zeros((values.shape[0], len(order)) + values.shape[2:])
    for k, t in enumerate(order):
        idx = members[t]
        for lo in range(0, len(idx), batch):
            out[:, k] += values[:, idx[lo:lo + batch]].sum(axis=1)
    return out


def type_profiles(result, temperature_k, bin_width_deg=DEFAULT_BIN_WIDTH_DEG, bandwidth_deg=None,
                  n_bootstrap=DEFAULT_BOOTSTRAP, seed=DEFAULT_SEED, types=None, kernel=True):
    """Pooled histogram (and kernel) profiles of each torsion type.

    Returns
    -------
    dict : type -> (histogram Profile1D, kernel Profile1D or None)
    """
    kt = kt_kj_mol(temperature_k)
    blocks = result.blocks
    fine = _fine_width(blocks)
    factor = check_bin_width(bin_width_deg, fine)
    order, members = _type_members(result)
    if types is not None:
        order = [t for t in order if t in set(types)]
    hist = blocks["histograms"]
    mult = bootstrap_multiplicities(blocks["hist_block_replica"], n_bootstrap, np.random.default_rng(seed))
    pooled = _pooled_counts(hist, order, members)
    hprof = _profiles_from_blocks(rebin(pooled, factor), mult, kt, bin_width_deg)
    kprof = [None] * len(order)
    if kernel and order:
        neff = effective_samples(result.populations, result.torsion_set.labels)
        bws = _bandwidths(bandwidth_deg, pooled.sum(axis=0), result.scheme,
                          [neff[members[t]].sum() for t in order], fine)
        kprof = _kernel_profiles(pooled, mult, kt, bws, fine)
    return {t: (h, k) for t, h, k in zip(order, hprof, kprof)}


def _bandwidths(bandwidth_deg, fine_counts, scheme, n_effective, fine):
    """The given bandwidth for every row, or the default rule."""
    if bandwidth_deg is not None:
        return np.full(len(fine_counts), float(bandwidth_deg))
    return default_bandwidths_deg(fine_counts, scheme, np.asarray(n_effective, dtype=float), fine)


class _Columns:
    """Column arrays of a table collected piece by piece, joined once at the end."""

    def __init__(self, columns):
        self.columns = list(columns)
        self.parts = {c: [] for c in self.columns}

    def add(self, **values):
        n = max(np.size(v) for v in values.values())
        for c in self.columns:
            self.parts[c].append(np.broadcast_to(np.asarray(values[c]), (n,)) if np.ndim(values[c]) == 0
                                 else np.asarray(values[c]).ravel())

    def frame(self, categories):
        """DataFrame; the columns named in ``categories`` hold codes into those category lists."""
        data = {}
        for c in self.columns:
            joined = np.concatenate(self.parts[c]) if self.parts[c] else np.zeros(0)
            if c in categories:
                data[c] = pd.Categorical.from_codes(joined.astype(np.int64), categories=categories[c])
            else:
                data[c] = joined
        return pd.DataFrame(data, columns=self.columns)


PROFILE_COLUMNS = ["type", "torsion", "estimate", "angle_deg", "probability_density_per_deg", "free_energy_kj_mol",
                   "free_energy_err_kj_mol", "sampled", "n_samples", "bandwidth_deg"]
MINIMA_COLUMNS = ["type", "torsion", "minimum", *MINIMUM_FIELDS]
BARRIER_COLUMNS = ["type", "torsion", "barrier", *BARRIER_FIELDS]
STATE_DG_COLUMNS = ["type", "torsion", "state", "reference_state", "population", "population_err",
                    "free_energy_kj_mol", "free_energy_err_kj_mol"]


def _stack_tables(type_code, torsion_code, hist, kernel, states, kt):
    """Rows of the four tables for one stack of profiles (a pure function: stacks run in threads).

    ``type_code``/``torsion_code`` (m,) index the type and torsion names (0 = pooled); ``hist`` is
    the histogram Profile1D stack, ``kernel`` the output of :func:`_kernel_columns` and ``states``
    that of :func:`_state_free_energy_stack`. Returns {table: {column: array}}.
    """
    bws, smooth, density, free, err, ok = kernel
    m, nh = hist.samples.shape
    nk = smooth.shape[1]
    width = nh + nk

    def join(h, k):
        return np.concatenate([np.broadcast_to(h, (m, nh)), np.broadcast_to(k, (m, nk))], axis=1)

    profiles = dict(type=np.repeat(type_code, width), torsion=np.repeat(torsion_code, width),
                    estimate=np.tile(np.repeat([0, 1], [nh, nk]), m),
                    angle_deg=np.tile(np.r_[hist.angle_deg, bin_centres(nk)], m),
                    probability_density_per_deg=join(hist.density_per_deg, density),
                    free_energy_kj_mol=join(hist.free_energy_kj_mol, free),
                    free_energy_err_kj_mol=join(np.where(hist.sampled, hist.free_energy_err_kj_mol, np.nan), err),
                    sampled=join(hist.sampled, ok), n_samples=join(hist.samples, smooth),
                    bandwidth_deg=join(np.nan, np.asarray(bws, dtype=float)[:, None]))
    minima, barriers = _features_stack(hist, kt)
    has = np.flatnonzero(states["has"])
    n_states = states["population"].shape[1]
    return {"profiles": profiles,
            "minima": dict(type=type_code[minima["row"]], torsion=torsion_code[minima["row"]],
                           minimum=minima["number"], **{f: minima[f] for f in MINIMUM_FIELDS}),
            "barriers": dict(type=type_code[barriers["row"]], torsion=torsion_code[barriers["row"]],
                             barrier=barriers["number"], **{f: barriers[f] for f in BARRIER_FIELDS}),
            "dg": dict(type=np.repeat(type_code[has], n_states), torsion=np.repeat(torsion_code[has], n_states),
                       state=np.tile(np.arange(n_states), len(has)),
                       reference_state=np.repeat(states["reference"][has], n_states),
                       **{c: states[c][has] for c in ("population", "population_err", "free_energy_kj_mol",
                                                         "free_energy_err_kj_mol")})}


class _ProfileTables:
    """The four tables of :func:`compute_profiles`, filled stack by stack."""

    def __init__(self):
        self.tables = {"profiles": _Columns(PROFILE_COLUMNS), "minima": _Columns(MINIMA_COLUMNS),
                       "barriers": _Columns(BARRIER_COLUMNS), "dg": _Columns(STATE_DG_COLUMNS)}

    def add(self, parts):
        """Append the rows of one stack (from :func:`_stack_tables`)."""
        for name, columns in parts.items():
            self.tables[name].add(**columns)

    def frames(self, types, labels, state_labels):
        torsion = [""] + list(labels)
        cats = {"type": list(types), "torsion": torsion}
        t = self.tables
        return (t["profiles"].frame({**cats, "estimate": ["histogram", "kernel"]}), t["minima"].frame(cats),
                t["barriers"].frame(cats),
                t["dg"].frame({**cats, "state": list(state_labels), "reference_state": list(state_labels)}))


def _torsion_stack(span, hist, state_counts, codes, mult, smult, kt, factor, bin_width_deg, bandwidth_deg,
                   scheme, neff, fine):
    """Bandwidths and table rows of the torsions ``span`` = (start, stop) (runs in a thread)."""
    start, stop = span
    sub = np.asarray(hist[:, start:stop, :], dtype=float)
    bws = _bandwidths(bandwidth_deg, sub.sum(axis=0), scheme, neff[start:stop], fine)
    hstack = _histogram_stack(rebin(sub, factor), mult, kt, bin_width_deg)
    rows = _stack_tables(codes[start:stop], np.arange(start, stop) + 1, hstack,
                         _kernel_columns(sub, mult, kt, bws, fine),
                         _state_free_energy_stack(state_counts[:, start:stop, :], kt, smult), kt)
    return bws, rows


def _ordered_map(func, items, threads):
    """``map(func, items)`` over a few threads, in order, with at most 2 x threads items in flight.

    NumPy releases the interpreter lock in its array loops, so stacks of torsions run in parallel.
    """
    from collections import deque
    from concurrent.futures import ThreadPoolExecutor

    from threadpoolctl import threadpool_limits  # a dependency of MDAnalysis

    if threads <= 1:
        yield from map(func, items)
        return
    # one BLAS thread per stack: the stacks themselves use the cores
    with threadpool_limits(1, user_api="blas"), ThreadPoolExecutor(threads) as pool:
        pending = deque()
        for item in items:
            pending.append(pool.submit(func, item))
            if len(pending) >= 2 * threads:
                yield pending.popleft().result()
        while pending:
            yield pending.popleft().result()


def compute_profiles(result, temperature_k=None, bin_width_deg=DEFAULT_BIN_WIDTH_DEG, bandwidth_deg=None,
                     n_bootstrap=DEFAULT_BOOTSTRAP, seed=DEFAULT_SEED, per_torsion=True, pairs=None,
                     pair_bin_width_deg=DEFAULT_PAIR_BIN_WIDTH_DEG, log=None):
    """Free-energy profiles, minima, barriers and state free energies of a results folder.

    Torsions are handled in stacks of :data:`_BATCH`: every step (bootstrap resampling of blocks,
    free energies, kernel smoothing, minima and barriers, state free energies) is one array
    operation over the torsions of a stack, and the tables are built column by column.

    Parameters
    ----------
    result : TrackResult
        From :func:`dihedra.tracking.track` or :func:`dihedra.io.resultsdir.load_results`.
    temperature_k : float, optional
        Required unless the run recorded one (then it is used and announced through ``log``).
    bin_width_deg : float
        Histogram bin width; a multiple of the fine bin (1 degree) that divides 360.
    bandwidth_deg : float, optional
        Kernel standard deviation; default by the rule in the module notes.
    n_bootstrap, seed : int
        Block-bootstrap resamples and their random seed.
    per_torsion : bool
        Also profile every torsion (not only the pooled types).
    pairs : list of (str, str), optional
        Torsion pairs (labels or types) for 2-D profiles (needs ``angles.parquet``).
    pair_bin_width_deg : float
        Bin width of the 2-D profiles.
    log : callable, optional
        Receives progress and notices.

    Returns
    -------
    ProfileSet
    """
    say = log or (lambda msg: None)
    temperature_k = resolve_temperature(temperature_k, result.summary, say)
    kt = kt_kj_mol(temperature_k)
    n_bootstrap = int(n_bootstrap)
    if n_bootstrap < 20:
        raise DihedraError(f"the bootstrap needs at least 20 resamples for a usable error; got {n_bootstrap}.")
    if bandwidth_deg is not None and not (float(bandwidth_deg) > 0):
        raise DihedraError(f"the kernel bandwidth must be a positive number of degrees; got {bandwidth_deg!r}.")
    blocks = result.blocks
    fine = _fine_width(blocks)
    factor = check_bin_width(bin_width_deg, fine)
    scheme = result.scheme
    mult = bootstrap_multiplicities(blocks["hist_block_replica"], n_bootstrap, np.random.default_rng(seed))
    hist = blocks["histograms"]
    order, members = _type_members(result)
    labels = result.torsion_set.labels
    neff = effective_samples(result.populations, labels)
    sc, sc_rep, smult = state_blocks(result, n_bootstrap, seed)
    tables = _ProfileTables()
    type_index = {t: k for k, t in enumerate(order)}

    # pooled per type
    pooled = _pooled_counts(hist, order, members)
    bws = _bandwidths(bandwidth_deg, pooled.sum(axis=0), scheme, [neff[members[t]].sum() for t in order], fine)
    hstack = _histogram_stack(rebin(pooled, factor), mult, kt, bin_width_deg)
    kstack = _kernel_stack(pooled, mult, kt, bws, fine)
    tables.add(_stack_tables(np.arange(len(order)), np.zeros(len(order), dtype=np.int64), hstack,
                             (bws, kstack.samples, kstack.density_per_deg, kstack.free_energy_kj_mol,
                              np.where(kstack.sampled, kstack.free_energy_err_kj_mol, np.nan), kstack.sampled),
                             _state_free_energy_stack(_pooled_counts(sc, order, members), kt, smult), kt))
    by_type = {t: pair for t, pair in zip(order, zip(_unstack(hstack), _unstack(kstack)))}
    bandwidths = [bws]
    # per torsion, in stacks (bounded memory), a few stacks at a time in threads
    if per_torsion:
        codes = np.array([type_index[t] for t in result.torsion_set.types], dtype=np.int64)
        spans = [(lo, min(len(labels), lo + _BATCH)) for lo in range(0, len(labels), _BATCH)]
        work = functools.partial(_torsion_stack, hist=hist, state_counts=sc, codes=codes, mult=mult, smult=smult,
                                 kt=kt, factor=factor, bin_width_deg=bin_width_deg, bandwidth_deg=bandwidth_deg,
                                 scheme=scheme, neff=neff, fine=fine)
        for bws, rows in _ordered_map(work, spans, _THREADS):
            tables.add(rows)
            bandwidths.append(bws)
    profiles, minima, barriers, state_dg = tables.frames(order, labels, scheme.labels)
    notices = _profile_notices(by_type, barriers)
    bw_all = np.concatenate(bandwidths)
    names = [("", t) for t in order] + (list(zip(labels, result.torsion_set.types)) if per_torsion else [])
    settings = {
        "temperature_k": temperature_k, "kt_kj_mol": kt, "bin_width_deg": float(bin_width_deg),
        "fine_bin_width_deg": fine, "n_bootstrap": n_bootstrap, "seed": seed,
        "bootstrap": "blocks resampled with replacement within each replica",
        "n_histogram_blocks": int(hist.shape[0]),
        "bandwidth_rule": ("given" if bandwidth_deg is not None else
                           "0.9 * within-arc standard deviation * n_effective^(-1/5), at least the fine bin"),
        "bandwidths_deg": [{"type": typ, "torsion": tor, "bandwidth_deg": float(bw)}
                           for (tor, typ), bw in zip(names, bw_all)],
        "minimum_depth_rule": f"max({MIN_DEPTH_KT} kT, {MIN_DEPTH_SIGMA} combined standard errors)",
        "state_free_energy_reference": "most populated state",
        "scheme": scheme.name,
    }
    pset = ProfileSet(temperature_k=temperature_k, profiles=profiles, minima=minima, barriers=barriers,
                      state_free_energies=state_dg, by_type=by_type, settings=settings, notices=notices)
    if pairs:
        frames = []
        for a, b in pairs:
            say(f"2-D profile of {a} and {b} (reading angles.parquet in chunks)")
            frames.append(pair_profiles(result, a, b, temperature_k, pair_bin_width_deg, n_bootstrap, seed,
                                        notices=notices))
        pset.profiles_2d = pd.concat(frames, ignore_index=True)
        settings["pair_bin_width_deg"] = float(pair_bin_width_deg)
    return pset


def _profile_notices(by_type, barriers):
    """Notices on unvisited bins and unsampled barriers of the pooled profiles."""
    notices = []
    unvisited = {t: int((~h.sampled).sum()) for t, (h, _) in by_type.items()}
    n_bins = sum(unvisited.values())
    if n_bins:
        n_types = sum(1 for v in unvisited.values() if v)
        notices.append(f"{n_bins} histogram bins of {n_types} type(s) were never visited: they are "
                       "marked sampled = False with no free energy (the data give only a lower bound there).")
    pooled_barriers = barriers[barriers["torsion"] == ""]
    n_unsampled = int((~pooled_barriers["sampled"].astype(bool)).sum())
    if n_unsampled:
        notices.append(f"{n_unsampled} barrier(s) of the pooled profiles cross unsampled "
                       "regions; their height is unknown (higher than any sampled value).")
    return notices


# ----------------------------------------------------------------------------------------------
# 2-D profiles
# ----------------------------------------------------------------------------------------------

def _resolve_pairs(result, a, b):
    """Torsion positions of the pairs named by (label, label) or (type, type)."""
    labels = result.torsion_set.labels
    lookup = {label: k for k, label in enumerate(labels)}
    if a in lookup and b in lookup:
        if a == b:
            raise DihedraError(f"a 2-D profile needs two different torsions; got {a!r} twice.")
        return [(lookup[a], lookup[b])]
    types = result.torsion_set.types
    known_types = set(types)
    for name in (a, b):
        if name not in lookup and name not in known_types:
            raise DihedraError(f"{name!r} is neither a torsion label nor a torsion type of this run; see "
                               "torsions.csv (e.g. " + ", ".join(labels[:2] + sorted(known_types)[:2]) + ").")
    if a in lookup or b in lookup:
        raise DihedraError(f"give either two torsion labels or two torsion types for a pair; got {a!r} and {b!r}.")
    groups = {}
    for k, t in enumerate(result.torsion_set.torsions):
        groups.setdefault(t.group, {}).setdefault(t.type, []).append(k)
    out = [(g[a][0], g[b][0]) for g in groups.values()
           if len(g.get(a, [])) == 1 and len(g.get(b, [])) == 1 and a != b]
    if not out:
        raise DihedraError(f"no molecule or residue holds exactly one torsion of type {a!r} and one of type "
                           f"{b!r}; name two torsion labels instead.")
    return out


def pair_profiles(result, a, b, temperature_k, bin_width_deg=DEFAULT_PAIR_BIN_WIDTH_DEG,
                  n_bootstrap=DEFAULT_BOOTSTRAP, seed=DEFAULT_SEED, batch_frames=None, notices=None):
    """Periodic 2-D free-energy profile F(phi_a, phi_b) from ``angles.parquet``, read in chunks.

    ``a`` and ``b`` are two torsion labels, or two torsion types (then every group with one
    torsion of each type contributes, pooled). Errors by the same block bootstrap as 1-D profiles,
    with the frames of each replica cut into the same number of blocks as the histograms.

    Returns
    -------
    DataFrame with columns torsion_a, torsion_b, n_pairs, angle_a_deg, angle_b_deg,
    probability_density_per_deg2, free_energy_kj_mol, free_energy_err_kj_mol, sampled, n_samples.
    """
    kt = kt_kj_mol(temperature_k)
    if not result.has_series("angles"):
        raise DihedraError(f"2-D profiles need the angle time series, and {result.folder or 'this result'} "
                           "has no angles.parquet; rerun 'dihedra track ... --keep-angles'.")
    factor = check_bin_width(bin_width_deg, 1.0, "2-D bin width")
    nb = 360 // factor
    pairs = _resolve_pairs(result, a, b)
    labels = result.torsion_set.labels
    cols = sorted({labels[i] for p in pairs for i in p}, key=labels.index)
    column = {c: k for k, c in enumerate(cols)}
    replicas = result.summary.get("replicas", [])
    n_frames = [int(r["frames_analysed"]) for r in replicas]
    per_rep = int(result.summary.get("parameters", {}).get("n_hist_blocks") or 16)
    hist = np.zeros((per_rep * max(1, len(n_frames)), nb * nb))
    for chunk in result.iter_chunks("angles", cols, batch_frames):
        rep = chunk.replica
        weight = chunk.weight if chunk.weight is not None else np.ones(len(chunk))
        total = n_frames[rep] if n_frames else len(chunk)
        block = rep * per_rep + np.minimum(chunk.position * per_rep // max(total, 1), per_rep - 1)
        for ia, ib in pairs:
            x = chunk.values[column[labels[ia]]].astype(float)
            y = chunk.values[column[labels[ib]]].astype(float)
            ok = np.isfinite(x) & np.isfinite(y)
            bx = np.clip(np.ceil((x[ok] + 180.0) / bin_width_deg).astype(np.int64) - 1, 0, nb - 1)
            by = np.clip(np.ceil((y[ok] + 180.0) / bin_width_deg).astype(np.int64) - 1, 0, nb - 1)
            flat = block[ok] * nb * nb + bx * nb + by
            hist += np.bincount(flat, weights=weight[ok], minlength=hist.size).reshape(hist.shape)
    replica_of_block = np.repeat(np.arange(hist.shape[0] // per_rep), per_rep)
    mult = bootstrap_multiplicities(replica_of_block, n_bootstrap, np.random.default_rng(seed))
    counts = hist.sum(axis=0)
    density, free = free_energy_from_counts(counts, bin_width_deg ** 2, kt)
    _, bfree = free_energy_from_counts(mult @ hist, bin_width_deg ** 2, kt)
    err, _ = bootstrap_spread(bfree)
    if np.isfinite(free).any():
        free = free - np.nanmin(free)
    centres = bin_centres(nb)
    gx, gy = np.meshgrid(centres, centres, indexing="ij")
    single = len(pairs) == 1 and a in labels
    if notices is not None and (counts == 0).any():
        notices.append(f"2-D profile {a} / {b}: {int((counts == 0).sum())} of {counts.size} bins were never "
                       "visited (sampled = False, no free energy).")
    return pd.DataFrame({
        "torsion_a": a, "torsion_b": b, "n_pairs": len(pairs) if not single else 1,
        "angle_a_deg": gx.ravel(), "angle_b_deg": gy.ravel(),
        "probability_density_per_deg2": density, "free_energy_kj_mol": free,
        "free_energy_err_kj_mol": np.where(counts > 0, err, np.nan), "sampled": counts > 0,
        "n_samples": counts})


# ----------------------------------------------------------------------------------------------
# Writing
# ----------------------------------------------------------------------------------------------

def convert_energy_columns(frame, unit, temperature_k):
    """Copy of ``frame`` with every ``*_kj_mol`` column converted to ``unit`` and renamed."""
    unit = canonical_energy_unit(unit)
    if unit not in PROFILE_ENERGY_UNITS:
        raise DihedraError(f"profiles are written in kJ/mol, kcal/mol or kT; got {unit!r}.")
    out = frame.copy()
    if unit == "kJ/mol":
        return out
    suffix = unit_suffix(unit)
    rename = {}
    for col in out.columns:
        if col.endswith("_kj_mol"):
            out[col] = from_kj_mol(out[col].to_numpy(float), unit, temperature_k)
            rename[col] = col[: -len("kj_mol")] + suffix
    return out.rename(columns=rename)


def write_profiles(pset, folder, energy_unit="kJ/mol"):
    """Write profiles.csv, minima.csv, barriers.csv, state_free_energies.csv, profiles.json
    (and profiles_2d.csv) into ``folder``, each atomically. Returns the paths."""
    paths = []
    tables = [("profiles.csv", pset.profiles), ("minima.csv", pset.minima), ("barriers.csv", pset.barriers),
              ("state_free_energies.csv", pset.state_free_energies)]
    if pset.profiles_2d is not None:
        tables.append(("profiles_2d.csv", pset.profiles_2d))
    for name, frame in tables:
        converted = (frame if canonical_energy_unit(energy_unit) == "kJ/mol"  # no copy of 6.5 million rows
                     else convert_energy_columns(frame, energy_unit, pset.temperature_k))
        paths.append(write_table(converted, folder, name))
    info = dict(pset.settings)
    info["energy_unit"] = canonical_energy_unit(energy_unit)
    info["files"] = [os.path.basename(p) for p in paths]
    info["notices"] = list(pset.notices)
    info["cautions"] = [
        "F = -kT ln p is a potential of mean force along one torsion: it includes the effect of the "
        "environment and of every other degree of freedom, averaged over them.",
        "Bins with sampled = False were never visited; their free energy is unknown, not zero or infinite.",
        "Errors come from a block bootstrap over 16 blocks per replica; with few transitions per block "
        "they underestimate the true uncertainty.",
    ]
    paths.append(write_json(info, folder, "profiles.json"))
    return paths
