r"""Does the simulation reproduce the static torsion scan? Comparison of profile and scan.

The one-dimensional approximation
---------------------------------
A static scan E(phi) of one molecule predicts, if that torsion moved alone, classically and in
vacuum, the distribution

.. math::  p_{scan}(\phi) \propto \exp(-E(\phi)/k_B T),

so its free-energy profile is E itself up to a constant. The sampled profile F(phi) = -kT ln p(phi)
differs from E for physical reasons -- the environment (solvent, neighbours, packing), coupling to
other torsions and angles, entropy (a relaxed scan follows the lowest path, the simulation
averages over all of them; wells of different widths carry different entropy), nonbonded terms the
scan treats differently -- and for a statistical one, finite sampling. A difference is therefore a
finding to explain, not by itself a force-field error; agreement for a molecule in vacuum with no
other flexible coordinate *is* a test of the torsion term.

Method
------
1. **Grid and prediction.** The sampled histogram profile (:mod:`dihedra.analysis.profiles`) and the
   scan's bin-averaged Boltzmann prediction on the same bins,
   F_scan,k = -kT ln( (1/w) integral over bin k of exp(-E/kT) ) (50 points per bin), so both are
   bin averages; with 5-degree bins this differs from E at the bin centre by less than 0.05
   kJ/mol for usual torsion potentials. The predicted state populations integrate exp(-E/kT) over
   the arcs of the run's state scheme. A result of umbrella windows carries the resamples of their
   own bootstrap (:mod:`dihedra.analysis.profiles.resampled`): its profile and state free energies
   take their errors from them, not from resampled blocks of the weighted histograms.
2. **Reliable region.** A bin is reliable when it was sampled in at least 90 % of the bootstrap
   resamples, its free-energy error sigma is at most ``max_error_kt`` kT (default 0.2 kT) and its
   free energy is at most ``max_free_energy_kt`` kT (default 6 kT) above the minimum: high,
   rarely visited bins have unstable error estimates and are left out.
3. **Offset alignment.** F and F_scan carry arbitrary constants; the offset c minimises
   sum_k w_k (F_k - F_scan,k - c)^2 over the reliable bins with w_k = 1 / max(sigma_k, 0.02 kT)^2
   (precise bins count more; the floor keeps one bin from dominating).
4. **Metrics** over the reliable bins: RMSE and maximum ``|dF|`` of dF = F - F_scan - c; the "excess"
   RMSE sqrt(max(0, RMSE^2 - mean sigma^2)) that noise alone would not give; minima (positions,
   free energies) and barriers (positions, free energies above the global minimum) side by side,
   matched within 30 degrees; sampled (populations.csv) versus predicted state populations with
   z = (p_sampled - p_pred) / sigma_p; state free-energy differences dG = -kT ln(p_B/p_A) against
   the most populated state A, sampled versus predicted (ddG, with the bootstrap error); the
   Jensen-Shannon divergence (base 2, 0 = identical, 1 = disjoint) between the sampled bin
   probabilities and the predicted ones over the whole circle.
5. **Verdict** per type, with the thresholds of :class:`Thresholds`:

   * ``undersampled`` -- a minimum of the scan that holds at least 1 % of the predicted population
     lies outside the reliable region, or fewer than 6 bins are reliable: the data cannot judge.
   * ``inconsistent`` -- the excess RMSE exceeds the tolerance (1.0 kJ/mol), or a state's ddG
     exceeds both the tolerance and 3 times its error.
   * ``consistent`` -- otherwise.

   The tolerance is a practical agreement level (about 0.25 kcal/mol); the 3-sigma condition keeps
   noise from producing an "inconsistent", the tolerance keeps tiny but precisely measured
   differences from doing so.

Example
-------
>>> from dihedra.analysis.compare import compare_with_scan
>>> cmp = compare_with_scan(result, scan, temperature_k=298.15)      # doctest: +SKIP
>>> cmp.table[["type", "rmse_kj_mol", "verdict"]]                    # doctest: +SKIP
>>> cmp.save(folder)           # comparison.csv, ...                # doctest: +SKIP
"""

from __future__ import annotations

import os
from dataclasses import asdict, dataclass, field

import numpy as np
import pandas as pd

from ..errors import DihedraError
from ..io.outputs import file_set
from ..io.tables import json_ready, write_json, write_table
from ..trajectory.result import as_result
from ..units import kt_kj_mol, wrap_deg
from .profiles import (DEFAULT_BIN_WIDTH_DEG, DEFAULT_BOOTSTRAP, DEFAULT_SEED, MIN_RESAMPLED_FRACTION,
                       RESAMPLED_PROBABILITIES, check_estimate_options, has_resamples, resampled_state_free_energies,
                       resampled_type_profile, resolve_temperature, state_blocks, state_free_energies, type_profiles)
from .convergence import sampling_verdicts
from .profiles.features import with_spread_between_torsions
from .reference_populations import add_to_comparison
from .scans import read_scan, scan_features

#: Sub-points per bin for the bin-averaged prediction.
_SUB = 50
#: Scan minima and sampled minima (or barriers) closer than this are matched (degrees).
MATCH_DEG = 30.0


@dataclass(frozen=True)
class Thresholds:
    """Rules of the comparison (see the module notes).

    Attributes
    ----------
    max_free_energy_kt, max_error_kt : float
        A reliable bin has F <= max_free_energy_kt kT and sigma <= max_error_kt kT.
    tolerance_kj_mol : float
        Practical agreement level for the excess RMSE and for state ddG.
    n_sigma : float
        A state ddG must also exceed this many standard errors to count.
    min_minimum_population : float
        Scan minima holding at least this predicted population must lie in the reliable region.
    min_reliable_bins : int
        Fewer reliable bins make the type undersampled.
    """

    max_free_energy_kt: float = 6.0
    max_error_kt: float = 0.2
    tolerance_kj_mol: float = 1.0
    n_sigma: float = 3.0
    min_minimum_population: float = 0.01
    min_reliable_bins: int = 6


@dataclass
class Comparison:
    """Result of :func:`compare_with_scan`.

    Attributes
    ----------
    table : DataFrame
        One row per type, one column per metric, plus ``verdict`` and ``verdict_reason`` (and the
        ``reference_*`` columns after :meth:`add_reference`).
    profiles : DataFrame
        Per type and bin: sampled F with error, aligned scan prediction, difference, reliable.
    details : dict
        Everything (settings, scan, features side by side, states) for comparison.json.
    notices : list of str
    parameters : dict
        The options of the call.
    """

    table: pd.DataFrame
    profiles: pd.DataFrame
    details: dict
    notices: list = field(default_factory=list)
    parameters: dict = field(default_factory=dict)

    def add_reference(self, reference):
        """Merge a comparison with reference populations
        (:func:`~dihedra.analysis.reference_populations.compare_reference_populations`) into this
        one: the columns ``reference_*`` of the table and the section ``reference_populations`` of
        the details. Returns this comparison."""
        self.table = add_to_comparison(self.table, self.details, reference.rows, reference.verdicts,
                                       reference.parameters.get("file"))
        self.notices.extend(reference.notices)
        self.parameters["reference_populations"] = dict(reference.parameters)
        return self

    def save(self, folder):
        """Write comparison.csv, comparison_profiles.csv and comparison.json (with the notices)
        into ``folder`` (atomically); returns the paths."""
        with file_set(folder):   # (all three or none replaced)
            return [write_table(self.table, folder, "comparison.csv"),
                    write_table(self.profiles, folder, "comparison_profiles.csv"),
                    write_json(json_ready(dict(self.details, notices=list(self.notices))), folder,
                               "comparison.json")]


# ----------------------------------------------------------------------------------------------
# Pieces (arrays in, arrays out)
# ----------------------------------------------------------------------------------------------

def predicted_bin_profile(scan, n_bins, kt):
    """Bin-averaged Boltzmann prediction of a scan on ``n_bins`` equal bins of (-180, 180].

    Returns
    -------
    free_energy_kj_mol : ndarray (n_bins,)
        -kT ln of the bin-averaged exp(-E/kT), shifted to minimum 0.
    probability : ndarray (n_bins,)
        Predicted probability of each bin (sums to 1).
    """
    w = 360.0 / n_bins
    x = -180.0 + w * (np.arange(n_bins)[:, None] + (np.arange(_SUB)[None, :] + 0.5) / _SUB)
    boltz = np.exp(-scan.energy_at(x) / kt)
    mean = boltz.mean(axis=1)
    free = -kt * np.log(mean)
    return free - free.min(), mean / mean.sum()


def predicted_state_populations(scan, scheme, kt, n_points=36000):
    """State populations predicted by p ~ exp(-E/kT) under a state scheme (midpoint rule)."""
    x = -180.0 + (np.arange(n_points) + 0.5) * 360.0 / n_points
    boltz = np.exp(-scan.energy_at(x) / kt)
    codes = scheme.assign(x)
    pops = np.bincount(codes, weights=boltz, minlength=scheme.n_states)[:scheme.n_states]
    return pops / pops.sum()


def reliable_bins(profile, kt, thresholds=Thresholds()):
    """Mask of the bins where the sampled profile is reliable (see the module notes)."""
    f = profile.free_energy_kj_mol
    e = profile.free_energy_err_kj_mol
    with np.errstate(invalid="ignore"):
        return (profile.sampled & (profile.boot_valid_fraction >= MIN_RESAMPLED_FRACTION)
                & np.isfinite(f) & np.isfinite(e) & (e <= thresholds.max_error_kt * kt)
                & (f <= thresholds.max_free_energy_kt * kt))


def align_offset(free, predicted, err, mask, kt):
    """Offset c of min sum w (F - F_scan - c)^2 over ``mask``, w = 1 / max(sigma, 0.02 kT)^2."""
    if not mask.any():
        return np.nan
    w = 1.0 / np.maximum(err[mask], 0.02 * kt) ** 2
    return float(np.sum(w * (free[mask] - predicted[mask])) / np.sum(w))


def js_divergence_bits(p, q):
    """Jensen-Shannon divergence (base 2) between two discrete distributions."""
    p = np.asarray(p, dtype=float) / np.sum(p)
    q = np.asarray(q, dtype=float) / np.sum(q)
    m = 0.5 * (p + q)

    def kl(a):
        nz = a > 0
        return float(np.sum(a[nz] * np.log2(a[nz] / m[nz])))

    return 0.5 * kl(p) + 0.5 * kl(q)


def _match(scan_items, sampled_items, key="angle_deg"):
    pairs = []
    for s in scan_items:
        best, dist = None, MATCH_DEG
        for m in sampled_items:
            d = abs(float(wrap_deg(m[key] - s[key]))) if np.isfinite(m[key]) else np.inf
            if d <= dist:
                best, dist = m, d
        pairs.append((s, best))
    return pairs


# ----------------------------------------------------------------------------------------------
# The comparison of a tracking result with one scan
# ----------------------------------------------------------------------------------------------

def select_types(result, types):
    """The types to compare: the one type of the run, the ones named, or all with ``"all"``."""
    known = list(dict.fromkeys(result.torsion_set.types))
    if not types:
        if len(known) == 1:
            return known
        raise DihedraError(f"this run has {len(known)} torsion types ({', '.join(known[:5])}"
                           f"{', ...' if len(known) > 5 else ''}); name the one the scan describes with "
                           "--types TYPE ... (types=[...]), or --types all.")
    if isinstance(types, str):
        types = [types]
    if list(types) == ["all"]:
        return known
    unknown = [t for t in types if t not in known]
    if unknown:
        raise DihedraError(f"torsion type {unknown[0]!r} is not in this run; its types are "
                           f"{', '.join(known[:8])}{', ...' if len(known) > 8 else ''}.")
    return list(dict.fromkeys(types))


def _profile_metrics(prof, scan, kt, thresholds):
    """The sampled profile of one type against the scan's prediction on its bins: the columns of
    comparison_profiles.csv and the profile metrics (before states and verdict)."""
    n_bins = len(prof.angle_deg)
    f_pred, q = predicted_bin_profile(scan, n_bins, kt)
    mask = reliable_bins(prof, kt, thresholds)
    f = prof.free_energy_kj_mol
    err = prof.free_energy_err_kj_mol
    offset = align_offset(f, f_pred, err, mask, kt)
    diff = f - f_pred - offset
    n_rel = int(mask.sum())
    if n_rel:
        rmse = float(np.sqrt(np.mean(diff[mask] ** 2)))
        excess = float(np.sqrt(max(0.0, rmse ** 2 - np.mean(err[mask] ** 2))))
        worst = int(np.flatnonzero(mask)[np.argmax(np.abs(diff[mask]))])
        max_abs, max_at = float(abs(diff[worst])), float(prof.angle_deg[worst])
    else:
        rmse = excess = max_abs = max_at = np.nan
    p_hist = np.where(prof.sampled, prof.samples, 0.0)
    jsd = js_divergence_bits(p_hist, q)
    columns = {"angle_deg": prof.angle_deg, "free_energy_kj_mol": f,
               "free_energy_err_kj_mol": np.where(prof.sampled, err, np.nan), "sampled": prof.sampled,
               "reliable": mask, "scan_free_energy_kj_mol": f_pred + offset if np.isfinite(offset) else f_pred,
               "difference_kj_mol": diff}
    metrics = {"n_reliable_bins": n_rel, "reliable_span_deg": n_rel * 360.0 / n_bins,
               "offset_kj_mol": offset, "rmse_kj_mol": rmse, "excess_rmse_kj_mol": excess,
               "max_abs_difference_kj_mol": max_abs, "max_abs_difference_angle_deg": max_at,
               "js_divergence_bits": jsd}
    return columns, metrics


def _features_side_by_side(prof, kt, mask, s_minima, s_barriers):
    """Minima and barriers of the scan next to the sampled ones matched to them."""
    from .profiles import profile_features

    n_bins = len(prof.angle_deg)
    m_minima, m_barriers = profile_features(prof, kt)
    minima_side = []
    for s, m in _match(s_minima, m_minima):
        in_reliable = bool(mask[int(np.clip(np.floor((s["angle_deg"] + 180.0) / (360.0 / n_bins)), 0, n_bins - 1))])
        minima_side.append({
            "scan_angle_deg": s["angle_deg"], "scan_energy_kj_mol": s["energy_kj_mol"],
            "predicted_population": s["predicted_population"], "in_reliable_region": in_reliable,
            "sampled_angle_deg": m["angle_deg"] if m else None,
            "sampled_angle_err_deg": m["angle_err_deg"] if m else None,
            "sampled_free_energy_kj_mol": m["free_energy_kj_mol"] if m else None,
            "sampled_free_energy_err_kj_mol": m["free_energy_err_kj_mol"] if m else None})
    barriers_side = []
    for s, m in _match(s_barriers, [b for b in m_barriers]):
        barriers_side.append({
            "scan_angle_deg": s["angle_deg"], "scan_energy_kj_mol": s["energy_kj_mol"],
            "sampled_angle_deg": m["angle_deg"] if m else None,
            "sampled_free_energy_kj_mol": m["free_energy_kj_mol"] if m and m["sampled"] else None,
            "sampled_free_energy_err_kj_mol": m["free_energy_err_kj_mol"] if m and m["sampled"] else None,
            "sampled": bool(m["sampled"]) if m else False})
    return minima_side, barriers_side


def _state_rows(t, ctx, kt):
    """Sampled against predicted populations and state free energies of type ``t``; and the
    reference (most populated) state."""
    scheme, pops = ctx["scheme"], ctx["pops"]
    part = scheme.for_type(t)   # the type's own scheme (a set of schemes has several)
    if part not in ctx["pred_pops"]:
        ctx["pred_pops"][part] = predicted_state_populations(ctx["scan"], part, kt)
    pred_pops = ctx["pred_pops"][part]
    own = set(scheme.states_of_type(t))
    if ctx["sc"] is None:   # (umbrella windows: the resamples of their own bootstrap)
        dg_rows = resampled_state_free_energies(ctx["result"], t, kt)
    else:
        dg_rows = state_free_energies(ctx["sc"][:, ctx["members"][t], :].sum(axis=1), ctx["sc_rep"], scheme.labels,
                                      kt, ctx["smult"])
    if dg_rows:   # (errors with the spread between the type's torsions, as the profile gives them)
        dg_rows = with_spread_between_torsions(pd.DataFrame([{**r, "type": t, "torsion": ""} for r in dg_rows]),
                                               ctx["pops"].reset_index(), kt).to_dict("records")
    dg = {r["state"]: r for r in dg_rows}
    ref = dg_rows[0]["reference_state"] if dg_rows else scheme.labels[0]
    ref_k = scheme.labels.index(ref)
    states = []
    for k, label in enumerate(scheme.labels):
        if label not in own:
            continue
        p = float(pops.loc[(t, label), "population"]) if (t, label) in pops.index else np.nan
        pe = float(pops.loc[(t, label), "population_err"]) if (t, label) in pops.index else np.nan
        z = (p - pred_pops[k]) / pe if pe and np.isfinite(pe) and pe > 0 else np.nan
        with np.errstate(divide="ignore", invalid="ignore"):
            dg_pred = float(-kt * np.log(pred_pops[k] / pred_pops[ref_k])) + 0.0
        dg_s = dg.get(label, {}).get("free_energy_kj_mol", np.nan)
        dg_e = dg.get(label, {}).get("free_energy_err_kj_mol", np.nan)
        ddg = dg_s - dg_pred if np.isfinite(dg_s) and np.isfinite(dg_pred) else np.nan
        states.append({"state": label, "population": p, "population_err": pe,
                       "predicted_population": float(pred_pops[k]), "z_score": z,
                       "free_energy_kj_mol": dg_s, "free_energy_err_kj_mol": dg_e,
                       "predicted_free_energy_kj_mol": dg_pred, "ddg_kj_mol": ddg,
                       "reference_state": ref})
    return states, ref


def _verdict(metrics, minima_side, states, ref, thresholds):
    """Verdict and its reason for one type (rules in the module notes)."""
    n_rel, excess = metrics["n_reliable_bins"], metrics["excess_rmse_kj_mol"]
    missing = [m for m in minima_side
               if m["predicted_population"] >= thresholds.min_minimum_population and not m["in_reliable_region"]]
    tol = thresholds.tolerance_kj_mol

    def resolved(s):   # (ddG beyond n_sigma of its error)
        return abs(s["ddg_kj_mol"]) > thresholds.n_sigma * s["free_energy_err_kj_mol"]

    others = [s for s in states if s["state"] != ref and np.isfinite(s["ddg_kj_mol"])]
    bad_states = [s for s in others if abs(s["ddg_kj_mol"]) > tol
                  and (not np.isfinite(s["free_energy_err_kj_mol"]) or resolved(s))]
    if n_rel < thresholds.min_reliable_bins:
        return "undersampled", f"only {n_rel} reliable bins (at least {thresholds.min_reliable_bins} needed)"
    if missing:
        return "undersampled", ("the reliable region misses the scan minimum at "
                                + ", ".join(f"{m['scan_angle_deg']:.0f} deg ({100 * m['predicted_population']:.0f} % "
                                            "predicted)" for m in missing))
    if excess > tol or bad_states:
        parts = []
        if excess > tol:
            parts.append(f"excess RMSE {excess:.2f} kJ/mol > {tol:g}")
        for s in bad_states:
            parts.append(f"ddG({s['state']} vs {ref}) = {s['ddg_kj_mol']:+.2f} ± "
                         f"{s['free_energy_err_kj_mol']:.2f} kJ/mol")
        return "inconsistent", "; ".join(parts)
    told = [s for s in others if np.isfinite(s["free_energy_err_kj_mol"]) and s["free_energy_err_kj_mol"] > 0
            and resolved(s)]
    apart = ("; measurably apart, within the tolerance: " + ", ".join(
        f"ddG({s['state']} vs {ref}) = {s['ddg_kj_mol']:+.2f} ± {s['free_energy_err_kj_mol']:.2f} kJ/mol" for s in told)
        if told else "")   # (a large run tells small differences apart: said, not hidden)
    return "consistent", (f"excess RMSE {excess:.2f} <= {tol:g} kJ/mol and every state ddG within "
                          f"{tol:g} kJ/mol or {thresholds.n_sigma:g} sigma{apart}")


def _compare_type(t, prof, scan, ctx, kt, thresholds):
    """Row of comparison.csv, rows of comparison_profiles.csv and the details of one type."""
    columns, metrics = _profile_metrics(prof, scan, kt, thresholds)
    minima_side, barriers_side = _features_side_by_side(prof, kt, columns["reliable"], ctx["s_minima"],
                                                        ctx["s_barriers"])
    states, ref = _state_rows(t, ctx, kt)
    verdict, reason = _verdict(metrics, minima_side, states, ref, thresholds)
    row = {"type": t, "temperature_k": ctx["temperature_k"], "scan_kind": scan.kind, **metrics}
    for s in states:
        key = s["state"]
        row[f"population_{key}"] = s["population"]
        row[f"population_err_{key}"] = s["population_err"]
        row[f"predicted_population_{key}"] = s["predicted_population"]
        row[f"z_score_{key}"] = s["z_score"]
        row[f"ddg_{key}_kj_mol"] = s["ddg_kj_mol"]
    row["verdict"] = verdict
    row["verdict_reason"] = reason
    info = {"metrics": {k: v for k, v in row.items() if k not in ("type",)},
            "minima": minima_side, "barriers": barriers_side, "states": states}
    return row, pd.DataFrame({"type": t, **columns}), info


RULES = {
    "reliable_bin": "sampled in >= 90% of bootstrap resamples, error <= max_error_kt kT, "
                    "F <= max_free_energy_kt kT",
    "offset": "weighted mean of F - F_scan over reliable bins, weights 1/max(error, 0.02 kT)^2",
    "undersampled": "a scan minimum with >= min_minimum_population predicted population outside "
                    "the reliable region, or fewer than min_reliable_bins reliable bins",
    "inconsistent": "excess RMSE > tolerance, or a state ddG > tolerance and > n_sigma errors",
    "consistent": "otherwise",
}


def rules_with_values(thresholds):
    """:data:`RULES` with the names of ``thresholds`` (a dict) replaced by their values, longest first.

    >>> rules_with_values({"max_error_kt": 0.2, "n_sigma": 3.0, "tolerance_kj_mol": 1.0})["inconsistent"]
    'excess RMSE > 1 kJ/mol, or a state ddG > 1 kJ/mol and > 3 errors'
    """
    names = dict({k: f"{v:g}" for k, v in thresholds.items()}, tolerance=f"{thresholds['tolerance_kj_mol']:g} kJ/mol")
    out = dict(RULES)
    for name in sorted(names, key=len, reverse=True):
        out = {key: text.replace(name, names[name]) for key, text in out.items()}
    return out


def compare_with_scan(result, scan, *, temperature_k=None, types=None, bin_width_deg=DEFAULT_BIN_WIDTH_DEG,
                      thresholds=Thresholds(), n_bootstrap=DEFAULT_BOOTSTRAP, seed=DEFAULT_SEED, log=None):
    """Compare the sampled profiles of torsion types with a static scan.

    Parameters
    ----------
    result : TrackResult or TorsionStates
        A tracking result (:func:`dihedra.tracking.track`, :func:`dihedra.io.resultsdir.load_results`)
        or an analysis that has run.
    scan : dihedra.analysis.scans.TorsionScan or str
        A scan, or the path of a scan CSV (units in its column names) or parameter TOML file, read
        with :func:`dihedra.analysis.scans.read_scan`.
    temperature_k : float, optional
        Required unless the run recorded one (then it is used, announced through ``log`` and
        in ``notices``).
    types : str or list of str, optional
        Types to compare (default: the only type; ``"all"`` for every type).
    bin_width_deg : float
        Bin width of the profiles compared.
    thresholds : Thresholds
    n_bootstrap, seed : int
        Block bootstrap of the profile errors (not used for a result of umbrella windows, which
        carries the resamples of its own bootstrap).
    log : callable, optional

    Returns
    -------
    Comparison
    """
    result = as_result(result)
    notices = []

    def note(message):
        notices.append(message)
        if log is not None:
            log(message)

    temperature_k = resolve_temperature(temperature_k, result.summary, notices=notices, log=log)
    n_bootstrap = check_estimate_options(n_bootstrap)
    if isinstance(scan, (str, os.PathLike)):
        scan = read_scan(scan, temperature_k=temperature_k)
    kt = kt_kj_mol(temperature_k)
    types = select_types(result, types)
    if has_resamples(result):   # umbrella windows: their MBAR profile with the errors of their own bootstrap
        profs = {t: (resampled_type_profile(result, t, kt, bin_width_deg), None) for t in types}
        sc = sc_rep = smult = None
        note(_WINDOWS_ERRORS.format(n=result.blocks[RESAMPLED_PROBABILITIES].shape[1]))
    else:
        profs = type_profiles(result, temperature_k, bin_width_deg, n_bootstrap=n_bootstrap, seed=seed,
                              types=types, kernel=False)
        sc, sc_rep, smult = state_blocks(result, n_bootstrap, seed)
        if str(result.summary.get("kind", "")).startswith("umbrella windows"):
            note(_WINDOWS_FIXED_WEIGHTS)
    order = list(dict.fromkeys(result.torsion_set.types))
    s_minima, s_barriers = scan_features(scan, kt)
    ctx = {"temperature_k": temperature_k, "scheme": result.scheme, "sc": sc, "sc_rep": sc_rep, "smult": smult,
           "result": result,
           "members": {t: [k for k, x in enumerate(result.torsion_set.types) if x == t] for t in order},
           "pops": result.populations_by_type.set_index(["type", "state"]),
           "pred_pops": {}, "scan": scan,
           "s_minima": s_minima, "s_barriers": s_barriers}
    rows, prof_rows, per_type = [], [], {}
    sampling = sampling_verdicts(result)
    for t in types:
        row, prof_frame, per_type[t] = _compare_type(t, profs[t][0], scan, ctx, kt, thresholds)
        row["sampling"] = per_type[t]["metrics"]["sampling"] = sampling.get(t, "not checked")
        rows.append(row)
        prof_rows.append(prof_frame)
    loose = [r for r in rows if r["sampling"].startswith("not converged")]
    if loose:   # (a verdict on sampling that can still change)
        note(f"{len(loose)} compared type(s) are not converged (e.g. {loose[0]['type']}: "
             f"{loose[0]['sampling'].split(': ', 1)[-1]}): their verdicts rest on sampling that may still change; "
             "see convergence.csv.")
    details = {
        "temperature_k": temperature_k, "kt_kj_mol": kt, "bin_width_deg": float(bin_width_deg),
        "scheme": result.scheme.name, "thresholds": asdict(thresholds),
        "scan": {"source": scan.source, "kind": scan.kind, "metadata": scan.metadata,
                 "minima": s_minima, "barriers": s_barriers},
        "types": per_type, "rules": rules_with_values(asdict(thresholds)), "cautions": CAUTIONS,
    }
    parameters = {"temperature_k": temperature_k, "types": list(types), "bin_width_deg": float(bin_width_deg),
                  "thresholds": asdict(thresholds), "n_bootstrap": int(n_bootstrap), "seed": seed,
                  "scan": scan.source}
    return Comparison(table=pd.DataFrame(rows), profiles=pd.concat(prof_rows, ignore_index=True),
                      details=details, notices=notices, parameters=parameters)


#: Notice on a folder of umbrella windows: the errors are those of their own bootstrap.
_WINDOWS_ERRORS = ("this folder holds umbrella windows: the profile, its minima and barriers and the state free "
                   "energies compared carry the errors of the windows' own bootstrap ({n} resamples, the window free "
                   "energies re-estimated in each), as dihedra windows wrote them; --bootstrap and --seed do not "
                   "apply.")
#: Notice on a folder of umbrella windows without the resamples of their bootstrap.
_WINDOWS_FIXED_WEIGHTS = (
    "this folder of umbrella windows holds no bootstrap resamples of its MBAR profile (written by an earlier "
    "dihedra): the errors compared are recomputed from the weighted histograms with the window free energies "
    "held fixed and can be far off, too small in the wells and by up to hundreds of kJ/mol too large at "
    "barriers; run dihedra windows again to compare with the windows' own errors.")


CAUTIONS = [
    "The scan predicts p(phi) ~ exp(-E(phi)/kT) only in a one-dimensional, classical picture of one "
    "molecule whose other coordinates follow the scan; the simulation samples them all.",
    "A difference can come from the environment (solvent, neighbours), from coupling to other "
    "torsions and angles, from entropy (wells of different width; a relaxed scan follows the lowest "
    "path), from nonbonded terms the scan treats differently, or from too little sampling.",
    "Regions outside the reliable region were rarely or never visited: they are not compared.",
]


def format_comparison(cmp):
    """The comparison as text for a terminal: metrics, features side by side, verdicts, cautions."""
    d = cmp.details
    lines = [f"comparison with the static scan {d['scan']['source']} (kind: {d['scan']['kind']}) at "
             f"{d['temperature_k']:g} K (kT = {d['kt_kj_mol']:.3f} kJ/mol), {d['bin_width_deg']:g}-degree bins"]
    th = d["thresholds"]
    lines.append(f"reliable bins: error <= {th['max_error_kt']:g} kT, F <= {th['max_free_energy_kt']:g} kT; "
                 f"tolerance {th['tolerance_kj_mol']:g} kJ/mol, {th['n_sigma']:g} sigma")
    for t, info in d["types"].items():
        m = info["metrics"]
        lines.append("")
        lines.append(f"type {t}: {m['verdict'].upper()} ({m['verdict_reason']})")
        if str(m.get("sampling", "")).startswith("not converged"):
            lines.append(f"  but the sampling is {m['sampling']}")
        lines.append(f"  reliable region {m['reliable_span_deg']:.0f} deg of 360; RMSE {m['rmse_kj_mol']:.2f} kJ/mol "
                     f"(excess over noise {m['excess_rmse_kj_mol']:.2f}), max |dF| {m['max_abs_difference_kj_mol']:.2f} "
                     f"kJ/mol at {m['max_abs_difference_angle_deg']:.1f} deg; Jensen-Shannon divergence "
                     f"{m['js_divergence_bits']:.4f} bit")
        lines.append("  minima (scan E | sampled F, kJ/mol above the lowest):")
        for x in info["minima"]:
            sampled = ("not found" if x["sampled_angle_deg"] is None else
                       f"{x['sampled_angle_deg']:7.1f} deg  {_pm(x['sampled_free_energy_kj_mol'], x['sampled_free_energy_err_kj_mol'])}")
            flag = "" if x["in_reliable_region"] else "  (outside the reliable region)"
            lines.append(f"    {x['scan_angle_deg']:7.1f} deg  {x['scan_energy_kj_mol']:6.2f} | {sampled}{flag}")
        lines.append("  barriers (scan E | sampled F above the lowest minimum, kJ/mol):")
        for x in info["barriers"]:
            if x["sampled_angle_deg"] is None:
                sampled = "not found"
            elif not x["sampled"]:
                sampled = f"{x['sampled_angle_deg']:7.1f} deg  unsampled (higher than any sampled value)"
            else:
                sampled = (f"{x['sampled_angle_deg']:7.1f} deg  "
                           f"{_pm(x['sampled_free_energy_kj_mol'], x['sampled_free_energy_err_kj_mol'])}")
            lines.append(f"    {x['scan_angle_deg']:7.1f} deg  {x['scan_energy_kj_mol']:6.2f} | {sampled}")
        lines.append("  states: sampled vs predicted population (z), dG vs the most populated state (kJ/mol):")
        for s in info["states"]:
            z = "" if not np.isfinite(s["z_score"]) else f"z = {s['z_score']:+.1f}"
            lines.append(f"    {s['state']:<10} {_pm(s['population'], s['population_err'])} vs "
                         f"{s['predicted_population']:.3f}  {z:<10} dG {_pm(s['free_energy_kj_mol'], s['free_energy_err_kj_mol'], 2)}"
                         f" vs {s['predicted_free_energy_kj_mol']:.2f}")
    lines.append("")
    lines.append("how to read this:")
    lines.extend(f"  - {c}" for c in CAUTIONS)
    return "\n".join(lines)


def _pm(value, err, digits=3):
    if value is None or not np.isfinite(value):
        return "-"
    if err is None or not np.isfinite(err):
        return f"{value:.{digits}f}"
    return f"{value:.{digits}f} ± {err:.{digits}f}"
