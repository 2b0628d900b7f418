r"""Static torsion scans: read from a CSV file, built from force-field parameters, or computed.

A static scan E(phi) is the energy of one molecule as a function of one torsion angle, either
*rigid* (every other coordinate frozen) or *relaxed* (every other coordinate optimised at each
fixed angle). dihedra compares it with a sampled free-energy profile (:mod:`dihedra.analysis.compare`).

Every scan is a :class:`~dihedra.analysis.scans.scan.TorsionScan` checked by
:func:`~dihedra.analysis.scans.scan.scan_from_points`: angles on (-180, 180], duplicates averaged,
energies in kJ/mol relative to the lowest point, at least :data:`MIN_POINTS` distinct angles and
no gap in coverage wider than :data:`MAX_GAP_DEG`; between points it is interpolated with a
periodic cubic spline (scipy ``CubicSpline(bc_type="periodic")``).

Modules
-------
:mod:`~dihedra.analysis.scans.scan`
    The scan object and its checks.
:mod:`~dihedra.analysis.scans.files`
    Scan CSV files (units from the column names or given; ``# key: value`` metadata lines), read
    and written; :func:`read_scan` reads a CSV file or a parameter file.
:mod:`~dihedra.analysis.scans.parameters`
    Scans from torsion parameters in TOML: a cosine (Fourier) series or the Ryckaert-Bellemans
    form (Ryckaert & Bellemans, Faraday Discuss. Chem. Soc. 66 (1978) 95).
:mod:`~dihedra.analysis.scans.features`
    Minima (with their predicted basin populations) and barriers of a scan, refined on its curve.
:mod:`~dihedra.analysis.scans.computed`
    Relaxed scans computed with RDKit's MMFF94 (Halgren, J. Comput. Chem. 17 (1996) 490) or with
    tblite's GFN2-xTB (Bannwarth, Ehlert & Grimme, J. Chem. Theory Comput. 15 (2019) 1652);
    ``pip install "dihedra[scan]"``.
"""

from .computed import (BOHR_ANGSTROM, XTB_RESTRAINT_KJ_MOL_RAD2, mmff94_scan, molecule_from_topology,
                       parse_torsion_atoms, scan_angles, xtb_scan)
from .features import REFINE_TOLERANCE_DEG, refine_extremum, scan_features
from .files import (SCAN_SIGNATURE, angle_unit_from_name, canonical_angle_unit, check_scan_output,
                    energy_unit_from_name, read_scan, read_scan_csv, write_scan_csv)
from .parameters import cosine_series_kj_mol, read_parameter_toml, ryckaert_bellemans_kj_mol, scan_from_parameters
from .scan import MAX_GAP_DEG, MIN_POINTS, SCAN_KINDS, TorsionScan, scan_from_points

__all__ = [
    "BOHR_ANGSTROM", "MAX_GAP_DEG", "MIN_POINTS", "REFINE_TOLERANCE_DEG", "SCAN_KINDS", "SCAN_SIGNATURE",
    "XTB_RESTRAINT_KJ_MOL_RAD2", "TorsionScan", "angle_unit_from_name", "canonical_angle_unit", "check_scan_output",
    "cosine_series_kj_mol", "energy_unit_from_name", "mmff94_scan", "molecule_from_topology", "parse_torsion_atoms",
    "read_parameter_toml", "read_scan", "read_scan_csv", "refine_extremum", "ryckaert_bellemans_kj_mol",
    "scan_angles", "scan_features", "scan_from_parameters", "scan_from_points", "write_scan_csv", "xtb_scan",
]
