"""The static torsion scan E(phi): :class:`TorsionScan` and the checks every scan passes
(:func:`scan_from_points`), whatever it was read from or computed with."""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from ...errors import InputFileError
from ...units import wrap_deg

#: Fewest distinct angles a scan may have.
MIN_POINTS = 6
#: Widest allowed gap between neighbouring scan angles (degrees).
MAX_GAP_DEG = 60.0
#: Kinds of scan recorded with a comparison.
SCAN_KINDS = ("rigid", "relaxed", "unspecified", "parameters")


@dataclass
class TorsionScan:
    """A static torsion scan E(phi), periodic, energies in kJ/mol relative to the lowest point.

    Attributes
    ----------
    angle_deg, energy_kj_mol : ndarray
        The points (sorted, distinct, on (-180, 180]). For parameter forms, a 1-degree grid.
    kind : str
        ``rigid``, ``relaxed``, ``unspecified`` or ``parameters``.
    source : str
        File it came from (or the method that computed it).
    metadata : dict
        Method, units read, and anything the file carried.
    function : callable, optional
        Exact E(phi) in kJ/mol for parameter forms (used instead of the spline).
    """

    angle_deg: np.ndarray
    energy_kj_mol: np.ndarray
    kind: str = "unspecified"
    source: str = ""
    metadata: dict = field(default_factory=dict)
    function: object = None

    def energy_at(self, angles_deg):
        """E(phi) in kJ/mol (periodic spline between the points, or the exact form)."""
        a = np.asarray(angles_deg, dtype=float)
        if self.function is not None:
            return self.function(a) - self._offset()
        from scipy.interpolate import CubicSpline

        x = np.append(self.angle_deg, self.angle_deg[0] + 360.0)
        y = np.append(self.energy_kj_mol, self.energy_kj_mol[0])
        spline = CubicSpline(x, y, bc_type="periodic")
        return spline(self.angle_deg[0] + np.mod(a - self.angle_deg[0], 360.0))

    def _offset(self):
        grid = np.linspace(-180.0, 180.0, 7201)
        return float(np.min(self.function(grid)))

    def to_frame(self):
        import pandas as pd
        return pd.DataFrame({"angle_deg": self.angle_deg, "energy_kj_mol": self.energy_kj_mol})


#: Points of a scan at the same angle (after wrapping: -180 and 180 are one angle) are merged when
#: their energies agree within this (kJ/mol); further apart, they are two scans mixed (a forward
#: and a backward relaxed scan, two methods) and the scan is refused.
DUPLICATE_TOLERANCE_KJ_MOL = 0.5


def scan_from_points(angles_deg, energies_kj_mol, kind="unspecified", source="", metadata=None):
    """A checked :class:`TorsionScan` from points (angles wrapped, duplicates that agree averaged,
    E - min E); points at one angle whose energies differ by more than
    :data:`DUPLICATE_TOLERANCE_KJ_MOL` are refused."""
    where = f"scan {source}" if source else "scan"
    a = np.round(wrap_deg(angles_deg), 9)
    e = np.asarray(energies_kj_mol, dtype=float)
    uniq, inv = np.unique(a, return_inverse=True)
    inv = inv.reshape(-1)
    spread = np.full(len(uniq), -np.inf)
    np.maximum.at(spread, inv, e)
    low = np.full(len(uniq), np.inf)
    np.minimum.at(low, inv, e)
    spread -= low
    if (spread > DUPLICATE_TOLERANCE_KJ_MOL).any():
        k = int(np.argmax(spread))
        values = ", ".join(f"{x:.3f}" for x in e[inv == k])
        raise InputFileError(f"{where} gives the angle {uniq[k]:g} deg {int((inv == k).sum())} times with energies "
                             f"{values} kJ/mol (-180 and 180 are the same angle); give one energy per angle (two "
                             "scans mixed?).")
    mean = np.bincount(inv, weights=e) / np.bincount(inv)
    if len(uniq) < MIN_POINTS:
        raise InputFileError(f"{where} has {len(uniq)} distinct angle(s); at least {MIN_POINTS} are needed "
                             "(one every 30 degrees or closer is usual).")
    gaps = np.diff(np.append(uniq, uniq[0] + 360.0))
    k = int(np.argmax(gaps))
    if gaps[k] > MAX_GAP_DEG:
        lo, hi = uniq[k], float(wrap_deg(uniq[k] + gaps[k]))
        raise InputFileError(f"{where} leaves a gap of {gaps[k]:g} degrees with no point between {lo:g} and "
                             f"{hi:g} deg; at most {MAX_GAP_DEG:g} degrees are allowed (add points there).")
    return TorsionScan(angle_deg=uniq, energy_kj_mol=mean - mean.min(), kind=kind, source=source,
                       metadata=dict(metadata or {}))

