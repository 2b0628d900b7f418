"""Minima and barriers of a static scan E(phi), with the basin population each minimum predicts.

The extrema are found on a grid (:func:`scan_features`, 0.5 degrees by default) with the rules of
the profiles (:func:`dihedra.numerics.extrema.find_minima`, depth at least 0.05 kT), then each is
refined on the scan's own curve, the exact function of a parameter scan or the periodic spline
through a scan's points: Brent's bounded search (scipy ``minimize_scalar``) within one grid step
of the grid point, to :data:`REFINE_TOLERANCE_DEG`. A grid alone puts them up to half a step off
(0.25 degrees: the gauche minimum of butane's Ryckaert-Bellemans torsion at 59.75 instead of 60.00).
"""

from __future__ import annotations

import numpy as np

from ...numerics.extrema import find_minima
from ...units import wrap_deg

#: The refined extrema of a scan are found to this tolerance (degrees), and their angles rounded to
#: as many decimals.
REFINE_TOLERANCE_DEG = 1e-4
ANGLE_DECIMALS = 4


def refine_extremum(scan, angle_deg, step_deg, kind="min"):
    """The angle (degrees on (-180, 180]) and energy (kJ/mol, the scan's zero) of the extremum of
    ``scan`` within ``step_deg`` of ``angle_deg``: a minimum, or a maximum with ``kind="max"``.

    Brent's bounded search on ``scan.energy_at`` (scipy ``minimize_scalar``, ``xatol`` =
    :data:`REFINE_TOLERANCE_DEG`); where it ends no better than the grid point (a flat stretch),
    the grid point itself.
    """
    from scipy.optimize import minimize_scalar

    sign = 1.0 if kind == "min" else -1.0

    def f(x):
        return sign * float(np.asarray(scan.energy_at(np.array([x])))[0])

    start = float(angle_deg)
    found = minimize_scalar(f, bounds=(start - step_deg, start + step_deg), method="bounded",
                            options={"xatol": REFINE_TOLERANCE_DEG})
    if not (found.success and np.isfinite(found.fun) and found.fun <= f(start)):
        return float(wrap_deg(start)), sign * f(start)
    # (rounded to the tolerance: an extremum at 180 found at -179.999996 is written as 180)
    return float(wrap_deg(np.round(found.x, ANGLE_DECIMALS))), sign * float(found.fun)


def scan_features(scan, kt, step_deg=0.5):
    """Minima (with predicted basin populations) and barriers of a scan, found on a grid of
    ``step_deg`` and refined on the scan's curve (see the module notes).

    Returns
    -------
    minima : list of dict
        angle_deg, energy_kj_mol (above the lowest minimum), predicted_population (the Boltzmann
        weight exp(-E/kT) of the basin between the barriers on its two sides, on the grid).
    barriers : list of dict
        angle_deg, energy_kj_mol (above the lowest minimum), between_deg (the two minima; one
        minimum: its barrier around the circle, between it and itself).
    """
    n = int(round(360.0 / step_deg))
    x = -180.0 + step_deg * (np.arange(n) + 0.5)
    e = scan.energy_at(x)
    e = e - e.min()
    mins = find_minima(e, np.zeros(n), kt, min_depth_kt=0.05, min_depth_sigma=0.0)
    boltz = np.exp(-e / kt)
    boltz /= boltz.sum()
    bars = []
    for k, a in enumerate(mins):
        b = mins[(k + 1) % len(mins)]
        arc = (a + 1 + np.arange((b - a - 1) % n if a != b else n - 1)) % n
        bars.append(int(arc[np.argmax(e[arc])]) if len(arc) else a)
    low = [refine_extremum(scan, x[i], step_deg, "min") for i in mins]
    high = [refine_extremum(scan, x[j], step_deg, "max") if j not in mins else low[mins.index(j)] for j in bars]
    zero = min((v for _, v in low), default=0.0)
    minima = []
    for k, i in enumerate(mins):
        lo, hi = bars[k - 1], bars[k]
        arc = (lo + np.arange(((hi - lo) % n) or n)) % n
        minima.append({"angle_deg": low[k][0], "energy_kj_mol": low[k][1] - zero,
                       "predicted_population": float(boltz[arc].sum())})
    barriers = [{"angle_deg": high[k][0], "energy_kj_mol": high[k][1] - zero,
                 "between_deg": [low[k][0], low[(k + 1) % len(mins)][0]]}
                for k in range(len(bars))]
    return minima, barriers
