r"""Scans built from torsion parameters (TOML files of force-field terms).

``form = "cosine-series"``: E = sum_n k_n (1 + cos(n phi - delta_n)), one ``[[term]]`` per term with
``k``, ``n`` (positive integer) and ``phase_deg`` (or ``phase_rad``). ``form = "ryckaert-bellemans"``:
E = sum_{n=0..5} C_n cos^n(psi), psi = phi - 180 deg, ``coefficients = [C0, ..., C5]`` (Ryckaert &
Bellemans, Faraday Discuss. Chem. Soc. 66 (1978) 95). Both need ``energy_unit`` (kJ/mol,
kcal/mol, hartree, eV or kT). Example::

    form = "ryckaert-bellemans"
    energy_unit = "kJ/mol"
    coefficients = [9.28, 12.16, -13.12, -3.06, 26.24, -31.5]
"""

from __future__ import annotations

import os

import numpy as np

from ...errors import InputFileError, one_of, read_toml
from ...units import canonical_energy_unit, to_kj_mol
from .scan import scan_from_points


def cosine_series_kj_mol(phi_deg, terms):
    """sum_n k_n (1 + cos(n phi - delta_n)); ``terms`` = [(k_kj_mol, n, delta_deg), ...]."""
    phi = np.radians(np.asarray(phi_deg, dtype=float))
    return sum(k * (1.0 + np.cos(n * phi - np.radians(d))) for k, n, d in terms)


def ryckaert_bellemans_kj_mol(phi_deg, coefficients):
    """sum_n C_n cos^n(psi), psi = phi - 180 deg (polymer convention), C_n in kJ/mol."""
    c = np.cos(np.radians(np.asarray(phi_deg, dtype=float) - 180.0))
    return sum(k * c ** n for n, k in enumerate(coefficients))


def read_parameter_toml(path, temperature_k=None):
    """A scan E(phi) from torsion parameters in TOML (see the module notes)."""
    path = os.fspath(path)
    data = read_toml(path, "parameter file")
    return scan_from_parameters(data, where=f"parameter file {path}", temperature_k=temperature_k,
                                source=os.path.abspath(path))


def scan_from_parameters(data, where="parameters", temperature_k=None, source=""):
    """A scan from a mapping with the layout of a parameter TOML file."""
    form = data.get("form")
    one_of(f"{where}: form", form, ("cosine-series", "ryckaert-bellemans"))
    if "energy_unit" not in data:
        raise InputFileError(f"{where}: energy_unit is missing; add e.g. energy_unit = \"kJ/mol\" "
                             "(kJ/mol, kcal/mol, hartree, eV or kT).")
    unit = canonical_energy_unit(data["energy_unit"])
    factor = float(to_kj_mol(1.0, unit, temperature_k))
    allowed = {"form", "energy_unit", "name", "term", "coefficients"}
    extra = sorted(set(data) - allowed)
    if extra:
        raise InputFileError(f"{where}: unknown key(s) {', '.join(extra)}; valid keys are "
                             f"{', '.join(sorted(allowed))}.")
    if form == "cosine-series":
        terms = []
        for k, term in enumerate(data.get("term") or [], start=1):
            bad = sorted(set(term) - {"k", "n", "phase_deg", "phase_rad"})
            if bad or "k" not in term or "n" not in term or ("phase_deg" in term and "phase_rad" in term):
                raise InputFileError(f"{where}: term {k} needs k, n and one of phase_deg / phase_rad "
                                     f"(phase 0 if absent); got keys {', '.join(sorted(term))}.")
            n = term["n"]
            if not isinstance(n, int) or n < 1:
                raise InputFileError(f"{where}: term {k}: the multiplicity n must be a positive integer; got {n!r}.")
            phase = float(term.get("phase_deg", np.degrees(float(term.get("phase_rad", 0.0)))))
            terms.append((float(term["k"]) * factor, n, phase))
        if not terms:
            raise InputFileError(f"{where}: a cosine series needs at least one [[term]] with k, n, phase_deg.")
        function = (lambda phi, t=tuple(terms): cosine_series_kj_mol(phi, t))
        meta = {"form": form, "terms_kj_mol": [list(t) for t in terms]}
    else:
        coeff = data.get("coefficients")
        if not isinstance(coeff, list) or not 1 <= len(coeff) <= 6:
            raise InputFileError(f"{where}: coefficients must be a list of C0..C5 (at most 6 numbers); got {coeff!r}.")
        coeff = tuple(float(c) * factor for c in coeff)
        function = (lambda phi, c=coeff: ryckaert_bellemans_kj_mol(phi, c))
        meta = {"form": form, "coefficients_kj_mol": list(coeff)}
    meta["energy_unit_given"] = unit
    grid = np.arange(-179.0, 181.0, 1.0)
    scan = scan_from_points(grid, function(grid), kind="parameters", source=source or where, metadata=meta)
    scan.function = function
    return scan

