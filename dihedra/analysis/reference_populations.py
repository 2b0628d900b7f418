r"""Sampled state populations against measured or reference ones (z-scores and a verdict).

Input: a CSV with one row per (torsion type, state) and the columns ``type``, ``state``,
``population`` and ``population_err`` (fractions; the error is one standard uncertainty and
should include the measurement's systematic part). ``type`` is a torsion type of the results
folder (as in populations_by_type.csv) or a single torsion label; ``state`` is a state label of the
run's scheme, or several joined by ``|`` for their sum (``gauche+|gauche-`` is the gauche
fraction of a measured gauche/anti balance).

For every row the sampled population p_s and its standard error s_s are taken from the results
folder: a single state of a type from ``populations_by_type.csv``, of a torsion from
``populations.csv``; a sum of states from the state counts of the pass (``blocks.npz``) with the
same blocking analysis as the populations (:func:`dihedra.numerics.statistics.blocking_error`), pooled
over the torsions of a type as the mean with error sqrt(sum s_i^2)/n. Then

.. math::  z = (p_s - p_{ref}) / \sqrt{s_s^2 + s_{ref}^2}.

Verdict per type (thresholds :data:`Z_TENSION`, :data:`Z_INCONSISTENT`):

* ``consistent``: every row of the type has ``|z| <= 2``;
* ``tension``: the largest ``|z|`` is between 2 and 3;
* ``inconsistent``: some ``|z| > 3``.

The rows, the per-type verdicts and these rules go into the comparison output of
``dihedra compare`` (columns ``reference_*`` of comparison.csv, section ``reference_populations``
of comparison.json).

Cautions: a measured population belongs to its conditions (phase, solvent, temperature) and to
its own definition of the states (often a two-state gauche/anti analysis of spectra); make sure
the scheme's arcs mean the same thing. A sampled error that ignores slow, unvisited states is too
small: read ``n_effective`` in populations.csv.
"""

from __future__ import annotations

import os
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from ..errors import DihedraError, InputFileError
from ..io.tables import json_ready, write_json, write_table
from ..trajectory.result import as_result

#: Largest ``|z|`` of a "consistent" type.
Z_TENSION = 2.0
#: ``|z|`` above this makes a type "inconsistent".
Z_INCONSISTENT = 3.0
#: Rules of the verdict, as written into comparison.json.
RULES = {
    "z": "(sampled - reference) / sqrt(sampled_err^2 + reference_err^2)",
    "consistent": f"every |z| <= {Z_TENSION:g}",
    "tension": f"largest |z| between {Z_TENSION:g} and {Z_INCONSISTENT:g}",
    "inconsistent": f"some |z| > {Z_INCONSISTENT:g}",
}
CAUTIONS = [
    "A measured population belongs to its conditions (phase, solvent, temperature) and to its own "
    "definition of the states; check that the scheme's arcs mean the same thing.",
    "Sampled errors cannot include states the simulation never reached; read n_effective in populations.csv.",
]


def read_reference_populations(path):
    """The reference table: DataFrame with type, state, population, population_err."""
    if not os.path.exists(path):
        raise InputFileError(f"reference populations file {path} does not exist.")
    try:
        table = pd.read_csv(path, comment="#", skipinitialspace=True, dtype={"type": str, "state": str})
    except Exception as exc:  # noqa: BLE001
        raise InputFileError(f"reference populations file {path} is not a readable CSV table: {exc}.") from None
    return reference_table(table, f"reference populations file {path}")


def reference_table(table, where):
    """A table of reference populations checked and in normal form (type, state, population,
    population_err; text stripped, numbers as floats); ``where`` names it in errors."""
    table = table.copy()
    table.columns = [str(c).strip().lower() for c in table.columns]
    need = ["type", "state", "population", "population_err"]
    if any(c not in table.columns for c in need):
        raise InputFileError(f"{where} needs the columns {', '.join(need)}; its columns are "
                             f"{', '.join(table.columns)}.")
    out = table[need].copy()
    out["type"] = out["type"].astype(str).str.strip()
    out["state"] = out["state"].astype(str).str.strip()
    for col in ("population", "population_err"):
        out[col] = pd.to_numeric(out[col], errors="coerce")
    bad = ~((out["population"] >= 0) & (out["population"] <= 1) & (out["population_err"] >= 0))
    if bad.any():
        row = int(np.flatnonzero(bad)[0])
        raise InputFileError(f"{where}, row {row + 1} ({out['type'][row]}, {out['state'][row]}): population must be "
                             "a fraction in [0, 1] and population_err a non-negative number.")
    return out.reset_index(drop=True)


def _union_population(result, positions, codes):
    """Mean over torsions of the summed population of state ``codes``, with its blocking error."""
    from ..numerics.statistics import blocking_error

    counts = np.asarray(result.blocks["state_counts"], dtype=float)[:, positions, :]
    value = counts[:, :, codes].sum(axis=2)
    total = counts.sum(axis=2)
    # (the torsions of one type share a correlation time, as in the populations table)
    mean, se, _ = blocking_error(value, total, result.blocks["block_replica"], pool=np.zeros(len(positions), int))
    return float(mean.mean()), float(np.sqrt(np.sum(se ** 2)) / len(positions))


def sampled_population(result, where, state):
    """Sampled population (and error) of ``state`` (``A`` or ``A|B|...``) for a type or torsion."""
    labels = list(result.scheme.labels)
    parts = [s.strip() for s in str(state).split("|")]
    unknown = [s for s in parts if s not in labels]
    if unknown:
        raise DihedraError(f"state {unknown[0]!r} is not a state of the scheme {result.scheme.name} "
                           f"({', '.join(labels)}); join several with '|' for their sum.")
    types = result.torsion_set.types
    tlabels = result.torsion_set.labels
    if where in set(types):
        positions = [k for k, t in enumerate(types) if t == where]
        table, key = result.populations_by_type, "type"
    elif where in set(tlabels):
        positions = [tlabels.index(where)]
        table, key = result.populations, "torsion"
    else:
        raise DihedraError(f"{where!r} is neither a torsion type nor a torsion label of this results folder "
                           f"(types: {', '.join(list(dict.fromkeys(types))[:5])}).")
    if len(parts) == 1:
        row = table[(table[key] == where) & (table["state"] == parts[0])].iloc[0]
        return float(row["population"]), float(row["population_err"])
    return _union_population(result, positions, [labels.index(s) for s in parts])


@dataclass
class ReferenceComparison:
    """Result of :func:`compare_reference_populations`.

    Attributes
    ----------
    rows : DataFrame
        type, state, population, population_err, reference_population, reference_population_err,
        difference, z_score.
    verdicts : DataFrame
        type, n_states, max_abs_z_score, verdict, verdict_reason.
    notices : list of str
    parameters : dict
        ``file`` (the reference file, absolute, or None), ``scheme``.
    """

    rows: pd.DataFrame
    verdicts: pd.DataFrame
    notices: list = field(default_factory=list)
    parameters: dict = field(default_factory=dict)

    def save(self, folder):
        """Write the comparison without a scan: comparison.csv (one row per type, the columns
        ``reference_*``) and comparison.json (section ``reference_populations``); returns the paths.
        With a scan, merge it into the scan comparison instead
        (:meth:`dihedra.analysis.compare.Comparison.add_reference`)."""
        details = {"scheme": self.parameters.get("scheme")}
        table = add_to_comparison(None, details, self.rows, self.verdicts, self.parameters.get("file"))
        return [write_table(table, folder, "comparison.csv"),
                write_json(json_ready(details), folder, "comparison.json")]


def compare_reference_populations(result, reference):
    """z-scores of sampled against reference populations, and a verdict per type.

    Parameters
    ----------
    result : TrackResult or TorsionStates
        A tracking result (:func:`dihedra.tracking.track`, :func:`dihedra.io.resultsdir.load_results`)
        or an analysis that has run.
    reference : DataFrame or str
        The reference table as read by :func:`read_reference_populations`, or the path of the file.

    Returns
    -------
    ReferenceComparison
    """
    result = as_result(result)
    path = None
    if isinstance(reference, (str, os.PathLike)):
        path = os.path.abspath(os.fspath(reference))
        reference = read_reference_populations(reference)
    need = ["type", "state", "population", "population_err"]
    if any(c not in reference.columns for c in need):
        raise DihedraError(f"the reference populations table needs the columns {', '.join(need)}; it has "
                           f"{', '.join(map(str, reference.columns))}.")
    rows = []
    for ref in reference.itertuples(index=False):
        p, se = sampled_population(result, ref.type, ref.state)
        sigma = float(np.hypot(se, ref.population_err))
        z = (p - ref.population) / sigma if sigma > 0 else (0.0 if p == ref.population else np.inf)
        rows.append({"type": ref.type, "state": ref.state, "population": p, "population_err": se,
                     "reference_population": ref.population, "reference_population_err": ref.population_err,
                     "difference": p - ref.population, "z_score": z})
    rows = pd.DataFrame(rows)
    verdicts = []
    for typ, sub in rows.groupby("type", sort=False):
        worst = sub.loc[sub["z_score"].abs().idxmax()]
        zmax = float(abs(worst["z_score"]))
        if zmax > Z_INCONSISTENT:
            verdict = "inconsistent"
        elif zmax > Z_TENSION:
            verdict = "tension"
        else:
            verdict = "consistent"
        reason = (f"largest |z| = {zmax:.1f} ({worst['state']}: {worst['population']:.3f} ± "
                  f"{worst['population_err']:.3f} sampled vs {worst['reference_population']:.3f} ± "
                  f"{worst['reference_population_err']:.3f})")
        verdicts.append({"type": typ, "n_states": len(sub), "max_abs_z_score": zmax, "verdict": verdict,
                         "verdict_reason": reason})
    return ReferenceComparison(rows=rows, verdicts=pd.DataFrame(verdicts),
                               parameters={"file": path, "scheme": result.scheme.name})


def add_to_comparison(table, details, rows, verdicts, path=None):
    """Merge a reference-population comparison into the comparison output of ``dihedra compare``.

    ``table`` (comparison.csv, one row per type) gains the columns reference_population_<state>,
    reference_population_err_<state>, reference_z_score_<state>, reference_verdict and
    reference_verdict_reason (types without a scan row get a row of their own); ``details``
    (comparison.json) gains the section ``reference_populations``. Returns the new table.
    """
    wide = []
    for typ, sub in rows.groupby("type", sort=False):
        rec = {"type": typ}
        for r in sub.itertuples(index=False):
            rec[f"reference_population_{r.state}"] = r.reference_population
            rec[f"reference_population_err_{r.state}"] = r.reference_population_err
            rec[f"reference_sampled_population_{r.state}"] = r.population
            rec[f"reference_sampled_population_err_{r.state}"] = r.population_err
            rec[f"reference_z_score_{r.state}"] = r.z_score
        v = verdicts.set_index("type").loc[typ]
        rec["reference_verdict"] = v["verdict"]
        rec["reference_verdict_reason"] = v["verdict_reason"]
        wide.append(rec)
    wide = pd.DataFrame(wide)
    merged = wide if table is None or table.empty else table.merge(wide, on="type", how="outer", sort=False)
    details["reference_populations"] = {
        "file": os.path.abspath(path) if path else None, "rows": rows.to_dict(orient="records"),
        "verdicts": verdicts.to_dict(orient="records"), "rules": RULES, "cautions": CAUTIONS}
    return merged


def format_reference(reference):
    """A :class:`ReferenceComparison` as text for a terminal."""
    rows, verdicts = reference.rows, reference.verdicts
    lines = ["reference populations (sampled vs reference, z-score):"]
    for typ, sub in rows.groupby("type", sort=False):
        v = verdicts.set_index("type").loc[typ]
        lines.append(f"  type {typ}: {v['verdict'].upper()} ({v['verdict_reason']})")
        for r in sub.itertuples(index=False):
            lines.append(f"    {r.state:<18} {r.population:.3f} ± {r.population_err:.3f} vs "
                         f"{r.reference_population:.3f} ± {r.reference_population_err:.3f}   z = {r.z_score:+.1f}")
    lines.append("  rules: " + "; ".join(f"{k}: {v}" for k, v in RULES.items() if k != "z"))
    return "\n".join(lines)
