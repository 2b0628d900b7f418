r"""Which torsion types and torsions the figures and the report show when none are chosen.

A folder of a protein has sixty torsion types; the first four in file order (the N-terminal
residue's psi and omega) say little. The informative ones are those where the most torsions spend
the most time away from their main state: a type is scored by

    n_torsions * (1 - largest pooled state population),

the expected number of its torsions found outside their most populated state in any frame (from
``populations_by_type.csv``, nothing recomputed). A type whose torsions never leave one state (a
peptide omega in trans) scores 0 and comes last; ties go to the type with more torsions, then to
file order. Within a type the representative torsion is the one with the smallest largest
population (``populations.csv``), the one whose states change most.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

#: What the choice means, for notes and captions.
CHOICE_RULE = "the types whose torsions spend most time outside their main state (n_torsions x (1 - largest population))"


def type_scores(populations_by_type):
    """The score of every type (see the module notes), as a DataFrame with type, n_torsions,
    largest_population and score, in file order."""
    pops = populations_by_type
    rows = []
    for t, sub in pops.groupby("type", sort=False):
        p = pd.to_numeric(sub["population"], errors="coerce").to_numpy(float)
        n = int(sub["n_torsions"].iloc[0]) if "n_torsions" in sub.columns else 1
        top = float(np.nanmax(p)) if np.isfinite(p).any() else 1.0
        rows.append({"type": t, "n_torsions": n, "largest_population": top, "score": n * max(0.0, 1.0 - top)})
    return pd.DataFrame(rows, columns=["type", "n_torsions", "largest_population", "score"])


def informative_types(populations_by_type, limit=4):
    """The ``limit`` most informative types (see the module notes), best first.

    Examples
    --------
    >>> pops = pd.DataFrame({"type": ["A:omega"] * 2 + ["A:phi"] * 2 + ["B:phi"] * 2,
    ...                      "state": ["trans", "cis", "anti", "gauche-"] * 1 + ["anti", "gauche-"],
    ...                      "population": [1.0, 0.0, 0.3, 0.7, 0.1, 0.9], "n_torsions": [9, 9, 9, 9, 2, 2]})
    >>> informative_types(pops, 2)
    ['A:phi', 'B:phi']
    """
    scores = type_scores(populations_by_type)
    if not len(scores):
        return []
    scores["order"] = np.arange(len(scores))
    ranked = scores.sort_values(["score", "n_torsions", "order"], ascending=[False, False, True], kind="stable")
    return list(ranked["type"])[:max(0, int(limit))]


def representative_torsion(populations, torsion_type, labels):
    """The torsion of ``torsion_type`` whose largest state population is smallest (its states
    change most), from ``populations.csv``; the first of ``labels`` of that type without one."""
    if populations is not None and len(populations) and "type" in populations.columns:
        sub = populations[populations["type"] == torsion_type]
        if len(sub):
            top = sub.groupby("torsion", sort=False)["population"].max()
            return str(top.idxmin())
    return labels[0] if labels else None
