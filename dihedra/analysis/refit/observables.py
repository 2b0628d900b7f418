r"""The observables a correction is fitted to and reported on, as ratios of weighted sums over the
samples (:class:`~dihedra.analysis.refit.fit.ObservableSet`).

* populations: per type (or torsion label) and state (or ``|``-joined states), the weighted
  count of its torsion-frames in the state over the weighted count of its defined ones, for
  every chosen type and state and for every row of a populations target;
* free-energy profiles: per type, the weighted histogram on bins of ``bin_width_deg``, as
  -kT ln(p / width), compared with a profile target up to a constant per type;
* couplings: per measured value, the weighted mean of J(phi) over the torsions its label names
  (a torsion label, a type, or a residue with one chosen torsion), through a Karplus relation.

A target value is fitted only where the run sampled it: at least ``min_count`` torsion-frames in
the bin or state. Targets elsewhere are reported (they lie outside the sampled range, where no
reweighting can reach).
"""

from __future__ import annotations

from functools import partial

import numpy as np
import pandas as pd

from ...errors import DihedraError
from .fit import ObservableSet
from .targets import profile_on_bins


class _Builder:
    """Collects (row, sample, value) entries of a numerator and a denominator."""

    def __init__(self):
        self.num, self.den, self.den_keys = [], [], {}

    def den_row(self, key, samples, positions):
        """The denominator row of a set of torsions (made once per set)."""
        if key not in self.den_keys:
            row = len(self.den_keys)
            self.den_keys[key] = row
            for k in positions:
                defined = np.isfinite(samples.angles[k])
                self.den.append((np.full(int(defined.sum()), row), samples.sample_index(k)[defined],
                                 np.ones(int(defined.sum()))))
        return self.den_keys[key]

    def add(self, rows, cols, values):
        self.num.append((np.asarray(rows), np.asarray(cols), np.asarray(values, dtype=float)))

    def matrices(self, n_obs, n_samples):
        from scipy.sparse import csr_matrix

        def build(parts, n_rows):
            if not parts:
                return csr_matrix((n_rows, n_samples)), np.zeros(n_rows)
            r, c, v = (np.concatenate(x) for x in zip(*parts))
            return csr_matrix((v, (r, c)), shape=(n_rows, n_samples)), np.bincount(r, minlength=n_rows)

        numerator, counts = build(self.num, n_obs)
        denominator, _ = build(self.den, max(1, len(self.den_keys)))
        return numerator, denominator, counts


def _torsions_of(samples, where):
    """Positions (within the samples) of the torsions of a type or a torsion label."""
    if where in samples.type_names:
        return [k for k, t in enumerate(samples.types) if t == where]
    if where in samples.labels:
        return [samples.labels.index(where)]
    return []


def mirror_states(scheme):
    """The mirror image of every state (phi -> -phi) of a scheme, as label -> label, for the states
    whose arcs map onto the arcs of one state (itself, as anti, or another, as gauche+ and
    gauche-); {} for a scheme that cannot say. Found on a grid of 0.1-degree cells, symmetric about
    0, by the scheme's own assignment."""
    try:
        labels = list(scheme.labels)
        grid = -180.0 + (np.arange(3600) + 0.5) * 0.1
        codes = np.asarray(scheme.assign(grid), dtype=int)
    except (AttributeError, TypeError, ValueError):
        return {}
    mirrored = codes[::-1]   # the code at -phi of every cell
    out = {}
    for code, label in enumerate(labels):
        mine = codes == code
        images = set(mirrored[mine].tolist())
        if mine.any() and len(images) == 1:
            image = images.pop()
            if 0 <= image < len(labels) and int(np.count_nonzero(codes == image)) == int(np.count_nonzero(mine)):
                out[label] = labels[image]
    return out


def _mirror_rows(rows, samples, scheme):
    """Index of the mirror row of every (where, state) row (-1 where there is none): the same type
    or torsion, every state (of ``a|b``) replaced by its mirror image in the scheme of its type."""
    index = {(where, frozenset(state.split("|"))): k for k, (where, state) in enumerate(rows)}
    maps = {}
    out = np.full(len(rows), -1, dtype=np.int64)
    for k, (where, state) in enumerate(rows):
        positions = _torsions_of(samples, where)
        kind = samples.types[positions[0]] if positions else None
        if kind not in maps:
            maps[kind] = mirror_states(scheme.for_type(kind) if hasattr(scheme, "for_type") else scheme)
        mirror, parts = maps[kind], state.split("|")
        if all(p in mirror for p in parts):
            out[k] = index.get((where, frozenset(mirror[p] for p in parts)), -1)
    return out


def population_set(samples, scheme, target=None, min_count=50, notices=None):
    """Populations of every chosen type and state, and of every row of a populations target."""
    notices = [] if notices is None else notices
    labels = list(scheme.labels)
    rows = [(t, s) for t in samples.type_names for s in labels]
    goal = {}
    if target is not None:
        for r in target.table.itertuples(index=False):
            parts = [p.strip() for p in str(r.state).split("|")]
            unknown = [p for p in parts if p not in labels]
            if unknown:
                raise DihedraError(f"target state {unknown[0]!r} is not a state of the scheme {scheme.name} "
                                   f"({', '.join(labels)}); join several with '|' for their sum.")
            if not _torsions_of(samples, r.type):
                notices.append(f"the target row {r.type} / {r.state} names no torsion or type being corrected; "
                               "it was left out (add its type to types).")
                continue
            key = (r.type, "|".join(parts))
            goal[key] = (float(r.population), float(r.population_err))
            if key not in rows:
                rows.append(key)
    codes = [scheme.assign(samples.angles[k]) for k in range(len(samples.labels))]
    b = _Builder()
    den_index = []
    for row, (where, state) in enumerate(rows):
        positions = _torsions_of(samples, where)
        wanted = [labels.index(p) for p in state.split("|")]
        den_index.append(b.den_row(where, samples, positions))
        for k in positions:
            hit = np.isin(codes[k], wanted)
            b.add(np.full(int(hit.sum()), row), samples.sample_index(k)[hit], np.ones(int(hit.sum())))
    num, den, counts = b.matrices(len(rows), samples.n_samples)
    target_value = np.array([goal.get(k, (np.nan, np.nan))[0] for k in rows])
    target_err = np.array([goal.get(k, (np.nan, np.nan))[1] for k in rows])
    fitted = np.isfinite(target_value) & (counts >= min_count)
    unreachable = np.isfinite(target_value) & ~fitted
    for k in np.flatnonzero(unreachable):
        notices.append(f"target population of {rows[k][0]} / {rows[k][1]} ({target_value[k]:.3f}) lies outside the "
                       f"sampled range: the run has {int(counts[k])} torsion-frame(s) there, so no reweighting can "
                       "reach it; it was not fitted (a new simulation is needed).")
    table = pd.DataFrame({"type": [r[0] for r in rows], "state": [r[1] for r in rows]})
    return ObservableSet("population", num, den, np.asarray(den_index), target_value, target_err,
                         np.zeros(len(rows)), counts, fitted=fitted, rows=table,
                         mirror=_mirror_rows(rows, samples, scheme))


def profile_set(samples, bin_width_deg, kt, target=None, min_count=50, notices=None):
    """Free-energy profiles of every chosen type on bins of ``bin_width_deg``."""
    notices = [] if notices is None else notices
    n_bins = int(round(360.0 / bin_width_deg))
    edges = np.linspace(-180.0, 180.0, n_bins + 1)
    centres = 0.5 * (edges[1:] + edges[:-1])
    n_types = len(samples.type_names)
    b = _Builder()
    for t, name in enumerate(samples.type_names):
        b.den_row(name, samples, np.flatnonzero(samples.type_index == t))
    for k in range(len(samples.labels)):
        t = int(samples.type_index[k])
        phi = samples.angles[k]
        defined = np.isfinite(phi)
        bins = np.clip(np.searchsorted(edges, phi[defined], side="left") - 1, 0, n_bins - 1)
        b.add(t * n_bins + bins, samples.sample_index(k)[defined], np.ones(len(bins)))
    num, den, counts = b.matrices(n_types * n_bins, samples.n_samples)
    den_of_type = np.array([b.den_keys[t] for t in samples.type_names])
    target_value = np.full(n_types * n_bins, np.nan)
    target_err = np.full(n_types * n_bins, np.nan)
    points = []
    if target is not None:
        table = target.table
        untyped = table["type"].astype(str).str.strip() == ""
        if untyped.any() and n_types > 1:
            raise DihedraError(f"the target profile names no type but {n_types} types are corrected "
                               f"({', '.join(samples.type_names)}); add a type column or choose one type.")
        for t, name in enumerate(samples.type_names):
            rows = table[(table["type"] == name) | untyped]
            if len(rows):
                f, s = profile_on_bins(rows, edges, kt)
                target_value[t * n_bins:(t + 1) * n_bins] = f
                target_err[t * n_bins:(t + 1) * n_bins] = s
                points.append((slice(t * n_bins, (t + 1) * n_bins), rows))
        named = set(table.loc[~untyped, "type"])
        for name in sorted(named - set(samples.type_names)):
            notices.append(f"the target profile of {name} is not fitted: {name} is not among the types corrected.")
    fitted = np.isfinite(target_value) & (counts >= min_count)
    _report_unsampled_bins(samples.type_names, centres, target_value, counts, fitted, kt, bin_width_deg, notices)
    rows = pd.DataFrame({"type": np.repeat(samples.type_names, n_bins), "angle_deg": np.tile(centres, n_types)})
    return ObservableSet("free_energy", num, den, np.repeat(den_of_type, n_bins), target_value, target_err,
                         np.zeros(len(rows)), counts, width_deg=float(bin_width_deg),
                         offset_group=np.repeat(np.arange(n_types), n_bins), fitted=fitted, rows=rows,
                         mirror=(np.arange(n_types)[:, None] * n_bins + np.arange(n_bins)[::-1]).ravel(),
                         point_draw=partial(_drawn_profile, points, edges, kt, len(rows)) if points else None)


def _drawn_profile(points, edges, kt, size, rng):
    """One parametric-bootstrap draw of a profile target on bins: every point of the target
    moved by its error times a standard normal deviate, then binned as the target itself (the
    points, not the bins, carry the stated errors; a bin averages its points nonlinearly)."""
    out = np.full(size, np.nan)
    for where, rows in points:
        energy = rows["free_energy_kj_mol"].to_numpy(float)
        noise = rows["free_energy_err_kj_mol"].to_numpy(float) * rng.standard_normal(len(rows))
        out[where] = profile_on_bins(rows.assign(free_energy_kj_mol=energy + noise), edges, kt)[0]
    return out


def _report_unsampled_bins(types, centres, target, counts, fitted, kt, width, notices):
    """Notices for target bins the run did not sample (with the target's probability there)."""
    n_bins = len(centres)
    for t, name in enumerate(types):
        sl = slice(t * n_bins, (t + 1) * n_bins)
        tgt, miss = target[sl], np.isfinite(target[sl]) & ~fitted[sl]
        if not miss.any():
            continue
        p = np.exp(-(tgt - np.nanmin(tgt)) / kt)
        mass = float(np.nansum(p[miss]) / np.nansum(p))
        spans = _spans(centres[miss], width)
        what = (f"the target profile of {name} has {int(miss.sum())} bin(s) the run did not sample enough "
                f"(fewer than the minimum torsion-frames): {spans}; they hold {mass:.1%} of the target's "
                "probability and were not fitted")
        if mass > 0.01:
            what += ("; reweighting cannot put that probability there (an unsampled barrier or state): a new "
                     "simulation with this correction is needed to check it")
        notices.append(what + ".")


def _spans(centres, width):
    """Bin centres as angle ranges, e.g. '-25 to 25 deg, 155 to 165 deg'."""
    out, start, prev = [], None, None
    for c in np.sort(centres):
        if start is None:
            start = prev = c
        elif c - prev > width * 1.5:
            out.append((start, prev))
            start = c
        prev = c
    if start is not None:
        out.append((start, prev))
    return ", ".join(f"{lo - width / 2:+.0f} to {hi + width / 2:+.0f} deg" for lo, hi in out)


def match_label(labels, types, label):
    """Positions of the torsions a measured coupling's label names (a torsion label, a type, or a
    residue with one torsion among ``labels``), and how it matched."""
    if label in labels:
        return [list(labels).index(label)], "torsion"
    if label in types:
        return [k for k, t in enumerate(types) if t == label], "type"
    residue = [k for k, lab in enumerate(labels) if lab.split(":")[0] == label]
    if len(residue) == 1:
        return residue, "residue"
    if len(residue) > 1:
        return [], f"ambiguous: residue {label} has {len(residue)} corrected torsions; give a torsion label"
    return [], "no corrected torsion, type or residue of that name"


def coupling_values(samples, relation, substituents):
    """J(phi) in Hz of every torsion-frame: array (n_torsions, n_frames) (NaN where undefined)."""
    out = np.empty(samples.angles.shape)
    for k in range(len(samples.labels)):
        subs = [(d, x) for d, x, *_ in substituents[k]] if substituents else ()
        out[k] = relation.evaluate(samples.angles[k].astype(float), subs)
    return out


def coupling_set(samples, target, values, family_values=None, systematic_hz=None, min_count=50, notices=None):
    """Mean couplings of every measured value whose label names corrected torsions.

    ``values`` is :func:`coupling_values` of the relation; ``family_values`` the same for every
    parameter set of a family (their spread on the sampled ensemble is the systematic error), else
    ``systematic_hz`` (None: no systematic error, with a notice).
    """
    notices = [] if notices is None else notices
    b = _Builder()
    rows, den_index, goal, err = [], [], [], []
    for r in target.table.itertuples(index=False):
        positions, how = match_label(samples.labels, samples.types, r.label)
        if not positions:
            notices.append(f"measured coupling {r.label} was left out ({how}).")
            continue
        row = len(rows)
        rows.append({"label": r.label, "matched_as": how, "type": samples.types[positions[0]]})
        den_index.append(b.den_row(tuple(positions), samples, positions))
        for k in positions:
            ok = np.isfinite(values[k])
            b.add(np.full(int(ok.sum()), row), samples.sample_index(k)[ok], values[k][ok])
        goal.append(r.j_exp_hz)
        err.append(r.j_exp_err_hz)
    if not rows:
        raise DihedraError("no measured coupling names a corrected torsion, type or residue; check the labels "
                           f"against torsions.csv (e.g. {samples.labels[0]!r}).")
    num, den, counts = b.matrices(len(rows), samples.n_samples)
    systematic = _systematic(samples, rows, family_values, systematic_hz, notices)
    fitted = counts >= min_count
    return ObservableSet("coupling", num, den, np.asarray(den_index), np.asarray(goal, float), np.asarray(err, float),
                         systematic, counts, fitted=fitted, rows=pd.DataFrame(rows))


def _systematic(samples, rows, family_values, systematic_hz, notices):
    if family_values is not None:
        w = samples.frame_weight
        out = []
        for row in rows:
            positions = match_label(samples.labels, samples.types, row["label"])[0]
            means = [np.nansum(v[positions] * w) / np.sum(np.isfinite(v[positions]) * w) for v in family_values]
            out.append(float(np.std(means, ddof=1)))
        return np.asarray(out)
    if systematic_hz is None:
        notices.append("the Karplus relation gives no systematic spread: the fit weighs the couplings by their "
                       "measured and sampled errors only (relations are commonly good to about 0.5-1 Hz).")
        return np.zeros(len(rows))
    return np.full(len(rows), float(systematic_hz))
