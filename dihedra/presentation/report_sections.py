"""The sections of the HTML report on what was sampled: inputs, torsions, populations, time series,
profiles and the comparison with a scan. Each reads the files of a results folder that it shows
(through :mod:`dihedra.io.tables`) and returns its HTML; a section whose step has not run says
which command makes it. Long tables are summarised per type and link their full CSV (see
:class:`~dihedra.presentation.report_html.Page`)."""

from __future__ import annotations

import pandas as pd

from ..analysis.profiles.estimation import error_source
from ..io.tables import read_optional_json, read_optional_table as read_optional, read_optional_text
from .figures import state_colours
from .report_html import (MAX_ROWS, _callout, _e, _figures_html, _fmt, _inline_list, _kelvin, _kv, _missing, _pm,
                          _pm_columns, _pooled, _table, _verdict)


def _provenance(page):
    folder, summary = page.folder, page.summary
    parts = ["<section id='inputs'><h2>Inputs and provenance</h2>"]
    top = summary.get("topology", {}) or {}
    parts.append(_kv([("results folder", folder), ("topology", top.get("path")),
                      ("topology SHA-256", top.get("sha256")), ("command", summary.get("command")),
                      ("created", summary.get("created")), ("dihedra version", summary.get("dihedra_version")),
                      ("run time (s)", summary.get("run_seconds"))]))
    reps = summary.get("replicas", [])
    if reps:
        rows = [{"replica": k + 1,
                 "trajectory": f"{_e(r.get('trajectory'))}<br><span class='sha'>SHA-256 {_e(r.get('sha256') or '–')}</span>",
                 "frames": f"{r.get('frames_analysed')} of {r.get('n_frames_in_file')}: {r.get('first_frame')}.."
                           f"{r.get('last_frame')}, step {r.get('frame_step')}",
                 "time between frames (ps)": r.get("time_between_analysed_frames_ps"),
                 "time step from": r.get("time_step_source")} for k, r in enumerate(reps)]
        parts.append("<h3>Trajectories (replicas)</h3>")
        parts.append(_table(pd.DataFrame(rows), what="replicas", wrap=("time step from",), raw=("trajectory",),
                            classes={"trajectory": "path"}, max_rows=MAX_ROWS, csv="summary.json", base=page.base))
    params = summary.get("parameters", {}) or {}
    if params:
        parts.append("<h3>Parameters of the trajectory pass</h3>")
        parts.append(_inline_list(f"<b>{_e(k)}</b> {_e(_fmt(v))}" for k, v in sorted(_short_parameters(params).items())))
    versions = summary.get("versions", {}) or {}
    if versions:
        parts.append("<h3>Package versions</h3>")
        parts.append(_inline_list(f"<b>{_e(k)}</b> {_e(v)}" for k, v in sorted(versions.items())))
    text = read_optional_text(folder, "analysis.toml")
    if text is not None:
        parts.append("<h3>Analysis file (analysis.toml, run by <code>dihedra run</code>)</h3>"
                     f"<pre>{_e(text)}</pre>")
    parts.append("</section>")
    return "".join(parts)


def _short_parameters(params):
    """The parameters of the pass as a table shows them: a choice of schemes per type as its
    request and the count of each scheme (every type's scheme and reason: schemes.csv), other
    long values cut (summary.json holds them whole)."""
    out = {}
    for key, value in params.items():
        if key == "scheme_choice" and isinstance(value, dict):
            counts = pd.Series([t.get("scheme") for t in value.get("types", [])]).value_counts()
            out[key] = (f"{value.get('asked')}: " + ", ".join(f"{s} ({n} types)" for s, n in counts.items())
                        + "; every type's scheme and why: schemes.csv")
            continue
        text = str(value)
        out[key] = text if len(text) <= 160 else text[:150] + " ... (whole: summary.json)"
    return out


def _torsions(page):
    tors = read_optional(page.folder, "torsions.csv")
    parts = ["<section id='torsions'><h2>Torsions and states</h2>"]
    if tors is not None:
        by_type = tors.groupby("type", sort=False).size().reset_index(name="torsions")
        parts.append(f"<p class='lead'>{len(tors)} torsions of {len(by_type)} type(s); every torsion with its "
                     f"atoms and residue: {page.link('torsions.csv')}.</p>")
        if len(by_type) <= MAX_ROWS:
            parts.append(_table(by_type, headers=["type", "torsions"], what="types"))
        else:
            parts.append("<h3>Torsions per type</h3>")
            parts.append(_inline_list(f"{_e(t)} ({n})" for t, n in zip(by_type["type"], by_type["torsions"])))
        if len(tors) <= MAX_ROWS:
            cols = [c for c in ("torsion", "type", "atom_names", "atom_indices", "resname", "variant", "resid",
                                "n_undefined_frames") if c in tors.columns]
            parts.append("<h3>Torsion table</h3>")
            parts.append(_table(tors, cols, what="torsions"))
        undefined = tors[pd.to_numeric(tors.get("n_undefined_frames", 0), errors="coerce").fillna(0) > 0] \
            if "n_undefined_frames" in tors.columns else tors.iloc[:0]
        if len(undefined):
            parts.append(f"<p>{len(undefined)} torsion(s) have undefined frames (collinear atoms): "
                         + ", ".join(_e(x) for x in undefined["torsion"][:8]) + (" ..." if len(undefined) > 8 else "")
                         + ".</p>")
    if page.scheme is not None:
        parts.append(_scheme_table(page.scheme))
    parts.append("</section>")
    return "".join(parts)


def _scheme_table(scheme):
    """The state scheme: one row per scheme (the parts of a set), its states with their arcs and colours."""
    colours = state_colours(scheme)
    rows = {}
    for label, lo, hi in scheme.sector_table():
        part, _, state = str(label).rpartition(": ")
        rows.setdefault(part, {}).setdefault(state, []).append(f"({_fmt(lo)}, {_fmt(hi)}]")
    cells = [{"scheme": part or scheme.name,
              "states (arcs in deg)": " ".join(
                  f"<span class='label'><span style='display:inline-block;width:0.8em;height:0.8em;"
                  f"background:{colours[state]}'></span> {_e(state)} {_e(' and '.join(arcs))}</span>"
                  for state, arcs in states.items())} for part, states in rows.items()]
    note = ("<p class='lead'>A set of schemes: each torsion type follows one of them (schemes.csv names the "
            "scheme of every type and why); states that play the same part share a colour.</p>"
            if len(rows) > 1 else "")
    return (f"<h3>State scheme: {_e(scheme.name)}</h3>" + note
            + _table(pd.DataFrame(cells), raw=("states (arcs in deg)",), wrap=("states (arcs in deg)",),
                     what="schemes"))


def _populations(page, figs):
    pops = read_optional(page.folder, "populations_by_type.csv")
    parts = ["<section id='populations'><h2>Populations</h2>",
             "<p class='lead'>Fraction of frames in each state, pooled per torsion type, ± standard error "
             "(autocorrelation accounted for by blocking; where the torsions of a type differ more than "
             "their errors explain, the error includes the spread between them: I<sup>2</sup> is the "
             "largest share of that spread over the states), rounded to the error. n/a: no error can be "
             "estimated (e.g. a single frame); ± 0: the torsions never left their state.</p>"]
    if pops is not None and len(pops):
        parts.append(page.which("populations_by_type.csv"))
        shown = page.shown(pops)
        for states, table in _population_tables(shown, page.scheme):
            parts.append(_table(table, what="types"))
        if page.summarised:
            parts.append("<h3>Main state of every type</h3>")
            top = pops.loc[pops.groupby("type", sort=False)["population"].idxmax()]
            parts.append(_inline_list(f"{_e(r.type)}: {_e(r.state)} {_e(_pm(r.population, r.population_err))}"
                                      for r in top.itertuples(index=False)))
    conf = read_optional(page.folder, "conformers_by_type.csv")
    if conf is not None and len(conf):
        groups = {str(t).partition(":")[0] for t in page.types}
        if page.summarised and set(conf["group_type"]) & groups:
            conf = conf[conf["group_type"].isin(groups)]
        top = conf.groupby("group_type", sort=False).head(3 if page.summarised else 5).copy()
        top["population"] = [_pm(p, e) for p, e in zip(top["population"], top["population_err"])]
        parts.append("<h3>Most populated conformers (joint states along the chain)</h3>")
        parts.append(_table(top, ["group_type", "conformer", "population", "n_groups"],
                            ["molecule type", "conformer", "population", "molecules"], what="conformers",
                            max_rows=MAX_ROWS, csv="conformers_by_type.csv", base=page.base))
    parts.append(_figures_html(figs.get("populations", [])))
    parts.append("</section>")
    return "".join(parts)


def _population_tables(pops, scheme, state="state", count=("n_torsions", "torsions")):
    """One wide table per set of states (a set of schemes: omega cis/trans apart from phi/psi):
    a row per type, a column per state (value ± error), the torsions and I^2. ``state`` names the
    column of the states (``region`` for Ramachandran regions), ``count`` the column that counts
    the members of a type and its heading."""
    by_states = {}
    pops = pops.rename(columns={state: "state"})
    for t, sub in pops.groupby("type", sort=False):
        states = tuple(s for s in (scheme.labels if scheme else sub["state"].unique()) if s in set(sub["state"]))
        key = sub.set_index("state")
        row = {"type": t, count[1]: int(sub[count[0]].iloc[0]) if count[0] in sub else None}
        for s in states:
            row[s] = _pm(key.loc[s, "population"], key.loc[s, "population_err"])
        if "i_squared" in sub:
            i2 = pd.to_numeric(sub["i_squared"], errors="coerce").max()
            row["I² (%)"] = "–" if pd.isna(i2) else f"{100 * i2:.0f}"
        by_states.setdefault(states, []).append(row)
    return [(states, pd.DataFrame(rows)) for states, rows in by_states.items()]


def _profiles(page, figs):
    info = read_optional_json(page.folder, "profiles.json")
    if info is None:
        return _missing("profiles", "Free-energy profiles", "profiles", "dihedra profile DIR")
    parts = ["<section id='profiles'><h2>Free-energy profiles</h2>"]
    unit = info.get("energy_unit", "kJ/mol")
    parts.append(f"<p class='lead'>F(φ) = −kT ln p(φ) at {_kelvin(info.get('temperature_k'))} K (kT = "
                 f"{_fmt(info.get('kt_kj_mol'))} kJ/mol), {_fmt(info.get('bin_width_deg'))}-degree bins, "
                 f"{_e(error_source(info))}; energies in {_e(unit)}.</p>")
    parts.append(_callout("Cautions", info.get("cautions", []), "caution"))
    parts.append(page.which("minima.csv", "barriers.csv", "state_free_energies.csv"))
    suffix = {"kJ/mol": "kj_mol", "kcal/mol": "kcal_mol", "kT": "kt"}.get(unit, "kj_mol")
    minima = page.shown(_pooled(read_optional(page.folder, "minima.csv")))
    if minima is not None and len(minima):
        minima["position (deg)"] = [_pm(a, e) for a, e in zip(minima["angle_deg"], minima["angle_err_deg"])]
        minima[f"F ({unit})"] = _pm_columns(minima, f"free_energy_{suffix}", f"free_energy_err_{suffix}")
        parts.append("<h3>Minima (pooled per type)</h3>")
        parts.append(_table(minima, ["type", "minimum", "position (deg)", f"F ({unit})"]))
    barriers = page.shown(_pooled(read_optional(page.folder, "barriers.csv")))
    if barriers is not None and len(barriers):
        parts.append(f"<h3>Barriers (pooled per type; heights in {_e(unit)})</h3>")
        parts.append(_barrier_table(barriers, unit, suffix))
    dg = page.shown(_pooled(read_optional(page.folder, "state_free_energies.csv")))
    if dg is not None and len(dg):
        dg["population"] = _pm_columns(dg, "population", "population_err")
        dg[f"ΔG ({unit})"] = _pm_columns(dg, f"free_energy_{suffix}", f"free_energy_err_{suffix}")
        parts.append("<h3>State free energies (pooled per type)</h3>")
        parts.append(_table(dg, ["type", "state", "reference_state", "population", f"ΔG ({unit})"],
                            ["type", "state", "relative to", "population", f"ΔG ({unit})"]))
    parts.append(_figures_html(figs.get("profile", []) + figs.get("map", [])))
    parts.append("</section>")
    return "".join(parts)


def _barrier_table(barriers, unit, suffix):
    barriers["between minima (deg)"] = [f"{_fmt(a)} → {_fmt(b)}" if a != b else f"{_fmt(a)}, around the circle"
                                        for a, b in zip(barriers["from_minimum_deg"], barriers["to_minimum_deg"])]
    barriers["top (deg)"] = [_pm(a, e) for a, e in zip(barriers["angle_deg"], barriers["angle_err_deg"])]
    barriers[f"F ({unit})"] = _pm_columns(barriers, f"free_energy_{suffix}", f"free_energy_err_{suffix}")
    barriers["height from first"] = _pm_columns(barriers, f"height_from_first_{suffix}",
                                                f"height_from_first_err_{suffix}")
    barriers["height from second"] = _pm_columns(barriers, f"height_from_second_{suffix}",
                                                 f"height_from_second_err_{suffix}")
    barriers["sampled"] = [("yes" if str(v).lower() in ("true", "1") else "no: crosses unsampled bins")
                           for v in barriers["sampled"]]
    return _table(barriers, ["type", "between minima (deg)", "top (deg)", f"F ({unit})", "height from first",
                             "height from second", "sampled"])


def _comparison(page):
    folder = page.folder
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
                     f"{_kelvin(details.get('temperature_k'))} K.</p>")
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
        if str(getattr(row, "sampling", "")).startswith("not converged"):
            parts.append(f"<p><b>But the sampling is {_e(row.sampling)}</b>: the verdict may change with more of "
                         "it.</p>")
        states = pd.DataFrame((per_type.get(t) or {}).get("states", []))
        if len(states):
            states["sampled"] = [_pm(p, e) for p, e in zip(states["population"], states["population_err"])]
            states["ddG (kJ/mol)"] = [_pm(g, e) for g, e in zip(states["ddg_kj_mol"],
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


def _time_series(figs):
    items = figs.get("series", []) + figs.get("raster", [])
    if not items:
        return ""
    return "<section id='series'><h2>Time series</h2>" + _figures_html(items) + "</section>"
