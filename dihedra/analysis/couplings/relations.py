r"""Karplus relations: their forms, published parameters and sources, and custom ones from TOML.

Built-in relations (coefficients from the papers cited)
------------------------------------------------------
``vuister-bax-1993``
    3J(HN,HA) = A cos^2 theta + B cos theta + C, theta = phi - 60 deg (protein phi, C-N-CA-C),
    A = 6.51, B = -1.76, C = 1.60 Hz. Vuister & Bax, J. Am. Chem. Soc. 115 (1993) 7772.
``hu-bax-1997``
    The same form, A = 7.09, B = -1.42, C = 1.55 Hz. Hu & Bax, J. Am. Chem. Soc. 119 (1997) 6360.
``pardi-1984``
    The same form, A = 6.4, B = -1.4, C = 1.9 Hz. Pardi, Billeter & Wuethrich, J. Mol. Biol. 180
    (1984) 741.
``karplus-1959``
    3J(H,H) of H-C-C-H: 8.5 cos^2 phi - 0.28 for ``|phi| <= 90`` deg and 9.5 cos^2 phi - 0.28 for
    ``|phi| > 90`` deg. Karplus, J. Chem. Phys. 30 (1959) 11.
``haasnoot-altona-1980``
    Generalised 3J(H,H) of H-C-C-H with substituent electronegativities,

    .. math::  J = P_1 \cos^2\phi + P_2 \cos\phi + P_3
               + \sum_i \Delta\chi_i \left[P_4 + P_5 \cos^2(\xi_i \phi + P_6 |\Delta\chi_i|)\right],

    P1..P6 = 13.7, -0.73, 0, 0.56, -2.47, 16.9 (deg) and the beta effect P7 = -0.14:
    :math:`\Delta\chi_i = \Delta\chi_{\alpha,i} + P_7 \sum_j \Delta\chi_{\beta,ij}`, where
    :math:`\Delta\chi` is the Huggins electronegativity of an atom minus that of hydrogen
    (H 2.20, C 2.60, N 3.05, O 3.50, from memory; F 3.90, Cl 3.15, Br 2.95, also from memory).
    The substituents i are the non-hydrogen neighbours of the two carbons (other than the two
    carbons themselves), the beta atoms j the further neighbours of each substituent; both are
    read from the bond graph of the topology recorded in summary.json, with the elements of its
    atoms. :math:`\xi_i = +1` when, viewed along the C-C bond from the carbon that carries
    substituent i, the substituent lies clockwise (+120 deg) from the coupled proton on the same
    carbon, -1 when anticlockwise (convention as recalled from the paper's figure, from memory);
    it is read from the coordinates of the topology (a configuration, fixed during a simulation).
    Haasnoot, de Leeuw & Altona, Tetrahedron 36 (1980) 2783 (the parameter set with the beta
    effect).

Custom relations come from a TOML file (``--relation my.toml``)::

    [relation]
    name = "my-fit"
    form = "cosine"          # J = A cos^2(theta) + B cos(theta) + C, theta = phi + offset_deg
    A = 6.98
    B = -1.38
    C = 1.72
    offset_deg = -60.0
    systematic_hz = 0.4      # optional: the fit's own rms scatter
    citation = "..."         # optional
    applies_to = "phi"       # optional: "phi" (protein C-N-CA-C), "H-C-C-H" or "any"

``form = "haasnoot-altona"`` takes P1..P7 instead of A, B, C, and an optional
``[electronegativity]`` table (element = Huggins value) that adds or replaces elements.

Example
-------
>>> from dihedra.analysis.couplings import get_relation
>>> round(float(get_relation("vuister-bax-1993").evaluate(-60.0)), 3)   # Vuister & Bax (1993): A/4 + 0.88 + C
4.107
"""

from __future__ import annotations

import os
from dataclasses import dataclass, field

import numpy as np

from ...errors import DihedraError, InputFileError, one_of, read_toml
from ...units import wrap_deg

#: Names of the built-in relations.
BUILTIN_RELATIONS = ("vuister-bax-1993", "hu-bax-1997", "pardi-1984", "karplus-1959",
                     "haasnoot-altona-1980")
#: The 3J(HN,HA) relations whose spread estimates the parameterisation uncertainty.
HN_HA_FAMILY = ("vuister-bax-1993", "hu-bax-1997", "pardi-1984")
#: Huggins electronegativities (all from memory).
HUGGINS_ELECTRONEGATIVITY = {"H": 2.20, "C": 2.60, "N": 3.05, "O": 3.50, "F": 3.90, "Cl": 3.15,
                             "Br": 2.95}
#: Gauss-Legendre points per histogram bin for the bin mean of J.
_GAUSS_POINTS = 8
#: Forms a relation can take.
FORMS = ("cosine", "karplus-1959", "haasnoot-altona")
#: What a relation applies to.
APPLIES_TO = ("phi", "H-C-C-H", "any")


@dataclass(frozen=True)
class KarplusRelation:
    """One Karplus relation J(theta), theta = phi + offset_deg, in Hz.

    Parameters
    ----------
    name : str
    form : str
        ``cosine`` (A cos^2 + B cos + C), ``karplus-1959`` (piecewise A_low / A_high cos^2 + C) or
        ``haasnoot-altona`` (P1..P7 with substituents).
    coefficients : dict
        A, B, C; or A_low, A_high, C; or P1..P7 (P6 in degrees).
    offset_deg : float
        theta = phi + offset_deg.
    coupling : str
        What is coupled (``3J(HN,HA)``, ``3J(H,H)``).
    applies_to : str
        ``phi`` (protein backbone phi), ``H-C-C-H`` or ``any``: used to choose the torsions.
    citation : str
    systematic_hz : float or None
        The relation's own rms scatter, if the source gives it.
    systematic_basis : str
        Where ``systematic_hz`` comes from.
    electronegativity : dict
        Element -> Huggins electronegativity (``haasnoot-altona`` only).
    """

    name: str
    form: str
    coefficients: dict
    offset_deg: float = 0.0
    coupling: str = "3J"
    applies_to: str = "any"
    citation: str = ""
    systematic_hz: float | None = None
    systematic_basis: str = ""
    electronegativity: dict = field(default_factory=dict)

    def __post_init__(self):
        one_of("relation form", self.form, FORMS)
        one_of("applies_to", self.applies_to, APPLIES_TO)
        need = {"cosine": ("A", "B", "C"), "karplus-1959": ("A_low", "A_high", "C"),
                "haasnoot-altona": ("P1", "P2", "P3", "P4", "P5", "P6", "P7")}[self.form]
        missing = [k for k in need if k not in self.coefficients]
        if missing:
            raise DihedraError(f"relation {self.name!r} ({self.form}) lacks the coefficient(s) "
                               f"{', '.join(missing)}; give {', '.join(need)}.")

    def coupled_atoms(self):
        """The atoms whose coupling the relation gives, as text (``H-N-CA-HA (3J(HN,HA) through
        protein phi)``)."""
        if self.applies_to == "phi":
            return f"H-N-CA-HA ({self.coupling} through protein phi, C-N-CA-C)"
        if self.applies_to == "H-C-C-H":
            return f"H-C-C-H ({self.coupling} of two vicinal protons)"
        return f"the end atoms of any torsion ({self.coupling})"

    def evaluate(self, phi_deg, substituents=()):
        """J in Hz at torsion angle(s) ``phi_deg``.

        ``substituents`` is a sequence of (delta_chi, xi) pairs (``haasnoot-altona`` only).
        """
        theta = np.radians(np.asarray(phi_deg, dtype=float) + self.offset_deg)
        c = self.coefficients
        cos = np.cos(theta)
        if self.form == "cosine":
            return c["A"] * cos ** 2 + c["B"] * cos + c["C"]
        if self.form == "karplus-1959":
            inner = np.abs(wrap_deg(np.degrees(theta))) <= 90.0
            return np.where(inner, c["A_low"], c["A_high"]) * cos ** 2 + c["C"]
        j = c["P1"] * cos ** 2 + c["P2"] * cos + c["P3"]
        for dchi, xi in substituents:
            j = j + dchi * (c["P4"] + c["P5"] * np.cos(xi * theta + np.radians(c["P6"] * abs(dchi))) ** 2)
        return j

    def bin_means(self, edges_deg, substituents=()):
        """Mean of J over each bin between consecutive ``edges_deg`` (Gauss-Legendre)."""
        edges = np.asarray(edges_deg, dtype=float)
        x, w = np.polynomial.legendre.leggauss(_GAUSS_POINTS)
        lo, hi = edges[:-1, None], edges[1:, None]
        pts = 0.5 * (hi - lo) * x[None, :] + 0.5 * (hi + lo)
        return (self.evaluate(pts, substituents) * w[None, :]).sum(axis=1) / 2.0

    def describe(self):
        """A JSON-ready description."""
        return {"name": self.name, "form": self.form, "coefficients": dict(self.coefficients),
                "offset_deg": self.offset_deg, "coupling": self.coupling, "applies_to": self.applies_to,
                "citation": self.citation, "systematic_hz": self.systematic_hz,
                "systematic_basis": self.systematic_basis,
                **({"electronegativity": dict(self.electronegativity)} if self.form == "haasnoot-altona"
                   else {})}


def _hn_ha(name, a, b, c, citation):
    return KarplusRelation(name=name, form="cosine", coefficients={"A": a, "B": b, "C": c},
                           offset_deg=-60.0, coupling="3J(HN,HA)", applies_to="phi", citation=citation,
                           systematic_basis="parameter-set spread")


_BUILTIN = {
    "vuister-bax-1993": _hn_ha("vuister-bax-1993", 6.51, -1.76, 1.60,
                               "Vuister & Bax, J. Am. Chem. Soc. 115 (1993) 7772"),
    "hu-bax-1997": _hn_ha("hu-bax-1997", 7.09, -1.42, 1.55, "Hu & Bax, J. Am. Chem. Soc. 119 (1997) 6360"),
    "pardi-1984": _hn_ha("pardi-1984", 6.4, -1.4, 1.9,
                         "Pardi, Billeter & Wuethrich, J. Mol. Biol. 180 (1984) 741"),
    "karplus-1959": KarplusRelation(
        name="karplus-1959", form="karplus-1959", coefficients={"A_low": 8.5, "A_high": 9.5, "C": -0.28},
        coupling="3J(H,H)", applies_to="H-C-C-H", citation="Karplus, J. Chem. Phys. 30 (1959) 11",
        systematic_basis="none given (valence-bond calculation)"),
    "haasnoot-altona-1980": KarplusRelation(
        name="haasnoot-altona-1980", form="haasnoot-altona",
        coefficients={"P1": 13.7, "P2": -0.73, "P3": 0.0, "P4": 0.56, "P5": -2.47, "P6": 16.9, "P7": -0.14},
        coupling="3J(H,H)", applies_to="H-C-C-H",
        citation="Haasnoot, de Leeuw & Altona, Tetrahedron 36 (1980) 2783",
        systematic_hz=0.48, systematic_basis="rms of the fit to 315 couplings (from memory)",
        electronegativity=dict(HUGGINS_ELECTRONEGATIVITY)),
}


def get_relation(spec):
    """A built-in relation by name, or a custom one from a TOML file (see the module notes)."""
    if isinstance(spec, KarplusRelation):
        return spec
    spec = str(spec).strip()
    if spec in _BUILTIN:
        return _BUILTIN[spec]
    if spec.lower().endswith(".toml"):
        return relation_from_toml(spec)
    raise DihedraError(f"unknown Karplus relation {spec!r}; use one of {', '.join(BUILTIN_RELATIONS)} "
                       "or a .toml file with a [relation] table.")


def relation_from_toml(path):
    """A custom relation from the ``[relation]`` table of a TOML file."""
    data = read_toml(path, "relation file")
    table = data.get("relation")
    if not isinstance(table, dict):
        raise InputFileError(f"relation file {path} has no [relation] table; see 'dihedra couplings --help'.")
    form = str(table.get("form", "cosine"))
    one_of(f"form in {path}", form, ("cosine", "haasnoot-altona"))
    keys = ("A", "B", "C") if form == "cosine" else ("P1", "P2", "P3", "P4", "P5", "P6", "P7")
    coeffs = {}
    for k in keys:
        if k not in table:
            raise InputFileError(f"relation file {path}: [relation] needs {', '.join(keys)} for form "
                                 f"{form!r}; {k} is missing.")
        try:
            coeffs[k] = float(table[k])
        except (TypeError, ValueError):
            raise InputFileError(f"relation file {path}: {k} must be a number; got {table[k]!r}.") from None
    systematic = table.get("systematic_hz")
    if systematic is not None and not (float(systematic) >= 0):
        raise InputFileError(f"relation file {path}: systematic_hz must be a non-negative number of Hz; "
                             f"got {systematic!r}.")
    chi = dict(HUGGINS_ELECTRONEGATIVITY)
    chi.update({str(k): float(v) for k, v in data.get("electronegativity", {}).items()})
    default_applies = "H-C-C-H" if form == "haasnoot-altona" else "any"
    return KarplusRelation(
        name=str(table.get("name", os.path.splitext(os.path.basename(path))[0])), form=form,
        coefficients=coeffs, offset_deg=float(table.get("offset_deg", 0.0)),
        coupling=str(table.get("coupling", "3J")), applies_to=str(table.get("applies_to", default_applies)),
        citation=str(table.get("citation", f"custom relation from {os.path.abspath(path)}")),
        systematic_hz=None if systematic is None else float(systematic),
        systematic_basis="given in the relation file" if systematic is not None else "none given",
        electronegativity=chi)


# ----------------------------------------------------------------------------------------------
# Substituents of H-C-C-H torsions (Haasnoot-Altona)
# ----------------------------------------------------------------------------------------------

def substituents_of(universe, quad, relation, coords, elements):
    """Substituent terms (delta_chi, xi) of an H-C-C-H torsion for the Haasnoot-Altona relation.

    Parameters
    ----------
    universe : MDAnalysis.Universe with bonds
    quad : tuple of 4 int
        H, C, C, H atom indices.
    relation : KarplusRelation
    coords : ndarray (n_atoms, 3)
        A configuration, to read the orientation xi of each substituent.
    elements : ndarray of str

    Returns
    -------
    list of (delta_chi, xi, atom_index)
    """
    from MDAnalysis.lib.distances import calc_dihedrals

    chi = relation.electronegativity
    p7 = relation.coefficients["P7"]
    h, c1, c2, h2 = (int(i) for i in quad)
    if [elements[i] for i in quad] != ["H", "C", "C", "H"]:
        got = "-".join(elements[i] for i in quad)
        atoms = universe.atoms[[h, c1, c2, h2]]
        named = "-".join(f"{a.resname}{a.resid}.{a.name}" for a in atoms)
        raise DihedraError(f"{relation.name} needs H-C-C-H torsions; the torsion {named} (atoms "
                           f"{', '.join(str(i) for i in (h, c1, c2, h2))}) has the elements {got}. Track the "
                           "H-C-C-H torsion itself (e.g. --torsions A,B,C,D).")

    def neighbours(i):
        return [int(a.index) for a in universe.atoms[i].bonded_atoms]

    def dchi(i):
        e = elements[i]
        if e not in chi:
            raise DihedraError(f"no electronegativity for element {e!r} (atom {i}); add it under "
                               "[electronegativity] in a relation TOML file.")
        return chi[e] - chi["H"]

    out = []
    for front, back, proton, other_proton in ((c1, c2, h, h2), (c2, c1, h2, h)):
        for s in neighbours(front):
            if s in (back, proton) or elements[s] == "H":
                continue
            beta = [b for b in neighbours(s) if b != front]
            d = dchi(s) + p7 * sum(dchi(b) for b in beta)
            # viewed from the carrying carbon: torsion X-front-back-other_proton; S clockwise
            # from the proton by 120 deg means tau(S) = tau(proton) - 120
            tau = calc_dihedrals(coords[[s, proton]], coords[[front, front]], coords[[back, back]],
                                 coords[[other_proton, other_proton]])
            rel = wrap_deg(np.degrees(tau[0] - tau[1]))
            xi = 1 if rel < 0 else -1
            out.append((float(d), xi, s))
    return out
