r"""The state scheme that the chemistry of a torsion's central bond calls for (``--scheme auto``).

For a torsion A-B-C-D the central bond B-C is classified from the topology alone: the elements, the
bond orders where the topology has them (MOL2, RDKit), else the neighbour counts (hydrogens
included in an all-atom model; in a united-atom model, whose CHx sites carry their hydrogens
implicitly, the masses of the sites or, failing those, the bond lengths of the topology's
coordinates), ring membership, and the symmetry of the substituents of B and C.

Rules (the class of the bond, its scheme, the wells and their source)
---------------------------------------------------------------------
* ``ring`` -- ``klyne-prelog``, flagged: ring closure limits the torsion (about -60..60 in a
  six-membered ring) and couples it to the other ring torsions (Cremer & Pople, J. Am. Chem. Soc.
  97 (1975) 1354); the six Klyne-Prelog sectors describe it without assuming open-chain wells, and
  ``basins`` finds its puckers.
* ``sp`` -- ``symmetric-rotor``: a linear (sp) centre, triple bond or cumulene, has no wells
  (Eliel & Wilen, Stereochemistry of Organic Compounds, Wiley 1994, ch. 10).
* ``amide``, ``ester`` -- ``cis-trans``: C(=O)-N and C(=O)-O (also =S) are partial double bonds,
  planar, with cis and trans wells 180 degrees apart (Pauling, Corey & Branson, PNAS 37 (1951) 205).
* ``double`` -- ``cis-trans``: a C=C or C=N double bond, cis/trans (Z/E) isomers.
* ``sp2-sp2`` -- ``cis-trans``: a single bond between two conjugated sp2 centres has planar
  s-cis/s-trans wells (2-fold; Eliel & Wilen 1994, ch. 10); ``coplanar-perpendicular`` (angle
  modulo 180) when an end has two identical substituents (a phenyl ring).
* ``sp2-sp3`` -- ``klyne-prelog``: six 60-degree sectors, since the wells lie eclipsed (0, +-120:
  propene, acetaldehyde) or staggered (180, +-60) as the substituents decide (Eliel & Wilen 1994,
  ch. 10); ``coplanar-perpendicular`` (2-fold, modulo 180) when the sp2 end has two identical
  substituents (ethylbenzene, Phe chi2); ``staggered-eclipsed:6`` when, besides, the sp3 end has
  three identical groups.
* ``sp3-sp3`` -- ``anti-gauche``: three staggered wells, anti (180) and gauche (+-60) (Eliel &
  Wilen 1994, ch. 10); ``staggered-eclipsed`` when an end carries three identical groups
  (t-butyl): its three staggered wells are equivalent.

A terminal rotor of three identical atoms (CH3, CF3, NH3+) has one distinguishable state whatever
the other end (``symmetric-rotor``; its wells repeat every 120 degrees, or every 60 next to an sp2
centre with two identical substituents as in toluene: a 6-fold rotor). sp3 N, O and S next to an
sp2 or sp centre are conjugated (planar; amide N, ester O, aniline N) and count as sp2 (common
practice). Elements that the rules do not cover (coarse-grained beads, metals) give ``unknown``
with ``anti-gauche`` and a notice. The periodicity and the reason are reported with every torsion
(``dihedra torsions --scheme auto``).

Examples
--------
>>> import MDAnalysis as mda
>>> from dihedra import example_path
>>> from dihedra.selection.specs import select_torsions
>>> u = mda.Universe(example_path("butane_rb.pdb"))
>>> table = classify_torsions(u, select_torsions(u, "rotatable"))
>>> table[["bond", "periodicity", "scheme"]].drop_duplicates().values.tolist()
[['sp3-sp3', 3, 'anti-gauche']]
"""

from __future__ import annotations

import functools

import numpy as np
import pandas as pd

from .rotatable import _bond_graph, _bridges

#: Sources of the rules, as the reasons name them.
EW = "Eliel & Wilen, Stereochemistry of Organic Compounds (1994), ch. 10"
SOURCES = {
    "ring": "Cremer & Pople, J. Am. Chem. Soc. 97 (1975) 1354",
    "amide": "Pauling, Corey & Branson, PNAS 37 (1951) 205",
    "symmetry": "symmetry of the rotor, common practice",
    "conjugation": "common practice",
    "lengths": "typical bond lengths (common practice)",
}

#: Standard atomic masses (g/mol) used to count the hydrogens of a united-atom site.
_MASS = {"C": 12.011, "N": 14.007, "O": 15.999, "S": 32.06}
#: Valences of the elements the rules cover.
_VALENCE = {"H": 1, "C": 4, "N": 3, "O": 2, "S": 2, "P": 3, "F": 1, "CL": 1, "BR": 1, "I": 1}
#: Below these lengths (Angstrom) a bond between two heavy atoms counts as multiple (united-atom
#: sites without hydrogens or masses; C-C 1.54 single, 1.40 aromatic, 1.34 double).
_SHORT = {frozenset("C"): 1.45, frozenset("CN"): 1.40, frozenset("CO"): 1.33, frozenset("N"): 1.35,
          frozenset("CS"): 1.70}

#: Columns of :func:`classify_torsions`.
COLUMNS = ["torsion", "type", "bond", "centres", "periodicity", "scheme", "reason"]


def _elements(universe):
    """Upper-case element of every atom: the topology's elements, else guessed from the names."""
    atoms = universe.atoms
    try:
        el = np.char.upper(np.asarray(atoms.elements, dtype=str))
        if (el != "").all():
            return el
    except Exception:  # noqa: BLE001 - no elements in the topology
        el = None
    names = np.char.upper(np.asarray(atoms.names, dtype=str))
    out = []
    for name in names:
        name = name.lstrip("0123456789")
        if name[:2] in ("CL", "BR"):
            out.append(name[:2])
        elif name[:1] in ("C", "H", "N", "O", "S", "P", "F", "I"):
            out.append(name[:1])
        else:
            out.append("")
    return np.asarray(out)


def _bond_orders(universe):
    """{(i, j): order} of the bonds whose order the topology knows (1, 1.5, 2, 3; 'ar' = 1.5,
    'am' = 1), or ``None`` when it knows none."""
    topology = getattr(universe, "_topology", None)
    bonds = getattr(topology, "bonds", None)
    orders = getattr(bonds, "order", None)
    values = getattr(bonds, "values", None)
    if orders is None or values is None or all(o is None for o in orders):
        return None
    table = {"1": 1.0, "2": 2.0, "3": 3.0, "ar": 1.5, "am": 1.0}
    out = {}
    for (i, j), o in zip(values, orders):
        try:
            v = table.get(str(o).lower(), None) if not isinstance(o, (int, float)) else float(o)
        except (TypeError, ValueError):
            v = None
        if v is not None:
            out[(int(i), int(j))] = out[(int(j), int(i))] = v
    return out or None


class BondGraph:
    """The atoms of a topology as chemistry sees them: neighbours, elements, hydrogens (explicit or
    implicit), hybridisation, conjugation and the symmetry of substituents (memoised per atom)."""

    def __init__(self, universe):
        self.notices = []
        self.adjacency = _bond_graph(universe, self.notices)
        self.element = _elements(universe)
        self.orders = _bond_orders(universe)
        try:
            self.positions = universe.atoms.positions
        except Exception:  # noqa: BLE001 - a topology without coordinates
            self.positions = None
        try:
            self.masses = np.asarray(universe.atoms.masses, dtype=float)
        except Exception:  # noqa: BLE001
            self.masses = np.zeros(len(self.element))
        self.any_hydrogen = bool((self.element == "H").any())
        self._ring_free = None
        # per-graph memories (a cache on the class would keep every graph alive)
        for name in ("implicit_h", "base_hybridisation", "hybridisation", "signature"):
            setattr(self, name, functools.lru_cache(maxsize=None)(getattr(self, name)))

    # -- hydrogens and hybridisation --------------------------------------------------------
    def implicit_h(self, i):
        """Hydrogens a united-atom site carries (0 in an all-atom model); ``None`` if unknown."""
        el = self.element[i]
        if self.any_hydrogen or el not in _MASS:
            return 0
        extra = self.masses[i] - _MASS[el]
        if 0.5 < extra < 4.5:
            return int(round(extra / 1.008))
        return None   # masses guessed from the element: the hydrogens are not recorded

    def _short(self, i, j):
        if self.positions is None:
            return False
        key = frozenset(self.element[i] + self.element[j]) if len(self.element[i] + self.element[j]) == 2 else None
        limit = _SHORT.get(key)
        return limit is not None and float(np.linalg.norm(self.positions[i] - self.positions[j])) < limit

    def base_hybridisation(self, i):
        """``sp3``, ``sp2``, ``sp`` or ``unknown`` from bond orders, else counts, else lengths;
        and how it was found."""
        el, nbrs = self.element[i], self.adjacency[i]
        if el not in _VALENCE:
            return "unknown", "element not covered"
        if self.orders is not None:
            orders = [self.orders.get((i, j), 1.0) for j in nbrs]
            if max(orders, default=1) >= 3 or sum(o == 2 for o in orders) >= 2:
                return "sp", "bond orders"
            if any(o > 1 for o in orders):
                return "sp2", "bond orders"
        h = self.implicit_h(i)
        if h is None:   # united atom without masses: multiple bonds from the bond lengths
            if any(self._short(i, j) for j in nbrs):
                return "sp2", "bond lengths"
            return "sp3", "united atom, saturated" + ("" if self.positions is not None else " (assumed)")
        total = len(nbrs) + h
        missing = _VALENCE[el] + (1 if el in ("N", "S", "P") and total == 4 else 0) - total
        how = "bond orders" if self.orders is not None else "neighbour count"
        if el in ("C", "N") and total <= 2 and missing >= 2:
            return "sp", how
        if missing >= 1:
            return "sp2", how
        return "sp3", how

    def hybridisation(self, i):
        """The base hybridisation, with an sp3 N, O or S next to an sp2 or sp centre counted as a
        conjugated sp2 (amide N, ester O, aniline N)."""
        hyb, how = self.base_hybridisation(i)
        if hyb == "sp3" and self.element[i] in ("N", "O", "S") and len(self.adjacency[i]) <= 3:
            if any(self.base_hybridisation(j)[0] in ("sp2", "sp") and self.element[j] != "H"
                   for j in self.adjacency[i]):
                return "sp2", "conjugated lone pair"
        return hyb, how

    def carbonyl(self, i):
        """Whether atom i is a C double-bonded to a terminal O or S (C=O, C=S)."""
        if self.element[i] != "C" or self.base_hybridisation(i)[0] != "sp2":
            return False
        for j in self.adjacency[i]:
            if self.element[j] in ("O", "S") and len(self.adjacency[j]) == 1:
                if self.orders is None or self.orders.get((i, j), 2.0) >= 2:
                    return True
        return False

    def pi_partners(self, i):
        """Neighbours of an sp2 atom that can share its double bond (sp2 or sp, not a conjugated
        lone pair)."""
        return [j for j in self.adjacency[i] if self.base_hybridisation(j)[0] in ("sp2", "sp")]

    # -- rings and symmetry ----------------------------------------------------------------------
    def in_ring(self, b, c):
        if self._ring_free is None:
            self._ring_free = _bridges(self.adjacency, None)
        return (min(b, c), max(b, c)) not in self._ring_free

    def ring_size(self, b, c, limit=40):
        """Atoms in the smallest ring through bond b-c (breadth-first search without that bond)."""
        seen, frontier = {b: 0}, [b]
        while frontier:
            nxt = []
            for a in frontier:
                for n in self.adjacency[a]:
                    if (a, n) in ((b, c), (c, b)) or n in seen:
                        continue
                    seen[n] = seen[a] + 1
                    if n == c:
                        return seen[n] + 1
                    if seen[n] < limit:
                        nxt.append(n)
            frontier = nxt
        return None

    def signature(self, i, parent, depth=4):
        """A branch as a rooted tree of elements and hydrogen counts, ``depth`` bonds deep: equal
        signatures are equivalent substituents (common practice)."""
        children = () if depth == 0 else tuple(sorted(self.signature(j, i, depth - 1)
                                                      for j in self.adjacency[i] if j != parent))
        return (str(self.element[i]), self.implicit_h(i) or 0, children)

    def substituents(self, end, other):
        return [j for j in self.adjacency[end] if j != other]

    def end_symmetry(self, end, other):
        """``"three atoms"`` (a terminal rotor of three identical atoms), ``"three groups"``, ``"two"``
        (two identical substituents) or ``""``."""
        subs = self.substituents(end, other)
        if self.implicit_h(end) != 0 or len(subs) not in (2, 3):   # a CHx site: H and heavy atoms differ
            return ""
        if len({self.signature(j, end) for j in subs}) != 1:
            return ""
        if len(subs) == 3:
            atoms = all(len(self.adjacency[j]) == 1 and self.implicit_h(j) == 0 for j in subs)
            return "three atoms" if atoms else "three groups"
        return "two"


# ----------------------------------------------------------------------------------------------
# The classes of central bonds and their schemes
# ----------------------------------------------------------------------------------------------

def _centre_text(graph, i):
    hyb, how = graph.hybridisation(i)
    return f"{graph.element[i] or '?'} {hyb} ({how})"


def _rotor(graph, b, c):
    """The symmetric-rotor verdict of a bond, or ``None``: an end that is a terminal rotor of three
    identical atoms (CH3, CF3)."""
    for end, other in ((b, c), (c, b)):
        if graph.end_symmetry(end, other) == "three atoms":
            subs = graph.substituents(end, other)
            group = f"{graph.element[end]}{graph.element[subs[0]].capitalize()}3"
            six = graph.hybridisation(other)[0] == "sp2" and graph.end_symmetry(other, end) == "two"
            fold = 6 if six else 3
            return (fold, "symmetric-rotor",
                    f"terminal {group} rotor of three identical atoms: its {fold} wells are one distinguishable "
                    f"state{' (6-fold: a C3 top on a planar end with two identical substituents)' if six else ''} "
                    f"({SOURCES['symmetry']})")
    return None


def _sp3_sp3(graph, b, c):
    for end, other in ((b, c), (c, b)):
        if graph.end_symmetry(end, other) == "three groups":
            return (3, "staggered-eclipsed", "sp3-sp3 bond with three identical groups on one end: its three "
                    f"staggered wells are equivalent, staggered vs eclipsed ({EW})")
    return (3, "anti-gauche", f"sp3-sp3 bond: three staggered wells, anti (180) and gauche (+-60) ({EW})")


def _sp2_sp3(graph, sp2, sp3):
    if graph.end_symmetry(sp2, sp3) == "two":
        if graph.end_symmetry(sp3, sp2) == "three groups":
            return (6, "staggered-eclipsed:6", "sp2-sp3 bond, two identical substituents on the sp2 end and three "
                    f"on the sp3 end: a 6-fold rotor, staggered vs eclipsed ({SOURCES['symmetry']})")
        return (2, "coplanar-perpendicular", "sp2-sp3 bond whose sp2 end has two identical substituents: the angle "
                f"counts modulo 180; coplanar (0/180) or perpendicular (90/-90) wells ({EW})")
    return (6, "klyne-prelog", "sp2-sp3 bond: wells eclipsed (0, +-120) or staggered (180, +-60) as the "
            f"substituents decide; six 60-degree sectors name both (Klyne & Prelog 1960; {EW})")


def _sp2_sp2(graph, b, c):
    for x, y in ((b, c), (c, b)):
        if graph.carbonyl(x) and graph.element[y] in ("N", "O", "S") and not graph.carbonyl(y):
            kind = "amide" if graph.element[y] == "N" else "ester"
            what = "C(=O)-N" if kind == "amide" else f"C(=O)-{graph.element[y]}"
            return (kind, 2, "cis-trans", f"{kind} {what} bond: partial double bond, planar; cis and trans wells "
                    f"({SOURCES['amide']})")
    order = None if graph.orders is None else graph.orders.get((b, c))
    if order is None:   # the double bond of an sp2 atom is its only possible partner
        unique = any(graph.base_hybridisation(x)[0] == "sp2" and graph.pi_partners(x) == [y]
                     for x, y in ((b, c), (c, b)))
        order = 2.0 if unique and graph.element[b] in ("C", "N") and graph.element[c] in ("C", "N") else 1.0
    if order >= 2:
        if graph.end_symmetry(b, c) == "two" or graph.end_symmetry(c, b) == "two":
            return ("double", 1, "symmetric-rotor", "double bond with two identical substituents on one end (=CH2, "
                    f"=CMe2): its cis and trans are one molecule, one distinguishable state ({EW})")
        return ("double", 2, "cis-trans", f"double bond: cis and trans (Z/E) isomers ({EW})")
    if graph.end_symmetry(b, c) == "two" or graph.end_symmetry(c, b) == "two":
        return ("sp2-sp2", 2, "coplanar-perpendicular", "conjugated single bond between sp2 centres, one end with "
                "two identical substituents (such as a phenyl ring, a guanidinium or a carboxylate): angle modulo "
                f"180, coplanar or perpendicular ({EW})")
    return ("sp2-sp2", 2, "cis-trans", "conjugated single bond between sp2 centres: planar s-cis and s-trans wells "
            f"({EW})")


def classify_bond(graph, b, c):
    """``(bond class, periodicity, scheme name, reason)`` of the central bond b-c (see the module
    notes). The periodicity is the number of wells in a turn (0 for none)."""
    hb, hc = graph.hybridisation(b)[0], graph.hybridisation(c)[0]
    if graph.in_ring(b, c):
        size = graph.ring_size(b, c)
        return ("ring", 0, "klyne-prelog",
                f"ring torsion (a {size}-membered ring): ring closure limits and couples it, so open-chain wells "
                f"do not apply; flagged, named by Klyne-Prelog sectors (use basins for its puckers; "
                f"{SOURCES['ring']})")
    if "sp" in (hb, hc):
        return ("sp", 0, "symmetric-rotor", f"linear (sp) centre, triple bond or cumulene: no torsional wells ({EW})")
    if "unknown" in (hb, hc):
        return ("unknown", 3, "anti-gauche", "hybridisation unknown (an element the rules do not cover, e.g. a "
                "coarse-grained bead): anti-gauche as by default; basins finds the wells from the data")
    rotor = _rotor(graph, b, c)
    if rotor is not None:
        kind = "-".join(sorted((hb, hc)))
        return (kind, *rotor)
    if hb == hc == "sp3":
        return ("sp3-sp3", *_sp3_sp3(graph, b, c))
    if hb == hc == "sp2":
        return _sp2_sp2(graph, b, c)
    sp2, sp3 = (b, c) if hb == "sp2" else (c, b)
    return ("sp2-sp3", *_sp2_sp3(graph, sp2, sp3))


def classify_torsions(universe, tset, graph=None):
    """The bond class, periodicity, scheme and reason of every torsion of ``tset``.

    Returns
    -------
    DataFrame
        :data:`COLUMNS`: ``torsion``, ``type``, ``bond`` (class of the central bond), ``centres``
        (element and hybridisation of B and C, and how they were found), ``periodicity`` (wells per
        turn; 0 for ring bonds and linear centres), ``scheme``, ``reason`` (with its source).
    """
    graph = graph or BondGraph(universe)
    rows = []
    for t in tset.torsions:
        a, b, c, d = (int(x) for x in t.indices)
        kind, fold, scheme, reason = classify_bond(graph, b, c)
        if scheme == "cis-trans" and kind in ("amide", "ester") and _through_carbonyl_oxygen(graph, a, b, c, d):
            # cis/trans name C-C(=O)-X-C; through the O the same angle is 180 degrees further
            scheme, reason = "cis-trans-o", reason + "; measured through the carbonyl O, so near 0 is trans"
        rows.append((t.label, t.type, kind, f"{_centre_text(graph, b)} - {_centre_text(graph, c)}", int(fold),
                     scheme, reason))
    return pd.DataFrame(rows, columns=COLUMNS)


def _through_carbonyl_oxygen(graph, a, b, c, d):
    """Whether the torsion a-b-c-d takes the terminal O of a carbonyl centre (b or c) as its outer
    atom on that side."""
    return any(graph.carbonyl(centre) and graph.element[outer] in ("O", "S") and len(graph.adjacency[outer]) == 1
               for outer, centre in ((a, b), (d, c)))


def schemes_by_type(table):
    """The scheme of each torsion type: that of its torsions, or, where they disagree (atoms named
    alike but bonded differently), that of most of them, with a notice.

    Returns
    -------
    choices : dict
        type -> (scheme name, reason)
    notices : list of str
    """
    choices, notices = {}, []
    for ttype, rows in table.groupby("type", sort=False):
        counts = rows["scheme"].value_counts()
        top = counts.index[0]
        reason = rows.loc[rows["scheme"] == top, "reason"].iloc[0]
        if len(counts) > 1:
            notices.append(f"the torsions of type {ttype} fall into different classes ({', '.join(counts.index)}); "
                           f"the type follows {top}, the scheme of most of them.")
        choices[ttype] = (top, reason)
    flagged = table[table["bond"] == "ring"]
    if len(flagged):
        notices.append(f"{len(flagged)} torsion(s) of {flagged['type'].nunique()} type(s) lie in rings (e.g. "
                       f"{flagged['torsion'].iloc[0]}): flagged, with Klyne-Prelog sectors; ring torsions are coupled "
                       "to each other, and basins describes their puckers better.")
    unknown = table[table["bond"] == "unknown"]
    if len(unknown):
        notices.append(f"{len(unknown)} torsion(s) have atoms of unknown chemistry (e.g. {unknown['torsion'].iloc[0]}): "
                       "anti-gauche as by default; consider --scheme basins.")
    return choices, notices
