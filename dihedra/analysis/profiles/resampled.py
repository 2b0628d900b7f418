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
wrote for its own bin width.
"""

from __future__ import annotations

import numpy as np

from .estimation import Profile1D, bin_centres, bootstrap_spread, check_bin_width, free_energy_from_counts, rebin
from .features import state_free_energies_of_probabilities

#: Block-sum entry: fine-bin probabilities of each type in each bootstrap resample of the estimator.
RESAMPLED_PROBABILITIES = "type_resampled_probabilities"
#: Block-sum entry: state probabilities of each type in each bootstrap resample of the estimator.
RESAMPLED_STATE_PROBABILITIES = "type_resampled_state_probabilities"


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


def has_resamples(result):
    """Whether the block sums of ``result`` carry the resamples of its estimator (umbrella windows)."""
    return RESAMPLED_PROBABILITIES in getattr(result.blocks, "stored", result.blocks)


def fixed_weight_notices(result):
    """The notice of a profile of a result with stored resamples (umbrella windows), whose blocks
    this analysis resamples with the weights held fixed (see the module notes); [] otherwise."""
    if not has_resamples(result):
        return []
    return ["this folder holds umbrella windows: the errors here come from resampling blocks of the MBAR-weighted "
            "histograms with the weights held fixed, which misses the uncertainty of the window free energies (too "
            "small in the wells) and counts samples of tiny weight at a barrier as nothing (errors of up to hundreds "
            "of kJ/mol there). The profiles, minima, barriers and state free energies that 'dihedra windows' writes, "
            "and 'dihedra compare' on this folder, carry the windows' own bootstrap (window free energies "
            "re-estimated in every resample): use those (run 'dihedra windows' again if this profile replaced "
            "them)."]


def _type_index(result, typ):
    return list(dict.fromkeys(result.torsion_set.types)).index(typ)


def _members(result, typ):
    return np.flatnonzero(np.asarray(result.torsion_set.types, dtype=object) == typ)


def resampled_type_profile(result, typ, kt, bin_width_deg):
    """The histogram Profile1D of type ``typ`` (its torsions pooled) in bins of ``bin_width_deg``,
    with the errors of the stored resamples (see the module notes)."""
    hist = result.blocks["histograms"]
    fine = 360.0 / hist.shape[-1]
    factor = check_bin_width(bin_width_deg, fine)
    counts = rebin(np.asarray(hist[:, _members(result, typ), :], dtype=float).sum(axis=(0, 1)), factor)
    boot = rebin(np.asarray(result.blocks[RESAMPLED_PROBABILITIES][_type_index(result, typ)], dtype=float), factor)
    return profile_of_probabilities(counts / counts.sum(), boot, kt, float(bin_width_deg), counts)


def resampled_state_free_energies(result, typ, kt):
    """The state free-energy rows of type ``typ`` (:func:`state_free_energies_of_probabilities`) from
    its pooled weighted state counts and the stored resamples."""
    counts = np.asarray(result.blocks["state_counts"][:, _members(result, typ), :], dtype=float).sum(axis=(0, 1))
    boot = np.asarray(result.blocks[RESAMPLED_STATE_PROBABILITIES][_type_index(result, typ)], dtype=float)
    return state_free_energies_of_probabilities(counts / counts.sum(), boot, result.scheme.labels, kt)
