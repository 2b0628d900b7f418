r"""A fitted correction in forms a user can apply: Fourier terms, Ryckaert-Bellemans coefficients,
and an OpenMM ForceField XML fragment.

Forms
-----
Fourier (cosine and sine) coefficients, as fitted: :math:`\Delta V(\phi) = \sum_n a_n \cos n\phi
+ b_n \sin n\phi`. The same as periodic terms,

.. math::  \Delta V(\phi) = \sum_n k_n \left[1 + \cos(n\phi - \delta_n)\right],
           \quad k_n = \sqrt{a_n^2 + b_n^2}, \quad \delta_n = \operatorname{atan2}(b_n, a_n),

which differs from the Fourier sum by the constant :math:`\sum_n k_n` (a constant changes no
ensemble). This is the form of OpenMM's ``PeriodicTorsionForce`` (phase in radians, k in kJ/mol,
the torsion angle with the IUPAC sign), written as a ``<ForceField>`` fragment with one
``<Proper>`` per torsion type, matched by atom classes (or types).

Ryckaert-Bellemans: :math:`\Delta V = \sum_{m=0}^{5} C_m \cos^m\psi` with
:math:`\psi = \phi - 180^\circ` (the polymer convention of RB torsions). It exists when every
phase is 0 or 180 degrees (no sine part) and N <= 5, from :math:`\cos n\phi = T_n(\cos\phi)`
(Chebyshev polynomials) and :math:`\cos\phi = -\cos\psi`:
:math:`C_m = [m = 0] \sum_n k_n + \sum_n a_n (-1)^n t_{nm}` with :math:`t_{nm}` the power-series
coefficients of :math:`T_n` (the trigonometric identities; the conversion is common practice).

Example
-------
>>> import numpy as np
>>> from dihedra.analysis.refit.exports import ryckaert_bellemans
>>> c = ryckaert_bellemans([0.0, 0.0, -1.0], constant=1.0)    # 1 - cos(3 phi)
>>> phi = 205.0                                                 # psi = phi - 180 = 25 deg
>>> rb = sum(cn * np.cos(np.radians(phi - 180.0)) ** m for m, cn in enumerate(c))
>>> round(float(rb), 6), round(float(1 - np.cos(3 * np.radians(phi))), 6)
(1.258819, 1.258819)
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from ...errors import DihedraError
from .fit import basis_values

#: Largest number of Fourier terms with a Ryckaert-Bellemans form (cos^5 psi).
RB_MAX_TERMS = 5
#: A sine coefficient within this many standard errors of zero is "consistent with zero".
SINE_ZERO_SIGMA = 2.0


def coefficient_pairs(theta_type, n_terms, symmetric):
    """The cosine and sine coefficients (a_n, b_n), each an array (..., n_terms), of one type's
    slice of the fitted coefficients (``(..., per_type)``)."""
    theta_type = np.asarray(theta_type, dtype=float)
    if symmetric:
        return theta_type, np.zeros_like(theta_type)
    return theta_type[..., 0::2], theta_type[..., 1::2]


def periodic_terms(a, b):
    """Amplitudes k_n >= 0 and phases delta_n in degrees of a_n cos(n phi) + b_n sin(n phi)."""
    return np.hypot(a, b), np.degrees(np.arctan2(b, a))


def _circular_sd_deg(phases_deg):
    """Circular standard deviation sqrt(-2 ln R) of angles in degrees (common practice)."""
    z = np.exp(1j * np.radians(phases_deg))
    r = np.abs(np.mean(z, axis=0))
    with np.errstate(divide="ignore"):
        return np.degrees(np.sqrt(-2.0 * np.log(np.clip(r, 1e-300, 1.0)))) + 0.0   # (+ 0.0: no negative zero)


def terms_table(theta, boot, type_names, n_terms, symmetric):
    """The fitted terms per type with bootstrap errors: type, n, k_kj_mol, k_err_kj_mol, phase_deg,
    phase_err_deg, cos_kj_mol, cos_err_kj_mol, sin_kj_mol, sin_err_kj_mol."""
    per = len(theta) // max(1, len(type_names))
    rows = []
    for t, name in enumerate(type_names):
        sl = slice(t * per, (t + 1) * per)
        a, b = coefficient_pairs(theta[sl], n_terms, symmetric)
        k, phase = periodic_terms(a, b)
        ab, bb = coefficient_pairs(boot[:, sl], n_terms, symmetric) if len(boot) else (None, None)
        kb, pb = periodic_terms(ab, bb) if len(boot) else (None, None)

        def sd(x):
            return np.std(x, axis=0, ddof=1) if x is not None and len(x) > 1 else np.full(n_terms, np.nan)

        phase_err = _circular_sd_deg(pb) if pb is not None and len(pb) > 1 else np.full(n_terms, np.nan)
        for n in range(n_terms):
            rows.append({"type": name, "n": n + 1, "k_kj_mol": k[n], "k_err_kj_mol": sd(kb)[n],
                         "phase_deg": phase[n], "phase_err_deg": phase_err[n],
                         "cos_kj_mol": a[n], "cos_err_kj_mol": sd(ab)[n],
                         "sin_kj_mol": b[n], "sin_err_kj_mol": sd(bb)[n]})
    return pd.DataFrame(rows)


def correction_table(theta, boot, type_names, n_terms, symmetric, step_deg=1.0):
    """The correction as a curve per type (type, angle_deg, delta_v_kj_mol, delta_v_err_kj_mol),
    shifted so that its minimum is 0; the error is the bootstrap spread of the equally shifted
    curves."""
    grid = np.arange(-180.0, 180.0 + step_deg / 2, step_deg)
    basis = basis_values(grid, n_terms, symmetric)
    per = basis.shape[1]
    frames = []
    for t, name in enumerate(type_names):
        curve = basis @ theta[t * per:(t + 1) * per]
        curve = curve - curve.min()
        err = np.full(len(grid), np.nan)
        if len(boot) > 1:
            curves = boot[:, t * per:(t + 1) * per] @ basis.T
            err = np.std(curves - curves.min(axis=1, keepdims=True), axis=0, ddof=1)
        frames.append(pd.DataFrame({"type": name, "angle_deg": grid, "delta_v_kj_mol": curve,
                                    "delta_v_err_kj_mol": err}))
    return pd.concat(frames, ignore_index=True)


def ryckaert_bellemans(cos_coefficients, constant=0.0):
    """C_0 .. C_5 (kJ/mol) of constant + sum_n a_n cos(n phi) as sum_m C_m cos^m(psi),
    psi = phi - 180 deg (see the module notes)."""
    from numpy.polynomial import chebyshev

    a = np.asarray(cos_coefficients, dtype=float)
    if len(a) > RB_MAX_TERMS:
        raise DihedraError(f"a Ryckaert-Bellemans form holds at most {RB_MAX_TERMS} Fourier terms (cos^5); got "
                           f"{len(a)}.")
    c = np.zeros(RB_MAX_TERMS + 1)
    c[0] = constant
    for n, an in enumerate(a, start=1):
        power = chebyshev.cheb2poly([0.0] * n + [1.0])
        c[:n + 1] += an * (-1.0) ** n * power
    return c


def rb_table(terms, symmetric, notices):
    """Ryckaert-Bellemans coefficients per type (type, power, coefficient_kj_mol, and the
    convention), or None with a notice saying why there is none."""
    n_terms = int(terms["n"].max())
    if n_terms > RB_MAX_TERMS:
        notices.append(f"no Ryckaert-Bellemans form: {n_terms} Fourier terms need cos^{n_terms}, and the form stops "
                       f"at cos^{RB_MAX_TERMS}.")
        return None
    rows, gaps = [], {}
    for name, sub in terms.groupby("type", sort=False):
        sub = sub.sort_values("n")
        if not symmetric:
            err = sub["sin_err_kj_mol"].to_numpy(float)
            sine = sub["sin_kj_mol"].to_numpy(float)
            if not np.all(np.abs(sine) <= SINE_ZERO_SIGMA * np.nan_to_num(err, nan=0.0)):
                notices.append(f"no Ryckaert-Bellemans form for {name}: its phases are not 0 or 180 deg (sine terms "
                               "beyond their errors); a cosine-only fit (the default: without --sine-terms, "
                               "symmetric=True) has one.")
                continue
            grid = np.radians(np.arange(-180.0, 180.0, 1.0))[:, None] * sub["n"].to_numpy(float)
            gaps[name] = float(np.max(np.abs(np.sin(grid) @ sine)))    # the largest sine part dropped
        a = sub["cos_kj_mol"].to_numpy(float)
        c = ryckaert_bellemans(a, constant=float(np.abs(a).sum()))
        rows.extend({"type": name, "power": m, "coefficient_kj_mol": c[m], "angle_convention": "psi = phi - 180 deg"}
                    for m in range(len(c)))
    if gaps:
        notices.append(f"the Ryckaert-Bellemans form (refit_ryckaert_bellemans.csv) of {', '.join(gaps)} is the "
                       f"cosine part of the fit: the sine terms, within {SINE_ZERO_SIGMA:g} standard errors of zero, "
                       "are dropped there and kept in the periodic terms (refit_terms.csv, refit_fourier.csv, "
                       f"refit_openmm.xml); the two forms differ by up to {max(gaps.values()):.2g} kJ/mol.")
    return pd.DataFrame(rows) if rows else None


def torsion_atoms(result, type_names):
    """Residue name and the four atom names of the first torsion of every type."""
    table = result.torsions
    out = {}
    for name in type_names:
        row = table[table["type"] == name].iloc[0]
        names = str(row.get("atom_names", "") or "").split()
        if len(names) != 4:
            tail = name.split(":", 1)[-1].split("-")
            names = tail if len(tail) == 4 else [f"X{k + 1}" for k in range(4)]
        out[name] = (str(row["resname"]), names)
    return out


def _atom_keys(resname, names, mapping, notices, what):
    """The atom classes (or types: ``what``) of four atoms; the atom names stand in for those not
    given (with a notice)."""
    keys, missing = [], []
    for atom in names:
        key = mapping.get(f"{resname}:{atom}", mapping.get(atom)) if mapping else None
        if key is None:
            missing.append(atom)
            key = atom
        keys.append(str(key))
    if missing and mapping:
        notices.append(f"no atom {what} given for {resname} atom(s) {', '.join(missing)}: the XML fragment uses the "
                       "atom names there; replace them with your force field's.")
    return keys


def _match_key(keys):
    """The atom classes (or types) of a torsion as OpenMM matches a ``<Proper>``: forwards or reversed
    (the torsion angle of A-B-C-D is that of D-C-B-A)."""
    keys = tuple(keys)
    return min(keys, keys[::-1])


def _mapping(atom_classes, atom_types):
    """``(what, plural, mapping)``: match by atom class or by atom type."""
    if atom_classes and atom_types:
        raise DihedraError("give atom classes or atom types for the OpenMM fragment, not both.")
    return ("type", "types", atom_types) if atom_types else ("class", "classes", atom_classes)


def force_field_terms(atoms, atom_classes=None, atom_types=None):
    """Which torsion types are one force-field term.

    Types whose atom classes (or types) coincide, forwards or reversed, are matched by one
    ``<Proper>`` in OpenMM (the first that matches), so they can carry only one correction: such
    types are fitted with shared coefficients. Without atom classes or types every type is a term
    of its own.

    Parameters
    ----------
    atoms : dict
        type -> (residue name, four atom names), from :func:`torsion_atoms`, in the order of the
        types fitted.
    atom_classes, atom_types : dict, optional
        As in :func:`openmm_xml`.

    Returns
    -------
    groups : ndarray of int
        The term of every type (in the order of ``atoms``).
    tied : list of (list of str, str)
        The types that share a term, with their atom classes as written (``CH3-CH2-CH2-CH2``).
    """
    what, _, mapping = _mapping(atom_classes, atom_types)
    names = list(atoms)
    if not mapping:
        return np.arange(len(names)), []
    written = {name: _atom_keys(*atoms[name], mapping, [], what) for name in names}
    keys = {name: _match_key(written[name]) for name in names}
    order = list(dict.fromkeys(keys.values()))
    groups = np.array([order.index(keys[name]) for name in names], dtype=np.int64)
    members = [[n for n in names if keys[n] == key] for key in order]
    return groups, [(m, "-".join(written[m[0]])) for m in members if len(m) > 1]


def _same_terms(one, other):
    cols = ["cos_kj_mol", "sin_kj_mol"]
    a, b = one.sort_values("n")[cols].to_numpy(float), other.sort_values("n")[cols].to_numpy(float)
    return a.shape == b.shape and np.allclose(a, b, rtol=1e-9, atol=1e-12)


def openmm_xml(terms, atoms, atom_classes=None, atom_types=None, comments=(), notices=None):
    """An OpenMM ForceField XML fragment with the correction as ``PeriodicTorsionForce`` terms.

    Parameters
    ----------
    terms : DataFrame
        :func:`terms_table`.
    atoms : dict
        type -> (residue name, four atom names), from :func:`torsion_atoms`.
    atom_classes, atom_types : dict, optional
        Atom name (or ``RESNAME:NAME``) -> atom class (or type) of the force field; the fragment
        matches by class (``class1`` ..) or, with ``atom_types``, by type (``type1`` ..). Without
        either, the atom names stand in (with a comment saying so).
    comments : sequence of str
        Lines for a comment at the top.
    """
    import xml.etree.ElementTree as ET

    notices = [] if notices is None else notices
    what, whats, mapping = _mapping(atom_classes, atom_types)
    root = ET.Element("ForceField")
    lines = list(comments)
    if not mapping:
        lines.append(f"The atom {whats} below are the atom names of the torsions: replace them with your force "
                     f"field's atom {whats} before use.")
    root.append(ET.Comment(" " + " | ".join(lines) + " "))
    force = ET.SubElement(root, "PeriodicTorsionForce")
    by_type = dict(tuple(terms.groupby("type", sort=False)))
    entries, seen = {}, {}   # one <Proper> per pattern of atom classes (forwards or reversed), as OpenMM matches
    for name in by_type:
        keys = _atom_keys(*atoms[name], mapping, notices, what)
        if not mapping and _match_key(keys) in seen:
            notices.append(f"types {seen[_match_key(keys)]} and {name} have the same atom names ({'-'.join(keys)}): "
                           f"where your force field gives them the same atom {whats} too, OpenMM matches both with "
                           f"one <Proper>; fit them as one term by giving the atom {whats} to the fit.")
        seen.setdefault(_match_key(keys), name)
        entries.setdefault(_match_key(keys) if mapping else (name,), []).append((name, keys))
    for group in entries.values():
        (name, keys), others = group[0], group[1:]
        sub = by_type[name]
        differ = [other for other, _ in others if not _same_terms(sub, by_type[other])]
        if differ:
            raise DihedraError(
                f"types {name} and {differ[0]} map onto the same atom {whats} ({'-'.join(keys)}, forwards or "
                f"reversed), so OpenMM would match both with one <Proper> and drop the other's correction; fit them "
                f"as one term (fit_torsion_correction ties types whose atom {whats} coincide: give atom_{whats}= / "
                f"--atom-{whats} to the fit), or give atom {whats} that tell them apart.")
        shared = f" = {', '.join(o for o, _ in others)} (one force-field term: shared coefficients)" if others else ""
        force.append(ET.Comment(f" {name}{shared} "))
        attrib = {f"{what}{k + 1}": keys[k] for k in range(4)}
        for j, row in enumerate(sub.sort_values("n").itertuples(index=False), start=1):
            attrib[f"periodicity{j}"] = str(int(row.n))
            attrib[f"phase{j}"] = f"{np.radians(row.phase_deg):.12g}"
            attrib[f"k{j}"] = f"{row.k_kj_mol:.12g}"
        ET.SubElement(force, "Proper", attrib)
    ET.indent(root, space="  ")
    return '<?xml version="1.0" encoding="utf-8"?>\n' + ET.tostring(root, encoding="unicode") + "\n"
