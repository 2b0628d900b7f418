r"""Free-energy profiles of torsions from the histograms of a tracking result.

Method
------
The probability density of a torsion angle, p(phi), is estimated from the fine (1 degree) angle
histograms that the trajectory pass keeps per block (``blocks.npz``), and turned into a free-energy
profile by Boltzmann inversion

.. math::  F(\phi) = -k_B T \ln p(\phi) + C ,

with ``C`` chosen so that the lowest sampled value is 0. A torsion angle needs no Jacobian term
(the volume element of a dihedral angle is d(phi)). ``k_B T`` is ``R T`` in kJ/mol with R from
CODATA 2018 (:mod:`dihedra.units`). The temperature is always given explicitly: ``temperature_k``
(``--temperature``), or the value ``track`` recorded (then it is announced); never a default.

The package is split along the steps of the analysis:

* :mod:`.estimation` -- the histogram and von Mises kernel estimates, the bandwidth rule and the
  block bootstrap of their errors (a histogram bin's never below its counting error);
* :mod:`.features` -- minima, barriers and state free energies of the histogram profiles;
* :mod:`.maps` -- 2-D profiles F(phi_a, phi_b) of pairs of torsions from the angle time series;
* :mod:`.resampled` -- the profiles of a result whose estimator stored its own bootstrap resamples
  (a folder of umbrella windows: MBAR with the window free energies re-estimated in every resample);
* :mod:`.rows` -- the rows of the four tables, built column by column, stack by stack;
* :mod:`.driver` -- :func:`free_energy_profiles`, which runs them over every type and torsion of a
  tracking result, and its :class:`ProfileSet` (``save(folder)`` writes the files).

Example
-------
>>> from dihedra import track, example_path
>>> from dihedra.analysis.profiles import free_energy_profiles
>>> res = track(example_path("hexane.pdb"), [example_path("hexane.xtc")], stop=200)
>>> prof = free_energy_profiles(res, temperature_k=298.15, per_torsion=False)
>>> sorted(prof.minima["angle_deg"].round(-1).abs().unique().tolist())  # doctest: +SKIP
[70.0, 180.0]
>>> prof.save("results")  # doctest: +SKIP

References
----------
Boltzmann inversion of torsion distributions: e.g. Tschoep et al., Acta Polym. 49 (1998) 61.
Block bootstrap: Kuensch, Ann. Stat. 17 (1989) 1217. Binned kernel density estimates: Silverman,
Appl. Stat. 31 (1982) 93; rule of thumb: Silverman, Density Estimation (1986), eq. 3.31.
"""

from .driver import (PROFILE_ENERGY_UNITS, ProfileSet, convert_energy_columns, free_energy_profiles,
                     resolve_temperature, type_profiles, unit_suffix)
from .estimation import (DEFAULT_BIN_WIDTH_DEG, DEFAULT_BOOTSTRAP, DEFAULT_PAIR_BIN_WIDTH_DEG, DEFAULT_SEED,
                         Profile1D, bin_centres, bootstrap_multiplicities, bootstrap_spread, check_bin_width,
                         check_estimate_options, counting_error_floor, default_bandwidth_deg, default_bandwidths_deg,
                         effective_count_scale, effective_samples, free_energy_from_counts, rebin, von_mises_smooth)
from .features import (BARRIER_FIELDS, MIN_DEPTH_KT, MIN_DEPTH_SIGMA, MIN_RESAMPLED_FRACTION, MINIMUM_FIELDS,
                       find_minima, profile_features, state_blocks, state_free_energies,
                       state_free_energies_of_probabilities)
from .maps import pair_profiles
from .rows import BARRIER_COLUMNS, MINIMA_COLUMNS, PROFILE_COLUMNS, STATE_DG_COLUMNS
from .resampled import (RESAMPLED_EFFECTIVE_SAMPLES, RESAMPLED_PROBABILITIES, RESAMPLED_STATE_PROBABILITIES,
                        TYPE_ERRORS, has_resamples, kernel_profile_of_probabilities, profile_of_probabilities,
                        resampled_state_free_energies, resampled_type_profile)

__all__ = [
    "BARRIER_COLUMNS", "BARRIER_FIELDS", "DEFAULT_BIN_WIDTH_DEG", "DEFAULT_BOOTSTRAP", "DEFAULT_PAIR_BIN_WIDTH_DEG",
    "DEFAULT_SEED", "MINIMA_COLUMNS", "MINIMUM_FIELDS", "MIN_DEPTH_KT", "MIN_DEPTH_SIGMA", "MIN_RESAMPLED_FRACTION",
    "PROFILE_COLUMNS", "PROFILE_ENERGY_UNITS", "RESAMPLED_EFFECTIVE_SAMPLES", "RESAMPLED_PROBABILITIES",
    "RESAMPLED_STATE_PROBABILITIES", "STATE_DG_COLUMNS", "TYPE_ERRORS",
    "Profile1D", "ProfileSet", "bin_centres", "bootstrap_multiplicities", "bootstrap_spread", "check_bin_width",
    "check_estimate_options", "convert_energy_columns", "counting_error_floor", "default_bandwidth_deg",
    "default_bandwidths_deg", "effective_count_scale", "effective_samples", "find_minima",
    "free_energy_from_counts", "free_energy_profiles", "has_resamples", "kernel_profile_of_probabilities",
    "pair_profiles", "profile_features", "profile_of_probabilities", "rebin", "resampled_state_free_energies",
    "resampled_type_profile",
    "resolve_temperature", "state_blocks", "state_free_energies", "state_free_energies_of_probabilities",
    "type_profiles", "unit_suffix", "von_mises_smooth",
]
