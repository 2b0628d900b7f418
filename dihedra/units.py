"""Physical constants (CODATA 2018, exact values) and energy-unit conversions.

Every module that needs a constant or converts an energy imports it from here.
"""

import numpy as np

from .errors import DihedraError

#: Boltzmann constant in J/K (CODATA 2018, exact).
K_B_J_PER_K = 1.380649e-23
#: Planck constant in J s (CODATA 2018, exact).
H_J_S = 6.62607015e-34
#: Avogadro constant in 1/mol (CODATA 2018, exact).
N_A_PER_MOL = 6.02214076e23
#: Molar gas constant in kJ/(mol K): k_B * N_A (CODATA 2018, exact product 8.314462618... J/(mol K)).
R_KJ_PER_MOL_K = K_B_J_PER_K * N_A_PER_MOL / 1000.0
#: Thermochemical calorie in J (exact by definition).
CALORIE_J = 4.184
#: Hartree energy in kJ/mol (CODATA 2018: E_h = 4.3597447222071e-18 J, times N_A).
HARTREE_KJ_PER_MOL = 4.3597447222071e-18 * N_A_PER_MOL / 1000.0
#: Electronvolt in kJ/mol (CODATA 2018: e = 1.602176634e-19 C exact, times N_A).
EV_KJ_PER_MOL = 1.602176634e-19 * N_A_PER_MOL / 1000.0

#: Accepted spellings of energy units (lower case) -> canonical name.
ENERGY_UNITS = {
    "kj/mol": "kJ/mol",
    "kj_mol": "kJ/mol",
    "kcal/mol": "kcal/mol",
    "kcal_mol": "kcal/mol",
    "hartree": "hartree",
    "ev": "eV",
    "kt": "kT",
}


def kt_kj_mol(temperature_k):
    """Thermal energy RT in kJ/mol at ``temperature_k`` kelvin."""
    temperature_k = check_temperature(temperature_k)
    return R_KJ_PER_MOL_K * temperature_k


def check_temperature(temperature_k):
    """Return the temperature as float, refusing missing or non-positive values."""
    if temperature_k is None:
        raise DihedraError("a temperature in kelvin is required (e.g. --temperature 298.15); "
                           "dihedra never assumes one.")
    try:
        value = float(temperature_k)
    except (TypeError, ValueError):
        raise DihedraError(f"temperature must be a number in kelvin; got {temperature_k!r}.") from None
    if not np.isfinite(value) or value <= 0:
        raise DihedraError(f"temperature must be a positive number of kelvin; got {temperature_k!r}.")
    return value


def canonical_energy_unit(unit):
    """Return the canonical spelling of an energy unit or raise a clear error."""
    key = str(unit).strip().lower().replace(" ", "")
    if key not in ENERGY_UNITS:
        valid = ", ".join(sorted(set(ENERGY_UNITS.values())))
        raise DihedraError(f"unknown energy unit {unit!r}; use one of {valid}.")
    return ENERGY_UNITS[key]


def to_kj_mol(values, unit, temperature_k=None):
    """Convert energies from ``unit`` to kJ/mol (``kT`` needs ``temperature_k``)."""
    unit = canonical_energy_unit(unit)
    values = np.asarray(values, dtype=float)
    if unit == "kJ/mol":
        return values.copy()
    if unit == "kcal/mol":
        return values * CALORIE_J
    if unit == "hartree":
        return values * HARTREE_KJ_PER_MOL
    if unit == "eV":
        return values * EV_KJ_PER_MOL
    return values * kt_kj_mol(temperature_k)  # kT


def from_kj_mol(values, unit, temperature_k=None):
    """Convert energies from kJ/mol to ``unit`` (``kT`` needs ``temperature_k``)."""
    factor = to_kj_mol(1.0, unit, temperature_k)
    return np.asarray(values, dtype=float) / factor


def wrap_deg(angles_deg):
    """Map angles in degrees onto (-180, 180] (the project's convention)."""
    a = np.asarray(angles_deg, dtype=float)
    # angles already in range are kept as they are: (a + 180) - 180 would round an angle of
    # 1e-20 degrees to 0, onto a state boundary
    inside = (a > -180.0) & (a <= 180.0)
    wrapped = np.where(inside, a, np.mod(a + 180.0, 360.0) - 180.0)  # [-180, 180) outside
    return np.where(wrapped == -180.0, 180.0, wrapped)
