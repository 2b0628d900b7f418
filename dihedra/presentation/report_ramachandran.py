"""The section of the HTML report on the Ramachandran regions (the files of ``dihedra
ramachandran``): the bounds of the regions and where they come from, the population of every
region per residue type rounded to its error as the populations of the torsions are, the notes
and cautions the step wrote, and the figure. A folder without protein phi and psi gets no section
(the step cannot run there); one that has them says which command makes it."""

from __future__ import annotations

import pandas as pd

from ..io.tables import read_optional_json, read_optional_table as read_optional
from .figures.figureset import has_backbone_pairs
from .report_html import _callout, _e, _figures_html, _fmt, _missing, _table
from .report_sections import _population_tables

_TITLE = "Ramachandran regions"


def _ramachandran(page, figs, result):
    info = read_optional_json(page.folder, "ramachandran.json")
    by_type = read_optional(page.folder, "ramachandran_by_type.csv")
    if info is None or by_type is None or not len(by_type):
        if not has_backbone_pairs(result):
            return ""
        return _missing("ramachandran", _TITLE, "Ramachandran regions", "dihedra ramachandran DIR")
    params = info.get("parameters", {}) or {}
    parts = [f"<section id='ramachandran'><h2>{_TITLE}</h2>",
             "<p class='lead'>Fraction of frames in which a residue's (φ, ψ) pair lies in each region, pooled per "
             "residue type, ± standard error (autocorrelation accounted for by blocking; where the residues of a "
             "type differ more than their errors explain, the error includes the spread between them: I<sup>2</sup> "
             "is the largest share of that spread over the regions), rounded to the error. n/a: no error can be "
             f"estimated; ± 0: the residues never left their region. Every residue: {page.link('ramachandran.csv')}."
             "</p>"]
    bounds = _bounds_table(params.get("regions_deg") or {})
    if len(bounds):
        parts.append("<h3>Regions (deg; open at their ends)</h3>")
        parts.append(_table(bounds, what="regions"))
        if params.get("source"):
            parts.append(f"<p>Bounds: {_e(params['source'])}; other: outside every region.</p>")
    parts.append(f"<h3>Regions per residue type ({_fmt(params.get('n_residues'))} residues)</h3>")
    for _, table in _population_tables(by_type, None, state="region", count=("n_residues", "residues")):
        parts.append(_table(table, what="residue types"))
    parts.append(_callout("Notes", info.get("notices", [])))
    parts.append(_callout("Cautions", info.get("cautions", []), "caution"))
    parts.append(_figures_html(figs.get("ramachandran", [])))
    parts.append("</section>")
    return "".join(parts)


def _bounds_table(regions):
    """The bounds of every region: phi and psi ranges; a psi range past 180 wraps through it."""
    rows = []
    for name, (phi_lo, phi_hi, psi_lo, psi_hi) in regions.items():
        psi = f"{_fmt(psi_lo)} to {_fmt(psi_hi)}"
        if psi_hi > 180:
            psi = f"{_fmt(psi_lo)} to 180 and -180 to {_fmt(psi_hi - 360)}"
        rows.append({"region": name, "φ": f"{_fmt(phi_lo)} to {_fmt(phi_hi)}", "ψ": psi})
    return pd.DataFrame(rows)
