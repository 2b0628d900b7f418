r"""Profiles of a result whose estimator carries its own bootstrap: a folder of umbrella windows.

The histograms and state counts of a folder written by ``dihedra windows`` are MBAR-weighted sums.
Resampling their blocks with the weights held fixed (:mod:`.estimation`) misses the uncertainty of
the window free energies, which the weights depend on, and a counting floor on Kish's effective
samples of the whole run means nothing where the weights of one window are orders of magnitude
below those of another (at a barrier its samples are many, their weights tiny): such errors are too
small in the wells and far too large, by hundreds of kJ/mol, at the barriers. So the windows
analysis stores the probabilities of every one of its bootstrap resamples (window free energies
re-estimated in each) in the block sums, per torsion type:

* :data:`RESAMPLED_PROBABILITIES` -- (n_types, n_bootstrap, n_fine): the fine-bin probabilities;
* :data:`RESAMPLED_STATE_PROBABILITIES` -- (n_types, n_bootstrap, n_states): the state probabilities;

types in their order in ``torsions.csv``. The profile of a type is then the pooled weighted
histogram (the estimate itself) with the spread of those resamples (:func:`profile_of_probabilities`),
in bins of any width that the fine bins tile: the very profile and errors the windows analysis
wrote for its own bin width. Its kernel estimate is the von Mises smoothing of the fine
probabilities and of every resample (:func:`kernel_profile_of_probabilities`), with the bandwidth
rule on Kish's effective samples of each type's weights, :data:`RESAMPLED_EFFECTIVE_SAMPLES`
(n_types,). :func:`resampled_type_stacks` gives all of this for the types of
:func:`~dihedra.analysis.profiles.driver.free_energy_profiles`.

The resamples are of whole types: a torsion alone in its type has them too (its profile is the
type's), the torsions of a type of several have none, and their rows keep the blocks of the
weighted histograms resampled with the weights held fixed (:func:`windows_error_notices`).
"""

from __future__ import annotations

import numpy as np

from .estimation import (Profile1D, bin_centres, bootstrap_spread, check_bin_width, free_energy_from_counts, rebin,
                         von_mises_smooth)
from .features import _state_dg, state_free_energies_of_probabilities

#: Block-sum entry: fine-bin probabilities of each type in each bootstrap resample of the estimator.
RESAMPLED_PROBABILITIES = "type_resampled_probabilities"
#: Block-sum entry: state probabilities of each type in each bootstrap resample of the estimator.
RESAMPLED_STATE_PROBABILITIES = "type_resampled_state_probabilities"
#: Block-sum entry: Kish's effective sample size of the weights of each type (its kernel bandwidth).
RESAMPLED_EFFECTIVE_SAMPLES = "type_effective_samples"


def profile_of_probabilities(probability, boot_probability, kt, width, samples):
    """A histogram Profile1D from the bin probabilities of an estimate (n,) and of its bootstrap
    resamples (n_bootstrap, n): the error of a bin is the spread of -kT ln p over the resamples in
    which it is sampled (no counting floor: the resamples are the estimator's own); ``samples`` the
    (weighted) samples per bin."""
    density, free = free_energy_from_counts(probability, width, kt)
    _, boot_free = free_energy_from_counts(boot_probability, width, kt)
    err, frac = bootstrap_spread(boot_free)
    shift = np.nanmin(free) if np.isfinite(free).any() else 0.0
    return Profile1D(angle_deg=bin_centres(len(probability)), samples=samples, density_per_deg=density,
                     free_energy_kj_mol=free - shift, free_energy_err_kj_mol=err, sampled=probability > 0,
                     boot_free_energy=boot_free, boot_valid_fraction=frac)


def kernel_profile_of_probabilities(fine, boot_fine, kt, bandwidth_deg, samples):
    """The von Mises smoothing of fine-bin probabilities (n_fine,) and of their resamples
    (n_bootstrap, n_fine), as a kernel Profile1D (:func:`profile_of_probabilities` on the fine grid);
    a point counts as sampled within one bandwidth of a sampled fine bin; ``samples`` the (weighted)
    samples in all."""
    from scipy.ndimage import maximum_filter1d

    reach = max(1, int(np.ceil(bandwidth_deg)))
    sampled = maximum_filter1d((fine > 0).astype(np.int8), size=2 * reach + 1, mode="wrap") > 0
    main = np.where(sampled, von_mises_smooth(fine, bandwidth_deg), 0.0)
    boot = von_mises_smooth(boot_fine, bandwidth_deg) * sampled
    prof = profile_of_probabilities(main, boot, kt, 1.0, samples * main)
    prof.sampled = sampled & (main > 0)
    prof.bandwidth_deg = float(bandwidth_deg)
    return prof


def has_resamples(result):
    """Whether the block sums of ``result`` carry the resamples of its estimator (umbrella windows)."""
    return RESAMPLED_PROBABILITIES in getattr(result.blocks, "stored", result.blocks)


def is_windows(result):
    """Whether ``result`` is a folder of umbrella windows (its block sums MBAR-weighted)."""
    return str(result.summary.get("kind", "")).startswith("umbrella windows")


def windows_error_notices(result, per_torsion=True):
    """The notices of a profile of ``result`` on what its errors are, for a folder of umbrella
    windows (see the module notes); [] for any other result."""
    if not has_resamples(result):
        return [] if not is_windows(result) else [
            "this folder of umbrella windows holds no bootstrap resamples of its MBAR profile (written by an "
            "earlier dihedra): every error here comes from resampling blocks of the weighted histograms with the "
            "window free energies held fixed and can be far off, too small in the wells and by up to hundreds of "
            "kJ/mol too large at barriers; run dihedra windows again for the windows' own errors."]
    n = result.blocks[RESAMPLED_PROBABILITIES].shape[1]
    notices = [f"this folder holds umbrella windows: the profiles, minima, barriers and state free energies of "
               f"the types (and of a torsion alone in its type) carry the errors of the windows' own bootstrap ({n} "
               "resamples, the window free energies re-estimated in each), as dihedra windows wrote them; "
               "--bootstrap and --seed do not apply to them."]
    types = np.asarray(result.torsion_set.types, dtype=object)
    shared = [t for t in dict.fromkeys(types) if (types == t).sum() > 1]
    if per_torsion and shared:
        n_torsions = int(np.isin(types, shared).sum())
        notices.append(
            f"the per-torsion rows (torsion named) of the {n_torsions} torsions of {len(shared)} type(s) with "
            f"several torsions (e.g. {shared[0]}) have no resamples of the windows' bootstrap (stored per type): "
            "their errors come from "
            "resampling blocks of the MBAR-weighted histograms with the window free energies held fixed, which "
            "misses the uncertainty of those free energies (too small in the wells) and counts samples of tiny "
            "weight at a barrier as nothing (errors of up to hundreds of kJ/mol there). Use the type rows "
            "(torsion empty) for errors.")
    return notices


#: What the errors of profiles from the stored resamples are (profiles.json: settings and cautions).
TYPE_ERRORS = ("Errors of the types (and of a torsion alone in its type) come from the umbrella windows' own "
               "bootstrap: the blocks of every window resampled with replacement and the window free energies "
               "re-estimated in each of {n} resamples, without a counting floor.")


def resampled_settings(result, bandwidth_deg=None):
    """The settings of a profile from the stored resamples of ``result`` (for profiles.json)."""
    n = int(result.blocks[RESAMPLED_PROBABILITIES].shape[1])
    out = {"n_type_resamples": n, "type_errors": TYPE_ERRORS.format(n=n)}
    if bandwidth_deg is None and resampled_effective_samples(result) is not None:
        out["type_bandwidth_rule"] = ("0.9 * within-arc standard deviation * (Kish effective samples of the "
                                      "weights)^(-1/5)")
    return out


def _type_index(result, typ):
    return list(dict.fromkeys(result.torsion_set.types)).index(typ)


def _members(result, typ):
    return np.flatnonzero(np.asarray(result.torsion_set.types, dtype=object) == typ)


def _pooled(result, name, typ):
    """The block sums ``name`` (n_blocks, n_torsions, n) of the torsions of ``typ``, summed: (n,)."""
    return np.asarray(result.blocks[name][:, _members(result, typ), :], dtype=float).sum(axis=(0, 1))


def _resamples(result, name, typ):
    """The stored resamples ``name`` of type ``typ``: (n_bootstrap, n)."""
    return np.asarray(result.blocks[name][_type_index(result, typ)], dtype=float)


def resampled_type_profile(result, typ, kt, bin_width_deg):
    """The histogram Profile1D of type ``typ`` (its torsions pooled) in bins of ``bin_width_deg``,
    with the errors of the stored resamples (see the module notes)."""
    factor = check_bin_width(bin_width_deg, 360.0 / result.blocks["histograms"].shape[-1])
    counts = rebin(_pooled(result, "histograms", typ), factor)
    boot = rebin(_resamples(result, RESAMPLED_PROBABILITIES, typ), factor)
    return profile_of_probabilities(counts / counts.sum(), boot, kt, float(bin_width_deg), counts)


def resampled_state_free_energies(result, typ, kt):
    """The state free-energy rows of type ``typ`` (:func:`state_free_energies_of_probabilities`) from
    its pooled weighted state counts and the stored resamples."""
    counts = _pooled(result, "state_counts", typ)
    return state_free_energies_of_probabilities(counts / counts.sum(), _resamples(result, RESAMPLED_STATE_PROBABILITIES,
                                                                                  typ), result.scheme.labels, kt)


def _stack(profiles):
    """Profile1D of a list of profiles on one grid stacked, as
    :func:`~dihedra.numerics.density._histogram_stack` returns them (resamples last, +inf where a
    resample has no sample)."""
    boot = np.stack([p.boot_free_energy.T for p in profiles])
    return Profile1D(angle_deg=profiles[0].angle_deg, samples=np.stack([p.samples for p in profiles]),
                     density_per_deg=np.stack([p.density_per_deg for p in profiles]),
                     free_energy_kj_mol=np.stack([p.free_energy_kj_mol for p in profiles]),
                     free_energy_err_kj_mol=np.stack([p.free_energy_err_kj_mol for p in profiles]),
                     sampled=np.stack([p.sampled for p in profiles]),
                     boot_free_energy=np.where(np.isfinite(boot), boot, np.inf),
                     boot_valid_fraction=np.stack([p.boot_valid_fraction for p in profiles]))


def resampled_effective_samples(result):
    """Kish's effective samples of each type's weights (:data:`RESAMPLED_EFFECTIVE_SAMPLES`), or None
    (a folder written before they were stored)."""
    stored = getattr(result.blocks, "stored", result.blocks)
    return np.asarray(stored[RESAMPLED_EFFECTIVE_SAMPLES], dtype=float) \
        if RESAMPLED_EFFECTIVE_SAMPLES in stored else None


def resampled_type_stacks(result, order, kt, bin_width_deg, bandwidths):
    """The profiles of the types ``order`` from the stored resamples, for the table rows of
    :func:`~dihedra.analysis.profiles.driver.free_energy_profiles`.

    Returns the histogram stack (a Profile1D of (m, n) arrays), the kernel columns (bandwidths,
    samples, density, free energy, error (NaN where unsampled), sampled: as
    :func:`~dihedra.analysis.profiles.estimation._kernel_columns`), the state free energies (as
    :func:`~dihedra.analysis.profiles.features._state_free_energy_stack`) and {type: (histogram,
    kernel) Profile1D}.
    """
    hist, kern, p, pb = [], [], [], []
    for typ, bw in zip(order, bandwidths):   # (the fine bins of a windows folder are 1 degree wide)
        hist.append(resampled_type_profile(result, typ, kt, bin_width_deg))
        fine = _pooled(result, "histograms", typ)
        kern.append(kernel_profile_of_probabilities(fine / fine.sum(), _resamples(result, RESAMPLED_PROBABILITIES, typ),
                                                    kt, bw, fine.sum()))
        counts = _pooled(result, "state_counts", typ)
        p.append(counts / counts.sum())
        pb.append(_resamples(result, RESAMPLED_STATE_PROBABILITIES, typ))
    kstack = _stack(kern)
    kernel = (np.asarray(bandwidths, dtype=float), kstack.samples, kstack.density_per_deg,
              kstack.free_energy_kj_mol, np.where(kstack.sampled, kstack.free_energy_err_kj_mol, np.nan),
              kstack.sampled)
    states = {"has": np.ones(len(order), dtype=bool), **_state_dg(np.stack(p), np.stack(pb, axis=1), kt)}
    return _stack(hist), kernel, states, dict(zip(order, zip(hist, kern)))
