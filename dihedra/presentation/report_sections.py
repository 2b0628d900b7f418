"""The sections of the HTML report, one function each: each reads the files of a results folder
that it shows (through :mod:`dihedra.io.tables`) and returns its HTML; a section whose step has
not run says which command makes it."""

from __future__ import annotations

import pandas as pd

from ..io.tables import read_optional_json, read_optional_table as read_optional, read_optional_text
from .figures import state_colours
from .report_html import _callout, _e, _figures_html, _fmt, _kv, _missing, _pm, _pm_columns, _pooled, _table, _verdict

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
    text = read_optional_text(folder, "analysis.toml")
    if text is not None:
        parts.append("<h3>Analysis file (analysis.toml, run by <code>dihedra run</code>)</h3>"
                     f"<pre>{_e(text)}</pre>")
    parts.append("</section>")
    return "".join(parts)


def _torsions(folder, scheme):
    tors = read_optional(folder, "torsions.csv")
    parts = ["<section id='torsions'><h2>Torsions and states</h2>"]
    if tors is not None:
        by_type = tors.groupby("type", sort=False).size().reset_index(name="torsions")
        parts.append(f"<p class='lead'>{len(tors)} torsions of {len(by_type)} type(s).</p>")
        parts.append(_table(by_type, headers=["type", "torsions"], what="types"))
        cols = [c for c in ("torsion", "type", "atom_names", "atom_indices", "resname", "variant", "resid",
                            "n_undefined_frames") if c in tors.columns]
        parts.append("<h3>Torsion table</h3>")
        parts.append(_table(tors, cols, what="torsions"))
    if scheme is not None:
        colours = state_colours(scheme)
        rows = pd.DataFrame(scheme.sector_table(), columns=["state", "from_deg", "to_deg"])
        rows.insert(0, "colour", [f"<span style='display:inline-block;width:0.9em;height:0.9em;"
                                  f"background:{colours[str(s).rpartition(': ')[2]]}'></span>"
                                  for s in rows["state"]])   # a set of schemes: "part: state"
        parts.append(f"<h3>State scheme: {_e(scheme.name)}</h3>")
        parts.append(_table(rows, headers=["", "state", "from (deg)", "to (deg)"],
                            raw=("colour",), what="arcs"))
    parts.append("</section>")
    return "".join(parts)


def _populations(folder, scheme, figs):
    pops = read_optional(folder, "populations_by_type.csv")
    parts = ["<section id='populations'><h2>Populations</h2>",
             "<p class='lead'>Fraction of frames in each state, pooled per torsion type, ± standard error "
             "(autocorrelation accounted for by blocking; where the torsions of a type differ more than "
             "their errors explain, the error includes the spread between them: I<sup>2</sup> is the "
             "largest share of that spread over the states). n/a: no error can be estimated "
             "(e.g. a single frame).</p>"]
    if pops is not None and len(pops):
        states = [s for s in (scheme.labels if scheme else pops["state"].unique()) if s in set(pops["state"])]
        wide = []
        for t, sub in pops.groupby("type", sort=False):
            row = {"type": t, "torsions": int(sub["n_torsions"].iloc[0]) if "n_torsions" in sub else None}
            key = sub.set_index("state")
            for s in states:
                row[s] = _pm(key.loc[s, "population"], key.loc[s, "population_err"]) if s in key.index else "–"
            if "i_squared" in sub:
                i2 = pd.to_numeric(sub["i_squared"], errors="coerce").max()
                row["I² (%)"] = "–" if pd.isna(i2) else f"{100 * i2:.0f}"
            wide.append(row)
        parts.append(_table(pd.DataFrame(wide), what="types"))
    conf = read_optional(folder, "conformers_by_type.csv")
    if conf is not None and len(conf):
        top = conf.groupby("group_type", sort=False).head(5).copy()
        top["population"] = [_pm(p, e) for p, e in zip(top["population"], top["population_err"])]
        parts.append("<h3>Most populated conformers (joint states along the chain)</h3>")
        parts.append(_table(top, ["group_type", "conformer", "population", "n_groups"],
                            ["molecule type", "conformer", "population", "molecules"], what="conformers"))
    parts.append(_figures_html(figs.get("populations", [])))
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



def _convergence(folder, summary, figs):
    """The convergence verdicts per type (convergence.csv), their reasons in plain words, the start
    that was dropped, and the forward/backward figures."""
    table = read_optional(folder, "convergence.csv")
    title = "Is the sampling converged?"
    if table is None:
        return ("<section id='convergence'><h2>" + _e(title) + "</h2><p class='missing'>No convergence.csv in this "
                "folder (written by an older dihedra): run <code>dihedra track</code> again, or in Python "
                "<code>dihedra.convergence(dihedra.load_results(DIR)).save(DIR)</code>.</p></section>")
    info = read_optional_json(folder, "convergence.json") or {}
    params = info.get("parameters", {})
    parts = [f"<section id='convergence'><h2>{_e(title)}</h2>",
             "<p class='lead'>One verdict per torsion type. A type is converged when its start is equilibrated "
             "(equilibration detection, Chodera 2016), its replicas agree (chi-square test with each replica's "
             "own error), it has at least 20 effective samples, and every population has reached the target "
             f"standard error of {_fmt(params.get('target_error'))}.</p>"]
    dropped = (summary.get("parameters") or {}).get("discard")
    if dropped:
        spans = ", ".join(f"{_fmt(x)} ps" for x in dict.fromkeys(dropped.get("discarded_ps", [])))
        parts.append(f"<p>Start dropped from every replica before the analysis (<code>discard = "
                     f"{_e(dropped.get('requested'))}</code>): {_e(spans)}.</p>")
    rows = table.copy()
    rows["verdict"] = [_verdict("converged" if v == "converged" else "not converged") for v in table["verdict"]]
    rows["replicas"] = [_verdict(v) if v in ("agree", "tension", "disagree") else _e(v) for v in table["replicas"]]
    rows["start"] = [f"{_fmt(t)} ps" if s == "drifts" else "equilibrated" for s, t in zip(table["start"], table["t0_ps"])]
    parts.append(_table(rows, ["type", "verdict", "start", "replicas", "population_err_max", "forecast"],
                        ["type", "verdict", "unequilibrated until", "replicas", "largest population error",
                         "to reach the target"], raw=("verdict", "replicas"), what="types"))
    reasons = [(t, v.split(": ", 1)[1]) for t, v in zip(table["type"], table["verdict"]) if v != "converged"]
    if reasons:
        parts.append("<h3>Why not converged</h3><ul class='note-list'>" + "".join(
            f"<li><b>{_e(t)}</b>: " + "; ".join(_e(r) for r in why.split("; ")) + ".</li>" for t, why in reasons)
            + "</ul>")
        parts.append(_callout("What to do", [
            "an unequilibrated start: track again with --discard auto (or a time), which drops it from every table",
            "replicas that disagree: they sample different states; run them longer, or check that they simulate "
            "the same system",
            "a population error above the target: simulate for the time the forecast gives, or add replicas"],
            "caution"))
    parts.append(_figures_html(figs.get("convergence", [])))
    parts.append("</section>")
    return "".join(parts)
