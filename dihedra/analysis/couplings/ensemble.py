r"""Ensemble-averaged 3J couplings of a tracking result: :func:`ensemble_couplings`.

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
between replicas). In a run of few correlation times neighbouring blocks are correlated and that
error is too small (8 blocks of a run of 10 correlation times see about 0.4 of the variance): it
is raised as the populations' errors are (:mod:`dihedra.numerics.blocking_bias`), with the run's
length in correlation times taken from the state populations of the torsion's type (64 blocks
per replica, enough levels to fit it; the shortest over the states, whose relaxation dominates
the slow part of J), never lowered. Pooled per torsion type, <J> is the mean over the torsions of the type and
its error is that of pooled populations: sqrt(sum se_i^2)/n for copies of one molecule, plus the
spread between the torsions where they differ more than their errors explain (the residues of a
protein; DerSimonian-Laird, :mod:`dihedra.numerics.heterogeneity`).

Which torsions: each relation states the atoms it couples. The 3J(HN,HA) relations take protein
phi torsions of residues that carry an amide H and an H-alpha (read from the topology): proline
is left out, and a glycine gets a row for each H-alpha (theta = phi - 60 for the one where
L-amino acids carry HA, phi + 60 for the other, told apart by the coordinates of the topology)
and one for their sum. The H-C-C-H relations take torsions whose end atoms are hydrogens. A
relation with no such torsion in the folder is an error; ``types`` takes other torsions as
given, with a notice.

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

With experimental values (:mod:`dihedra.analysis.couplings.experiment`), the averages are compared
with them in the same call (a glycine's value with the sum of its two H-alpha unless the value's
``coupled_atoms`` names one); a value for a torsion of the folder that a relation has no row for
(a proline's phi) is reported with the reason.
"""

from __future__ import annotations

import os
from dataclasses import dataclass, field, replace

import numpy as np
import pandas as pd

from ...errors import DihedraError, InputFileError
from ...numerics.heterogeneity import pooled_mean_error
from ...trajectory.result import kept_block
from .experiment import VERDICT_RULES, compare_with_experiment
from .relations import HN_HA_FAMILY, KarplusRelation, get_relation, substituents_of


# ----------------------------------------------------------------------------------------------
# Substituents of H-C-C-H torsions (Haasnoot-Altona): bonds and elements of the topology
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



def _topology_universe(result, notices, universe=None, need_bonds=True, why="the Haasnoot-Altona relation reads its bonds and elements"):
    """The universe whose bonds, elements and coordinates give the substituents (or the protons
    of an HN-HA coupling): ``universe`` if given, else the topology recorded in the result's
    summary (first frame if it has no coordinates)."""
    from ...trajectory.inputs import load_universe, sha256

    if universe is not None:
        path, u = "given", universe
    else:
        top = result.summary.get("topology", {})
        path = top.get("path")
        if not path or not os.path.exists(path):
            raise InputFileError(f"the topology recorded in summary.json ({path}) is not there; {why} "
                                 "(give the Universe with universe=...).")
        if top.get("sha256") and sha256(path) != top["sha256"]:
            notices.append(f"the topology {path} changed since tracking (SHA-256 differs); its bonds and "
                           "elements were used as they are now.")
        u = load_universe(path)
        try:
            u.atoms.positions
        except Exception:  # noqa: BLE001 - a topology without coordinates (PSF, PRMTOP): first frame
            traj = result.summary.get("replicas", [{}])[0].get("trajectory")
            u = load_universe(path, traj)
    if not need_bonds:
        return u
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

def relation_kernels(relation, result, torsion_positions, notices=None, universe=None, extra_offsets=None):
    """Bin means of J for each chosen torsion: array (n_chosen, n_fine_bins), and substituents
    (read from ``universe``, default the recorded topology, for ``haasnoot-altona``).

    ``extra_offsets`` (deg, one per chosen torsion; NaN = none) shift a row's relation (glycine's
    second H-alpha: theta = phi + 60 instead of phi - 60); a row with the offset ``SUM_OF_BOTH``
    gets the sum of the unshifted and the shifted relation (both H-alpha of glycine in one
    splitting)."""
    notices = [] if notices is None else notices
    edges = np.asarray(result.blocks.get("bin_edges_deg", np.linspace(-180, 180, 361)), dtype=float)
    if relation.form != "haasnoot-altona":
        row = relation.bin_means(edges)
        out = np.tile(row, (len(torsion_positions), 1))
        for k, extra in enumerate(extra_offsets if extra_offsets is not None else []):
            if np.isnan(extra):
                continue
            shifted = replace(relation, offset_deg=relation.offset_deg + (GLY_SHIFT_DEG if extra == SUM_OF_BOTH
                                                                          else extra)).bin_means(edges)
            out[k] = row + shifted if extra == SUM_OF_BOTH else shifted
        return out, [[] for _ in torsion_positions]
    u = _topology_universe(result, notices, universe)
    elements = _elements(u, notices)
    coords = u.atoms.positions.astype(float)
    indices = result.torsion_set.indices
    kernels, subs = [], []
    for k in torsion_positions:
        s = substituents_of(u, indices[k], relation, coords, elements)
        kernels.append(relation.bin_means(edges, [(d, x) for d, x, _ in s]))
        subs.append(s)
    return np.array(kernels), subs


#: theta of glycine's second H-alpha relative to the first (the HA of L-amino acids): +120 deg.
GLY_SHIFT_DEG = 120.0
#: Marks a row that sums both H-alpha couplings of a glycine.
SUM_OF_BOTH = 1e9


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
    """Positions of the torsions to average: ``select`` (types or labels; taken as given, with a
    notice for those the relation is not meant for), else those the relation applies to; none is
    an error that names the atoms the relation couples."""
    notices = [] if notices is None else notices
    labels = result.torsion_set.labels
    types = result.torsion_set.types
    mask = _looks_applicable(relation, result.torsions)
    if select:
        wanted = set(select)
        pos = [k for k, (lab, typ) in enumerate(zip(labels, types)) if lab in wanted or typ in wanted]
        unknown = wanted - set(labels) - set(types)
        if unknown:
            raise DihedraError(f"{sorted(unknown)[0]!r} is neither a torsion label nor a type of this "
                               f"results folder (e.g. {labels[0]!r}, {types[0]!r}); see torsions.csv.")
        foreign = [labels[k] for k in pos if not mask[k]]
        if foreign:
            notices.append(f"{relation.name} couples {relation.coupled_atoms()}; {len(foreign)} selected torsion(s) "
                           f"are not that torsion (e.g. {foreign[0]}): <J> was computed as if they were, "
                           "meaningful only if the offset maps them onto the coupled protons.")
        return pos
    if mask.any():
        return list(np.flatnonzero(mask))
    raise DihedraError(f"{relation.name} couples {relation.coupled_atoms()}, and no torsion of this folder is "
                       f"{'a protein phi' if relation.applies_to == 'phi' else 'an H-C-C-H torsion'} "
                       f"(its types are e.g. {', '.join(list(dict.fromkeys(types))[:4])}); track "
                       f"{'them with --torsions protein-backbone' if relation.applies_to == 'phi' else 'the H-C-C-H torsions (--torsions A,B,C,D or a TOML file of named torsions)'}"
                       ", or choose a torsion to take as one (--types).")


def coupling_rows(result, relation, positions, notices, universe=None, left_out=None):
    """The rows of an HN-HA relation: ``(positions, extra offsets, coupled atoms)``; ``left_out``
    (a dict, if given) receives {label: why} of the torsions left out.

    Protein phi torsions whose residue has no amide H (proline; a united-atom topology) are left
    out; a glycine gives a row for each H-alpha (the one where L-amino acids carry HA: theta =
    phi - 60, the other: phi + 60, told apart by the topology's coordinates) and one for their sum
    (what a spectrum shows when the two H-alpha resonate together). Other relations: one row per
    torsion, the coupled atoms its own end atoms."""
    names = result.torsions["atom_names"].fillna("").astype(str).tolist() if "atom_names" in result.torsions \
        else [""] * len(result.torsion_set)
    phi = _looks_applicable(relation, result.torsions) if relation.applies_to == "phi" else None
    if phi is None or not any(phi[k] for k in positions):
        ends = [names[k].split() for k in positions]
        return list(positions), [np.nan] * len(positions), [f"{a[0]},{a[3]}" if len(a) == 4 else "" for a in ends]
    u = _topology_universe(result, notices, universe, need_bonds=False,
                           why=f"{relation.name} reads which residues carry an amide H and where glycine's two H-alpha sit")
    out_pos, extra, coupled, no_h, no_ha = [], [], [], [], []
    left_out = {} if left_out is None else left_out
    indices = result.torsion_set.indices
    labels = result.torsion_set.labels
    for k in positions:
        if not phi[k]:
            out_pos.append(k), extra.append(np.nan), coupled.append("")
            continue
        c_prev, n, ca, c = (int(i) for i in indices[k])
        hn = _hydrogens(u, n, ("H", "HN"))
        ha = _hydrogens(u, ca, ("HA", "HA1", "HA2", "HA3"))
        if not hn:
            no_h.append(labels[k])
            left_out[labels[k]] = (
                f"{relation.name} does not apply to it: its residue has no amide H; a proline has none, or "
                "the topology lacks that hydrogen")
            continue
        if not ha:
            no_ha.append(labels[k])
            left_out[labels[k]] = (
                f"{relation.name} does not apply to it: its residue has no H-alpha in the topology")
            continue
        if len(ha) == 1:
            out_pos.append(k), extra.append(np.nan), coupled.append(f"{hn[0][1]},{ha[0][1]}")
            continue
        pos = u.atoms.positions
        order = sorted(ha, key=lambda h: abs(_wrap(_dihedral(pos, c_prev, n, ca, h[0]) - _dihedral(pos, c_prev, n, ca, c) - 120.0)))
        (first, name1), (_, name2) = order[0], order[1]
        for e, what in ((np.nan, name1), (GLY_SHIFT_DEG, name2), (SUM_OF_BOTH, f"{name1}+{name2}")):
            out_pos.append(k), extra.append(e), coupled.append(f"{hn[0][1]},{what}")
    if no_h:
        notices.append(f"{relation.name}: {len(no_h)} phi torsion(s) left out, their residues have no amide H "
                       f"(e.g. {no_h[0]}: proline, or a topology without that hydrogen).")
    if no_ha:
        notices.append(f"{relation.name}: {len(no_ha)} phi torsion(s) left out, their residues have no H-alpha "
                       f"in the topology (e.g. {no_ha[0]}).")
    if not out_pos:
        raise DihedraError(f"{relation.name} couples {relation.coupled_atoms()}, and none of the chosen phi "
                           "torsions has both an amide H and an H-alpha in the topology (a united-atom model?).")
    return out_pos, extra, coupled


def _hydrogens(u, atom, names):
    """``[(index, name)]`` of the hydrogens on ``atom``: bonded ones, else the ones of its residue
    with one of ``names``."""
    a = u.atoms[atom]
    try:
        bonded = [b for b in a.bonded_atoms if str(b.name).upper().startswith("H") or
                  str(getattr(b, "element", "")).upper() == "H"]
    except Exception:  # noqa: BLE001 - no bonds in the topology
        bonded = None
    if bonded is None or (not bonded and not len(u.bonds)):
        bonded = [b for b in a.residue.atoms if str(b.name) in names]
    return [(int(b.index), str(b.name)) for b in bonded]


def _dihedral(pos, a, b, c, d):
    from MDAnalysis.lib.distances import calc_dihedrals

    return float(np.degrees(calc_dihedrals(pos[[a]], pos[[b]], pos[[c]], pos[[d]])[0]))


def _wrap(x):
    return (x + 180.0) % 360.0 - 180.0


def couplings_from_histograms(histograms, block_replica, kernels, spans=None):
    """<J> per torsion and its blocking standard error from block histograms.

    Parameters
    ----------
    histograms : ndarray (n_blocks, n_torsions, n_bins)
        (Weighted) fine histograms per block.
    block_replica : ndarray (n_blocks,)
    kernels : ndarray (n_torsions, n_bins)
        Bin means of J (Hz).
    spans : ndarray (n_torsions,), optional
        Each torsion's replica length in correlation times (:func:`short_run_spans`): the errors
        are raised for the bias of blocking a run of few correlation times
        (:func:`~dihedra.numerics.blocking_bias.errors_at_span`); NaN or ``None``: as blocked.

    Returns
    -------
    j_hz, j_err_hz, n_samples : ndarrays (n_torsions,)
    """
    from ...numerics.blocking_bias import errors_at_span
    from ...numerics.statistics import blocking_error

    h = np.asarray(histograms, dtype=float)
    num = np.einsum("btk,tk->bt", h, np.asarray(kernels, dtype=float))
    den = h.sum(axis=2)
    if not (den.sum(axis=0) > 0).all():
        bad = int(np.flatnonzero(den.sum(axis=0) <= 0)[0])
        raise DihedraError(f"torsion number {bad} has no sampled frames; no coupling can be averaged.")
    # (16 blocks per replica give two levels, too few to fit a span: it comes from the states)
    mean, se, _, found = blocking_error(num, den, block_replica, short_run=False, levels=True)
    if spans is not None and len(found.n_blocks):
        se = errors_at_span(se, found.se[-1], spans, found.n_blocks[-1], found.n_replicas)
    return mean, se, den.sum(axis=0)


def short_run_spans(result, positions):
    """The span in correlation times per replica of each torsion at ``positions``: the shortest
    over the states of its type (:func:`~dihedra.numerics.populations.type_spans`, fitted to the
    blocking levels of the state populations, which have more blocks than the histograms); NaN
    where none was fitted (too few frames, no state changes)."""
    from ...numerics.populations import type_spans

    blocks = result.blocks
    if "state_counts" not in blocks or "block_replica" not in blocks:
        return None
    types = list(result.torsion_set.types)
    spans = type_spans(kept_block(blocks, "state_counts"), blocks["block_replica"], types)
    return np.array([spans.get(types[k], np.nan) for k in positions], dtype=float)


def _pool_by_type(frame, family=None):
    """Rows ``level = type`` (per type and coupled protons, with more than one torsion): mean <J>,
    its error as for pooled populations (sqrt(sum se^2)/n, plus the spread between the torsions
    where Cochran's Q finds them heterogeneous: :func:`~dihedra.numerics.heterogeneity.pooled_mean_error`);
    the parameter-set spread of the pooled means when ``family`` (n_sets, n_torsions) is given."""
    rows = []
    for (typ, _), idx in frame.groupby(["type", "coupled_atoms"], sort=False).indices.items():
        if len(idx) < 2:
            continue
        sub = frame.iloc[idx]
        if family is not None:
            systematic = float(np.std(family[:, idx].mean(axis=1), ddof=1))
        else:
            systematic = float(sub["j_systematic_hz"].iloc[0])
        pooled = pooled_mean_error(sub["j_hz"].to_numpy(), sub["j_err_hz"].to_numpy())
        rows.append({**sub.iloc[0].to_dict(), "level": "type", "torsion": "", "j_hz": sub["j_hz"].mean(),
                     "j_err_hz": pooled["se"],
                     "j_systematic_hz": systematic, "n_samples": sub["n_samples"].sum()})
    return pd.DataFrame(rows, columns=frame.columns)



def _relation_couplings(result, rel, select, notices, universe):
    """Per-torsion and per-type rows of one relation, the substituents it used, and the torsions it
    has no row for: {label: (type, why)}."""
    blocks = result.blocks
    hist = kept_block(blocks, "histograms")   # (as counted: only the torsions used become float)
    rep = np.asarray(blocks["hist_block_replica"])
    labels = np.array(result.torsion_set.labels)
    types = np.array(result.torsion_set.types)
    chosen, why = choose_torsions(result, rel, select, notices), {}
    pos, extra, coupled = coupling_rows(result, rel, chosen, notices, universe, why)
    skipped = ("not among the torsions chosen (types)" if select else
               f"{rel.name} does not apply to it: it couples {rel.coupled_atoms()}, which this torsion is not")
    rest = sorted(set(range(len(labels))) - set(pos), key=lambda k: (labels[k] not in why, k))  # (reasons first)
    left_out = {str(labels[k]): (str(types[k]), why.get(labels[k], skipped)) for k in rest}
    kern, subs = relation_kernels(rel, result, pos, notices, universe, extra)
    hist = np.asarray(hist[:, pos, :], dtype=float)
    j, err, n = couplings_from_histograms(hist, rep, kern, short_run_spans(result, pos))
    systematic = np.full(len(pos), np.nan if rel.systematic_hz is None else float(rel.systematic_hz))
    family = None
    if rel.name in HN_HA_FAMILY:
        family = np.array([couplings_from_histograms(hist, rep,
                                                     relation_kernels(get_relation(f), result, pos,
                                                                      extra_offsets=extra)[0])[0]
                           for f in HN_HA_FAMILY])
        systematic = np.std(family, axis=0, ddof=1)
    frame = pd.DataFrame({"relation": rel.name, "coupling": rel.coupling, "level": "torsion",
                          "torsion": labels[pos], "type": types[pos], "coupled_atoms": coupled, "j_hz": j,
                          "j_err_hz": err, "j_systematic_hz": systematic, "systematic_basis": rel.systematic_basis,
                          "n_samples": n})
    used = {labels[k]: s for k, s in zip(pos, subs)} if rel.form == "haasnoot-altona" else {}
    pooled = _pool_by_type(frame, family)
    if rel.name in HN_HA_FAMILY:
        notices.append(f"{rel.name}: j_systematic_hz is the spread of <J> over the three published 3J(HN,HA) "
                       "parameter sets, a lower bound of the relation's own error (each fit scatters by "
                       "several tenths of a Hz about its data); read verdicts with that in mind.")
    elif rel.systematic_hz is None:
        notices.append(f"{rel.name}: the source gives no systematic spread; j_systematic_hz is empty and "
                       "comparisons with experiment use the statistical and experimental errors only "
                       "(Karplus relations are commonly good to about 0.5-1 Hz).")
    return pd.concat([frame, pooled[frame.columns]], ignore_index=True), used, left_out


#: How the averages are made, as written into couplings.json.
METHOD = ("<J> = sum_b n_b mean_b(J) / sum_b n_b over the fine histogram bins; statistical error "
          "by blocking over the histogram blocks (within replicas); j_systematic_hz reported "
          "separately")
CAUTIONS = [
    "Agreement of <J> does not prove the populations: different distributions can give the "
    "same average.",
    "Karplus relations are empirical fits to particular molecules; their own scatter "
    "(j_systematic_hz) is often larger than the statistical error.",
]


@dataclass
class CouplingResult:
    """Result of :func:`ensemble_couplings`.

    Attributes
    ----------
    couplings : DataFrame
        relation, coupling, level (``torsion`` / ``type``), torsion, type, coupled_atoms (the two
        protons, e.g. ``HN,HA``; a glycine has rows ``HN,HA1``, ``HN,HA2`` and ``HN,HA1+HA2``),
        j_hz, j_err_hz, j_systematic_hz, systematic_basis, n_samples.
    relations : list of dict
        Descriptions of the relations used.
    notices : list of str
    substituents : dict
        torsion -> list of (delta_chi, xi, atom_index) (Haasnoot-Altona only).
    experiment : DataFrame or None
        With experimental values: one row per value and relation (see
        :func:`~dihedra.analysis.couplings.experiment.compare_with_experiment`).
    experiment_summary : list of dict or None
        With experimental values: per relation n_points, rmsd_hz, mean_deviation_hz, chi-square,
        p_value, outliers, verdict, unmatched.
    parameters : dict
        The options of the call.
    """

    couplings: pd.DataFrame
    relations: list
    notices: list = field(default_factory=list)
    substituents: dict = field(default_factory=dict)
    experiment: pd.DataFrame | None = None
    experiment_summary: list | None = None
    parameters: dict = field(default_factory=dict)

    def file_names(self):
        """The files :meth:`save` writes, per relation (see :func:`coupling_file_names`)."""
        return [name for r in self.relations for name in coupling_file_names(r["name"], self.experiment is not None)]

    def save(self, folder, experimental_path=None):
        """Write the files of every relation into ``folder``: ``couplings_<relation>.csv``, with
        experimental values ``couplings_<relation>_vs_experiment.csv``, and
        ``couplings_<relation>.json`` (``experimental_path``, the file the experimental values came
        from, is recorded there). A run with another relation adds its files beside these; a run
        with the same relation replaces them. Returns the paths."""
        from ...io.outputs import file_set
        from ...io.tables import write_json, write_table

        paths = []
        with file_set(folder):   # (all in place together, or none)
            for rel in self.relations:
                table, exp, info_name = coupling_file_names(rel["name"], True)
                paths.append(write_table(self.couplings[self.couplings["relation"] == rel["name"]], folder, table))
                info = {"relations": [rel], "notices": list(self.notices), "method": METHOD,
                        "substituents": {k: [{"delta_chi": d, "xi": x, "atom_index": a} for d, x, a in v]
                                         for k, v in self.substituents.items()},
                        "cautions": list(CAUTIONS)}
                if self.experiment is not None:
                    paths.append(write_table(self.experiment[self.experiment["relation"] == rel["name"]], folder, exp))
                    info["experimental"] = {"file": os.path.abspath(experimental_path) if experimental_path else None,
                                            "summary": [x for x in self.experiment_summary or []
                                                        if x.get("relation") == rel["name"]],
                                            "verdict_rules": VERDICT_RULES}
                paths.append(write_json(info, folder, info_name))
        return paths


def coupling_file_names(relation, experimental=False):
    """The files of one relation in a results folder: ``couplings_<relation>.csv``, (with
    experimental values) ``couplings_<relation>_vs_experiment.csv``, ``couplings_<relation>.json``;
    the relation's name made safe for a file name.

    Examples
    --------
    >>> coupling_file_names("karplus-1959", True)
    ['couplings_karplus-1959.csv', 'couplings_karplus-1959_vs_experiment.csv', 'couplings_karplus-1959.json']
    """
    import re

    stem = "couplings_" + (re.sub(r"[^A-Za-z0-9.+=-]+", "_", str(relation)).strip("_") or "relation")
    return [f"{stem}.csv"] + ([f"{stem}_vs_experiment.csv"] if experimental else []) + [f"{stem}.json"]


def ensemble_couplings(result, relation, *, types=None, experimental=None, universe=None, select=None):
    """Ensemble-averaged couplings of a tracking result for one or more relations, and their
    comparison with experimental values.

    Parameters
    ----------
    result : TrackResult or TorsionStates
        A tracking result (:func:`dihedra.tracking.track`, :func:`dihedra.io.resultsdir.load_results`)
        or an analysis that has run.
    relation : str, KarplusRelation or list of them
        Built-in names, relation TOML files or relations (see
        :func:`~dihedra.analysis.couplings.relations.get_relation`).
    types : list of str, optional
        Torsion types or single torsions (labels) to average (default: those each relation is
        meant for).
    experimental : DataFrame, optional
        Measured couplings with the columns label, j_exp_hz, j_exp_err_hz and optionally
        coupled_atoms (as read by :func:`~dihedra.analysis.couplings.experiment.read_experimental`).
    universe : MDAnalysis.Universe, optional
        Bonds, elements and coordinates for the Haasnoot-Altona substituents; default the
        topology recorded in the result.
    select : list of str, optional
        The former name of ``types`` (still taken; not both).

    Returns
    -------
    CouplingResult
    """
    from ...trajectory.result import as_result

    result = as_result(result)
    if select is not None and types is not None:
        raise DihedraError("give the torsions to average as types (select is its former name), not both.")
    select = types if types is not None else select
    if isinstance(select, str):
        select = [select]
    if isinstance(relation, (str, os.PathLike, KarplusRelation)):
        relation = [relation]
    relations = [get_relation(r) for r in relation]
    if not relations:
        raise DihedraError("give at least one Karplus relation (--relation NAME).")
    notices, frames, subs_out, left_out = [], [], {}, {}
    for rel in relations:
        frame, used, left_out[rel.name] = _relation_couplings(result, rel, select, notices, universe)
        frames.append(frame)
        subs_out.update(used)
    out = pd.concat(frames, ignore_index=True)
    if result.summary.get("parameters", {}).get("weights"):
        notices.append("the histograms are weighted sums (per-frame weights of the run); <J> is the "
                       "reweighted average.")
    points = summary = None
    if experimental is not None:
        points, summary = compare_with_experiment(out, experimental, left_out=left_out, notices=notices)
    parameters = {"relations": [r.name for r in relations], "types": None if select is None else list(select),
                  "n_experimental": None if experimental is None else len(experimental),
                  "universe_given": universe is not None}
    return CouplingResult(couplings=out, relations=[r.describe() for r in relations], notices=notices,
                          substituents=subs_out, experiment=points, experiment_summary=summary,
                          parameters=parameters)
