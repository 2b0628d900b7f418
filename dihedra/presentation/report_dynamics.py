"""The sections of the HTML report on convergence, kinetics and couplings (see
:mod:`~dihedra.presentation.report_sections` for the others). Rates with no observed transition are
upper limits (``< 13 (95 %)``, as the console prints them), never ``0 ± 0``; every value with an
error is rounded to it."""

from __future__ import annotations

import pandas as pd

from ..io.tables import matching_files, read_optional_json, read_optional_table as read_optional
from .figures.common import _as_bool, single_frames
from .report_html import MAX_ROWS, _callout, _e, _figures_html, _fmt, _kv, _missing, _pm, _table, _verdict
from .rounding import format_plain, format_rate


def _convergence(page, figs):
    """The convergence verdicts per type (convergence.csv), their reasons in plain words, the start
    that was dropped, and the forward/backward figures; with many types a count and a list of every
    type's verdict, the table for the shown ones."""
    folder, summary = page.folder, page.summary
    table = read_optional(folder, "convergence.csv")
    title = "Is the sampling converged?"
    if table is None:
        return ("<section id='convergence'><h2>" + _e(title) + "</h2><p class='missing'>No convergence.csv in this "
                "folder (written by an older dihedra): run <code>dihedra convergence DIR</code>, or in Python "
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
    ok = table["verdict"] == "converged"
    single = int((ok & (table["n_states"] == 1)).sum()) if "n_states" in table else 0
    parts.append(f"<p><b>{int(ok.sum())} of {len(table)} type(s) converged</b>"
                 + (f" ({single} of them with a scheme of one state, a symmetric rotor: converged by definition)"
                    if single else "") + ".</p>")
    # (a type whose scheme has one state, a symmetric rotor, cannot change state: not listed)
    movable = table["n_states"] > 1 if "n_states" in table else True
    frozen = (list(table["type"][~_as_bool(table["state_changes_seen"]) & movable])
              if "state_changes_seen" in table else [])
    if frozen:
        shown_names = ", ".join(_e(t) for t in frozen[:8]) + (f" and {len(frozen) - 8} more" if len(frozen) > 8 else "")
        parts.append(f"<p>{len(frozen)} type(s) never changed state in any torsion, but for momentary excursions "
                     f"({shown_names}): their populations "
                     "are those of the starting structures, and neither their errors nor the sampling still needed "
                     "can be estimated from this run.</p>")
    if page.summarised:
        for flag, word in ((False, "Not converged"), (True, "Converged")):
            names = [_e(t) for t, c in zip(table["type"], ok) if bool(c) == flag]
            if names:
                parts.append(f"<p class='inline-list'><b>{word} ({len(names)}):</b> " + ", ".join(names) + ".</p>")
        parts.append(page.which("convergence.csv"))
    shown = page.shown(table)
    rows = shown.copy()
    rows["verdict"] = [_verdict("converged" if v == "converged" else "not converged") for v in shown["verdict"]]
    rows["replicas"] = [_verdict(v) if v in ("agree", "tension", "disagree") else _e(v) for v in shown["replicas"]]
    rows["start"] = [f"{_fmt(t)} ps" if s == "drifts" else "not testable (too few frames)" if s == "not testable"
                     else "equilibrated" for s, t in zip(shown["start"], shown["t0_ps"])]
    untested = bool((table["start"] == "not testable").any())
    rows["population_err_max"] = [format_plain(x, 2) for x in shown["population_err_max"]]
    parts.append(_table(rows, ["type", "verdict", "start", "replicas", "population_err_max", "forecast"],
                        ["type", "verdict", "unequilibrated until", "replicas", "largest population error",
                         "to reach the target"], raw=("verdict", "replicas"), what="types", wrap=("forecast",),
                        classes={"population_err_max": "num"}))
    reasons = [(t, v.split(": ", 1)[1]) for t, v in zip(shown["type"], shown["verdict"]) if v != "converged"]
    if reasons:
        parts.append("<h3>Why not converged</h3><ul class='note-list'>" + "".join(
            f"<li><b>{_e(t)}</b>: " + "; ".join(_e(r) for r in why.split("; ")) + ".</li>" for t, why in reasons)
            + "</ul>")
        # (the advice that applies to the types not converged; a run of single structures gets its own)
        parts.append(_callout("What to do", [text for applies, text in (
            ((table["start"] == "drifts").any(), "an unequilibrated start: track again with --discard auto (or a "
             "time), which drops it from every table"),
            ((table["replicas"] == "disagree").any(), "replicas that disagree: they sample different states; run "
             "them longer, or check that they simulate the same system"),
            ((_number(table, "population_err_max") > _number(table, "target_error")).any(),
             "a population error above the target: simulate for the time the forecast gives, or add replicas"),
            ((_number(table, "n_effective") < 20).any(), "fewer than 20 effective samples: simulate longer (an error "
             "bar from so few is itself uncertain)"),
            (frozen, "types that never changed state: only runs much longer than their dwell times, enhanced "
             "sampling, or replicas started from other structures can tell their populations"),
            (untested, "a start that cannot be tested: a run of a few frames (or a single structure) says nothing "
             "about convergence; simulate, and analyse the trajectory")) if applies], "caution"))
    parts.append(_figures_html(figs.get("convergence", [])))
    parts.append("</section>")
    return "".join(parts)


def _number(table, column):
    """A column of ``table`` as numbers (NaN where empty or missing: a folder of an older dihedra)."""
    values = table[column] if column in table else pd.Series(float("nan"), index=table.index)
    return pd.to_numeric(values, errors="coerce")


def _kinetics(page, figs):
    folder = page.folder
    info = read_optional_json(folder, "kinetics.json")
    if info is None and single_frames(page):
        return ("<section id='kinetics'><h2>Kinetics</h2><p class='missing'>No kinetics: every replica has one "
                "frame, and a single structure has no transitions or dwell times (kinetics needs a trajectory)."
                "</p></section>")
    if info is None:
        return _missing("kinetics", "Kinetics", "kinetics", "dihedra kinetics DIR")
    parts = ["<section id='kinetics'><h2>Kinetics</h2>"]
    p = info.get("parameters", {})
    lags = p.get("lags_ps") or []
    parts.append(_kv([("state assignment", p.get("assignment")), ("core margin (deg)", p.get("core_margin_deg")),
                      ("time between frames (ps)", p.get("frame_interval_ps")),
                      ("time step from", p.get("frame_interval_source")),
                      ("Markov lags (ps)" if lags else "Markov lags (frames)",
                       ", ".join(format_plain(x, 3) for x in lags) if lags
                       else ", ".join(map(str, p.get("lags_frames", []) or []))),
                      ("rate estimator", p.get("rate_estimator")), ("dwell times", p.get("lifetime_censoring")),
                      ("Markov model", p.get("markov_estimator"))]))
    parts.append(_callout("Caution", [p.get("caution")], "caution"))
    parts.append(page.which("transitions.csv", "lifetimes.csv", "timescales.csv"))
    tr = read_optional(folder, "transitions.csv")
    if tr is not None and len(tr):
        parts.append(_rates(page.shown(tr[tr["level"] == "type"], "name")))
    lt = read_optional(folder, "lifetimes.csv")
    if lt is not None and len(lt):
        parts.append(_dwell_times(page.shown(lt[lt["level"] == "type"], "name")))
    ts = read_optional(folder, "timescales.csv")
    if ts is not None and len(ts):
        sub = page.shown(ts[(ts["level"] == "type") & (ts["index"] == 1)], "name")
        if len(sub):
            parts.append("<h3>Slowest implied timescale (ps) per type against the lag time</h3>"
                         "<p class='lead'>A Markov model is usable from the lag where this stops changing; a "
                         "timescale longer than the run only says \"slower than the run\".</p>")
            wide = sub.pivot_table(index="name", columns="lag_ps", values="timescale_ps", sort=False)
            wide.columns = [f"lag {_fmt(float(c))} ps" for c in wide.columns]
            wide = wide.reset_index().rename(columns={"name": "type"})
            parts.append(_table(wide, what="types", max_rows=MAX_ROWS, csv="timescales.csv", base=page.base))
    parts.append(_figures_html(figs.get("transitions", []) + figs.get("lifetimes", [])))
    parts.append("</section>")
    return "".join(parts)


def _blank(column):
    """Whether a column holds no value in any row (empty text or NaN)."""
    return bool(column.isna().all() or column.astype(str).str.strip().isin(["", "nan", "None"]).all())


def _rates(sub):
    """Rate constants per type: per ns, rounded to their errors; upper limits where none was seen."""
    sub = sub.copy()
    sub["rate (1/ns)"] = [format_rate(r.rate_per_ps, r.rate_err_per_ps, r.count, getattr(r, "rate_ci_high_per_ps", None),
                                      scale=1000.0) for r in sub.itertuples(index=False)]
    sub["transition"] = [f"{a} → {b}" for a, b in zip(sub["from_state"], sub["to_state"])]
    if "profile_barrier_kj_mol" in sub.columns:
        sub["profile_barrier_kj_mol"] = [_pm(v, e) for v, e in zip(
            sub["profile_barrier_kj_mol"], sub.get("profile_barrier_err_kj_mol", [None] * len(sub)))]
    cols = ["name", "transition", "count", "rate (1/ns)", "eyring_barrier_kj_mol", "profile_barrier_kj_mol"]
    heads = ["type", "transition", "transitions seen", "rate (1/ns)", "Eyring barrier (kJ/mol)",
             "profile barrier (kJ/mol)"]
    keep = [k for k, c in enumerate(cols) if c in sub.columns]
    return ("<h3>Rate constants per type</h3><p class='lead'>Per ns, ± standard error; where no transition was "
            "seen, the 95 % upper limit.</p>"
            + _table(sub, [cols[k] for k in keep], [heads[k] for k in keep], what="transitions"))


def _dwell_times(sub):
    sub = sub.copy()
    sub["mean (ps) [95% CI]"] = [f"{'≥ ' if str(r).lower() == 'true' else ''}{_fmt(m)} [{_fmt(a)}, {_fmt(b)}]"
                                 for m, a, b, r in zip(sub["mean_ps"], sub["ci_low_ps"], sub["ci_high_ps"],
                                                       sub.get("mean_restricted", [False] * len(sub)))]
    sub["visits (censored)"] = [f"{int(n)} ({int(c)})" for n, c in zip(sub["n_segments"], sub["n_censored"])]
    sub["population: frames / rates"] = [f"{_fmt(a)} / {_fmt(b)}" for a, b in
                                         zip(sub["population_counted"], sub["population_from_rates"])]
    return ("<h3>Dwell times per type</h3><p class='lead'>≥: the mean is a lower bound (visits still running at "
            "the end of a replica).</p>"
            + _table(sub, ["name", "state", "mean (ps) [95% CI]", "median_ps", "mean_from_rates_ps",
                           "visits (censored)", "population: frames / rates"],
                     ["type", "state", "mean (ps) [95% CI]", "median (ps)", "1 / exit rate (ps)",
                      "visits (censored)", "population: frames / rates"], what="states"))


def coupling_files(folder):
    """The couplings of every relation in a folder (``couplings_<relation>.csv`` and the like, or
    ``couplings.csv`` of an older dihedra): (couplings, against experiment, [json documents]),
    None where the folder has none."""
    tables = [n for n in matching_files(folder, "couplings_*.csv") if not n.endswith("_vs_experiment.csv")]
    tables = tables or matching_files(folder, "couplings.csv")
    exps = matching_files(folder, "couplings_*_vs_experiment.csv") or matching_files(folder, "couplings_vs_experiment.csv")
    infos = [read_optional_json(folder, n) for n in (matching_files(folder, "couplings_*.json")
                                                     or matching_files(folder, "couplings.json"))]

    def joined(names):
        frames = [read_optional(folder, n) for n in names]
        frames = [f for f in frames if f is not None]
        return pd.concat(frames, ignore_index=True) if frames else None
    return joined(tables), joined(exps), [i for i in infos if i]


def _couplings(page, figs):
    table, _, infos = coupling_files(page.folder)
    if table is None:
        return _missing("couplings", "3J couplings", "couplings", "dihedra couplings DIR --relation NAME")
    parts = ["<section id='couplings'><h2>3J couplings</h2>"]
    if len(table) > MAX_ROWS and "level" in table.columns and (table["level"] == "type").any():
        parts.append("<p class='lead'>The mean of every type; every torsion: "
                     + ", ".join(page.link(n) for n in matching_files(page.folder, "couplings_*.csv")
                                 if not n.endswith("_vs_experiment.csv")) + ".</p>")
        table = table[table["level"] == "type"]
    table = table.copy()
    if "j_hz" in table.columns:
        table["J (Hz)"] = [_pm(v, e) for v, e in zip(table["j_hz"], table.get("j_err_hz", [None] * len(table)))]
    cols = [c for c in ("relation", "torsion", "type", "coupled_atoms", "J (Hz)", "j_systematic_hz")
            if c in table.columns and not (c == "torsion" and _blank(table[c]))]   # the mean of a type: no torsion
    heads = {"j_systematic_hz": "relation's own spread (Hz)", "coupled_atoms": "coupled atoms"}
    if "coupled_atoms" in table.columns and table["coupled_atoms"].astype(str).str.contains("+", regex=False).any():
        # a glycine has two H-alpha: a row for each and one for the splitting of both
        parts.append("<p class='lead'>Coupled atoms HA1+HA2 (or HA2+HA1): the sum of the couplings to both "
                     "H-alpha of a glycine, the one splitting seen where they are not resolved.</p>")
    parts.append(_table(table, cols, [heads.get(c, c) for c in cols], what="couplings", max_rows=MAX_ROWS))
    summ = pd.DataFrame([x for info in infos for x in ((info.get("experimental") or {}).get("summary") or [])])
    if len(summ):
        summ["verdict"] = [_verdict(v) for v in summ["verdict"]]
        parts.append("<h3>Against experiment</h3>")
        parts.append(_table(summ, [c for c in ("relation", "verdict", "n_points", "rmsd_hz", "mean_deviation_hz",
                                               "chi_square_per_point", "p_value") if c in summ.columns],
                            raw=("verdict",)))
    cautions = list(dict.fromkeys(c for info in infos for c in info.get("cautions", [])))
    parts.append(_callout("Cautions", cautions, "caution"))
    parts.append(_figures_html(figs.get("couplings", [])))
    parts.append("</section>")
    return "".join(parts)
