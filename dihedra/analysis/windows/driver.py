r"""The analysis of umbrella windows: :func:`unbias_windows` and its :class:`WindowsResult`.

Overlap
-------
Neighbouring windows (sorted by centre; the last and the first are neighbours when the windows go
round the circle) must overlap for either estimator to connect them. For every neighbouring pair
the MBAR overlap matrix element min(O_ij, O_ji) (pymbar's ``compute_overlap``) and the overlap
coefficient of the two biased histograms, sum_b min(h_i(b), h_j(b)), are reported; a pair with
an MBAR overlap below :data:`MIN_OVERLAP` = 0.03 is reported as poor (a common rule of thumb,
e.g. Klimovich, Shirts & Mobley, J. Comput.-Aided Mol. Des. 29 (2015) 397; from memory): add a
window between the two or raise the sampling there. The rule of thumb does not hold for windows
that the biases cannot tell apart (each element of the overlap matrix of K such windows is 1/K):
a pair that overlaps at least half as much as each window with itself is never poor. A window
whose samples lie around minus its centre is reported too (a bias applied with the opposite sign
convention).

Restraint check
---------------
Before the biases are removed, the samples are checked against the window table
(:mod:`.restraints`): each window against its own restraint, and the force constants against how
differently neighbouring windows sample the angles they share. Windows that contradict the table
are reported loudly (a warning first among the notices and in windows.json;
``restraint_consistent`` false in windows.csv); the result is then unusable, pymbar is not called
(the grid solution of the same equations stands in; the MBAR overlap is not assessed) and the
overflow that such biases cause in the estimators is silenced.

Output
------
:meth:`WindowsResult.save` writes a complete results folder (``torsions.csv``,
``populations*.csv``, ``blocks.npz``, ``summary.json``) whose histograms and state counts are the
MBAR-weighted sums (each window a replica), with the bin and state probabilities of every bootstrap
resample of each type and Kish's effective samples of its weights
(:mod:`dihedra.analysis.profiles.resampled`), so that ``dihedra couplings``,
``dihedra compare`` and figures work on it, plus the profile files of ``dihedra profile`` (``profiles.csv``,
``minima.csv``, ``barriers.csv``, ``state_free_energies.csv``, ``profiles.json``; the
``histogram`` estimate is the MBAR profile, the ``kernel`` estimate its von Mises smoothing, both
with the errors of :mod:`.estimation`), and

``windows.csv``
    per window: centre, force constant, samples, mean and spread of the sampled angle, statistical
    inefficiency g of the bias energy, the restraint check, f_k by MBAR and WHAM (kJ/mol, relative
    to the first window) with errors;
``window_overlap.csv``
    per neighbouring pair: MBAR overlap, histogram overlap, poor, and the ratio of the force
    constants its samples show to the table's (:mod:`.restraints`);
``windows_profiles.csv``
    per type and bin: F by MBAR and by WHAM with errors, their difference;
``windows.json``
    settings, checks, notices, cautions.

Conformer tables are left empty (a joint state of several torsions has no single weight when each
torsion carries its own bias). Populations in ``populations.csv`` use the blocking errors of the
weighted counts (window free energies held fixed: a lower bound); ``populations_by_type.csv``
carries the larger of that and the bootstrap error. ``dihedra compare`` and ``dihedra profile``
on the folder take the errors of the types from the stored resamples (and the kernel bandwidth
from the stored Kish effective samples): at the same bin width, the very profiles, minima,
barriers and state free energies written here. The resamples are per type: ``dihedra profile``'s
rows of single torsions of a type of several hold the window free energies fixed (and say so).
"""

from __future__ import annotations

import contextlib
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
from ..profiles import (DEFAULT_SEED, RESAMPLED_EFFECTIVE_SAMPLES, RESAMPLED_PROBABILITIES,
                        RESAMPLED_STATE_PROBABILITIES, TYPE_ERRORS, bootstrap_multiplicities, bootstrap_spread,
                        check_bin_width, check_estimate_options, rebin)
from .estimation import AGREEMENT_SIGMA, DEFAULT_MAX_MBAR_SAMPLES, TypeTables, estimate_type
from .samples import N_HIST_BLOCKS, N_STATE_BLOCKS, collect_windows, read_windows, window_inputs
from .restraints import (force_constant_ratios, judge_force_constants, k_from_samples, restraint_rule,
                         restraint_warnings, window_statistics)
from .solver import _fine_bin, biased_histograms

#: Neighbouring windows with an MBAR overlap below this are reported as poorly overlapping.
MIN_OVERLAP = 0.03
#: Bootstrap resamples for the errors.
DEFAULT_BOOTSTRAP = 200
#: A neighbouring pair that overlaps at least this fraction of each window's overlap with itself
#: is never poor (see :func:`_poor_overlap`).
SELF_OVERLAP_FRACTION = 0.5


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
        (:class:`dihedra.io.staging.StagedFolder`): an existing folder is replaced only with
        ``overwrite`` and only when dihedra made it and it holds nothing else; a folder that holds
        an input is never replaced. ``result.folder`` is then the new folder.
        """
        from ...io.staging import StagedFolder
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
        from ...io.tables import json_ready, write_json, write_table

        write_results(self.result, folder)
        paths = [os.path.join(folder, name) for name in [*TABLES.values(), "blocks.npz", HISTOGRAMS_FILE,
                                                          "summary.json"] if os.path.exists(os.path.join(folder, name))]
        paths += self.profiles.save(folder)
        paths.append(write_table(self.windows, folder, "windows.csv"))
        paths.append(write_table(self.overlap, folder, "window_overlap.csv"))
        paths.append(write_table(self.comparison, folder, "windows_profiles.csv"))
        paths.append(write_json(json_ready(self.info), folder, "windows.json"))   # NaN (not assessed) as null
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
    workers : int or "auto"
        Processes per window for the tracking pass (``"auto"``: as many as pay, as ``track`` decides).
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
    if workers != "auto":
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
    wtab, ratios, warnings = _check_restraints(data, table, tset.types, kt)
    trusted = bool(wtab["restraint_consistent"].all())
    # biases that contradict the samples make the estimators' numbers meaningless and their overflow
    # expected: it is silenced there (only there); the restraint warnings say what is wrong
    with contextlib.nullcontext() if trusted else np.errstate(all="ignore"):
        estimates, weights = _estimate_types(data, table, tset.types, states, scheme.n_states, kt, mult,
                                             max_mbar_samples, say, trusted)
        notices.extend(_mirrored_notices(data, table))
        weighted = _weighted_tables(data, first, scheme, states, weights, estimates)
        types = TypeTables(scheme, kt, factor, bin_width_deg, bandwidth_deg)
        for typ, est in estimates.items():
            notices.extend(_type_notices(typ, est, types.add(typ, est), max_mbar_samples, factor))
    comparison, agreement = pd.concat(types.comparison, ignore_index=True), pd.DataFrame(types.agreement)
    if trusted:   # (otherwise the warnings say why they differ)
        notices.extend(_agreement_notices(agreement))
    est0 = next(iter(estimates.values()))
    _add_free_energies(wtab, est0, kt)
    notices[:0] = warnings
    otab = _overlap_table(table, est0, ratios)
    notices.extend(_overlap_notices(otab, list(estimates)))
    notices.extend(_short_window_notices(wtab))
    settings = _settings(temperature_k, kt, bin_width_deg, n_bootstrap, seed, bandwidth_deg, types.bandwidths,
                         scheme)
    info = _info(temperature_k, kt, source, len(table), agreement, otab, max_mbar_samples, settings, notices)
    info["restraint_rule"] = restraint_rule()
    info["restraints_consistent"] = trusted
    summary = _summary(first, data, table, scheme, temperature_k, tset, notices, start, stop, step,
                       time.time() - t0)
    result = TrackResult(torsion_set=tset, scheme=scheme, summary=summary, notices=notices, **weighted)
    pset = types.profile_set(temperature_k, settings, notices, weighted["populations_by_type"])
    return WindowsResult(result=result, profiles=pset, windows=wtab,
                         overlap=otab, comparison=comparison, agreement=agreement, info=info, notices=notices,
                         inputs=window_inputs(table, source))


def _estimate_types(data, windows, types, states, n_states, kt, mult, max_mbar_samples, say, with_pymbar):
    """The :class:`TypeEstimate` of each torsion type, and the MBAR weight of every sample."""
    weights = np.zeros(len(data.angle_deg))
    estimates = {}
    for typ in dict.fromkeys(types):
        say(f"MBAR and WHAM for type {typ} ({mult.shape[0]} bootstrap resamples)")
        sel = np.isin(data.torsion, [k for k, t in enumerate(types) if t == typ])
        est = estimate_type(data.angle_deg[sel], data.window[sel], data.frame_pos[sel], data.hist_block[sel],
                            states[sel], n_states, windows, kt, mult, max_mbar_samples, with_pymbar)
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
        "conformer_rows": np.empty((0, 4), dtype=np.int64), "conformer_weights": np.empty(0),
        # the MBAR bootstrap of every type (window free energies re-estimated in each resample), so that
        # an analysis of the folder has the errors of this one (dihedra.analysis.profiles.resampled)
        RESAMPLED_PROBABILITIES: np.stack([est.boot_fine_mbar for est in estimates.values()]),
        RESAMPLED_STATE_PROBABILITIES: np.stack([est.boot_state_counts for est in estimates.values()]),
        RESAMPLED_EFFECTIVE_SAMPLES: np.array([est.effective_samples for est in estimates.values()])}
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


def _type_notices(typ, est, hprof, max_mbar_samples, factor):
    """Notices on a type: pymbar given a thinned set, profile bins sampled by no window, bins whose
    samples MBAR gave no weight."""
    notices = []
    if est.thin_stride > 1:
        notices.append(f"type {typ}: pymbar was given one frame in {est.thin_stride} "
                       f"({est.n_mbar_samples} samples, at most {max_mbar_samples}); its window free "
                       "energies were refined on every sample (0.05-degree grid).")
    # sampled means samples in the bin; the profile's own mask also needs MBAR weight there
    held = rebin(est.biased_hist.sum(axis=0), factor) > 0
    unsampled, unweighted = int((~held).sum()), int((held & ~hprof.sampled).sum())
    if unsampled:
        notices.append(f"type {typ}: {unsampled} of {len(held)} profile bins were sampled by no "
                       "window; they have no free energy (add windows there).")
    if unweighted:
        notices.append(f"type {typ}: {unweighted} of {len(held)} profile bins hold samples to which MBAR gives "
                       "no weight (below 1e-308 of the largest: biases that contradict the samples, or windows "
                       "that do not connect); they have no free energy.")
    return notices


def _agreement_notices(agreement):
    """Notices on types whose MBAR and WHAM profiles disagree."""
    return [f"type {row.type}: MBAR and WHAM differ by more than {AGREEMENT_SIGMA:g} combined "
            f"errors in {100 * (1 - row.fraction_within):.0f} % of the bins (largest "
            f"{row.max_abs_difference_kj_mol:.2f} kJ/mol); check the overlap and the sampling."
            for row in agreement.itertuples(index=False) if row.fraction_within < 0.9]


def _check_restraints(data, windows, types, kt):
    """windows.csv without the window free energies, the force-constant ratio of each neighbouring
    pair, and the warnings on windows that contradict the table (:mod:`.restraints`; the samples of
    the first type for the pairs, like the overlap table)."""
    wtab = window_statistics(data, kt)
    own_bad = ~wtab["restraint_consistent"].to_numpy(bool)
    pairs = neighbour_pairs(windows["centre_deg"])
    sel = np.isin(data.torsion, [k for k, t in enumerate(types) if t == types[0]])
    hist = biased_histograms(data.angle_deg[sel], data.window[sel], len(windows))
    ratios = force_constant_ratios(hist, windows, pairs, kt, wtab["statistical_inefficiency"].to_numpy(float))
    side, flagged = judge_force_constants(ratios, pairs)
    wtab.insert(wtab.columns.get_loc("restraint_consistent"), "k_from_samples_kj_mol_rad2",
                k_from_samples(ratios, pairs, windows))
    wtab.loc[flagged, "restraint_consistent"] = False     # (row k is window k)
    return wtab, ratios, restraint_warnings(wtab, own_bad, side, flagged, ratios)


def _add_free_energies(wtab, est, kt):
    """The window free energies of ``est`` (the first type) by MBAR and WHAM (kJ/mol, relative to
    the first window) with their bootstrap errors, as columns of windows.csv."""
    for name, f, fb in (("mbar", est.f_mbar_kt, est.boot_f_mbar_kt), ("wham", est.f_wham_kt, est.boot_f_wham_kt)):
        err, _ = bootstrap_spread(fb - fb[:, :1])
        wtab[f"free_energy_{name}_kj_mol"] = f * kt
        wtab[f"free_energy_{name}_err_kj_mol"] = err * kt


def _overlap_table(windows, est, ratios):
    """window_overlap.csv: MBAR and histogram overlap of each neighbouring pair (first type), and
    the ratio of its force constants to the table's (:func:`~.restraints.force_constant_ratios`)."""
    rows = []
    biased = est.biased_hist / est.biased_hist.sum(axis=1, keepdims=True)
    for i, j in neighbour_pairs(windows["centre_deg"]):
        o = float(min(est.overlap[i, j], est.overlap[j, i]))
        rows.append({"window_a": i + 1, "window_b": j + 1, "centre_a_deg": windows["centre_deg"][i],
                     "centre_b_deg": windows["centre_deg"][j], "mbar_overlap": o,
                     "histogram_overlap": float(np.minimum(biased[i], biased[j]).sum()),
                     "poor": _poor_overlap(est.overlap, i, j)})
    return pd.concat([pd.DataFrame(rows), ratios], axis=1)


#: Windows of fewer correlation times of their bias energy than this are named in a notice: a
#: bootstrap over 16 blocks of such a window sees less than 0.8 of its variance.
SHORT_WINDOW_SPAN = 80.0


def _short_window_notices(wtab):
    """A notice on windows of few correlation times: a bootstrap over :data:`N_HIST_BLOCKS` blocks
    of such a window sees only :func:`~dihedra.numerics.blocking_bias.level_ratio` of its
    variance (neighbouring blocks are correlated), so the errors near it are too small."""
    from ...numerics.blocking_bias import level_ratio

    span = wtab["correlation_times"].to_numpy(float)
    short = np.flatnonzero(span < SHORT_WINDOW_SPAN)   # (NaN and inf: not short)
    if not len(short):
        return []
    worst = short[np.argmin(span[short])]
    factor = float(level_ratio(span[worst], N_HIST_BLOCKS)) ** -0.5
    return [f"{len(short)} of {len(wtab)} window(s) hold fewer than {SHORT_WINDOW_SPAN:.0f} correlation times of "
            f"their bias energy (correlation_times in windows.csv; shortest: window {int(wtab['window'][worst])}, "
            f"{span[worst]:.0f}): a bootstrap over {N_HIST_BLOCKS} blocks of such a window sees only part of its "
            "variance (neighbouring blocks are correlated), so the errors of the profile and of the window free "
            f"energies near them are too small, by up to about {factor:.1f}x; sample those windows longer, or "
            "read their error bars as lower bounds."]


def _poor_overlap(overlap, i, j):
    """Whether windows i and j overlap poorly: MBAR overlap below :data:`MIN_OVERLAP` and below
    :data:`SELF_OVERLAP_FRACTION` of each window's overlap with itself. Windows that the biases
    cannot tell apart overlap perfectly, yet each element of their overlap matrix is 1/K (below
    0.03 from 34 windows on); NaN (not assessed) is not poor."""
    o = min(overlap[i, j], overlap[j, i])
    return bool(o < MIN_OVERLAP and o < SELF_OVERLAP_FRACTION * min(overlap[i, i], overlap[j, j]))


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
        "resamples_brief": "bootstrap resamples of the windows' blocks (window free energies re-estimated in each)",
        "bandwidth_rule": "given" if bandwidth_deg is not None else
                          "0.9 * within-arc standard deviation * (Kish effective samples)^(-1/5)",
        "bandwidths_deg": bandwidths, "scheme": scheme.name,
        "n_type_resamples": n_bootstrap, "type_errors": TYPE_ERRORS.format(n=n_bootstrap),
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

