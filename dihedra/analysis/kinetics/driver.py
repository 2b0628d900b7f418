"""The kinetics of a tracking result: :func:`state_kinetics` and its :class:`KineticsResult`.

:func:`state_kinetics` checks the options, reads the time series of the result once
(:func:`~.tally.tally_result`), builds the stacks of subjects (every torsion; the torsion types,
pooled; each conformer type over the joint states it visited), turns them into tables
(:mod:`.tables`) and adds the Eyring and profile-barrier columns (:mod:`.estimators`). It never
opens a file: the barriers of a free-energy profile and its temperature are passed in.
:meth:`KineticsResult.save` writes the tables and ``kinetics.json``.
"""

from __future__ import annotations

import os
import time
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from ..._version import __version__
from ...errors import DihedraError, InputFileError, one_of
from ...io.outputs import file_set
from ...io.tables import write_json, write_table
from ...trajectory.result import as_result
from ...units import check_temperature
from ...trajectory.cores import CORE_MARGIN_DEG
from .assignment import ASSIGNMENTS, DEFAULT_CORE_MARGIN_DEG, _core_table, check_core_margin
from .estimators import DEFAULT_BOOTSTRAP, TST_CAUTION, _add_tst, _read_barrier_table, barriers_in_kj_mol
from .markov import DEFAULT_LAGS
from .spacing import _spacing_notices
from .tables import _merged_segments, _Stack, _stack_tables, _tables
from .tally import _dense_counts, tally_result

#: Lags longer than this fraction of the shortest replica are left out (with a notice).
MAX_LAG_FRACTION = 0.1
#: Counted and rate-implied populations are flagged when they differ by more than this factor
#: and by more than POPULATION_MISMATCH_ABS.
POPULATION_MISMATCH_RATIO = 1.5
POPULATION_MISMATCH_ABS = 0.05

#: The tables of a :class:`KineticsResult` and their files, in the order they are written.
TABLE_FILES = (("transitions", "transitions.csv"), ("lifetimes", "lifetimes.csv"),
               ("dwell_times", "dwell_times.csv"), ("dwell_survival", "dwell_survival.csv"),
               ("timescales", "timescales.csv"), ("mfpt", "mfpt.csv"))


@dataclass
class KineticsResult:
    """Kinetics of a tracking result.

    Attributes
    ----------
    transitions, lifetimes, timescales, mfpt : DataFrame
        The tables of ``transitions.csv``, ``lifetimes.csv``, ``timescales.csv``, ``mfpt.csv``
        (``level`` is ``torsion``, ``type`` or ``conformer``). In all six tables the text columns
        (level, name, type and the states) are categorical, their categories sorted. Flags of
        what the frame spacing cannot resolve (:mod:`.spacing`): ``frame_limited`` (lifetimes,
        transitions), ``intermediate_missed`` (transitions), ``shorter_than_lag`` (timescales).
    dwell_times : DataFrame
        ``dwell_times.csv``: the observed dwell-time distribution per type and conformer type
        (level, name, type, state, dwell_ps, n_complete, n_censored).
    dwell_survival : DataFrame
        ``dwell_survival.csv``: the Kaplan-Meier survival curves of the same dwell times (level,
        name, type, state, time_ps, survival, n_at_risk): one row per distinct dwell time of a
        state, ``survival`` the fraction of visits still in the state just after ``time_ps``
        (events before censorings at ties; ``S = 1`` before the first row), ``n_at_risk`` the
        visits (complete or censored) that lasted at least ``time_ps``.
    parameters : dict
        Assignment, core margin, lags, time step and temperature with their sources.
    notices : list of str
    run_seconds : float or None
        Time the analysis took.
    """

    transitions: pd.DataFrame
    lifetimes: pd.DataFrame
    timescales: pd.DataFrame
    mfpt: pd.DataFrame
    dwell_times: pd.DataFrame
    dwell_survival: pd.DataFrame
    parameters: dict
    notices: list = field(default_factory=list)
    run_seconds: float | None = None

    def save(self, folder):
        """Write the tables (:data:`TABLE_FILES`) and ``kinetics.json`` (parameters, notices, the
        files) into ``folder`` (made if missing), each through a temporary name; returns their
        paths."""
        os.makedirs(folder, exist_ok=True)
        with file_set(folder):   # (all in place together: an interruption leaves the earlier set whole)
            paths = [write_table(getattr(self, attr), folder, name) for attr, name in TABLE_FILES]
            doc = {"dihedra_version": __version__, "created": time.strftime("%Y-%m-%dT%H:%M:%S%z"),
                   "parameters": self.parameters, "notices": list(self.notices),
                   "files": [name for _, name in TABLE_FILES],
                   "run_seconds": None if self.run_seconds is None else round(self.run_seconds, 3)}
            paths.append(write_json(doc, folder, "kinetics.json"))
        return paths


def frame_interval_ps(summary, dt_ps=None):
    """Time between analysed frames (ps) and a sentence on where it came from.

    ``dt_ps`` (time between stored frames, as ``track --dt-ps``) overrides the trajectory's own; it is
    multiplied by the frame step of the analysis. Raises a :class:`DihedraError` when a replica has
    no usable time step and none is given, or when the replicas disagree.
    """
    reps = summary.get("replicas", [])
    if not reps:
        raise InputFileError("summary.json lists no replicas; rerun 'dihedra track'.")
    values = []
    if dt_ps is not None:
        dt = float(dt_ps)
        if not np.isfinite(dt) or dt <= 0:
            raise DihedraError(f"--dt-ps must be a positive number of picoseconds; got {dt_ps!r}.")
        values = [dt * int(r.get("frame_step", 1)) for r in reps]
        source = f"--dt-ps {dt:g} ps per stored frame"
    else:
        unknown = [k for k, r in enumerate(reps) if not r.get("time_step_known", False)]
        if unknown:
            rep = reps[unknown[0]]
            why = str(rep.get("time_step_source", "")).partition("(")[2].rstrip(")") or "none recorded"
            raise DihedraError(f"the trajectory of replica {unknown[0]} ({rep['trajectory']}) has no usable "
                               f"time step ({why}); give the time between stored frames with --dt-ps PS.")
        values = [float(r["time_between_analysed_frames_ps"]) for r in reps]
        source = ("time step given to 'track --dt-ps'" if reps[0].get("time_step_source") == "--dt-ps"
                  else "time step stored in the trajectory")
    if max(values) - min(values) > 1e-6 * max(values):
        raise DihedraError(f"the replicas have different times between analysed frames "
                           f"({', '.join(f'{v:g}' for v in values)} ps); analyse them in separate "
                           "folders or use --step so that they match.")
    return values[0], source


#: Fewest frames a replica needs for kinetics: transitions and dwell times are counted between
#: consecutive frames.
MIN_KINETICS_FRAMES = 2


def check_frames(summary, folder=None):
    """Refuse a run in which no replica has :data:`MIN_KINETICS_FRAMES` frames (a single structure):
    it has no pair of consecutive frames, so no transition and no dwell time can be seen."""
    frames = [int(r.get("frames_analysed", 0)) for r in (summary or {}).get("replicas", [])]
    if frames and max(frames) < MIN_KINETICS_FRAMES:
        where = f" of {folder}" if folder else ""
        raise DihedraError(f"kinetics needs at least {MIN_KINETICS_FRAMES} frames in a replica, and many more to "
                           "say much (transitions and dwell times are counted between consecutive frames); every "
                           f"replica{where} has {max(frames)} frame ({len(frames)} replica(s)): a single structure "
                           "has no kinetics; give a trajectory.")


def _zero_transition_notice(tables, plan):
    """A notice when no torsion changed state between consecutive frames anywhere in the run."""
    tr = tables["transitions"]
    seen = tr.loc[tr["level"] == "torsion", "count"].sum() if len(tr) else 0
    if seen == 0:
        plan.notices.append(f"no torsion changed state between two frames in {sum(plan.frames_per_rep)} frame(s) "
                            f"of {len(plan.frames_per_rep)} replica(s): every rate is an upper limit, every dwell "
                            "time a lower bound (the length of a replica), and a population 'from rates' of 1 only "
                            "says that the torsions stayed where they started, not a measurement; the run is too "
                            "short for kinetics.")


def _duplicate_replicas(replicas):
    """Pairs (i, j) of replicas with the same SHA-256."""
    seen, out = {}, []
    for k, rep in enumerate(replicas):
        digest = rep.get("sha256")
        if digest and digest in seen:
            out.append((seen[digest], k))
        elif digest:
            seen[digest] = k
    return out


def _weak_number_notices(tables, plan):
    """Flag what the tables cannot support: counted and rate-implied populations that disagree,
    implied timescales longer than the run, dwell times never ended (lower bounds)."""
    lt, ts = tables["lifetimes"], tables["timescales"]
    if len(lt):
        pc, pr = lt["population_counted"].to_numpy(float), lt["population_from_rates"].to_numpy(float)
        with np.errstate(invalid="ignore", divide="ignore"):
            ratio = np.maximum(pc, pr) / np.minimum(pc, pr)
        bad = (np.abs(pc - pr) > POPULATION_MISMATCH_ABS) & ~(ratio <= POPULATION_MISMATCH_RATIO)
        bad &= np.isfinite(pr)
        lt["population_mismatch"] = bad
        if bad.any():
            first = lt[bad].iloc[0]
            plan.notices.append(
                f"{int(bad.sum())} state(s) have counted and rate-implied populations that differ by more than "
                f"a factor {POPULATION_MISMATCH_RATIO:g} (e.g. {first['name']} {first['state']}: "
                f"{first['population_counted']:.3f} counted, {first['population_from_rates']:.3f} from rates; "
                "population_mismatch in lifetimes.csv): too few transitions for the rates to describe the run.")
        low = lt["mean_restricted"].astype(bool)
        if low.any():
            plan.notices.append(f"{int(low.sum())} mean dwell time(s) are lower bounds (the longest visit was still "
                                "going on at the end of a trajectory: mean_restricted in lifetimes.csv, >= on screen).")
    if len(ts):
        run_ps = max(plan.frames_per_rep) * plan.dt
        long = ts["timescale_ps"].to_numpy(float) > run_ps
        if long.any():
            plan.notices.append(f"{int(long.sum())} implied timescale(s) exceed the length of the longest replica "
                                f"({run_ps:g} ps): the run cannot resolve them; read them as 'slower than the run'.")


def _temperature(temperature_k, summary):
    if temperature_k is not None:
        return check_temperature(temperature_k), "--temperature"
    recorded = summary.get("temperature_k")
    if recorded is not None:
        return check_temperature(recorded), "summary.json (recorded by track)"
    return None, "none"


def _select_torsions(torsions, types):
    """The torsions of the chosen types (or single torsions by their label)."""
    if not types:
        return np.arange(len(torsions))
    names = [types] if isinstance(types, str) else list(types)
    valid = list(dict.fromkeys(torsions["type"]))
    labels = set(torsions["torsion"].astype(str))
    missing = [t for t in names if t not in valid and t not in labels]
    if missing:
        shown = ", ".join(valid[:8]) + (" ..." if len(valid) > 8 else "")
        raise DihedraError(f"no torsion type or torsion {missing[0]!r} in this folder; its types are {shown}.")
    return np.flatnonzero((torsions["type"].isin(names) | torsions["torsion"].astype(str).isin(names)).to_numpy())


def _conformer_groups(result, selected):
    """Conformer groups whose torsions are all selected: names, group types, members (column idx)."""
    from ...numerics.populations import _short_type_names
    from ...trajectory.conformer_counts import conformer_layout

    groups, members, _ = conformer_layout(result.torsion_set, result.scheme.n_states)
    col = {int(p): k for k, p in enumerate(selected)}
    keep = [(g, m) for g, m in zip(groups, members) if all(int(p) in col for p in m)]
    if not keep:
        return [], [], [], []
    types = result.torsion_set.types
    resnames = [t.resname for t in result.torsion_set.torsions]
    long_types = [" | ".join(types[p] for p in m) for _, m in keep]
    short = _short_type_names(long_types, resnames, [m for _, m in keep])
    return ([g for g, _ in keep], short, long_types,
            [np.array([col[int(p)] for p in m], dtype=np.int64) for _, m in keep])


def _series_kind(result, assignment, margin):
    """The time series the assignment reads: the angles (core sets of any margin), else the state
    codes with the core bits of the pass (its margin), or the states (crisp); refuses a result
    without them (one sentence on how to get them)."""
    where = result.folder
    if assignment == "crisp":
        if result.has_series("states"):
            return "states"
        if where:
            raise InputFileError(f"{where} has no states.parquet; rerun 'dihedra track'.")
        raise DihedraError("this result has no state time series; track again.")
    if result.has_series("angles"):
        return "angles"
    if result.has_series("cores") and result.has_series("states") and margin == CORE_MARGIN_DEG:
        return "cores"
    if result.has_series("cores"):
        raise DihedraError(f"a core margin of {margin:g} deg needs the angles (angles.parquet): the folder holds the "
                           f"core membership for the default margin of {CORE_MARGIN_DEG:g} deg only; use that margin, "
                           "rerun 'dihedra track ... --keep-angles' (keep_angles=True), or use --assignment crisp.")
    if where:
        raise InputFileError(f"{where} has neither cores.parquet nor angles.parquet (a folder of an older dihedra), "
                             "which core assignment needs: rerun 'dihedra track', or use --assignment crisp.")
    raise DihedraError("this result has no core membership and no angle time series, which core assignment needs: "
                       "track with a time series (keep_states=True or keep_angles=True), or use assignment='crisp'.")


def lags_in_frames(lags_ps, lags, dt):
    """The Markov lags in frames: ``lags_ps`` (whole multiples of the time between frames ``dt``),
    or ``lags`` in frames, or :data:`~.markov.DEFAULT_LAGS` frames.

    Examples
    --------
    >>> lags_in_frames([2.0, 10.0], None, 2.0)
    [1, 5]
    """
    if lags_ps is not None and lags is not None:
        raise DihedraError("give the lags in ps (lags_ps, --lag-ps) or in frames (lags), not both.")
    if lags_ps is None:
        frames = [int(x) for x in (lags or DEFAULT_LAGS)]
        if any(x < 1 for x in frames):
            raise DihedraError(f"lags must be positive numbers of frames; got {list(lags)}.")
        return sorted(set(frames))
    values = [float(x) for x in ([lags_ps] if np.isscalar(lags_ps) else lags_ps)]
    out = []
    for x in values:
        n = x / dt
        if not np.isfinite(x) or x <= 0 or abs(n - round(n)) > 1e-6 * max(1.0, n) or round(n) < 1:
            raise DihedraError(f"lag {x:g} ps is not a positive whole number of frames ({dt:g} ps apart); give "
                               f"multiples of {dt:g} ps.")
        out.append(int(round(n)))
    return sorted(set(out))


@dataclass
class _Plan:
    """What the analysis does, fixed before the time series is read (see :func:`_plan`)."""

    kind: str
    margin: float | None
    lags: list
    dt: float
    dt_source: str
    temp: float | None
    temp_source: str
    n_boot: int
    selected: np.ndarray
    labels: list
    types: list
    frames_per_rep: list
    groups: tuple
    notices: list


def _plan(result, assignment, core_margin_deg, lags_ps, lags, types, dt_ps, temperature_k, n_bootstrap, conformers):
    """Check the options against the result and fix the torsions, groups, lags and time step."""
    one_of("assignment", assignment, ASSIGNMENTS)
    scheme, summary = result.scheme, result.summary
    check_frames(summary, result.folder)
    margin = check_core_margin(scheme, core_margin_deg) if assignment == "core" else None
    dt, dt_source = frame_interval_ps(summary, dt_ps)
    lags_req = lags_in_frames(lags_ps, lags, dt)
    temp, temp_source = _temperature(temperature_k, summary)
    n_boot = int(n_bootstrap)
    if n_boot < 0:
        raise DihedraError(f"the number of bootstrap samples must be >= 0; got {n_bootstrap}.")
    kind = _series_kind(result, assignment, margin)
    torsions = result.torsions
    selected = _select_torsions(torsions, types)
    notices = []
    frames_per_rep = [int(r["frames_analysed"]) for r in summary["replicas"]]
    longest = max(MAX_LAG_FRACTION * min(frames_per_rep), 1)
    lags_used = [x for x in lags_req if x <= longest]
    if len(lags_used) < len(lags_req):
        dropped = [x for x in lags_req if x not in lags_used]
        notices.append(f"lag(s) {', '.join(f'{x * dt:g}' for x in dropped)} ps ({', '.join(map(str, dropped))} frames) "
                       f"were left out: longer than {MAX_LAG_FRACTION:g} of the shortest replica "
                       f"({min(frames_per_rep)} frames), a Markov model at such a lag rests on too few lag windows to "
                       "say anything.")
    if 1 in lags_used and MAX_LAG_FRACTION * min(frames_per_rep) < 1:
        notices.append(f"the lag of 1 frame ({dt:g} ps) is kept although it is longer than {MAX_LAG_FRACTION:g} of "
                       f"the shortest replica ({min(frames_per_rep)} frames): it is the shortest lag there is, but "
                       f"its transition counts and Markov model rest on {max(0, min(frames_per_rep) - 1)} pair(s) of "
                       "frames per torsion in that replica: rough at best.")
    duplicates = _duplicate_replicas(summary["replicas"])
    if duplicates:
        notices.append(f"replicas {duplicates[0][0]} and {duplicates[0][1]} are the same file (same SHA-256): "
                       "they are not independent, and every count and error treats them as if they were.")
    if summary.get("parameters", {}).get("weights"):
        notices.append("the folder was made with per-frame weights (a biased run); kinetics ignore the "
                       "weights, and the dynamics of a biased run are not those of the unbiased system.")
    groups = _conformer_groups(result, selected) if conformers else ([], [], [], [])
    return _Plan(kind, margin, lags_used, dt, dt_source, temp, temp_source, n_boot, selected,
                 torsions["torsion"].astype(str).to_numpy()[selected].tolist(),
                 torsions["type"].astype(str).to_numpy()[selected].tolist(), frames_per_rep, groups, notices)


def _torsion_parts(plan, t_tally, state_labels, rng, torsion_bootstrap):
    """Tables of every torsion (one stack over the scheme's states) and of every type (sums of its
    torsions' counts and segments)."""
    n_s, n_rep, n_sel = len(state_labels), len(plan.frames_per_rep), len(plan.selected)
    seg_rows, seg_counts = t_tally.segments_
    t_counts = t_tally.pair_matrices_ or _dense_counts(t_tally.pairs_, n_sel, n_s)
    parts = [_stack_tables(_Stack("torsion", np.array(plan.labels, dtype=object), np.array(plan.types, dtype=object),
                                  state_labels, t_counts, tuple(seg_rows.T) + (seg_counts,),
                                  np.full(n_sel, n_rep), bootstrap=torsion_bootstrap),
                           plan.dt, plan.lags, plan.n_boot, rng)]
    type_names = list(dict.fromkeys(plan.types))
    type_of = pd.Categorical(plan.types, categories=type_names).codes.astype(np.int64)
    pooled = {}
    for lag in t_tally.lags:
        pooled[lag] = np.zeros((len(type_names), n_s, n_s))
        np.add.at(pooled[lag], type_of, t_counts[lag])
    parts.append(_stack_tables(_Stack("type", np.array(type_names, dtype=object), np.array(type_names, dtype=object),
                                      state_labels, pooled,
                                      _merged_segments(type_of[seg_rows[:, 0]], *seg_rows[:, 1:].T, seg_counts),
                                      np.bincount(type_of, minlength=len(type_names)) * n_rep, dwell=True),
                               plan.dt, plan.lags, plan.n_boot, rng))
    return parts


def _conformer_parts(plan, c_tally, scheme, pool, conf_types, rng):
    """Tables of every conformer type, each over the joint states it visited."""
    if c_tally is None:
        return []
    _, _, g_long, g_members = plan.groups
    n_s, n_rep = scheme.n_states, len(plan.frames_per_rep)
    c_rows, c_counts = c_tally.segments_
    parts = []
    for k, gt in enumerate(conf_types):
        first = int(np.flatnonzero(pool == k)[0])
        size = len(g_members[first])
        r1, _ = c_tally.pairs_[1]
        mine = r1[:, 0] == k
        seg = c_rows[:, 0] == k
        codes = np.unique(np.r_[r1[mine, 1], r1[mine, 2], c_rows[seg, 1]])
        if not len(codes):
            continue
        names = np.array(["|".join(scheme.labels[(int(s) // n_s ** j) % n_s] for j in range(size))
                          for s in codes], dtype=object)
        row_map = np.full(max(len(conf_types), c_tally.n_rows), -1, dtype=np.int64)
        row_map[k] = 0
        counts = _dense_counts(c_tally.pairs_, 1, len(codes), row_map, codes)
        segments = (np.zeros(seg.sum(), dtype=np.int64), np.searchsorted(codes, c_rows[seg, 1]),
                    c_rows[seg, 2], c_rows[seg, 3], c_counts[seg])
        parts.append(_stack_tables(_Stack("conformer", np.array([gt], dtype=object),
                                          np.array([g_long[first]], dtype=object), names, counts, segments,
                                          np.array([int((pool == k).sum()) * n_rep]), all_pairs=False,
                                          dwell=True), plan.dt, plan.lags, plan.n_boot, rng))
    return parts


def _barrier_notices(plan, transitions, scheme, barriers, profile_temperature_k):
    """Fill the Eyring and profile-barrier columns of ``transitions`` and say what is missing."""
    if barriers is not None and not isinstance(barriers, pd.DataFrame):
        raise DihedraError(f"barriers must be the barriers table of a free-energy profile (a DataFrame as in "
                           f"barriers.csv) or None; got {type(barriers).__name__}.")
    temp, notices = plan.temp, plan.notices
    if barriers is not None:   # (a profile in another energy unit: its heights in kJ/mol)
        barriers = barriers_in_kj_mol(barriers, profile_temperature_k if profile_temperature_k is not None else temp)
    _add_tst(transitions, temp, None if barriers is None else _read_barrier_table(barriers, scheme), notices)
    if profile_temperature_k is not None and temp is not None and abs(float(profile_temperature_k) - temp) > 1e-6:
        notices.append(f"the profile barriers were computed at {float(profile_temperature_k):g} K but the Eyring "
                       f"barriers at {temp:g} K; compare them at one temperature.")
    if temp is None:
        notices.append("no temperature given and none recorded by 'track': the Eyring columns are empty "
                       "(give --temperature K, temperature_k in Python).")
    elif plan.temp_source.startswith("summary"):
        notices.append(f"Eyring barriers use the temperature recorded by 'track', {temp:g} K.")


def _parameters(plan, result, assignment, types, seed, torsion_bootstrap):
    """The parameters recorded in ``kinetics.json``."""
    scheme = result.scheme
    return {
        "folder": result.folder,
        "assignment": assignment,
        "core_margin_deg": plan.margin,
        "core_sectors_deg": _core_table(scheme, plan.margin) if plan.margin is not None else None,
        "core_source": {"angles": "angles.parquet", "cores": "states.parquet and the core bits of the pass "
                        "(cores.parquet)", "states": None}[plan.kind],
        "lags_frames": plan.lags,
        "lags_ps": [x * plan.dt for x in plan.lags],
        "frame_interval_ps": plan.dt,
        "frame_interval_source": plan.dt_source,
        "temperature_k": plan.temp,
        "temperature_source": plan.temp_source,
        "types": list(types) if types else None,
        "n_torsions": len(plan.selected),
        "n_conformer_groups": len(plan.groups[0]),
        "n_replicas": len(plan.frames_per_rep),
        "frames_per_replica": plan.frames_per_rep,
        "n_bootstrap": plan.n_boot,
        "seed": int(seed),
        "scheme": scheme.name,
        "units": {"time": "ps", "rate": "1/ps", "energy": "kJ/mol", "angle": "deg"},
        "lifetime_censoring": "first and last segment of every trajectory right-censored (Kaplan-Meier)",
        "rate_estimator": "k_ij = n_ij / T_i (lag-1 counts), se = sqrt(n_ij) / T_i, 95 % exact Poisson interval",
        "markov_estimator": "reversible maximum likelihood (Newton's method on the convex dual), largest "
                            "strongly connected set",
        "lifetime_intervals": ("percentile bootstrap of segments for every row" if torsion_bootstrap else
                               "percentile bootstrap of segments for types and conformers; Kaplan-Meier variance "
                               "of the restricted mean (interval symmetric in ln mean) for single torsions"),
        "caution": TST_CAUTION,
    }


def state_kinetics(result, *, assignment="core", core_margin_deg=DEFAULT_CORE_MARGIN_DEG, lags_ps=None, lags=None,
                   types=None, dt_ps=None, temperature_k=None, barriers=None, profile_temperature_k=None,
                   n_bootstrap=DEFAULT_BOOTSTRAP, seed=0, conformers=True, batch_frames=None, log=None,
                   torsion_bootstrap=False):
    """Transitions, dwell times, rates, Markov timescales and Eyring barriers of a tracking result.

    The time series is read once, in chunks, through the result; counts and segments are tallied
    for all torsions (and conformer groups) at once, and every statistic is computed for all
    torsions together (see the notes of :mod:`dihedra.analysis.kinetics`). Nothing is written:
    call :meth:`KineticsResult.save`.

    Parameters
    ----------
    result : TrackResult or TorsionStates
        A tracking result (:func:`dihedra.track`, :func:`dihedra.load_results`) with its time
        series: every folder of ``dihedra track`` has what core assignment at the default margin
        needs (the state codes and the core bit of every frame, ``cores.parquet``); another margin
        needs the angles (``keep_angles=True`` / ``--keep-angles``), which are used whenever present.
    assignment : {"core", "crisp"}
        Transition-based core-set assignment (default), or the crisp states.
    core_margin_deg : float
        Margin by which every sector is shrunk on both sides to make its core (default 20).
    lags_ps : sequence of float, optional
        Lag times in ps for the Markov models and implied timescales, whole multiples of the time
        between frames (default: 1, 2, 5, 10, 20 and 50 frames); lags longer than
        :data:`MAX_LAG_FRACTION` of the shortest replica are left out with a notice.
    lags : sequence of int, optional
        The lags in frames instead (not both).
    types : list of str, optional
        Only torsions of these types, or single torsions by their label (conformers only for
        groups made entirely of them).
    dt_ps : float, optional
        Time between stored frames in ps; required when the trajectory stores none.
    temperature_k : float, optional
        For the Eyring barriers; default the temperature recorded by ``track``. Without either the
        Eyring columns stay empty.
    barriers : DataFrame, optional
        Barriers of a free-energy profile (the table of ``barriers.csv``, ``dihedra profile``),
        shown next to the Eyring barriers; ``None``: those columns stay empty.
    profile_temperature_k : float, optional
        Temperature of that profile (``profiles.json``); a notice says when it differs from the
        Eyring temperature.
    n_bootstrap : int
        Bootstrap samples of the dwell-time intervals (0: no intervals).
    seed : int
        Seed of the bootstrap.
    conformers : bool
        Also analyse conformers (joint states of the torsions of each group).
    batch_frames : int, optional
        Frames read at a time (default: about :data:`~.tally.READ_VALUES` values per read, all
        threads together).
    log : callable, optional
        Receives progress lines.
    torsion_bootstrap : bool
        Bootstrap the dwell-time intervals of every single torsion too (slow for thousands of
        torsions); by default torsion rows take their interval from the Kaplan-Meier variance.

    Returns
    -------
    KineticsResult
    """
    say = log or (lambda msg: None)
    t0 = time.time()
    result = as_result(result)
    if str((result.summary or {}).get("kind", "")).startswith("umbrella windows"):
        raise DihedraError("this is a folder of umbrella windows (dihedra windows): their torsions move under the "
                           "restraints, so their rates and dwell times are not those of the unbiased system; run "
                           "kinetics on the track folder of an unbiased simulation.")
    plan = _plan(result, assignment, core_margin_deg, lags_ps, lags, types, dt_ps, temperature_k, n_bootstrap,
                 conformers)
    scheme = result.scheme
    g_names, g_short, _, g_members = plan.groups
    conf_types = list(dict.fromkeys(g_short))
    pool = pd.Categorical(g_short, categories=conf_types).codes.astype(np.int64)
    reading = "states.parquet and cores.parquet" if plan.kind == "cores" else f"{plan.kind}.parquet"
    say(f"reading {reading}: {len(plan.selected)} torsions, {len(g_names)} conformer groups, "
        f"{len(plan.frames_per_rep)} replica(s)")
    t_tally, c_tally, n_frames_read = tally_result(result, plan.kind, plan.labels, scheme, plan.margin, plan.lags,
                                                   g_members, pool, batch_frames)
    say(f"{n_frames_read} frames read; estimating rates, dwell times and Markov models")
    rng = np.random.default_rng(seed)
    state_labels = np.array(scheme.labels, dtype=object)
    parts = _torsion_parts(plan, t_tally, state_labels, rng, torsion_bootstrap)
    parts += _conformer_parts(plan, c_tally, scheme, pool, conf_types, rng)
    tables = _tables(parts)
    _zero_transition_notice(tables, plan)
    _weak_number_notices(tables, plan)
    _spacing_notices(tables, plan, result)
    _barrier_notices(plan, tables["transitions"], scheme, barriers, profile_temperature_k)
    return KineticsResult(notices=plan.notices, run_seconds=time.time() - t0,
                          parameters=_parameters(plan, result, assignment, types, seed, torsion_bootstrap), **tables)
