r"""The analysis of umbrella windows: :func:`unbias_windows` and its :class:`WindowsResult`.

Overlap
-------
Neighbouring windows (sorted by centre; the last and the first are neighbours when the windows go
round the circle) must overlap for either estimator to connect them. For every neighbouring pair
the MBAR overlap matrix element min(O_ij, O_ji) (pymbar's ``compute_overlap``) and the overlap
coefficient of the two biased histograms, sum_b min(h_i(b), h_j(b)), are reported; a pair with
an MBAR overlap below :data:`MIN_OVERLAP` = 0.03 is reported as poor (a common rule of thumb,
e.g. Klimovich, Shirts & Mobley, J. Comput.-Aided Mol. Des. 29 (2015) 397; from memory): add a
window between the two or raise the sampling there. A window whose samples lie around minus its
centre is reported too (a bias applied with the opposite sign convention).

Restraint check
---------------
Each window's samples must fit its stated restraint. The bias :math:`\tfrac12 k d^2` holds a window
at a mean offset :math:`\bar d` from its centre only against a mean force :math:`k \bar d` of
the system, and narrows it to a variance :math:`kT / (k + F'')` (Kumar et al. 1992; the
harmonic approximation of the biased distribution). A window needs a mean force above
:data:`MAX_MEAN_FORCE` (with :math:`|\bar d|` more than four restraint widths
:math:`\sqrt{kT/k}`, beyond noise) or a curvature :math:`F'' < -` :data:`MAX_CURVATURE` to
explain its samples is reported as contradicting its restraint, loudly (a warning printed first
and in windows.json; ``restraint_consistent`` false in windows.csv): a centre off by 180 degrees,
one given in the wrong unit or off by whole turns of a typo, a force constant per degree squared
or in the wrong energy unit. Such a window gives a confident but wrong profile: check the window
table against the simulation input.

Output
------
:meth:`WindowsResult.save` writes a complete results folder (``torsions.csv``,
``populations*.csv``, ``blocks.npz``, ``summary.json``) whose histograms and state counts are the
MBAR-weighted sums (each window a replica), so that ``dihedra couplings``, ``dihedra compare`` and
figures work on it, plus the profile files of ``dihedra profile`` (``profiles.csv``,
``minima.csv``, ``barriers.csv``, ``state_free_energies.csv``, ``profiles.json``; the
``histogram`` estimate is the MBAR profile, the ``kernel`` estimate its von Mises smoothing, both
with the errors of :mod:`.estimation`), and

``windows.csv``
    per window: centre, force constant, samples, mean and spread of the sampled angle, statistical
    inefficiency g of the bias energy, f_k by MBAR and WHAM (kJ/mol, relative to the first
    window) with errors;
``window_overlap.csv``
    per neighbouring pair: MBAR overlap, histogram overlap, poor;
``windows_profiles.csv``
    per type and bin: F by MBAR and by WHAM with errors, their difference;
``windows.json``
    settings, checks, notices, cautions.

Conformer tables are left empty (a joint state of several torsions has no single weight when each
torsion carries its own bias). Populations in ``populations.csv`` use the blocking errors of the
weighted counts (window free energies held fixed: a lower bound); ``populations_by_type.csv``
carries the larger of that and the bootstrap error. Re-running ``dihedra profile`` on the folder
recomputes profiles from the weighted histograms with the window free energies held fixed, which
gives smaller (too small) errors than the ones written here.
"""

from __future__ import annotations

import os
import time
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from ...errors import DihedraError
from ...selection.schemes import get_scheme
from ...trajectory.result import TrackResult
from ...trajectory.states import check_frame_range, whole_number
from ...units import check_temperature, kt_kj_mol, wrap_deg
from ..profiles import (DEFAULT_SEED, bootstrap_multiplicities, bootstrap_spread, check_bin_width,
                        check_estimate_options)
from .estimation import AGREEMENT_SIGMA, DEFAULT_MAX_MBAR_SAMPLES, TypeTables, estimate_type
from .samples import N_HIST_BLOCKS, N_STATE_BLOCKS, collect_windows, read_windows, window_inputs
from .solver import _fine_bin, bias_kj_mol

#: Neighbouring windows with an MBAR overlap below this are reported as poorly overlapping.
MIN_OVERLAP = 0.03
#: Bootstrap resamples for the errors.
DEFAULT_BOOTSTRAP = 200
#: A window's samples contradict its stated restraint when, to hold them where they are, the free
#: energy along the torsion would need a mean force above this (kJ/mol/rad) or a curvature below
#: minus :data:`MAX_CURVATURE` (kJ/mol/rad^2). Torsion free energies of molecules stay well inside
#: both: the Ryckaert-Bellemans butane potential (Ryckaert & Bellemans, Faraday Discuss. Chem.
#: Soc. 66 (1978) 95) has a largest slope of 66 kJ/mol/rad and a curvature of -233 kJ/mol/rad^2
#: at its cis barrier top; a two-fold amide barrier of about 85 kJ/mol (from memory) a largest
#: slope of about 85 and a top curvature of about -170.
MAX_MEAN_FORCE = 150.0
#: See :data:`MAX_MEAN_FORCE`.
MAX_CURVATURE = 600.0


# ----------------------------------------------------------------------------------------------
# The result
# ----------------------------------------------------------------------------------------------

@dataclass
class WindowsResult:
    """Result of :func:`unbias_windows` (nothing is written until :meth:`save`).

    Attributes
    ----------
    result : TrackResult
        The MBAR-weighted results folder content.
    profiles : ProfileSet
        In the format of :func:`dihedra.analysis.profiles.free_energy_profiles` (histogram = MBAR).
    windows : DataFrame
        Per window (see the module notes).
    overlap : DataFrame
        Per neighbouring pair.
    comparison : DataFrame
        Per type and bin: MBAR and WHAM free energies with errors and their difference.
    agreement : DataFrame
        Per type: bins compared, largest ``|difference|`` and largest ``|difference|`` / combined error,
        fraction of bins within :data:`AGREEMENT_SIGMA` combined errors.
    info : dict
        Settings, checks and notices (windows.json).
    notices : list of str
    inputs : list of str
        The window table (when read from a file), trajectories, topologies and torsion files: a
        results folder that holds one of them is never replaced.
    """

    result: object
    profiles: object
    windows: pd.DataFrame
    overlap: pd.DataFrame
    comparison: pd.DataFrame
    agreement: pd.DataFrame
    info: dict
    notices: list = field(default_factory=list)
    inputs: list = field(default_factory=list)

    @property
    def parameters(self):
        """The settings of the analysis (``info["settings"]``)."""
        return self.info["settings"]

    def save(self, folder, *, overwrite=False):
        """Write a complete new results folder ``folder``; returns the paths of the files written.

        The folder is assembled beside its target and moved into place at the end
        (:class:`dihedra.io.outputs.StagedFolder`): an existing folder is replaced only with
        ``overwrite`` and only when dihedra made it and it holds nothing else; a folder that holds
        an input is never replaced. ``result.folder`` is then the new folder.
        """
        from ...io.outputs import StagedFolder
        from ...trajectory.interrupts import signals_held

        staged = None
        try:
            with signals_held():   # an interrupt comes before the staging folder exists or after it is known
                staged = StagedFolder.begin(folder, overwrite=overwrite, inputs=self.inputs, command="windows")
            names = [os.path.relpath(p, staged.path) for p in self._write(staged.path)]
            self.result.folder = staged.commit()
        finally:
            if staged is not None:
                staged.discard()   # nothing left to remove after the commit
        return [os.path.join(self.result.folder, name) for name in names]

    def _write(self, folder):
        """Write every file into ``folder``; returns their paths."""
        from ...io.blocks import HISTOGRAMS_FILE
        from ...io.resultsdir import TABLES, write_results
        from ...io.tables import write_json, write_table

        write_results(self.result, folder)
        paths = [os.path.join(folder, name) for name in [*TABLES.values(), "blocks.npz", HISTOGRAMS_FILE,
                                                          "summary.json"] if os.path.exists(os.path.join(folder, name))]
        paths += self.profiles.save(folder)
        paths.append(write_table(self.windows, folder, "windows.csv"))
        paths.append(write_table(self.overlap, folder, "window_overlap.csv"))
        paths.append(write_table(self.comparison, folder, "windows_profiles.csv"))
        paths.append(write_json(self.info, folder, "windows.json"))
        return paths


def neighbour_pairs(centres_deg):
    """Pairs of neighbouring windows (indices) going round the circle in order of centre.

    The largest gap between consecutive centres is left out when it exceeds 1.5 times the median
    gap (the windows then cover an arc, and that gap is its open end); every other gap, however
    wide, is a pair whose overlap must be checked.
    """
    centres = np.asarray(centres_deg, dtype=float)
    order = np.argsort(centres, kind="stable")
    pairs = [(int(order[i]), int(order[(i + 1) % len(order)])) for i in range(len(order))]
    gaps = np.diff(np.append(centres[order], centres[order[0]] + 360.0))
    if len(order) == 2:
        return [pairs[int(np.argmin(gaps))]]
    widest = int(np.argmax(gaps))
    if gaps[widest] > 1.5 * np.median(gaps):
        pairs.pop(widest)
        pairs = pairs[widest:] + pairs[:widest]   # start after the open end
    return pairs


# ----------------------------------------------------------------------------------------------
# The analysis
# ----------------------------------------------------------------------------------------------

def unbias_windows(windows, *, temperature_k, scheme="anti-gauche", bin_width_deg=5.0, bandwidth_deg=None,
                   n_bootstrap=DEFAULT_BOOTSTRAP, seed=None, start=None, stop=None, step=None, workers=1,
                   max_mbar_samples=DEFAULT_MAX_MBAR_SAMPLES, log=None):
    """Unbiased torsion profiles from umbrella windows by MBAR and WHAM.

    Tracks every window, removes the biases and returns the result; it writes nothing
    (:meth:`WindowsResult.save` writes the results folder).

    Parameters
    ----------
    windows : str or DataFrame
        The window table: the path of its CSV, or a DataFrame with the same columns (see
        :mod:`dihedra.analysis.windows.samples`).
    temperature_k : float
        Temperature of the simulations (required; never assumed).
    scheme : str or StateScheme
        State scheme for populations and state free energies.
    bin_width_deg : float
        Bin width of the profiles (a divisor of 360, multiple of 1 degree).
    bandwidth_deg : float, optional
        Kernel standard deviation (default: the rule of :mod:`dihedra.analysis.profiles.estimation`
        with the Kish effective sample size of the weights).
    n_bootstrap, seed : int
        Block-bootstrap resamples and seed (default the seed of :mod:`dihedra.analysis.profiles`).
    start, stop, step : int, optional
        Frame range applied to every window.
    workers : int
        Processes per window for the tracking pass.
    max_mbar_samples : int
        Samples handed to pymbar at most.
    log : callable, optional

    Returns
    -------
    WindowsResult
    """
    t0 = time.time()
    say = log or (lambda msg: None)
    temperature_k = check_temperature(temperature_k)
    kt = kt_kj_mol(temperature_k)
    scheme = get_scheme("anti-gauche" if scheme is None else scheme)
    if len(scheme.coded_parts()) > 1:
        raise DihedraError(f"umbrella windows follow one torsion with one scheme; {scheme.name!r} is a set of "
                           "schemes for proteins: give one scheme (e.g. anti-gauche, cis-trans).")
    factor = check_bin_width(bin_width_deg, 1.0)
    n_bootstrap = check_estimate_options(n_bootstrap, bandwidth_deg)
    check_frame_range(start, stop, step)   # (before the first window is read)
    whole_number("workers", workers)
    seed = DEFAULT_SEED if seed is None else int(seed)
    source = None if isinstance(windows, pd.DataFrame) else os.fspath(windows)
    table = read_windows(windows)
    data = collect_windows(table, scheme, start, stop, step, workers, log)
    notices = list(data.notices)
    first = data.tracks[0]
    tset = first.torsion_set
    states = scheme.assign(data.angle_deg).astype(np.int64)
    mult = bootstrap_multiplicities(np.repeat(np.arange(len(table)), N_HIST_BLOCKS), n_bootstrap,
                                    np.random.default_rng(seed))
    if len(tset) > 1:
        notices.append(f"each window biases {len(tset)} torsions; each is taken as an independent sample of its "
                       "own biased distribution (exact for non-interacting copies, an approximation when "
                       "the biased molecules interact).")
    estimates, weights = _estimate_types(data, table, tset.types, states, scheme.n_states, kt, mult,
                                         max_mbar_samples, say)
    notices.extend(_mirrored_notices(data, table))
    weighted = _weighted_tables(data, first, scheme, states, weights, estimates)
    types = TypeTables(scheme, kt, factor, bin_width_deg, bandwidth_deg)
    for typ, est in estimates.items():
        notices.extend(_type_notices(typ, est, types.add(typ, est), max_mbar_samples))
    comparison, agreement = pd.concat(types.comparison, ignore_index=True), pd.DataFrame(types.agreement)
    notices.extend(_agreement_notices(agreement))
    est0 = next(iter(estimates.values()))
    wtab = _window_table(data, est0, kt)
    notices[:0] = _restraint_warnings(wtab)
    otab = _overlap_table(table, est0)
    notices.extend(_overlap_notices(otab, list(estimates)))
    settings = _settings(temperature_k, kt, bin_width_deg, n_bootstrap, seed, bandwidth_deg, types.bandwidths,
                         scheme)
    info = _info(temperature_k, kt, source, len(table), agreement, otab, max_mbar_samples, settings, notices)
    info["restraint_rule"] = (f"a window contradicts its restraint when its samples need a mean force above "
                              f"{MAX_MEAN_FORCE:g} kJ/mol/rad (offset beyond 4 restraint widths) or a curvature "
                              f"below -{MAX_CURVATURE:g} kJ/mol/rad2")
    info["restraints_consistent"] = bool(wtab["restraint_consistent"].all())
    summary = _summary(first, data, table, scheme, temperature_k, tset, notices, start, stop, step,
                       time.time() - t0)
    result = TrackResult(torsion_set=tset, scheme=scheme, summary=summary, notices=notices, **weighted)
    return WindowsResult(result=result, profiles=types.profile_set(temperature_k, settings, notices), windows=wtab,
                         overlap=otab, comparison=comparison, agreement=agreement, info=info, notices=notices,
                         inputs=window_inputs(table, source))


def _estimate_types(data, windows, types, states, n_states, kt, mult, max_mbar_samples, say):
    """The :class:`TypeEstimate` of each torsion type, and the MBAR weight of every sample."""
    weights = np.zeros(len(data.angle_deg))
    estimates = {}
    for typ in dict.fromkeys(types):
        say(f"MBAR and WHAM for type {typ} ({mult.shape[0]} bootstrap resamples)")
        sel = np.isin(data.torsion, [k for k, t in enumerate(types) if t == typ])
        est = estimate_type(data.angle_deg[sel], data.window[sel], data.frame_pos[sel], data.hist_block[sel],
                            states[sel], n_states, windows, kt, mult, max_mbar_samples)
        weights[sel] = est.weights
        estimates[typ] = est
    return estimates, weights


def _mirrored_notices(data, windows):
    """A notice on windows sampled around minus their centre (a sign-convention slip)."""
    mirrored = []
    for row in windows.itertuples(index=False):
        a = data.angle_deg[data.window == row.window]
        mean = float(np.degrees(np.arctan2(np.sin(np.radians(a)).mean(), np.cos(np.radians(a)).mean())))
        if abs(row.centre_deg) > 30 and abs(float(wrap_deg(mean - row.centre_deg))) > 90 \
                and abs(float(wrap_deg(mean + row.centre_deg))) < 30:
            mirrored.append(row.window + 1)
    if not mirrored:
        return []
    return [f"window(s) {', '.join(map(str, mirrored))} sampled around minus their centre: was the "
            "bias applied with the opposite sign convention? dihedra uses the IUPAC sign."]


def _weighted_tables(data, first, scheme, states, weights, estimates):
    """MBAR-weighted block sums and the tables of a results folder like track's (the fields of a
    :class:`~dihedra.trajectory.result.TrackResult` but the torsion set, scheme, summary, notices)."""
    from ...numerics.populations import (conformer_populations, pool_by_type, replica_populations,
                                         torsion_populations)

    labels, types = first.torsion_set.labels, first.torsion_set.types
    n_t, n_s, n_win = len(labels), scheme.n_states, len(data.windows)
    hist = np.zeros((n_win * N_HIST_BLOCKS, n_t, 360))
    fine = _fine_bin(data.angle_deg)
    np.add.at(hist, (data.hist_block, data.torsion, fine), weights)
    sc = np.zeros((n_win * N_STATE_BLOCKS, n_t, n_s))
    ok = states >= 0
    np.add.at(sc, (data.state_block[ok], data.torsion[ok], states[ok]), weights[ok])
    block_frames = np.zeros(n_win * N_STATE_BLOCKS, dtype=np.int64)
    hist_frames = np.zeros(n_win * N_HIST_BLOCKS, dtype=np.int64)
    for k, n in enumerate(data.n_frames):
        pos = np.arange(n)
        block_frames += np.bincount(k * N_STATE_BLOCKS + pos * N_STATE_BLOCKS // n, minlength=len(block_frames))
        hist_frames += np.bincount(k * N_HIST_BLOCKS + pos * N_HIST_BLOCKS // n, minlength=len(hist_frames))
    block_replica = np.repeat(np.arange(n_win), N_STATE_BLOCKS)
    undefined = np.sum([t.blocks["undefined"] for t in data.tracks], axis=0)
    blocks = {
        "state_counts": sc, "block_replica": block_replica, "block_frames": block_frames,
        "block_weights": sc.sum(axis=2).mean(axis=1), "histograms": hist,
        "hist_block_replica": np.repeat(np.arange(n_win), N_HIST_BLOCKS),
        "hist_block_frames": hist_frames, "hist_block_weights": hist.sum(axis=2).mean(axis=1),
        "bin_edges_deg": np.linspace(-180.0, 180.0, 361), "undefined": undefined,
        "conformer_rows": np.empty((0, 4), dtype=np.int64), "conformer_weights": np.empty(0)}
    pops = torsion_populations(sc, block_replica, labels, types, scheme.labels)
    by_type = pool_by_type(pops)
    for typ, est in estimates.items():
        p_err, _ = bootstrap_spread(est.boot_state_counts)
        for k, s in enumerate(scheme.labels):
            m = (by_type["type"] == typ) & (by_type["state"] == s)
            by_type.loc[m, "population_err"] = np.fmax(by_type.loc[m, "population_err"].to_numpy(), p_err[k])
    by_rep = replica_populations(sc, block_replica, labels, types, scheme.labels)
    conf, conf_type = conformer_populations(np.empty((0, 4)), np.empty(0), block_replica, len(block_replica),
                                            [], [], labels, types, scheme.labels, [])
    torsions = first.torsions.copy()
    torsions["n_undefined_frames"] = undefined
    return dict(torsions=torsions, populations=pops, populations_by_type=by_type, populations_by_replica=by_rep,
                conformers=conf, conformers_by_type=conf_type, blocks=blocks)


def _type_notices(typ, est, hprof, max_mbar_samples):
    """Notices on a type: pymbar given a thinned set, profile bins sampled by no window."""
    notices = []
    if est.thin_stride > 1:
        notices.append(f"type {typ}: pymbar was given one frame in {est.thin_stride} "
                       f"({est.n_mbar_samples} samples, at most {max_mbar_samples}); its window free "
                       "energies were refined on every sample (0.05-degree grid).")
    unsampled = int((~hprof.sampled).sum())
    if unsampled:
        notices.append(f"type {typ}: {unsampled} of {len(hprof.sampled)} profile bins were sampled by no "
                       "window; they have no free energy (add windows there).")
    return notices


def _agreement_notices(agreement):
    """Notices on types whose MBAR and WHAM profiles disagree."""
    return [f"type {row.type}: MBAR and WHAM differ by more than {AGREEMENT_SIGMA:g} combined "
            f"errors in {100 * (1 - row.fraction_within):.0f} % of the bins (largest "
            f"{row.max_abs_difference_kj_mol:.2f} kJ/mol); check the overlap and the sampling."
            for row in agreement.itertuples(index=False) if row.fraction_within < 0.9]


def _window_table(data, est, kt):
    """windows.csv: per window the samples, the mean and spread of the angle, the statistical
    inefficiency of the bias energy and the window free energies of ``est`` (the first type)."""
    from ...numerics.statistics import statistical_inefficiency

    rows = []
    for row in data.windows.itertuples(index=False):
        k = row.window
        sel = data.window == k
        a = data.angle_deg[sel]
        rad = np.radians(a)
        mean = float(np.degrees(np.arctan2(np.sin(rad).mean(), np.cos(rad).mean())))
        spread = float(np.degrees(np.sqrt(-2.0 * np.log(max(np.hypot(np.sin(rad).mean(), np.cos(rad).mean()),
                                                             1e-12)))))
        tors = data.torsion[sel]
        gs = []
        for t in np.unique(tors)[:10]:
            series = bias_kj_mol(a[tors == t], row.centre_deg, row.k_kj_mol_rad2)
            gs.append(statistical_inefficiency(series))
        rows.append({
            "window": k + 1, "centre_deg": row.centre_deg, "k_kj_mol_rad2": row.k_kj_mol_rad2,
            "trajectory": row.trajectory, "n_frames": int(row.n_frames), "n_samples": int(sel.sum()),
            "mean_angle_deg": mean, "circular_sd_deg": spread,
            "statistical_inefficiency": float(np.mean(gs)) if gs else np.nan,
            "n_effective": float(sel.sum() / np.mean(gs)) if gs else np.nan,
            **restraint_check(mean, spread, row.centre_deg, row.k_kj_mol_rad2, kt)})
    wtab = pd.DataFrame(rows)
    for name, f, fb in (("mbar", est.f_mbar_kt, est.boot_f_mbar_kt), ("wham", est.f_wham_kt, est.boot_f_wham_kt)):
        err, _ = bootstrap_spread(fb - fb[:, :1])
        wtab[f"free_energy_{name}_kj_mol"] = f * kt
        wtab[f"free_energy_{name}_err_kj_mol"] = err * kt
    return wtab


def restraint_check(mean_deg, sd_deg, centre_deg, k_kj_mol_rad2, kt):
    """Whether a window's sampled mean and spread fit its restraint (see *Restraint check*):
    the columns mean_offset_deg, restraint_sd_deg, mean_force_kj_mol_rad, curvature_kj_mol_rad2
    and restraint_consistent of windows.csv."""
    offset = float(wrap_deg(mean_deg - centre_deg))
    width = np.sqrt(kt / k_kj_mol_rad2)                       # rad
    force = k_kj_mol_rad2 * abs(np.radians(offset))
    sd = max(np.radians(sd_deg), 1e-9)
    curvature = kt / sd ** 2 - k_kj_mol_rad2                  # F'' from var = kT / (k + F'')
    bad = (force > MAX_MEAN_FORCE and abs(np.radians(offset)) > 4 * width) or curvature < -MAX_CURVATURE
    return {"mean_offset_deg": offset, "restraint_sd_deg": float(np.degrees(width)),
            "mean_force_kj_mol_rad": float(force), "curvature_kj_mol_rad2": float(curvature),
            "restraint_consistent": not bad}


def _restraint_warnings(wtab):
    """The loud warning on windows whose samples contradict their restraint (or none)."""
    bad = wtab[~wtab["restraint_consistent"]]
    if not len(bad):
        return []
    shown = "; ".join(f"window {int(r.window)} (centre {r.centre_deg:g} deg, k {r.k_kj_mol_rad2:g}): sampled around "
                      f"{r.mean_angle_deg:.0f} deg, spread {r.circular_sd_deg:.0f} deg where the restraint allows "
                      f"{r.restraint_sd_deg:.0f}" for r in bad.head(4).itertuples(index=False))
    more = f" and {len(bad) - 4} more" if len(bad) > 4 else ""
    return [f"WARNING: {len(bad)} window(s) contradict their stated restraint: {shown}{more}. Their samples need a "
            f"mean force above {MAX_MEAN_FORCE:g} kJ/mol/rad or a curvature below -{MAX_CURVATURE:g} kJ/mol/rad2 "
            "to be where they are; the profile, overlap and MBAR-WHAM agreement rest on the window table and are "
            "not to be trusted: check the centres (degrees, IUPAC sign) and force constants (kJ/mol/rad2) against "
            "the simulation input."]


def _overlap_table(windows, est):
    """window_overlap.csv: MBAR and histogram overlap of each neighbouring pair (first type)."""
    rows = []
    biased = est.biased_hist / est.biased_hist.sum(axis=1, keepdims=True)
    for i, j in neighbour_pairs(windows["centre_deg"]):
        o = float(min(est.overlap[i, j], est.overlap[j, i]))
        rows.append({"window_a": i + 1, "window_b": j + 1, "centre_a_deg": windows["centre_deg"][i],
                     "centre_b_deg": windows["centre_deg"][j], "mbar_overlap": o,
                     "histogram_overlap": float(np.minimum(biased[i], biased[j]).sum()),
                     "poor": bool(o < MIN_OVERLAP)})
    return pd.DataFrame(rows)


def _overlap_notices(otab, order):
    """Notices on poorly overlapping pairs, and that the tables are of the first type."""
    notices = []
    poor = otab[otab["poor"]]
    if len(poor):
        pairs = ", ".join(f"{r.window_a}-{r.window_b} ({r.centre_a_deg:g}/{r.centre_b_deg:g} deg: "
                          f"{r.mbar_overlap:.3f})" for r in poor.itertuples(index=False))
        notices.append(f"poor overlap (MBAR overlap < {MIN_OVERLAP:g}) between neighbouring windows {pairs}: "
                       "add windows between them or sample them longer; the profile there is unreliable.")
    if len(order) > 1:
        notices.append(f"the window table and overlap are given for the first type ({order[0]}); profiles "
                       "and populations for every type.")
    return notices


def _settings(temperature_k, kt, bin_width_deg, n_bootstrap, seed, bandwidth_deg, bandwidths, scheme):
    """The settings of the profiles (profiles.json) and of windows.json."""
    return {
        "temperature_k": temperature_k, "kt_kj_mol": kt, "bin_width_deg": float(bin_width_deg),
        "fine_bin_width_deg": 1.0, "n_bootstrap": n_bootstrap, "seed": seed,
        "estimate_histogram": "MBAR (pymbar) reweighted histogram",
        "bootstrap": f"{N_HIST_BLOCKS} blocks per window resampled with replacement within each window; "
                     "window free energies re-estimated for every resample",
        "bandwidth_rule": "given" if bandwidth_deg is not None else
                          "0.9 * within-arc standard deviation * (Kish effective samples)^(-1/5)",
        "bandwidths_deg": bandwidths, "scheme": scheme.name,
        "minimum_depth_rule": "as in dihedra profile", "state_free_energy_reference": "most populated state",
    }


def _info(temperature_k, kt, source, n_windows, agreement, otab, max_mbar_samples, settings, notices):
    """The content of windows.json (``notices`` is kept as the same list, so later notices join)."""
    return {
        "temperature_k": temperature_k, "kt_kj_mol": kt,
        "windows_file": os.path.abspath(source) if source is not None else None,
        "n_windows": n_windows, "bias": "0.5 * k * d^2, d = minimum-image (IUPAC angle - centre) in radians, "
                                        "on every selected torsion",
        "estimators": {"mbar": "pymbar.MBAR (Shirts & Chodera 2008); resamples on a 0.05-degree grid",
                       "wham": "Kumar et al. 1992 on 1-degree bins, bin-averaged bias factors, Newton solver"},
        "agreement_rule": f"|F_MBAR - F_WHAM| <= {AGREEMENT_SIGMA:g} sqrt(err_MBAR^2 + err_WHAM^2)",
        "overlap_rule": f"MBAR overlap min(O_ij, O_ji) >= {MIN_OVERLAP:g} between neighbouring windows",
        "agreement": agreement.to_dict(orient="records"), "overlap": otab.to_dict(orient="records"),
        "max_mbar_samples": int(max_mbar_samples), "settings": settings, "notices": notices,
        "cautions": [
            "The profile is reliable only where neighbouring windows overlap; a poor pair cuts the "
            "profile into pieces whose relative height is not known.",
            "Each biased torsion counts as its own sample; torsions of interacting molecules are not "
            "strictly independent samples of their biased distributions.",
            "Windows must be equilibrated: drop the start of each with --start.",
        ],
    }


def _summary(first, data, windows, scheme, temperature_k, tset, notices, start, stop, step, seconds):
    from ..._version import __version__
    from ...trajectory.assemble import package_versions as _package_versions

    replicas = []
    for res, row in zip(data.tracks, windows.itertuples(index=False)):
        info = dict(res.summary["replicas"][0])
        info.update({"window": row.window + 1, "centre_deg": row.centre_deg, "k_kj_mol_rad2": row.k_kj_mol_rad2,
                     "topology": row.topology, "torsions": row.torsions})
        replicas.append(info)
    return {
        "dihedra_version": __version__, "created": time.strftime("%Y-%m-%dT%H:%M:%S%z"), "command": None,
        "kind": "umbrella windows (MBAR-weighted)", "topology": first.summary["topology"], "replicas": replicas,
        "n_torsions": len(tset), "n_frames_analysed": int(sum(r["frames_analysed"] for r in replicas)),
        "scheme": scheme.to_dict(),
        "parameters": {"start": start, "stop": stop, "step": step, "keep_angles": False,
                       "weights": "umbrella windows: per-sample MBAR weights", "n_state_blocks": N_STATE_BLOCKS,
                       "n_hist_blocks": N_HIST_BLOCKS, "bin_width_deg": 1.0, "temperature_k": temperature_k},
        "units": {"angle": "deg", "time": "ps", "population": "fraction", "energy": "kJ/mol"},
        "temperature_k": temperature_k, "notices": list(notices), "run_seconds": round(seconds, 3),
        "versions": _package_versions(),
    }

