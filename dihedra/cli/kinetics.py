"""``dihedra kinetics``: transitions, dwell times, rates and Markov timescales of a results folder."""

import os

import numpy as np

from ..analysis.kinetics import (ASSIGNMENTS, DEFAULT_BOOTSTRAP, DEFAULT_CORE_MARGIN_DEG, DEFAULT_LAGS,
                                 TST_CAUTION, state_kinetics)
from ..io.resultsdir import load_results
from ..io.tables import read_optional_json, read_optional_table
from ..io.outputs import check_earlier_outputs
from ..presentation.rounding import format_upper_limit, format_value_error
from .common import _Renamed, add_overwrite_option, add_renamed, add_types_option, print_notices, say


def register(sub):
    p = sub.add_parser(
        "kinetics", help="state dynamics: transitions, lifetimes, rates, Markov timescales, Eyring barriers",
        description="Transitions between torsion states and conformers, dwell times with bootstrap "
                    "intervals, rate constants with errors, reversible Markov models (implied timescales, "
                    "mean first-passage times) and Eyring barriers, from a folder written by "
                    "'dihedra track'. Writes transitions.csv, lifetimes.csv, dwell_times.csv, "
                    "dwell_survival.csv, timescales.csv, mfpt.csv and kinetics.json into the folder.",
        epilog="Core assignment (the default) runs on every folder of 'dihedra track': the pass records whether "
               "each frame lies in the core of its state for the default margin (cores.parquet); another "
               "--core-margin needs the angles (track with --keep-angles).")
    p.add_argument("folder", metavar="DIR", help="results folder of 'dihedra track'")
    p.add_argument("--assignment", choices=ASSIGNMENTS, default="core",
                   help="core: transition-based core-set assignment (Buchete & Hummer 2008; default); "
                        "crisp: every frame in the sector of its angle (counts recrossings)")
    p.add_argument("--core-margin", type=float, default=DEFAULT_CORE_MARGIN_DEG, metavar="DEG",
                   help=f"shrink every sector by this many degrees on both sides to make its core "
                        f"(default {DEFAULT_CORE_MARGIN_DEG:g})")
    p.add_argument("--lag-ps", type=float, nargs="+", default=None, metavar="PS",
                   help="lag times in ps for the Markov models and implied timescales, whole multiples of the "
                        "time between frames (default: " + ", ".join(map(str, DEFAULT_LAGS)) + " frames)")
    add_renamed(p, "--lag", "--lag-ps (in ps)", "lag_frames", type=int, nargs="+", metavar="FRAMES",
                action=_Renamed)
    add_types_option(p, "only these torsion types, or single torsions by their label", former=("--type",))
    p.add_argument("--dt-ps", type=float, default=None, metavar="PS",
                   help="time between stored frames in ps (needed when the trajectory stores none)")
    p.add_argument("--temperature", type=float, default=None, metavar="K",
                   help="temperature for the Eyring barriers (default: the one recorded by track)")
    p.add_argument("--bootstrap", type=int, default=DEFAULT_BOOTSTRAP, metavar="N",
                   help=f"bootstrap resamples for the 95 %% intervals of the dwell times (default "
                        f"{DEFAULT_BOOTSTRAP}: percentile intervals need more resamples than the standard errors of "
                        "the other commands, 200; Efron & Tibshirani 1993; 0: no intervals)")
    p.add_argument("--seed", type=int, default=0, metavar="N", help="seed of the bootstrap (default 0)")
    p.add_argument("--torsion-bootstrap", action="store_true",
                   help="bootstrap the dwell-time intervals of every single torsion too (slow for thousands of "
                        "torsions; by default single torsions use the Kaplan-Meier variance of the mean, types "
                        "and conformers the bootstrap)")
    add_overwrite_option(p, "kinetics files (transitions.csv ... kinetics.json)")
    p.set_defaults(func=run)


#: The files of 'dihedra kinetics'.
OUTPUTS = ("transitions.csv", "lifetimes.csv", "dwell_times.csv", "dwell_survival.csv", "timescales.csv", "mfpt.csv",
           "kinetics.json")


def run(args):
    result = load_results(args.folder)
    check_earlier_outputs(result.folder, "dihedra kinetics", args.overwrite, names=OUTPUTS)
    profiles = read_optional_json(args.folder, "profiles.json")
    res = state_kinetics(result, assignment=args.assignment, core_margin_deg=args.core_margin,
                         lags_ps=args.lag_ps, lags=args.lag_frames, types=args.types, dt_ps=args.dt_ps,
                         temperature_k=args.temperature,
                         barriers=read_optional_table(args.folder, "barriers.csv"),
                         profile_temperature_k=_profile_temperature(profiles),
                         n_bootstrap=args.bootstrap, seed=args.seed, log=say, torsion_bootstrap=args.torsion_bootstrap)
    written = res.save(result.folder)
    report_kinetics(res, result.folder, written)


def _profile_temperature(profiles):
    """Temperature of ``profiles.json`` (``dihedra profile``), or None."""
    value = profiles.get("temperature_k") if isinstance(profiles, dict) else None
    try:
        return None if value is None else float(value)
    except (TypeError, ValueError):
        return None


def report_kinetics(res, folder=None, written=(), max_types=6, max_conformer_rows=5):
    """A short readable summary of a :class:`~dihedra.analysis.kinetics.KineticsResult` on standard
    output; ``written``: the paths of the files it was saved to in ``folder``."""
    p = res.parameters
    if p["assignment"] == "core":
        cores = ", ".join(f"{c['state']} {c['from_deg']:g}..{c['to_deg']:g}" for c in p["core_sectors_deg"])
        how = f"core sets, margin {p['core_margin_deg']:g} deg (cores: {cores})"
    else:
        how = "crisp sectors (every boundary crossing counts)"
    print(f"{p['n_torsions']} torsions, {p['n_conformer_groups']} conformer groups, {p['n_replicas']} "
          f"replica(s), {p['frame_interval_ps']:g} ps between frames ({p['frame_interval_source']})")
    print(f"assignment: {how}")
    temp = p["temperature_k"]
    lt, tr, ts = res.lifetimes, res.transitions, res.timescales
    for level, title in (("type", "type"), ("conformer", "conformers of")):
        names = list(dict.fromkeys(lt.loc[lt["level"] == level, "name"]))
        for name in names[:max_types]:
            sub_l = lt[(lt["level"] == level) & (lt["name"] == name)]
            sub_t = tr[(tr["level"] == level) & (tr["name"] == name)]
            n_traj = int(sub_l["n_trajectories"].iloc[0])   # (one state series per torsion or group and replica)
            n_rep = max(1, int(p["n_replicas"]))
            what = "torsion" if level == "type" else "group"
            count = (_count(n_traj // n_rep, what) + (f" x {_count(n_rep, 'replica')}" if n_rep > 1 else "")
                     if n_traj % n_rep == 0 else f"{n_traj} state series")
            print(f"\n{title} {name} ({count})")
            if "frame_limited" in sub_l and sub_l["frame_limited"].astype(bool).any():
                print(f"  frames {p['frame_interval_ps']:g} ps apart, about as long as these dwell times: rates too "
                      "low, lifetimes and Eyring barriers too high (see the notes)")
            rows = sub_l.sort_values("population_counted", ascending=False).head(max_conformer_rows
                                                                                   if level == "conformer" else None)
            width = max(8, max(len(s) for s in rows["state"]))
            print(f"  {'state':<{width}}  population (counted / from rates)  lifetime mean [95% CI] ps   median ps")
            for r in rows.itertuples(index=False):
                low = ">=" if bool(r.mean_restricted) else "  "
                flag = " !" if bool(getattr(r, "population_mismatch", False)) else "  "
                print(f"  {r.state:<{width}}  {r.population_counted:10.3f} / {_fmt(r.population_from_rates, '5.3f')}{flag}"
                      f"        {low}{_fmt(r.mean_ps, '8.1f')} [{_fmt(r.ci_low_ps, '.1f')}, {_fmt(r.ci_high_ps, '.1f')}]"
                      f"   {_fmt(r.median_ps, '8.1f')}")
            shown = sub_t.sort_values("count", ascending=False)
            if level == "conformer":
                shown = shown.head(max_conformer_rows)
            eyring = "  Eyring barrier kJ/mol" if temp is not None else ""
            print(f"  {'transition':<{2 * width + 4}}  {'count':>7}  rate per ns{eyring}")
            for r in shown.itertuples(index=False):
                rate = format_value_error(r.rate_per_ps * 1e3, r.rate_err_per_ps * 1e3) if r.count else \
                    format_upper_limit(r.rate_ci_high_per_ps * 1e3)
                bar = f"  {r.eyring_barrier_kj_mol:6.1f}" if temp is not None and np.isfinite(r.eyring_barrier_kj_mol) else ""
                if np.isfinite(r.profile_barrier_kj_mol):
                    bar += f" (profile {r.profile_barrier_kj_mol:.1f})"
                if bool(getattr(r, "intermediate_missed", False)):
                    bar += "  through another state between two frames (see the notes)"
                print(f"  {r.from_state + ' -> ' + r.to_state:<{2 * width + 4}}  {r.count:>7}  {rate:<18}{bar}")
            sub_s = ts[(ts["level"] == level) & (ts["name"] == name) & (ts["index"] == 1)]
            if len(sub_s):
                lags = "  ".join(f"{a:g}: {b:.3g}" + (" (< lag)" if b < a else "")
                                 for a, b in zip(sub_s["lag_ps"], sub_s["timescale_ps"]))
                print(f"  slowest implied timescale (ps) by lag (ps): {lags}")
        if len(names) > max_types:
            print(f"\n... and {len(names) - max_types} more (see lifetimes.csv)")
    if temp is not None:
        print(f"\nEyring barriers at {temp:g} K with kappa = 1. Caution: {TST_CAUTION}")
    print_notices(res.notices)
    if written:
        print(f"written to {folder}: {', '.join(os.path.basename(p) for p in written)}")


def _fmt(value, spec):
    return "-" if value is None or not np.isfinite(value) else format(value, spec)


def _count(n, noun):
    """``1 torsion``, ``6 torsions``."""
    return f"{n} {noun}{'' if n == 1 else 's'}"
