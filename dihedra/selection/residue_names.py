"""Residue names and torsion definitions of proteins and nucleic acids: which residue names each
force field uses for the standard amino acids and nucleotides, caps and termini, and the atoms of
every named torsion (IUPAC-IUB Commission on Biochemical Nomenclature, J. Mol. Biol. 52 (1970) 1;
IUPAC-IUB JCBN, Eur. J. Biochem. 131 (1983) 9). Used by :mod:`dihedra.selection.biopolymer`."""

from __future__ import annotations

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
C_CAP_CARBON = ("CH3", "CA", "C", "CAT", "CT", "CM")


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

KIND_AMINO, KIND_AMINO_LIKE, KIND_N_CAP, KIND_C_CAP, KIND_NUCLEOTIDE, KIND_NUCLEOTIDE_LIKE = 1, 2, 3, 4, 5, 6


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


def canonical_residue_name(resname):
    """The residue name a torsion type uses for a force-field variant: the standard amino acid
    (``HSD``, ``HIE``, ``HISB`` -> ``HIS``; ``LYSH`` -> ``LYS``; ``CYX`` -> ``CYS``; AMBER terminal
    ``NALA`` -> ``ALA``), a nucleotide without its terminal mark (``DA5`` -> ``DA``, ``RG3`` -> ``RG``;
    DNA and RNA stay apart); any other name as it is.

    >>> [canonical_residue_name(n) for n in ("HSD", "HIE", "LYSH", "CYX", "NALA", "DA5", "A3", "HEX")]
    ['HIS', 'HIS', 'LYS', 'CYS', 'ALA', 'DA', 'A', 'HEX']
    """
    kind, standard, end = classify_residue_name(resname)
    name = str(resname).strip()
    if kind == "amino":
        return standard
    if kind == "nucleotide" and end and len(name) > 1:
        return name[:-1]
    return name


KIND_CODE = {"amino": KIND_AMINO, "n-cap": KIND_N_CAP, "c-cap": KIND_C_CAP, "nucleotide": KIND_NUCLEOTIDE}

# --------------------------------------------------------------------------------------------
# angle definitions: each atom is a tuple of accepted names, the first present is used
# --------------------------------------------------------------------------------------------


def chain_atoms(*names):
    return tuple((n,) if isinstance(n, str) else tuple(n) for n in names)


_CHI1_CG = chain_atoms("N", "CA", "CB", "CG")

#: Side-chain torsions of each standard amino acid (IUPAC-IUB 1970).
SIDECHAIN_TORSIONS = {
    "ARG": (("chi1", _CHI1_CG), ("chi2", chain_atoms("CA", "CB", "CG", "CD")),
            ("chi3", chain_atoms("CB", "CG", "CD", "NE")), ("chi4", chain_atoms("CG", "CD", "NE", "CZ")),
            ("chi5", chain_atoms("CD", "NE", "CZ", "NH1"))),
    "ASN": (("chi1", _CHI1_CG), ("chi2", chain_atoms("CA", "CB", "CG", "OD1"))),
    "ASP": (("chi1", _CHI1_CG), ("chi2", chain_atoms("CA", "CB", "CG", "OD1"))),
    "CYS": (("chi1", chain_atoms("N", "CA", "CB", "SG")),),
    "GLN": (("chi1", _CHI1_CG), ("chi2", chain_atoms("CA", "CB", "CG", "CD")),
            ("chi3", chain_atoms("CB", "CG", "CD", "OE1"))),
    "GLU": (("chi1", _CHI1_CG), ("chi2", chain_atoms("CA", "CB", "CG", "CD")),
            ("chi3", chain_atoms("CB", "CG", "CD", "OE1"))),
    "HIS": (("chi1", _CHI1_CG), ("chi2", chain_atoms("CA", "CB", "CG", "ND1"))),
    "ILE": (("chi1", chain_atoms("N", "CA", "CB", "CG1")),
            ("chi2", chain_atoms("CA", "CB", "CG1", ("CD1", "CD")))),
    "LEU": (("chi1", _CHI1_CG), ("chi2", chain_atoms("CA", "CB", "CG", "CD1"))),
    "LYS": (("chi1", _CHI1_CG), ("chi2", chain_atoms("CA", "CB", "CG", "CD")),
            ("chi3", chain_atoms("CB", "CG", "CD", "CE")), ("chi4", chain_atoms("CG", "CD", "CE", "NZ"))),
    "MET": (("chi1", _CHI1_CG), ("chi2", chain_atoms("CA", "CB", "CG", "SD")),
            ("chi3", chain_atoms("CB", "CG", "SD", "CE"))),
    "PHE": (("chi1", _CHI1_CG), ("chi2", chain_atoms("CA", "CB", "CG", "CD1"))),
    "PRO": (("chi1", _CHI1_CG), ("chi2", chain_atoms("CA", "CB", "CG", "CD"))),
    "SER": (("chi1", chain_atoms("N", "CA", "CB", "OG")),),
    "THR": (("chi1", chain_atoms("N", "CA", "CB", "OG1")),),
    "TRP": (("chi1", _CHI1_CG), ("chi2", chain_atoms("CA", "CB", "CG", "CD1"))),
    "TYR": (("chi1", _CHI1_CG), ("chi2", chain_atoms("CA", "CB", "CG", "CD1"))),
    "VAL": (("chi1", chain_atoms("N", "CA", "CB", "CG1")),),
}

#: Glycosidic chi by base (IUPAC-IUB 1983).
GLYCOSIDIC_TORSION = {
    "A": chain_atoms("O4'", "C1'", "N9", "C4"), "G": chain_atoms("O4'", "C1'", "N9", "C4"),
    "C": chain_atoms("O4'", "C1'", "N1", "C2"), "T": chain_atoms("O4'", "C1'", "N1", "C2"),
    "U": chain_atoms("O4'", "C1'", "N1", "C2"),
}

_NUCLEIC_ORDER = ("alpha", "beta", "gamma", "delta", "epsilon", "zeta", "chi")
SUGAR_PHOSPHATE = ("O5'", "C5'", "C4'", "C3'", "O3'")

# atom names that mark a chain end inside a residue
C_END_ATOMS = ("OXT", "OT1", "OT2", "OC1", "OC2", "O1", "O2")
N_END_ATOMS = ("H1", "H2", "H3", "HT1", "HT2", "HT3", "HN1", "HN2")
END5_ATOMS = ("H5T",)
END3_ATOMS = ("H3T",)


def _atom_names():
    names = {"N", "CA", "C", "CY", "NT", "CAT", "P", "O4'", "C1'"}
    names.update(C_CAP_CARBON, SUGAR_PHOSPHATE, C_END_ATOMS, N_END_ATOMS, END5_ATOMS,
                 END3_ATOMS)
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


NAME_CODE = _atom_names()
N_NAME_CODES = max(NAME_CODE.values()) + 1
