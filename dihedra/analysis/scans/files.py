r"""Scan CSV files: reading them (units from the column names or given) and writing them.

A scan file is a header row and one row per point, so that ``pandas.read_csv(path)`` reads it as
it is. Metadata (``kind``: rigid or relaxed, ``method``, ...) go into a sidecar JSON file beside it
(``scan.csv`` -> ``scan.json``, with ``"content": "dihedra torsion scan"``), which
:func:`write_scan_csv` writes and :func:`read_scan_csv` reads; files that users bring may carry
the metadata instead as leading comment lines ``# key: value``, which are read too. The angle and energy columns are the
first two numeric columns, or the two named by ``columns``. Units are mandatory: either named in
the column headers (``angle_deg`` / ``angle_rad``; ``energy_kj_mol``, ``energy_kcal_mol``,
``energy_hartree``, ``energy_ev``, ``energy_kt``; also ``(deg)``, ``[kcal/mol]`` forms) or given as
arguments; a file whose units cannot be told is refused with the reason, and so is one where the
two disagree. Angles are mapped onto (-180, 180], duplicates (e.g. -180 and 180) averaged, energies
taken relative to the lowest point (:func:`~dihedra.analysis.scans.scan.scan_from_points`).
:func:`read_scan` reads either a CSV file or a parameter file
(:mod:`dihedra.analysis.scans.parameters`).
"""

from __future__ import annotations

import csv
import io
import os
import re
import time

import numpy as np

from ...errors import DihedraError, InputFileError, one_of
from ...units import canonical_energy_unit, to_kj_mol
from .parameters import read_parameter_toml
from .scan import scan_from_points


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

def sidecar_path(path):
    """The metadata file of a scan CSV: the same name with ``.json`` (``scan.csv`` -> ``scan.json``)."""
    stem, ext = os.path.splitext(os.fspath(path))
    return (stem if ext.lower() == ".csv" else os.fspath(path)) + ".json"


def _read_sidecar(path):
    """The metadata of the sidecar JSON of a scan file that dihedra wrote for it, or {}."""
    import json

    side = sidecar_path(path)
    try:
        with open(side, encoding="utf-8") as fh:
            doc = json.load(fh)
    except (OSError, ValueError):
        return {}
    if not isinstance(doc, dict) or doc.get("content") != SCAN_CONTENT or doc.get("csv") != os.path.basename(path):
        return {}
    return {str(k): v for k, v in doc.items() if k not in ("content", "csv")}


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


def _read_table(path):
    """The ``# key: value`` metadata, the header row and the data rows of a scan CSV file."""
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
    try:
        dialect = csv.Sniffer().sniff(body[0], delimiters=",;\t ") if len(body[0].split(",")) < 2 else csv.excel
    except csv.Error:   # one column: no delimiter to find
        dialect = csv.excel
    rows = [[c.strip() for c in r] for r in csv.reader(io.StringIO("\n".join(body)), dialect)
            if any(c.strip() for c in r)]
    header, data = rows[0], rows[1:]
    if all(_number(c) is not None for c in header if c):
        raise InputFileError(f"scan file {path} has no header row; name the columns with their units, e.g. "
                             "angle_deg,energy_kcal_mol.")
    if len(header) < 2:
        raise InputFileError(f"scan file {path} has {len(header)} column; an angle and an energy column are needed.")
    return meta, header, data


def _column_positions(path, header, data, columns):
    """Positions of the angle and energy columns: those named, else the first two numeric ones."""
    if columns is not None:
        names = [c.strip() for c in (columns.split(",") if isinstance(columns, str) else columns)]
        if len(names) != 2:
            raise DihedraError(f"--scan-columns takes two column names, angle then energy; got {columns!r}.")
        missing = [c for c in names if c not in header]
        if missing:
            raise InputFileError(f"scan file {path} has no column {missing[0]!r}; its columns are "
                                 f"{', '.join(header)}.")
        return [header.index(c) for c in names]
    numeric = []
    for j in range(len(header)):
        cells = [r[j] if j < len(r) else "" for r in data]
        if cells and sum(_number(c) is not None for c in cells) > len(cells) / 2:
            numeric.append(j)
    if len(numeric) < 2:
        raise InputFileError(f"scan file {path} has {len(numeric)} numeric column(s); an angle and an "
                             "energy column are needed (name them with --scan-columns).")
    return numeric[:2]


def _column_values(path, header, data, idx):
    """The cells of the columns ``idx`` as numbers, array (n_rows, 2); every one must be a number."""
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
    return values


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
    meta, header, data = _read_table(path)
    meta = {**_read_sidecar(path), **meta}
    idx = _column_positions(path, header, data, columns)
    values = _column_values(path, header, data, idx)
    a_col, e_col = header[idx[0]], header[idx[1]]
    a_unit = _settle_unit(path, "angle", a_col, angle_unit_from_name(a_col), angle_unit, canonical_angle_unit,
                          "give --scan-angle-unit deg or rad, or name the column e.g. angle_deg")
    e_unit = _settle_unit(path, "energy", e_col, energy_unit_from_name(e_col), energy_unit, canonical_energy_unit,
                          "give --scan-energy-unit kJ/mol, kcal/mol, hartree, eV or kT, or name the column e.g. "
                          "energy_kcal_mol")
    angles = values[:, 0] if a_unit == "deg" else np.degrees(values[:, 0])
    energies = to_kj_mol(values[:, 1], e_unit, temperature_k)
    kind = kind or str(meta.get("kind") or "unspecified")
    one_of("scan kind", kind, ("rigid", "relaxed", "unspecified"))
    meta.update({"angle_column": a_col, "energy_column": e_col, "angle_unit": a_unit, "energy_unit": e_unit})
    return scan_from_points(angles, energies, kind=kind, source=os.path.abspath(path), metadata=meta)


def read_scan(path, angle_unit=None, energy_unit=None, columns=None, kind=None, temperature_k=None):
    """A scan from a ``.toml`` parameter file or a CSV table (see :func:`read_scan_csv`)."""
    if str(path).lower().endswith(".toml"):
        if angle_unit is not None or energy_unit is not None or columns is not None:
            raise DihedraError(f"{path} is a parameter file: its units are inside it; drop --scan-angle-unit, "
                               "--scan-energy-unit and --scan-columns.")
        return read_parameter_toml(path, temperature_k)
    return read_scan_csv(path, angle_unit, energy_unit, columns, kind, temperature_k)


#: What the sidecar JSON of a scan file that dihedra wrote says it holds.
SCAN_CONTENT = "dihedra torsion scan"
#: The first line of a scan file that an older dihedra wrote (metadata as comment lines).
SCAN_SIGNATURE = "# content: dihedra torsion scan"


def _is_our_scan(path):
    """A scan file dihedra wrote: its sidecar JSON names it, or (older) its first line is the signature."""
    from ...io.outputs import file_head_contains

    return bool(_read_sidecar(path)) or file_head_contains(path, SCAN_SIGNATURE, limit=len(SCAN_SIGNATURE))


def check_scan_output(path, overwrite=False, inputs=()):
    """Check a scan file (and its sidecar JSON) to be written: an existing file is replaced only
    with ``overwrite`` and only when it is a scan dihedra wrote; returns the absolute path."""
    from ...io.outputs import check_single_file

    path = check_single_file(path, inputs=inputs, overwrite=overwrite, kind="dihedra scan", ours=_is_our_scan)
    side = sidecar_path(path)
    if os.path.exists(side) and not (overwrite and _is_our_scan(path)):
        check_single_file(side, inputs=inputs, overwrite=False, kind="scan metadata",
                          ours=lambda p: bool(_read_sidecar(path)))
    return path


def write_scan_csv(scan, path, extra=None, overwrite=False):
    """Write a scan as a plain CSV table (``pandas.read_csv`` reads it) and its metadata into the
    sidecar JSON beside it (:func:`sidecar_path`); :func:`read_scan_csv` reads both.

    An existing file is replaced only with ``overwrite`` and only when it is a scan that dihedra
    wrote (see :func:`check_scan_output`). Returns the path of the CSV file."""
    import json

    from ...io.outputs import write_file

    path = check_scan_output(path, overwrite=overwrite)
    meta = {"content": SCAN_CONTENT, "csv": os.path.basename(path), "kind": scan.kind}
    meta.update({k: v for k, v in scan.metadata.items() if k not in ("reached_angle_deg", "kind")})
    meta.update(extra or {})
    meta["energies"] = "kJ/mol, relative to the lowest point"
    meta["created"] = time.strftime("%Y-%m-%dT%H:%M:%S%z")
    reached = scan.metadata.get("reached_angle_deg", {})
    lines = ["angle_deg,energy_kj_mol" + (",reached_angle_deg" if reached else "")]
    for x, e in zip(scan.angle_deg, scan.energy_kj_mol):
        row = f"{x:g},{e:.6f}"
        if reached:
            row += f",{reached.get(f'{x:g}', '')}"
        lines.append(row)
    folder, name = os.path.split(os.path.abspath(path))

    def write(tmp):
        with open(tmp, "w") as fh:
            fh.write("\n".join(lines) + "\n")

    def write_meta(tmp):
        with open(tmp, "w", encoding="utf-8") as fh:
            json.dump(meta, fh, indent=1, default=str)
            fh.write("\n")

    out = write_file(folder, name, write, marked=False)
    write_file(folder, os.path.basename(sidecar_path(path)), write_meta, marked=False)
    return out
