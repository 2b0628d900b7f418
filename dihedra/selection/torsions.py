"""Selecting torsions: from a topology to a table of labelled, typed torsions.

A torsion is four atoms A-B-C-D. Every torsion dihedra follows carries

* ``label``: unique within one analysis, residue name and number plus atom names
  (``HEX3:C1-C2-C3-C4``) or plus the angle name (``ALA12:phi``);
* ``type``: shared by torsions that are chemically the same, so results pool over copies of a
  molecule (``HEX:C1-C2-C3-C4``, ``ALA:phi``, ``VAL:chi1``);
* ``group``: the molecule or residue it belongs to; the joint state of the torsions of one group,
  in chain order, is its conformer.

Specifications (``--torsions SPEC``, repeatable; the same strings in :func:`select_torsions`):

``A,B,C,D``
    four 0-based atom indices.
``rotatable``
    one torsion per rotatable bond of the bond graph (see :mod:`dihedra.selection.rotatable`).
``protein-backbone``, ``protein-sidechains``, ``nucleic-backbone``
    IUPAC-IUB definitions (see :mod:`dihedra.selection.biopolymer`).
``FILE.toml``
    named torsions (see :func:`torsions_from_toml`).

All functions here are pure: a Universe in, a :class:`TorsionSet` out; nothing reads a trajectory.
"""

from __future__ import annotations

import os
import re
import tomllib
import weakref
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from ..errors import SelectionError

#: Named specifications, with the module function that implements each (resolved lazily).
NAMED_SPECS = ("rotatable", "protein-backbone", "protein-sidechains", "nucleic-backbone")


@dataclass(frozen=True)
class Torsion:
    """One torsion A-B-C-D of a topology.

    Attributes
    ----------
    indices : tuple of 4 int
        0-based atom indices A, B, C, D.
    label : str
        Unique label, e.g. ``ALA12:phi`` or ``HEX3:C1-C2-C3-C4``.
    type : str
        Chemical type shared by equivalent torsions, e.g. ``ALA:phi``.
    name : str
        Angle name within its residue (``phi``, ``chi1``) or the joined atom names.
    resname, resid, segid : str, int, str
        Residue that owns the torsion (for backbone angles, the residue of atoms B and C).
    group : str
        Molecule or residue whose torsions form one conformer (e.g. ``HEX3``, ``A:ALA12``).
    order : int
        Position of the torsion along the chain of its group (conformer labels follow it).
    """

    indices: tuple
    label: str
    type: str
    name: str
    resname: str
    resid: int
    segid: str = ""
    group: str = ""
    order: int = 0


@dataclass
class TorsionSet:
    """An ordered collection of torsions plus the notices produced while selecting them.

    Attributes
    ----------
    torsions : list of Torsion
    notices : list of str
        Human-readable notes (skipped residues, guessed bonds, removed duplicates).
    """

    torsions: list = field(default_factory=list)
    notices: list = field(default_factory=list)

    def __len__(self):
        return len(self.torsions)

    def __iter__(self):
        return iter(self.torsions)

    @property
    def indices(self):
        """Atom indices, array of shape (n_torsions, 4), dtype int64."""
        if not self.torsions:
            return np.empty((0, 4), dtype=np.int64)
        return np.array([t.indices for t in self.torsions], dtype=np.int64)

    @property
    def labels(self):
        return [t.label for t in self.torsions]

    @property
    def types(self):
        return [t.type for t in self.torsions]

    def to_frame(self, universe=None):
        """The torsion table as a tidy DataFrame (the layout of ``torsions.csv``)."""
        rows = []
        for t in self.torsions:
            row = {
                "torsion": t.label,
                "type": t.type,
                "atom_indices": " ".join(str(i) for i in t.indices),
                "resname": t.resname,
                "resid": t.resid,
                "segid": t.segid,
                "name": t.name,
                "group": t.group,
                "order": t.order,
            }
            if universe is not None:
                row["atom_names"] = " ".join(universe.atoms[list(t.indices)].names)
            rows.append(row)
        columns = ["torsion", "type", "atom_indices", "atom_names", "resname", "resid", "segid",
                   "name", "group", "order"]
        frame = pd.DataFrame(rows, columns=[c for c in columns if universe is not None or c != "atom_names"])
        return frame

    @classmethod
    def from_frame(cls, frame):
        """Rebuild a TorsionSet from the table written by :meth:`to_frame`."""
        torsions = []
        for row in frame.itertuples(index=False):
            torsions.append(Torsion(
                indices=tuple(int(i) for i in str(row.atom_indices).split()),
                label=str(row.torsion), type=str(row.type), name=str(row.name),
                resname=str(row.resname), resid=int(row.resid),
                segid="" if pd.isna(row.segid) else str(row.segid),
                group=str(row.group), order=int(row.order)))
        return cls(torsions)


# --------------------------------------------------------------------------------------------
# labels and types from atoms
# --------------------------------------------------------------------------------------------

def residue_tag(atom):
    """``RESNAME`` + ``RESID`` of an atom, e.g. ``HEX3``."""
    return f"{atom.resname}{atom.resid}"


def torsion_from_atoms(universe, indices, name=None, label=None, ttype=None):
    """Build a :class:`Torsion` from four atom indices, deriving label, type and group.

    The owning residue is that of atom B. Atom names from other residues carry their residue
    offset in the type (``ALA:C(-1)-N-CA-C``) and their residue tag in the label.
    """
    (t,) = torsions_from_quads(universe, np.asarray([indices], dtype=np.int64))
    if name or label or ttype:
        t = _replace(t, name=name or t.name, label=label or t.label, type=ttype or t.type)
    return t


def torsions_from_quads(universe, quads):
    """:class:`Torsion` objects for many index quadruplets at once (see :func:`torsion_from_atoms`).

    Works on the topology's arrays, not atom by atom, so thousands of torsions take milliseconds.
    """
    quads = np.asarray(quads, dtype=np.int64).reshape(-1, 4)
    if len(quads) == 0:
        return []
    atoms = universe.atoms
    names = np.asarray(atoms.names, dtype=object)
    resix = np.asarray(atoms.resindices)
    resnames, resids, segids = residue_arrays(universe)
    groups = residue_group_names(universe)
    out = []
    for q in quads.tolist():
        owner = resix[q[1]]
        o_name, o_id = resnames[owner], int(resids[owner])
        parts_label, parts_type = [], []
        for i in q:
            r = resix[i]
            if r == owner:
                parts_label.append(names[i])
                parts_type.append(names[i])
            else:
                parts_label.append(f"{resnames[r]}{resids[r]}.{names[i]}")
                parts_type.append(f"{names[i]}({int(resids[r]) - o_id:+d})")
        joined_type = "-".join(parts_type)
        out.append(Torsion(indices=tuple(q), label=f"{o_name}{o_id}:{'-'.join(parts_label)}",
                           type=f"{o_name}:{joined_type}", name=joined_type, resname=str(o_name),
                           resid=o_id, segid=str(segids[owner]), group=groups[owner]))
    return out


def bond_array(universe):
    """Bonds of the topology as an (n, 2) int array, or None when the topology has none.

    Reads the raw bond list of the topology (fast) and falls back to the public API.
    """
    topology = getattr(universe, "_topology", None)
    connection = getattr(topology, "bonds", None)
    values = getattr(connection, "values", None)
    if values is not None:  # fast path: the raw bond list of the topology
        bonds = np.asarray(values, dtype=np.int64).reshape(-1, 2)
    else:
        try:
            bonds = np.asarray(universe.atoms.bonds.to_indices(), dtype=np.int64).reshape(-1, 2)
        except Exception:  # no bond information
            return None
    return bonds if len(bonds) else None


def _segid(atom):
    try:
        return str(atom.segid)
    except (AttributeError, Exception):  # topologies without segments
        return ""


_GROUP_NAMES = weakref.WeakKeyDictionary()


def residue_arrays(universe):
    """Residue names, numbers and segment names of every residue (by ``ix``) as arrays."""
    res = universe.residues
    resnames = np.asarray(res.resnames, dtype=object)
    resids = np.asarray(res.resids)
    try:
        segids = np.asarray(res.segids, dtype=object)
    except Exception:  # no segments attribute
        segids = np.full(len(res), "", dtype=object)
    return resnames, resids, segids


def residue_group_names(universe):
    """Conformer group name of every residue (indexed by residue ``ix``).

    ``RESNAME`` + ``RESID``, prefixed by the segment when the topology has several; residues that
    would share a name (copies merged without renumbering, residue numbers that wrap at 10,000 in
    PDB or GRO files) get ``#2``, ``#3``, ... in the order they appear, so every group is one molecule.
    """
    names = _GROUP_NAMES.get(universe)
    if names is not None:
        return names
    resnames, resids, segids = residue_arrays(universe)
    multi = len(universe.segments) > 1
    names, seen = [], {}
    for seg, rn, ri in zip(segids, resnames, resids):
        base = f"{seg}:{rn}{ri}" if multi and seg else f"{rn}{ri}"
        seen[base] = seen.get(base, 0) + 1
        names.append(base if seen[base] == 1 else f"{base}#{seen[base]}")
    _GROUP_NAMES[universe] = names
    return names


def molecule_group(atom):
    """Conformer group of an atom: its residue (see :func:`residue_group_names`)."""
    return residue_group_names(atom.universe)[atom.residue.ix]


# --------------------------------------------------------------------------------------------
# specifications
# --------------------------------------------------------------------------------------------

_INDEX_SPEC = re.compile(r"^\s*-?\d+\s*,\s*-?\d+\s*,\s*-?\d+\s*,\s*-?\d+\s*$")


def check_indices(universe, indices, where="torsion"):
    """Check four atom indices: integers, in range, all different."""
    n_atoms = universe.atoms.n_atoms
    if len(indices) != 4:
        raise SelectionError(f"{where}: a torsion needs exactly 4 atoms; got {len(indices)}.")
    for i in indices:
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
    indices = check_indices(universe, indices, where=f"--torsions {spec}")
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
    try:
        with open(path, "rb") as fh:
            data = tomllib.load(fh)
    except OSError as exc:
        raise SelectionError(f"cannot read torsion file {path}: {exc.strerror}.") from None
    except tomllib.TOMLDecodeError as exc:
        raise SelectionError(f"torsion file {path} is not valid TOML: {exc}.") from None
    entries = data.get("torsion")
    unknown = sorted(set(data) - {"torsion"})
    if unknown:
        raise SelectionError(f"torsion file {path}: unknown key(s) {', '.join(unknown)}; "
                             "the file holds [[torsion]] tables only.")
    if not entries:
        raise SelectionError(f"torsion file {path} has no [[torsion]] tables.")
    torsions = []
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
            indices = check_indices(universe, list(entry["atoms"]), where=where)
        else:
            indices = _indices_from_selection(universe, entry["selection"], where)
        base = torsion_from_atoms(universe, indices, ttype=entry.get("type"))
        torsions.append(Torsion(indices=base.indices, label=str(name), type=base.type,
                                name=str(name), resname=base.resname, resid=base.resid,
                                segid=base.segid, group=base.group))
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
    return check_indices(universe, atoms, where=where)


def select_torsions(universe, specs):
    """Select torsions by one or more specifications.

    Parameters
    ----------
    universe : MDAnalysis.Universe
    specs : str or list of str
        ``A,B,C,D``, a named specification (:data:`NAMED_SPECS`) or a TOML file path.

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
        if _INDEX_SPEC.match(spec):
            part = torsions_from_indices(universe, spec)
        elif spec == "rotatable":
            from .rotatable import rotatable_torsions  # local: it imports this module
            part = rotatable_torsions(universe)
        elif spec in ("protein-backbone", "protein-sidechains", "nucleic-backbone"):
            from . import biopolymer
            part = {"protein-backbone": biopolymer.protein_backbone_torsions,
                    "protein-sidechains": biopolymer.protein_sidechain_torsions,
                    "nucleic-backbone": biopolymer.nucleic_backbone_torsions}[spec](universe)
        elif spec.lower().endswith(".toml"):
            if not os.path.exists(spec):
                raise SelectionError(f"torsion file {spec} does not exist.")
            part = torsions_from_toml(universe, spec)
        else:
            raise SelectionError(
                f"unknown torsion specification {spec!r}; use one of {', '.join(NAMED_SPECS)}, "
                "four comma-separated atom indices (e.g. 0,1,2,3) or a .toml file.")
        result.torsions.extend(part.torsions)
        result.notices.extend(part.notices)
    result = _deduplicate(result)
    if not result.torsions:
        raise SelectionError(f"the specification(s) {', '.join(specs)} select no torsions in this "
                             "topology." + (" " + " ".join(result.notices) if result.notices else ""))
    return _assign_order(result)


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
        out.append(t if label == t.label else _replace(t, label=label))
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
    for group, positions in by_group.items():
        ranked = sorted(positions, key=lambda p: (NAME_RANK.get(torsions[p].name, len(NAME_RANK)),
                                                  min(torsions[p].indices[1:3]),
                                                  max(torsions[p].indices[1:3]), p))
        for order, p in enumerate(ranked):
            if torsions[p].order != order:
                torsions[p] = _replace(torsions[p], order=order)
    return TorsionSet(torsions, tset.notices)


def _replace(t, **changes):
    """A copy of a torsion with some fields changed (faster than dataclasses.replace)."""
    fields = {"indices": t.indices, "label": t.label, "type": t.type, "name": t.name,
              "resname": t.resname, "resid": t.resid, "segid": t.segid, "group": t.group,
              "order": t.order}
    fields.update(changes)
    return Torsion(**fields)
