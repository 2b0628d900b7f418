r"""Static torsion scans: read from a CSV file, built from force-field parameters, or computed.

A static scan E(phi) is the energy of one molecule as a function of one torsion angle, either
*rigid* (every other coordinate frozen) or *relaxed* (every other coordinate optimised at each
fixed angle). dihedra compares it with a sampled free-energy profile (:mod:`dihedra.analysis.compare`).

Scan CSV files
--------------
Optional leading comment lines ``# key: value`` carry metadata (``kind: rigid|relaxed``,
``method``, ...); then a header row and one row per point. The angle and energy columns are the
first two numeric columns, or the two named by ``columns``. Units are mandatory: either named in
the column headers (``angle_deg`` / ``angle_rad``; ``energy_kj_mol``, ``energy_kcal_mol``,
``energy_hartree``, ``energy_ev``, ``energy_kt``; also ``(deg)``, ``[kcal/mol]`` forms) or given as
arguments; a file whose units cannot be told is refused with the reason, and so is one where the
two disagree. Angles are mapped onto (-180, 180], duplicates (e.g. -180 and 180) averaged, energies
taken relative to the lowest point. A scan needs at least :data:`MIN_POINTS` distinct angles and no
gap in coverage wider than :data:`MAX_GAP_DEG`; between points it is interpolated with a periodic
cubic spline (scipy ``CubicSpline(bc_type="periodic")``).

Parameter files (TOML)
----------------------
``form = "cosine-series"``: E = sum_n k_n (1 + cos(n phi - delta_n)), one ``[[term]]`` per term with
``k``, ``n`` (positive integer) and ``phase_deg`` (or ``phase_rad``). ``form = "ryckaert-bellemans"``:
E = sum_{n=0..5} C_n cos^n(psi), psi = phi - 180 deg, ``coefficients = [C0, ..., C5]``. Both need
``energy_unit`` (kJ/mol, kcal/mol, hartree, eV or kT). Example::

    form = "ryckaert-bellemans"
    energy_unit = "kJ/mol"
    coefficients = [9.28, 12.16, -13.12, -3.06, 26.24, -31.5]

Computed scans (``pip install "dihedra[scan]"``)
------------------------------------------------
* :func:`mmff94_scan` -- relaxed MMFF94 scan with RDKit: at each angle (every 10 degrees by default)
  the torsion is set, then the whole molecule optimised with the torsion held by an MMFF torsion
  constraint; the energy is the unconstrained MMFF94 energy at the optimised geometry. The circle is
  swept forwards and backwards and the lower energy kept at each angle (against hysteresis).
* :func:`xtb_scan` -- relaxed GFN2-xTB scan with tblite: a harmonic restraint on the torsion
  (k = :data:`XTB_RESTRAINT_KJ_MOL_RAD2`) added to the GFN2-xTB energy, minimised with scipy's
  L-BFGS-B on tblite energies and gradients; the energy written is GFN2-xTB alone, the angle the
  one reached.

Both take the molecule the torsion belongs to, built from a topology with elements and hydrogens
(:func:`molecule_from_topology`, first frame), and write a reusable scan CSV with the method in
its metadata (:func:`write_scan_csv`).

References: Halgren, J. Comput. Chem. 17 (1996) 490 (MMFF94); Bannwarth, Ehlert & Grimme,
J. Chem. Theory Comput. 15 (2019) 1652 (GFN2-xTB); Ryckaert & Bellemans, Faraday Discuss. Chem.
Soc. 66 (1978) 95.
"""

from __future__ import annotations

import csv
import io
import os
import re
import time
import tomllib
from dataclasses import dataclass, field

import numpy as np

from ..errors import DihedraError, InputFileError, one_of
from ..units import (HARTREE_KJ_PER_MOL, canonical_energy_unit, to_kj_mol, wrap_deg)

#: Fewest distinct angles a scan may have.
MIN_POINTS = 6
#: Widest allowed gap between neighbouring scan angles (degrees).
MAX_GAP_DEG = 60.0
#: Kinds of scan recorded with a comparison.
SCAN_KINDS = ("rigid", "relaxed", "unspecified", "parameters")
#: Harmonic restraint on the torsion in the GFN2-xTB scan, kJ/(mol rad^2).
XTB_RESTRAINT_KJ_MOL_RAD2 = 5000.0
#: Random restarts per MMFF94 scan point, and their displacement (angstrom, Gaussian per coordinate).
KICKS = 2
KICK_ANGSTROM = 0.05
#: Bohr radius in angstrom (CODATA 2018).
BOHR_ANGSTROM = 0.529177210903
_INSTALL = 'install the scan extras: pip install "dihedra[scan]"'


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


# ----------------------------------------------------------------------------------------------
# Units from column names
# ----------------------------------------------------------------------------------------------

_ANGLE_TOKENS = {"deg": "deg", "degree": "deg", "degrees": "deg", "rad": "rad", "radian": "rad",
                 "radians": "rad"}
_ENERGY_PATTERNS = [
    (re.compile(r"kj[\s_/\-]*(per[\s_]*)?mol|kjmol|kj\b"), "kJ/mol"),
    (re.compile(r"kcal[\s_/\-]*(per[\s_]*)?mol|kcalmol|kcal\b"), "kcal/mol"),
    (re.compile(r"hartree|(^|[^a-z])(eh|au|a\.u\.)([^a-z]|$)"), "hartree"),
    (re.compile(r"(^|[^a-z])ev([^a-z]|$)"), "eV"),
    (re.compile(r"(^|[^a-z])kt([^a-z]|$)"), "kT"),
]


def angle_unit_from_name(name):
    """``deg``/``rad`` if a column name carries the angle unit, else None."""
    for token in re.split(r"[^a-z]+", str(name).lower()):
        if token in _ANGLE_TOKENS:
            return _ANGLE_TOKENS[token]
    return None


def energy_unit_from_name(name):
    """The energy unit a column name carries (``kJ/mol``, ``kcal/mol``, ...), else None."""
    text = str(name).lower()
    for pattern, unit in _ENERGY_PATTERNS:
        if pattern.search(text):
            return unit
    return None


def canonical_angle_unit(unit):
    key = str(unit).strip().lower()
    if key in _ANGLE_TOKENS:
        return _ANGLE_TOKENS[key]
    raise DihedraError(f"unknown angle unit {unit!r}; use deg or rad.")


def _settle_unit(path, what, column, from_name, given, canon, hint):
    if given is not None:
        given = canon(given)
        if from_name is not None and from_name != given:
            raise InputFileError(f"scan file {path}: column {column!r} says the {what} unit is {from_name} "
                                 f"but {given} was given; drop the option or fix the column name.")
        return given
    if from_name is None:
        raise InputFileError(f"scan file {path}: the {what} unit is unknown (column {column!r} does not "
                             f"name one); {hint}.")
    return from_name


# ----------------------------------------------------------------------------------------------
# Reading and checking scans
# ----------------------------------------------------------------------------------------------

def _read_metadata(text):
    meta = {}
    for line in text.splitlines():
        if not line.startswith("#"):
            if line.strip():
                break
            continue
        key, sep, value = line[1:].partition(":")
        if sep and key.strip():
            meta[key.strip().lower().replace(" ", "_")] = value.strip()
    return meta


def _number(cell):
    try:
        value = float(str(cell).strip())
    except (TypeError, ValueError):
        return None
    return value if np.isfinite(value) else None


def read_scan_csv(path, angle_unit=None, energy_unit=None, columns=None, kind=None, temperature_k=None):
    """A scan from a CSV file (see the module notes for the layout and the checks).

    Parameters
    ----------
    path : str
    angle_unit : {'deg', 'rad'}, optional
        Needed unless the angle column's name carries the unit.
    energy_unit : str, optional
        kJ/mol, kcal/mol, hartree, eV or kT; needed unless the energy column's name carries it.
    columns : str or (str, str), optional
        Names of the angle and energy columns (``"phi,E"``); default the first two numeric columns.
    kind : {'rigid', 'relaxed'}, optional
        Overrides a ``# kind:`` line of the file.
    temperature_k : float, optional
        Needed for energies in kT.

    Returns
    -------
    TorsionScan
    """
    path = os.fspath(path)
    if not os.path.exists(path):
        raise InputFileError(f"scan file {path} does not exist.")
    try:
        with open(path, encoding="utf-8-sig") as fh:
            text = fh.read()
    except (OSError, UnicodeDecodeError) as exc:
        raise InputFileError(f"scan file {path} cannot be read as text: {exc}.") from None
    meta = _read_metadata(text)
    body = [line for line in text.splitlines() if line.strip() and not line.lstrip().startswith("#")]
    if not body:
        raise InputFileError(f"scan file {path} holds no table (a header row and one row per angle).")
    dialect = csv.Sniffer().sniff(body[0], delimiters=",;\t ") if len(body[0].split(",")) < 2 else csv.excel
    rows = [[c.strip() for c in r] for r in csv.reader(io.StringIO("\n".join(body)), dialect)
            if any(c.strip() for c in r)]
    header, data = rows[0], rows[1:]
    if all(_number(c) is not None for c in header if c):
        raise InputFileError(f"scan file {path} has no header row; name the columns with their units, e.g. "
                             "angle_deg,energy_kcal_mol.")
    if len(header) < 2:
        raise InputFileError(f"scan file {path} has {len(header)} column; an angle and an energy column are needed.")
    if columns is not None:
        names = [c.strip() for c in (columns.split(",") if isinstance(columns, str) else columns)]
        if len(names) != 2:
            raise DihedraError(f"--columns takes two column names, angle then energy; got {columns!r}.")
        missing = [c for c in names if c not in header]
        if missing:
            raise InputFileError(f"scan file {path} has no column {missing[0]!r}; its columns are "
                                 f"{', '.join(header)}.")
        idx = [header.index(c) for c in names]
    else:
        numeric = []
        for j in range(len(header)):
            cells = [r[j] if j < len(r) else "" for r in data]
            if cells and sum(_number(c) is not None for c in cells) > len(cells) / 2:
                numeric.append(j)
        if len(numeric) < 2:
            raise InputFileError(f"scan file {path} has {len(numeric)} numeric column(s); an angle and an "
                                 "energy column are needed (name them with --columns).")
        idx = numeric[:2]
    values = np.empty((len(data), 2))
    for i, r in enumerate(data):
        for k, j in enumerate(idx):
            cell = r[j] if j < len(r) else ""
            x = _number(cell)
            if x is None:
                raise InputFileError(f"scan file {path}, data row {i + 1}, column {header[j]!r}: "
                                     f"{cell!r} is not a number; every cell of the angle and energy columns "
                                     "must be one.")
            values[i, k] = x
    a_col, e_col = header[idx[0]], header[idx[1]]
    a_unit = _settle_unit(path, "angle", a_col, angle_unit_from_name(a_col), angle_unit, canonical_angle_unit,
                          "give --angle-unit deg or rad, or name the column e.g. angle_deg")
    e_unit = _settle_unit(path, "energy", e_col, energy_unit_from_name(e_col), energy_unit, canonical_energy_unit,
                          "give --energy-unit kJ/mol, kcal/mol, hartree, eV or kT, or name the column e.g. "
                          "energy_kcal_mol")
    angles = values[:, 0] if a_unit == "deg" else np.degrees(values[:, 0])
    energies = to_kj_mol(values[:, 1], e_unit, temperature_k)
    kind = kind or meta.get("kind") or "unspecified"
    one_of("scan kind", kind, ("rigid", "relaxed", "unspecified"))
    meta.update({"angle_column": a_col, "energy_column": e_col, "angle_unit": a_unit, "energy_unit": e_unit})
    return scan_from_points(angles, energies, kind=kind, source=os.path.abspath(path), metadata=meta)


def scan_from_points(angles_deg, energies_kj_mol, kind="unspecified", source="", metadata=None):
    """A checked :class:`TorsionScan` from points (angles wrapped, duplicates averaged, E - min E)."""
    where = f"scan {source}" if source else "scan"
    a = np.round(wrap_deg(angles_deg), 9)
    e = np.asarray(energies_kj_mol, dtype=float)
    uniq, inv = np.unique(a, return_inverse=True)
    mean = np.bincount(inv.reshape(-1), weights=e) / np.bincount(inv.reshape(-1))
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


# ----------------------------------------------------------------------------------------------
# Parameter forms
# ----------------------------------------------------------------------------------------------

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
    try:
        with open(path, "rb") as fh:
            data = tomllib.load(fh)
    except OSError as exc:
        raise InputFileError(f"cannot read parameter file {path}: {exc.strerror}.") from None
    except tomllib.TOMLDecodeError as exc:
        raise InputFileError(f"parameter file {path} is not valid TOML: {exc}.") from None
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


def read_scan(path, angle_unit=None, energy_unit=None, columns=None, kind=None, temperature_k=None):
    """A scan from a ``.toml`` parameter file or a CSV table (see :func:`read_scan_csv`)."""
    if str(path).lower().endswith(".toml"):
        if angle_unit is not None or energy_unit is not None or columns is not None:
            raise DihedraError(f"{path} is a parameter file: its units are inside it; drop --angle-unit, "
                               "--energy-unit and --columns.")
        return read_parameter_toml(path, temperature_k)
    return read_scan_csv(path, angle_unit, energy_unit, columns, kind, temperature_k)


# ----------------------------------------------------------------------------------------------
# Computed scans
# ----------------------------------------------------------------------------------------------

def _require(module, what):
    import importlib
    try:
        return importlib.import_module(module)
    except ImportError:
        raise DihedraError(f"{what} needs the package {module.split('.')[0]}; {_INSTALL}.") from None


def parse_torsion_atoms(spec):
    """Four 0-based atom indices from ``"A,B,C,D"`` (or a sequence)."""
    parts = spec.split(",") if isinstance(spec, str) else list(spec)
    try:
        idx = tuple(int(str(p).strip()) for p in parts)
    except ValueError:
        idx = ()
    if len(idx) != 4 or len(set(idx)) != 4 or min(idx) < 0:
        raise DihedraError(f"a torsion is four different 0-based atom indices A,B,C,D; got {spec!r}.")
    return idx


def molecule_from_topology(topology, torsion, trajectory=None):
    """The RDKit molecule (with 3-D coordinates of the first frame) that holds a torsion.

    Parameters
    ----------
    topology : str
        Topology with elements (or element-like atom types) and explicit hydrogens, and bonds
        (guessed from distances if absent).
    torsion : str or sequence of 4 int
        0-based atom indices A,B,C,D of the topology.
    trajectory : str, optional
        The first frame of this trajectory gives the coordinates (else the topology's).

    Returns
    -------
    mol : rdkit.Chem.Mol
    local : tuple of 4 int
        The torsion's atom indices inside ``mol``.
    """
    _require("rdkit", "building the molecule for a computed scan")
    from ..trajectory.inputs import load_universe

    idx = parse_torsion_atoms(torsion)
    notices = []
    u = load_universe(topology, trajectory, notices)
    if max(idx) >= u.atoms.n_atoms:
        raise DihedraError(f"torsion atoms {idx} do not exist: {topology} has {u.atoms.n_atoms} atoms "
                           f"(indices 0..{u.atoms.n_atoms - 1}).")
    if not hasattr(u.atoms, "elements") or not all(str(e).strip() for e in u.atoms.elements):
        raise DihedraError(f"{topology} gives no chemical elements; a computed scan needs an all-atom "
                           "topology with elements (e.g. a PDB with element columns, a PSF or TPR).")
    try:
        _ = u.bonds
        has_bonds = len(u.bonds) > 0
    except Exception:  # noqa: BLE001 - no bond attribute
        has_bonds = False
    if not has_bonds:
        u.guess_TopologyAttrs(to_guess=["bonds"])
    frag = u.atoms[idx[0]].fragment
    missing = [i for i in idx if i not in set(frag.indices)]
    if missing:
        raise DihedraError(f"atoms {idx} are not all in one molecule (atom {missing[0]} is not bonded to "
                           f"atom {idx[0]}); check the torsion.")
    if not any(str(e).upper() == "H" for e in frag.elements) and frag.n_atoms > 1:
        raise DihedraError(f"the molecule holding torsion {idx} ({frag.n_atoms} atoms) has no hydrogens; "
                           "MMFF94 and GFN2-xTB need every hydrogen explicit (a united-atom model cannot be "
                           "scanned this way; supply a scan file instead).")
    try:
        import warnings
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            mol = frag.convert_to("RDKIT")
    except Exception as exc:  # noqa: BLE001 - report the converter's reason
        raise DihedraError(f"cannot build the molecule of torsion {idx} for RDKit: {exc}.") from None
    position = {int(a.GetIntProp("_MDAnalysis_index")): a.GetIdx() for a in mol.GetAtoms()}
    local = tuple(position[i] for i in idx)
    _check_rotatable(mol, local)
    return mol, local


def _check_rotatable(mol, local):
    a, b, c, d = local
    for x, y in ((a, b), (b, c), (c, d)):
        if mol.GetBondBetweenAtoms(int(x), int(y)) is None:
            raise DihedraError(f"atoms {x} and {y} of the torsion are not bonded; A-B, B-C and C-D must be bonds.")
    if mol.GetBondBetweenAtoms(int(b), int(c)).IsInRing():
        raise DihedraError("the central bond of the torsion is in a ring; a scan cannot turn it freely.")


def _scan_angles(step_deg):
    step = float(step_deg)
    if not (0 < step <= 60) or abs(360.0 / step - round(360.0 / step)) > 1e-9:
        raise DihedraError(f"the scan step must divide 360 and be at most 60 degrees (e.g. 10, 15, 30); got {step_deg!r}.")
    return wrap_deg(-180.0 + step * np.arange(1, int(round(360.0 / step)) + 1))


def _sweep_order(targets, start_deg):
    """Targets ordered from the one nearest ``start_deg`` upwards, then downwards."""
    k0 = int(np.argmin(np.abs((targets - start_deg + 180.0) % 360.0 - 180.0)))
    up = [targets[(k0 + k) % len(targets)] for k in range(len(targets))]
    down = [targets[(k0 - k) % len(targets)] for k in range(len(targets))]
    return up, down


def mmff94_scan(mol, torsion, step_deg=10.0, max_iterations=5000, progress=None):
    """Relaxed MMFF94 scan of a torsion of an RDKit molecule with 3-D coordinates.

    Parameters
    ----------
    mol : rdkit.Chem.Mol
        With explicit hydrogens and one conformer.
    torsion : sequence of 4 int
        Atom indices in ``mol``.
    step_deg : float
        Spacing of the scan (must divide 360).
    progress : callable, optional
        Called as ``progress(done, total, angle_deg, energy_kj_mol)``.

    Returns
    -------
    TorsionScan (kind ``relaxed``; metadata with the method and the angles reached)
    """
    _require("rdkit", "an MMFF94 scan")
    from rdkit import Chem
    from rdkit.Chem import AllChem, rdMolTransforms
    from rdkit.Geometry import Point3D

    rng = np.random.default_rng(0)
    a, b, c, d = (int(i) for i in torsion)
    _check_rotatable(mol, (a, b, c, d))
    if mol.GetNumConformers() == 0:
        raise DihedraError("the molecule has no 3-D coordinates; embed it first (AllChem.EmbedMolecule).")
    work = Chem.Mol(mol)
    props = AllChem.MMFFGetMoleculeProperties(work, mmffVariant="MMFF94")
    if props is None:
        raise DihedraError("MMFF94 has no parameters for this molecule (check elements, charges and hydrogens).")
    plain = AllChem.MMFFGetMoleculeForceField(work, props)
    plain.Minimize(maxIts=max_iterations)
    start = Chem.Conformer(work.GetConformer())
    targets = _scan_angles(step_deg)
    best = {}
    total = 3 * len(targets)
    done = 0
    up, down = _sweep_order(targets, rdMolTransforms.GetDihedralDeg(start, a, b, c, d))
    conf = work.GetConformer()
    for sweep, fresh in ((up, True), (up, False), (down, False)):
        for j in range(work.GetNumAtoms()):
            conf.SetAtomPosition(j, start.GetAtomPosition(j))
        for target in sweep:
            if fresh:
                for j in range(work.GetNumAtoms()):
                    conf.SetAtomPosition(j, start.GetAtomPosition(j))
            rdMolTransforms.SetDihedralDeg(conf, a, b, c, d, float(target))
            energy, kept = None, None
            for kick in range(1 + KICKS):
                if kick:  # a small random displacement lets the optimiser leave a saddle point
                    pos = np.asarray(kept) + rng.normal(0.0, KICK_ANGSTROM, np.shape(kept))
                    for j in range(len(pos)):
                        conf.SetAtomPosition(j, Point3D(*pos[j]))
                ff = AllChem.MMFFGetMoleculeForceField(work, props)
                ff.MMFFAddTorsionConstraint(a, b, c, d, False, float(target), float(target), 1.0e4)
                for _ in range(20):
                    if ff.Minimize(maxIts=max_iterations, forceTol=1e-6, energyTol=1e-10) == 0:
                        break
                e = float(AllChem.MMFFGetMoleculeForceField(work, props).CalcEnergy()) * 4.184
                if energy is None or e < energy:
                    energy, kept = e, conf.GetPositions()
            for j in range(len(kept)):
                conf.SetAtomPosition(j, Point3D(*kept[j]))
            reached = rdMolTransforms.GetDihedralDeg(conf, a, b, c, d)
            key = float(target)
            if key not in best or energy < best[key][0]:
                best[key] = (energy, reached)
            done += 1
            if progress is not None:
                progress(done, total, key, energy)
    angles = np.array(sorted(best))
    energy = np.array([best[x][0] for x in angles])
    meta = {"method": f"MMFF94 relaxed scan (RDKit {_version('rdkit')}), torsion constraint 1e4 kcal/(mol rad^2), "
                      "each angle from the start geometry and from both neighbours, 2 random restarts each, lowest energy kept",
            "kind": "relaxed", "step_deg": float(step_deg),
            "reached_angle_deg": {f"{x:g}": round(float(best[x][1]), 3) for x in angles}}
    return scan_from_points(angles, energy, kind="relaxed", source="MMFF94", metadata=meta)


def _dihedral_deg(x, a, b, c, d):
    b1, b2, b3 = x[b] - x[a], x[c] - x[b], x[d] - x[c]
    n1, n2 = np.cross(b1, b2), np.cross(b2, b3)
    y = np.dot(np.cross(n1, n2), b2) / np.linalg.norm(b2)
    return np.degrees(np.arctan2(y, np.dot(n1, n2)))


def xtb_scan(mol, torsion, step_deg=30.0, charge=0, unpaired=0, restraint_kj_mol_rad2=XTB_RESTRAINT_KJ_MOL_RAD2,
             gradient_tolerance=1e-3, max_iterations=500, progress=None):
    """Relaxed GFN2-xTB scan with tblite: restraint on the torsion plus L-BFGS-B.

    Parameters
    ----------
    mol : rdkit.Chem.Mol
        With explicit hydrogens and one conformer (e.g. from :func:`molecule_from_topology`).
    torsion : sequence of 4 int
    step_deg : float
        Spacing of the scan (must divide 360).
    charge, unpaired : int
        Total charge and number of unpaired electrons.
    restraint_kj_mol_rad2 : float
        Force constant k of the restraint k/2 (phi - phi0)^2.
    gradient_tolerance : float
        L-BFGS-B ``gtol`` in hartree/bohr.
    progress : callable, optional
        ``progress(done, total, angle_deg, energy_kj_mol)``.

    Returns
    -------
    TorsionScan (kind ``relaxed``)
    """
    _require("tblite.interface", "a GFN2-xTB scan")
    _require("rdkit", "a GFN2-xTB scan")
    from rdkit.Chem import rdMolTransforms
    from scipy.optimize import minimize
    from tblite.interface import Calculator

    a, b, c, d = (int(i) for i in torsion)
    _check_rotatable(mol, (a, b, c, d))
    numbers = np.array([atom.GetAtomicNum() for atom in mol.GetAtoms()])
    conf = mol.GetConformer()
    x0 = np.array(conf.GetPositions(), dtype=float) / BOHR_ANGSTROM
    k_eh = restraint_kj_mol_rad2 / HARTREE_KJ_PER_MOL
    calc = Calculator("GFN2-xTB", numbers, x0, charge=float(charge), uhf=int(unpaired))
    calc.set("verbosity", 0)
    state = {"res": None}

    def energy_gradient(x, target):
        pos = x.reshape(-1, 3)
        calc.update(pos)
        try:
            state["res"] = calc.singlepoint(state["res"])
        except RuntimeError:
            state["res"] = calc.singlepoint()
        e = float(state["res"].get("energy"))
        g = np.array(state["res"].get("gradient"), dtype=float)
        dev = np.radians((_dihedral_deg(pos, a, b, c, d) - target + 180.0) % 360.0 - 180.0)
        e += 0.5 * k_eh * dev ** 2
        # gradient of the restraint by central differences over the 12 coordinates involved
        h = 1e-5
        for i in (a, b, c, d):
            for j in range(3):
                p = pos.copy()
                p[i, j] += h
                up = _dihedral_deg(p, a, b, c, d)
                p[i, j] -= 2 * h
                dn = _dihedral_deg(p, a, b, c, d)
                dphi = np.radians((up - dn + 180.0) % 360.0 - 180.0) / (2 * h)
                g[i, j] += k_eh * dev * dphi
        return e, g.ravel()

    targets = _scan_angles(step_deg)
    up, _ = _sweep_order(targets, _dihedral_deg(x0, a, b, c, d))
    x = x0.copy()
    rows = {}
    for n_done, target in enumerate(up, start=1):
        conf_pos = x * BOHR_ANGSTROM
        for j in range(len(conf_pos)):
            conf.SetAtomPosition(j, conf_pos[j].tolist())
        rdMolTransforms.SetDihedralDeg(conf, a, b, c, d, float(target))
        x = np.array(conf.GetPositions(), dtype=float) / BOHR_ANGSTROM
        out = minimize(energy_gradient, x.ravel(), args=(float(target),), jac=True, method="L-BFGS-B",
                       options={"gtol": gradient_tolerance, "maxiter": max_iterations})
        x = out.x.reshape(-1, 3)
        calc.update(x)
        e_plain = float(calc.singlepoint().get("energy")) * HARTREE_KJ_PER_MOL
        rows[float(target)] = (e_plain, _dihedral_deg(x, a, b, c, d))
        if progress is not None:
            progress(n_done, len(up), float(target), e_plain)
    angles = np.array(sorted(rows))
    energy = np.array([rows[t][0] for t in angles])
    meta = {"method": f"GFN2-xTB relaxed scan (tblite {_version('tblite')}), harmonic torsion restraint "
                      f"{restraint_kj_mol_rad2:g} kJ/(mol rad^2), scipy L-BFGS-B",
            "kind": "relaxed", "step_deg": float(step_deg), "charge": int(charge), "unpaired_electrons": int(unpaired),
            "lowest_energy_hartree": float(energy.min() / HARTREE_KJ_PER_MOL),
            "reached_angle_deg": {f"{t:g}": round(float(rows[t][1]), 3) for t in angles}}
    return scan_from_points(angles, energy, kind="relaxed", source="GFN2-xTB", metadata=meta)


def _version(name):
    import importlib.metadata as md
    try:
        return md.version(name)
    except md.PackageNotFoundError:
        return "?"


#: The first line of a scan file that dihedra wrote (only such a file is replaced).
SCAN_SIGNATURE = "# content: dihedra torsion scan"


def check_scan_output(path, overwrite=False, inputs=()):
    """Check a scan file to be written: an existing file is replaced only with ``overwrite`` and
    only when it is a scan dihedra wrote; returns the absolute path."""
    from ..io.outputs import check_single_file, file_head_contains

    return check_single_file(path, inputs=inputs, overwrite=overwrite, kind="dihedra scan",
                             ours=lambda p: file_head_contains(p, SCAN_SIGNATURE, limit=len(SCAN_SIGNATURE)))


def write_scan_csv(scan, path, extra=None, overwrite=False):
    """Write a scan as CSV with ``# key: value`` metadata lines (readable by :func:`read_scan_csv`).

    An existing file is replaced only with ``overwrite`` and only when it is a scan that dihedra
    wrote (see :func:`check_scan_output`)."""
    from ..io.outputs import write_file

    path = check_scan_output(path, overwrite=overwrite)

    meta = {"content": "dihedra torsion scan", "kind": scan.kind}
    meta.update({k: v for k, v in scan.metadata.items() if k not in ("reached_angle_deg", "kind")})
    meta.update(extra or {})
    meta["energies"] = "kJ/mol, relative to the lowest point"
    meta["created"] = time.strftime("%Y-%m-%dT%H:%M:%S%z")
    reached = scan.metadata.get("reached_angle_deg", {})
    lines = [f"# {k}: {v}" for k, v in meta.items()]
    lines.append("angle_deg,energy_kj_mol" + (",reached_angle_deg" if reached else ""))
    for x, e in zip(scan.angle_deg, scan.energy_kj_mol):
        row = f"{x:g},{e:.6f}"
        if reached:
            row += f",{reached.get(f'{x:g}', '')}"
        lines.append(row)
    folder, name = os.path.split(os.path.abspath(path))

    def write(tmp):
        with open(tmp, "w") as fh:
            fh.write("\n".join(lines) + "\n")

    return write_file(folder, name, write, marked=False)
