r"""Ensemble-averaged 3J couplings (Karplus relations) and their comparison with experiment.

Method
------
A Karplus relation gives a vicinal coupling constant as a function of a torsion angle,
J(theta) with theta = phi + offset. The ensemble average over the sampled distribution of phi is

.. math::  \langle J \rangle = \int J(\phi + \delta)\, p(\phi)\, d\phi
           \approx \sum_b \bar J_b \, n_b / \sum_b n_b ,

where n_b are the (weighted) counts of the fine 1-degree histogram bins that the trajectory pass
stores per block (``blocks.npz``; with ``track --weights`` they are weighted sums, so reweighted
and umbrella-window results average correctly) and :math:`\bar J_b` is the mean of J over bin b
(8-point Gauss-Legendre rule inside the bin). Taking the bin mean rather than J at the bin centre
makes the only approximation "p is constant within one degree"; for any smooth p this changes
<J> by far less than 0.001 Hz.

Statistical error: <J> is a ratio of block sums, sum_b n_b J_b over sum_b n_b, per histogram
block (16 contiguous blocks per replica). Its standard error comes from the same blocking
analysis as the populations (:func:`dihedra.numerics.statistics.blocking_error`: blocks merged pairwise
within replicas, the largest error over levels with at least 8 blocks, never below the spread
between replicas). Pooled per torsion type, <J> is the mean over the torsions of the type and
its error sqrt(sum se_i^2)/n (the torsions taken as independent, as for populations).

Systematic error of the relation, reported separately (``j_systematic_hz``), never mixed into
``j_err_hz``: a Karplus relation is an empirical fit, and its own scatter is often larger than the
statistical error of a long simulation.

* the three 3J(HN,HA) parameter sets: the standard deviation of <J> over the three published sets
  (Vuister & Bax 1993, Hu & Bax 1997, Pardi et al. 1984) evaluated on the same distribution
  (``systematic_basis = parameter-set spread``), a measure of how much the choice of the fit
  matters for this very distribution;
* Haasnoot, de Leeuw & Altona 1980: the rms deviation of the fit to its 315 couplings, 0.48 Hz
  (recalled from the paper, not confirmed: "from memory");
* Karplus 1959 is a valence-bond calculation without a fitted spread: no value (empty column);
* a custom relation: ``systematic_hz`` from its TOML file, if given.

Built-in relations (coefficients from ../shared/guide/CHECK-VALUES.md)
----------------------------------------------------------------------
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
    effect; P1..P7 as listed in ../shared/guide/CHECK-VALUES.md).

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

Comparison with experiment
--------------------------
A CSV with a label column (``torsion``, ``residue`` or ``label``: a torsion label such as
``ALA12:phi``, a torsion type, or a residue such as ``ALA12`` when that residue has one selected
torsion) and the columns ``J_hz`` and ``J_err_hz``. Per point: deviation = <J> - J_exp, combined
standard uncertainty sigma = sqrt(j_err^2 + J_err^2 + j_systematic^2) (the systematic term only
where known), z = deviation / sigma, chi-square = z^2. Summary: RMSD, mean deviation, chi-square
per point and its p-value under chi-square(n). Verdict (thresholds :data:`P_TENSION`,
:data:`P_INCONSISTENT`, :data:`OUTLIER_Z`):

* ``consistent``: p >= 0.05 and no point with ``|z| > 3``;
* ``tension``: 0.001 <= p < 0.05, or some point with ``|z| > 3`` (the outliers are named);
* ``inconsistent``: p < 0.001.

Cautions: <J> depends on the whole distribution, so agreement does not prove that populations
are right (different distributions give the same average); the relations were fitted to
particular molecules and, for HN-HA, to static structures; a missing systematic term makes the
verdict stricter than the relation deserves.

Example
-------
>>> from dihedra.analysis.couplings import get_relation
>>> round(float(get_relation("vuister-bax-1993").evaluate(-60.0)), 3)   # CHECK-VALUES.md
4.107
"""

from __future__ import annotations

import os
import tomllib
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from ..errors import DihedraError, InputFileError, one_of
from ..units import wrap_deg

#: Names of the built-in relations.
BUILTIN_RELATIONS = ("vuister-bax-1993", "hu-bax-1997", "pardi-1984", "karplus-1959",
                     "haasnoot-altona-1980")
#: The 3J(HN,HA) relations whose spread estimates the parameterisation uncertainty.
HN_HA_FAMILY = ("vuister-bax-1993", "hu-bax-1997", "pardi-1984")
#: Huggins electronegativities (H, C, N, O from CHECK-VALUES.md; all from memory).
HUGGINS_ELECTRONEGATIVITY = {"H": 2.20, "C": 2.60, "N": 3.05, "O": 3.50, "F": 3.90, "Cl": 3.15,
                             "Br": 2.95}
#: p-value of the chi-square below which the verdict is "tension".
P_TENSION = 0.05
#: p-value below which the verdict is "inconsistent".
P_INCONSISTENT = 0.001
#: A point with ``|z|`` above this is an outlier (named in the output).
OUTLIER_Z = 3.0
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
    if not os.path.exists(path):
        raise InputFileError(f"relation file {path} does not exist.")
    try:
        with open(path, "rb") as fh:
            data = tomllib.load(fh)
    except (tomllib.TOMLDecodeError, UnicodeDecodeError) as exc:
        raise InputFileError(f"relation file {path} is not valid TOML: {exc}.") from None
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

def _elements(universe, notices):
    names = universe.atoms.names
    try:
        elements = np.array([str(e).strip() for e in universe.atoms.elements])
    except (AttributeError, Exception):  # noqa: BLE001 - no element attribute
        elements = np.array([""] * len(names))
    missing = elements == ""
    if missing.any():
        guessed = np.array([_element_from_name(n) for n in names[missing]])
        elements[missing] = guessed
        notices.append(f"{int(missing.sum())} atoms have no element in the topology; guessed from their "
                       "names (e.g. " + f"{names[missing][0]} -> {guessed[0]}).")
    return np.array([e.capitalize() if len(e) <= 2 else e for e in elements])


def _element_from_name(name):
    letters = "".join(ch for ch in str(name) if ch.isalpha())
    for two in ("Cl", "Br"):
        if letters[:2].lower() == two.lower():
            return two
    return letters[:1].upper()


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
        raise DihedraError(f"{relation.name} needs H-C-C-H torsions; torsion with atoms {list(quad)} has "
                           f"elements {got}. Track the H-C-C-H torsion itself (e.g. --torsions A,B,C,D).")

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


def _topology_universe(result, notices):
    from ..trajectory.inputs import load_universe, sha256

    top = result.summary.get("topology", {})
    path = top.get("path")
    if not path or not os.path.exists(path):
        raise InputFileError(f"the topology recorded in summary.json ({path}) is not there; the "
                             "Haasnoot-Altona relation reads its bonds and elements.")
    if top.get("sha256") and sha256(path) != top["sha256"]:
        notices.append(f"the topology {path} changed since tracking (SHA-256 differs); its bonds and "
                       "elements were used as they are now.")
    u = load_universe(path)
    try:
        u.atoms.positions
    except Exception:  # noqa: BLE001 - a topology without coordinates (PSF, PRMTOP): first frame
        traj = result.summary.get("replicas", [{}])[0].get("trajectory")
        u = load_universe(path, traj)
    try:
        n_bonds = len(u.bonds)
    except Exception:  # noqa: BLE001 - topology without bond attribute
        n_bonds = 0
    if n_bonds == 0:
        raise InputFileError(f"topology {path} has no bonds; the Haasnoot-Altona relation needs the bond "
                             "graph (use a PDB with CONECT records, a PSF, TPR or PRMTOP).")
    return u


# ----------------------------------------------------------------------------------------------
# Ensemble averages
# ----------------------------------------------------------------------------------------------

def relation_kernels(relation, result, torsion_positions, notices=None):
    """Bin means of J for each chosen torsion: array (n_chosen, n_fine_bins), and substituents."""
    notices = [] if notices is None else notices
    edges = np.asarray(result.blocks.get("bin_edges_deg", np.linspace(-180, 180, 361)), dtype=float)
    if relation.form != "haasnoot-altona":
        row = relation.bin_means(edges)
        return np.tile(row, (len(torsion_positions), 1)), [[] for _ in torsion_positions]
    u = _topology_universe(result, notices)
    elements = _elements(u, notices)
    coords = u.atoms.positions.astype(float)
    indices = result.torsion_set.indices
    kernels, subs = [], []
    for k in torsion_positions:
        s = substituents_of(u, indices[k], relation, coords, elements)
        kernels.append(relation.bin_means(edges, [(d, x) for d, x, _ in s]))
        subs.append(s)
    return np.array(kernels), subs


def _looks_applicable(relation, torsions_table):
    """Boolean mask of the torsions a relation is meant for (by name or by atom names)."""
    if relation.applies_to == "any":
        return np.ones(len(torsions_table), dtype=bool)
    if relation.applies_to == "phi":
        return (torsions_table["name"].astype(str) == "phi").to_numpy()
    names = torsions_table.get("atom_names", pd.Series([""] * len(torsions_table))).fillna("").astype(str)
    ends = names.str.split()
    return ends.map(lambda a: len(a) == 4 and a[0].upper().startswith("H") and a[3].upper().startswith("H")
                    ).to_numpy(dtype=bool)


def choose_torsions(result, relation, select=None, notices=None):
    """Positions of the torsions to average: ``select`` (labels or types), else those the
    relation applies to, else all (with a notice)."""
    notices = [] if notices is None else notices
    labels = result.torsion_set.labels
    types = result.torsion_set.types
    if select:
        wanted = set(select)
        pos = [k for k, (lab, typ) in enumerate(zip(labels, types)) if lab in wanted or typ in wanted]
        unknown = wanted - set(labels) - set(types)
        if unknown:
            raise DihedraError(f"{sorted(unknown)[0]!r} is neither a torsion label nor a type of this "
                               f"results folder (e.g. {labels[0]!r}, {types[0]!r}); see torsions.csv.")
        return pos
    mask = _looks_applicable(relation, result.torsions)
    if mask.any():
        return list(np.flatnonzero(mask))
    what = "protein phi (C-N-CA-C)" if relation.applies_to == "phi" else "H-C-C-H"
    notices.append(f"no torsion of this folder looks like {what}, which {relation.name} is meant for; "
                   f"<J> was computed for all {len(labels)} torsions as if each were one, which is "
                   "meaningful only if the offset maps them onto the coupled protons.")
    return list(range(len(labels)))


def ensemble_couplings(histograms, block_replica, kernels):
    """<J> per torsion and its blocking standard error from block histograms.

    Parameters
    ----------
    histograms : ndarray (n_blocks, n_torsions, n_bins)
        (Weighted) fine histograms per block.
    block_replica : ndarray (n_blocks,)
    kernels : ndarray (n_torsions, n_bins)
        Bin means of J (Hz).

    Returns
    -------
    j_hz, j_err_hz, n_samples : ndarrays (n_torsions,)
    """
    from ..numerics.statistics import blocking_error

    h = np.asarray(histograms, dtype=float)
    num = np.einsum("btk,tk->bt", h, np.asarray(kernels, dtype=float))
    den = h.sum(axis=2)
    if not (den.sum(axis=0) > 0).all():
        bad = int(np.flatnonzero(den.sum(axis=0) <= 0)[0])
        raise DihedraError(f"torsion number {bad} has no sampled frames; no coupling can be averaged.")
    mean, se, _ = blocking_error(num, den, block_replica)
    return mean, se, den.sum(axis=0)


def _pool_by_type(frame, family=None):
    """Rows ``level = type`` (types with more than one torsion): mean <J>, se sqrt(sum se^2)/n; the
    parameter-set spread of the pooled means when ``family`` (n_sets, n_torsions) is given."""
    rows = []
    for typ, idx in frame.groupby("type", sort=False).indices.items():
        if len(idx) < 2:
            continue
        sub = frame.iloc[idx]
        if family is not None:
            systematic = float(np.std(family[:, idx].mean(axis=1), ddof=1))
        else:
            systematic = float(sub["j_systematic_hz"].iloc[0])
        rows.append({**sub.iloc[0].to_dict(), "level": "type", "torsion": "", "j_hz": sub["j_hz"].mean(),
                     "j_err_hz": np.sqrt(np.sum(sub["j_err_hz"] ** 2)) / len(idx),
                     "j_systematic_hz": systematic, "n_samples": sub["n_samples"].sum()})
    return pd.DataFrame(rows, columns=frame.columns)


@dataclass
class CouplingResult:
    """Couplings of a results folder.

    Attributes
    ----------
    couplings : DataFrame
        relation, coupling, level (``torsion`` / ``type``), torsion, type, j_hz, j_err_hz,
        j_systematic_hz, systematic_basis, n_samples.
    relations : list of dict
        Descriptions of the relations used.
    notices : list of str
    substituents : dict
        torsion -> list of (delta_chi, xi, atom_index) (Haasnoot-Altona only).
    """

    couplings: pd.DataFrame
    relations: list
    notices: list = field(default_factory=list)
    substituents: dict = field(default_factory=dict)


def compute_couplings(result, relations, select=None):
    """Ensemble-averaged couplings of a results folder for one or more relations.

    Parameters
    ----------
    result : TrackResult
    relations : str, KarplusRelation or list of them
    select : list of str, optional
        Torsion labels or types to average (default: those each relation is meant for).

    Returns
    -------
    CouplingResult
    """
    if isinstance(relations, (str, KarplusRelation)):
        relations = [relations]
    relations = [get_relation(r) for r in relations]
    if not relations:
        raise DihedraError("give at least one Karplus relation (--relation NAME).")
    notices, frames, subs_out = [], [], {}
    blocks = result.blocks
    hist = np.asarray(blocks["histograms"], dtype=float)
    rep = np.asarray(blocks["hist_block_replica"])
    labels = np.array(result.torsion_set.labels)
    types = np.array(result.torsion_set.types)
    for rel in relations:
        pos = choose_torsions(result, rel, select, notices)
        kern, subs = relation_kernels(rel, result, pos, notices)
        j, err, n = ensemble_couplings(hist[:, pos, :], rep, kern)
        systematic = np.full(len(pos), np.nan if rel.systematic_hz is None else float(rel.systematic_hz))
        family = None
        if rel.name in HN_HA_FAMILY:
            family = np.array([ensemble_couplings(hist[:, pos, :], rep,
                                                  relation_kernels(_BUILTIN[f], result, pos)[0])[0]
                               for f in HN_HA_FAMILY])
            systematic = np.std(family, axis=0, ddof=1)
        frame = pd.DataFrame({"relation": rel.name, "coupling": rel.coupling, "level": "torsion",
                              "torsion": labels[pos], "type": types[pos], "j_hz": j, "j_err_hz": err,
                              "j_systematic_hz": systematic, "systematic_basis": rel.systematic_basis,
                              "n_samples": n})
        if rel.form == "haasnoot-altona":
            for k, s in zip(pos, subs):
                subs_out[labels[k]] = s
        pooled = _pool_by_type(frame, family)
        frames.append(pd.concat([frame, pooled[frame.columns]], ignore_index=True))
        if rel.name in HN_HA_FAMILY:
            notices.append(f"{rel.name}: j_systematic_hz is the spread of <J> over the three published 3J(HN,HA) "
                           "parameter sets, a lower bound of the relation's own error (each fit scatters by "
                           "several tenths of a Hz about its data); read verdicts with that in mind.")
        elif rel.systematic_hz is None:
            notices.append(f"{rel.name}: the source gives no systematic spread; j_systematic_hz is empty and "
                           "comparisons with experiment use the statistical and experimental errors only "
                           "(Karplus relations are commonly good to about 0.5-1 Hz).")
    out = pd.concat(frames, ignore_index=True)
    if result.summary.get("parameters", {}).get("weights"):
        notices.append("the histograms are weighted sums (per-frame weights of the run); <J> is the "
                       "reweighted average.")
    return CouplingResult(couplings=out, relations=[r.describe() for r in relations], notices=notices,
                          substituents=subs_out)


# ----------------------------------------------------------------------------------------------
# Comparison with experiment
# ----------------------------------------------------------------------------------------------

def read_experimental(path):
    """Experimental couplings: DataFrame with columns label, j_exp_hz, j_exp_err_hz."""
    if not os.path.exists(path):
        raise InputFileError(f"experimental couplings file {path} does not exist.")
    try:
        table = pd.read_csv(path, comment="#", skipinitialspace=True)
    except Exception as exc:  # noqa: BLE001
        raise InputFileError(f"experimental couplings file {path} is not a readable CSV table: {exc}.") from None
    lower = {str(c).strip().lower(): c for c in table.columns}
    label = next((lower[k] for k in ("torsion", "residue", "label") if k in lower), None)
    if label is None or "j_hz" not in lower or "j_err_hz" not in lower:
        raise InputFileError(f"experimental couplings file {path} needs the columns torsion (or residue), "
                             f"J_hz and J_err_hz; its columns are {', '.join(map(str, table.columns))}.")
    out = pd.DataFrame({"label": table[label].astype(str).str.strip(),
                        "j_exp_hz": pd.to_numeric(table[lower["j_hz"]], errors="coerce"),
                        "j_exp_err_hz": pd.to_numeric(table[lower["j_err_hz"]], errors="coerce")})
    bad = out[~np.isfinite(out["j_exp_hz"]) | ~(out["j_exp_err_hz"] >= 0)]
    if len(bad):
        row = bad.index[0]
        raise InputFileError(f"experimental couplings file {path}, row {row + 1} ({out['label'][row]}): J_hz "
                             "must be a number and J_err_hz a non-negative number.")
    return out


def _match(label, table):
    """Row of ``table`` (one relation) for an experimental label, or None, plus how it matched."""
    rows = table[(table["level"] == "torsion") & (table["torsion"] == label)]
    if len(rows) == 1:
        return rows.iloc[0], "torsion"
    rows = table[(table["level"] == "type") & (table["type"] == label)]
    if len(rows) == 1:
        return rows.iloc[0], "type"
    per_torsion = table[table["level"] == "torsion"]
    if len(per_torsion["type"].unique()) == 1 and per_torsion["type"].iloc[0] == label and len(per_torsion) == 1:
        return per_torsion.iloc[0], "type"
    residue = per_torsion[per_torsion["torsion"].str.split(":").str[0] == label]
    if len(residue) == 1:
        return residue.iloc[0], "residue"
    if len(residue) > 1:
        return None, f"ambiguous: residue {label} has {len(residue)} torsions; give a torsion label"
    return None, "no matching torsion, type or residue"


def compare_with_experiment(couplings, experimental):
    """Per-point deviations, chi-square and a verdict for each relation.

    Parameters
    ----------
    couplings : DataFrame
        :attr:`CouplingResult.couplings`.
    experimental : DataFrame
        From :func:`read_experimental`.

    Returns
    -------
    points : DataFrame
        relation, label, matched_as, torsion, type, j_hz, j_err_hz, j_systematic_hz, j_exp_hz,
        j_exp_err_hz, deviation_hz, sigma_hz, z, chi_square, outlier.
    summary : list of dict
        Per relation: n_points, rmsd_hz, mean_deviation_hz, chi_square_per_point, p_value, outliers,
        verdict, unmatched.
    """
    from scipy.stats import chi2

    rows, summary = [], []
    for rel, table in couplings.groupby("relation", sort=False):
        unmatched = []
        for e in experimental.itertuples(index=False):
            hit, how = _match(e.label, table)
            if hit is None:
                unmatched.append(f"{e.label} ({how})")
                rows.append({"relation": rel, "label": e.label, "matched_as": how, "j_exp_hz": e.j_exp_hz,
                             "j_exp_err_hz": e.j_exp_err_hz})
                continue
            sys_err = hit["j_systematic_hz"] if np.isfinite(hit["j_systematic_hz"]) else 0.0
            sigma = float(np.sqrt(hit["j_err_hz"] ** 2 + e.j_exp_err_hz ** 2 + sys_err ** 2))
            dev = float(hit["j_hz"] - e.j_exp_hz)
            z = dev / sigma if sigma > 0 else np.inf * np.sign(dev)
            rows.append({"relation": rel, "label": e.label, "matched_as": how, "torsion": hit["torsion"],
                         "type": hit["type"], "j_hz": hit["j_hz"], "j_err_hz": hit["j_err_hz"],
                         "j_systematic_hz": hit["j_systematic_hz"], "j_exp_hz": e.j_exp_hz,
                         "j_exp_err_hz": e.j_exp_err_hz, "deviation_hz": dev, "sigma_hz": sigma, "z": z,
                         "chi_square": z ** 2, "outlier": bool(abs(z) > OUTLIER_Z)})
        pts = pd.DataFrame([r for r in rows if r["relation"] == rel and "deviation_hz" in r])
        n = len(pts)
        if n == 0:
            summary.append({"relation": rel, "n_points": 0, "verdict": "no data",
                            "unmatched": unmatched})
            continue
        chisq = float(pts["chi_square"].sum())
        p = float(chi2.sf(chisq, n))
        outliers = pts.loc[pts["outlier"], "label"].tolist()
        if p < P_INCONSISTENT:
            verdict = "inconsistent"
        elif p < P_TENSION or outliers:
            verdict = "tension"
        else:
            verdict = "consistent"
        summary.append({"relation": rel, "n_points": n,
                        "rmsd_hz": float(np.sqrt(np.mean(pts["deviation_hz"] ** 2))),
                        "mean_deviation_hz": float(pts["deviation_hz"].mean()),
                        "chi_square": chisq, "chi_square_per_point": chisq / n, "p_value": p,
                        "outliers": outliers, "verdict": verdict, "unmatched": unmatched})
    columns = ["relation", "label", "matched_as", "torsion", "type", "j_hz", "j_err_hz", "j_systematic_hz",
               "j_exp_hz", "j_exp_err_hz", "deviation_hz", "sigma_hz", "z", "chi_square", "outlier"]
    return pd.DataFrame(rows, columns=columns), summary


VERDICT_RULES = {
    "consistent": f"chi-square p-value >= {P_TENSION} and no point with |z| > {OUTLIER_Z:g}",
    "tension": f"{P_INCONSISTENT} <= p < {P_TENSION}, or a point with |z| > {OUTLIER_Z:g}",
    "inconsistent": f"p < {P_INCONSISTENT}",
    "sigma": "sqrt(j_err_hz^2 + J_err_hz^2 + j_systematic_hz^2), the systematic term where known",
}


def write_couplings(cres, folder, points=None, summary=None, experimental_path=None):
    """Write couplings.csv (and couplings_vs_experiment.csv) and couplings.json into ``folder``."""
    from ..io.tables import write_json, write_table

    paths = [write_table(cres.couplings, folder, "couplings.csv")]
    info = {"relations": cres.relations, "notices": list(cres.notices),
            "method": "<J> = sum_b n_b mean_b(J) / sum_b n_b over the fine histogram bins; statistical error "
                      "by blocking over the histogram blocks (within replicas); j_systematic_hz reported "
                      "separately",
            "substituents": {k: [{"delta_chi": d, "xi": x, "atom_index": a} for d, x, a in v]
                             for k, v in cres.substituents.items()},
            "cautions": [
                "Agreement of <J> does not prove the populations: different distributions can give the "
                "same average.",
                "Karplus relations are empirical fits to particular molecules; their own scatter "
                "(j_systematic_hz) is often larger than the statistical error.",
            ]}
    if points is not None:
        paths.append(write_table(points, folder, "couplings_vs_experiment.csv"))
        info["experimental"] = {"file": os.path.abspath(experimental_path) if experimental_path else None,
                                "summary": summary, "verdict_rules": VERDICT_RULES}
    paths.append(write_json(info, folder, "couplings.json"))
    return paths
