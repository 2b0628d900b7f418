"""State schemes: named sectors of the torsion circle, and the assignment of angles to states.

A scheme cuts the circle (-180, 180] into arcs; every arc carries a state label, and several arcs
may share one (the three staggered arcs of a three-fold rotor are one state, ``staggered``).
Assignment is a vectorised search over the arc boundaries; an undefined angle (NaN) gets the code
:data:`UNDEFINED` (-1). State codes are small integers (``int8``) in the order of
:attr:`StateScheme.labels`.

Built-in schemes (state labels exactly as written):

``anti-gauche``
    ``anti`` (\\|phi\\| > 120), ``gauche+`` (0 < phi <= 120), ``gauche-`` (-120 <= phi <= 0).
``staggered-eclipsed`` (``staggered-eclipsed:N`` for an N-fold rotor, default N = 3)
    ``staggered`` within 180/(2N) degrees (inclusive) of a staggered position 180 + k 360/N,
    ``eclipsed`` otherwise.
``klyne-prelog``
    the IUPAC sectors ``sp`` (0 +- 30), ``+sc`` (30..90), ``+ac`` (90..150), ``ap`` (150..180 and
    -150..-180), ``-ac``, ``-sc`` (Klyne & Prelog, Experientia 16 (1960) 521). IUPAC does not fix
    which sector owns a boundary; dihedra gives +-30 to ``sp``, +-90 to ``+-ac`` and +-150 to ``ap``.

``cis-trans``
    ``trans`` (\\|omega\\| >= 90) and ``cis``, for a peptide omega or any planar torsion.
``coplanar-perpendicular``
    ``0/180`` (\\|phi\\| <= 45 or > 135) and ``90/-90``: a torsion about a bond to a planar end with two
    identical substituents (a phenyl ring, a carboxylate), whose angle is defined modulo 180.
``symmetric-rotor``
    one state, ``rotor``, on the whole circle: a rotor whose wells are indistinguishable (a
    methyl or CF3 group: three identical atoms).
``auto`` and ``basins`` (chosen per torsion type; :mod:`dihedra.selection.choice`)
    from the chemistry of the central bond (:mod:`dihedra.selection.chemistry`), or from the
    sampled distribution (:mod:`dihedra.trajectory.basins`).
``chi-rotamers`` and ``protein`` (sets of schemes, :class:`SchemeSet`)
    side-chain rotamer wells: ``g+``/``t``/``g-`` for chi about an sp3-sp3 bond, ``0``/``+90``/
    ``180``/``-90`` for His and Trp chi2, Asn chi2 and Gln chi3, ``0/180``/``90/-90`` for the
    symmetric Phe and Tyr chi2, Asp chi2 and Glu chi3; ``protein`` adds ``cis-trans`` for omega and
    ``anti-gauche`` for the other torsions (phi, psi, nucleic-acid angles, ligands).

Custom schemes come from a TOML file (:func:`scheme_from_toml`) of named circular intervals
(``from_deg``, ``to_deg``], each open at its start and closed at its end, wrapping through 180
allowed; together they must cover the circle exactly once.

The same scheme gives transition-based (core-set) states through :meth:`StateScheme.core_codes`:
every arc shrunk by a margin on both sides; angles outside every core get :data:`NO_CORE`.
"""

from __future__ import annotations

import functools
from dataclasses import dataclass

import numpy as np

from ..errors import SchemeError, read_toml
from ..units import wrap_deg
from .arcs import checked_arcs

#: State code of an undefined torsion (collinear atoms, NaN coordinates).
UNDEFINED = -1
#: Core code of an angle that lies outside every core (see :meth:`StateScheme.core_codes`).
NO_CORE = -2

BUILTIN_SCHEMES = ("anti-gauche", "staggered-eclipsed", "klyne-prelog", "cis-trans", "coplanar-perpendicular",
                   "symmetric-rotor", "syn-anti", "sugar-pucker", "chi-rotamers", "protein", "nucleic")
#: Schemes chosen per torsion type when the torsions are known (see :mod:`dihedra.selection.choice`).
CHOSEN_SCHEMES = ("auto", "basins")


@dataclass(frozen=True)
class StateScheme:
    """A partition of the torsion circle into labelled arcs.

    Parameters
    ----------
    name : str
        Name of the scheme (``anti-gauche`` or the name given in a TOML file).
    labels : tuple of str
        State labels; the state code of ``labels[k]`` is ``k``.
    boundaries_deg : tuple of float
        Arc starts in degrees, strictly increasing, within (-180, 180]. Arc ``k`` runs from
        ``boundaries_deg[k]`` to ``boundaries_deg[k+1]`` (the last arc wraps to the first).
    arc_states : tuple of int
        State code of each arc.
    start_closed : tuple of bool
        Whether arc ``k`` owns its start boundary (else the previous arc owns it).
    """

    name: str
    labels: tuple
    boundaries_deg: tuple
    arc_states: tuple
    start_closed: tuple
    partial: bool = False

    def __post_init__(self):
        b = np.asarray(self.boundaries_deg, dtype=float)
        n = len(b)
        if n == 0:
            raise SchemeError(f"scheme {self.name!r} has no states.")
        if len(self.arc_states) != n or len(self.start_closed) != n:
            raise SchemeError(f"scheme {self.name!r}: one state and one ownership flag per arc needed.")
        if np.any(np.diff(b) <= 0) or b[0] <= -180 or b[-1] > 180:
            raise SchemeError(f"scheme {self.name!r}: arc boundaries must increase within (-180, 180]; "
                              f"got {list(b)}.")
        if len(set(self.labels)) != len(self.labels):
            raise SchemeError(f"scheme {self.name!r}: state labels must be unique; got {list(self.labels)}.")
        if len(self.labels) > 127:
            raise SchemeError(f"scheme {self.name!r} has {len(self.labels)} states; at most 127 are allowed.")
        used = set(int(s) for s in self.arc_states)
        if used != set(range(len(self.labels))) and not (self.partial and used <= set(range(len(self.labels)))):
            raise SchemeError(f"scheme {self.name!r}: every state needs at least one arc.")

    @property
    def n_states(self):
        return len(self.labels)

    def for_type(self, torsion_type):
        """The scheme of torsions of ``torsion_type``: this one (see :meth:`SchemeSet.for_type`)."""
        return self

    def coded_parts(self):
        """The schemes that torsions may follow, in this scheme's codes: ``[self]``."""
        return [self]

    def scheme_of_type(self, torsion_type):
        """The name of the scheme that torsions of ``torsion_type`` follow: this one's."""
        return self.name

    def states_of_type(self, torsion_type):
        """Labels a torsion of ``torsion_type`` can take: all of them."""
        return list(self.labels)

    def arcs(self):
        """List of ``(state_code, start_deg, end_deg, start_closed)``; ``end_deg`` may exceed 180."""
        b = list(self.boundaries_deg)
        out = []
        for k, start in enumerate(b):
            end = b[k + 1] if k + 1 < len(b) else b[0] + 360.0
            out.append((int(self.arc_states[k]), float(start), float(end), bool(self.start_closed[k])))
        return out

    def _arc_index(self, angles_deg):
        a = wrap_deg(angles_deg)
        b = np.asarray(self.boundaries_deg, dtype=float)
        n = len(b)
        k = np.searchsorted(b, a, side="right") - 1  # last boundary <= angle; -1 wraps
        k = np.where(k < 0, n - 1, k)
        on_start = a == b[k]
        open_start = ~np.asarray(self.start_closed, dtype=bool)[k]
        k = np.where(on_start & open_start, (k - 1) % n, k)
        return a, k

    def assign(self, angles_deg):
        """State codes (``int8``) of angles in degrees; NaN gives :data:`UNDEFINED`.

        Examples
        --------
        >>> get_scheme("anti-gauche").assign([180.0, 60.0, -60.0, 120.0, -120.0]).tolist()
        [0, 1, 2, 1, 2]
        """
        a, k = self._arc_index(angles_deg)
        codes = np.asarray(self.arc_states, dtype=np.int8)[k]
        return np.where(np.isnan(a), np.int8(UNDEFINED), codes).astype(np.int8)

    def core_codes(self, angles_deg, margin_deg):
        """Core-set codes: the state if the angle lies in its arc shrunk by ``margin_deg`` on both
        sides, :data:`NO_CORE` between cores, :data:`UNDEFINED` for NaN.

        Arcs that share a state and touch each other are merged before shrinking, so a margin
        never opens a gap inside one state.
        """
        margin = float(margin_deg)
        if margin < 0:
            raise SchemeError(f"core margin must be >= 0 degrees; got {margin_deg}.")
        a = wrap_deg(angles_deg)
        codes = np.full(a.shape, NO_CORE, dtype=np.int8)
        for state, start, end in self.merged_arcs():
            lo, hi = start + margin, end - margin
            if hi <= lo:
                continue
            # angle measured from the arc start, in [0, 360)
            rel = np.mod(a - lo, 360.0)
            inside = rel <= (hi - lo)
            codes[inside] = state
        codes[np.isnan(a)] = UNDEFINED
        return codes

    def merged_arcs(self):
        """Arcs with touching arcs of the same state merged: ``(state, start_deg, end_deg)``."""
        arcs = [(s, a, b) for s, a, b, _ in self.arcs()]
        if len(arcs) > 1:
            # rotate so that the list starts at a change of state
            for shift in range(len(arcs)):
                if arcs[shift - 1][0] != arcs[shift][0]:
                    arcs = arcs[shift:] + [(s, a + 360.0, b + 360.0) for s, a, b in arcs[:shift]]
                    break
            else:
                return [(arcs[0][0], -180.0, 180.0)]
        merged = [list(arcs[0])]
        for s, a, b in arcs[1:]:
            if s == merged[-1][0]:
                merged[-1][2] = b
            else:
                merged.append([s, a, b])
        return [tuple(m) for m in merged]

    def sector_table(self):
        """Arcs as rows of (state, start_deg, end_deg) with ends in (-180, 180] (for docs and plots)."""
        rows = []
        for state, start, end, _ in self.arcs():
            rows.append((self.labels[state], float(wrap_deg(start)), float(wrap_deg(end))))
        return rows

    def to_dict(self):
        """JSON-ready description (stored in summary.json)."""
        return {
            "name": self.name,
            "labels": list(self.labels),
            "codes": {label: k for k, label in enumerate(self.labels)},
            "undefined_code": UNDEFINED,
            "boundaries_deg": [float(x) for x in self.boundaries_deg],
            "arc_states": [int(x) for x in self.arc_states],
            "start_closed": [bool(x) for x in self.start_closed],
        }

    @classmethod
    def from_dict(cls, d):
        return cls(name=d["name"], labels=tuple(d["labels"]),
                   boundaries_deg=tuple(d["boundaries_deg"]), arc_states=tuple(d["arc_states"]),
                   start_closed=tuple(d["start_closed"]))


def _from_arcs(name, arcs, labels=None):
    """Build a scheme from ``(label, start_deg, closed_start)``; state codes follow ``labels``
    (default: first appearance in ``arcs``)."""
    if labels is None:
        labels = []
        for label, _, _ in arcs:
            if label not in labels:
                labels.append(label)
    labels = list(labels)
    rows = sorted(((float(wrap_deg(s)), labels.index(label), closed) for label, s, closed in arcs))
    return StateScheme(name=name, labels=tuple(labels),
                       boundaries_deg=tuple(r[0] for r in rows),
                       arc_states=tuple(r[1] for r in rows),
                       start_closed=tuple(r[2] for r in rows))


def anti_gauche():
    """anti (\\|phi\\| > 120), gauche+ (0 < phi <= 120), gauche- (-120 <= phi <= 0)."""
    return _from_arcs("anti-gauche", [("anti", 120.0, False), ("gauche+", 0.0, False),
                                      ("gauche-", -120.0, True)])


def staggered_eclipsed(n_fold=3):
    """Staggered within 180/(2n) degrees (inclusive) of 180 + k 360/n; eclipsed otherwise."""
    n = int(n_fold)
    if n < 1 or n > 12:
        raise SchemeError(f"the rotor fold n must be an integer from 1 to 12; got {n_fold!r}.")
    half = 180.0 / (2 * n)
    arcs = []
    for k in range(n):
        centre = 180.0 + k * 360.0 / n
        arcs.append(("staggered", centre - half, True))
        arcs.append(("eclipsed", centre + half, False))
    scheme = _from_arcs("staggered-eclipsed" if n == 3 else f"staggered-eclipsed:{n}", arcs)
    # keep the label order fixed: staggered = 0, eclipsed = 1
    if scheme.labels[0] != "staggered":
        scheme = StateScheme(scheme.name, ("staggered", "eclipsed"), scheme.boundaries_deg,
                             tuple(1 - s for s in scheme.arc_states), scheme.start_closed)
    return scheme


def klyne_prelog():
    """IUPAC sectors sp, +sc, +ac, ap, -ac, -sc (Klyne & Prelog 1960)."""
    arcs = [("sp", -30.0, True), ("+sc", 30.0, False), ("+ac", 90.0, True),
            ("ap", 150.0, True), ("-ac", -150.0, False), ("-sc", -90.0, False)]
    scheme = _from_arcs("klyne-prelog", arcs)
    order = ("sp", "+sc", "+ac", "ap", "-ac", "-sc")
    remap = [order.index(label) for label in scheme.labels]
    return StateScheme("klyne-prelog", order, scheme.boundaries_deg,
                       tuple(remap[s] for s in scheme.arc_states), scheme.start_closed)


def cis_trans(name="cis-trans"):
    """trans (\\|omega\\| >= 90) and cis (\\|omega\\| < 90): the two planar wells of a peptide bond (or
    any amide or other planar torsion), split at the top of the two-fold barrier between them
    (common practice; cis = omega near 0 as in IUPAC-IUB, J. Mol. Biol. 52 (1970) 1). As
    ``cis-trans-o``, the same wells of a torsion measured through the carbonyl O (O=C-N-C near 0 is
    trans)."""
    near, far = ("trans", "cis") if name == "cis-trans-o" else ("cis", "trans")
    return _from_arcs(name, [(far, 90.0, True), (near, -90.0, False)], labels=["trans", "cis"])


def chi_sp3(name="chi-sp3"):
    """Staggered rotamer wells of an sp3-sp3 side-chain torsion: g+ (0 < chi <= 120), t
    (\\|chi\\| > 120), g- (-120 <= chi <= 0), the wells at +60, 180 and -60 (Janin, Wodak, Levitt &
    Maigret, J. Mol. Biol. 125 (1978) 357; IUPAC-IUB 1970 sign, g+ = +60; Lovell et al., Proteins
    40 (2000) 389 call them p, t, m); as ``gauche-trans``, the nucleic-acid backbone's alpha .. zeta
    (Saenger 1984, from memory)."""
    return _from_arcs(name, [("t", 120.0, False), ("g+", 0.0, False), ("g-", -120.0, True)],
                      labels=["g+", "t", "g-"])


def chi_sp2():
    """Wells of an sp3-sp2 side-chain torsion whose planar end is not symmetric (His and Trp chi2,
    Asn chi2, Gln chi3): 90-degree sectors about 0, +90, 180 and -90, the positions of the
    rotamers of Lovell et al., Proteins 40 (2000) 389 (e.g. His p-80, p80, t-160, m170; Trp m0,
    p90, t-105; Asn p-10, t30, m-80, m120); 0 means the first planar atom eclipses CA."""
    return _from_arcs("chi-sp2", [("0", -45.0, False), ("+90", 45.0, False), ("180", 135.0, False),
                                  ("-90", -135.0, False)], labels=["0", "+90", "180", "-90"])


def chi_sp2_symmetric(name="chi-sp2-symmetric"):
    """Wells of an sp3-sp2 torsion whose planar end is symmetric (Phe and Tyr chi2, Asp chi2, Glu
    chi3: the angle is defined only modulo 180): ``0/180`` (\\|chi\\| <= 45 or > 135) and ``90/-90``
    (the ring or carboxylate perpendicular to the C-C-C plane; Phe p90, t80, m-85 of Lovell et al.,
    Proteins 40 (2000) 389)."""
    return _from_arcs(name, [("0/180", -45.0, False), ("90/-90", 45.0, False),
                                            ("0/180", 135.0, False), ("90/-90", -135.0, False)],
                      labels=["0/180", "90/-90"])


def syn_anti():
    """anti (\\|chi\\| >= 90) and syn of the glycosidic torsion chi of a nucleotide: 180 +- 90 and
    0 +- 90 (IUPAC-IUB, Eur. J. Biochem. 131 (1983) 9); A- and B-form duplexes are anti."""
    return _from_arcs("syn-anti", [("anti", 90.0, True), ("syn", -90.0, False)], labels=["anti", "syn"])


def sugar_pucker():
    """Sugar pucker from delta (C5'-C4'-C3'-O3'): ``C3'-endo`` (0 < delta <= 115; A-form, RNA, delta
    near 80), ``C2'-endo`` (above; B-DNA, near 145; Saenger 1984, from memory; the split is common
    practice) and ``atypical`` (negative delta, which the ring does not reach)."""
    return _from_arcs("sugar-pucker", [("C3'-endo", 0.0, False), ("C2'-endo", 115.0, False),
                                       ("atypical", 180.0, False)], labels=["C3'-endo", "C2'-endo", "atypical"])


def proline_pucker(chi):
    """Proline's ring pucker from ``"chi1"`` or ``"chi2"`` (both near +-30: no g+/t/g- wells): ``endo``
    (C-gamma endo: chi1 > 0, chi2 < 0), ``exo`` (chi1 < 0, chi2 > 0) (Milner-White et al. 1992)."""
    up, down = ("endo", "exo") if chi == "chi1" else ("exo", "endo")   # (the states of (0, 180] and (-180, 0])
    return _from_arcs(f"proline-{chi}", [(up, 0.0, False), (down, 180.0, False)], labels=["endo", "exo"])


def coplanar_perpendicular():
    """``0/180`` and ``90/-90``: the two wells of a torsion about a bond to a planar end with two
    identical substituents (phenyl, carboxylate, nitro), whose angle is defined modulo 180 (the
    sectors of :func:`chi_sp2_symmetric`, for any molecule)."""
    return chi_sp2_symmetric("coplanar-perpendicular")


def symmetric_rotor():
    """One state, ``rotor``, on the whole circle: the wells of a rotor of three identical atoms
    (methyl, CF3) cannot be told apart, so the torsion has one distinguishable state."""
    return StateScheme(name="symmetric-rotor", labels=("rotor",), boundaries_deg=(180.0,), arc_states=(0,),
                       start_closed=(False,))


#: Side-chain torsions about an sp3-sp2 bond (IUPAC-IUB 1970 names): symmetric planar end or not.
SP2_CHI = {("PHE", "chi2"): "symmetric", ("TYR", "chi2"): "symmetric", ("ASP", "chi2"): "symmetric",
           ("GLU", "chi3"): "symmetric", ("HIS", "chi2"): "planar", ("TRP", "chi2"): "planar",
           ("ASN", "chi2"): "planar", ("GLN", "chi3"): "planar",
           # Arg: NE-CZ of the guanidinium is planar (chi5, symmetric NH1/NH2), CD-NE is sp3-sp2 (chi4)
           ("ARG", "chi4"): "planar", ("ARG", "chi5"): "symmetric"}

#: The parts of the composite schemes and the rule that gives each torsion its part.
COMPOSITES = {
    "protein": (("anti-gauche", "cis-trans", "chi-sp3", "chi-sp2", "chi-sp2-symmetric", "proline-chi1",
                 "proline-chi2"), "protein"),
    "chi-rotamers": (("chi-sp3", "chi-sp2", "chi-sp2-symmetric", "proline-chi1", "proline-chi2"), "chi"),
    "nucleic": (("gauche-trans", "syn-anti", "sugar-pucker"), "nucleic"),
}
_PARTS = {"anti-gauche": lambda: anti_gauche(), "cis-trans": cis_trans, "chi-sp3": chi_sp3, "chi-sp2": chi_sp2,
          "chi-sp2-symmetric": chi_sp2_symmetric, "syn-anti": syn_anti, "sugar-pucker": sugar_pucker,
          "gauche-trans": lambda: chi_sp3("gauche-trans"),
          "proline-chi1": lambda: proline_pucker("chi1"), "proline-chi2": lambda: proline_pucker("chi2")}


def _part_name(rule, torsion_type):
    """The part (scheme name) of a torsion type (``RES:name``) under a composite rule."""
    from .residue_names import canonical_residue_name

    residue, _, name = str(torsion_type).partition(":")
    if rule == "nucleic":   # (nucleic_backbone_torsions: alpha .. zeta and the glycosidic chi)
        return {"chi": "syn-anti", "delta": "sugar-pucker"}.get(name, "gauche-trans")
    sp2 = SP2_CHI.get((canonical_residue_name(residue), name))
    side = name.startswith("chi") and name[3:].isdigit()
    if canonical_residue_name(residue) == "PRO" and name in ("chi1", "chi2") and (rule == "chi" or side):
        return f"proline-{name}"
    if rule == "chi" or side:
        return {"symmetric": "chi-sp2-symmetric", "planar": "chi-sp2"}.get(sp2, "chi-sp3")
    return "cis-trans" if name == "omega" else "anti-gauche"


@dataclass(frozen=True)
class SchemeSet:
    """Several schemes in one set of state codes, each for one class of torsions.

    A protein has torsions of different kinds: a peptide omega has a cis and a trans well, an sp3
    side-chain torsion three staggered wells, an aromatic chi2 its own. A SchemeSet gives each
    torsion type its part (``for_type``) by a fixed rule; the state labels of all parts together
    are the labels of the set, and a torsion takes only those of its part. Built-in sets:
    ``protein`` (omega: ``cis-trans``; chi1..chi5: ``chi-rotamers``; other torsions:
    ``anti-gauche``), ``chi-rotamers`` (every torsion by the side-chain rule) and ``nucleic``
    (chi: ``syn-anti``; delta: ``sugar-pucker``; alpha, beta, gamma, epsilon, zeta:
    ``gauche-trans``).

    Examples
    --------
    >>> s = get_scheme("protein")
    >>> s.states_of_type("ALA:omega"), s.states_of_type("LYS:chi1"), s.states_of_type("PHE:chi2")
    (['trans', 'cis'], ['g+', 't', 'g-'], ['0/180', '90/-90'])
    >>> int(s.for_type("ALA:omega").assign([178.0])[0]) == s.labels.index("trans")
    True
    """

    name: str
    parts: tuple
    rule: str
    assignment: tuple = ()
    default_part: int = 0

    @property
    def labels(self):
        return tuple(dict.fromkeys(label for p in self.parts for label in p.labels))

    @property
    def n_states(self):
        return len(self.labels)

    def part_index(self, torsion_type):
        """Position in ``parts`` of the part that torsions of ``torsion_type`` follow (by the rule, or,
        for ``rule="by-type"``, by ``assignment``: pairs (type, part index), others ``default_part``)."""
        if self.rule == "by-type":
            return _assignment_of(self).get(str(torsion_type), self.default_part)
        wanted = _part_name(self.rule, torsion_type)
        names = [p.name for p in self.parts]
        return names.index(wanted) if wanted in names else 0

    def coded_parts(self):
        """Every part with its arcs in the codes of the set (labels: all of the set's)."""
        return list(_coded_parts(self))

    def _coded(self):
        labels = self.labels
        return [StateScheme(name=p.name, labels=labels, boundaries_deg=p.boundaries_deg,
                            arc_states=tuple(labels.index(p.labels[k]) for k in p.arc_states),
                            start_closed=p.start_closed, partial=True) for p in self.parts]

    def for_type(self, torsion_type):
        """The part of ``torsion_type`` in the codes of the set (a :class:`StateScheme`)."""
        return self.coded_parts()[self.part_index(torsion_type)]

    def states_of_type(self, torsion_type):
        """Labels a torsion of ``torsion_type`` can take."""
        return list(self.parts[self.part_index(torsion_type)].labels)

    def scheme_of_type(self, torsion_type):
        """The name of the part that torsions of ``torsion_type`` follow."""
        return self.parts[self.part_index(torsion_type)].name

    def sector_table(self):
        """(part: state, start_deg, end_deg) rows of every part."""
        return [(f"{p.name}: {state}", lo, hi) for p in self.parts for state, lo, hi in p.sector_table()]

    def to_dict(self):
        out = {"name": self.name, "labels": list(self.labels), "rule": self.rule,
               "codes": {label: k for k, label in enumerate(self.labels)}, "undefined_code": UNDEFINED,
               "parts": [p.to_dict() for p in self.parts]}
        if self.rule == "by-type":
            out.update(assignment={t: int(k) for t, k in self.assignment}, default_part=int(self.default_part))
        return out


@functools.lru_cache(maxsize=16)
def _coded_parts(scheme_set):
    return tuple(scheme_set._coded())


@functools.lru_cache(maxsize=16)
def _assignment_of(scheme_set):
    return dict(scheme_set.assignment)


def scheme_by_type(name, schemes_of_types):
    """A :class:`SchemeSet` that gives every torsion type its own scheme.

    Parameters
    ----------
    name : str
    schemes_of_types : dict
        Torsion type -> :class:`StateScheme`; equal schemes become one part.

    Returns
    -------
    StateScheme or SchemeSet
        The one scheme itself when every type has the same.

    Examples
    --------
    >>> s = scheme_by_type("mixed", {"NMA:C-N": cis_trans(), "BUT:C1-C2-C3-C4": anti_gauche()})
    >>> s.scheme_of_type("NMA:C-N"), s.states_of_type("BUT:C1-C2-C3-C4")
    ('cis-trans', ['anti', 'gauche+', 'gauche-'])
    """
    parts = list(dict.fromkeys(schemes_of_types.values()))
    if len(parts) == 1:
        return parts[0]
    index = {p: k for k, p in enumerate(parts)}
    return SchemeSet(name=name, parts=tuple(parts), rule="by-type",
                     assignment=tuple((str(t), index[p]) for t, p in schemes_of_types.items()))


def scheme_from_dict(d):
    """A :class:`StateScheme` or :class:`SchemeSet` from its ``to_dict``."""
    if "parts" in d:
        return SchemeSet(name=d["name"], parts=tuple(StateScheme.from_dict(p) for p in d["parts"]), rule=d["rule"],
                         assignment=tuple((str(t), int(k)) for t, k in (d.get("assignment") or {}).items()),
                         default_part=int(d.get("default_part", 0)))
    return StateScheme.from_dict(d)


def scheme_from_toml(path):
    """A custom scheme from a TOML file.

    The file has an optional ``name`` and one ``[[state]]`` table per arc with ``label``,
    ``from_deg`` and ``to_deg``; the arc runs counter-clockwise (increasing angle) from
    ``from_deg`` (excluded) to ``to_deg`` (included) and may wrap through 180. Several arcs may
    share a label. The arcs must cover the circle exactly once.

    Example (the ``[[state]]`` tables written inline)::

        name = "trans-or-not"
        state = [{label = "trans", from_deg = 150, to_deg = -150},
                 {label = "other", from_deg = -150, to_deg = 150}]
    """
    data = read_toml(path, "scheme file", SchemeError)
    return scheme_from_mapping(data, where=str(path))


def scheme_from_mapping(data, where="scheme"):
    """A custom scheme from a mapping with the layout of :func:`scheme_from_toml`."""
    if "rule" in data or "default" in data:
        raise SchemeError(f"{where} maps torsion types to schemes ([[rule]] tables); such a scheme map needs the "
                          "torsions: give it to track, TorsionStates or 'dihedra torsions --scheme'.")
    unknown = sorted(set(data) - {"name", "state"})
    if unknown:
        raise SchemeError(f"{where}: unknown key(s) {', '.join(unknown)}; valid keys are name, state.")
    states = data.get("state")
    arcs = checked_arcs(states, where)
    name = str(data.get("name", "custom"))
    order = list(dict.fromkeys(str(st["label"]) for st in states))  # labels in file order
    return _from_arcs(name, [(label, lo, False) for label, lo, _, _ in arcs], labels=order)


def get_scheme(spec):
    """A scheme by name (one of :data:`BUILTIN_SCHEMES`; ``staggered-eclipsed:N``) or TOML path.
    ``auto``, ``basins`` and scheme maps are chosen per torsion type by
    :func:`dihedra.selection.choice.choose_schemes`.

    A :class:`StateScheme` or :class:`SchemeSet` passes through unchanged.
    """
    if isinstance(spec, (StateScheme, SchemeSet)):
        return spec
    text = str(spec).strip()
    if text == "anti-gauche":
        return anti_gauche()
    if text == "klyne-prelog":
        return klyne_prelog()
    if text in ("cis-trans", "cis-trans-o"):
        return cis_trans(text)
    if text == "coplanar-perpendicular":
        return coplanar_perpendicular()
    if text == "symmetric-rotor":
        return symmetric_rotor()
    if text == "syn-anti":
        return syn_anti()
    if text == "sugar-pucker":
        return sugar_pucker()
    if text in CHOSEN_SCHEMES:
        raise SchemeError(f"the scheme {text!r} is chosen per torsion type from the topology"
                          f"{' and the trajectory' if text == 'basins' else ''}; give it to track, "
                          "TorsionStates or 'dihedra torsions --scheme', which know the torsions.")
    if text in COMPOSITES:
        parts, rule = COMPOSITES[text]
        return SchemeSet(name=text, parts=tuple(_PARTS[p]() for p in parts), rule=rule)
    if text == "staggered-eclipsed" or text.startswith("staggered-eclipsed:"):
        _, _, fold = text.partition(":")
        try:
            n = int(fold) if fold else 3
        except ValueError:
            raise SchemeError(f"staggered-eclipsed takes an integer fold, e.g. staggered-eclipsed:2; "
                              f"got {text!r}.") from None
        return staggered_eclipsed(n)
    if text.lower().endswith(".toml"):
        return scheme_from_toml(text)
    raise SchemeError(f"unknown state scheme {text!r}; use one of {', '.join(BUILTIN_SCHEMES)} "
                      f"(staggered-eclipsed:N for an N-fold rotor), {' or '.join(CHOSEN_SCHEMES)} (chosen per "
                      "torsion type) or a .toml file.")
