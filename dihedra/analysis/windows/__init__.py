r"""Umbrella windows along a torsion: the unbiased profile by MBAR and by WHAM.

A table of windows (one row per biased simulation: trajectory, topology, biased torsions, centre
and force constant of the harmonic bias on the minimum-image angle difference) is tracked window by
window; the biases are removed by MBAR (Shirts & Chodera, J. Chem. Phys. 129 (2008) 124105; with
pymbar) and by WHAM (Kumar, Rosenberg, Bouzida, Swendsen & Kollman, J. Comput. Chem. 13 (1992)
1011), the two are compared bin by bin against their block-bootstrap errors, and the overlap of
neighbouring windows is checked.

The package is split along these steps:

* :mod:`.samples` -- the window table (its columns and checks) and the samples of all windows;
* :mod:`.solver` -- the bias and the self-consistent equations of MBAR and WHAM;
* :mod:`.restraints` -- whether the samples fit the window table: each window its restraint, the
  force constants the way neighbouring windows share angles;
* :mod:`.estimation` -- MBAR and WHAM for one torsion type with bootstrap resamples, and its
  profiles in the format of ``dihedra profile``;
* :mod:`.driver` -- :func:`unbias_windows`, which runs them, checks the overlap and returns a
  :class:`WindowsResult`; its ``save(folder)`` writes a complete results folder.

Example
-------
A sketch (skipped as a doctest: it needs pymbar, ``pip install "dihedra[biased]"``, and a window
table of your own):

>>> from dihedra.analysis.windows import unbias_windows               # doctest: +SKIP
>>> res = unbias_windows("windows.csv", temperature_k=298.15)          # doctest: +SKIP
>>> res.agreement                          # MBAR vs WHAM per type    # doctest: +SKIP
>>> res.save("windows-results")                                         # doctest: +SKIP
"""

from .driver import DEFAULT_BOOTSTRAP, MIN_OVERLAP, WindowsResult, neighbour_pairs, unbias_windows
from .estimation import AGREEMENT_SIGMA, DEFAULT_MAX_MBAR_SAMPLES, TypeEstimate, estimate_type
from .samples import (N_HIST_BLOCKS, N_STATE_BLOCKS, WINDOW_COLUMNS, WindowData, collect_windows, read_windows,
                      window_inputs)
from .solver import GRID_POINTS, bias_kj_mol, solve_free_energies, wham_log_factors

__all__ = [
    "AGREEMENT_SIGMA", "DEFAULT_BOOTSTRAP", "DEFAULT_MAX_MBAR_SAMPLES", "GRID_POINTS", "MIN_OVERLAP",
    "N_HIST_BLOCKS", "N_STATE_BLOCKS", "TypeEstimate", "WINDOW_COLUMNS", "WindowData", "WindowsResult",
    "bias_kj_mol", "collect_windows", "estimate_type", "neighbour_pairs", "read_windows", "solve_free_energies",
    "unbias_windows", "wham_log_factors", "window_inputs",
]
