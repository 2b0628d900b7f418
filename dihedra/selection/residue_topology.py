"""The topology of proteins and nucleic acids as arrays, for :mod:`dihedra.selection.biopolymer`:
atom-name lookup tables per residue, links between consecutive residues (bonds, or distances when
the topology has none), and the notices about missing atoms, chain breaks and non-standard
residues."""

from __future__ import annotations

import numpy as np
import pandas as pd

from ..errors import SelectionError
from .residue_names import (KIND_AMINO_LIKE, KIND_CODE, KIND_NUCLEOTIDE_LIKE, LINK_DISTANCE, NAME_CODE,
                            N_NAME_CODES, SUGAR_PHOSPHATE, canonical_residue_name, classify_residue_name)
from .torsions import Torsion, bond_array as _bond_array, molecule_group

# --------------------------------------------------------------------------------------------
# the topology as arrays
# --------------------------------------------------------------------------------------------

class ResidueTopology:
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
        lookup = np.array([NAME_CODE.get(n, -1) for n in distinct] + [-1], dtype=np.int64)
        codes = lookup[name_ix]
        self.codes = codes

        kind = np.zeros(n_res, dtype=np.int64)
        standard = np.full(n_res, None, dtype=object)
        end = np.full(n_res, "", dtype=object)
        names, inverse = np.unique(self.resnames.astype(str), return_inverse=True)
        for k, name in enumerate(names):
            k_kind, k_std, k_end = classify_residue_name(name)
            where = inverse == k
            kind[where] = KIND_CODE.get(k_kind, 0)
            standard[where] = k_std
            end[where] = k_end

        # candidate residues: recognised names, or containing CA or C1'
        marker = np.isin(codes, [NAME_CODE["CA"], NAME_CODE["C1'"]])
        cand = kind > 0
        cand[self.resix[marker]] = True
        self.res = np.flatnonzero(cand)            # global residue index of each candidate
        self.compact = np.full(n_res + 1, -1, dtype=np.int64)
        self.compact[self.res] = np.arange(len(self.res))
        n_cand = len(self.res)

        sel = np.flatnonzero(cand[self.resix] & (codes >= 0))
        table = np.full((N_NAME_CODES, n_cand), -1, dtype=np.int64)
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
        self.kind[unknown & has("N") & has("CA") & has("C")] = KIND_AMINO_LIKE
        sugar = np.all([has(n) for n in SUGAR_PHOSPHATE], axis=0)
        self.kind[(self.kind == 0) & sugar] = KIND_NUCLEOTIDE_LIKE

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
            column = self.table[NAME_CODE[name]]
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
    def torsions(self, records, anchor_names, keep_variants=False):
        """Build Torsion objects from (k, rank, name, indices) records, sorted along the chain.

        The group of each residue comes from :func:`molecule_group` of its anchor atom (CA or
        C1'), or of atom B of its first torsion when the residue has no anchor. The type uses the
        standard residue of a force-field variant (:func:`canonical_residue_name`) unless
        ``keep_variants``; the variant is kept in ``Torsion.variant``.
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
                residue = resname if keep_variants else canonical_residue_name(resname)
                info = (self.tag(k), resname, int(self.resids[r]), str(self.segids[r]),
                        molecule_group(self.u.atoms[anchor]), residue,
                        resname if resname != canonical_residue_name(resname) else "")
            tag, resname, resid, segid, group, residue, variant = info
            out.append(Torsion(indices=tuple(indices), label=f"{tag}:{name}",
                               type=f"{residue}:{name}", name=name, resname=resname,
                               resid=resid, segid=segid, group=group, variant=variant))
        return out


# --------------------------------------------------------------------------------------------
# notices
# --------------------------------------------------------------------------------------------

class SelectionNotices:
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


def missing_atoms(topo, notices, kind_label, expected, rows, found_ok):
    """One notice per residue in ``rows`` for which some ``found_ok[angle]`` is False.

    ``expected`` lists the atom names the residue should have (alternatives joined by ``/``).
    """
    for k in rows:
        skipped = [angle for angle, ok in found_ok.items() if not ok[k]]
        if skipped:
            notices.add(kind_label, f"skipped {', '.join(skipped)} of {topo.where(k)}: expected "
                                    f"atoms {', '.join(expected)}; found {topo.found(k)}")


def neighbour_missing(topo, notices, kind_label, angle, rows, nxt, atom, atom_name):
    """Notices for residues whose linked next residue lacks an atom that ``angle`` needs."""
    lacking = rows[(nxt[rows] >= 0) & (atom[np.maximum(nxt[rows], 0)] < 0)]
    for k in lacking:
        notices.add(kind_label, f"skipped {angle} of {topo.where(k)}: the next residue "
                                f"{topo.where(nxt[k])} has no atom {atom_name}")


def expected_atoms(definitions):
    """Atom names of a list of four-atom definitions, in order, alternatives joined by ``/``."""
    out = []
    for atoms in definitions:
        for alternatives in atoms:
            label = "/".join(alternatives)
            if label not in out:
                out.append(label)
    return out


def duplicate_notices(topo, notices, rows):
    """One notice per residue in ``rows`` that has repeated names among the atoms we use."""
    if not len(topo.duplicates):
        return
    n_cand = len(topo.res)
    wanted = set(int(k) for k in rows)
    reverse = {v: name for name, v in NAME_CODE.items() if "*" not in name}
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

class ResidueLinks:
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


def chain_breaks(topo, links, notices, before_ok, after_ok, before_end, after_end,
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


def non_standard(topo, notices, rows, verb, noun):
    """One notice per residue name for residues whose name is not recognised."""
    by_name = {}
    for k in rows:
        by_name.setdefault(str(topo.resnames[topo.res[k]]), []).append(topo.where(k))
    for name, tags in by_name.items():
        shown = ", ".join(tags[:6]) + (", ..." if len(tags) > 6 else "")
        what = f"{len(tags)} residues ({shown})" if len(tags) > 1 else shown
        notices.add("non-standard residues",
                    f"{verb} of {what}: residue name {name} is not recognised as {noun}")
