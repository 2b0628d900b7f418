r"""Periodic density estimates of angles and their block-bootstrap resamples: the pure numerical
pieces of the profiles (histogram and von Mises kernel estimates, free energies, the bandwidth rule).

Arrays in, arrays out; no results folders, no tables. The profiles of a tracking result
(:mod:`dihedra.analysis.profiles.estimation`) and the data-driven state scheme ``basins``
(:mod:`dihedra.trajectory.basins`) both use them, so the two agree by construction.

* **histogram** -- p = n_bin / (N w), bins open at their left edge and closed at their right.
* **kernel** -- a von Mises kernel density, K(d) ~ exp(kappa cos d), evaluated on the fine grid by
  circular convolution of the fine histogram (a binned kernel estimate); the bandwidth is the
  kernel standard deviation sigma in degrees, kappa = 1/sigma^2 (sigma in radians). Default rule
  (Silverman's rule of thumb within states): sigma = 0.9 s n_eff^(-1/5), s the population-weighted
  within-arc standard deviation of the angle, at least the fine bin width.
* **errors** -- a block bootstrap: blocks drawn with replacement within each replica; the error of
  a histogram bin never below the counting floor kT sqrt(1/n - 1/N) (:func:`counting_error_floor`),
  a kernel point never below its own, n the samples within its bandwidth
  (:func:`kernel_counting_floor`); a profile whose samples lie in fewer than
  :data:`MIN_BOOTSTRAP_BLOCKS` blocks (a single frame) has no errors (NaN).

Stacks of torsions or types are handled at once (one array operation over the stack).

References
----------
Block bootstrap: Kuensch, Ann. Stat. 17 (1989) 1217. Binned kernel density estimates: Silverman,
Appl. Stat. 31 (1982) 93; rule of thumb: Silverman, Density Estimation (1986), eq. 3.31.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

#: Smoothed block histograms below this fraction of their largest value count as zero (round-off
#: of the Fourier transform, about 1e-16 of the largest value, would otherwise decide whether a
#: resample without data near a point enters its error, and with what free energy).
KERNEL_FLOOR = 1e-9
#: A profile's errors need samples in at least this many blocks: a single block (a single frame, or
#: a replica of a few frames that fill one block) is the same in every resample that holds it, so a
#: bootstrap has nothing to resample and the counting floor would treat the torsions of one
#: structure as independent samples; such a profile has no errors (NaN).
MIN_BOOTSTRAP_BLOCKS = 2


def blocks_with_samples(block_counts):
    """The blocks that hold samples of each row of a stack: ``block_counts`` (n_blocks, m, ...) -> (m,).

    >>> blocks_with_samples(np.array([[[1, 0]], [[0, 0]], [[0, 2]]]))
    array([2])
    """
    counts = np.asarray(block_counts)
    held = counts.reshape(counts.shape[:2] + (-1,)).sum(axis=-1) > 0
    return held.sum(axis=0)


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
    err_floor_kj_mol : ndarray (n,) or None
        The counting floor of each bin's error (:func:`counting_error_floor`), part of
        ``free_energy_err_kj_mol`` already; ``None`` where the estimate has none (kernel).
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
    err_floor_kj_mol: np.ndarray | None = None

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


def counting_error_floor(counts, kt, count_scale=1.0):
    """The error that counting alone gives -kT ln p of each bin: kT sqrt(1/n - 1/N), NaN where empty.

    n = ``count_scale`` x the bin's count is its effective number of samples and N that of the
    whole profile (last axis): the binomial variance of a fraction p = n/N, p(1 - p)/N, carried
    through the logarithm (the delta method), var(ln p) = (1 - p)/(N p) = 1/n - 1/N. A bin of n
    samples cannot know its free energy better than about kT/sqrt(n) whatever a bootstrap over
    blocks says: with a few samples most blocks hold none, the resamples in which the bin is
    sampled at all hold nearly the same few samples, and their spread collapses. ``count_scale``
    turns a weighted count into effective samples (1 for frame counts; see
    :func:`dihedra.analysis.profiles.estimation.effective_count_scale`).
    """
    counts = np.asarray(counts, dtype=float)
    scale = np.asarray(count_scale, dtype=float)
    scale = scale.reshape(scale.shape + (1,) * (counts.ndim - scale.ndim)) if scale.ndim else scale
    n = counts * scale
    total = n.sum(axis=-1, keepdims=True)
    with np.errstate(divide="ignore", invalid="ignore"):
        floor = kt * np.sqrt(np.clip(1.0 / n - 1.0 / total, 0.0, None))
    return np.where(counts > 0, floor, np.nan)


def kernel_counting_floor(smooth, bandwidths_deg, fine_width, kt, count_scale=1.0):
    """The counting floor of a kernel estimate of -kT ln p: kT sqrt(1/n_k - 1/N), NaN where empty.

    A kernel estimate at a point averages the samples within about its bandwidth: with a Gaussian
    kernel of standard deviation sigma, var(f_hat) / f^2 = R(K) / (N f) with R(K) = 1 / (2 sigma
    sqrt(pi)) (Silverman, Density Estimation for Statistics and Data Analysis, 1986, section 3.3), so
    the point counts as n_k = N f 2 sigma sqrt(pi) samples: the smoothed counts per degree times 2
    sqrt(pi) sigma (the von Mises kernels here are narrow enough to be Gaussian). ``smooth``:
    smoothed counts per fine bin (m, n), ``bandwidths_deg`` (m,), ``count_scale`` as for
    :func:`counting_error_floor`.
    """
    smooth = np.asarray(smooth, dtype=float)
    scale = np.asarray(count_scale, dtype=float)
    scale = scale.reshape(scale.shape + (1,) * (smooth.ndim - scale.ndim)) if scale.ndim else scale
    window = 2.0 * np.sqrt(np.pi) * np.asarray(bandwidths_deg, dtype=float).reshape(-1, 1)
    n_k = smooth / fine_width * window * scale
    total = (smooth * scale).sum(axis=-1, keepdims=True)
    with np.errstate(divide="ignore", invalid="ignore"):
        floor = kt * np.sqrt(np.clip(1.0 / n_k - 1.0 / total, 0.0, None))
    return np.where(smooth > 0, floor, np.nan)


def short_run_spread(err, floor, ratio):
    """Bootstrap spreads ``err`` (m, n) of the bins of a stack raised for the bias of a short run.

    Resampling blocks that are not much longer than the correlation time sees only part of the
    correlated variance: ``ratio`` (m,) of it (:func:`dihedra.numerics.blocking_bias.level_ratio`
    at the span fitted to the state populations; 1 leaves the spread as it is). The counting floor
    ``floor`` (:func:`counting_error_floor`) is the uncorrelated (binomial) part of a bin's
    variance, which the blocks do see in full; only the part above it is divided by the ratio.
    Returns the spread and its factor over ``err`` (1 where there is none), by which the
    resamples are stretched (:func:`stretch_resamples`).

    >>> spread, factor = short_run_spread(np.array([[0.5, 0.1]]), np.array([[0.3, 0.2]]), [0.25])
    >>> spread.round(3).tolist(), factor.round(3).tolist()
    ([[0.854, 0.1]], [[1.709, 1.0]])
    """
    err = np.asarray(err, dtype=float)
    r = np.asarray(ratio, dtype=float)
    r = r.reshape((-1,) + (1,) * (err.ndim - 1)) if r.ndim == 1 else r
    with np.errstate(invalid="ignore", divide="ignore"):
        excess = np.where(np.isfinite(floor) & np.isfinite(err),
                          np.clip(err ** 2 - np.asarray(floor) ** 2, 0.0, None), 0.0)
        spread = np.sqrt(err ** 2 + excess * (1.0 / r - 1.0))
        factor = np.where(err > 0, spread / err, 1.0)
    return np.where(np.isfinite(spread), spread, err), np.where(np.isfinite(factor), factor, 1.0)


def stretch_resamples(boot, factor):
    """Resamples (m, n, n_boot) with their deviations from their mean (over the finite ones)
    multiplied by ``factor`` (m, n): what is derived from them (barrier heights, minima) carries
    the raised spread of :func:`short_run_spread`."""
    factor = np.asarray(factor, dtype=float)
    if np.all(factor == 1.0):
        return boot
    finite = np.isfinite(boot)
    with np.errstate(invalid="ignore", divide="ignore"):
        centre = np.where(finite, boot, 0.0).sum(axis=-1) / finite.sum(axis=-1)
        stretched = centre[..., None] + (boot - centre[..., None]) * factor[..., None]
    return np.where(finite, stretched, boot)


def _histogram_stack(block_counts, mult, kt, width, count_scale=1.0, ratio=None):
    """Histogram profiles of a stack of torsions or types, as one Profile1D with a leading axis.

    ``block_counts`` (n_blocks, m, n_bins); the fields of the result are (m, n_bins) arrays and
    ``boot_free_energy`` is (m, n_bins, n_bootstrap), resamples last, +inf where a resample has
    no sample in a bin (:func:`_unstack` gives single profiles in the documented layout). The
    error of a sampled bin is the larger of the bootstrap spread and the counting floor
    (:func:`counting_error_floor`, effective samples ``count_scale`` per count: a scalar or one
    per row), the spread raised for a short run by ``ratio`` (one per row; see
    :func:`short_run_spread`). A row whose samples lie in fewer than :data:`MIN_BOOTSTRAP_BLOCKS`
    blocks has no errors and no floors (NaN): there is nothing to resample.
    """
    block_counts = np.asarray(block_counts, dtype=float)
    counts = block_counts.sum(axis=0)
    density, free = free_energy_from_counts(counts, width, kt)
    boot_free = _resampled_free_energy(np.tensordot(block_counts, mult, axes=(0, 1)), width, kt)
    err, frac = _spread_last(boot_free)
    floor = counting_error_floor(counts, kt, count_scale)
    if ratio is not None:
        err, factor = short_run_spread(err, floor, ratio)
        boot_free = stretch_resamples(boot_free, factor)
    err = np.where(counts > 0, np.fmax(err, floor), err)
    alone = (blocks_with_samples(block_counts) < MIN_BOOTSTRAP_BLOCKS)[:, None]   # (no bootstrap: no error)
    err, floor = np.where(alone, np.nan, err), np.where(alone, np.nan, floor)
    return Profile1D(angle_deg=bin_centres(counts.shape[-1]), samples=counts, density_per_deg=density,
                     free_energy_kj_mol=free - _row_min(free)[:, None], free_energy_err_kj_mol=err,
                     sampled=counts > 0, boot_free_energy=boot_free, boot_valid_fraction=frac,
                     err_floor_kj_mol=floor)


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
                             bandwidth_deg=None if bws is None else float(bws[k]),
                             err_floor_kj_mol=None if stack.err_floor_kj_mol is None else stack.err_floor_kj_mol[k]))
    return out


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


def _kernel_stack(fine_block_counts, mult, kt, bandwidths, fine_width, count_scale=1.0, ratio=None):
    """Kernel profiles of a stack of fine block histograms (n_blocks, m, n_fine), as one Profile1D.

    Smoothing is linear, so the resamples are the resampled sums of the smoothed blocks. The error
    of a sampled point is at least its counting floor (:func:`kernel_counting_floor`); ``ratio``
    raises the spread for a short run (:func:`short_run_spread`); a row with samples in fewer than
    :data:`MIN_BOOTSTRAP_BLOCKS` blocks has no errors (NaN).
    """
    bws, smooth, sampled, smooth_blocks = _kernel_setup(fine_block_counts, bandwidths, fine_width)
    density, free = free_energy_from_counts(smooth, fine_width, kt)
    bsmooth = np.clip(np.tensordot(smooth_blocks * sampled, mult, axes=(0, 1)), 0.0, None)  # (m, n, n_boot)
    bfree = _resampled_free_energy(bsmooth, fine_width, kt)
    err, frac = _spread_last(bfree)
    floor = kernel_counting_floor(smooth, bws, fine_width, kt, count_scale)
    if ratio is not None:
        err, factor = short_run_spread(err, floor, ratio)
        bfree = stretch_resamples(bfree, factor)
    err = np.where(sampled & (smooth > 0), np.fmax(err, floor), err)
    err = np.where((blocks_with_samples(fine_block_counts) < MIN_BOOTSTRAP_BLOCKS)[:, None], np.nan, err)
    return Profile1D(angle_deg=bin_centres(smooth.shape[-1]), samples=smooth, density_per_deg=density,
                     free_energy_kj_mol=free - _row_min(free)[:, None], free_energy_err_kj_mol=err,
                     sampled=sampled & (smooth > 0), boot_free_energy=bfree, boot_valid_fraction=frac,
                     bandwidth_deg=bws)


def default_bandwidths_deg(fine_counts, scheme, n_effective, fine_width_deg=1.0):
    """The default kernel bandwidths (standard deviations, degrees) of a stack of torsions or types.

    sigma = 0.9 s n_eff^(-1/5), s = population-weighted within-arc standard deviation of the
    angle (each arc of ``scheme`` about its own circular mean), at least ``fine_width_deg``.

    Parameters
    ----------
    fine_counts : ndarray (m, n_fine)
    scheme : StateScheme or list of StateScheme
        The scheme of the rows (one per row: each row's own arcs).
    n_effective : ndarray (m,)

    Returns
    -------
    ndarray (m,)
    """
    counts = np.atleast_2d(np.asarray(fine_counts, dtype=float))
    if isinstance(scheme, (list, tuple)):   # one scheme per row (a set of schemes: each type its own)
        n_eff = np.broadcast_to(np.asarray(n_effective, dtype=float), (len(counts),))
        out = np.empty(len(counts))
        for part in dict.fromkeys(scheme):
            rows = np.array([p == part for p in scheme], dtype=bool)
            out[rows] = default_bandwidths_deg(counts[rows], part, n_eff[rows], fine_width_deg)
        return out
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
