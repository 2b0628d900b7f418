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

2-D profiles F(phi_a, phi_b) for a pair of torsions need the angle time series
(``angles.parquet``, written by ``track --keep-angles``); it is read in chunks, so memory does not
grow with the trajectory. Pairs given as torsion types pool every group (molecule or residue)
that holds one torsion of each type.

Example
-------
>>> from dihedra import track, example_path
>>> from dihedra.profiles import compute_profiles
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

import os
import uuid
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from .errors import DihedraError
from .units import check_temperature, from_kj_mol, canonical_energy_unit, kt_kj_mol, wrap_deg

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
#: Energy units a profile can be written in.
PROFILE_ENERGY_UNITS = ("kJ/mol", "kcal/mol", "kT")
#: Torsions per batch in the bootstrap (bounds memory: n_bootstrap x batch x bins doubles).
_BATCH = 64


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


def replace_into(folder, name, write):
    """Write a file through ``write(path)`` under a temporary name, then move it into place."""
    tmp = os.path.join(folder, f".{name}.{uuid.uuid4().hex[:8]}.tmp")
    try:
        write(tmp)
        os.replace(tmp, os.path.join(folder, name))
    finally:
        if os.path.exists(tmp):
            os.remove(tmp)
    return os.path.join(folder, name)


def write_table_replacing(frame, folder, name):
    """A tidy table as CSV (NaN as an empty cell), written atomically."""
    return replace_into(folder, name, lambda p: frame.to_csv(p, index=False, float_format="%.6g"))


def write_json_replacing(data, folder, name):
    """A JSON document, written atomically."""
    from .resultsdir import write_json
    return replace_into(folder, name, lambda p: write_json(data, os.path.dirname(p), os.path.basename(p)))


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


def _profiles_from_blocks(block_counts, mult, kt, width):
    """Histogram profiles for a stack: block_counts (n_blocks, m, n_bins) -> list of Profile1D."""
    counts = block_counts.sum(axis=0)
    density, free = free_energy_from_counts(counts, width, kt)
    boot = np.tensordot(mult, block_counts, axes=(1, 0))  # (n_boot, m, n_bins)
    _, boot_free = free_energy_from_counts(boot, width, kt)
    err, frac = bootstrap_spread(boot_free)
    shift = np.array([np.nanmin(f) if np.isfinite(f).any() else 0.0 for f in free])
    centres = bin_centres(counts.shape[-1])
    out = []
    for k in range(counts.shape[0]):
        out.append(Profile1D(angle_deg=centres, samples=counts[k], density_per_deg=density[k],
                             free_energy_kj_mol=free[k] - shift[k], free_energy_err_kj_mol=err[k],
                             sampled=counts[k] > 0, boot_free_energy=boot_free[:, k],
                             boot_valid_fraction=frac[k]))
    return out


def von_mises_smooth(counts, bandwidth_deg):
    """Circular convolution of fine-bin counts (last axis) with a von Mises kernel.

    ``bandwidth_deg`` is the kernel standard deviation; kappa = 1 / sigma^2 (radians).
    """
    counts = np.asarray(counts, dtype=float)
    n = counts.shape[-1]
    kappa = 1.0 / np.radians(float(bandwidth_deg)) ** 2
    d = 2.0 * np.pi * np.arange(n) / n
    kernel = np.exp(kappa * (np.cos(d) - 1.0))
    kernel /= kernel.sum()
    out = np.fft.irfft(np.fft.rfft(counts, axis=-1) * np.fft.rfft(kernel), n, axis=-1)
    return np.clip(out, 0.0, None)


def _kernel_profiles(fine_block_counts, mult, kt, bandwidths, fine_width):
    """Kernel profiles for a stack of fine block histograms (n_blocks, m, n_fine)."""
    from scipy.ndimage import maximum_filter1d

    counts = fine_block_counts.sum(axis=0)
    boot = np.tensordot(mult, fine_block_counts, axes=(1, 0))
    centres = bin_centres(counts.shape[-1])
    out = []
    for k in range(counts.shape[0]):
        bw = float(bandwidths[k])
        smooth = von_mises_smooth(counts[k], bw)
        reach = max(1, int(np.ceil(bw / fine_width)))
        sampled = maximum_filter1d((counts[k] > 0).astype(np.int8), size=2 * reach + 1, mode="wrap") > 0
        smooth = np.where(sampled, smooth, 0.0)
        density, free = free_energy_from_counts(smooth, fine_width, kt)
        bsmooth = von_mises_smooth(boot[:, k], bw) * sampled
        _, bfree = free_energy_from_counts(bsmooth, fine_width, kt)
        err, frac = bootstrap_spread(bfree)
        shift = np.nanmin(free) if np.isfinite(free).any() else 0.0
        out.append(Profile1D(angle_deg=centres, samples=smooth, density_per_deg=density,
                             free_energy_kj_mol=free - shift, free_energy_err_kj_mol=err,
                             sampled=sampled & (smooth > 0), boot_free_energy=bfree,
                             boot_valid_fraction=frac, bandwidth_deg=bw))
    return out


def default_bandwidth_deg(fine_counts, scheme, n_effective, fine_width_deg=1.0):
    """The default kernel bandwidth (standard deviation, degrees) for one torsion or type.

    sigma = 0.9 s n_eff^(-1/5), s = population-weighted within-arc standard deviation of the
    angle (each arc of ``scheme`` about its own circular mean), at least ``fine_width_deg``.
    """
    counts = np.asarray(fine_counts, dtype=float)
    total = counts.sum()
    if total <= 0:
        return float(fine_width_deg)
    centres = bin_centres(len(counts))
    var, wsum = 0.0, 0.0
    for _, start, end in scheme.merged_arcs():
        rel = np.mod(centres - start, 360.0)
        sel = (rel > 0) & (rel <= (end - start))
        w = counts[sel]
        if w.sum() <= 0:
            continue
        ang = np.radians(centres[sel])
        mean = np.arctan2((w * np.sin(ang)).sum(), (w * np.cos(ang)).sum())
        dev = _circular_deviation_deg(centres[sel], np.degrees(mean))
        var += float((w * dev ** 2).sum())
        wsum += float(w.sum())
    s = np.sqrt(var / wsum) if wsum > 0 else 0.0
    n_eff = max(float(n_effective), 2.0)
    return float(max(0.9 * s * n_eff ** (-0.2), fine_width_deg))


def effective_samples(populations, torsions):
    """Effective independent samples of each torsion (median over states of ``n_effective``).

    States with a population below 0.02 or above 0.98 are left out (their blocking estimate is
    poor); a torsion without such states uses its sample count.
    """
    out = {}
    for label, sub in populations.groupby("torsion", sort=False):
        ok = sub[(sub["population"] > 0.02) & (sub["population"] < 0.98) & np.isfinite(sub["n_effective"])]
        out[label] = float(ok["n_effective"].median()) if len(ok) else float(sub["n_samples"].iloc[0])
    return np.array([out.get(t, 1.0) for t in torsions])


# ----------------------------------------------------------------------------------------------
# Features: minima, barriers
# ----------------------------------------------------------------------------------------------

def _arc(n, a, b):
    """Indices strictly between a and b going up the circle (the whole circle but a if a == b)."""
    if a == b:
        return (a + 1 + np.arange(n - 1)) % n
    length = (b - a) % n
    return (a + 1 + np.arange(length - 1)) % n


def find_minima(free, err, kt, usable=None, min_depth_kt=MIN_DEPTH_KT, min_depth_sigma=MIN_DEPTH_SIGMA):
    """Indices of the minima of a periodic profile (see the module notes for the depth rule).

    Unsampled (NaN) bins count as infinitely high. Only bins where ``usable`` is true (default:
    all sampled bins) can be minima; :func:`profile_features` passes the bins sampled in at least
    :data:`MIN_RESAMPLED_FRACTION` of the bootstrap resamples, so that a stray visit to an
    otherwise empty region is not taken for a minimum. Returns indices in increasing angle.
    """
    g = np.where(np.isfinite(free), free, np.inf)
    ok = np.isfinite(g) if usable is None else np.isfinite(g) & np.asarray(usable, dtype=bool)
    e = np.where(np.isfinite(err), err, 0.0)
    n = len(g)
    if not np.isfinite(g).any():
        return []
    if not ok.any():
        return []
    cand = [i for i in range(n) if ok[i] and g[i] < g[i - 1] and g[i] <= g[(i + 1) % n]]
    if not cand:
        cand = [int(np.argmin(np.where(ok, g, np.inf)))]
    while len(cand) > 1:
        deficits = []
        for k, i in enumerate(cand):
            sides = []
            for a, b in ((cand[k - 1], i), (i, cand[(k + 1) % len(cand)])):
                arc = _arc(n, a, b)
                j = arc[np.argmax(g[arc])] if len(arc) else i
                sides.append((g[j], j))
            top, j = min(sides)
            need = max(min_depth_kt * kt, min_depth_sigma * np.hypot(e[i], e[j]))
            deficits.append(top - g[i] - need)
        worst = int(np.argmin(deficits))
        if deficits[worst] >= 0:
            break
        cand.pop(worst)
    return sorted(cand)


def _parabola(left, mid, right):
    """Vertex offset (in bins, within +-0.5) and value of a parabola through three points."""
    left, mid, right = (np.asarray(x, dtype=float) for x in (left, mid, right))
    denom = left - 2.0 * mid + right
    with np.errstate(invalid="ignore", divide="ignore"):
        delta = 0.5 * (left - right) / denom
    good = np.isfinite(delta) & np.isfinite(left) & np.isfinite(right) & (denom != 0)
    delta = np.where(good, np.clip(delta, -0.5, 0.5), 0.0)
    value = np.where(good, mid - 0.25 * (left - right) * delta, mid)
    return delta, value


#: Least-squares quadratic over the bins -2..+2 around an extremum: coefficients = _FIT @ values.
_FIT_X = np.arange(-2, 3, dtype=float)
_FIT = np.linalg.pinv(np.vander(_FIT_X, 3, increasing=True))


def _refine(values, idx, kind):
    """Refined position (bins) and value of the extremum at ``idx`` of each row of ``values``.

    A least-squares parabola through the five bins around ``idx`` (less sensitive to the noise of
    single bins than the bin itself); a three-point parabola where the five are not all sampled or
    the fit bends the wrong way; the bin itself where neither works.
    """
    n = values.shape[-1]
    rows = np.arange(values.shape[0])
    y5 = values[rows[:, None], (idx[:, None] + _FIT_X.astype(int)[None, :]) % n]
    c = y5 @ _FIT.T  # (rows, 3): c0 + c1 x + c2 x^2
    with np.errstate(invalid="ignore", divide="ignore"):
        x5 = -c[:, 1] / (2.0 * c[:, 2])
    bend = c[:, 2] > 0 if kind == "min" else c[:, 2] < 0
    good5 = np.isfinite(y5).all(axis=1) & bend & (np.abs(x5) <= 1.0)
    v5 = c[:, 0] + c[:, 1] * x5 + c[:, 2] * x5 ** 2
    delta3, v3 = _parabola(y5[:, 1], y5[:, 2], y5[:, 3])
    return np.where(good5, idx + x5, idx + delta3), np.where(good5, v5, v3)


def _extremum(values, window, kind):
    """Refined extremum of each row of ``values`` (..., n) inside ``window`` (indices).

    Returns (position in bins, value, ok); for maxima a row with an unsampled bin in the window is
    not ok (the barrier is not known there).
    """
    values = np.atleast_2d(values)
    sub = values[:, window]
    if kind == "min":
        filled = np.where(np.isfinite(sub), sub, np.inf)
        k = np.argmin(filled, axis=1)
        ok = np.isfinite(filled[np.arange(len(k)), k])
    else:
        ok = np.isfinite(sub).all(axis=1)
        filled = np.where(np.isfinite(sub), sub, -np.inf)
        k = np.argmax(filled, axis=1)
    idx = np.asarray(window)[k]
    pos, value = _refine(values, idx, kind)
    return pos, value, ok


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
    free = profile.free_energy_kj_mol
    n = len(free)
    w = profile.width_deg
    centres = profile.angle_deg
    mins = find_minima(free, profile.free_energy_err_kj_mol, kt,
                       usable=profile.boot_valid_fraction >= MIN_RESAMPLED_FRACTION)
    if not mins:
        return [], []
    boot = profile.boot_free_energy
    # barrier windows between neighbouring minima, then basins between barriers
    pairs = [(mins[k], mins[(k + 1) % len(mins)]) for k in range(len(mins))]
    bar_idx = []
    for a, b in pairs:
        arc = _arc(n, a, b)
        g = free[arc]
        bar_idx.append(int(arc[np.argmax(np.where(np.isfinite(g), g, np.inf))]) if len(arc) else a)

    def angle(pos):
        return wrap_deg(centres[0] + np.asarray(pos) * w)

    # main estimate and resamples of each minimum
    min_main, min_boot = [], []
    for k, i in enumerate(mins):
        window = _arc(n, bar_idx[k - 1], bar_idx[k])
        if not len(window):
            window = np.array([i])
        pm, vm, _ = _extremum(free, window, "min")
        pb, vb, okb = _extremum(boot, window, "min")
        vb = np.where(okb, vb, np.nan)
        min_main.append((float(pm[0]), float(vm[0])))
        min_boot.append((pb, vb))
    gmin_main = min(v for _, v in min_main)
    gmin_boot = np.nanmin(np.array([vb for _, vb in min_boot]), axis=0)
    minima = []
    for (pm, vm), (pb, vb) in zip(min_main, min_boot):
        pos_err, _ = bootstrap_spread(_circular_deviation_deg(angle(pb), angle(pm))[:, None])
        val_err, _ = bootstrap_spread((vb - gmin_boot)[:, None])
        minima.append({"angle_deg": float(angle(pm)), "angle_err_deg": float(pos_err[0]),
                       "free_energy_kj_mol": vm - gmin_main, "free_energy_err_kj_mol": float(val_err[0])})
    barriers = []
    for k, (a, b) in enumerate(pairs):
        arc = _arc(n, a, b)
        sampled = bool(len(arc) and np.isfinite(free[arc]).all())
        row = {"from_minimum_deg": minima[k]["angle_deg"],
               "to_minimum_deg": minima[(k + 1) % len(mins)]["angle_deg"], "sampled": sampled}
        if sampled:
            pm, vm, _ = _extremum(free, arc, "max")
            pb, vb, okb = _extremum(boot, arc, "max")
            vb = np.where(okb, vb, np.nan)
            va, vbb = min_boot[k][1], min_boot[(k + 1) % len(mins)][1]
            errs = [bootstrap_spread(x[:, None])[0][0] for x in
                    (_circular_deviation_deg(angle(pb), angle(pm[0])), vb - gmin_boot, vb - va, vb - vbb)]
            row.update({"angle_deg": float(angle(pm[0])), "angle_err_deg": float(errs[0]),
                        "free_energy_kj_mol": float(vm[0]) - gmin_main, "free_energy_err_kj_mol": float(errs[1]),
                        "height_from_first_kj_mol": float(vm[0]) - min_main[k][1],
                        "height_from_first_err_kj_mol": float(errs[2]),
                        "height_from_second_kj_mol": float(vm[0]) - min_main[(k + 1) % len(mins)][1],
                        "height_from_second_err_kj_mol": float(errs[3])})
        else:
            bad = arc[~np.isfinite(free[arc])]
            row.update({"angle_deg": float(centres[bad[len(bad) // 2]]), "angle_err_deg": np.nan,
                        "free_energy_kj_mol": np.nan, "free_energy_err_kj_mol": np.nan,
                        "height_from_first_kj_mol": np.nan, "height_from_first_err_kj_mol": np.nan,
                        "height_from_second_kj_mol": np.nan, "height_from_second_err_kj_mol": np.nan})
        barriers.append(row)
    return minima, barriers


# ----------------------------------------------------------------------------------------------
# State free energies
# ----------------------------------------------------------------------------------------------

def _merge_blocks_to(values, replica, per_replica):
    """Merge neighbouring blocks pairwise (within replicas) until at most ``per_replica`` remain."""
    from .statistics import merge_pairs

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
    counts = np.asarray(state_counts, dtype=float)
    total = counts.sum()
    if total <= 0:
        return []
    p = counts.sum(axis=0) / total
    boot = mult @ counts
    with np.errstate(invalid="ignore", divide="ignore"):
        pb = boot / boot.sum(axis=1, keepdims=True)
        ref = int(np.argmax(p))
        dg = -kt * np.log(p / p[ref]) + 0.0
        dgb = -kt * np.log(pb / pb[:, [ref]])
    dgb[~np.isfinite(dgb)] = np.nan
    dg_err, _ = bootstrap_spread(dgb)
    p_err, _ = bootstrap_spread(pb)
    rows = []
    for s, label in enumerate(state_labels):
        rows.append({"state": label, "reference_state": state_labels[ref], "population": p[s],
                     "population_err": p_err[s],
                     "free_energy_kj_mol": dg[s] if p[s] > 0 else np.nan,
                     "free_energy_err_kj_mol": dg_err[s] if p[s] > 0 else np.nan})
    return rows


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
        n_samples, bandwidth_deg (kernel rows).
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
    return order, {t: np.array([k for k, x in enumerate(types) if x == t]) for t in order}


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
    hist = np.asarray(blocks["histograms"], dtype=float)
    mult = bootstrap_multiplicities(blocks["hist_block_replica"], n_bootstrap, np.random.default_rng(seed))
    pooled = np.stack([hist[:, members[t], :].sum(axis=1) for t in order], axis=1) if order else \
        np.zeros((hist.shape[0], 0, hist.shape[2]))
    hprof = _profiles_from_blocks(rebin(pooled, factor), mult, kt, bin_width_deg)
    kprof = [None] * len(order)
    if kernel and order:
        neff = effective_samples(result.populations, result.torsion_set.labels)
        bws = [float(bandwidth_deg) if bandwidth_deg is not None else
               default_bandwidth_deg(pooled[:, k].sum(axis=0), result.scheme, neff[members[t]].sum(), fine)
               for k, t in enumerate(order)]
        kprof = _kernel_profiles(pooled, mult, kt, bws, fine)
    return {t: (h, k) for t, h, k in zip(order, hprof, kprof)}


def compute_profiles(result, temperature_k=None, bin_width_deg=DEFAULT_BIN_WIDTH_DEG, bandwidth_deg=None,
                     n_bootstrap=DEFAULT_BOOTSTRAP, seed=DEFAULT_SEED, per_torsion=True, pairs=None,
                     pair_bin_width_deg=DEFAULT_PAIR_BIN_WIDTH_DEG, log=None):
    """Free-energy profiles, minima, barriers and state free energies of a results folder.

    Parameters
    ----------
    result : TrackResult
        From :func:`dihedra.tracking.track` or :func:`dihedra.resultsdir.load_results`.
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
    hist = np.asarray(blocks["histograms"], dtype=float)
    order, members = _type_members(result)
    labels = result.torsion_set.labels
    neff = effective_samples(result.populations, labels)
    sc, sc_rep, smult = state_blocks(result, n_bootstrap, seed)

    prof_rows, min_rows, bar_rows, dg_rows = [], [], [], []
    by_type = {}
    bandwidth_rows = []

    def emit(typ, torsion, hprof, kprof, state_counts):
        for estimate, pr in (("histogram", hprof), ("kernel", kprof)):
            prof_rows.append(pd.DataFrame({
                "type": typ, "torsion": torsion, "estimate": estimate, "angle_deg": pr.angle_deg,
                "probability_density_per_deg": pr.density_per_deg,
                "free_energy_kj_mol": pr.free_energy_kj_mol,
                "free_energy_err_kj_mol": np.where(pr.sampled, pr.free_energy_err_kj_mol, np.nan),
                "sampled": pr.sampled, "n_samples": pr.samples,
                "bandwidth_deg": pr.bandwidth_deg if pr.bandwidth_deg is not None else np.nan}))
        bandwidth_rows.append({"type": typ, "torsion": torsion, "bandwidth_deg": kprof.bandwidth_deg})
        minima, barriers = profile_features(hprof, kt)
        for k, m in enumerate(minima, start=1):
            min_rows.append({"type": typ, "torsion": torsion, "minimum": k, **m})
        for k, b in enumerate(barriers, start=1):
            bar_rows.append({"type": typ, "torsion": torsion, "barrier": k, **b})
        for row in state_free_energies(state_counts, sc_rep, scheme.labels, kt, smult):
            dg_rows.append({"type": typ, "torsion": torsion, **row})

    # pooled per type
    pooled = np.stack([hist[:, members[t], :].sum(axis=1) for t in order], axis=1)
    bws = [float(bandwidth_deg) if bandwidth_deg is not None else
           default_bandwidth_deg(pooled[:, k].sum(axis=0), scheme, neff[members[t]].sum(), fine)
           for k, t in enumerate(order)]
    hprofs = _profiles_from_blocks(rebin(pooled, factor), mult, kt, bin_width_deg)
    kprofs = _kernel_profiles(pooled, mult, kt, bws, fine)
    for k, t in enumerate(order):
        by_type[t] = (hprofs[k], kprofs[k])
        emit(t, "", hprofs[k], kprofs[k], sc[:, members[t], :].sum(axis=1))
    # per torsion, in batches (bounded memory)
    if per_torsion:
        types = result.torsion_set.types
        for start in range(0, len(labels), _BATCH):
            idx = np.arange(start, min(len(labels), start + _BATCH))
            sub = hist[:, idx, :]
            bws = [float(bandwidth_deg) if bandwidth_deg is not None else
                   default_bandwidth_deg(sub[:, k].sum(axis=0), scheme, neff[i], fine) for k, i in enumerate(idx)]
            hp = _profiles_from_blocks(rebin(sub, factor), mult, kt, bin_width_deg)
            kp = _kernel_profiles(sub, mult, kt, bws, fine)
            for k, i in enumerate(idx):
                emit(types[i], labels[i], hp[k], kp[k], sc[:, i, :])
    notices = []
    profiles = pd.concat(prof_rows, ignore_index=True)
    unsampled = profiles[(profiles["estimate"] == "histogram") & (profiles["torsion"] == "") & ~profiles["sampled"]]
    if len(unsampled):
        n_types = unsampled["type"].nunique()
        notices.append(f"{len(unsampled)} histogram bins of {n_types} type(s) were never visited: they are "
                       "marked sampled = False with no free energy (the data give only a lower bound there).")
    unsampled_barriers = [b for b in bar_rows if not b["sampled"] and b["torsion"] == ""]
    if unsampled_barriers:
        notices.append(f"{len(unsampled_barriers)} barrier(s) of the pooled profiles cross unsampled "
                       "regions; their height is unknown (higher than any sampled value).")
    settings = {
        "temperature_k": temperature_k, "kt_kj_mol": kt, "bin_width_deg": float(bin_width_deg),
        "fine_bin_width_deg": fine, "n_bootstrap": n_bootstrap, "seed": seed,
        "bootstrap": "blocks resampled with replacement within each replica",
        "n_histogram_blocks": int(hist.shape[0]),
        "bandwidth_rule": ("given" if bandwidth_deg is not None else
                           "0.9 * within-arc standard deviation * n_effective^(-1/5), at least the fine bin"),
        "bandwidths_deg": bandwidth_rows,
        "minimum_depth_rule": f"max({MIN_DEPTH_KT} kT, {MIN_DEPTH_SIGMA} combined standard errors)",
        "state_free_energy_reference": "most populated state",
        "scheme": scheme.name,
    }
    pset = ProfileSet(temperature_k=temperature_k, profiles=profiles,
                      minima=_frame(min_rows, ["type", "torsion", "minimum", "angle_deg", "angle_err_deg",
                                               "free_energy_kj_mol", "free_energy_err_kj_mol"]),
                      barriers=_frame(bar_rows, ["type", "torsion", "barrier", "from_minimum_deg",
                                                 "to_minimum_deg", "angle_deg", "angle_err_deg",
                                                 "free_energy_kj_mol", "free_energy_err_kj_mol",
                                                 "height_from_first_kj_mol", "height_from_first_err_kj_mol",
                                                 "height_from_second_kj_mol", "height_from_second_err_kj_mol",
                                                 "sampled"]),
                      state_free_energies=_frame(dg_rows, ["type", "torsion", "state", "reference_state",
                                                           "population", "population_err",
                                                           "free_energy_kj_mol", "free_energy_err_kj_mol"]),
                      by_type=by_type, settings=settings, notices=notices)
    if pairs:
        frames = []
        for a, b in pairs:
            say(f"2-D profile of {a} and {b} (reading angles.parquet in chunks)")
            frames.append(pair_profiles(result, a, b, temperature_k, pair_bin_width_deg, n_bootstrap, seed,
                                        notices=notices))
        pset.profiles_2d = pd.concat(frames, ignore_index=True)
        settings["pair_bin_width_deg"] = float(pair_bin_width_deg)
    return pset


def _frame(rows, columns):
    return pd.DataFrame(rows, columns=columns)


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
    from .resultsdir import iter_table

    kt = kt_kj_mol(temperature_k)
    try:
        path = result._path("angles")
    except DihedraError:
        raise DihedraError(f"2-D profiles need the angle time series, and {result.folder or 'this result'} "
                           "has no angles.parquet; rerun 'dihedra track ... --keep-angles'.") from None
    factor = check_bin_width(bin_width_deg, 1.0, "2-D bin width")
    nb = 360 // factor
    pairs = _resolve_pairs(result, a, b)
    labels = result.torsion_set.labels
    cols = sorted({labels[i] for p in pairs for i in p}, key=labels.index)
    replicas = result.summary.get("replicas", [])
    n_frames = [int(r["frames_analysed"]) for r in replicas]
    per_rep = int(result.summary.get("parameters", {}).get("n_hist_blocks") or 16)
    hist = np.zeros((per_rep * max(1, len(n_frames)), nb * nb))
    seen = np.zeros(max(1, len(n_frames)), dtype=np.int64)
    for chunk in iter_table(path, columns=cols, batch_frames=batch_frames):
        rep = chunk["replica"].to_numpy(np.int64)
        weight = chunk["weight"].to_numpy(float) if "weight" in chunk.columns else np.ones(len(chunk))
        pos = np.empty(len(chunk), dtype=np.int64)
        for r in np.unique(rep):
            sel = np.flatnonzero(rep == r)
            pos[sel] = seen[r] + np.arange(len(sel))
            seen[r] += len(sel)
        total = np.asarray(n_frames, dtype=np.int64)[rep] if n_frames else np.full(len(chunk), len(chunk))
        block = rep * per_rep + np.minimum(pos * per_rep // np.maximum(total, 1), per_rep - 1)
        for ia, ib in pairs:
            x = chunk[labels[ia]].to_numpy(float)
            y = chunk[labels[ib]].to_numpy(float)
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
        paths.append(write_table_replacing(convert_energy_columns(frame, energy_unit, pset.temperature_k),
                                           folder, name))
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
    paths.append(write_json_replacing(info, folder, "profiles.json"))
    return paths
