"""The building blocks of the HTML report: its style sheet, and small helpers that turn values,
tables, notes and figures into HTML (every value escaped; figures as SVG ``data:`` URIs)."""

from __future__ import annotations

import base64
import html
import io
import re
from dataclasses import dataclass

import numpy as np
import pandas as pd

from .rounding import format_plain, format_value_error

#: Tables longer than this are summarised per type (the full CSV is linked).
MAX_ROWS = 24

_CSS = """
:root { --ink: #22303C; --muted: #5E6B76; --rule: #D5DCE1; --band: #F3F6F8; --accent: #0072B2;
        --warn: #D55E00; --caution: #8A5A00; }
* { box-sizing: border-box; }
html { font-size: 15px; }
body { margin: 0; color: var(--ink); background: #FFFFFF;
       font-family: "DejaVu Sans", "Segoe UI", "Helvetica Neue", Arial, sans-serif; line-height: 1.45; }
header.top { background: var(--ink); color: #FFFFFF; padding: 1.4rem 2rem 1.1rem; }
header.top h1 { margin: 0 0 0.3rem; font-size: 1.55rem; font-weight: 600; letter-spacing: 0.01em; }
header.top p { margin: 0.1rem 0; color: #D8E0E6; font-size: 0.9rem; }
nav { padding: 0.6rem 2rem; border-bottom: 1px solid var(--rule); font-size: 0.88rem; }
nav a { color: var(--accent); text-decoration: none; margin-right: 1.1rem; white-space: nowrap; }
main { max-width: 1120px; padding: 0 2rem 3rem; }
section { margin-top: 2.2rem; }
h2 { font-size: 1.25rem; border-bottom: 2px solid var(--ink); padding-bottom: 0.2rem; margin: 0 0 0.8rem; }
h3 { font-size: 1.02rem; margin: 1.4rem 0 0.5rem; }
h4 { font-size: 0.95rem; margin: 1.1rem 0 0.4rem; }
p.lead { color: var(--muted); margin-top: 0; }
table { border-collapse: collapse; margin: 0.4rem 0 1rem; font-size: 0.85rem; }
th, td { padding: 0.2rem 0.55rem; border-bottom: 1px solid var(--rule); text-align: left; vertical-align: top;
         white-space: nowrap; overflow-wrap: normal; word-break: normal; hyphens: none; }
th { white-space: normal; }
td.wrap { white-space: normal; min-width: 10rem; }
td.path { white-space: normal; overflow-wrap: anywhere; min-width: 8rem; }
th { background: var(--band); font-weight: 600; }
td.num, th.num { text-align: right; font-variant-numeric: tabular-nums; white-space: nowrap; }
td.hash { font-family: "DejaVu Sans Mono", Consolas, monospace; font-size: 0.78rem; white-space: normal;
          overflow-wrap: anywhere; min-width: 8rem; }
.kv td { white-space: normal; overflow-wrap: anywhere; }
span.sha { font-family: "DejaVu Sans Mono", Consolas, monospace; font-size: 0.85em; color: var(--muted); }
p.inline-list { font-size: 0.85rem; line-height: 1.5; }
p.inline-list span, span.label { white-space: nowrap; }
p.inline-list span.long { white-space: normal; overflow-wrap: anywhere; }
a.csv { font-family: "DejaVu Sans Mono", Consolas, monospace; font-size: 0.85em; }
tr:nth-child(even) td { background: #FAFBFC; }
.kv th { width: 16rem; }
.note-list, .caution-list { padding-left: 1.2rem; margin: 0.3rem 0 1rem; }
.callout { border-left: 4px solid var(--accent); background: var(--band); padding: 0.6rem 1rem;
           margin: 0.8rem 0 1rem; }
.callout.caution { border-left-color: var(--caution); }
.callout h4 { margin: 0 0 0.3rem; font-size: 0.92rem; }
.verdict { display: inline-block; padding: 0.05rem 0.5rem; border-radius: 0.7rem; font-weight: 600;
           font-size: 0.8rem; border: 1px solid currentColor; white-space: nowrap; overflow-wrap: normal; }
.v-consistent { color: #005C8F; background: #E5F1F8; }
.v-inconsistent { color: #A34400; background: #FBEDE3; }
.v-undersampled, .v-tension, .v-other { color: #6B4F00; background: #FBF4DF; }
.scroll { overflow-x: auto; max-width: 100%; }
.figs { display: flex; flex-wrap: wrap; gap: 0.4rem 2.2rem; align-items: flex-start; }
figure { margin: 1rem 0 1.2rem; max-width: 100%; }
figure img { display: block; width: calc(var(--w) * 1.45); max-width: 100%; height: auto; }
figcaption { font-size: 0.84rem; color: var(--muted); max-width: calc(var(--w) * 1.45); margin-top: 0.35rem; }
pre { background: var(--band); padding: 0.7rem 0.9rem; overflow-x: auto; font-size: 0.8rem; }
.missing { color: var(--muted); }
footer { color: var(--muted); font-size: 0.8rem; border-top: 1px solid var(--rule); margin-top: 3rem;
         padding-top: 0.6rem; }
@media (max-width: 900px) {
  main { padding: 0 1rem 2rem; }
  header.top, nav { padding-left: 1rem; padding-right: 1rem; }
  table { font-size: 0.74rem; }
  th, td { padding: 0.18rem 0.4rem; }
}
@media print {
  @page { size: A4; margin: 14mm 13mm; }
  html { font-size: 10pt; }
  nav { display: none; }
  header.top { background: none; color: var(--ink); padding: 0 0 0.4rem; border-bottom: 2px solid var(--ink); }
  header.top p { color: var(--muted); }
  main { padding: 0; max-width: none; }
  section { break-before: auto; }
  h2, h3, h4 { break-after: avoid; }
  figure, .callout, tr { break-inside: avoid; }
  figure img { width: var(--w); }
  figcaption { max-width: var(--w); }
  .scroll { overflow: visible; }
  table { font-size: 0.74rem; }
  th, td { padding: 0.15rem 0.4rem; }
  tr:nth-child(even) td { background: none; }
}
"""


# ----------------------------------------------------------------------------------------------
# Small HTML helpers
# ----------------------------------------------------------------------------------------------

def _e(value):
    return html.escape("" if value is None else str(value))



def _fmt(value):
    """A value for a table cell: NaN as an en dash, numbers to three significant digits (values with
    an error go through :func:`_pm`)."""
    if value is None:
        return "–"
    if isinstance(value, (bool, np.bool_)):
        return "yes" if value else "no"
    if isinstance(value, (int, np.integer)):
        return str(int(value))
    if isinstance(value, (float, np.floating)):
        return format_plain(value, 3)
    text = str(value)
    return "–" if text in ("nan", "None", "") else text


def _kelvin(value):
    """A temperature as it was given (298.15, not rounded to 298 as :func:`_fmt` would): the
    shortest decimal that is the number; "–" when none was recorded."""
    try:
        value = float(value)
    except (TypeError, ValueError):
        return "–"
    return np.format_float_positional(value, trim="-") if np.isfinite(value) else "–"


def _pm(value, err, digits=None):
    """``value ± error`` rounded to the error (:func:`~dihedra.presentation.rounding.format_value_error`;
    ``digits`` is ignored, kept for callers)."""
    return format_value_error(value, err)


def csv_link(name, base=""):
    """A link to a table of the results folder (``base``: the folder relative to the report)."""
    href = f"{base}{name}" if base else name
    return f"<a class='csv' href='{_e(href)}'>{_e(name)}</a>"


def _table(frame, columns=None, headers=None, max_rows=None, what="rows", raw=(), wrap=(), csv=None, base="",
           classes=None):
    """An HTML table of a DataFrame (numbers right-aligned, cells never broken inside a word;
    ``wrap``: columns of running text that may wrap; ``classes``: a CSS class by column, ``path``
    or ``hash`` for values that may break anywhere). A table longer than ``max_rows`` shows its
    first rows and says so, with a link to ``csv``; callers summarise long tables per type first."""
    if frame is None or not len(frame):
        return "<p class='missing'>(empty)</p>"
    columns = list(columns or frame.columns)
    headers = list(headers or columns)
    out = ["<div class='scroll'><table><thead><tr>"]
    sample = frame.head(max_rows) if max_rows else frame
    numeric = {c: pd.api.types.is_numeric_dtype(frame[c]) and not pd.api.types.is_bool_dtype(frame[c])
               for c in columns}
    cls = {c: "num" if numeric[c] else ("wrap" if c in wrap else "") for c in columns}
    cls.update(classes or {})
    for c, h in zip(columns, headers):
        out.append(f"<th class='{cls[c]}'>{_e(h)}</th>")
    out.append("</tr></thead><tbody>")
    for row in sample[columns].itertuples(index=False):
        out.append("<tr>")
        for c, v in zip(columns, row):
            cell = v if c in raw else _e(_fmt(v))
            out.append(f"<td class='{cls[c]}'>{cell}</td>")
        out.append("</tr>")
    out.append("</tbody></table></div>")
    if max_rows and len(frame) > max_rows:
        where = f": {csv_link(csv, base)}" if csv else " in the folder"
        out.append(f"<p class='missing'>First {max_rows} of {len(frame)} {what}; the full table{where}.</p>")
    return "".join(out)


def _inline_list(items):
    """Entries as a flowing paragraph: a short one kept on one line, a long one (more than 60
    characters of text) wrapped within the page."""
    def span(item):
        text = re.sub(r"<[^>]*>", "", str(item))
        return f"<span class='long'>{item}</span>" if len(text) > 60 else f"<span>{item}</span>"
    return "<p class='inline-list'>" + " · ".join(span(i) for i in items) + "</p>"


def _pooled(table):
    """Rows of the pooled (per type) profiles of a table (``torsion`` empty)."""
    if table is None or "torsion" not in table.columns:
        return table
    torsion = table["torsion"]
    return table[torsion.isna() | (torsion.astype(str) == "")].copy()


def _pm_columns(frame, value, err, digits=None):
    if value not in frame.columns:
        return ["–"] * len(frame)
    errs = frame[err] if err in frame.columns else [np.nan] * len(frame)
    return [_pm(v, e) for v, e in zip(frame[value], errs)]


def _kv(pairs):
    rows = "".join(f"<tr><th>{_e(k)}</th><td>{_e(_fmt(v))}</td></tr>" for k, v in pairs if v is not None)
    return f"<table class='kv'><tbody>{rows}</tbody></table>"


def _callout(title, items, kind="note"):
    items = [i for i in items if i]
    if not items:
        return ""
    lis = "".join(f"<li>{_e(i)}</li>" for i in items)
    return f"<div class='callout {kind}'><h4>{_e(title)}</h4><ul class='note-list'>{lis}</ul></div>"


#: Verdicts drawn like others of the same sense (convergence: converged / agree like consistent).
_SAME_AS = {"converged": "consistent", "agree": "consistent", "trustworthy": "consistent",
            "not converged": "inconsistent", "disagree": "inconsistent", "not trustworthy": "inconsistent",
            "enough effective samples": "consistent", "too few effective samples": "inconsistent"}


def _verdict(text):
    known = {"consistent", "inconsistent", "undersampled", "tension"}
    kind = _SAME_AS.get(text, text)
    cls = f"v-{kind}" if kind in known else "v-other"
    return f"<span class='verdict {cls}'>{_e(text)}</span>"


def _missing(section_id, title, what, command):
    """A section that says what the folder lacks and which command makes it."""
    return (f"<section id='{section_id}'><h2>{_e(title)}</h2><p class='missing'>No {_e(what)} in this folder "
            f"(run <code>{_e(command)}</code>).</p></section>")


def figure_data_uri(fig):
    """A matplotlib figure as an SVG ``data:`` URI (text drawn as paths; no fonts needed)."""
    buf = io.BytesIO()
    fig.savefig(buf, format="svg", metadata={"Date": None})
    return "data:image/svg+xml;base64," + base64.b64encode(buf.getvalue()).decode("ascii")


def _unbroken(text):
    """Escaped text whose torsion labels (words with a colon, ``HEX:C1-C2-C3-C4``) never break."""
    return re.sub(r"(\S+:\S+)", r"<span class='label'>\1</span>", _e(text))


def _figure_html(item):
    w = item.figure.get_figwidth()
    return (f"<figure id='fig-{_e(item.name)}' style='--w: {w:.2f}in'><img alt='{_e(item.caption)}' "
            f"src='{figure_data_uri(item.figure)}'><figcaption>{_unbroken(item.caption)}</figcaption></figure>")


def _figures_html(items):
    """Figures side by side where the page is wide enough."""
    if not items:
        return ""
    return "<div class='figs'>" + "".join(_figure_html(i) for i in items) + "</div>"



@dataclass
class Page:
    """What every section of a report needs: the folder, its summary and scheme, the types the
    tables show (all of them, or the chosen or most informative ones when there are many) and the
    way from the report to the folder's files (for the links to full tables)."""

    folder: str
    summary: dict
    scheme: object
    types: list
    all_types: list
    chosen: bool = False
    base: str = ""

    @property
    def summarised(self):
        """Whether the tables show fewer types than the folder has."""
        return len(self.types) < len(self.all_types)

    def shown(self, frame, column="type"):
        """The rows of ``frame`` of the shown types (a copy)."""
        if frame is None or column not in frame.columns or not self.summarised:
            return None if frame is None else frame.copy()
        return frame[frame[column].isin(self.types)].copy()

    def link(self, name):
        return csv_link(name, self.base)

    def which(self, *csv, what="types"):
        """A note above a table that shows only some types: which ones and where the rest is."""
        if not self.summarised:
            return ""
        why = "the types chosen" if self.chosen else "the most informative types"
        links = [self.link(c) for c in csv]
        listed = links[0] if len(links) == 1 else ", ".join(links[:-1]) + " and " + links[-1]
        return f"<p class='lead'>Shown: {len(self.types)} of {len(self.all_types)} {what} ({why}); every type: {listed}.</p>"
