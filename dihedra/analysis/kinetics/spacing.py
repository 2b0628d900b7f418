"""What the spacing of the frames lets the kinetics resolve: notices and flags.

A trajectory saved every ``dt`` shows a torsion only at those instants. Whatever happens between
two frames is lost: a visit that begins and ends between them is never seen, and a torsion that
passes through a third state between them seems to jump straight from the first to the last.
:func:`_spacing_notices` looks for three signs of this in the tables, says so in plain words and
marks the rows:

* **Dwells of one or two frames** (``frame_limited`` in ``lifetimes.csv`` and
  ``transitions.csv``). A state of a type (or of a conformer type) whose median dwell is at most
  :data:`SHORT_DWELL_MEDIAN_FRAMES` frames, or of whose visits more than
  :data:`SINGLE_FRAME_SHARE` last a single frame, lives about as long as the frames are apart.
  Round trips between two frames are then missed: the rates come out too low, the lifetimes
  (of every state of the type, since the visits the others made to it are missed too) too long
  and the Eyring barriers too high.
* **Transitions that must have passed a third state** (``intermediate_missed`` in
  ``transitions.csv``). Two states whose sectors do not meet on the circle (another state lies
  between them on both sides) cannot be joined without crossing it. Two states that meet (as
  gauche+ and gauche- at 0 degrees in the ``anti-gauche`` scheme) can, but only over the
  barrier where they meet; the frames show how often the torsions are there. Transition-state
  theory gives an upper bound on the rate of any crossing of a dividing surface, and any point
  between the two cores is one: with the Eyring prefactor, ``k <= (k_B T / h) rho(b) /
  rho_max(i)``, ``rho(b)`` the density of frames (per degree) in the zone of width twice the
  core margin around the boundary (its 95 % Poisson upper limit) and ``rho_max(i)`` the peak
  density of the starting state (over :data:`PEAK_WINDOW_DEG`). When far more transitions were
  counted than that bound allows (:data:`DIRECT_ROUTE_FACTOR`), they went the other way round,
  through a third state, between two frames.
* **Implied timescales shorter than their lag** (``shorter_than_lag`` in ``timescales.csv``): a
  Markov model at lag ``tau`` cannot resolve processes faster than ``tau`` (Prinz et al., J.
  Chem. Phys. 134 (2011) 174105).
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from ...trajectory.result import kept_block
from .assignment import DEFAULT_CORE_MARGIN_DEG
from .estimators import eyring_rate_per_s

#: A state whose median dwell is at most this many frames is as short-lived as the frames are
#: far apart: for memoryless dwells of mean tau seen every dt the median is 2 frames or less once
#: dt > tau / 2.9 (1 - exp(-dt / tau) >= 0.29), the same point as SINGLE_FRAME_SHARE.
SHORT_DWELL_MEDIAN_FRAMES = 2
#: ... or more than this share of its (complete) visits last a single frame. For memoryless
#: dwells the share is 1 - exp(-dt / tau); 0.3 means fewer than three frames per lifetime, where
#: a two-state chain sampled every dt shows (1 - e^-x) / x of its true rates (x = dt (k12 + k21),
#: about 0.36 here): 15 % too low, and falling fast as the frames get further apart.
SINGLE_FRAME_SHARE = 0.3
#: States with fewer complete visits than this are not judged (a handful of dwells says little).
SHORT_DWELL_MIN_VISITS = 20
#: ... nor states holding less than this fraction of their type's frames: rare transient states
#: (the gauche+|gauche- conformers of liquid hexane, 0.07 % of the frames) live about a frame at
#: any spacing a trajectory is saved with, and hardly weigh in the rates of the others.
SHORT_DWELL_MIN_POPULATION = 0.01
#: The frame spacing suggested is the shortest lifetime divided by this.
FRAMES_PER_LIFETIME = 10
#: Counted "direct" transitions between two states that meet are flagged when they outnumber the
#: most that the Eyring rate of the barrier where they meet allows by this factor. The 1-D
#: transition-state rate over a surface b is sqrt(k_B T / (2 pi I)) rho(b) / P(i) (I the reduced
#: moment of inertia, rho per radian); the Eyring form (k_B T / h) rho(b) / rho_max(i) is 1.7 times
#: that for the ethyl groups of butane (I = 15 amu A^2, worked by hand), and may fall below it by a
#: factor of two or three for a light rotor in a narrow well: a factor 10 leaves room for that.
DIRECT_ROUTE_FACTOR = 10.0
#: ... and when at least this many were counted.
DIRECT_MIN_COUNT = 10
#: Width of the window (degrees) over which the peak density of a state is taken.
PEAK_WINDOW_DEG = 10.0
#: Upper one-sided 95 % point used for the frames seen in a barrier zone (Garwood).
_UPPER = 0.975
#: Examples named in one notice.
_SHOWN = 3


def _spacing_notices(tables, plan, result):
    """Add the notices on the frame spacing to ``plan.notices`` and the flag columns to the
    tables (``frame_limited``, ``intermediate_missed``, ``shorter_than_lag``)."""
    tr, lt, ts = tables["transitions"], tables["lifetimes"], tables["timescales"]
    short = _short_dwell_states(tables["dwell_times"], lt, plan.dt)
    limited = set()
    for level, what in (("type", "types"), ("conformer", "conformer types")):
        rows = short[(short["level"] == level) & short["flagged"]] if len(short) else short
        if len(rows):
            limited |= {(level, n) for n in rows["name"]}
            plan.notices.append(_short_dwell_notice(rows, plan.dt, what))
    for table in (lt, tr):
        table["frame_limited"] = _rows_of(table, limited)
    skipped = _skipped_transitions(tr, plan, result)
    tr["intermediate_missed"] = _rows_of(tr, {(t,) + tuple(p) for t, p, *_ in skipped}, pair=True)
    plan.notices += _skipped_notices(skipped, plan.dt)
    if "timescale_ps" in ts:
        ts["shorter_than_lag"] = ts["timescale_ps"].to_numpy(float) < ts["lag_ps"].to_numpy(float)
        if ts["shorter_than_lag"].any():
            plan.notices.append(_timescale_notice(ts))


# ------------------------------------------------------------------------------------------------
# dwells as short as the frame spacing
# ------------------------------------------------------------------------------------------------
def _short_dwell_states(dwell_times, lifetimes, dt):
    """Per pooled state (types, conformer types): complete visits, the share of them that lasted a
    single frame, the median dwell in frames, the population and whether the frame spacing
    limits it (``flagged``)."""
    d = dwell_times
    if not len(d):
        return pd.DataFrame(columns=["level", "name", "state", "n_complete", "single_share", "median_frames",
                                     "population", "mean_ps", "flagged"])
    key = ["level", "name", "state"]
    one = np.isclose(d["dwell_ps"].to_numpy(float), dt, rtol=1e-6)
    g = d.assign(single=np.where(one, d["n_complete"], 0)).groupby(key, observed=True, sort=False)
    out = g[["n_complete", "single"]].sum().reset_index()
    life = lifetimes[lifetimes["level"].isin(["type", "conformer"])][key + ["median_ps", "mean_ps",
                                                                           "population_counted"]]
    out = out.astype({c: str for c in key}).merge(life.astype({c: str for c in key}), on=key, how="left")
    with np.errstate(invalid="ignore", divide="ignore"):
        out["single_share"] = out["single"] / out["n_complete"]
    out["median_frames"] = out["median_ps"] / dt
    out["population"] = out["population_counted"]
    judged = (out["n_complete"] >= SHORT_DWELL_MIN_VISITS) & (out["population"] >= SHORT_DWELL_MIN_POPULATION)
    out["flagged"] = judged & ((out["median_frames"] <= SHORT_DWELL_MEDIAN_FRAMES + 1e-9)
                               | (out["single_share"] > SINGLE_FRAME_SHARE))
    return out[["level", "name", "state", "n_complete", "single_share", "median_frames", "population", "mean_ps",
                "flagged"]]


def _short_dwell_notice(rows, dt, what):
    """One notice on the types (or conformer types) whose dwells are as short as the frame spacing."""
    rows = rows.sort_values("single_share", ascending=False)
    worst = rows.iloc[0]
    names, states = list(dict.fromkeys(rows["name"])), list(dict.fromkeys(rows["state"]))
    shortest = float(np.nanmin(rows["mean_ps"].to_numpy(float)))
    advice = (f" (the shortest lifetime here is {shortest:.3g} ps, and shorter in truth: a frame every "
              f"{shortest / FRAMES_PER_LIFETIME:.2g} ps or less)" if np.isfinite(shortest) else "")
    return (f"the frames are {dt:g} ps apart, about as long as the dwell times of {_listed(states, 'states', 4)} in "
            f"{_listed(names, what)}: e.g. a median visit to {worst['state']} of {worst['name']} lasts "
            f"{_frames(worst['median_frames'])} ({worst['median_frames'] * dt:.3g} ps), and "
            f"{100 * worst['single_share']:.0f} % of them a single frame. Visits that begin and end between two frames "
            "are never seen, so these kinetics are limited by the frame spacing: the rates come out too low, the "
            "lifetimes too long and the Eyring barriers too high (read them as lower, upper and upper bounds; "
            "frame_limited in lifetimes.csv and transitions.csv). Save frames more often, at least "
            f"{FRAMES_PER_LIFETIME} per lifetime{advice}.")


# ------------------------------------------------------------------------------------------------
# transitions that passed a third state between two frames
# ------------------------------------------------------------------------------------------------
def _boundaries(part):
    """The boundaries of a scheme (part) around the circle: [(state before, state after, angle)],
    and the sequence of states of its merged arcs."""
    arcs = part.merged_arcs()
    if len(arcs) < 2:
        return [], [a[0] for a in arcs]
    out = [(arcs[k][0], arcs[(k + 1) % len(arcs)][0], float(arcs[k][2])) for k in range(len(arcs))]
    return out, [a[0] for a in arcs]


def _between(sequence, i, j):
    """States that lie between states ``i`` and ``j`` on the circle of arcs ``sequence`` (on
    either side of every pair of their arcs)."""
    n, out = len(sequence), set()
    for p in (k for k in range(n) if sequence[k] == i):
        for q in (k for k in range(n) if sequence[k] == j):
            for step in (1, -1):
                k = (p + step) % n
                while k != q:
                    out.add(sequence[k])
                    k = (k + step) % n
    return out - {i, j}


def _skipped_transitions(tr, plan, result):
    """Pairs of states of each type whose transitions counted as direct must have passed a third
    state between two frames: [(type, (i, j) labels, count, between labels, detail or None)]."""
    rows = tr[tr["level"] == "type"] if len(tr) else tr
    if not len(rows) or not (rows["count"] > 0).any():
        return []
    scheme, margin = result.scheme, plan.margin if plan.margin is not None else DEFAULT_CORE_MARGIN_DEG
    labels = list(scheme.labels)
    found, candidates = [], []
    for name, sub in rows.groupby("name", observed=True, sort=False):
        bounds, sequence = _boundaries(scheme.for_type(str(name)))
        counts = {(str(r.from_state), str(r.to_state)): (int(r.count), float(r.time_in_from_ps))
                  for r in sub.itertuples(index=False)}
        for a, b in sorted({tuple(sorted((x, y))) for x, y in counts}):
            i, j = labels.index(a), labels.index(b)
            n = counts.get((a, b), (0, 0.0))[0] + counts.get((b, a), (0, 0.0))[0]
            if not n:
                continue
            meet = [angle for s, t, angle in bounds if {s, t} == {i, j}]
            others = [labels[k] for k in sorted(set(sequence) - {i, j})]
            if not meet:
                found.append((str(name), (a, b), n, [labels[k] for k in sorted(_between(sequence, i, j))], None))
            elif others and n >= DIRECT_MIN_COUNT and plan.temp is not None:
                candidates.append((str(name), (a, b), (i, j), n, meet, others, counts))
    if candidates:
        found += _over_barrier(candidates, plan, result, margin)
    return found


def _over_barrier(candidates, plan, result, margin):
    """The candidate pairs (states that meet) whose counted transitions outnumber, by
    DIRECT_ROUTE_FACTOR, the most that the Eyring rate of the barrier where they meet allows."""
    from scipy.special import gammaincinv

    hist, centres, width = _type_histograms(result, plan, {c[0] for c in candidates})
    if hist is None:
        return []
    prefactor = float(eyring_rate_per_s(0.0, plan.temp)) * 1e-12   # k_B T / h in 1/ps
    window = max(1, int(round(PEAK_WINDOW_DEG / width)))
    found = []
    for name, (a, b), (i, j), n, meet, others, counts in candidates:
        h = hist[name]
        near = np.zeros(len(centres), dtype=bool)
        for angle in meet:
            near |= np.abs((centres - angle + 180.0) % 360.0 - 180.0) < margin
        seen = int(h[near].sum())
        zone = gammaincinv(seen + 1.0, _UPPER) / (2.0 * margin * len(meet))   # frames per degree, upper limit
        part = result.scheme.for_type(name)
        rolled = np.convolve(np.r_[h, h[:window - 1]], np.ones(window), "valid") / (window * width)
        centre_of_window = (centres + (window - 1) * width / 2.0 + 180.0) % 360.0 - 180.0
        states = part.assign(centre_of_window)
        most = 0.0
        for s, (x, y) in ((i, (a, b)), (j, (b, a))):
            peak = rolled[states == s].max() if (states == s).any() else 0.0
            at_risk = counts.get((x, y), (0, 0.0))[1]
            most += prefactor * zone / peak * at_risk if peak > 0 else (np.inf if at_risk > 0 else 0.0)
        if n > DIRECT_ROUTE_FACTOR * most:
            found.append((name, (a, b), n, others, {"seen": seen, "frames": int(h.sum()), "margin": margin,
                                                     "at": meet, "most": most}))
    return found


def _type_histograms(result, plan, names):
    """Angle histograms of the frames of the chosen torsions, summed per type (for the types
    ``names``), with the bin centres and the bin width; (None, None, None) without histograms."""
    blocks = getattr(result, "blocks", None)
    if blocks is None or "histograms" not in blocks or "bin_edges_deg" not in blocks:
        return None, None, None
    edges = np.asarray(blocks["bin_edges_deg"], dtype=float)
    hist = kept_block(blocks, "histograms")
    types = np.asarray(plan.types, dtype=object)
    selected = np.asarray(plan.selected)
    out = {}
    for name in names:
        columns = selected[types == name]
        total = np.zeros(hist.shape[2], dtype=np.int64)
        for lo in range(0, len(columns), 1024):   # (a slice of the torsions at a time: uint8 widened)
            total += hist[:, columns[lo:lo + 1024]].sum(axis=(0, 1), dtype=np.int64)
        out[name] = total
    return out, 0.5 * (edges[:-1] + edges[1:]), float(edges[1] - edges[0])


def _skipped_notices(skipped, dt):
    """Notices on the transitions that passed a third state between two frames."""
    notices = []
    apart = [s for s in skipped if s[4] is None]
    if apart:
        name, (a, b), n, between, _ = max(apart, key=lambda s: s[2])
        total = sum(s[2] for s in apart)
        more = f" (and {len(apart) - 1} more pair(s) of states)" if len(apart) > 1 else ""
        notices.append(
            f"{total:,} transition(s) were counted as direct between states whose sectors do not meet on the circle, "
            f"e.g. {a} <-> {b} of {name}, {n:,} of them{more}: {_listed(between, 'states', 4, ' or ')} lies between "
            f"them on either side, so each one passed through another state between two frames ({dt:g} ps apart). "
            "Their rates and Eyring barriers are an artefact of the frame spacing (intermediate_missed in "
            "transitions.csv); frames much closer together than the dwell times show the visit in between.")
    over = sorted((s for s in skipped if s[4] is not None), key=lambda s: -s[2] / max(s[4]["most"], 1e-300))
    if over:
        name, (a, b), n, others, d = over[0]
        at = " and ".join(f"{x:g}" for x in d["at"])
        more = (f" Likewise {_listed([f'{s[1][0]} <-> {s[1][1]} of {s[0]}' for s in over[1:]], 'pairs')}."
                if len(over) > 1 else "")
        seen = "none" if d["seen"] == 0 else f"only {d['seen']:,}"
        most = f"{d['most']:,.0f}" if d["most"] >= 10 else f"{d['most']:.2g}"
        notices.append(
            f"{a} <-> {b} of {name}: {n:,} transitions counted as direct, but {seen} of the {d['frames']:,} "
            f"frames of its torsions lie within {d['margin']:g} deg of {at} deg, where these two states meet; "
            f"the Eyring rate of the barrier those frames show there allows at most about {most} crossings in "
            f"this run (an upper bound). The rest passed through {_listed(others, 'states', 4, ' or ')} between "
            f"two frames ({dt:g} ps apart): their rates and Eyring barriers are an artefact of the frame spacing "
            "(intermediate_missed in transitions.csv) unless the frames are much closer together than the dwell "
            "times." + more)
    return notices


# ------------------------------------------------------------------------------------------------
# implied timescales shorter than the lag
# ------------------------------------------------------------------------------------------------
def _timescale_notice(ts):
    """The notice on implied timescales shorter than their lag (``ts`` has ``shorter_than_lag``)."""
    short = ts["shorter_than_lag"].to_numpy(bool)
    slowest = ts[short & (ts["index"].to_numpy() == 1) & ts["level"].isin(["type", "conformer"]).to_numpy()]
    text = (f"{int(short.sum()):,} of {len(ts):,} implied timescales are shorter than their lag time "
            "(shorter_than_lag in timescales.csv, '< lag' on screen): a Markov model at that lag cannot resolve "
            "them; read them as 'faster than the lag'.")
    if len(slowest):
        first = slowest.sort_values(["lag_ps", "timescale_ps"]).iloc[0]
        lags = sorted(set(slowest["lag_ps"].astype(float)))
        level = slowest["level"].astype(str)
        types = list(dict.fromkeys(slowest.loc[level == "type", "name"].astype(str)))
        conformers = list(dict.fromkeys(slowest.loc[level == "conformer", "name"].astype(str)))
        who = ([_listed(types, "types", 3)] if types else []) + (
            [f"the conformers of {_listed(conformers, 'kinds', 3)}"] if conformers else [])
        text += (f" At {'a lag' if len(lags) == 1 else 'lags'} of {_listed([f'{x:g}' for x in lags], 'lags', 4)} ps "
                 "even the slowest one is, "
                 f"for {', and '.join(who)} (e.g. {first['name']}, "
                 f"{first['timescale_ps']:.3g} ps at a lag of {first['lag_ps']:g} ps): there the model resolves no "
                 "process at all. Use lags shorter than the timescales to be measured; frames saved closer "
                 "together allow shorter lags.")
    return text


# ------------------------------------------------------------------------------------------------
def _rows_of(table, keys, pair=False):
    """Whether each row of a table belongs to the flagged ``keys``: (level, name) of pooled rows,
    torsion rows by their type; or with ``pair``, (type, state, state) with the states sorted, of
    the type and torsion rows that counted transitions."""
    if not len(table):
        return np.zeros(0, dtype=bool)
    level = table["level"].astype(str).to_numpy()
    torsion = level == "torsion"
    owner = np.where(torsion, table["type"].astype(str).to_numpy(), table["name"].astype(str).to_numpy())
    if pair:
        f, t = table["from_state"].astype(str).to_numpy(), table["to_state"].astype(str).to_numpy()
        key = _joined(owner, np.where(f < t, f, t), np.where(f < t, t, f))
        return (level != "conformer") & (table["count"].to_numpy() > 0) & _among(key, keys)
    return _among(_joined(np.where(torsion, "type", level), owner), keys)


def _among(key, keys):
    """Whether each row key is one of the tuples ``keys`` (joined as :func:`_joined` does)."""
    return pd.Series(key).isin(["\x1f".join(k) for k in keys]).to_numpy()


def _joined(*columns):
    """Text columns (or strings) joined into one key per row."""
    out = np.asarray(columns[0], dtype=object)
    for c in columns[1:]:
        out = out + "\x1f" + np.asarray(c, dtype=object)
    return out


def _frames(n):
    """``1 frame``, ``1.5 frames``."""
    return f"{n:.3g} frame" + ("" if n == 1 else "s")


def _listed(items, what, at_most=_SHOWN, last=" and "):
    """``a``, ``a and b``, ``a, b and c``, ``a, b, c and 4 more types``."""
    items = [str(x) for x in items]
    if len(items) > at_most:
        return ", ".join(items[:at_most]) + f" and {len(items) - at_most} more {what}"
    return items[0] if len(items) == 1 else ", ".join(items[:-1]) + last + items[-1]
