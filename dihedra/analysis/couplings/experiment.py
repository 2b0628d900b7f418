r"""3J couplings against measured ones: deviations, chi-square and a verdict per relation.

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
    if len(rows) > 1 and "coupled_atoms" in rows:   # a glycine: the one splitting is the sum row
        rows = rows[rows["coupled_atoms"].astype(str).str.contains("+", regex=False)]
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
        :attr:`~dihedra.analysis.couplings.ensemble.CouplingResult.couplings`.
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

    missing = [c for c in ("label", "j_exp_hz", "j_exp_err_hz") if c not in experimental.columns]
    if missing:
        raise DihedraError(f"the experimental couplings table lacks the column(s) {', '.join(missing)}; read "
                           "the file with read_experimental (columns torsion or residue, J_hz, J_err_hz).")
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
