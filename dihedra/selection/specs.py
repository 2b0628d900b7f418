"""Torsion specifications: from the strings a user gives (``--torsions SPEC``) to a
:class:`~dihedra.selection.torsions.TorsionSet`.

``A,B,C,D``
    four 0-based atom indices.
``rotatable``
    one torsion per rotatable bond of the bond graph (see :mod:`dihedra.selection.rotatable`).
``protein-backbone``, ``protein-sidechains``, ``nucleic-backbone``
    IUPAC-IUB definitions (see :mod:`dihedra.selection.biopolymer`).
``FILE.toml``
    named torsions (see :func:`torsions_from_toml`).
"""

from __future__ import annotations

import os
import re

import numpy as np
from MDAnalysis.exceptions import NoDataError

from ..errors import SelectionError, read_toml
from .rotatable import rotatable_torsions
from .torsions import Torsion, TorsionSet, bond_array, replace_fields, torsion_from_atoms, torsions_from_quads

#: Named specifications.
NAMED_SPECS = ("rotatable", "protein-backbone", "protein-sidechains", "nucleic-backbone")

_INDEX_SPEC = re.compile(r"^\s*-?\d+\s*,\s*-?\d+\s*,\s*-?\d+\s*,\s*-?\d+\s*$")


def _check_indices(universe, indices, where="torsion"):
    """Check four atom indices: whole numbers (not text, not 1.7), in range, all different."""
    n_atoms = universe.atoms.n_atoms
    if isinstance(indices, (str, bytes)) or not hasattr(indices, "__len__"):
        raise SelectionError(f"{where}: atoms must be a list of four whole numbers; got {indices!r}.")
    if len(indices) != 4:
        raise SelectionError(f"{where}: a torsion needs exactly 4 atoms; got {len(indices)}.")
    for i in indices:
        if isinstance(i, bool) or not isinstance(i, (int, np.integer)):
            raise SelectionError(f"{where}: atom indices must be whole numbers (0-based); got {i!r} in "
                                 f"{list(indices)}.")
        if i < 0 or i >= n_atoms:
            raise SelectionError(
                f"{where}: atom index {i} is out of range; the topology has {n_atoms} atoms "
                f"(valid indices 0..{n_atoms - 1}).")
    if len(set(indices)) != 4:
        raise SelectionError(f"{where}: atoms must all differ; got repeated atoms in {list(indices)}.")
    return tuple(int(i) for i in indices)


def torsions_from_indices(universe, spec):
    """The ``A,B,C,D`` specification."""
    indices = [int(x) for x in spec.split(",")]
    indices = _check_indices(universe, indices, where=f"torsions {spec!r}")
    return TorsionSet([torsion_from_atoms(universe, indices)])


def torsions_from_toml(universe, path):
    """Named torsions from a TOML file.

    Each ``[[torsion]]`` table has a ``name`` and either ``atoms`` (four 0-based indices) or
    ``selection`` (an MDAnalysis selection string that must give exactly four atoms, taken in
    the order A, B, C, D of increasing index unless ``atoms_order`` is given as a list of four
    selection strings). An optional ``type`` names the chemical type (default: derived from the
    residue and atom names, so equivalent torsions in different molecules pool).

    Example::

        [[torsion]]
        name = "backbone-1"
        atoms = [0, 1, 2, 3]

        [[torsion]]
        name = "ring-link"
        selection = ["resid 1 and name C1", "resid 1 and name C2",
                     "resid 1 and name C3", "resid 1 and name C4"]
    """
    data = read_toml(path, "torsion file", SelectionError)
    entries = data.get("torsion")
    unknown = sorted(set(data) - {"torsion"})
    if unknown:
        raise SelectionError(f"torsion file {path}: unknown key(s) {', '.join(unknown)}; "
                             "the file holds [[torsion]] tables only.")
    if not entries:
        raise SelectionError(f"torsion file {path} has no [[torsion]] tables.")
    torsions, wanted = [], []
    for k, entry in enumerate(entries, start=1):
        where = f"{path}, torsion {k}"
        allowed = {"name", "atoms", "selection", "type"}
        bad = sorted(set(entry) - allowed)
        if bad:
            raise SelectionError(f"{where}: unknown key(s) {', '.join(bad)}; valid keys are "
                                 f"{', '.join(sorted(allowed))}.")
        name = entry.get("name")
        if not name:
            raise SelectionError(f"{where}: every torsion needs a name.")
        where = f"{path}, torsion {name!r}"
        if ("atoms" in entry) == ("selection" in entry):
            raise SelectionError(f"{where}: give either 'atoms' (four indices) or 'selection'.")
        if "atoms" in entry:
            indices = _check_indices(universe, entry["atoms"], where=where)
        else:
            indices = _indices_from_selection(universe, entry["selection"], where)
        wanted.append((indices, str(name), entry.get("type")))
    # (labels and types of every entry from the topology's arrays at once: one by one, each entry
    # would read the names of every atom again)
    bases = torsions_from_quads(universe, np.asarray([w[0] for w in wanted], dtype=np.int64))
    for base, (_, name, ttype) in zip(bases, wanted):
        torsions.append(Torsion(indices=base.indices, label=name, type=ttype or base.type, name=name,
                                resname=base.resname, resid=base.resid, segid=base.segid, group=base.group))
    return TorsionSet(torsions)


def _indices_from_selection(universe, selection, where):
    if isinstance(selection, str):
        parts = [selection]
    else:
        parts = list(selection)
    atoms = []
    for sel in parts:
        try:
            group = universe.select_atoms(sel)
        except Exception as exc:  # MDAnalysis raises several types for bad selections
            raise SelectionError(f"{where}: selection {sel!r} is invalid: {exc}.") from None
        if len(parts) == 4 and group.n_atoms != 1:
            raise SelectionError(f"{where}: selection {sel!r} must give exactly one atom; "
                                 f"it gives {group.n_atoms}.")
        atoms.extend(int(i) for i in group.indices)
    if len(parts) != 4 and len(atoms) != 4:
        raise SelectionError(f"{where}: selection {selection!r} must give exactly four atoms; "
                             f"it gives {len(atoms)}.")
    return _check_indices(universe, atoms, where=where)


def select_torsions(universe, specs, *, keep_variants=False):
    """Select torsions by one or more specifications.

    Parameters
    ----------
    universe : MDAnalysis.Universe
    specs : str or list of str
        ``A,B,C,D``, a named specification (:data:`NAMED_SPECS`) or a TOML file path.
    keep_variants : bool
        Protein and nucleic-acid torsions: type them by the topology's residue name (``HSD:psi``,
        ``HSE:psi``) instead of the residue they are a force-field variant of (``HIS:psi``, the
        default, so that results of two force fields pool and compare); ``torsions.csv`` names the
        variant either way.

    Returns
    -------
    TorsionSet
        The torsions in the order of the specifications, duplicates (the same four atoms in
        either direction) removed with a notice, labels made unique.
    """
    if isinstance(specs, str):
        specs = [specs]
    if not specs:
        raise SelectionError("no torsions chosen; give --torsions with one of "
                             f"{', '.join(NAMED_SPECS)}, A,B,C,D or a .toml file.")
    result = TorsionSet()
    for spec in specs:
        spec = str(spec).strip()
        try:
            part = _select_one(universe, spec, keep_variants)
        except NoDataError as exc:   # a topology without names, residues or bonds
            raise SelectionError(f"torsions {spec!r}: the topology lacks what this needs ({exc}); give a topology "
                                 "with atom names and bonds (PDB with CONECT, PSF, TPR, PRMTOP, ...).") from None
        if _INDEX_SPEC.match(spec) or spec.lower().endswith(".toml"):   # (the others follow bonds)
            part.notices.extend(_unbonded_notice(universe, part.torsions, spec))
        result.torsions.extend(part.torsions)
        result.notices.extend(part.notices)
    result = _deduplicate(result)
    if not result.torsions:
        why = "; ".join(n.rstrip(".") for n in result.notices[:2]) + (f"; and {len(result.notices) - 2} more like these"
                                               if len(result.notices) > 2 else "")
        raise SelectionError(f"the specification(s) {', '.join(specs)} select no torsions in this "
                             "topology" + (f": {why}." if why else "."))
    return _assign_order(result)


def _unbonded_notice(universe, torsions, spec):
    """A notice for torsions given by atoms that are not a chain of bonds A-B, B-C, C-D (when the
    topology has bonds): an improper torsion or atoms of two molecules may be meant, or a typo."""
    bonds = bond_array(universe)
    if bonds is None or not len(bonds) or not torsions:
        return []
    n = universe.atoms.n_atoms
    keys = np.unique(np.concatenate([bonds[:, 0] * n + bonds[:, 1], bonds[:, 1] * n + bonds[:, 0]]))
    quads = np.asarray([t.indices for t in torsions], dtype=np.int64)
    pairs = np.stack([quads[:, k] * n + quads[:, k + 1] for k in range(3)], axis=1)
    loose = ~np.isin(pairs, keys).all(axis=1)
    if not loose.any():
        return []
    first = torsions[int(np.argmax(loose))]
    return [f"torsions {spec!r}: {int(loose.sum())} torsion(s) are not a chain of bonded atoms A-B-C-D in the "
            f"topology (e.g. {first.label}, atoms {' '.join(map(str, first.indices))}): they are measured as "
            "given (an improper torsion, or atoms of different molecules, measure something else than a "
            "rotation about a bond); check the atoms and their order."]


def _select_one(universe, spec, keep_variants=False):
    """The torsions of one specification."""
    if _INDEX_SPEC.match(spec):
        part = torsions_from_indices(universe, spec)
    elif spec == "rotatable":
        part = rotatable_torsions(universe)
    elif spec in ("protein-backbone", "protein-sidechains", "nucleic-backbone"):
        from . import biopolymer   # (imported for these specifications only)

        part = {"protein-backbone": biopolymer.protein_backbone_torsions,
                "protein-sidechains": biopolymer.protein_sidechain_torsions,
                "nucleic-backbone": biopolymer.nucleic_backbone_torsions}[spec](universe, keep_variants=keep_variants)
    elif spec.lower().endswith(".toml"):
        if not os.path.exists(spec):
            raise SelectionError(f"torsion file {spec} does not exist.")
        part = torsions_from_toml(universe, spec)
    else:
        raise SelectionError(
            f"unknown torsion specification {spec!r}; use one of {', '.join(NAMED_SPECS)}, "
            "four comma-separated atom indices (e.g. 0,1,2,3) or a .toml file.")
    return part


def _deduplicate(tset):
    seen = {}
    kept = []
    notices = list(tset.notices)
    for t in tset.torsions:
        key = tuple(t.indices) if t.indices[1] < t.indices[2] else tuple(reversed(t.indices))
        if key in seen:
            notices.append(f"torsion {t.label} repeats {seen[key]} (same atoms); kept once.")
            continue
        seen[key] = t.label
        kept.append(t)
    # unique labels: add the segment, then a counter
    counts = {}
    for t in kept:
        counts[t.label] = counts.get(t.label, 0) + 1
    out = []
    used = set()
    for t in kept:
        label = t.label
        tag = f"{t.resname}{t.resid}"
        if counts[label] > 1 and label.startswith(tag + ":") and t.group and t.group != tag:
            label = t.group + label[len(tag):]  # the unique residue name: A:ALA12:phi, HEX3#2:C1-...
        base, n = label, 1
        while label in used:
            n += 1
            label = f"{base}#{n}"
        used.add(label)
        out.append(t if label == t.label else replace_fields(t, label=label))
    return TorsionSet(out, notices)


#: Canonical order of named biopolymer angles within a residue (conformer labels follow it).
NAME_RANK = {name: rank for rank, name in enumerate(
    ["phi", "psi", "omega", "chi1", "chi2", "chi3", "chi4", "chi5",
     "alpha", "beta", "gamma", "delta", "epsilon", "zeta", "chi"])}


def _assign_order(tset):
    """Number the torsions of each group along the chain.

    Named biopolymer angles follow :data:`NAME_RANK` (phi, psi, omega, chi1, ...); other torsions
    follow the atom indices of their central bond, which for a molecule numbered along its chain
    is the chain order.
    """
    by_group = {}
    for pos, t in enumerate(tset.torsions):
        by_group.setdefault(t.group, []).append(pos)
    torsions = list(tset.torsions)
    last = len(NAME_RANK)
    keys = [(NAME_RANK.get(t.name, last), min(t.indices[1], t.indices[2]), max(t.indices[1], t.indices[2]), p)
            for p, t in enumerate(torsions)]
    for group, positions in by_group.items():
        ranked = sorted(positions, key=keys.__getitem__)
        for order, p in enumerate(ranked):
            if torsions[p].order != order:
                torsions[p] = replace_fields(torsions[p], order=order)
    return TorsionSet(torsions, tset.notices)
