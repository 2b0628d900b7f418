"""One self-contained HTML report of a results folder, readable offline and printable to PDF.

:func:`write_report` (``dihedra report DIR [--out FILE]``) gathers what a results folder holds
into ``report.html``:

* inputs and provenance from ``summary.json`` (topology and trajectories with SHA-256, frame
  ranges, time step and its source, parameters, package versions, the analysis file of
  ``dihedra run`` when there is one);
* the notices of every step, and the cautions each step wrote beside its results;
* the torsion table and the state scheme;
* populations per type and the most populated conformers;
* profiles (minima, barriers, state free energies) and the comparison with a static scan, with
  its verdicts and their reasons;
* kinetics (rates, dwell times, implied timescales) with the transition-state-theory caution;
* couplings and their comparison with experiment;
* every figure of :func:`dihedra.presentation.figures.figure_set`, embedded as an SVG data URI (text as paths,
  so no font is fetched), and a list of the figures the folder could not make and why.

The page has no script and makes no request: every style is inline in one ``<style>`` element,
every image a ``data:`` URI, links only jump within the page. A print style sheet (A4, figures and
table rows kept whole, no navigation) makes "Print to PDF" give a clean document. The report only
reads the folder; it recomputes nothing.
"""

from __future__ import annotations

import base64
import html
import io
import os
import time

import numpy as np
import pandas as pd

from ..errors import DihedraError
from ..io.outputs import check_replaceable_in, check_single_file, file_head_contains, is_inside, write_text
from ..io.tables import read_optional_json, read_optional_table as read_optional

#: Rows shown of long tables (the full table is in the folder).
MAX_ROWS = 60

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
th, td { padding: 0.22rem 0.65rem; border-bottom: 1px solid var(--rule); text-align: left; vertical-align: top;
         overflow-wrap: anywhere; }
th { background: var(--band); font-weight: 600; }
td.num, th.num { text-align: right; font-variant-numeric: tabular-nums; white-space: nowrap; }
td.hash { font-family: "DejaVu Sans Mono", Consolas, monospace; font-size: 0.78rem; }
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
  tr:nth-child(even) td { background: none; }
}
"""


# ----------------------------------------------------------------------------------------------
# Small HTML helpers
# ----------------------------------------------------------------------------------------------

def _e(value):
    return html.escape("" if value is None else str(value))


def _is_number(value):
    return isinstance(value, (int, float, np.integer, np.floating)) and not isinstance(value, bool)


def _fmt(value):
    """A value for a table cell: NaN as an en dash, very small or large numbers in exponent form."""
    if value is None:
        return "–"
    if isinstance(value, (bool, np.bool_)):
        return "yes" if value else "no"
    if isinstance(value, (int, np.integer)):
        return str(int(value))
    if isinstance(value, (float, np.floating)):
        v = float(value)
        a = abs(v)
        if not np.isfinite(v):
            return "–"
        if a == 0:
            return "0"
        if a < 1e-3 or a >= 1e7:
            return f"{v:.3e}"
        return f"{v:.6g}" if a >= 1 else f"{v:.4g}"  # as many digits as the CSV files keep
    text = str(value)
    return "–" if text in ("nan", "None", "") else text


def _pm(value, err, digits=3):
    try:
        value = float(value)
    except (TypeError, ValueError):
        return "–"
    if not np.isfinite(value):
        return "–"
    value += 0.0  # no "-0.000"
    try:
        err = float(err)
    except (TypeError, ValueError):
        err = np.nan
    if not np.isfinite(err):
        return f"{float(value):.{digits}f}"
    return f"{float(value):.{digits}f} ± {float(err):.{digits}f}"


def _table(frame, columns=None, headers=None, max_rows=MAX_ROWS, what="rows", raw=()):
    """An HTML table of a DataFrame (numbers right-aligned); longer tables are cut with a note."""
    if frame is None or not len(frame):
        return "<p class='missing'>(empty)</p>"
    columns = list(columns or frame.columns)
    headers = list(headers or columns)
    out = ["<div class='scroll'><table><thead><tr>"]
    sample = frame.head(max_rows)
    numeric = {c: pd.api.types.is_numeric_dtype(frame[c]) and not pd.api.types.is_bool_dtype(frame[c])
               for c in columns}
    for c, h in zip(columns, headers):
        out.append(f"<th class='{'num' if numeric[c] else ''}'>{_e(h)}</th>")
    out.append("</tr></thead><tbody>")
    for row in sample[columns].itertuples(index=False):
        out.append("<tr>")
        for c, v in zip(columns, row):
            cell = v if c in raw else _e(_fmt(v))
            out.append(f"<td class='{'num' if numeric[c] else ''}'>{cell}</td>")
        out.append("</tr>")
    out.append("</tbody></table></div>")
    if len(frame) > max_rows:
        out.append(f"<p class='missing'>First {max_rows} of {len(frame)} {what}; the full table is in the folder.</p>")
    return "".join(out)


def _pooled(table):
    """Rows of the pooled (per type) profiles of a table (``torsion`` empty)."""
    if table is None or "torsion" not in table.columns:
        return table
    return table[table["torsion"].fillna("").astype(str) == ""].copy()


def _pm_columns(frame, value, err, digits=3):
    if value not in frame.columns:
        return ["–"] * len(frame)
    errs = frame[err] if err in frame.columns else [np.nan] * len(frame)
    return [_pm(v, e, digits) for v, e in zip(frame[value], errs)]


def _kv(pairs):
    rows = "".join(f"<tr><th>{_e(k)}</th><td>{_e(_fmt(v))}</td></tr>" for k, v in pairs if v is not None)
    return f"<table class='kv'><tbody>{rows}</tbody></table>"


def _callout(title, items, kind="note"):
    items = [i for i in items if i]
    if not items:
        return ""
    lis = "".join(f"<li>{_e(i)}</li>" for i in items)
    return f"<div class='callout {kind}'><h4>{_e(title)}</h4><ul class='note-list'>{lis}</ul></div>"


def _verdict(text):
    known = {"consistent", "inconsistent", "undersampled", "tension"}
    cls = f"v-{text}" if text in known else "v-other"
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


def _figure_html(item):
    w = item.figure.get_figwidth()
    return (f"<figure id='fig-{_e(item.name)}' style='--w: {w:.2f}in'><img alt='{_e(item.caption)}' "
            f"src='{figure_data_uri(item.figure)}'><figcaption>{_e(item.caption)}</figcaption></figure>")


def _figures_html(items):
    """Figures side by side where the page is wide enough."""
    if not items:
        return ""
    return "<div class='figs'>" + "".join(_figure_html(i) for i in items) + "</div>"


# ----------------------------------------------------------------------------------------------
# Sections
# ----------------------------------------------------------------------------------------------

def _provenance(folder, summary):
    parts = ["<section id='inputs'><h2>Inputs and provenance</h2>"]
    top = summary.get("topology", {}) or {}
    parts.append(_kv([("results folder", folder), ("topology", top.get("path")),
                      ("topology SHA-256", top.get("sha256")), ("command", summary.get("command")),
                      ("created", summary.get("created")), ("dihedra version", summary.get("dihedra_version")),
                      ("run time (s)", summary.get("run_seconds"))]))
    reps = summary.get("replicas", [])
    if reps:
        rows = [{"replica": k + 1, "trajectory": r.get("trajectory"),
                 "frames": f"{r.get('frames_analysed')} of {r.get('n_frames_in_file')}",
                 "range": f"{r.get('first_frame')}..{r.get('last_frame')} step {r.get('frame_step')}",
                 "time between frames (ps)": r.get("time_between_analysed_frames_ps"),
                 "time step from": r.get("time_step_source"),
                 "SHA-256": (r.get("sha256") or "")} for k, r in enumerate(reps)]
        parts.append("<h3>Trajectories (replicas)</h3>")
        parts.append(_table(pd.DataFrame(rows), what="replicas"))
    params = summary.get("parameters", {}) or {}
    if params:
        parts.append("<h3>Parameters of the trajectory pass</h3>")
        parts.append(_kv(sorted(params.items())))
    versions = summary.get("versions", {}) or {}
    if versions:
        parts.append("<h3>Package versions</h3>")
        parts.append(_kv(sorted(versions.items())))
    for name in ("analysis.toml",):
        path = os.path.join(folder, name)
        if os.path.exists(path):
            with open(path) as fh:
                parts.append(f"<h3>Analysis file ({_e(name)}, run by <code>dihedra run</code>)</h3>"
                             f"<pre>{_e(fh.read())}</pre>")
    parts.append("</section>")
    return "".join(parts)


def _torsions(folder, summary, scheme):
    tors = read_optional(folder, "torsions.csv")
    parts = ["<section id='torsions'><h2>Torsions and states</h2>"]
    if tors is not None:
        by_type = tors.groupby("type", sort=False).size().reset_index(name="torsions")
        parts.append(f"<p class='lead'>{len(tors)} torsions of {len(by_type)} type(s).</p>")
        parts.append(_table(by_type, headers=["type", "torsions"], what="types"))
        cols = [c for c in ("torsion", "type", "atom_names", "atom_indices", "resname", "resid",
                            "n_undefined_frames") if c in tors.columns]
        parts.append("<h3>Torsion table</h3>")
        parts.append(_table(tors, cols, what="torsions"))
    if scheme is not None:
        from .figures import state_colours
        colours = state_colours(scheme)
        rows = pd.DataFrame(scheme.sector_table(), columns=["state", "from_deg", "to_deg"])
        rows.insert(0, "colour", [f"<span style='display:inline-block;width:0.9em;height:0.9em;"
                                  f"background:{colours[s]}'></span>" for s in rows["state"]])
        parts.append(f"<h3>State scheme: {_e(scheme.name)}</h3>")
        parts.append(_table(rows, headers=["", "state", "from (deg)", "to (deg)"],
                            raw=("colour",), what="arcs"))
    parts.append("</section>")
    return "".join(parts)


def _populations(folder, scheme, figs):
    pops = read_optional(folder, "populations_by_type.csv")
    parts = ["<section id='populations'><h2>Populations</h2>",
             "<p class='lead'>Fraction of frames in each state, pooled per torsion type, ± standard error "
             "(autocorrelation accounted for by blocking; molecules treated as independent).</p>"]
    if pops is not None and len(pops):
        states = [s for s in (scheme.labels if scheme else pops["state"].unique()) if s in set(pops["state"])]
        wide = []
        for t, sub in pops.groupby("type", sort=False):
            row = {"type": t, "torsions": int(sub["n_torsions"].iloc[0]) if "n_torsions" in sub else None}
            key = sub.set_index("state")
            for s in states:
                row[s] = _pm(key.loc[s, "population"], key.loc[s, "population_err"]) if s in key.index else "–"
            wide.append(row)
        parts.append(_table(pd.DataFrame(wide), what="types"))
    conf = read_optional(folder, "conformers_by_type.csv")
    if conf is not None and len(conf):
        top = conf.groupby("group_type", sort=False).head(5).copy()
        top["population"] = [_pm(p, e) for p, e in zip(top["population"], top["population_err"])]
        parts.append("<h3>Most populated conformers (joint states along the chain)</h3>")
        parts.append(_table(top, ["group_type", "conformer", "population", "n_groups"],
                            ["molecule type", "conformer", "population", "molecules"], what="conformers"))
    parts.append(_figures_html(figs.get("populations", []) + figs.get("convergence", [])))
    parts.append("</section>")
    return "".join(parts)


def _profiles(folder, figs):
    info = read_optional_json(folder, "profiles.json")
    if info is None:
        return _missing("profiles", "Free-energy profiles", "profiles", "dihedra profile DIR")
    parts = ["<section id='profiles'><h2>Free-energy profiles</h2>"]
    unit = info.get("energy_unit", "kJ/mol")
    parts.append(f"<p class='lead'>F(φ) = −kT ln p(φ) at {_fmt(info.get('temperature_k'))} K (kT = "
                 f"{_fmt(info.get('kt_kj_mol'))} kJ/mol), {_fmt(info.get('bin_width_deg'))}-degree bins, errors "
                 f"from a block bootstrap ({_e(info.get('n_bootstrap'))} resamples); energies in {_e(unit)}.</p>")
    parts.append(_callout("Cautions", info.get("cautions", []), "caution"))
    suffix = {"kJ/mol": "kj_mol", "kcal/mol": "kcal_mol", "kT": "kt"}.get(unit, "kj_mol")
    minima = _pooled(read_optional(folder, "minima.csv"))
    if minima is not None and len(minima):
        minima["position (deg)"] = [_pm(a, e, 1) for a, e in zip(minima["angle_deg"], minima["angle_err_deg"])]
        minima[f"F ({unit})"] = _pm_columns(minima, f"free_energy_{suffix}", f"free_energy_err_{suffix}")
        parts.append("<h3>Minima (pooled per type)</h3>")
        parts.append(_table(minima, ["type", "minimum", "position (deg)", f"F ({unit})"]))
    barriers = _pooled(read_optional(folder, "barriers.csv"))
    if barriers is not None and len(barriers):
        barriers["between minima (deg)"] = [f"{_fmt(a)} → {_fmt(b)}" for a, b in
                                            zip(barriers["from_minimum_deg"], barriers["to_minimum_deg"])]
        barriers["top (deg)"] = [_pm(a, e, 1) for a, e in zip(barriers["angle_deg"], barriers["angle_err_deg"])]
        barriers[f"F ({unit})"] = _pm_columns(barriers, f"free_energy_{suffix}", f"free_energy_err_{suffix}")
        barriers["height from first"] = _pm_columns(barriers, f"height_from_first_{suffix}",
                                                    f"height_from_first_err_{suffix}")
        barriers["height from second"] = _pm_columns(barriers, f"height_from_second_{suffix}",
                                                     f"height_from_second_err_{suffix}")
        barriers["sampled"] = [("yes" if str(v).lower() in ("true", "1") else "no: crosses unsampled bins")
                               for v in barriers["sampled"]]
        parts.append(f"<h3>Barriers (pooled per type; heights in {_e(unit)})</h3>")
        parts.append(_table(barriers, ["type", "between minima (deg)", "top (deg)", f"F ({unit})",
                                       "height from first", "height from second", "sampled"]))
    dg = _pooled(read_optional(folder, "state_free_energies.csv"))
    if dg is not None and len(dg):
        dg["population"] = _pm_columns(dg, "population", "population_err")
        dg[f"ΔG ({unit})"] = _pm_columns(dg, f"free_energy_{suffix}", f"free_energy_err_{suffix}", 2)
        parts.append("<h3>State free energies (pooled per type)</h3>")
        parts.append(_table(dg, ["type", "state", "reference_state", "population", f"ΔG ({unit})"],
                            ["type", "state", "relative to", "population", f"ΔG ({unit})"]))
    parts.append(_figures_html(figs.get("profile", []) + figs.get("map", [])))
    parts.append("</section>")
    return "".join(parts)


def _comparison(folder):
    table = read_optional(folder, "comparison.csv")
    details = read_optional_json(folder, "comparison.json") or {}
    title = "Comparison with the static scan and reference populations"
    if table is None:
        return _missing("comparison", title, "comparison",
                        "dihedra compare DIR --scan FILE [--reference-populations FILE]")
    parts = [f"<section id='comparison'><h2>{_e(title)}</h2>"]
    if "verdict" in table.columns:
        parts.append(_scan_comparison(table[table["verdict"].notna()], details))
    if "reference_verdict" in table.columns:
        parts.append(_reference_comparison(table[table["reference_verdict"].notna()],
                                           details.get("reference_populations") or {}))
    parts.append("</section>")
    return "".join(parts)


def _scan_comparison(table, details):
    parts = ["<h3>Static scan</h3>"]
    scan = details.get("scan", {})
    if scan:
        parts.append(f"<p class='lead'>Scan: {_e(scan.get('source'))} (kind: {_e(scan.get('kind'))}). Temperature "
                     f"{_fmt(details.get('temperature_k'))} K.</p>")
    rows = table.copy()
    rows["verdict"] = [_verdict(v) for v in rows["verdict"]]
    names = {"type": "type", "verdict": "verdict", "n_reliable_bins": "reliable bins", "rmse_kj_mol": "RMSE (kJ/mol)",
             "excess_rmse_kj_mol": "excess RMSE (kJ/mol)", "max_abs_difference_kj_mol": "max |ΔF| (kJ/mol)",
             "js_divergence_bits": "JS divergence (bits)", "offset_kj_mol": "offset (kJ/mol)"}
    cols = [c for c in names if c in rows.columns]
    parts.append(_table(rows, cols, [names[c] for c in cols], raw=("verdict",), what="types"))
    per_type = details.get("types", {}) or {}
    for row in table.itertuples(index=False):
        t = row.type
        parts.append(f"<h4>{_e(t)} {_verdict(row.verdict)}</h4>")
        if "verdict_reason" in table.columns:
            parts.append(f"<p>{_e(row.verdict_reason)}</p>")
        states = pd.DataFrame((per_type.get(t) or {}).get("states", []))
        if len(states):
            states["sampled"] = [_pm(p, e) for p, e in zip(states["population"], states["population_err"])]
            states["ddG (kJ/mol)"] = [_pm(g, e, 2) for g, e in zip(states["ddg_kj_mol"],
                                                                    states["free_energy_err_kj_mol"])]
            parts.append(_table(states, ["state", "sampled", "predicted_population", "z_score", "ddG (kJ/mol)"],
                                ["state", "sampled population", "predicted from the scan", "z", "ΔΔG (kJ/mol)"]))
    rules = details.get("rules", {})
    if rules:
        parts.append("<h4>Verdict rules</h4>" + _kv(rules.items()))
    parts.append(_callout("What a difference can mean", details.get("cautions", []), "caution"))
    return "".join(parts)


def _reference_comparison(table, ref):
    parts = ["<h3>Reference populations</h3>"]
    if ref.get("file"):
        parts.append(f"<p class='lead'>Reference: {_e(ref['file'])}.</p>")
    rows = pd.DataFrame(ref.get("rows", []))
    for row in table.itertuples(index=False):
        parts.append(f"<h4>{_e(row.type)} {_verdict(row.reference_verdict)}</h4>")
        if "reference_verdict_reason" in table.columns:
            parts.append(f"<p>{_e(row.reference_verdict_reason)}</p>")
        sub = rows[rows["type"] == row.type].copy() if len(rows) else rows
        if len(sub):
            sub["sampled"] = [_pm(p, e) for p, e in zip(sub["population"], sub["population_err"])]
            sub["reference"] = [_pm(p, e) for p, e in zip(sub["reference_population"],
                                                           sub["reference_population_err"])]
            parts.append(_table(sub, ["state", "sampled", "reference", "z_score"],
                                ["state", "sampled population", "reference population", "z"]))
    if ref.get("rules"):
        parts.append("<h4>Verdict rules</h4>" + _kv(ref["rules"].items()))
    parts.append(_callout("Cautions", ref.get("cautions", []), "caution"))
    return "".join(parts)


def _kinetics(folder, figs):
    info = read_optional_json(folder, "kinetics.json")
    if info is None:
        return _missing("kinetics", "Kinetics", "kinetics", "dihedra kinetics DIR")
    parts = ["<section id='kinetics'><h2>Kinetics</h2>"]
    p = info.get("parameters", {})
    parts.append(_kv([("state assignment", p.get("assignment")), ("core margin (deg)", p.get("core_margin_deg")),
                      ("time between frames (ps)", p.get("frame_interval_ps")),
                      ("time step from", p.get("frame_interval_source")),
                      ("Markov lags (frames)", ", ".join(map(str, p.get("lags_frames", []) or []))),
                      ("rate estimator", p.get("rate_estimator")), ("dwell times", p.get("lifetime_censoring")),
                      ("Markov model", p.get("markov_estimator"))]))
    parts.append(_callout("Caution", [p.get("caution")], "caution"))
    tr = read_optional(folder, "transitions.csv")
    if tr is not None and len(tr):
        sub = tr[tr["level"] == "type"].copy()
        sub["rate (1/ps)"] = [_pm(r, e, 4) for r, e in zip(sub["rate_per_ps"], sub["rate_err_per_ps"])]
        cols = ["name", "from_state", "to_state", "count", "rate (1/ps)", "eyring_barrier_kj_mol",
                "profile_barrier_kj_mol"]
        parts.append("<h3>Rate constants per type</h3>")
        parts.append(_table(sub, [c for c in cols if c in sub.columns],
                            ["type", "from", "to", "transitions", "rate (1/ps)", "Eyring barrier (kJ/mol)",
                             "profile barrier (kJ/mol)"], what="transitions"))
    lt = read_optional(folder, "lifetimes.csv")
    if lt is not None and len(lt):
        sub = lt[lt["level"] == "type"].copy()
        sub["mean (ps) [95% CI]"] = [f"{_fmt(m)} [{_fmt(a)}, {_fmt(b)}]" for m, a, b in
                                     zip(sub["mean_ps"], sub["ci_low_ps"], sub["ci_high_ps"])]
        sub["visits (censored)"] = [f"{int(n)} ({int(c)})" for n, c in zip(sub["n_segments"], sub["n_censored"])]
        sub["population: frames / rates"] = [f"{_fmt(a)} / {_fmt(b)}" for a, b in
                                             zip(sub["population_counted"], sub["population_from_rates"])]
        parts.append("<h3>Dwell times per type</h3>")
        parts.append(_table(sub, ["name", "state", "mean (ps) [95% CI]", "median_ps", "mean_from_rates_ps",
                                  "visits (censored)", "population: frames / rates"],
                            ["type", "state", "mean (ps) [95% CI]", "median (ps)", "1 / exit rate (ps)",
                             "visits (censored)", "population: frames / rates"], what="states"))
    ts = read_optional(folder, "timescales.csv")
    if ts is not None and len(ts):
        sub = ts[(ts["level"] == "type") & (ts["index"] == 1)]
        if len(sub):
            parts.append("<h3>Slowest implied timescale (ps) per type against the lag time</h3>"
                         "<p class='lead'>A Markov model is usable from the lag where this stops changing.</p>")
            wide = sub.pivot_table(index="name", columns="lag_ps", values="timescale_ps", sort=False)
            wide.columns = [f"lag {_fmt(float(c))} ps" for c in wide.columns]
            wide = wide.reset_index().rename(columns={"name": "type"})
            parts.append(_table(wide, what="types"))
    parts.append(_figures_html(figs.get("transitions", []) + figs.get("lifetimes", [])))
    parts.append("</section>")
    return "".join(parts)


def _couplings(folder, figs):
    table = read_optional(folder, "couplings.csv")
    info = read_optional_json(folder, "couplings.json")
    if table is None:
        return _missing("couplings", "3J couplings", "couplings", "dihedra couplings DIR --relation NAME")
    parts = ["<section id='couplings'><h2>3J couplings</h2>"]
    cols = [c for c in ("relation", "torsion", "type", "j_hz", "j_err_hz", "j_systematic_hz") if c in table.columns]
    parts.append(_table(table, cols, what="couplings"))
    exp = (info or {}).get("experimental") or {}
    summ = pd.DataFrame(exp.get("summary", []) or [])
    if len(summ):
        summ["verdict"] = [_verdict(v) for v in summ["verdict"]]
        parts.append("<h3>Against experiment</h3>")
        parts.append(_table(summ, [c for c in ("relation", "verdict", "n_points", "rmsd_hz", "mean_deviation_hz",
                                               "chi_square_per_point", "p_value") if c in summ.columns],
                            raw=("verdict",)))
    parts.append(_callout("Cautions", (info or {}).get("cautions", []), "caution"))
    parts.append(_figures_html(figs.get("couplings", [])))
    parts.append("</section>")
    return "".join(parts)


def _time_series(figs):
    items = figs.get("series", []) + figs.get("raster", [])
    if not items:
        return ""
    return "<section id='series'><h2>Time series</h2>" + _figures_html(items) + "</section>"


# ----------------------------------------------------------------------------------------------
# The report
# ----------------------------------------------------------------------------------------------

def build_report(folder, width="single", figures=True, log=None):
    """The report of a results folder as one HTML string (see the module notes).

    Parameters
    ----------
    folder : str
        A results folder.
    width : {"single", "double"}
        Journal width the figures are drawn at (the page shows them 1.45 times larger on screen).
    figures : bool
        Embed the figures (off for a quick text-only report).
    log : callable, optional
        Receives one-line notes on what the folder lacks.
    """
    from .._version import __version__
    from .figures import figure_set, style
    from ..io.resultsdir import load_results

    result = load_results(folder)
    folder = result.folder
    summary = result.summary
    scheme = result.scheme
    figs, skipped = {}, []
    if figures:
        with style():
            fset = figure_set(folder, width=width, log=log)
        for item in fset.items:
            figs.setdefault(item.kind, []).append(item)
        skipped = fset.skipped
    notices = [("track", n) for n in summary.get("notices", [])]
    for name, step in (("profiles.json", "profile"), ("kinetics.json", "kinetics"), ("couplings.json", "couplings")):
        doc = read_optional_json(folder, name) or {}
        notices += [(step, n) for n in doc.get("notices", [])]
    temp = summary.get("temperature_k")
    n_types = len(set(result.torsion_set.types))
    head = (f"<header class='top'><h1>dihedra report: {_e(os.path.basename(folder))}</h1>"
            f"<p>{summary.get('n_torsions')} torsions of {n_types} type(s), {summary.get('n_frames_analysed')} "
            f"frames from {len(summary.get('replicas', []))} replica(s), scheme {_e(scheme.name)}"
            + (f", {_fmt(temp)} K" if temp is not None else ", no temperature recorded") + "</p>"
            f"<p>{_e(folder)} · report written {time.strftime('%Y-%m-%d %H:%M')} by dihedra {_e(__version__)}</p>"
            "</header>")
    sections = [("inputs", "Inputs"), ("torsions", "Torsions"), ("populations", "Populations"),
                ("series", "Time series"), ("profiles", "Profiles"), ("comparison", "Comparison"),
                ("kinetics", "Kinetics"), ("couplings", "Couplings"), ("notes", "Figures not made")]
    if not (figs.get("series") or figs.get("raster")):
        sections = [s for s in sections if s[0] != "series"]
    nav = "<nav>" + "".join(f"<a href='#{k}'>{_e(v)}</a>" for k, v in sections) + "</nav>"
    body = [_provenance(folder, summary), _torsions(folder, summary, scheme), _populations(folder, scheme, figs),
            _time_series(figs), _profiles(folder, figs), _comparison(folder), _kinetics(folder, figs),
            _couplings(folder, figs)]
    if notices:
        body.insert(0, "<section id='notices'><div class='callout caution'><h4>Notices from the analysis steps</h4>"
                    "<ul class='note-list'>" + "".join(f"<li><b>{_e(s)}:</b> {_e(n)}</li>" for s, n in notices)
                    + "</ul></div></section>")
    notes = "<section id='notes'><h2>Figures not made</h2>"
    if skipped:
        notes += "<p class='lead'>What this folder lacks for the remaining figures:</p><ul class='note-list'>" + \
            "".join(f"<li>{_e(s)}</li>" for s in skipped) + "</ul>"
    elif figures:
        notes += "<p class='missing'>Every figure could be made.</p>"
    else:
        notes += "<p class='missing'>Figures were left out (--no-figures).</p>"
    notes += "</section>"
    foot = ("<footer>Self-contained report: no scripts, no external requests; figures are embedded SVG. "
            "Tables show the first rows; the folder holds the full CSV files.</footer>")
    return ("<!DOCTYPE html><html lang='en'><head><meta charset='utf-8'>" + REPORT_SIGNATURE +
            "<meta name='viewport' content='width=device-width, initial-scale=1'>"
            f"<title>dihedra report: {_e(os.path.basename(folder))}</title><style>{_CSS}</style></head><body>"
            + head + nav + "<main>" + "".join(body) + notes + foot + "</main></body></html>\n")


#: The mark of a report in its head (a report replaces only a file that carries it).
REPORT_SIGNATURE = "<meta name='generator' content='dihedra report'>"


def write_report(folder, out=None, width="single", figures=True, log=None):
    """Write ``report.html`` (or ``out``) for a results folder; returns its path.

    The report replaces only an earlier report (a file in the folder that dihedra wrote, or an
    HTML file that carries dihedra's report signature); any other existing file is refused."""
    from ..io.resultsdir import load_results

    folder = os.fspath(folder)
    if not os.path.isdir(folder):
        load_results(folder)  # raises the one message for a missing results folder
    out = os.path.abspath(out or os.path.join(folder, "report.html"))
    inside = is_inside(os.path.dirname(out), folder)
    if inside:
        name = os.path.join(os.path.relpath(os.path.realpath(os.path.dirname(out)), os.path.realpath(folder)),
                            os.path.basename(out))
        check_replaceable_in(folder, name)
    else:
        out = check_single_file(out, ours=lambda p: file_head_contains(p, REPORT_SIGNATURE), kind="dihedra report")
    text = build_report(folder, width=width, figures=figures, log=log)
    if inside:
        return write_text(folder, name, text)
    return write_text(os.path.dirname(out), os.path.basename(out), text, marked=False)
