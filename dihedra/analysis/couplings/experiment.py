r"""3J couplings against measured ones: deviations, chi-square and a verdict per relation.

A CSV with a label column (``torsion``, ``residue`` or ``label``: a torsion label such as
``ALA12:phi``, a torsion type, or a residue such as ``ALA12`` when that residue has one selected
torsion), the columns ``J_hz`` and ``J_err_hz``, and optionally ``coupled_atoms``, which chooses
between the rows of a torsion that has several (a glycine: ``HN,HA1``, ``HN,HA2`` and their sum
``HN,HA1+HA2``; without it, the sum, with a notice). Per point: deviation = <J> - J_exp, combined
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
"""

from __future__ import annotations

import os

import numpy as np
import pandas as pd

from ...errors import DihedraError, InputFileError

#: p-value of the chi-square below which the verdict is "tension".
P_TENSION = 0.05
#: p-value below which the verdict is "inconsistent".
P_INCONSISTENT = 0.001
#: A point with ``|z|`` above this is an outlier (named in the output).
OUTLIER_Z = 3.0


def read_experimental(path):
    """Experimental couplings: DataFrame with columns label, j_exp_hz, j_exp_err_hz and coupled_atoms
    (empty where the file gives none); a notice naming the file's columns that are not read is in
    ``.attrs["notices"]``."""
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
    atoms = lower.get("coupled_atoms")
    out = pd.DataFrame({"label": table[label].astype(str).str.strip(),
                        "j_exp_hz": pd.to_numeric(table[lower["j_hz"]], errors="coerce"),
                        "j_exp_err_hz": pd.to_numeric(table[lower["j_err_hz"]], errors="coerce"),
                        "coupled_atoms": (table[atoms].fillna("").astype(str).str.strip() if atoms is not None
                                          else "")})
    bad = out[~np.isfinite(out["j_exp_hz"]) | ~(out["j_exp_err_hz"] >= 0)]
    if len(bad):
        row = bad.index[0]
        raise InputFileError(f"experimental couplings file {path}, row {row + 1} ({out['label'][row]}): J_hz "
                             "must be a number and J_err_hz a non-negative number.")
    read = {label, lower["j_hz"], lower["j_err_hz"], atoms}
    unread = [str(c) for c in table.columns if c not in read]
    out.attrs["notices"] = [f"experimental couplings file {path}: the column(s) {', '.join(unread)} are not read "
                            f"(the columns read are {label}, J_hz, J_err_hz and coupled_atoms)."] if unread else []
    return out


def _atoms_key(text):
    """Coupled atoms (``HN,HA1+HA2``) in a form that compares equal however they were written: no
    spaces, upper case, the protons of a sum in order."""
    first, _, second = "".join(str(text).split()).upper().partition(",")
    return first + "," + "+".join(sorted(second.split("+")))


def _one_row(rows, atoms, label, relation):
    """The row of ``rows`` (those of one torsion or one type) for the coupled atoms ``atoms`` ("":
    not given): the only row, else the sum of a glycine's two H-alpha; and, where it was chosen
    for the user among several, their coupled atoms (a notice names them). An unknown ``atoms`` is
    an error."""
    if atoms:
        hit = rows[rows["coupled_atoms"].map(_atoms_key) == _atoms_key(atoms)]
        if len(hit) == 1:
            return hit.iloc[0], []
        raise DihedraError(f"experimental coupling {label}: coupled_atoms {atoms!r} is not one of the rows of "
                           f"{relation} for it; give one of {' / '.join(rows['coupled_atoms'].astype(str))} "
                           "(or leave it empty).")
    if len(rows) == 1:
        return rows.iloc[0], []
    sums = rows[rows["coupled_atoms"].astype(str).str.contains("+", regex=False)]
    return (sums.iloc[0], rows["coupled_atoms"].astype(str).tolist()) if len(sums) == 1 else (None, [])


def _match(label, atoms, table, left_out=None):
    """Row of ``table`` (one relation) for an experimental label and its coupled atoms, or None;
    how it matched (or why not); the coupled atoms of the rows it was chosen among (glycine), if any."""
    per_torsion = table[table["level"] == "torsion"]
    candidates = [(per_torsion[per_torsion["torsion"] == label], "torsion"),
                  (table[(table["level"] == "type") & (table["type"] == label)], "type")]
    if per_torsion["type"].nunique() == 1 and per_torsion["type"].iloc[0] == label \
            and per_torsion["torsion"].nunique() == 1:
        candidates.append((per_torsion, "type"))
    candidates.append((per_torsion[per_torsion["torsion"].str.split(":").str[0] == label], "residue"))
    for rows, how in candidates:
        if not len(rows):
            continue
        if how == "residue" and rows["torsion"].nunique() > 1:
            return None, (f"ambiguous: residue {label} has {rows['torsion'].nunique()} torsions; give a torsion "
                          "label"), []
        hit, among = _one_row(rows, atoms, label, table["relation"].iloc[0])
        if hit is not None:
            return hit, how, among
    return None, _why_unmatched(label, left_out), []


def _why_unmatched(label, left_out):
    """Why no row matches ``label``: a torsion of the folder that the relation left out (the reason
    given in ``left_out``, {torsion label: (type, why)}), or no such name."""
    for torsion, (typ, why) in (left_out or {}).items():
        if label in (torsion, typ, torsion.split(":")[0]):
            return f"in the folder{'' if label == torsion else f' ({torsion})'}, but {why}"
    return "no matching torsion, type or residue"


def compare_with_experiment(couplings, experimental, *, left_out=None, notices=None):
    """Per-point deviations, chi-square and a verdict for each relation.

    Parameters
    ----------
    couplings : DataFrame
        :attr:`~dihedra.analysis.couplings.ensemble.CouplingResult.couplings`.
    experimental : DataFrame
        From :func:`read_experimental` (the column coupled_atoms is optional).
    left_out : dict, optional
        Per relation, the torsions of the folder it has no row for: {label: (type, reason)}; an
        experimental value that names one is reported with that reason.
    notices : list, optional
        Receives the notices of the comparison (and those of ``experimental.attrs``).

    Returns
    -------
    points : DataFrame
        relation, label, matched_as, torsion, type, coupled_atoms, j_hz, j_err_hz, j_systematic_hz, j_exp_hz,
        j_exp_err_hz, deviation_hz, sigma_hz, z, chi_square, outlier.
    summary : list of dict
        Per relation: n_points, rmsd_hz, mean_deviation_hz, chi_square_per_point, p_value, outliers
        (labels, with ``[coupled atoms]`` where the file chose the row), verdict, unmatched (labels
        with the reason).
    """
    from scipy.stats import chi2

    missing = [c for c in ("label", "j_exp_hz", "j_exp_err_hz") if c not in experimental.columns]
    if missing:
        raise DihedraError(f"the experimental couplings table lacks the column(s) {', '.join(missing)}; read "
                           "the file with read_experimental (columns torsion or residue, J_hz, J_err_hz).")
    notices = [] if notices is None else notices
    notices.extend(experimental.attrs.get("notices", []))
    if "coupled_atoms" not in experimental.columns:
        experimental = experimental.assign(coupled_atoms="")
    if "coupled_atoms" not in couplings.columns:
        couplings = couplings.assign(coupled_atoms="")
    rows, summary, chosen = [], [], {}
    for rel, table in couplings.groupby("relation", sort=False):
        unmatched = []
        for e in experimental.itertuples(index=False):
            atoms = "" if pd.isna(e.coupled_atoms) else str(e.coupled_atoms).strip()
            hit, how, among = _match(e.label, atoms, table, (left_out or {}).get(rel))
            if among:
                chosen.setdefault(e.label, (hit["coupled_atoms"], among))
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
                         "type": hit["type"], "coupled_atoms": hit["coupled_atoms"], "j_hz": hit["j_hz"],
                         "j_err_hz": hit["j_err_hz"], "j_systematic_hz": hit["j_systematic_hz"], "j_exp_hz": e.j_exp_hz,
                         "j_exp_err_hz": e.j_exp_err_hz, "deviation_hz": dev, "sigma_hz": sigma, "z": z,
                         "chi_square": z ** 2, "outlier": bool(abs(z) > OUTLIER_Z),
                         "name": f"{e.label} [{hit['coupled_atoms']}]" if atoms else e.label})
        pts = pd.DataFrame([r for r in rows if r["relation"] == rel and "deviation_hz" in r])
        n = len(pts)
        if n == 0:
            summary.append({"relation": rel, "n_points": 0, "verdict": "no data",
                            "unmatched": unmatched})
            continue
        chisq = float(pts["chi_square"].sum())
        p = float(chi2.sf(chisq, n))
        outliers = pts.loc[pts["outlier"], "name"].tolist()   # (with the coupled atoms where the file chose them)
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
    if chosen:
        notices.append(_chosen_notice(chosen))
    columns = ["relation", "label", "matched_as", "torsion", "type", "coupled_atoms", "j_hz", "j_err_hz",
               "j_systematic_hz", "j_exp_hz", "j_exp_err_hz", "deviation_hz", "sigma_hz", "z", "chi_square", "outlier"]
    return pd.DataFrame(rows, columns=columns), summary


def _chosen_notice(chosen):
    """The notice for experimental values matched, without coupled_atoms, to one of several rows."""
    label, (used, among) = next(iter(chosen.items()))
    return (f"{len(chosen)} experimental value(s) name a torsion with several rows of coupled protons (a glycine: "
            f"one per H-alpha and their sum) and no coupled_atoms; each was compared with the sum (e.g. {label} "
            f"with {used}). To compare with one H-alpha, give the file a column coupled_atoms with one of "
            f"{' / '.join(among)}.")


VERDICT_RULES = {
    "consistent": f"chi-square p-value >= {P_TENSION} and no point with |z| > {OUTLIER_Z:g}",
    "tension": f"{P_INCONSISTENT} <= p < {P_TENSION}, or a point with |z| > {OUTLIER_Z:g}",
    "inconsistent": f"p < {P_INCONSISTENT}",
    "sigma": "sqrt(j_err_hz^2 + J_err_hz^2 + j_systematic_hz^2), the systematic term where known",
}
