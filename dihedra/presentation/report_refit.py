"""The section of the HTML report on a torsion correction fitted by reweighting (the files of
``dihedra refit``): whether enough effective samples carry the reweighting (Kish's effective
sample fraction against the minimum asked for; a verdict on the frames, not on the terms), how
well the reweighted ensemble meets the target, the fitted terms and the populations before and
after, each value rounded to its error, with the figures and links to the forms a simulation
engine takes."""

from __future__ import annotations

import os

from ..io.tables import read_optional_json, read_optional_table as read_optional
from .figures.common import _as_bool
from .report_html import (MAX_ROWS, _callout, _e, _figures_html, _fmt, _kelvin, _kv, _missing, _pm, _pm_columns,
                          _table, _verdict)

#: The verdict on the reweighting: whether enough effective samples (Kish) carry the weight.
ENOUGH, TOO_FEW = "enough effective samples", "too few effective samples"
#: Files of a refit that a user applies elsewhere, linked from the section when present.
_FORMS = ("refit_openmm.xml", "refit_ryckaert_bellemans.csv", "refit_fourier.csv", "refit_correction.csv")


def _refit(page, figs):
    info = read_optional_json(page.folder, "refit.json")
    summary = read_optional(page.folder, "refit_summary.csv")
    if info is None or summary is None or not len(summary):
        return _missing("refit", "Torsion correction", "torsion correction fitted by reweighting",
                        "dihedra refit DIR --target FILE")
    row = summary.iloc[0]
    p = info.get("parameters", {})
    trusted = bool(_as_bool(summary["trustworthy"])[0])
    fraction = _pm(row.get("effective_sample_fraction"), row.get("effective_sample_fraction_err"))
    parts = ["<section id='refit'><h2>Torsion correction fitted by reweighting</h2>",
             "<p class='lead'>Reweighting: " + _verdict(ENOUGH if trusted else TOO_FEW)
             + f" (Kish effective sample fraction {_e(fraction)}, minimum {_e(_fmt(p.get('min_effective_fraction')))})."
             + (" The frames keep enough weight to stand for the corrected ensemble. This rates the frames, not the "
                "correction's terms: see their errors and the notes." if trusted else
                " Too few frames carry the weight: the numbers below rest on a few frames; run a new "
                "simulation with the correction instead.") + "</p>"]
    target = p.get("target_kind")
    parts.append(_kv([
        ("target", f"{target} ({os.path.basename(str(p.get('target_file', '')))})" if target else None),
        ("types corrected", ", ".join(p.get("types") or []) or None),
        ("temperature (K)", None if p.get("temperature_k") is None else _kelvin(p["temperature_k"])),
        ("Fourier terms", p.get("terms")), ("weights per", p.get("weights_per")),
        ("effective sample fraction (Kish)", _pm(row.get("effective_sample_fraction"),
                                                  row.get("effective_sample_fraction_err"))),
        ("minimum asked for", p.get("min_effective_fraction")),
        ("largest weight (fraction of the total)", row.get("largest_weight_fraction")),
        ("chi-square per observable, sampled -> reweighted",
         f"{_fmt(row.get('chi_square_sampled'))} -> {_fmt(row.get('chi_square_reweighted'))} "
         f"({_fmt(row.get('n_fitted_observables'))} observables)"),
        ("coefficients determined by the data", f"{_fmt(row.get('effective_parameters'))} of "
                                                f"{_fmt(row.get('n_coefficients'))}"),
        ("regularisation (cross-validated)", row.get("regularisation")),
    ]))
    terms = page.shown(read_optional(page.folder, "refit_terms.csv"))
    if terms is not None and len(terms):
        parts.append("<h3>Fitted terms, dV(phi) = sum k_n [1 + cos(n phi - phase_n)]</h3>")
        terms["k (kJ/mol)"] = _pm_columns(terms, "k_kj_mol", "k_err_kj_mol")
        terms["phase (deg)"] = _pm_columns(terms, "phase_deg", "phase_err_deg")
        parts.append(_table(terms, ["type", "n", "k (kJ/mol)", "phase (deg)"], what="terms",
                            max_rows=MAX_ROWS * 3, csv="refit_terms.csv", base=page.base))
    pops = page.shown(read_optional(page.folder, "refit_populations.csv"))
    if pops is not None and len(pops):
        parts.append("<h3>State populations: target, sampled and reweighted</h3>")
        for what in ("target", "sampled", "reweighted"):
            pops[what] = _pm_columns(pops, f"{what}_population", f"{what}_population_err")
        parts.append(_table(pops, ["type", "state", "target", "sampled", "reweighted", "fitted"], what="states",
                            max_rows=MAX_ROWS * 3, csv="refit_populations.csv", base=page.base))
    forms = [page.link(n) for n in _FORMS if os.path.exists(os.path.join(page.folder, n))]
    if forms:
        parts.append("<p>The correction in forms to apply: " + ", ".join(forms) + ".</p>")
    parts.append(_callout("Notes from the fit", info.get("notices", [])))
    parts.append(_callout("Cautions", info.get("cautions", []), "caution"))
    parts.append(_figures_html(figs.get("refit", [])))
    parts.append("</section>")
    return "".join(parts)

