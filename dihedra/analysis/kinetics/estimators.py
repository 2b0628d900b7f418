"""Estimators of the kinetics: rates, equilibrium populations from rates, Kaplan-Meier dwell times
with their intervals, and the Eyring equation of transition-state theory.

Rates are the maximum-likelihood estimates of a Markov jump process, ``k_ij = n_ij / T_i`` with
``se = sqrt(n_ij) / T_i`` and an exact 95 % Poisson interval (Garwood, Biometrika 28 (1936) 437).
Dwell times enter the Kaplan-Meier estimate of the survival function with right-censoring (Kaplan
& Meier, J. Am. Stat. Assoc. 53 (1958) 457); the variance of the restricted mean follows Klein &
Moeschberger, Survival Analysis, 2nd ed. (2003), section 4.5. The Eyring equation with ``kappa =
1`` (H. Eyring, J. Chem. Phys. 3 (1935) 107; IUPAC Gold Book) turns rates into barriers and the
barriers of a free-energy profile into rates (constants CODATA 2018, :mod:`dihedra.units`).
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from ...errors import name_list
from ...units import ENERGY_UNITS, H_J_S, K_B_J_PER_K, R_KJ_PER_MOL_K, check_temperature, to_kj_mol
from .markov import _reachability

#: Default number of bootstrap samples for dwell-time intervals.
DEFAULT_BOOTSTRAP = 1000
#: The median dwell time is the first with S <= 1/2; products of (1 - d/Y) that are exactly 1/2
#: may round to either side, so the test allows a relative 1e-9.
HALF_SURVIVAL = 0.5 * (1.0 + 1e-9)
#: Two-sided 95 % point of the standard normal distribution.
Z_95 = 1.959963984540054

TST_CAUTION = ("transition-state theory gives an upper bound on the rate (every crossing of the barrier top "
               "counts, recrossings are ignored), so observed rates below the Eyring rate of the profile "
               "barrier are expected; and k_B T / h is not the attempt frequency of a torsion, so read the "
               "Eyring barrier of a rate next to the profile barrier as a consistency check, not as a "
               "measurement of the barrier.")


def _rate_statistics(n, t):
    """k = n / T, its standard error sqrt(n) / T and the exact 95 % Poisson interval (Garwood):
    chi2_{0.025}(2 n) / 2 and chi2_{0.975}(2 n + 2) / 2 events, that is the inverse regularised
    incomplete gamma function at n and n + 1."""
    from scipy.special import gammaincinv

    n = np.asarray(n, dtype=float)
    with np.errstate(invalid="ignore", divide="ignore"):
        tt = np.where(t > 0, t, np.nan)
        return {"rate_per_ps": n / tt, "rate_err_per_ps": np.sqrt(n) / tt,
                "rate_ci_low_per_ps": np.where(n > 0, gammaincinv(np.maximum(n, 1.0), 0.025), 0.0) / tt,
                "rate_ci_high_per_ps": gammaincinv(n + 1.0, 0.975) / tt}


def _stationary_stack(rate_matrix, visited):
    """Equilibrium populations ``pi`` with ``pi K = 0`` of the generators ``K`` built from a stack
    of rate matrices, over the visited states of each matrix.

    When the rates do not connect the visited states strongly (some state is never left or never
    entered), the populations are not fixed by the rates and are NaN.

    Parameters
    ----------
    rate_matrix : ndarray (p, n, n)
        Rates (NaN taken as 0); unvisited states have no rates in or out.
    visited : ndarray of bool (p, n)

    Returns
    -------
    ndarray (p, n)
        Populations (0 for unvisited states; NaN for all states of a matrix whose visited states
        are not strongly connected).
    """
    k = np.nan_to_num(np.asarray(rate_matrix, dtype=float))
    p, n, _ = k.shape
    vis = np.asarray(visited, dtype=bool)
    both = vis[:, :, None] & vis[:, None, :]
    connected = (_reachability(k > 0) | ~both).all(axis=(1, 2))
    q = k - np.eye(n) * k.sum(axis=2)[:, :, None]
    m = np.swapaxes(q, 1, 2).copy()
    unvisited = ~vis
    m[unvisited] = 0.0
    m = m + np.eye(n) * unvisited[:, :, None]
    first = np.argmax(vis, axis=1)
    rows = np.arange(p)
    m[rows, first] = vis.astype(float)  # normalisation over the visited states replaces one equation
    rhs = np.zeros((p, n))
    rhs[rows, first] = 1.0
    good = connected & vis.any(axis=1)
    m[~good] = np.eye(n)
    pi = np.linalg.solve(m, rhs[..., None])[..., 0]
    pi = np.clip(pi, 0.0, None)
    with np.errstate(invalid="ignore", divide="ignore"):
        pi = pi / pi.sum(axis=1, keepdims=True)
    pi[~good] = np.nan
    return pi


def kaplan_meier(durations, events, censored):
    """Kaplan-Meier survival of dwell times with right-censoring; vectorised over rows.

    Parameters
    ----------
    durations : ndarray (K,)
        Distinct durations, increasing.
    events, censored : ndarray (..., K)
        Number of complete and of censored segments at each duration.

    Returns
    -------
    mean, median : ndarrays of shape ``events.shape[:-1]``
        Restricted mean (area under S up to the last duration) and median (NaN if S never reaches
        1/2).
    """
    d = np.asarray(durations, dtype=float)
    e = np.asarray(events, dtype=float)
    c = np.asarray(censored, dtype=float)
    total = e + c
    at_risk = np.cumsum(total[..., ::-1], axis=-1)[..., ::-1]
    with np.errstate(invalid="ignore", divide="ignore"):
        h = np.where(at_risk > 0, e / at_risk, 0.0)
    s = np.cumprod(1.0 - h, axis=-1)
    s_before = np.concatenate([np.ones(s.shape[:-1] + (1,)), s[..., :-1]], axis=-1)
    widths = np.diff(np.r_[0.0, d])
    mean = np.sum(s_before * widths, axis=-1)
    below = s <= HALF_SURVIVAL
    idx = np.argmax(below, axis=-1)
    median = np.where(below.any(axis=-1), d[idx] if d.size else np.nan, np.nan)
    empty = total.sum(axis=-1) == 0
    return np.where(empty, np.nan, mean), np.where(empty, np.nan, median)


def _segmented_sum(values, starts):
    """Sums of ``values`` over consecutive groups that begin at ``starts``."""
    return np.add.reduceat(values, starts) if len(values) else np.zeros(0)


def kaplan_meier_groups(group_start, durations, events, censored):
    """Kaplan-Meier statistics of many groups of dwell times at once.

    Parameters
    ----------
    group_start : ndarray of int (g,)
        Index of the first row of each group (groups are consecutive and non-empty).
    durations : ndarray (r,)
        Distinct durations, increasing within each group.
    events, censored : ndarray (r,)
        Complete and censored segments at each duration.

    Returns
    -------
    dict of (g,) arrays: ``mean`` (restricted mean: area under S up to the longest duration),
    ``median`` (first duration with S <= 1/2, else NaN), ``mean_se`` (standard error of the
    restricted mean from its Kaplan-Meier variance, sum_i A_i^2 d_i / (Y_i (Y_i - d_i)) with A_i
    the area under S beyond duration i, Y_i the segments at risk and d_i the complete ones there;
    Klein & Moeschberger, Survival Analysis (2003), section 4.5), ``restricted`` (the longest
    segment is censored); and, per row, the curve itself: ``survival`` (S just after the
    duration; ties: events before censorings) and ``at_risk`` (segments at least that long).
    """
    d = np.asarray(durations, dtype=float)
    e = np.asarray(events, dtype=float)
    c = np.asarray(censored, dtype=float)
    starts = np.asarray(group_start, dtype=np.int64)
    n_rows = len(d)
    group = np.repeat(np.arange(len(starts)), np.diff(np.r_[starts, n_rows]))
    first = np.zeros(n_rows, dtype=bool)
    first[starts] = True
    total = e + c
    cum = np.cumsum(total)
    before = cum - total - (cum - total)[starts][group]  # segments of the group with a shorter duration
    at_risk = _segmented_sum(total, starts)[group] - before
    with np.errstate(invalid="ignore", divide="ignore"):
        h = np.where(at_risk > 0, e / at_risk, 0.0)
        log_keep = np.log1p(-np.minimum(h, 1.0))
    dead = h >= 1.0
    log_cum = np.cumsum(np.where(dead, 0.0, log_keep))
    log_cum -= (log_cum - np.where(dead, 0.0, log_keep))[starts][group]
    dead_cum = np.cumsum(dead)
    dead_cum -= (dead_cum - dead)[starts][group]
    surv = np.where(dead_cum > 0, 0.0, np.exp(log_cum))
    surv_before = np.where(first, 1.0, np.r_[1.0, surv[:-1]])
    width = d - np.where(first, 0.0, np.r_[0.0, d[:-1]])
    area = surv_before * width
    mean = _segmented_sum(area, starts)
    area_cum = np.cumsum(area)
    area_cum -= (area_cum - area)[starts][group]
    beyond = mean[group] - area_cum  # A_i: area under S from duration i to the longest one
    with np.errstate(invalid="ignore", divide="ignore"):
        term = np.where(at_risk > e, beyond ** 2 * e / (at_risk * (at_risk - e)), 0.0)
    below = np.where(surv <= HALF_SURVIVAL, np.arange(n_rows), n_rows)
    first_below = np.minimum.reduceat(below, starts) if n_rows else np.zeros(0, dtype=np.int64)
    median = np.where(first_below < n_rows, d[np.minimum(first_below, max(n_rows - 1, 0))], np.nan)
    last = np.r_[starts[1:], n_rows] - 1
    return {"mean": mean, "median": median, "mean_se": np.sqrt(_segmented_sum(term, starts)),
            "restricted": c[last] > 0, "survival": surv, "at_risk": at_risk}


def _bootstrap_mean_interval(durations, events, censored, n_bootstrap, rng):
    """95 % percentile bootstrap interval (frames) of the restricted mean, resampling segments."""
    k = len(durations)
    draws = _resample_counts(np.r_[events, censored].astype(np.int64), int(n_bootstrap), rng)
    boot, _ = kaplan_meier(durations, draws[:, :k], draws[:, k:])
    low, high = np.percentile(boot, [2.5, 97.5])
    return float(low), float(high)


def _resample_counts(cell_counts, n_samples, rng):
    """Bootstrap resamples of items grouped in cells: (n_samples, n_cells) counts, each row summing to
    the number of items (multinomial; by drawing item indices when there are few items)."""
    total = int(cell_counts.sum())
    n_cells = len(cell_counts)
    if total <= 4 * n_cells:
        items = np.repeat(np.arange(n_cells), cell_counts)
        picks = items[rng.integers(0, total, size=(n_samples, total))]
        flat = (picks + np.arange(n_samples)[:, None] * n_cells).ravel()
        return np.bincount(flat, minlength=n_samples * n_cells).reshape(n_samples, n_cells)
    return rng.multinomial(total, cell_counts / total, size=n_samples)


def eyring_rate_per_s(barrier_kj_mol, temperature_k, kappa=1.0):
    """Eyring rate ``kappa (k_B T / h) exp(-dG / RT)`` in 1/s (CODATA 2018 constants).

    Examples
    --------
    >>> f"{eyring_rate_per_s(12.1, 298.15):.3g}"
    '4.71e+10'
    """
    t = check_temperature(temperature_k)
    g = np.asarray(barrier_kj_mol, dtype=float)
    return kappa * K_B_J_PER_K * t / H_J_S * np.exp(-g / (R_KJ_PER_MOL_K * t))


def eyring_barrier_kj_mol(rate_per_s, temperature_k, kappa=1.0):
    """Free-energy barrier ``-RT ln(k h / (kappa k_B T))`` in kJ/mol of a rate in 1/s (NaN if k <= 0)."""
    t = check_temperature(temperature_k)
    k = np.asarray(rate_per_s, dtype=float)
    with np.errstate(divide="ignore", invalid="ignore"):
        g = -R_KJ_PER_MOL_K * t * np.log(k * H_J_S / (kappa * K_B_J_PER_K * t))
    return np.where(k > 0, g, np.nan)


def barriers_in_kj_mol(table, temperature_k=None):
    """``barriers.csv`` with its heights in kJ/mol: a profile written in another energy unit
    (``dihedra profile --energy-unit kcal/mol``: ``height_from_first_kcal_mol``, ...) is converted
    (kT with ``temperature_k``, the profile's); the table as it is when it has kJ/mol already or no
    convertible heights."""
    first = [c for c in table.columns if c.startswith("height_from_first_")]
    if "height_from_first_kj_mol" in table.columns or not first:
        return table
    suffix = first[0][len("height_from_first_"):]
    if suffix not in ENERGY_UNITS or (ENERGY_UNITS[suffix] == "kT" and temperature_k is None):
        return table
    out = table.copy()
    for side in ("first", "second"):
        for kind in ("", "_err"):
            col = f"height_from_{side}{kind}_{suffix}"
            if col in out.columns:
                out[f"height_from_{side}{kind}_kj_mol"] = to_kj_mol(out[col], suffix, temperature_k)
    return out


def _read_barrier_table(table, scheme):
    """Map the barriers of ``barriers.csv`` (``dihedra profile``) onto transitions between states.

    Each row is the barrier between two neighbouring minima of a profile (per ``type``, or per
    ``torsion`` when that column is filled), with ``from_minimum_deg``, ``to_minimum_deg`` and the
    heights above each, ``height_from_first_kj_mol`` and ``height_from_second_kj_mol``. The minima
    are assigned states with the crisp scheme: the first height is the barrier of the transition
    first -> second, the second the reverse. Barriers between minima of the same state are skipped;
    of several barriers between the same two states the lowest is kept (the dominant path), one whose
    path from minimum to minimum stays in the two states before one that crosses the arc of a third
    state (:class:`BarrierMap`: such a barrier goes only to a transition that was observed; a
    glycine phi's gauche+ -> gauche- over the anti plateau, never seen, gets none).

    Returns
    -------
    dict
        ``(level, name, from_state, to_state) -> (height_kj_mol, height_err_kj_mol)``.
    """
    needed = {"type", "from_minimum_deg", "to_minimum_deg", "height_from_first_kj_mol",
              "height_from_second_kj_mol"}
    if not needed <= set(table.columns) or not len(table):
        return {}
    torsion = table["torsion"] if "torsion" in table.columns else pd.Series([np.nan] * len(table))
    named = np.array([isinstance(t, str) and bool(t) for t in torsion], dtype=bool)
    level = np.where(named, "torsion", "type")
    name = np.where(named, torsion.astype(object).to_numpy(), table["type"].astype(object).to_numpy())
    a, b = (np.full(len(table), -1, dtype=np.int64) for _ in range(2))
    for ttype, rows in table.groupby("type", sort=False).indices.items():   # each type's own scheme
        part = scheme.for_type(ttype)
        a[rows] = part.assign(table["from_minimum_deg"].to_numpy(dtype=float)[rows])
        b[rows] = part.assign(table["to_minimum_deg"].to_numpy(dtype=float)[rows])
    ok = (a >= 0) & (b >= 0) & (a != b)
    direct = np.ones(len(table), dtype=bool)   # (the path from one minimum to the other in their states alone)
    if "angle_deg" in table.columns:
        for ttype, rows in table.groupby("type", sort=False).indices.items():
            part = scheme.for_type(ttype)
            for r in rows[ok[rows]]:
                direct[r] = _direct_path(part, table["from_minimum_deg"].iat[r], table["angle_deg"].iat[r],
                                         table["to_minimum_deg"].iat[r], {a[r], b[r]})
    labels = np.array(scheme.labels, dtype=object)
    unsampled = set()   # (barriers between two states whose top no frame reached: no height)
    if "sampled" in table.columns:
        blank = ok & ~table["sampled"].astype(bool).to_numpy()
        for i, j in ((a, b), (b, a)):
            unsampled.update(zip(level[blank], name[blank], labels[i[blank]], labels[j[blank]]))
    parts = []
    for i, j, which in ((a, b, "first"), (b, a, "second")):
        value = table[f"height_from_{which}_kj_mol"].to_numpy(dtype=float)
        err_col = f"height_from_{which}_err_kj_mol"
        err = table[err_col].to_numpy(dtype=float) if err_col in table.columns else np.full(len(table), np.nan)
        use = ok & np.isfinite(value)
        parts.append(pd.DataFrame({"level": level[use], "name": name[use], "from": labels[i[use]],
                                   "to": labels[j[use]], "value": value[use], "err": err[use],
                                   "row": np.flatnonzero(use), "side": 0 if which == "first" else 1,
                                   "crossing": ~direct[use]}))
    rows = pd.concat(parts, ignore_index=True).sort_values(["row", "side"], kind="stable")
    # the lowest direct barrier of each transition, else the lowest over a third state; on ties the first
    rows = rows.sort_values(["crossing", "value"], kind="stable").drop_duplicates(["level", "name", "from", "to"],
                                                                                  keep="first")
    out = BarrierMap(((lv, nm, f, t), (float(v), float(e))) for lv, nm, f, t, v, e in
                     zip(rows["level"], rows["name"], rows["from"], rows["to"], rows["value"], rows["err"]))
    out.crossing = {k for k, c in zip(zip(rows["level"], rows["name"], rows["from"], rows["to"]), rows["crossing"])
                    if c}
    out.unsampled = unsampled - set(out)
    return out


class BarrierMap(dict):
    """``(level, name, from_state, to_state) -> (height_kj_mol, height_err_kj_mol)``; ``crossing``:
    the keys whose barrier lies on a path over a third state's arc (a narrow state at the barrier
    top, as the eclipsed sectors of Klyne-Prelog, or a state without a minimum, as a glycine phi's
    anti plateau): given to a transition only where that transition was observed; ``unsampled``: the
    keys of a barrier that no frame reached (``sampled`` false in barriers.csv: no height) and no
    sampled barrier stands in for."""

    def __init__(self, keys_values=()):
        super().__init__((k, v) for k, v in keys_values)
        self.crossing = set()
        self.unsampled = set()


def _direct_path(part, first_deg, top_deg, second_deg, states):
    """Whether the arc from the minimum at ``first_deg`` over the barrier top at ``top_deg`` to
    the minimum at ``second_deg`` lies in ``states`` alone (under the scheme ``part``); a barrier
    whose path crosses a third state's arc goes only to an observed transition (:class:`BarrierMap`).
    True where the top is unknown (NaN).

    >>> from dihedra.selection.schemes import anti_gauche
    >>> s = anti_gauche()
    >>> g_plus, g_minus = s.labels.index("gauche+"), s.labels.index("gauche-")
    >>> _direct_path(s, 72.7, 2.5, -71.9, {g_plus, g_minus}), _direct_path(s, 72.7, -176.5, -71.9, {g_plus, g_minus})
    (True, False)
    """
    first, top, second = (float(x) for x in (first_deg, top_deg, second_deg))
    if not np.isfinite(top):
        return True
    to_top, to_second = (top - first) % 360.0, (second - first) % 360.0
    length = to_second if to_top <= to_second else 360.0 - to_second   # (the way that passes the top)
    sign = 1.0 if to_top <= to_second else -1.0
    steps = np.append(np.arange(0.0, length, 0.5), length)
    seen = part.assign((first + sign * steps + 180.0) % 360.0 - 180.0)
    return bool(set(int(x) for x in np.unique(seen)) <= {int(x) for x in states})


def _add_tst(transitions, temperature_k, barriers, notices):
    """Fill the Eyring and profile-barrier columns of the transitions table in place."""
    if len(transitions) == 0:
        return
    if temperature_k is not None:
        transitions["eyring_barrier_kj_mol"] = eyring_barrier_kj_mol(
            transitions["rate_per_ps"].to_numpy(dtype=float) * 1e12, temperature_k)
    if barriers is None:
        notices.append("no barriers.csv in the folder (run 'dihedra profile'): the profile_barrier_kj_mol "
                       "column is empty.")
        return
    keys = list(zip(*(transitions[c].to_numpy(dtype=object) for c in ("level", "name", "from_state", "to_state"))))
    values = np.array([barriers.get(k, (np.nan, np.nan)) for k in keys], dtype=float).reshape(-1, 2)
    if "count" in transitions:   # a barrier over a third state's arc: only for a transition seen to take it
        crossing = getattr(barriers, "crossing", set())
        unseen = [k in crossing and not c > 0 for k, c in zip(keys, transitions["count"].to_numpy(dtype=float))]
        values[np.asarray(unseen, dtype=bool)] = np.nan
    transitions["profile_barrier_kj_mol"] = values[:, 0]
    transitions["profile_barrier_err_kj_mol"] = values[:, 1]
    notices.extend(_unsampled_barrier_notices(transitions, keys, getattr(barriers, "unsampled", set())))
    if not np.isfinite(transitions["profile_barrier_kj_mol"]).any():
        notices.append("barriers.csv has no barrier that matches a transition of this analysis; the "
                       "profile_barrier_kj_mol column is empty.")
    elif temperature_k is not None:
        transitions["tst_rate_from_profile_per_ps"] = eyring_rate_per_s(
            transitions["profile_barrier_kj_mol"].to_numpy(dtype=float), temperature_k) / 1e12
        notices.extend(_above_tst_notices(transitions, temperature_k))


def _unsampled_barrier_notices(transitions, keys, unsampled):
    """A notice on observed transitions whose profile barrier no frame reached: the profile has no
    height for it (only that it is above every sampled bin), the Eyring barrier of the rate is the
    estimate there."""
    if not unsampled or "count" not in transitions:
        return []
    counts = transitions["count"].to_numpy(dtype=float)
    seen = [i for i, k in enumerate(keys) if k in unsampled and counts[i] > 0]
    if not seen:
        return []
    rows = transitions.iloc[seen]
    shown = name_list([f"{r.name} {r.from_state} -> {r.to_state} ({int(r.count)} seen)"
                       for r in rows.itertuples(index=False)], 3)
    return [f"{len(seen)} observed transition(s) cross a barrier of the profile that no frame reached ({shown}): "
            "the profile says only that such a barrier is higher than any sampled bin, so profile_barrier_kj_mol is "
            "empty for them and eyring_barrier_kj_mol, from the observed rate (prefactor k_B T / h), is the only "
            "estimate. The torsions "
            "crossed it between two saved frames, as is usual for a high barrier (a crossing is fast); frames saved "
            "more often would put a few on it, and umbrella windows ('dihedra windows') measure it."]


def _above_tst_notices(transitions, temperature_k):
    """A notice on transitions observed faster than transition-state theory allows over their
    profile barrier: the lower end of the rate's 95 % interval above the Eyring rate of the
    barrier lowered by two of its standard errors."""
    if "rate_ci_low_per_ps" not in transitions or "profile_barrier_err_kj_mol" not in transitions:
        return []
    barrier = transitions["profile_barrier_kj_mol"].to_numpy(dtype=float)
    err = transitions["profile_barrier_err_kj_mol"].to_numpy(dtype=float)
    low = np.where(np.isfinite(err), barrier - 2.0 * err, barrier)
    with np.errstate(invalid="ignore", over="ignore"):
        bound = eyring_rate_per_s(low, temperature_k) / 1e12
        fast = transitions["rate_ci_low_per_ps"].to_numpy(dtype=float) > bound
    rows = transitions[fast & np.isfinite(bound)]
    if not len(rows):
        return []
    shown = "; ".join(f"{r.name} {r.from_state} -> {r.to_state}: {r.rate_per_ps:.3g}/ps observed, "
                      f"{r.tst_rate_from_profile_per_ps:.3g}/ps over its {r.profile_barrier_kj_mol:.1f} kJ/mol "
                      f"(at most {b:.3g}/ps two errors lower)"
                      for r, b in zip(rows.head(3).itertuples(index=False), bound[fast & np.isfinite(bound)][:3]))
    more = f" and {len(rows) - 3} more" if len(rows) > 3 else ""
    return [f"{len(rows)} transition(s) are observed faster than transition-state theory allows over their "
            f"profile barrier ({shown}{more}; tst_rate_from_profile_per_ps in transitions.csv): the states "
            "change in other ways than over that barrier. Usual causes: frames too far apart, so that a "
            "transition through another state between two frames counts as a direct one; with '--assignment "
            "crisp', flickers across a state boundary away from the barrier top (the default core assignment "
            "counts only arrivals in a state's core); or a type's pooled barrier that its moving torsions do "
            "not have. (The bound takes k_B T / h as the prefactor; a light rotor's can be larger, so read this "
            "as a check.)"]

