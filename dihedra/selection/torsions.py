"""Selecting torsions: from a topology to a table of labelled, typed torsions.

A torsion is four atoms A-B-C-D. Every torsion dihedra follows carries

* ``label``: unique within one analysis, residue name and number plus atom names
  (``HEX3:C1-C2-C3-C4``) or plus the angle name (``ALA12:phi``);
* ``type``: shared by torsions that are chemically the same, so results pool over copies of a
  molecule (``HEX:C1-C2-C3-C4``, ``ALA:phi``, ``VAL:chi1``);
* ``group``: the molecule or residue it belongs to; the joint state of the torsions of one group,
  in chain order, is its conformer.

The specifications a user gives (``--torsions SPEC``) are turned into a :class:`TorsionSet` by
:func:`dihedra.selection.specs.select_torsions`.

All functions here are pure: a Universe in, a :class:`TorsionSet` out; nothing reads a trajectory.
"""

from __future__ import annotations

import itertools
import weakref
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from ..errors import SelectionError


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
    variant : str
        The topology's residue name where the type uses another one for it (``HSD`` in a type
        ``HIS:psi``), else empty.
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
    variant: str = ""


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
        ts = self.torsions
        data = {
            "torsion": [t.label for t in ts],
            "type": [t.type for t in ts],
            "atom_indices": [" ".join(map(str, t.indices)) for t in ts],
        }
        if universe is not None:   # (names looked up in a list: an atom group per torsion is slow)
            names = np.asarray(universe.atoms.names, dtype=object).tolist()
            data["atom_names"] = [" ".join([names[i] for i in t.indices]) for t in ts]
        data.update({"resname": [t.resname for t in ts], "variant": [t.variant for t in ts],
                     "resid": [t.resid for t in ts], "segid": [t.segid for t in ts], "name": [t.name for t in ts],
                     "group": [t.group for t in ts], "order": [t.order for t in ts]})
        columns = ["torsion", "type", "atom_indices", "atom_names", "resname", "variant", "resid", "segid",
                   "name", "group", "order"]
        return pd.DataFrame(data, columns=[c for c in columns if universe is not None or c != "atom_names"])

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
                group=str(row.group), order=int(row.order),
                variant=_text(getattr(row, "variant", ""))))
        return cls(torsions)


def _text(value):
    """A table cell as text ('' for a missing one)."""
    return "" if value is None or (isinstance(value, float) and value != value) else str(value)


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
        t = replace_fields(t, name=name or t.name, label=label or t.label, type=ttype or t.type)
    return t


def torsions_from_quads(universe, quads):
    """:class:`Torsion` objects for many index quadruplets at once (see :func:`torsion_from_atoms`).

    Works on the topology's arrays, not atom by atom, so thousands of torsions take milliseconds.
    """
    quads = np.asarray(quads, dtype=np.int64).reshape(-1, 4)
    if len(quads) == 0:
        return []
    atoms = universe.atoms
    # Python lists: looking items up one at a time is several times faster than in arrays
    names = np.asarray(atoms.names, dtype=object).tolist()
    resix = np.asarray(atoms.resindices).tolist()
    resnames, resids, segids = (a.tolist() for a in residue_arrays(universe))
    groups = residue_group_names(universe)
    out = []
    for q in quads.tolist():
        owner = resix[q[1]]
        o_name, o_id = resnames[owner], int(resids[owner])
        if resix[q[0]] == owner and resix[q[2]] == owner and resix[q[3]] == owner:
            joined_label = joined_type = f"{names[q[0]]}-{names[q[1]]}-{names[q[2]]}-{names[q[3]]}"
        else:
            parts_label, parts_type = [], []
            for i in q:
                r = resix[i]
                if r == owner:
                    parts_label.append(names[i])
                    parts_type.append(names[i])
                else:
                    parts_label.append(f"{resnames[r]}{resids[r]}.{names[i]}")
                    parts_type.append(f"{names[i]}({int(resids[r]) - o_id:+d})")
            joined_label, joined_type = "-".join(parts_label), "-".join(parts_type)
        out.append(Torsion(indices=tuple(q), label=f"{o_name}{o_id}:{joined_label}",
                           type=f"{o_name}:{joined_type}", name=joined_type, resname=str(o_name),
                           resid=o_id, segid=str(segids[owner]), group=groups[owner]))
    return out


def replace_fields(t, **changes):
    """A copy of torsion ``t`` with some fields changed (the fields are plain values set by the
    dataclass's own ``__init__``, so copying its ``__dict__`` makes the same object about ten
    times faster than :func:`dataclasses.replace`; thousands are renumbered per selection)."""
    unknown = set(changes) - t.__dict__.keys()
    if unknown:
        raise TypeError(f"Torsion has no field(s) {', '.join(sorted(unknown))}")
    new = object.__new__(Torsion)
    new.__dict__.update(t.__dict__)
    new.__dict__.update(changes)
    return new


def bond_array(universe):
    """Bonds of the topology as an (n, 2) int array, or None when the topology has none.

    Reads the raw bond list of the topology (fast) and falls back to the public API.
    """
    topology = getattr(universe, "_topology", None)
    connection = getattr(topology, "bonds", None)
    values = getattr(connection, "values", None)
    if values is not None:  # fast path: the raw bond list of the topology (pairs, read as one stream)
        bonds = np.fromiter(itertools.chain.from_iterable(values), dtype=np.int64)
        bonds = (bonds if len(bonds) == 2 * len(values) else np.asarray(values, dtype=np.int64)).reshape(-1, 2)
    else:
        try:
            bonds = np.asarray(universe.atoms.bonds.to_indices(), dtype=np.int64).reshape(-1, 2)
        except Exception:  # no bond information
            return None
    return bonds if len(bonds) else None


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


def has_pattern(name):
    """Whether a chosen type name is a shell-style pattern (``*``, ``?`` or ``[``)."""
    return any(ch in str(name) for ch in "*?[")


def expand_type_patterns(names, known, where="types"):
    """``names`` with every shell-style pattern (``'POPE:C2*'``, ``'*:chi1'``; :mod:`fnmatch`)
    replaced by the ``known`` types it matches, in their order; other names as they are, repeats
    dropped. A pattern that matches nothing raises :class:`~dihedra.errors.SelectionError` naming
    ``where``."""
    import fnmatch

    out = []
    for name in names:
        if not has_pattern(name):
            out.append(name)
            continue
        hits = [k for k in known if fnmatch.fnmatchcase(k, str(name))]
        if not hits:
            shown = ", ".join(known[:6]) + (" ..." if len(known) > 6 else "")
            raise SelectionError(f"{where} {name}: no torsion type matches this pattern; the types are {shown} "
                                 "(see torsions.csv).")
        out.extend(hits)
    return list(dict.fromkeys(out))

