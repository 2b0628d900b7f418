"""From counts to tables: the rows of the kinetics tables for stacks of subjects.

A :class:`_Stack` holds subjects that share one state space (every torsion; the torsion types,
pooled; one conformer type over the joint states it visited) with their pair counts and dwell
segments; :func:`_stack_tables` turns it into the columns of every table at once, all subjects
together (array arithmetic, no per-torsion loop), and :func:`_tables` joins the stacks into
DataFrames. :func:`analyse_state_series` does the same for discrete trajectories given as arrays.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd
from pandas.api.types import union_categoricals

from .estimators import (DEFAULT_BOOTSTRAP, Z_95, _bootstrap_mean_interval, _rate_statistics, _segmented_sum,
                         _stationary_stack, kaplan_meier_groups)
from .markov import DEFAULT_LAGS, _markov_stack
from .tally import StateTally, _dense_counts, _merge_rows

TRANSITION_COLUMNS = ["level", "name", "type", "from_state", "to_state", "count", "time_in_from_ps",
                      "rate_per_ps", "rate_err_per_ps", "rate_ci_low_per_ps", "rate_ci_high_per_ps",
                      "eyring_barrier_kj_mol", "profile_barrier_kj_mol", "profile_barrier_err_kj_mol",
                      "tst_rate_from_profile_per_ps", "n_trajectories"]
#: Complete visits of a state that its dwell-time interval needs (with fewer it is NaN).
MIN_INTERVAL_VISITS = 2
LIFETIME_COLUMNS = ["level", "name", "type", "state", "mean_ps", "median_ps", "ci_low_ps", "ci_high_ps",
                    "n_segments", "n_censored", "mean_restricted", "mean_from_rates_ps", "time_in_state_ps",
                    "population_counted", "population_from_rates", "n_trajectories"]
TIMESCALE_COLUMNS = ["level", "name", "type", "lag_frames", "lag_ps", "index", "timescale_ps",
                     "n_states_connected"]
#: Observed dwell-time distribution (pooled per type and conformer type): segments of each length,
#: complete ones and right-censored ones (first/last segment of a trajectory).
DWELL_COLUMNS = ["level", "name", "type", "state", "dwell_ps", "n_complete", "n_censored"]
#: Kaplan-Meier survival of the dwell times (the same pools and rows as DWELL_COLUMNS): the
#: fraction of visits still in the state just after ``time_ps`` and the visits that lasted at
#: least that long.
SURVIVAL_COLUMNS = ["level", "name", "type", "state", "time_ps", "survival", "n_at_risk"]
MFPT_COLUMNS = ["level", "name", "type", "lag_frames", "lag_ps", "from_state", "to_state",
                "transition_probability", "mfpt_ps"]
TABLE_COLUMNS = {"transitions": TRANSITION_COLUMNS, "lifetimes": LIFETIME_COLUMNS, "timescales": TIMESCALE_COLUMNS,
                 "mfpt": MFPT_COLUMNS, "dwell_times": DWELL_COLUMNS, "dwell_survival": SURVIVAL_COLUMNS}


@dataclass
class _Stack:
    """Subjects (torsions, types or conformer types) that share one state space, analysed at once.

    Attributes
    ----------
    level : str
    names, types : ndarray of str (p,)
    labels : ndarray of str (v,)
        Label of each state of the shared space.
    counts : dict of lag -> ndarray (p, v, v)
        Pair counts (lag 1 and every lag of the Markov models).
    segments : tuple of ndarrays (subject, state, length_frames, censored, count)
    n_trajectories : ndarray (p,)
    all_pairs : bool
        List every ordered pair of visited states (else only observed transitions).
    dwell : bool
        Also the observed dwell-time distribution and its Kaplan-Meier survival.
    bootstrap : bool
        Percentile bootstrap intervals of the mean dwell times (else the Kaplan-Meier variance).
    """

    level: str
    names: np.ndarray
    types: np.ndarray
    labels: np.ndarray
    counts: dict
    segments: tuple
    n_trajectories: np.ndarray
    all_pairs: bool = True
    dwell: bool = False
    bootstrap: bool = True


def _merged_segments(subject, state, length, censored, count):
    """Segments summed per (subject, state, length, censored), sorted."""
    rows, summed = _merge_rows(np.column_stack([subject, state, length, censored]).astype(np.int64),
                               np.asarray(count, dtype=np.int64))
    return tuple(rows.T) + (summed,)


def _text(labels, codes):
    """The column ``labels[codes]`` as a categorical (categories sorted, so that it sorts and groups
    as the strings would).

    The tables hold text as codes: the Markov model of a conformer type over a few hundred joint
    states gives hundreds of thousands of ``mfpt`` rows per lag (every pair of connected states).
    As Python strings turned into pandas' string arrays, the 3.7 million rows of adenylate kinase
    (10,000 frames, crisp states) took 1.3 GB at the peak and 4 s; as codes a row holds about 40
    bytes."""
    categories, inverse = np.unique(np.asarray(labels).astype(str), return_inverse=True)
    return pd.Categorical.from_codes(inverse.reshape(-1)[np.asarray(codes, dtype=np.int64)], categories)


def _head(stack, who):
    """The level, name and type columns of the rows of subjects ``who``."""
    return {"level": _text([stack.level], np.zeros(len(who), dtype=np.int64)), "name": _text(stack.names, who),
            "type": _text(stack.types, who)}


def _stack_tables(stack, dt_ps, lags, n_bootstrap, rng):
    """Column arrays of the tables for one :class:`_Stack` ({table: {column: array}})."""
    c1 = np.asarray(stack.counts[1], dtype=float)
    p, v, _ = c1.shape
    dwell = _dwell_cells(stack.segments, v)
    km = (kaplan_meier_groups(dwell["starts"], dwell["length"].astype(float), dwell["complete"].astype(float),
                              dwell["censored"].astype(float)) if len(dwell["starts"]) else None)
    has_segment = np.zeros((p, v), dtype=bool)
    has_segment[dwell["subject"], dwell["state"]] = True
    visited = has_segment | (c1.sum(axis=2) > 0) | (c1.sum(axis=1) > 0)
    t = c1.sum(axis=2) * float(dt_ps)
    out = {"transitions": _transition_rows(stack, c1, t, visited),
           "lifetimes": _lifetime_rows(stack, c1, t, visited, dwell, km, dt_ps, n_bootstrap, rng)}
    if stack.dwell:
        out["dwell_times"] = {**_head(stack, dwell["subject"]), "state": _text(stack.labels, dwell["state"]),
                              "dwell_ps": dwell["length"] * float(dt_ps), "n_complete": dwell["complete"],
                              "n_censored": dwell["censored"]}
        out["dwell_survival"] = {**_head(stack, dwell["subject"]), "state": _text(stack.labels, dwell["state"]),
                                 "time_ps": dwell["length"] * float(dt_ps),
                                 "survival": km["survival"] if km else np.zeros(0),
                                 "n_at_risk": km["at_risk"].astype(np.int64) if km else np.zeros(0, dtype=np.int64)}
    out.update(_markov_rows(stack, visited, dt_ps, lags))
    return out


def _transition_rows(stack, c1, t, visited):
    """Counts and rates of the ordered pairs of visited states (only observed ones unless
    ``stack.all_pairs``), from the lag-1 counts ``c1`` and the times at risk ``t``."""
    v = c1.shape[1]
    keep = visited[:, :, None] & visited[:, None, :] & ~np.eye(v, dtype=bool) & (t > 0)[:, :, None]
    if not stack.all_pairs:
        keep &= c1 > 0
    ps, i, j = np.nonzero(keep)
    return {**_head(stack, ps), "from_state": _text(stack.labels, i), "to_state": _text(stack.labels, j),
            "count": c1[ps, i, j].astype(np.int64), "time_in_from_ps": t[ps, i],
            **_rate_statistics(c1[ps, i, j], t[ps, i]), "n_trajectories": stack.n_trajectories[ps]}


def _lifetime_rows(stack, c1, t, visited, dwell, km, dt_ps, n_bootstrap, rng):
    """Dwell times and populations (counted, and implied by the rates) of every visited state."""
    p, v, _ = c1.shape
    seg_frames = np.zeros((p, v))
    np.add.at(seg_frames, (dwell["subject"], dwell["state"]), dwell["length"] * (dwell["complete"] + dwell["censored"]))
    with np.errstate(invalid="ignore", divide="ignore"):
        rate_matrix = np.where((t > 0)[:, :, None] & ~np.eye(v, dtype=bool), c1 / t[:, :, None], 0.0)
    pi = _stationary_stack(rate_matrix, visited)
    exits = c1.sum(axis=2) - np.diagonal(c1, axis1=1, axis2=2)
    total_frames = seg_frames.sum(axis=1, keepdims=True)
    with np.errstate(invalid="ignore", divide="ignore"):
        counted = np.where(total_frames > 0, seg_frames / total_frames, seg_frames)
        from_rates = np.where(exits > 0, t / exits, np.nan)
    ps, i = np.nonzero(visited)
    return {**_head(stack, ps), "state": _text(stack.labels, i),
            **_lifetime_columns(dwell, km, ps * v + i, stack.bootstrap, dt_ps, n_bootstrap, rng),
            "mean_from_rates_ps": from_rates[ps, i], "time_in_state_ps": seg_frames[ps, i] * dt_ps,
            "population_counted": counted[ps, i], "population_from_rates": pi[ps, i],
            "n_trajectories": stack.n_trajectories[ps]}


def _markov_rows(stack, visited, dt_ps, lags):
    """Timescales and mean first-passage times of the Markov models at every lag, ordered subject by
    subject, lags in order."""
    parts = {"timescales": [], "mfpt": []}
    for order, lag in enumerate(lags):
        counts = np.where(visited[:, :, None] & visited[:, None, :], np.asarray(stack.counts[lag], dtype=float), 0.0)
        for members, act, tm, _, ts, mf in _markov_stack(counts, lag):
            g, k = len(members), len(act)
            finite = np.isfinite(ts)
            who, col = np.nonzero(finite)
            parts["timescales"].append((members[who], order, {
                "lag_frames": lag, "lag_ps": lag * dt_ps, "index": np.cumsum(finite, axis=1)[who, col],
                "timescale_ps": ts[who, col] * dt_ps, "n_states_connected": k}))
            a, b = np.repeat(np.arange(k), k), np.tile(np.arange(k), k)
            parts["mfpt"].append((np.repeat(members, k * k), order, {
                "lag_frames": lag, "lag_ps": lag * dt_ps, "from_state": np.tile(act[a], g),
                "to_state": np.tile(act[b], g), "transition_probability": tm.reshape(-1),
                "mfpt_ps": np.where(np.eye(k, dtype=bool), np.nan, mf * dt_ps).reshape(-1)}))
    out = {}
    for name, columns in (("timescales", TIMESCALE_COLUMNS), ("mfpt", MFPT_COLUMNS)):
        got = parts.pop(name)
        who = np.concatenate([x[0] for x in got]) if got else np.zeros(0, dtype=np.int64)
        order = np.concatenate([np.full(len(x[0]), x[1]) for x in got]) if got else np.zeros(0, dtype=np.int64)
        sort = np.lexsort((order, who))  # stable: rows of one model keep their order
        if (sort[1:] > sort[:-1]).all():
            sort = slice(None)   # (in order already, as the one subject of a conformer stack: no copies)
        del order
        # a column at a time, its pieces let go as it is joined: the models of one conformer type
        # over 600 states are 2.4 million mfpt rows
        cols = {c: np.concatenate([np.broadcast_to(x[2].pop(c), (len(x[0]),)) for x in got])[sort] if got
                else np.zeros(0) for c in columns[3:]}
        for c in ("from_state", "to_state"):   # (state codes until here)
            if c in cols:
                cols[c] = _text(stack.labels, cols[c])
        out[name] = {**_head(stack, who[sort]), **cols}
    return out


def _dwell_cells(segments, n_states):
    """Segments per (subject, state, length): complete and censored numbers, sorted."""
    subj, state, length, cens, count = (np.asarray(x, dtype=np.int64) for x in segments)
    if not len(subj):
        z = np.zeros(0, dtype=np.int64)
        return {"subject": z, "state": z, "length": z, "complete": z, "censored": z, "starts": z}
    span = int(length.max()) + 1
    key = (subj * n_states + state) * span + length
    uniq, inv = np.unique(key, return_inverse=True)
    complete = np.bincount(inv, weights=np.where(cens > 0, 0, count), minlength=len(uniq)).astype(np.int64)
    censored = np.bincount(inv, weights=np.where(cens > 0, count, 0), minlength=len(uniq)).astype(np.int64)
    cell = uniq // span
    return {"subject": cell // n_states, "state": cell % n_states, "length": uniq % span, "complete": complete,
            "censored": censored, "cell": cell, "starts": np.flatnonzero(np.r_[True, cell[1:] != cell[:-1]])}


def _lifetime_columns(dwell, km, cells, bootstrap, dt_ps, n_bootstrap, rng):
    """Dwell-time statistics of the cells (subject * n_states + state) ``cells``, in this order,
    from the Kaplan-Meier statistics ``km`` of the dwell cells (:func:`kaplan_meier_groups`)."""
    n = len(cells)
    out = {"mean_ps": np.full(n, np.nan), "median_ps": np.full(n, np.nan), "ci_low_ps": np.full(n, np.nan),
           "ci_high_ps": np.full(n, np.nan), "n_segments": np.zeros(n, dtype=np.int64),
           "n_censored": np.zeros(n, dtype=np.int64), "mean_restricted": np.zeros(n, dtype=bool)}
    starts = dwell["starts"]
    if not len(starts):
        return out
    ev, ce = dwell["complete"].astype(float), dwell["censored"].astype(float)
    known = dwell["cell"][starts]
    pos = np.minimum(np.searchsorted(known, cells), len(known) - 1)
    has = known[pos] == cells
    g = pos[has]
    n_ev = _segmented_sum(ev, starts)
    out["mean_ps"][has] = km["mean"][g] * dt_ps
    out["median_ps"][has] = km["median"][g] * dt_ps
    out["n_segments"][has] = n_ev[g].astype(np.int64)
    out["n_censored"][has] = _segmented_sum(ce, starts)[g].astype(np.int64)
    out["mean_restricted"][has] = km["restricted"][g]
    if not n_bootstrap:
        return out
    # (one complete visit says nothing of the spread of dwell times: no interval, not a point)
    with_events = np.flatnonzero(has)[n_ev[g] >= MIN_INTERVAL_VISITS]
    if bootstrap:  # percentile bootstrap, group by group (pooled levels: few groups)
        ends = np.r_[starts[1:], len(ev)]
        for k in with_events:
            sl = slice(starts[pos[k]], ends[pos[k]])
            low, high = _bootstrap_mean_interval(dwell["length"][sl].astype(float), ev[sl], ce[sl], n_bootstrap, rng)
            out["ci_low_ps"][k], out["ci_high_ps"][k] = low * dt_ps, high * dt_ps
    else:  # Kaplan-Meier variance of the restricted mean, interval symmetric in ln(mean)
        mean, se = km["mean"][pos[with_events]], km["mean_se"][pos[with_events]]
        spread = np.exp(Z_95 * se / mean)
        out["ci_low_ps"][with_events] = mean / spread * dt_ps
        out["ci_high_ps"][with_events] = mean * spread * dt_ps
    return out


def _frames(columns_list, columns):
    """One DataFrame from the column dicts of several stacks (in order); absent columns are NaN.

    Each column is taken out of the dicts as it is joined, so that the pieces and the table are
    not both held whole (the ``mfpt`` table of a protein's conformers is millions of rows)."""
    parts = [c for c in columns_list if c is not None and len(c.get(columns[0], ())) > 0]
    if not parts:
        return pd.DataFrame({c: pd.Series(dtype=object) for c in columns})
    sizes = [len(p[columns[0]]) for p in parts]

    def joined(name):
        pieces = [p.pop(name, np.nan) for p in parts]
        if all(isinstance(x, pd.Categorical) for x in pieces):
            return union_categoricals(pieces, sort_categories=True)
        return np.concatenate([np.asarray(x) if np.ndim(x) else np.full(n, x) for x, n in zip(pieces, sizes)])

    # (copy=False: pandas would otherwise copy the float columns into one 2-D block)
    return pd.DataFrame({c: joined(c) for c in columns}, columns=columns, copy=False)


def _tables(parts):
    """The six DataFrames (:data:`TABLE_COLUMNS`) from the column dicts of several stacks (which
    are emptied on the way)."""
    return {name: _frames([p.get(name) for p in parts], columns) for name, columns in TABLE_COLUMNS.items()}


def analyse_state_series(dtrajs, state_labels, dt_ps, lags=DEFAULT_LAGS, n_bootstrap=DEFAULT_BOOTSTRAP,
                         seed=0, name="series"):
    """Kinetics of discrete trajectories given as arrays (each one a separate trajectory).

    Parameters
    ----------
    dtrajs : list of 1-D int arrays
        Assigned states (codes into ``state_labels``; -1 = unassigned); pooled, never joined.
    state_labels : sequence of str
    dt_ps : float
        Time between frames in ps.
    lags : sequence of int
        Lags in frames for the Markov models.

    Returns
    -------
    dict of DataFrames ``transitions``, ``lifetimes``, ``timescales``, ``mfpt``, ``dwell_times``,
    ``dwell_survival`` (level ``pooled``).
    """
    n_states = len(state_labels)
    tally = StateTally(1, lags, n_states=n_states)
    for d in dtrajs:
        tally.add_series(np.asarray(d, dtype=np.int64).reshape(1, -1))
        tally.end_replica()
    tally.finish()
    stack = _Stack("pooled", np.array([name], dtype=object), np.array([""], dtype=object),
                   np.array(list(state_labels), dtype=object), tally.pair_matrices_ or
                   _dense_counts(tally.pairs_, 1, n_states), tuple(tally.segments_[0].T) + (tally.segments_[1],),
                   np.array([len(dtrajs)]), all_pairs=True, dwell=True, bootstrap=True)
    return _tables([_stack_tables(stack, float(dt_ps), tally.lags_requested, n_bootstrap,
                                  np.random.default_rng(seed))])

