r"""A torsion correction that makes the sampled ensemble match a target, fitted by reweighting.

:func:`fit_torsion_correction` takes a tracking result that kept its angles and a target (a
free-energy profile, state populations or measured 3J couplings), and fits, for the chosen torsion
types together, a Fourier correction :math:`\Delta V(\phi) = \sum_n k_n [1 + \cos(n\phi -
\delta_n)]` (a cosine series, phases 0 or 180 degrees, unless ``symmetric=False``) whose Boltzmann
factor reweights the sampled frames onto the target (Cesari et al.,
J. Chem. Theory Comput. 15 (2019) 3425; Pitera & Chodera, J. Chem. Theory Comput. 8 (2012)
3445), with a ridge penalty whose strength is chosen by cross-validation over contiguous pieces of
the trajectory, block-bootstrap errors, and Kish's effective sample size (Kish, Survey Sampling,
1965) as the measure of how far the existing trajectory can be trusted. The result's ``save``
writes the terms, the curve, target against sampled against reweighted observables, the Fourier
table, Ryckaert-Bellemans coefficients where they exist and an OpenMM ForceField fragment.

Modules
-------
:mod:`~dihedra.analysis.refit.targets`
    Reading a target and telling its kind from its columns.
:mod:`~dihedra.analysis.refit.samples`
    The angles of the chosen torsions, and what one weight belongs to (a frame or a molecule).
:mod:`~dihedra.analysis.refit.observables`
    Populations, profiles and couplings as ratios of weighted sums.
:mod:`~dihedra.analysis.refit.fit`
    The model, the regularised fit, cross-validation and the effective sample size.
:mod:`~dihedra.analysis.refit.exports`
    Terms, curve, Ryckaert-Bellemans coefficients and the OpenMM fragment.
:mod:`~dihedra.analysis.refit.notices`
    What a fit can and cannot say: its limits, what the target determines, a sampled profile
    that is not mirror-symmetric, the target folder's own state populations as a check.
:mod:`~dihedra.analysis.refit.driver`
    :func:`fit_torsion_correction` and :class:`RefitResult`.
"""

from .driver import (DEFAULT_BIN_WIDTH_DEG, DEFAULT_BLOCKS, DEFAULT_BOOTSTRAP, DEFAULT_TERMS,
                     MIN_EFFECTIVE_FRACTION, MIN_SAMPLES, RefitResult, fit_torsion_correction)
from .exports import openmm_xml, ryckaert_bellemans
from .fit import DEFAULT_FOLDS, REGULARISATION_GRID, kish
from .notices import CHI_SQUARE_POOR
from .samples import WEIGHTS_PER
from .targets import TARGET_KINDS, Target, read_target

__all__ = ["CHI_SQUARE_POOR", "DEFAULT_BIN_WIDTH_DEG", "DEFAULT_BLOCKS", "DEFAULT_BOOTSTRAP", "DEFAULT_FOLDS",
           "DEFAULT_TERMS",
           "MIN_EFFECTIVE_FRACTION", "MIN_SAMPLES", "REGULARISATION_GRID", "RefitResult", "TARGET_KINDS", "Target",
           "WEIGHTS_PER", "fit_torsion_correction", "kish", "openmm_xml", "read_target", "ryckaert_bellemans"]
