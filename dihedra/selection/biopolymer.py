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
  HISE, CYX, LYSH, NALA, DA5, ADE, ...; see :data:`AMINO_ACID_NAMES` and :data:`NUCLEOTIDE_NAMES`).
  Labels keep the residue name of the topology (``HSD12:psi``); types use the standard residue
  (``HIS:psi``; nucleotides lose only their terminal mark, ``DA5`` -> ``DA``) so that force fields
  pool and compare, and ``Torsion.variant`` keeps the topology's name (``keep_variants=True``
  types by it instead). The isoleucine delta carbon may be CD1
  or CD; primes may be written ``'`` or ``*``.
* **Non-standard residues.** A residue with an unknown name but the backbone atoms N, CA, C (or
  O5', C5', C4', C3', O3' for a nucleotide) that is linked into a chain gets its backbone
  torsions, with a notice; its side-chain (or glycosidic) torsions are skipped with a notice.
* **Missing atoms.** A recognised residue without an atom that an angle needs is skipped for that
  angle, with a notice naming the residue, the atoms expected and the heavy atoms found. Water,
  ions, lipids and ligands are ignored silently.

Every :class:`~dihedra.selection.torsions.Torsion` has ``label`` ``RESNAME RESID:name`` (``ALA12:phi``; the
caller makes labels unique across segments), ``type`` ``RESIDUE:name`` (``HIS:chi2`` for a residue named HIE), ``group``
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

from .residue_names import (C_CAP_CARBON, C_END_ATOMS, END3_ATOMS, END5_ATOMS, GLYCOSIDIC_TORSION,
                            KIND_AMINO, KIND_AMINO_LIKE, KIND_C_CAP, KIND_NUCLEOTIDE, KIND_NUCLEOTIDE_LIKE,
                            KIND_N_CAP, N_END_ATOMS, SIDECHAIN_TORSIONS, SUGAR_PHOSPHATE, chain_atoms)
from .residue_topology import (ResidueLinks, ResidueTopology, SelectionNotices, chain_breaks, duplicate_notices,
                               expected_atoms, missing_atoms, neighbour_missing, non_standard)
from .torsions import TorsionSet

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


def protein_backbone_torsions(universe, keep_variants=False):
    """Protein backbone torsions phi, psi and omega (IUPAC-IUB 1970).

    Parameters
    ----------
    universe : MDAnalysis.Universe
        The topology; coordinates of the current frame are used only when the topology has no
        bonds, to decide which residues are linked.
    keep_variants : bool
        Type the torsions by the topology's residue name (``HSD:psi``) instead of the standard
        residue (``HIS:psi``, the default; the variant is in ``Torsion.variant``).

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
    topo = ResidueTopology(_universe(universe), "protein backbone")
    notices = SelectionNotices()
    kind = topo.kind
    member = (kind == KIND_AMINO) | (kind == KIND_AMINO_LIKE)
    links = ResidueLinks(topo, "C", "N", tail_ok=member | (kind == KIND_N_CAP),
                   head_ok=member | (kind == KIND_C_CAP))

    n_at, ca, c = topo.atom("N"), topo.atom("CA"), topo.atom("C")
    # neighbour atoms: the linked residue, else CHARMM patch atoms inside the residue
    prev, nxt = links.prev, links.next
    prev_c = np.where(prev >= 0, links.tail[np.maximum(prev, 0)], topo.atom("CY"))
    next_n = np.where(nxt >= 0, links.head[np.maximum(nxt, 0)], topo.atom("NT"))
    nxt_safe = np.maximum(nxt, 0)
    next_carbon = np.where(kind[nxt_safe] == KIND_C_CAP, topo.atom(C_CAP_CARBON)[nxt_safe],
                           ca[nxt_safe])
    next_ca = np.where(nxt >= 0, next_carbon, np.where(next_n >= 0, topo.atom("CAT"), -1))

    linked = (prev >= 0) | (nxt >= 0) | (prev_c >= 0) | (next_n >= 0)
    rows = np.flatnonzero(member & ((kind == KIND_AMINO) | linked))
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
    missing_atoms(topo, notices, "residues with missing backbone atoms", ["N", "CA", "C"],
                   np.flatnonzero(kind == KIND_AMINO), own)
    with_ca = rows[member[np.maximum(nxt[rows], 0)] & (c[rows] >= 0)]
    neighbour_missing(topo, notices, "residues with missing backbone atoms", "omega", with_ca,
                       nxt, ca, "CA")
    c_end = topo.has_any(C_END_ATOMS) | (topo.end == "C") | topo.has("NT")
    n_end = topo.has_any(N_END_ATOMS) | (topo.end == "N") | topo.has("CY")
    lost_before = np.where(member & (ca >= 0), "psi, omega", "")
    lost_after = np.where(member & (ca >= 0), "phi", "")
    chain_breaks(topo, links, notices, before_ok=member | (kind == KIND_N_CAP),
                  after_ok=member | (kind == KIND_C_CAP), before_end=c_end, after_end=n_end,
                  lost_before=lost_before, lost_after=lost_after)
    non_standard(topo, notices, rows[kind[rows] == KIND_AMINO_LIKE],
                  "included phi, psi, omega (linked into a peptide chain)", "an amino acid")
    duplicate_notices(topo, notices, rows)
    result = notices.render()
    link_note = links.notice(topo, "phi, psi and omega")
    if link_note:
        result.insert(0, link_note)
    return TorsionSet(topo.torsions(records, ("CA",), keep_variants), result)


def protein_sidechain_torsions(universe, keep_variants=False):
    """Protein side-chain torsions chi1 .. chi5 (IUPAC-IUB 1970).

    Parameters
    ----------
    universe : MDAnalysis.Universe
    keep_variants : bool
        As in :func:`protein_backbone_torsions`.

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
    topo = ResidueTopology(_universe(universe), "protein side-chain")
    notices = SelectionNotices()
    records = []
    rows_all = np.flatnonzero(topo.kind == KIND_AMINO)
    for standard, definitions in SIDECHAIN_TORSIONS.items():
        rows = rows_all[topo.standard[rows_all] == standard]
        if not len(rows):
            continue
        found_ok = {}
        for rank, (name, atoms) in enumerate(definitions, start=3):
            columns = [topo.atom(alternatives, rows) for alternatives in atoms]
            found_ok[name] = np.zeros(len(topo.res), dtype=bool)
            found_ok[name][_collect(records, rows, rank, name, columns)] = True
        missing_atoms(topo, notices, "residues with missing side-chain atoms",
                       expected_atoms(atoms for _, atoms in definitions), rows, found_ok)
    non_standard(topo, notices, np.flatnonzero(topo.kind == KIND_AMINO_LIKE),
                  "skipped side-chain torsions", "an amino acid")
    duplicate_notices(topo, notices, rows_all)
    return TorsionSet(topo.torsions(records, ("CA",), keep_variants), notices.render())


def nucleic_backbone_torsions(universe, keep_variants=False):
    """Nucleic-acid backbone torsions alpha .. zeta and the glycosidic chi (IUPAC-IUB 1983).

    Parameters
    ----------
    universe : MDAnalysis.Universe
        The topology; coordinates of the current frame are used only when the topology has no
        bonds, to decide which residues are linked.
    keep_variants : bool
        Type the torsions by the topology's residue name (``DA5:chi``) instead of the nucleotide
        without its terminal mark (``DA:chi``, the default).

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
    topo = ResidueTopology(_universe(universe), "nucleic-acid")
    notices = SelectionNotices()
    kind = topo.kind
    member = (kind == KIND_NUCLEOTIDE) | (kind == KIND_NUCLEOTIDE_LIKE)
    links = ResidueLinks(topo, "O3'", "P", tail_ok=member, head_ok=member)
    prev, nxt = links.prev, links.next
    p, o5, c5, c4, c3, o3 = (topo.atom(n) for n in ("P", "O5'", "C5'", "C4'", "C3'", "O3'"))
    prev_o3 = np.where(prev >= 0, links.tail[np.maximum(prev, 0)], -1)
    next_p = np.where(nxt >= 0, links.head[np.maximum(nxt, 0)], -1)
    next_o5 = np.where(nxt >= 0, o5[np.maximum(nxt, 0)], -1)

    linked = (prev >= 0) | (nxt >= 0)
    rows = np.flatnonzero(member & ((kind == KIND_NUCLEOTIDE) | linked))
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

    recognised = np.flatnonzero(kind == KIND_NUCLEOTIDE)
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
        expected = expected_atoms([chain_atoms(*SUGAR_PHOSPHATE), GLYCOSIDIC_TORSION[base]])
        missing_atoms(topo, notices, "residues with missing nucleotide atoms", expected, sub, own)
    neighbour_missing(topo, notices, "residues with missing nucleotide atoms", "zeta",
                       rows[(c3[rows] >= 0) & (o3[rows] >= 0)], nxt, o5, "O5'")
    three_end = topo.has_any(END3_ATOMS) | (topo.end == "3")
    five_end = topo.has_any(END5_ATOMS) | (topo.end == "5") | (p < 0)
    lost_before = np.where(member, "epsilon, zeta", "")
    lost_after = np.where(member, "alpha", "")
    chain_breaks(topo, links, notices, before_ok=member, after_ok=member, before_end=three_end,
                  after_end=five_end, lost_before=lost_before, lost_after=lost_after)
    non_standard(topo, notices, rows[kind[rows] == KIND_NUCLEOTIDE_LIKE],
                  "included alpha to zeta but not chi (linked into a nucleic-acid chain)",
                  "a nucleotide")
    duplicate_notices(topo, notices, rows)
    result = notices.render()
    link_note = links.notice(topo, "alpha, epsilon and zeta")
    if link_note:
        result.insert(0, link_note)
    return TorsionSet(topo.torsions(records, ("C1'",), keep_variants), result)


def _universe(obj):
    """The Universe itself (an AtomGroup stands for its whole Universe)."""
    return getattr(obj, "universe", obj)
