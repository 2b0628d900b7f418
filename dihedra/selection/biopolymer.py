"""Protein and nucleic-acid torsions by the IUPAC-IUB definitions.

Three pure functions turn a topology into a :class:`~dihedra.selection.torsions.TorsionSet`:

* :func:`protein_backbone_torsions`: phi, psi and omega of every linked amino-acid residue;
* :func:`protein_sidechain_torsions`: chi1 .. chi5 of every recognised amino-acid residue;
* :func:`nucleic_backbone_torsions`: alpha .. zeta and the glycosidic chi of every nucleotide.

Definitions
-----------
Protein (IUPAC-IUB Commission on Biochemical Nomenclature, J. Mol. Biol. 52 (1970) 1), owned by
residue *i*::

    phi   = C(i-1) - N - CA - C
    psi   = N - CA - C - N(i+1)
    omega = CA - C - N(i+1) - CA(i+1)
    chi1  = N - CA - CB - X      X = OG (Ser), SG (Cys), OG1 (Thr), CG1 (Val, Ile), CG (others)
    chi2  = CA - CB - CG - Y     Y = CD1 (Leu, Phe, Tyr, Trp), ND1 (His), OD1 (Asn, Asp), SD (Met),
                                 CD (Glu, Gln, Lys, Arg, Pro); Ile: CA - CB - CG1 - CD1
    chi3  = Glu, Gln: CB-CG-CD-OE1; Met: CB-CG-SD-CE; Lys: CB-CG-CD-CE; Arg: CB-CG-CD-NE
    chi4  = Lys: CG-CD-CE-NZ; Arg: CG-CD-NE-CZ
    chi5  = Arg: CD-NE-CZ-NH1

One branch atom per angle, as in the 1970 text: there is no second chi1 through CG2 of Val, Ile or
Thr, and no chi2 through CD2 of Leu, Phe, Tyr or Trp (Val and Thr have chi1 only). Pro has chi1 and
chi2 (CA-CB-CG-CD, the ring pucker); the ring-closing torsions CB-CG-CD-N and CG-CD-N-CA are not
side-chain rotations and are not reported. Symmetric end groups (Phe and Tyr chi2, Asp chi2, Glu
chi3, Arg chi5) take the branch atom of lower number, so their angles carry a 180-degree ambiguity
that a state scheme must allow for.

Nucleic acids (IUPAC-IUB Joint Commission on Biochemical Nomenclature, Eur. J. Biochem. 131 (1983)
9), owned by residue *i*::

    alpha   = O3'(i-1) - P - O5' - C5'
    beta    = P - O5' - C5' - C4'
    gamma   = O5' - C5' - C4' - C3'
    delta   = C5' - C4' - C3' - O3'
    epsilon = C4' - C3' - O3' - P(i+1)
    zeta    = C3' - O3' - P(i+1) - O5'(i+1)
    chi     = O4' - C1' - N9 - C4 (purines A, G), O4' - C1' - N1 - C2 (pyrimidines C, T, U)

Rules
-----
* **Links.** A neighbouring residue counts only when it is covalently linked: the bond C(i-1)-N(i)
  (O3'(i-1)-P(i) for nucleic acids) when the topology lists bonds for both atoms, otherwise a
  distance below 2.0 A in the current frame (minimum image when the box is known). A missing link
  between two residues of the same chain that are not marked as chain ends is a chain break: the
  angles across it are skipped with a notice. Chain ends (terminal atoms such as OXT, OT1/OT2,
  OC1/OC2, O1/O2, H1/H2/H3, HT1-HT3, H5T, H3T, or AMBER terminal residue names) are skipped
  silently.
* **Caps.** ACE and FOR give the carbonyl C for phi of the next residue; NME, NMA, NAC, NHE, NH2
  and ETA give N (and their methyl carbon, if any) for psi and omega of the residue before. The
  CHARMM patch atoms CY (acetyl) and NT/CAT (N-methylamide) inside a terminal residue play the same
  role. Caps get no torsions of their own.
* **Names.** Force-field residue names map to a standard residue for the definitions (HSD, HIE,
  HISE, CYX, LYSH, NALA, DA5, ADE, ...; see :data:`AMINO_ACID_NAMES` and :data:`NUCLEOTIDE_NAMES`);
  labels and types keep the residue name of the topology. The isoleucine delta carbon may be CD1
  or CD; primes may be written ``'`` or ``*``.
* **Non-standard residues.** A residue with an unknown name but the backbone atoms N, CA, C (or
  O5', C5', C4', C3', O3' for a nucleotide) that is linked into a chain gets its backbone
  torsions, with a notice; its side-chain (or glycosidic) torsions are skipped with a notice.
* **Missing atoms.** A recognised residue without an atom that an angle needs is skipped for that
  angle, with a notice naming the residue, the atoms expected and the heavy atoms found. Water,
  ions, lipids and ligands are ignored silently.

Every :class:`~dihedra.selection.torsions.Torsion` has ``label`` ``RESNAME RESID:name`` (``ALA12:phi``; the
caller makes labels unique across segments), ``type`` ``RESNAME:name`` (``HIE:chi2``), ``group``
from :func:`~dihedra.selection.torsions.molecule_group` of the residue's CA (or C1') atom and ``indices`` the
four 0-based atom indices in definition order.

Detection works on arrays of atom names and residue indices and on the bond list, so a system of
50,000 atoms takes a small fraction of a second (``benchmarks/selection_speed.py``).

Example
-------
>>> import MDAnalysis as mda
>>> from MDAnalysisTests.datafiles import PSF, DCD   # adenylate kinase, CHARMM
>>> u = mda.Universe(PSF, DCD)
>>> bb = protein_backbone_torsions(u)
>>> bb.labels[:4]
['MET1:psi', 'MET1:omega', 'ARG2:phi', 'ARG2:psi']
>>> protein_sidechain_torsions(u).torsions[0].type
'MET:chi1'

References
----------
IUPAC-IUB Commission on Biochemical Nomenclature, Abbreviations and symbols for the description of
the conformation of polypeptide chains, J. Mol. Biol. 52 (1970) 1-17.

IUPAC-IUB Joint Commission on Biochemical Nomenclature, Abbreviations and symbols for the
description of conformations of polynucleotide chains, Eur. J. Biochem. 131 (1983) 9-15.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from ..errors import SelectionError
from .torsions import Torsion, TorsionSet, bond_array as _bond_array, molecule_group

#: Largest distance (A) at which two residues count as linked when the topology has no bonds.
LINK_DISTANCE = 2.0

# --------------------------------------------------------------------------------------------
# residue names
# --------------------------------------------------------------------------------------------

#: Residue names recognised as each standard amino acid (CHARMM, AMBER, GROMACS/GROMOS, OPLS).
#: AMBER terminal names (``NALA``, ``CHIE``, ...) are recognised from these by their prefix.
AMINO_ACID_NAMES = {
    "ALA": ("ALA",),
    "ARG": ("ARG", "ARGN"),
    "ASN": ("ASN",),
    "ASP": ("ASP", "ASH", "ASPH", "ASPP"),
    "CYS": ("CYS", "CYX", "CYM", "CYS1", "CYS2", "CYSH"),
    "GLN": ("GLN",),
    "GLU": ("GLU", "GLH", "GLUH", "GLUP"),
    "GLY": ("GLY",),
    "HIS": ("HIS", "HSD", "HSE", "HSP", "HID", "HIE", "HIP", "HISD", "HISE", "HISH", "HISP",
            "HIS1", "HIS2", "HISA", "HISB"),
    "ILE": ("ILE",),
    "LEU": ("LEU",),
    "LYS": ("LYS", "LYN", "LYSH", "LYSN", "LSN"),
    "MET": ("MET",),
    "PHE": ("PHE",),
    "PRO": ("PRO",),
    "SER": ("SER",),
    "THR": ("THR",),
    "TRP": ("TRP",),
    "TYR": ("TYR",),
    "VAL": ("VAL",),
}

#: Caps before the first residue: they give the carbonyl C for phi.
N_CAPS = ("ACE", "FOR")
#: Caps after the last residue: they give N for psi (and the carbon on N, if any, for omega).
C_CAPS = ("NME", "NMA", "NAC", "NHE", "NH2", "ETA")
#: Names of the carbon bonded to N in a C-terminal cap, in order of preference.
_C_CAP_CARBON = ("CH3", "CA", "C", "CAT", "CT", "CM")


def _nucleotide_names():
    names = {}
    for base in "ACGTU":
        for prefix in ("", "D", "R"):
            for suffix in ("", "5", "3", "N"):
                names[f"{prefix}{base}{suffix}"] = base
    names.update({"ADE": "A", "CYT": "C", "GUA": "G", "THY": "T", "URA": "U"})
    return names


#: Residue name -> base (A, C, G, T, U): PDB (DA, A), AMBER (DA5, DA3, DAN, RA, A5), CHARMM (ADE).
NUCLEOTIDE_NAMES = _nucleotide_names()
PURINES = ("A", "G")

_AMINO, _AMINO_LIKE, _N_CAP, _C_CAP, _NUCLEOTIDE, _NUCLEOTIDE_LIKE = 1, 2, 3, 4, 5, 6


def _amino_lookup():
    lookup = {}
    for canonical, variants in AMINO_ACID_NAMES.items():
        for name in variants:
            lookup[name] = canonical
    return lookup


_AMINO_LOOKUP = _amino_lookup()


def classify_residue_name(resname):
    """Class, standard residue and terminal mark of a residue name.

    Returns
    -------
    (kind, standard, end) : (str or None, str or None, str)
        ``kind`` is ``"amino"``, ``"n-cap"``, ``"c-cap"``, ``"nucleotide"`` or None;
        ``standard`` the standard residue (``"HIS"``) or base (``"A"``); ``end`` is ``"N"``/``"C"``
        (``"5"``/``"3"``) for names that mark a chain end (``NALA``, ``DA5``), else ``""``.

    >>> classify_residue_name("HIE")
    ('amino', 'HIS', '')
    >>> classify_residue_name("CALA")
    ('amino', 'ALA', 'C')
    >>> classify_residue_name("DG5")
    ('nucleotide', 'G', '5')
    """
    name = str(resname).strip().upper()
    if name in _AMINO_LOOKUP:
        return "amino", _AMINO_LOOKUP[name], ""
    if len(name) == 4 and name[0] in "NC" and name[1:] in _AMINO_LOOKUP:
        return "amino", _AMINO_LOOKUP[name[1:]], name[0]
    if name in N_CAPS:
        return "n-cap", None, ""
    if name in C_CAPS:
        return "c-cap", None, ""
    if name in NUCLEOTIDE_NAMES:
        end = name[-1] if len(name) > 1 and name[-1] in "53" else ""
        return "nucleotide", NUCLEOTIDE_NAMES[name], end
    return None, None, ""


_KIND_CODE = {"amino": _AMINO, "n-cap": _N_CAP, "c-cap": _C_CAP, "nucleotide": _NUCLEOTIDE}

# --------------------------------------------------------------------------------------------
# angle definitions: each atom is a tuple of accepted names, the first present is used
# --------------------------------------------------------------------------------------------


def _chain(*names):
    return tuple((n,) if isinstance(n, str) else tuple(n) for n in names)


_CHI1_CG = _chain("N", "CA", "CB", "CG")

#: Side-chain torsions of each standard amino acid (IUPAC-IUB 1970).
SIDECHAIN_TORSIONS = {
    "ARG": (("chi1", _CHI1_CG), ("chi2", _chain("CA", "CB", "CG", "CD")),
            ("chi3", _chain("CB", "CG", "CD", "NE")), ("chi4", _chain("CG", "CD", "NE", "CZ")),
            ("chi5", _chain("CD", "NE", "CZ", "NH1"))),
    "ASN": (("chi1", _CHI1_CG), ("chi2", _chain("CA", "CB", "CG", "OD1"))),
    "ASP": (("chi1", _CHI1_CG), ("chi2", _chain("CA", "CB", "CG", "OD1"))),
    "CYS": (("chi1", _chain("N", "CA", "CB", "SG")),),
    "GLN": (("chi1", _CHI1_CG), ("chi2", _chain("CA", "CB", "CG", "CD")),
            ("chi3", _chain("CB", "CG", "CD", "OE1"))),
    "GLU": (("chi1", _CHI1_CG), ("chi2", _chain("CA", "CB", "CG", "CD")),
            ("chi3", _chain("CB", "CG", "CD", "OE1"))),
    "HIS": (("chi1", _CHI1_CG), ("chi2", _chain("CA", "CB", "CG", "ND1"))),
    "ILE": (("chi1", _chain("N", "CA", "CB", "CG1")),
            ("chi2", _chain("CA", "CB", "CG1", ("CD1", "CD")))),
    "LEU": (("chi1", _CHI1_CG), ("chi2", _chain("CA", "CB", "CG", "CD1"))),
    "LYS": (("chi1", _CHI1_CG), ("chi2", _chain("CA", "CB", "CG", "CD")),
            ("chi3", _chain("CB", "CG", "CD", "CE")), ("chi4", _chain("CG", "CD", "CE", "NZ"))),
    "MET": (("chi1", _CHI1_CG), ("chi2", _chain("CA", "CB", "CG", "SD")),
            ("chi3", _chain("CB", "CG", "SD", "CE"))),
    "PHE": (("chi1", _CHI1_CG), ("chi2", _chain("CA", "CB", "CG", "CD1"))),
    "PRO": (("chi1", _CHI1_CG), ("chi2", _chain("CA", "CB", "CG", "CD"))),
    "SER": (("chi1", _chain("N", "CA", "CB", "OG")),),
    "THR": (("chi1", _chain("N", "CA", "CB", "OG1")),),
    "TRP": (("chi1", _CHI1_CG), ("chi2", _chain("CA", "CB", "CG", "CD1"))),
    "TYR": (("chi1", _CHI1_CG), ("chi2", _chain("CA", "CB", "CG", "CD1"))),
    "VAL": (("chi1", _chain("N", "CA", "CB", "CG1")),),
}

#: Glycosidic chi by base (IUPAC-IUB 1983).
GLYCOSIDIC_TORSION = {
    "A": _chain("O4'", "C1'", "N9", "C4"), "G": _chain("O4'", "C1'", "N9", "C4"),
    "C": _chain("O4'", "C1'", "N1", "C2"), "T": _chain("O4'", "C1'", "N1", "C2"),
    "U": _chain("O4'", "C1'", "N1", "C2"),
}

_NUCLEIC_ORDER = ("alpha", "beta", "gamma", "delta", "epsilon", "zeta", "chi")
_SUGAR_PHOSPHATE = ("O5'", "C5'", "C4'", "C3'", "O3'")

# atom names that mark a chain end inside a residue
_C_END_ATOMS = ("OXT", "OT1", "OT2", "OC1", "OC2", "O1", "O2")
_N_END_ATOMS = ("H1", "H2", "H3", "HT1", "HT2", "HT3", "HN1", "HN2")
_5_END_ATOMS = ("H5T",)
_3_END_ATOMS = ("H3T",)


def _atom_names():
    names = {"N", "CA", "C", "CY", "NT", "CAT", "P", "O4'", "C1'"}
    names.update(_C_CAP_CARBON, _SUGAR_PHOSPHATE, _C_END_ATOMS, _N_END_ATOMS, _5_END_ATOMS,
                 _3_END_ATOMS)
    for defs in SIDECHAIN_TORSIONS.values():
        for _, atoms in defs:
            for alternatives in atoms:
                names.update(alternatives)
    for atoms in GLYCOSIDIC_TORSION.values():
        for alternatives in atoms:
            names.update(alternatives)
    ordered = sorted(names)
    codes = {name: k for k, name in enumerate(ordered)}
    for name in ordered:  # primes may be written as asterisks (O3*)
        if "'" in name:
            codes[name.replace("'", "*")] = codes[name]
    return codes


_NAME_CODE = _atom_names()
_N_CODES = max(_NAME_CODE.values()) + 1


# --------------------------------------------------------------------------------------------
# the topology as arrays
# --------------------------------------------------------------------------------------------

class _Topology:
    """Atom-name lookup tables of the residues that can hold biopolymer torsions.

    ``table[code, k]`` is the index of the atom with name ``code`` in candidate residue ``k``
    (or -1); candidate residues are those with a recognised name or with a CA or C1' atom.
    """

    def __init__(self, universe, what):
        u = universe
        self.u = u
        atoms = u.atoms
        self.resix = atoms.resindices
        residues = u.residues
        n_res = residues.n_residues
        for attr, label in (("resnames", "residue names"), ("names", "atom names")):
            if not hasattr(u.atoms, attr):
                raise SelectionError(
                    f"{what} torsions are recognised by residue and atom names, but this topology "
                    f"has no {label}; load a topology file that has them (e.g. PSF, PRMTOP, TPR, "
                    "GRO or PDB) together with the trajectory.")
        self.resnames = residues.resnames
        self.resids = residues.resids
        try:
            self.segids = residues.segids
        except Exception:  # topologies without segments
            self.segids = np.full(n_res, "", dtype=object)
        # code of each atom name (-1 for names no definition uses), via the distinct names
        name_ix, distinct = pd.factorize(atoms.names)
        lookup = np.array([_NAME_CODE.get(n, -1) for n in distinct] + [-1], dtype=np.int64)
        codes = lookup[name_ix]
        self.codes = codes

        kind = np.zeros(n_res, dtype=np.int64)
        standard = np.full(n_res, None, dtype=object)
        end = np.full(n_res, "", dtype=object)
        names, inverse = np.unique(self.resnames.astype(str), return_inverse=True)
        for k, name in enumerate(names):
            k_kind, k_std, k_end = classify_residue_name(name)
            where = inverse == k
            kind[where] = _KIND_CODE.get(k_kind, 0)
            standard[where] = k_std
            end[where] = k_end

        # candidate residues: recognised names, or containing CA or C1'
        marker = np.isin(codes, [_NAME_CODE["CA"], _NAME_CODE["C1'"]])
        cand = kind > 0
        cand[self.resix[marker]] = True
        self.res = np.flatnonzero(cand)            # global residue index of each candidate
        self.compact = np.full(n_res + 1, -1, dtype=np.int64)
        self.compact[self.res] = np.arange(len(self.res))
        n_cand = len(self.res)

        sel = np.flatnonzero(cand[self.resix] & (codes >= 0))
        table = np.full((_N_CODES, n_cand), -1, dtype=np.int64)
        rows, cols = codes[sel], self.compact[self.resix[sel]]
        table[rows[::-1], cols[::-1]] = sel[::-1]  # the first of duplicate names wins
        self.table = table
        flat = np.sort(rows * n_cand + cols)
        self.duplicates = np.unique(flat[1:][np.diff(flat) == 0])  # code * n_cand + residue

        self.kind = kind[self.res]
        self.standard = standard[self.res]
        self.end = end[self.res]
        unknown = self.kind == 0
        has = self.has
        self.kind[unknown & has("N") & has("CA") & has("C")] = _AMINO_LIKE
        sugar = np.all([has(n) for n in _SUGAR_PHOSPHATE], axis=0)
        self.kind[(self.kind == 0) & sugar] = _NUCLEOTIDE_LIKE

        # chain identity of each candidate residue: segment, chain ID and molecule number
        keys = [residues.segindices[self.res]]
        for attr in ("chainIDs", "molnums"):
            try:
                values = np.asarray(getattr(atoms, attr))
            except Exception:  # the topology has no such attribute
                values = None
            if values is not None and len(values) == atoms.n_atoms:
                per_res = np.empty(n_res, dtype=values.dtype)
                per_res[self.resix] = values
                keys.append(per_res[self.res])
        self.chain_keys = keys

        self.bonds = _bond_array(u)
        if self.bonds is not None:
            self.bonded = np.zeros(atoms.n_atoms, dtype=bool)
            self.bonded[self.bonds.ravel()] = True
        self.multi_segment = len(u.segments) > 1
        self._tags = {}
        self._positions = None

    # -- lookups ------------------------------------------------------------------------------
    def atom(self, names, rows=None):
        """Index of the first present atom among ``names`` in each candidate residue (or -1)."""
        if isinstance(names, str):
            names = (names,)
        out = None
        for name in names:
            column = self.table[_NAME_CODE[name]]
            if rows is not None:
                column = column[rows]
            out = column.copy() if out is None else np.where(out >= 0, out, column)
        return out

    def has(self, name, rows=None):
        return self.atom(name, rows) >= 0

    def has_any(self, names):
        return np.any([self.has(n) for n in names], axis=0)

    def same_chain(self, k):
        """Whether candidate residues k and k+1 belong to the same chain (k: index array)."""
        ok = np.ones(len(k), dtype=bool)
        for key in self.chain_keys:
            ok &= key[k] == key[k + 1]
        return ok

    def tag(self, k):
        """``RESNAME`` + ``RESID`` of candidate residue k, as :func:`residue_tag` writes it."""
        if k not in self._tags:
            r = self.res[k]
            self._tags[k] = f"{self.resnames[r]}{self.resids[r]}"
        return self._tags[k]

    def where(self, k):
        """Residue tag for notices, with the segment when there are several."""
        tag = self.tag(k)
        if self.multi_segment:
            return f"{self.segids[self.res[k]]}:{tag}"
        return tag

    def found(self, k):
        """Heavy-atom names of candidate residue k, for notices."""
        names = self.u.residues[self.res[k]].atoms.names
        heavy = [n for n in names if not n.lstrip("0123456789").startswith("H")]
        return ", ".join(heavy) if heavy else "no heavy atoms"

    def positions(self):
        if self._positions is None:
            try:
                self._positions = self.u.atoms.positions
            except Exception:  # a topology without coordinates
                self._positions = False
        return self._positions

    # -- torsions -----------------------------------------------------------------------------
    def torsions(self, records, anchor_names):
        """Build Torsion objects from (k, rank, name, indices) records, sorted along the chain.

        The group of each residue comes from :func:`molecule_group` of its anchor atom (CA or
        C1'), or of atom B of its first torsion when the residue has no anchor.
        """
        res = self.res.tolist()
        records.sort(key=lambda rec: (res[rec[0]], rec[1]))
        anchors = self.atom(anchor_names)
        out = []
        current, info = -1, None
        for k, _, name, indices in records:
            if k != current:
                current, r = k, res[k]
                anchor = int(anchors[k]) if anchors[k] >= 0 else indices[1]
                resname = str(self.resnames[r])
                info = (self.tag(k), resname, int(self.resids[r]), str(self.segids[r]),
                        molecule_group(self.u.atoms[anchor]))
            tag, resname, resid, segid, group = info
            out.append(Torsion(indices=tuple(indices), label=f"{tag}:{name}",
                               type=f"{resname}:{name}", name=name, resname=resname,
                               resid=resid, segid=segid, group=group))
        return out


# --------------------------------------------------------------------------------------------
# notices
# --------------------------------------------------------------------------------------------

class _Notices:
    """Notices grouped by kind; long lists are cut with a count of the rest."""

    LIMIT = 12

    def __init__(self):
        self.lines = {}

    def add(self, kind, line):
        self.lines.setdefault(kind, []).append(line)

    def render(self):
        out = []
        for kind, lines in self.lines.items():
            out.extend(lines[:self.LIMIT])
            if len(lines) > self.LIMIT:
                out.append(f"... and {len(lines) - self.LIMIT} more {kind}.")
        return out


def _missing_atoms(topo, notices, kind_label, expected, rows, found_ok):
    """One notice per residue in ``rows`` for which some ``found_ok[angle]`` is False.

    ``expected`` lists the atom names the residue should have (alternatives joined by ``/``).
    """
    for k in rows:
        skipped = [angle for angle, ok in found_ok.items() if not ok[k]]
        if skipped:
            notices.add(kind_label, f"skipped {', '.join(skipped)} of {topo.where(k)}: expected "
                                    f"atoms {', '.join(expected)}; found {topo.found(k)}")


def _neighbour_missing(topo, notices, kind_label, angle, rows, nxt, atom, atom_name):
    """Notices for residues whose linked next residue lacks an atom that ``angle`` needs."""
    lacking = rows[(nxt[rows] >= 0) & (atom[np.maximum(nxt[rows], 0)] < 0)]
    for k in lacking:
        notices.add(kind_label, f"skipped {angle} of {topo.where(k)}: the next residue "
                                f"{topo.where(nxt[k])} has no atom {atom_name}")


def _expected(definitions):
    """Atom names of a list of four-atom definitions, in order, alternatives joined by ``/``."""
    out = []
    for atoms in definitions:
        for alternatives in atoms:
            label = "/".join(alternatives)
            if label not in out:
                out.append(label)
    return out


def _duplicate_notices(topo, notices, rows):
    """One notice per residue in ``rows`` that has repeated names among the atoms we use."""
    if not len(topo.duplicates):
        return
    n_cand = len(topo.res)
    wanted = set(int(k) for k in rows)
    reverse = {v: name for name, v in _NAME_CODE.items() if "*" not in name}
    by_residue = {}
    for flat in topo.duplicates:
        code, k = divmod(int(flat), n_cand)
        if k in wanted:
            by_residue.setdefault(k, []).append(reverse[code])
    for k in sorted(by_residue, key=lambda k: topo.res[k]):
        notices.add("residues with repeated atom names",
                    f"{topo.where(k)} has more than one atom named {', '.join(by_residue[k])} "
                    "(alternate locations?); the first of each is used")


# --------------------------------------------------------------------------------------------
# links between residues
# --------------------------------------------------------------------------------------------

class _Links:
    """Covalent links tail(k) -> head(m) between candidate residues (C -> N, or O3' -> P)."""

    def __init__(self, topo, tail_name, head_name, tail_ok, head_ok):
        self.tail_name, self.head_name = tail_name, head_name
        tail = np.where(tail_ok, topo.atom(tail_name), -1)
        head = np.where(head_ok, topo.atom(head_name), -1)
        n = len(topo.res)
        self.next = np.full(n, -1, dtype=np.int64)   # residue linked after k
        self.prev = np.full(n, -1, dtype=np.int64)   # residue linked before k
        self.distance = np.full(n, np.nan)           # tail(k)-head(k+1) distance, when measured
        self.by_bond = np.zeros(n, dtype=bool)       # pair (k, k+1) judged from the bond list
        self.judged_by_distance = 0
        self.no_coordinates = False
        bonded = topo.bonded if topo.bonds is not None else np.zeros(len(topo.codes), dtype=bool)

        if topo.bonds is not None:
            is_tail = np.zeros(len(topo.codes), dtype=bool)
            is_head = np.zeros(len(topo.codes), dtype=bool)
            is_tail[tail[tail >= 0]] = True
            is_head[head[head >= 0]] = True
            a, b = topo.bonds[:, 0], topo.bonds[:, 1]
            forward, backward = is_tail[a] & is_head[b], is_tail[b] & is_head[a]
            t = np.concatenate([a[forward], b[backward]])
            h = np.concatenate([b[forward], a[backward]])
            kt, kh = topo.compact[topo.resix[t]], topo.compact[topo.resix[h]]
            keep = kt != kh
            self.next[kt[keep]] = kh[keep]
            self.prev[kh[keep]] = kt[keep]

        # consecutive residues whose link atoms are not both in the bond list: judge by distance
        k = np.arange(n - 1)
        consecutive = topo.res[k] + 1 == topo.res[k + 1]
        both_bonded = bonded[np.maximum(tail[k], 0)] & bonded[np.maximum(head[k + 1], 0)]
        pair = consecutive & (tail[k] >= 0) & (head[k + 1] >= 0)
        self.by_bond[k[pair & both_bonded]] = True
        judge = k[pair & ~both_bonded & (self.next[k] < 0) & (self.prev[k + 1] < 0)]
        if len(judge):
            positions = topo.positions()
            if positions is False:
                self.no_coordinates = True
            else:
                from MDAnalysis.lib.distances import calc_bonds

                box = topo.u.dimensions
                if box is not None and not np.all(np.asarray(box[:3]) > 0):
                    box = None
                d = calc_bonds(positions[tail[judge]], positions[head[judge + 1]], box=box)
                self.distance[judge] = d
                self.judged_by_distance = len(judge)
                linked = judge[d < LINK_DISTANCE]
                self.next[linked] = linked + 1
                self.prev[linked + 1] = linked
        self.tail, self.head = tail, head

    def notice(self, topo, what):
        if self.no_coordinates:
            return (f"the topology lists no {self.tail_name}-{self.head_name} bonds and has no "
                    f"coordinates: {what} across residues were skipped")
        if self.judged_by_distance:
            frame = getattr(topo.u.trajectory.ts, "frame", 0)
            rule = (f"count as linked when {self.tail_name}-{self.head_name} < "
                    f"{LINK_DISTANCE:.1f} A in the current frame (frame {frame})")
            if topo.bonds is None:
                return f"the topology has no bonds: neighbouring residues {rule}"
            return (f"the topology lists no {self.tail_name}-{self.head_name} bond for "
                    f"{self.judged_by_distance} pairs of neighbouring residues: they {rule}")
        return None

    def reason(self, topo, k):
        """Why consecutive residues k and k+1 are not linked."""
        if self.tail[k] < 0:
            return f"{topo.where(k)} has no atom {self.tail_name}"
        if self.head[k + 1] < 0:
            return f"{topo.where(k + 1)} has no atom {self.head_name}"
        if self.by_bond[k]:
            return f"no {self.tail_name}-{self.head_name} bond in the topology"
        if np.isfinite(self.distance[k]):
            return (f"{self.tail_name}-{self.head_name} distance {self.distance[k]:.1f} A; a link "
                    f"needs < {LINK_DISTANCE:.1f} A")
        return "no coordinates to judge the link"


def _chain_breaks(topo, links, notices, before_ok, after_ok, before_end, after_end,
                  lost_before, lost_after):
    """A notice for each unlinked pair of consecutive residues of one chain not marked as ends."""
    n = len(topo.res)
    if n < 2:
        return
    k = np.arange(n - 1)
    candidates = k[(topo.res[k] + 1 == topo.res[k + 1]) & before_ok[k] & after_ok[k + 1]
                   & ~before_end[k] & ~after_end[k + 1]
                   & (links.next[k] < 0) & (links.prev[k + 1] < 0)]
    candidates = candidates[topo.same_chain(candidates)]
    for k in candidates:
        parts = []
        if lost_before[k]:
            parts.append(f"{lost_before[k]} of {topo.where(k)}")
        if lost_after[k + 1]:
            parts.append(f"{lost_after[k + 1]} of {topo.where(k + 1)}")
        if not parts:
            continue
        notices.add("chain breaks", f"chain break between {topo.where(k)} and {topo.where(k + 1)} "
                                    f"({links.reason(topo, k)}): skipped {' and '.join(parts)}")


def _non_standard(topo, notices, rows, verb, noun):
    """One notice per residue name for residues whose name is not recognised."""
    by_name = {}
    for k in rows:
        by_name.setdefault(str(topo.resnames[topo.res[k]]), []).append(topo.where(k))
    for name, tags in by_name.items():
        shown = ", ".join(tags[:6]) + (", ..." if len(tags) > 6 else "")
        what = f"{len(tags)} residues ({shown})" if len(tags) > 1 else shown
        notices.add("non-standard residues",
                    f"{verb} of {what}: residue name {name} is not recognised as {noun}")


# --------------------------------------------------------------------------------------------
# the three selections
# --------------------------------------------------------------------------------------------

def _collect(records, rows, rank, name, columns):
    """Add the torsions ``name`` of residues ``rows`` whose four atoms all exist.

    ``columns`` are four arrays of atom indices (-1 where missing), one entry per row. Returns
    the rows that got the torsion.
    """
    stack = np.stack(columns, axis=1)
    ok = np.all(stack >= 0, axis=1)
    records.extend((k, rank, name, idx) for k, idx in zip(rows[ok].tolist(), stack[ok].tolist()))
    return rows[ok]


def protein_backbone_torsions(universe):
    """Protein backbone torsions phi, psi and omega (IUPAC-IUB 1970).

    Parameters
    ----------
    universe : MDAnalysis.Universe
        The topology; coordinates of the current frame are used only when the topology has no
        bonds, to decide which residues are linked.

    Returns
    -------
    TorsionSet
        ``phi`` = C(i-1)-N-CA-C, ``psi`` = N-CA-C-N(i+1), ``omega`` = CA-C-N(i+1)-CA(i+1), owned
        by residue *i*, in chain order; notices for chain breaks, missing atoms and residues with
        non-standard names.

    See Also
    --------
    protein_sidechain_torsions, nucleic_backbone_torsions
    """
    topo = _Topology(_universe(universe), "protein backbone")
    notices = _Notices()
    kind = topo.kind
    member = (kind == _AMINO) | (kind == _AMINO_LIKE)
    links = _Links(topo, "C", "N", tail_ok=member | (kind == _N_CAP),
                   head_ok=member | (kind == _C_CAP))

    n_at, ca, c = topo.atom("N"), topo.atom("CA"), topo.atom("C")
    # neighbour atoms: the linked residue, else CHARMM patch atoms inside the residue
    prev, nxt = links.prev, links.next
    prev_c = np.where(prev >= 0, links.tail[np.maximum(prev, 0)], topo.atom("CY"))
    next_n = np.where(nxt >= 0, links.head[np.maximum(nxt, 0)], topo.atom("NT"))
    nxt_safe = np.maximum(nxt, 0)
    next_carbon = np.where(kind[nxt_safe] == _C_CAP, topo.atom(_C_CAP_CARBON)[nxt_safe],
                           ca[nxt_safe])
    next_ca = np.where(nxt >= 0, next_carbon, np.where(next_n >= 0, topo.atom("CAT"), -1))

    linked = (prev >= 0) | (nxt >= 0) | (prev_c >= 0) | (next_n >= 0)
    rows = np.flatnonzero(member & ((kind == _AMINO) | linked))
    definitions = (
        ("phi", 0, (prev_c, n_at, ca, c)),
        ("psi", 1, (n_at, ca, c, next_n)),
        ("omega", 2, (ca, c, next_n, next_ca)),
    )
    records = []
    for name, rank, columns in definitions:
        _collect(records, rows, rank, name, [col[rows] for col in columns])

    # notices: own atoms missing (recognised residues), chain breaks, non-standard residues
    complete = (ca >= 0) & (c >= 0)
    own = {"phi": complete & (n_at >= 0), "psi": complete & (n_at >= 0), "omega": complete}
    _missing_atoms(topo, notices, "residues with missing backbone atoms", ["N", "CA", "C"],
                   np.flatnonzero(kind == _AMINO), own)
    with_ca = rows[member[np.maximum(nxt[rows], 0)] & (c[rows] >= 0)]
    _neighbour_missing(topo, notices, "residues with missing backbone atoms", "omega", with_ca,
                       nxt, ca, "CA")
    c_end = topo.has_any(_C_END_ATOMS) | (topo.end == "C") | topo.has("NT")
    n_end = topo.has_any(_N_END_ATOMS) | (topo.end == "N") | topo.has("CY")
    lost_before = np.where(member & (ca >= 0), "psi, omega", "")
    lost_after = np.where(member & (ca >= 0), "phi", "")
    _chain_breaks(topo, links, notices, before_ok=member | (kind == _N_CAP),
                  after_ok=member | (kind == _C_CAP), before_end=c_end, after_end=n_end,
                  lost_before=lost_before, lost_after=lost_after)
    _non_standard(topo, notices, rows[kind[rows] == _AMINO_LIKE],
                  "included phi, psi, omega (linked into a peptide chain)", "an amino acid")
    _duplicate_notices(topo, notices, rows)
    result = notices.render()
    link_note = links.notice(topo, "phi, psi and omega")
    if link_note:
        result.insert(0, link_note)
    return TorsionSet(topo.torsions(records, ("CA",)), result)


def protein_sidechain_torsions(universe):
    """Protein side-chain torsions chi1 .. chi5 (IUPAC-IUB 1970).

    Parameters
    ----------
    universe : MDAnalysis.Universe

    Returns
    -------
    TorsionSet
        ``chi1`` .. ``chi5`` of every recognised amino acid (see :data:`SIDECHAIN_TORSIONS`), in
        chain order; notices for missing atoms and for residues with backbone atoms but a name
        that is not recognised as an amino acid.

    See Also
    --------
    protein_backbone_torsions
    """
    topo = _Topology(_universe(universe), "protein side-chain")
    notices = _Notices()
    records = []
    rows_all = np.flatnonzero(topo.kind == _AMINO)
    for standard, definitions in SIDECHAIN_TORSIONS.items():
        rows = rows_all[topo.standard[rows_all] == standard]
        if not len(rows):
            continue
        found_ok = {}
        for rank, (name, atoms) in enumerate(definitions, start=3):
            columns = [topo.atom(alternatives, rows) for alternatives in atoms]
            found_ok[name] = np.zeros(len(topo.res), dtype=bool)
            found_ok[name][_collect(records, rows, rank, name, columns)] = True
        _missing_atoms(topo, notices, "residues with missing side-chain atoms",
                       _expected(atoms for _, atoms in definitions), rows, found_ok)
    _non_standard(topo, notices, np.flatnonzero(topo.kind == _AMINO_LIKE),
                  "skipped side-chain torsions", "an amino acid")
    _duplicate_notices(topo, notices, rows_all)
    return TorsionSet(topo.torsions(records, ("CA",)), notices.render())


def nucleic_backbone_torsions(universe):
    """Nucleic-acid backbone torsions alpha .. zeta and the glycosidic chi (IUPAC-IUB 1983).

    Parameters
    ----------
    universe : MDAnalysis.Universe
        The topology; coordinates of the current frame are used only when the topology has no
        bonds, to decide which residues are linked.

    Returns
    -------
    TorsionSet
        ``alpha``, ``beta``, ``gamma``, ``delta``, ``epsilon``, ``zeta`` and ``chi`` of every
        nucleotide, in chain order; notices for chain breaks, missing atoms and residues with a
        sugar-phosphate backbone but a name that is not recognised.

    See Also
    --------
    protein_backbone_torsions
    """
    topo = _Topology(_universe(universe), "nucleic-acid")
    notices = _Notices()
    kind = topo.kind
    member = (kind == _NUCLEOTIDE) | (kind == _NUCLEOTIDE_LIKE)
    links = _Links(topo, "O3'", "P", tail_ok=member, head_ok=member)
    prev, nxt = links.prev, links.next
    p, o5, c5, c4, c3, o3 = (topo.atom(n) for n in ("P", "O5'", "C5'", "C4'", "C3'", "O3'"))
    prev_o3 = np.where(prev >= 0, links.tail[np.maximum(prev, 0)], -1)
    next_p = np.where(nxt >= 0, links.head[np.maximum(nxt, 0)], -1)
    next_o5 = np.where(nxt >= 0, o5[np.maximum(nxt, 0)], -1)

    linked = (prev >= 0) | (nxt >= 0)
    rows = np.flatnonzero(member & ((kind == _NUCLEOTIDE) | linked))
    definitions = [
        ("alpha", (prev_o3, p, o5, c5)),
        ("beta", (p, o5, c5, c4)),
        ("gamma", (o5, c5, c4, c3)),
        ("delta", (c5, c4, c3, o3)),
        ("epsilon", (c4, c3, o3, next_p)),
        ("zeta", (c3, o3, next_p, next_o5)),
    ]
    records = []
    for rank, (name, columns) in enumerate(definitions):
        _collect(records, rows, rank, name, [col[rows] for col in columns])

    recognised = np.flatnonzero(kind == _NUCLEOTIDE)
    chi_ok = np.zeros(len(topo.res), dtype=bool)
    for base, atoms in GLYCOSIDIC_TORSION.items():
        sub = recognised[topo.standard[recognised] == base]
        if not len(sub):
            continue
        chi_ok[_collect(records, sub, 6, "chi", [topo.atom(alt, sub) for alt in atoms])] = True

    # notices: missing atoms of recognised nucleotides (P is absent at a 5' end by design)
    own = {"alpha": (prev < 0) | ((o5 >= 0) & (c5 >= 0)),
           "beta": (p < 0) | ((o5 >= 0) & (c5 >= 0) & (c4 >= 0)),
           "gamma": (o5 >= 0) & (c5 >= 0) & (c4 >= 0) & (c3 >= 0),
           "delta": (c5 >= 0) & (c4 >= 0) & (c3 >= 0) & (o3 >= 0),
           "epsilon": (c4 >= 0) & (c3 >= 0) & (o3 >= 0),
           "chi": chi_ok}
    for base in "AGCTU":
        sub = recognised[topo.standard[recognised] == base]
        if not len(sub):
            continue
        expected = _expected([_chain(*_SUGAR_PHOSPHATE), GLYCOSIDIC_TORSION[base]])
        _missing_atoms(topo, notices, "residues with missing nucleotide atoms", expected, sub, own)
    _neighbour_missing(topo, notices, "residues with missing nucleotide atoms", "zeta",
                       rows[(c3[rows] >= 0) & (o3[rows] >= 0)], nxt, o5, "O5'")
    three_end = topo.has_any(_3_END_ATOMS) | (topo.end == "3")
    five_end = topo.has_any(_5_END_ATOMS) | (topo.end == "5") | (p < 0)
    lost_before = np.where(member, "epsilon, zeta", "")
    lost_after = np.where(member, "alpha", "")
    _chain_breaks(topo, links, notices, before_ok=member, after_ok=member, before_end=three_end,
                  after_end=five_end, lost_before=lost_before, lost_after=lost_after)
    _non_standard(topo, notices, rows[kind[rows] == _NUCLEOTIDE_LIKE],
                  "included alpha to zeta but not chi (linked into a nucleic-acid chain)",
                  "a nucleotide")
    _duplicate_notices(topo, notices, rows)
    result = notices.render()
    link_note = links.notice(topo, "alpha, epsilon and zeta")
    if link_note:
        result.insert(0, link_note)
    return TorsionSet(topo.torsions(records, ("C1'",)), result)


def _universe(obj):
    """The Universe itself (an AtomGroup stands for its whole Universe)."""
    return getattr(obj, "universe", obj)
