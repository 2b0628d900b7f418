"""Is the sampling converged? Per torsion type: the start of the equilibrated part, whether the
replicas agree, the simulated time still needed for a target error, and one verdict.

:func:`convergence_tables` takes the time blocks per type and state that the trajectory pass
counted, or reads the state series of a run once into them (:mod:`dihedra.trajectory.timeblocks`;
for each type, the fraction of its torsions in each state, per block of frames), and applies the
methods of :mod:`dihedra.numerics.convergence` to those series:

* **start**: equilibration detection (Chodera, J. Chem. Theory Comput. 12 (2016) 1799) on each
  state's series of each replica; a type's start counts as unequilibrated when some state drifts
  (:func:`dihedra.numerics.convergence.equilibration`); its t0 is then the latest such start;
* **replicas**: a chi-square test of the replicas' populations of each state, each replica with its
  own autocorrelation-aware error; the type's p-value is the smallest over its states times their
  number (Bonferroni): ``agree`` from :data:`AGREE_P` up, ``disagree`` below :data:`DISAGREE_P`,
  ``tension`` between;
* **forecast**: from the statistical inefficiency (Chodera, Swope, Pitera, Seok & Dill, J. Chem.
  Theory Comput. 3 (2007) 26), error ~ sqrt(g var / N): the simulated time (and replicas of the
  present length) for a target standard error of every population, and of every free-energy
  difference to the type's most populated state (states of at least :data:`DG_MIN_POPULATION`);
* **over time**: populations of growing prefixes (forward) and shrinking suffixes (backward).

Errors here are those of each type's series (mean over its torsions), so they also account for
torsions of one type that move together; ``populations_by_type.csv`` pools per-torsion blocking
errors as independent, with the spread between torsions that differ (which more sampling does not
shrink: it is no part of the forecasts here). The two errors of one population can therefore
differ.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from ..errors import DihedraError
from ..numerics.convergence import (DRIFT_SHIFT_SE, DRIFT_Z, MIN_START_SAMPLES, combine_errors, equilibration,
                                    replica_chi_square, series_error, series_errors, time_needed)
from ..numerics.populations import MIN_EFFECTIVE_SAMPLES
from ..units import R_KJ_PER_MOL_K
from .timeblocks import result_time_blocks

#: Bonferroni-adjusted p-values of the replica test: agree from here up ...
AGREE_P = 0.05
#: ... disagree below this one, tension between.
DISAGREE_P = 0.001
#: Free-energy differences are forecast for states with at least this population.
DG_MIN_POPULATION = 0.01
#: Default target standard error of a population (a fraction).
TARGET_ERROR = 0.01
#: Default target standard error of a free-energy difference (kJ/mol).
TARGET_ERROR_KJ_MOL = 0.5

#: The files of a convergence result (attribute -> file name).
FILES = {"convergence": "convergence.csv", "by_state": "convergence_by_state.csv",
         "over_time": "convergence_over_time.csv"}

METHODS = {
    "start": "equilibration detection, t0 maximising the effectively uncorrelated samples after it "
             "(Chodera, J. Chem. Theory Comput. 12 (2016) 1799), per state and replica",
    "replicas": "chi-square test of the replicas' populations, each with its own error from the statistical "
                "inefficiency; Bonferroni over the states of a type",
    "errors": "statistical inefficiency of each type's time-block series (Chodera, Swope, Pitera, Seok & Dill, "
              "J. Chem. Theory Comput. 3 (2007) 26): se = sqrt(g var / N)",
    "forecast": "simulated time x (error / target)^2",
}


@dataclass
class Convergence:
    """Convergence tables of a run (see the module notes).

    Attributes
    ----------
    convergence : DataFrame
        One row per type: start (``t0_ps``, ``t0_frames``, ``start``), replicas (``replicas``,
        ``replica_chi2``, ``replica_dof``, ``replica_p_value``), errors and forecasts, ``verdict``.
    by_state : DataFrame
        One row per type and state: population, error, inefficiency, start test, replica test,
        forecasts.
    over_time : DataFrame
        Forward and backward populations with their errors.
    run : dict
        The run as a whole: ``t0_ps`` (latest unequilibrated start over the types, 0 if none),
        ``t0_frames`` per replica, ``types_with_drift``.
    notices, parameters
    """

    convergence: pd.DataFrame
    by_state: pd.DataFrame
    over_time: pd.DataFrame
    run: dict
    notices: list = field(default_factory=list)
    parameters: dict = field(default_factory=dict)

    def tables(self):
        """{file name: table} of the result (see :data:`FILES`)."""
        return {name: getattr(self, attr) for attr, name in FILES.items()}

    def record(self):
        """What ``convergence.json`` holds: parameters, methods, the run's start, notices."""
        return {"parameters": self.parameters, "methods": METHODS, "run": self.run, "notices": list(self.notices)}

    def summary(self):
        """The run's start and the verdict of every type (for ``summary.json``)."""
        t = self.convergence
        return {"t0_ps": self.run["t0_ps"], "types_with_drift": self.run["types_with_drift"],
                "verdicts": dict(zip(t["type"], t["verdict"])) if len(t) else {},
                "replicas": dict(zip(t["type"], t["replicas"])) if len(t) else {}}

    def run_notices(self, discard=None):
        """The notices of a tracking run: those of :attr:`notices`, the one on an unequilibrated
        start worded for a run whose start was already dropped (``discard``: the record of
        :func:`dihedra.trajectory.discard.plan_discard`)."""
        if not discard or not self.run["types_with_drift"]:
            return list(self.notices)
        dropped = ", ".join(human_time(x) for x in dict.fromkeys(discard["discarded_ps"]))
        return [f"after discarding {dropped} ({discard['requested']}), the start still looks unequilibrated for "
                f"{len(self.run['types_with_drift'])} torsion type(s) (e.g. {self.run['types_with_drift'][0]}), "
                f"until {human_time(self.run['t0_ps'])} later: the run may be too short to equilibrate; see "
                "convergence.csv." if n.startswith("the start of the run") else n for n in self.notices]


def check_targets(target_error, target_error_kj_mol):
    """A target population error in (0, 1) and a positive target free-energy error, or an error."""
    try:
        ok = 0 < float(target_error) < 1
    except (TypeError, ValueError):
        ok = False
    if not ok:
        raise DihedraError(f"target_error is a standard error of a population, a fraction between 0 and 1 "
                           f"(e.g. 0.01); got {target_error!r}.")
    try:
        ok = float(target_error_kj_mol) > 0 and math.isfinite(float(target_error_kj_mol))
    except (TypeError, ValueError):
        ok = False
    if not ok:
        raise DihedraError(f"target_error_kj_mol must be a positive number of kJ/mol (e.g. 0.5); got "
                           f"{target_error_kj_mol!r}.")


def times_known(replicas):
    """Whether every replica (the run summary's records) has a usable time step (true for none)."""
    return all(r.get("time_step_known", True) for r in replicas or [])


def convergence_tables(result, *, target_error=TARGET_ERROR, target_error_kj_mol=TARGET_ERROR_KJ_MOL,
                       temperature_k=None, n_time_blocks=500, n_points=10, time_step_known=None):
    """Convergence of the populations of every torsion type of ``result`` (see the module notes).

    Parameters
    ----------
    result : TrackResult
        With the state time series.
    target_error : float
        Target standard error of a population (fraction).
    target_error_kj_mol : float
        Target standard error of a free-energy difference between states (kJ/mol).
    temperature_k : float, optional
        For the free-energy forecast (default: the run's recorded temperature; without one that
        forecast is left out).
    n_time_blocks : int
        Time blocks per replica for the series.
    n_points : int
        Prefixes (and suffixes) of the forward and backward populations.
    time_step_known : bool, optional
        Whether the frames have physical times (default: as the run's summary records for every
        replica; true when it records none). Without them the forecasts say how much more sampling
        as a multiple of the run, not as a time.

    Returns
    -------
    Convergence
    """
    check_targets(target_error, target_error_kj_mol)
    if isinstance(n_time_blocks, bool) or not float(n_time_blocks).is_integer() or n_time_blocks < MIN_EFFECTIVE_SAMPLES:
        raise DihedraError(f"n_time_blocks must be a whole number of at least {MIN_EFFECTIVE_SAMPLES} (a verdict needs "
                           f"{MIN_EFFECTIVE_SAMPLES} effective samples, and fewer blocks cannot hold them); got "
                           f"{n_time_blocks!r}.")
    if not result.has_series("states"):
        raise DihedraError("the convergence checks need the state time series; this result has none (track with "
                           "keep_states=True, the default).")
    tb = result_time_blocks(result, n_time_blocks)
    time_known = bool(times_known(result.summary.get("replicas")) if time_step_known is None else time_step_known)
    temperature_k = temperature_k if temperature_k is not None else result.summary.get("temperature_k")
    kt = None if temperature_k is None else R_KJ_PER_MOL_K * float(temperature_k)
    rows, state_rows, time_rows = [], [], []
    own = _own_states(result.scheme, tb)
    frozen = frozen_types(result)
    for k, name in enumerate(tb.types):
        typ = _TypeSeries(tb, k, time_known, states=own.get(name), frozen=name in frozen)
        row, states = typ.summary(target_error, target_error_kj_mol, kt)
        rows.append(row)
        state_rows.extend(states)
        time_rows.extend(typ.over_time(n_points))
    table = pd.DataFrame(rows)
    run = _run_start(table, tb)
    parameters = {"target_error": float(target_error), "target_error_kj_mol": float(target_error_kj_mol),
                  "temperature_k": temperature_k, "n_time_blocks": int(n_time_blocks), "n_points": int(n_points),
                  "thresholds": {"drift_z": DRIFT_Z, "drift_shift_se": DRIFT_SHIFT_SE,
                                 "min_start_samples": MIN_START_SAMPLES, "agree_p": AGREE_P,
                                 "disagree_p": DISAGREE_P, "min_effective_samples": MIN_EFFECTIVE_SAMPLES,
                                 "dg_min_population": DG_MIN_POPULATION}}
    return Convergence(convergence=table, by_state=pd.DataFrame(state_rows), over_time=pd.DataFrame(time_rows),
                       run=run, notices=_notices(table, run), parameters=parameters)


class _TypeSeries:
    """The time-block series of one type in every replica: fractions (n_blocks, n_states)."""

    def __init__(self, tb, k, time_known=True, states=None, frozen=False):
        self.time_known = time_known
        # (a set of schemes: only the states of the type's own part; the others are never entered)
        own = np.arange(len(tb.states)) if states is None else np.asarray(states, dtype=np.intp)
        self.name, self.states = tb.types[k], [tb.states[i] for i in own]
        self.frozen = bool(frozen)
        self.n_torsions = int(tb.n_torsions[k])
        self.parts = []
        for rb in tb.replicas:
            counts = rb.counts[:, k, own]
            valid = counts.sum(axis=1)
            keep = valid > 0
            self.parts.append(dict(replica=rb.replica, counts=counts[keep], valid=valid[keep],
                                   x=counts[keep] / valid[keep, None], first=rb.first[keep],
                                   time=rb.time_ps[keep], frames=rb.frames[keep], interval=rb.interval_ps,
                                   simulated=rb.simulated_ps))
        counts = sum(p["counts"].sum(axis=0) for p in self.parts)
        total = float(counts.sum())
        self.population = counts / total if total > 0 else np.full(len(self.states), np.nan)
        self.simulated = float(sum(p["simulated"] for p in self.parts))

    def floor(self, part, p):
        """Variance floor of a block fraction (``p`` a number or one per state): independent
        torsion-frames with the pooled population."""
        if "per_block" not in part:
            part["per_block"] = (self.n_torsions * max(1.0, float(np.mean(part["frames"])))
                                 if len(part["frames"]) else 1.0)
        return p * (1.0 - p) / part["per_block"]

    def replica_arrays(self, rows=None):
        """Over ``rows`` of the blocks of each replica that has samples there: mean, se and g of
        every state (replicas x states) and the blocks and weights of each replica."""
        n_s = len(self.states)
        mean, se, g, blocks, weight = [], [], [], [], []
        for part in self.parts:
            sel = slice(None) if rows is None else rows(len(part["valid"]))
            c, v = part["counts"][sel], part["valid"][sel]
            if not len(v) or v.sum() <= 0:
                continue
            _, e, gg = series_errors(part["x"][sel], self.floor(part, self.population))
            mean.append(c.sum(axis=0) / v.sum())
            se.append(e)
            g.append(gg)
            blocks.append(len(v))
            weight.append(float(v.sum()))
        shaped = [np.asarray(a, dtype=float).reshape(-1, n_s) for a in (mean, se, g)]
        return (*shaped, np.asarray(blocks, dtype=np.int64), np.asarray(weight, dtype=float))

    def replica_stats(self, rows=None):
        """Per state, per replica: (mean, se, g, n_blocks, weight) over ``rows`` of its blocks."""
        mean, se, g, blocks, weight = self.replica_arrays(rows)
        return [[(float(mean[r, s]), float(se[r, s]), float(g[r, s]), int(blocks[r]), float(weight[r]))
                 for r in range(len(weight))] for s in range(len(self.states))]

    def summary(self, target, target_kj, kt):
        """The row of the type and its rows per state."""
        whole = self.replica_stats()
        states = [self._state(s, whole[s], target, target_kj, kt) for s in range(len(self.states))]
        one = len(self.states) == 1   # (a scheme of one state, a symmetric rotor: frozen by definition)
        if self.frozen:   # (a constant series: its errors would be the floor's, not the run's)
            for r in states:
                r.update(population_err=np.nan, n_effective=np.nan, time_needed_ps=np.nan, dg_err_kj_mol=np.nan,
                         dg_time_needed_ps=np.nan)
        # the start test flags a drift only with MIN_START_SAMPLES effective samples after t0: a replica
        # of fewer time blocks than that (a single frame, a few frames) leaves it untestable (a scheme of
        # one state is stationary by definition)
        testable = one or any(len(p["valid"]) > MIN_START_SAMPLES for p in self.parts)
        if not testable:
            for r in states:
                r.update(t0_ps=np.nan, t0_frames=np.nan, drift_z=np.nan, drift_shift_se=np.nan)
        start = _type_start(states) if testable else dict(UNTESTABLE_START)
        replicas = _type_replicas(states, len(self.parts))
        sampled = [r for r in states if r["population"] > 0]
        worst = max(sampled, key=lambda r: r["population_err"]) if sampled and not self.frozen else None
        dg = [r for r in states if np.isfinite(r.get("dg_err_kj_mol", np.nan))]
        worst_dg = max(dg, key=lambda r: r["dg_err_kj_mol"]) if dg else None
        row = {"type": self.name, "n_torsions": self.n_torsions, "n_replicas": len(self.parts),
               "n_frames": int(sum(int(p["frames"].sum()) for p in self.parts)), "n_states": len(self.states),
               "simulated_time_ps": self.simulated, **start, **replicas,
               "n_effective": min((r["n_effective"] for r in sampled), default=np.nan),
               "population_err_max": worst["population_err"] if worst else np.nan,
               "worst_state": worst["state"] if worst else "",
               "target_error": float(target),
               "time_needed_ps": worst["time_needed_ps"] if worst else np.nan,
               "replicas_needed": self._replicas_needed(worst["time_needed_ps"]) if worst else np.nan,
               "state_changes_seen": not self.frozen,
               "forecast": _forecast(worst["population_err"], target, worst["time_needed_ps"], self.simulated,
                                     self._replicas_needed(worst["time_needed_ps"]), self.time_known)
                           if worst else (ONE_STATE if one and sampled else NO_CHANGES if self.frozen else "no data"),
               "dg_err_max_kj_mol": worst_dg["dg_err_kj_mol"] if worst_dg else np.nan,
               "target_error_kj_mol": float(target_kj),
               "dg_time_needed_ps": worst_dg["dg_time_needed_ps"] if worst_dg else np.nan,
               "dg_forecast": (_forecast(worst_dg["dg_err_kj_mol"], target_kj, worst_dg["dg_time_needed_ps"],
                                         self.simulated, self._replicas_needed(worst_dg["dg_time_needed_ps"]),
                                         self.time_known)
                               if worst_dg else (ONE_STATE if one and sampled else NO_CHANGES if self.frozen else
                                                 "no temperature" if kt is None else "no second state"))}
        row = {"type": row.pop("type"), "verdict": _verdict(row, states, self.states), **row}
        return row, [{"type": self.name, **r} for r in states]

    def _replicas_needed(self, needed_ps):
        per = self.simulated / max(1, len(self.parts))
        return float(math.ceil(needed_ps / per - 1e-9)) if per > 0 and np.isfinite(needed_ps) else np.nan

    def _state(self, s, stats, target, target_kj, kt):
        """The row of one state (``stats``: its :meth:`replica_stats`): population and error,
        start test, replica test, forecasts."""
        p = float(self.population[s])
        se = combine_errors([x[1] for x in stats], [x[4] for x in stats]) if stats else np.nan
        starts = [(part, equilibration(part["x"][:, s], self.floor(part, p))) for part in self.parts
                  if len(part["valid"])]
        drift = [(part, st) for part, st in starts if st.drifts]
        top = max(drift or starts, key=lambda ps: ps[1].z, default=(None, None))[1]
        t0_ps = max((part["time"][st.t0] for part, st in drift), default=0.0)
        t0_frames = max((int(part["first"][st.t0]) for part, st in drift), default=0)
        chi2, dof, pval = replica_chi_square([x[0] for x in stats], [x[1] for x in stats])
        needed = time_needed(se, target, self.simulated) if p > 0 and np.isfinite(se) else np.nan
        row = {"state": self.states[s], "population": p, "population_err": se,
               "g_blocks": max((x[2] for x in stats), default=np.nan),
               "n_effective": float(sum(x[3] / x[2] for x in stats)) if stats else 0.0,
               "t0_ps": float(t0_ps), "t0_frames": t0_frames, "drifts": bool(drift),
               "drift_z": float(top.z) if top else 0.0, "drift_shift_se": float(top.shift_se) if top else 0.0,
               "mean_before_t0": float(top.before) if top and drift else np.nan,
               "mean_after_t0": float(top.after) if top and drift else np.nan,
               "replica_populations": " ".join(f"{x[0]:.4f}" for x in stats),
               "replica_chi2": chi2, "replica_dof": dof, "replica_p_value": pval,
               "time_needed_ps": needed}
        row.update(self._dg(s, target_kj, kt))
        return row

    def _dg(self, s, target_kj, kt):
        """Free-energy difference of state ``s`` to the most populated one, its error and forecast."""
        none = {"reference_state": "", "dg_kj_mol": np.nan, "dg_err_kj_mol": np.nan, "dg_time_needed_ps": np.nan}
        pops = self.population
        if kt is None or not np.all(np.isfinite(pops)):
            return none
        ref = int(np.argmax(pops))
        p, q = float(pops[s]), float(pops[ref])
        if s == ref or p < DG_MIN_POPULATION:
            return none
        errs, weights = [], []
        for part in self.parts:
            if not len(part["valid"]):
                continue
            y = part["x"][:, s] / p - part["x"][:, ref] / q
            floor = self.floor(part, p) / p ** 2 + self.floor(part, q) / q ** 2
            errs.append(series_error(y, floor)[1])
            weights.append(float(part["valid"].sum()))
        err = kt * combine_errors(errs, weights)
        return {"reference_state": self.states[ref], "dg_kj_mol": -kt * math.log(p / q), "dg_err_kj_mol": err,
                "dg_time_needed_ps": time_needed(err, target_kj, self.simulated)}

    def over_time(self, n_points):
        """Forward (growing prefixes) and backward (shrinking suffixes) populations of every state."""
        rows = []
        for direction in ("forward", "backward"):
            for j in range(1, int(n_points) + 1):
                f = j / int(n_points)

                def pick(n, f=f, direction=direction):
                    m = max(1, int(round(f * n)))
                    return slice(0, m) if direction == "forward" else slice(n - m, n)
                spans = [_span_of(part, pick(len(part["valid"]))) for part in self.parts if len(part["valid"])]
                mean, se, _, _, w = self.replica_arrays(pick)
                if not len(w):
                    continue
                # the replicas' weighted mean and the error of it (combine_errors, every state at once)
                population = (w @ mean) / w.sum()
                error = np.sqrt(np.sum((w / w.sum())[:, None] ** 2 * se ** 2, axis=0))
                span = (float(np.mean([a for a, _ in spans])), float(np.mean([b for _, b in spans])))
                for k, state in enumerate(self.states):
                    rows.append({"type": self.name, "state": state, "direction": direction, "fraction": f,
                                 "from_ps": span[0], "to_ps": span[1], "population": float(population[k]),
                                 "population_err": float(error[k])})
        return rows


#: The forecast of a type whose torsions never changed state.
NO_CHANGES = "none possible: no torsion of this type changed state"
#: The forecast of a type whose scheme has one state (a symmetric rotor): its population is 1.
ONE_STATE = "none needed: one state, population 1 by definition"


def _own_states(scheme, tb):
    """{type: positions in ``tb.states`` of the states of its own part} for a set of schemes (each
    type follows one part); empty for a single scheme (every type has every state)."""
    if scheme is None or len(scheme.coded_parts()) == 1:
        return {}
    index = {label: i for i, label in enumerate(tb.states)}
    return {t: [index[label] for label in scheme.states_of_type(t)] for t in tb.types}


#: A torsion that spent fewer frames than this outside one state in a replica (momentary excursions
#: at most) counts as having stayed in it: the populations it gives are not sampled ones.
MIN_EXCURSION_FRAMES = 3
#: ... and fewer than this fraction of its frames (two frames of ten are a visit).
MAX_EXCURSION_FRACTION = 0.02


def frozen_types(result):
    """The types none of whose torsions changed state in any replica: every torsion spent all its
    (defined) frames of each replica in one state, but for excursions of fewer than
    :data:`MIN_EXCURSION_FRAMES` frames in all, and under :data:`MAX_EXCURSION_FRACTION` of them
    (from the populations per replica; in a weighted run, whose sums are not frames, without any
    excursion)."""
    table = getattr(result, "populations_by_replica", None)
    if table is None or not len(table):
        return set()
    table = table[table["n_samples"] > 0]
    top = table.groupby(["type", "replica", "torsion"], sort=False)[["population", "n_samples"]].max()
    frames = top["n_samples"].to_numpy(dtype=float)
    if np.all(frames == np.round(frames)):   # (frame counts; a weighted run's sums are not frames)
        outside = (1.0 - top["population"]) * top["n_samples"]
        stuck = (outside < MIN_EXCURSION_FRAMES - 0.5) & (outside < MAX_EXCURSION_FRACTION * top["n_samples"])
    else:
        stuck = top["population"] >= 1.0
    stuck = stuck.groupby(level="type", sort=False).all()
    return set(stuck.index[stuck.to_numpy()])


def _span_of(part, rows):
    """(from, to) in ps of the blocks ``rows`` of a replica (to: the end of the last frame)."""
    first = part["first"][rows]
    frames = part["frames"][rows]
    if not len(first):
        return np.nan, np.nan
    return float(first[0] * part["interval"]), float((first[-1] + frames[-1]) * part["interval"])


#: The start of a type whose replicas are too short for the start test (at most MIN_START_SAMPLES
#: time blocks each: a drift could not be flagged, so the start is not called equilibrated).
UNTESTABLE_START = {"t0_ps": np.nan, "t0_frames": np.nan, "start": "not testable", "drift_z": np.nan,
                    "drift_state": ""}


def _type_start(states):
    """The start of a type: the latest unequilibrated start over its states (0 if none)."""
    drift = [r for r in states if r["drifts"]]
    if not drift:
        top = max(states, key=lambda r: r["drift_z"], default=None)
        return {"t0_ps": 0.0, "t0_frames": 0, "start": "equilibrated",
                "drift_z": top["drift_z"] if top else 0.0, "drift_state": ""}
    top = max(drift, key=lambda r: r["t0_ps"])
    return {"t0_ps": top["t0_ps"], "t0_frames": max(r["t0_frames"] for r in drift), "start": "drifts",
            "drift_z": top["drift_z"], "drift_state": top["state"]}


def _type_replicas(states, n_replicas):
    """Replica verdict of a type from the chi-square test of each state (Bonferroni)."""
    if n_replicas < 2:
        return {"replicas": "one replica", "replica_chi2": np.nan, "replica_dof": 0, "replica_p_value": np.nan,
                "replica_state": ""}
    tested = [r for r in states if 0 < r["population"] < 1] or states
    top = min(tested, key=lambda r: r["replica_p_value"])
    p_adj = min(1.0, top["replica_p_value"] * len(tested))
    verdict = "agree" if p_adj >= AGREE_P else ("disagree" if p_adj < DISAGREE_P else "tension")
    return {"replicas": verdict, "replica_chi2": top["replica_chi2"], "replica_dof": top["replica_dof"],
            "replica_p_value": p_adj, "replica_state": top["state"]}


def _verdict(row, states, labels):
    """``converged`` or ``not converged: <reasons>`` in plain words."""
    reasons = []
    if row["n_frames"] <= row["n_replicas"]:
        return "not converged: one frame per replica, nothing to judge convergence by"
    if not row["state_changes_seen"] and row["n_states"] > 1:
        reasons.append(f"no torsion of this type changed state in the run (each stayed in the state it started "
                       f"in, but for excursions of fewer than {MIN_EXCURSION_FRAMES} frames): its populations are "
                       "those of the starting structures, and their errors and the sampling still needed cannot be "
                       "estimated from it")
    if row["start"] == "not testable":
        reasons.append(f"start not testable (every replica has at most {MIN_START_SAMPLES} frames)")
    if row["start"] == "drifts":
        st = next(r for r in states if r["state"] == row["drift_state"])
        reasons.append(f"the first {human_time(row['t0_ps'])} are not equilibrated ({st['state']} "
                       f"{st['mean_before_t0']:.2f} before, {st['mean_after_t0']:.2f} after; discard them)")
    if row["replicas"] == "disagree":
        st = next(r for r in states if r["state"] == row["replica_state"])
        reasons.append(f"the replicas disagree ({st['state']}: {', '.join(st['replica_populations'].split())}; "
                       f"chi-square p = {row['replica_p_value']:.1g})")
    if np.isfinite(row["n_effective"]) and row["n_effective"] < MIN_EFFECTIVE_SAMPLES:
        reasons.append(f"fewer than {MIN_EFFECTIVE_SAMPLES} effective samples ({row['n_effective']:.3g}: the run "
                       "holds about that many independent stretches of this type's population series, whatever "
                       "its number of torsions, and an error bar from so few is itself uncertain by more than "
                       "about 15 %)")
    if np.isfinite(row["population_err_max"]) and row["population_err_max"] > row["target_error"]:
        reasons.append(f"population error {row['population_err_max']:.3f} above the target {row['target_error']:g}: "
                       f"{row['forecast']}")
    if not np.isfinite(row["population_err_max"]) and row["state_changes_seen"]:
        reasons.append("no frames with this type defined")
    return "converged" if not reasons else "not converged: " + "; ".join(reasons)


def _forecast(err, target, needed_ps, simulated_ps, replicas, time_known=True):
    """The forecast as text: the time still needed, or, where the frames have no physical time
    (``time_known`` false: MDAnalysis' 1 ps per frame), the same as a multiple of the run."""
    if not np.isfinite(err):
        return "no data"
    if err <= target:
        return "already reached"
    if not (np.isfinite(needed_ps) and np.isfinite(replicas)) or simulated_ps <= 0:
        return "more sampling (no forecast: the run has no usable time step)"
    if not time_known:
        return (f"about {needed_ps / simulated_ps:.3g} times as much sampling as analysed, in all, or {int(replicas)} "
                "replicas of this length (the trajectory has no usable time step to say how long; --dt-ps "
                "gives one)")
    return (f"about {human_time(needed_ps - simulated_ps)} more ({human_time(needed_ps)} in all, or "
            f"{int(replicas)} replicas of this length)")


def human_time(ps):
    """A time in ps as text in ps, ns or microseconds (3 significant digits)."""
    ps = float(ps)
    if abs(ps) >= 1e6:
        return f"{ps / 1e6:.3g} µs"
    if abs(ps) >= 1e3:
        return f"{ps / 1e3:.3g} ns"
    return f"{ps:.3g} ps"


def _run_start(table, tb):
    """The run's start: the latest unequilibrated start over the types, in ps and per replica in frames."""
    drift = table[table["start"] == "drifts"] if len(table) else table
    t0 = float(drift["t0_ps"].max()) if len(drift) else 0.0
    frames = {int(rb.replica): int(math.ceil(t0 / rb.interval_ps - 1e-9)) if rb.interval_ps > 0 else 0
              for rb in tb.replicas}
    return {"t0_ps": t0, "t0_frames": frames, "types_with_drift": list(drift["type"]) if len(drift) else []}


def _notices(table, run):
    notes = []
    if run["types_with_drift"]:
        first = table[table["type"] == run["types_with_drift"][0]].iloc[0]
        notes.append(f"the start of the run looks unequilibrated for {len(run['types_with_drift'])} torsion type(s) "
                     f"(e.g. {first['type']}, {first['drift_state']}); the suggested start is t0 = "
                     f"{human_time(run['t0_ps'])} ({max(run['t0_frames'].values())} frames): rerun with "
                     "--discard auto (discard='auto' in Python) to drop it everywhere.")
    bad = table[table["replicas"] == "disagree"] if len(table) else table
    if len(bad):
        notes.append(f"the replicas disagree for {len(bad)} torsion type(s) (e.g. {bad['type'].iloc[0]}): they sample "
                     "different populations, so the pooled populations are not converged; see convergence.csv.")
    return notes
