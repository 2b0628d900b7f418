r"""The profiles of a tracking result: :func:`free_energy_profiles` and its :class:`ProfileSet`.

For every torsion type (the torsions of a type pooled) and, unless ``per_torsion=False``, every
torsion: the histogram and kernel profiles with their block-bootstrap errors
(:mod:`.estimation`), minima, barriers and state free energies (:mod:`.features`); 2-D profiles of
pairs of torsions on request (:mod:`.maps`). A result that stored the resamples of its own
estimator (a folder of umbrella windows) has its types, and a torsion alone in its type, profiled
with those (:mod:`.resampled`).

Computation: torsions are handled in stacks of :data:`_BATCH` = 64, every step one array
operation over the stack (see :mod:`.estimation` and :mod:`.features`), a few stacks at a time in
threads (NumPy releases the interpreter lock in its array loops); the tables are built column by
column (:mod:`.rows`).

:meth:`ProfileSet.save` writes ``profiles.csv``, ``minima.csv``, ``barriers.csv``,
``state_free_energies.csv``, ``profiles.json`` (and ``profiles_2d.csv``) through
:mod:`dihedra.io.tables`, in kJ/mol, kcal/mol or kT.
"""

from __future__ import annotations

import functools
import os
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from ...errors import DihedraError
from ...io.outputs import file_set
from ...io.tables import write_json, write_table
from ...trajectory.result import as_result, kept_block
from ...units import canonical_energy_unit, check_temperature, from_kj_mol, kt_kj_mol
from .estimation import (DEFAULT_BIN_WIDTH_DEG, DEFAULT_BOOTSTRAP, DEFAULT_PAIR_BIN_WIDTH_DEG, DEFAULT_SEED,
                         _bandwidths, _histogram_stack, _kernel_columns, _kernel_profiles, _kernel_stack,
                         _profiles_from_blocks, _unstack, bootstrap_multiplicities, check_bin_width,
                         check_estimate_options, effective_count_scale, effective_samples, error_blocks, rebin,
                         short_run_ratio_map, stack_ratios)
from .features import (MIN_DEPTH_KT, MIN_DEPTH_SIGMA, _state_free_energy_stack, profile_notices, state_blocks,
                       type_notices, with_spread_between_torsions)
from .maps import check_pairs, pair_profiles
from .resampled import (has_resamples, resampled_effective_samples, resampled_settings, resampled_type_stacks,
                        windows_error_notices)
from .rows import _ProfileTables, _recoded, _replaced, _stack_tables

#: Energy units a profile can be written in.
PROFILE_ENERGY_UNITS = ("kJ/mol", "kcal/mol", "kT")
#: Torsions per stack (bounds memory: n_bootstrap x stack x 360 single-precision values, 18 MB,
#: and the arrays around them; larger stacks are no faster: 15,000 torsions in 12-13 s with
#: stacks of 64 or 256, at a peak of 820 against 1,050 MB).
_BATCH = 64
#: Threads that profile stacks of torsions side by side.
_THREADS = min(4, os.cpu_count() or 1)


# ----------------------------------------------------------------------------------------------
# Temperature and energy units
# ----------------------------------------------------------------------------------------------

def resolve_temperature(temperature_k, summary=None, log=None, notices=None):
    """The temperature to use: the one given, else the one ``track`` recorded (announced).

    A temperature given that differs from the recorded one (by more than 0.5 K) is used, with a
    notice (appended to ``notices``, else said to ``log``): -kT ln p describes the simulation only at its
    own temperature. Raises :class:`DihedraError` when neither exists: dihedra never assumes a
    temperature.
    """
    recorded = (summary or {}).get("temperature_k")
    if temperature_k is not None:
        temperature_k = check_temperature(temperature_k)
        if recorded is not None and abs(float(recorded) - temperature_k) > TEMPERATURE_TOLERANCE_K:
            message = (f"the run was simulated at {float(recorded):g} K (recorded by track) but {temperature_k:g} K "
                       "was asked for here: free energies and energies derived from the populations (-kT ln p) "
                       f"then describe neither temperature; leave the temperature out to use {float(recorded):g} K.")
            sink = log if notices is None else notices.append   # (notices are shown with the results)
            if sink is not None:
                sink(message)
        return temperature_k
    if recorded is not None:
        if log is not None:
            log(f"using the temperature recorded by track: {float(recorded):g} K")
        return check_temperature(recorded)
    raise DihedraError("a temperature is required: give --temperature K (temperature_k in Python); "
                       "this result records none (track --temperature K, or temperature_k in Python, records one).")


#: A temperature asked for that differs from the recorded one by more than this (K) is pointed out.
TEMPERATURE_TOLERANCE_K = 0.5


def unit_suffix(unit):
    """Column-name suffix of an energy unit (``kj_mol``, ``kcal_mol``, ``kt``, ``hartree``, ``ev``)."""
    return canonical_energy_unit(unit).lower().replace("/", "_")


def convert_energy_columns(frame, unit, temperature_k):
    """Copy of ``frame`` with every ``*_kj_mol`` column converted to ``unit`` and renamed."""
    unit = canonical_energy_unit(unit)
    if unit not in PROFILE_ENERGY_UNITS:
        raise DihedraError(f"profiles are written in kJ/mol, kcal/mol or kT; got {unit!r}.")
    out = frame.copy()
    if unit == "kJ/mol":
        return out
    suffix = unit_suffix(unit)
    rename = {}
    for col in out.columns:
        if col.endswith("_kj_mol"):
            out[col] = from_kj_mol(out[col].to_numpy(float), unit, temperature_k)
            rename[col] = col[: -len("kj_mol")] + suffix
    return out.rename(columns=rename)


# ----------------------------------------------------------------------------------------------
# The result
# ----------------------------------------------------------------------------------------------

#: What a reader of profiles.json should keep in mind.
_CAUTIONS = [
    "F = -kT ln p is a potential of mean force along one torsion: it includes the effect of the "
    "environment and of every other degree of freedom, averaged over them.",
    "Bins with sampled = False were never visited; their free energy is unknown, not zero or infinite.",
    "Errors come from a block bootstrap over 16 blocks per replica, never below the counting error of a "
    "histogram bin (kT sqrt(1/n - 1/N) for n of N effective samples); with few transitions per block "
    "they underestimate the true uncertainty. A profile whose samples lie in fewer than two blocks (a single "
    "frame) has no errors (empty); from fewer than 8 blocks they are rough.",
]


@dataclass
class ProfileSet:
    """Profiles of a tracking result; every free energy in kJ/mol (written by :meth:`save`).

    Attributes
    ----------
    temperature_k : float
    profiles : DataFrame
        type, torsion (empty for pooled rows), estimate (``histogram`` / ``kernel``), angle_deg,
        probability_density_per_deg, free_energy_kj_mol, free_energy_err_kj_mol, sampled,
        n_samples, bandwidth_deg (kernel rows). The text columns are categorical.
    minima, barriers, state_free_energies : DataFrame
        From the histogram profiles, per type and per torsion (``torsion`` empty when pooled).
    profiles_2d : DataFrame or None
        See :func:`~dihedra.analysis.profiles.maps.pair_profiles`.
    by_type : dict
        type -> (histogram :class:`Profile1D`, kernel :class:`Profile1D`) of the pooled profiles.
    settings : dict
        Temperature, bin width, bandwidth rule, bootstrap, seed, feature rules (for the JSON);
        also available as :attr:`parameters`.
    notices : list of str
    """

    temperature_k: float
    profiles: pd.DataFrame
    minima: pd.DataFrame
    barriers: pd.DataFrame
    state_free_energies: pd.DataFrame
    by_type: dict
    settings: dict
    profiles_2d: pd.DataFrame | None = None
    notices: list = field(default_factory=list)

    @property
    def parameters(self):
        """The settings of the analysis (the same dict as :attr:`settings`)."""
        return self.settings

    def save(self, folder, energy_unit="kJ/mol"):
        """Write profiles.csv, minima.csv, barriers.csv, state_free_energies.csv, profiles.json
        (and profiles_2d.csv) into ``folder`` (made if missing), each atomically, free energies in
        ``energy_unit`` (kJ/mol, kcal/mol or kT). Returns the paths."""
        os.makedirs(folder, exist_ok=True)
        paths = []
        tables = [("profiles.csv", self.profiles), ("minima.csv", self.minima), ("barriers.csv", self.barriers),
                  ("state_free_energies.csv", self.state_free_energies)]
        if self.profiles_2d is not None:
            tables.append(("profiles_2d.csv", self.profiles_2d))
        with file_set(folder):   # (in place together: an interruption leaves the earlier set whole)
            for name, frame in tables:
                converted = (frame if canonical_energy_unit(energy_unit) == "kJ/mol"  # no copy of 6.5 million rows
                             else convert_energy_columns(frame, energy_unit, self.temperature_k))
                paths.append(write_table(converted, folder, name))
            info = dict(self.settings)
            info["energy_unit"] = canonical_energy_unit(energy_unit)
            info["files"] = [os.path.basename(p) for p in paths]
            info["notices"] = list(self.notices)
            info["cautions"] = _CAUTIONS[:2] + [self.settings.get("type_errors", _CAUTIONS[2])]
            paths.append(write_json(info, folder, "profiles.json"))
        return paths


# ----------------------------------------------------------------------------------------------
# Types and their members
# ----------------------------------------------------------------------------------------------

def _fine_width(blocks):
    edges = np.asarray(blocks.get("bin_edges_deg", np.linspace(-180, 180, 361)))
    return float(edges[1] - edges[0])


def _type_members(result):
    types = list(result.torsion_set.types)
    order = list(dict.fromkeys(types))
    codes = pd.Categorical(types, categories=order).codes
    by_code = np.argsort(codes, kind="stable")
    bounds = np.searchsorted(codes[by_code], np.arange(len(order) + 1))
    return order, {t: by_code[bounds[k]:bounds[k + 1]] for k, t in enumerate(order)}


def _pooled_counts(values, order, members, batch=1024):
    """Sum of ``values`` (n_blocks, n_torsions, ...) over the members of each type: (n_blocks, n_types, ...)."""
    out = np.zeros((values.shape[0], len(order)) + values.shape[2:])
    for k, t in enumerate(order):
        idx = members[t]
        for lo in range(0, len(idx), batch):
            out[:, k] += values[:, idx[lo:lo + batch]].sum(axis=1)
    return out


def type_profiles(result, temperature_k, bin_width_deg=DEFAULT_BIN_WIDTH_DEG, bandwidth_deg=None,
                  n_bootstrap=DEFAULT_BOOTSTRAP, seed=DEFAULT_SEED, types=None, kernel=True):
    """Pooled histogram (and kernel) profiles of each torsion type.

    Returns
    -------
    dict : type -> (histogram Profile1D, kernel Profile1D or None)
    """
    kt = kt_kj_mol(temperature_k)
    blocks = result.blocks
    fine = _fine_width(blocks)
    factor = check_bin_width(bin_width_deg, fine)
    order, members = _type_members(result)
    if types is not None:
        order = [t for t in order if t in set(types)]
    hist = kept_block(blocks, "histograms")   # (narrow counts: summed per type in float64)
    mult = bootstrap_multiplicities(blocks["hist_block_replica"], n_bootstrap, np.random.default_rng(seed))
    pooled = _pooled_counts(hist, order, members)
    _, hist_ratio, fine_ratio = stack_ratios(short_run_ratio_map(result, order), result.scheme, order,
                                             pooled.shape[-1] // factor, pooled.shape[-1])
    hprof = _profiles_from_blocks(rebin(pooled, factor), mult, kt, bin_width_deg, effective_count_scale(result),
                                  hist_ratio)
    kprof = [None] * len(order)
    if kernel and order:
        neff = effective_samples(result.populations, result.torsion_set.labels)
        bws = _bandwidths(bandwidth_deg, pooled.sum(axis=0), [result.scheme.for_type(t) for t in order],
                          [neff[members[t]].sum() for t in order], fine)
        kprof = _kernel_profiles(pooled, mult, kt, bws, fine, ratio=fine_ratio)
    return {t: (h, k) for t, h, k in zip(order, hprof, kprof)}


# ----------------------------------------------------------------------------------------------
# The stacks
# ----------------------------------------------------------------------------------------------

@dataclass
class _Stacks:
    """What every stack of torsions (or types) of one :func:`free_energy_profiles` call needs.

    ``hist`` (n_blocks, n_torsions, n_fine) are the fine block histograms and ``mult`` their
    bootstrap multiplicities; ``state_counts`` (n_blocks', n_torsions, n_states) the state counts in
    blocks as long as the histogram blocks and ``smult`` theirs (:func:`state_blocks`); ``fine`` the
    fine bin width and ``factor`` the fine bins per histogram bin; ``neff`` the effective samples of
    each torsion (:func:`effective_samples`); ``types`` the type of each torsion (its own scheme
    when the run used a set of schemes); ``count_scale`` the effective samples per histogram count
    (:func:`effective_count_scale`); ``ratio`` the short-run ratios by type (:func:`short_run_ratio_map`);
    ``resampled`` the result when it stored its estimator's resamples (umbrella windows: the types
    are profiled from them, :mod:`.resampled`) and ``alone`` the bandwidths of the torsions alone in
    their type, by code, with their rows (the type's, from those resamples).
    """

    hist: np.ndarray
    mult: np.ndarray
    state_counts: np.ndarray
    smult: np.ndarray
    kt: float
    fine: float
    factor: int
    bin_width_deg: float
    bandwidth_deg: float | None
    scheme: object
    neff: np.ndarray
    types: list
    n_blocks: int = 0
    count_scale: float = 1.0
    ratio: dict = field(default_factory=dict)
    resampled: object = None   # the result, when it stored its estimator's resamples (umbrella windows)
    alone: tuple = ({}, None)  # {code: bandwidth} of the torsions alone in their type, their rows from those

    def ratios(self, types):   # (by state, by histogram bin, by fine bin)
        return stack_ratios(self.ratio, self.scheme, types, self.hist.shape[-1] // self.factor, self.hist.shape[-1])

    @classmethod
    def of(cls, result, kt, bin_width_deg, bandwidth_deg, n_bootstrap, seed):
        blocks = result.blocks
        fine = _fine_width(blocks)
        factor = check_bin_width(bin_width_deg, fine)
        mult = bootstrap_multiplicities(blocks["hist_block_replica"], n_bootstrap, np.random.default_rng(seed))
        sc, _, smult = state_blocks(result, n_bootstrap, seed)
        hist, types = kept_block(blocks, "histograms"), list(result.torsion_set.types)
        return cls(hist=hist, n_blocks=int(hist.shape[0]), mult=mult, state_counts=sc, smult=smult, kt=kt, fine=fine,
                   factor=factor, bin_width_deg=bin_width_deg, bandwidth_deg=bandwidth_deg, scheme=result.scheme,
                   neff=effective_samples(result.populations, result.torsion_set.labels), types=types,
                   count_scale=effective_count_scale(result), ratio=short_run_ratio_map(result, types),
                   resampled=result if has_resamples(result) else None)


def _type_stack(s, order, members):
    """Bandwidths, table rows and {type: (histogram, kernel) Profile1D} of the types (pooled)."""
    pooled = _pooled_counts(s.hist, order, members)
    kish = None if s.resampled is None else resampled_effective_samples(s.resampled)
    bws = _bandwidths(s.bandwidth_deg, pooled.sum(axis=0), [s.scheme.for_type(t) for t in order],
                      [s.neff[members[t]].sum() for t in order] if kish is None else kish, s.fine)
    if s.resampled is not None:   # umbrella windows: their MBAR profiles with the errors of their own bootstrap
        hstack, kernel, states, by_type = resampled_type_stacks(s.resampled, order, s.kt, s.bin_width_deg, bws)
        return bws, _stack_tables(np.arange(len(order)), np.zeros(len(order), dtype=np.int64), hstack, kernel,
                                  states, s.kt), by_type
    ratio, hist_ratio, fine_ratio = s.ratios(order)
    hstack = _histogram_stack(rebin(pooled, s.factor), s.mult, s.kt, s.bin_width_deg, s.count_scale, hist_ratio)
    kstack = _kernel_stack(pooled, s.mult, s.kt, bws, s.fine, s.count_scale, fine_ratio)
    rows = _stack_tables(np.arange(len(order)), np.zeros(len(order), dtype=np.int64), hstack,
                         (bws, kstack.samples, kstack.density_per_deg, kstack.free_energy_kj_mol,
                          np.where(kstack.sampled, kstack.free_energy_err_kj_mol, np.nan), kstack.sampled),
                         _state_free_energy_stack(_pooled_counts(s.state_counts, order, members), s.kt, s.smult,
                                                  ratio), s.kt)
    return bws, rows, dict(zip(order, zip(_unstack(hstack), _unstack(kstack))))


def _torsion_stack(span, s, codes):
    """Bandwidths and table rows of the torsions ``span`` = (start, stop) (runs in a thread)."""
    start, stop = span
    sub = np.asarray(s.hist[:, start:stop, :], dtype=float)
    bws = _bandwidths(s.bandwidth_deg, sub.sum(axis=0), [s.scheme.for_type(t) for t in s.types[start:stop]],
                      s.neff[start:stop], s.fine)
    ratio, hist_ratio, fine_ratio = s.ratios(s.types[start:stop])
    hstack = _histogram_stack(rebin(sub, s.factor), s.mult, s.kt, s.bin_width_deg, s.count_scale, hist_ratio)
    rows = _stack_tables(codes[start:stop], np.arange(start, stop) + 1, hstack,
                         _kernel_columns(sub, s.mult, s.kt, bws, s.fine, s.count_scale, fine_ratio),
                         _state_free_energy_stack(s.state_counts[:, start:stop, :], s.kt, s.smult, ratio), s.kt)
    alone = [k for k in s.alone[0] if start < k <= stop]
    if not alone:
        return bws, rows
    bws = np.array(bws, dtype=float)
    bws[np.asarray(alone) - 1 - start] = [s.alone[0][k] for k in alone]
    return bws, _replaced(rows, s.alone[1], alone)


def _ordered_map(func, items, threads):
    """``map(func, items)`` over a few threads, in order, with at most 2 x threads items in flight.

    NumPy releases the interpreter lock in its array loops, so stacks of torsions run in parallel.
    """
    from collections import deque
    from concurrent.futures import ThreadPoolExecutor

    from threadpoolctl import threadpool_limits  # a dependency of MDAnalysis

    if threads <= 1:
        yield from map(func, items)
        return
    # one BLAS thread per stack: the stacks themselves use the cores
    with threadpool_limits(1, user_api="blas"), ThreadPoolExecutor(threads) as pool:
        pending = deque()
        for item in items:
            pending.append(pool.submit(func, item))
            if len(pending) >= 2 * threads:
                yield pending.popleft().result()
        while pending:
            yield pending.popleft().result()


# ----------------------------------------------------------------------------------------------
# The analysis
# ----------------------------------------------------------------------------------------------

def free_energy_profiles(result, *, temperature_k=None, bin_width_deg=DEFAULT_BIN_WIDTH_DEG, bandwidth_deg=None,
                         n_bootstrap=DEFAULT_BOOTSTRAP, seed=DEFAULT_SEED, per_torsion=True, pairs=None,
                         pair_bin_width_deg=DEFAULT_PAIR_BIN_WIDTH_DEG, log=None):
    """Free-energy profiles, minima, barriers and state free energies of a tracking result.

    Torsions are handled in stacks of :data:`_BATCH`: every step (bootstrap resampling of blocks,
    free energies, kernel smoothing, minima and barriers, state free energies) is one array
    operation over the torsions of a stack, and the tables are built column by column.

    Parameters
    ----------
    result : TrackResult
        From :func:`dihedra.tracking.track` or :func:`dihedra.io.resultsdir.load_results`, or an
        analysis that holds one (:func:`dihedra.trajectory.result.as_result`).
    temperature_k : float, optional
        Required unless the run recorded one (then it is used and announced through ``log``).
    bin_width_deg : float
        Histogram bin width; a multiple of the fine bin (1 degree) that divides 360.
    bandwidth_deg : float, optional
        Kernel standard deviation; default by the rule of :mod:`dihedra.analysis.profiles.estimation`.
    n_bootstrap, seed : int
        Block-bootstrap resamples and their random seed.
    per_torsion : bool
        Also profile every torsion (not only the pooled types).
    pairs : list of (str, str), optional
        Torsion pairs (labels or types) for 2-D profiles (needs the angle time series).
    pair_bin_width_deg : float
        Bin width of the 2-D profiles.
    log : callable, optional
        Receives progress and notices.

    Returns
    -------
    ProfileSet
        Nothing is written; :meth:`ProfileSet.save` writes the files.
    """
    result = as_result(result)
    say = log or (lambda msg: None)
    check_pairs(result, pairs, pair_bin_width_deg)   # before any work or message
    early = []
    temperature_k = resolve_temperature(temperature_k, result.summary, say, early)
    early.extend(windows_error_notices(result, per_torsion))
    kt = kt_kj_mol(temperature_k)
    n_bootstrap = check_estimate_options(n_bootstrap, bandwidth_deg)
    s = _Stacks.of(result, kt, bin_width_deg, bandwidth_deg, n_bootstrap, seed)
    order, members = _type_members(result)
    labels = result.torsion_set.labels
    tables = _ProfileTables()
    bws, rows, by_type = _type_stack(s, order, members)
    per_profile = len(rows["profiles"]["angle_deg"]) // max(1, len(order))   # (histogram and kernel rows)
    tables.tables["profiles"].reserve(per_profile * (len(order) + (len(labels) if per_torsion else 0)),
                                      {"type": np.int32, "torsion": np.int32, "estimate": np.int8})
    tables.add(rows)
    bandwidths = [bws]
    if s.resampled is not None:   # (a torsion alone in its type: the type's resamples are its own)
        alone = {k: int(members[t][0]) + 1 for k, t in enumerate(order) if len(members[t]) == 1}
        s.alone = ({alone[k]: float(bws[k]) for k in alone}, _recoded(rows, alone))
    # per torsion, in stacks (bounded memory), a few stacks at a time in threads
    if per_torsion:
        type_index = {t: k for k, t in enumerate(order)}
        codes = np.array([type_index[t] for t in result.torsion_set.types], dtype=np.int64)
        spans = [(lo, min(len(labels), lo + _BATCH)) for lo in range(0, len(labels), _BATCH)]
        for bws, rows in _ordered_map(functools.partial(_torsion_stack, s=s, codes=codes), spans, _THREADS):
            tables.add(rows)
            bandwidths.append(bws)
    n_error_blocks, block_notices = error_blocks(s.hist, members, labels if per_torsion else None)
    s.hist = None   # (the fine histograms are done with: their memory serves the tables)
    profiles, minima, barriers, state_dg = tables.frames(order, labels, s.scheme.labels)
    if len(s.scheme.coded_parts()) > 1 and len(state_dg):   # a set of schemes: each type's own states
        own = [st in s.scheme.states_of_type(ty) for ty, st in zip(state_dg["type"], state_dg["state"])]
        state_dg = state_dg[np.asarray(own, dtype=bool)].reset_index(drop=True)
    state_dg = with_spread_between_torsions(state_dg, getattr(result, "populations_by_type", None), s.kt,
                                            [labels[k - 1] for k in s.alone[0]])
    names = [("", t) for t in order] + (list(zip(labels, result.torsion_set.types)) if per_torsion else [])
    settings = _settings(s, temperature_k, n_bootstrap, seed, names, np.concatenate(bandwidths), n_error_blocks)
    pset = ProfileSet(temperature_k=temperature_k, profiles=profiles, minima=minima, barriers=barriers,
                      state_free_energies=state_dg, by_type=by_type, settings=settings,
                      notices=early + block_notices + profile_notices(by_type, barriers))
    pset.notices.extend(type_notices(result))
    if pairs:
        frames = []
        for a, b in pairs:
            say(f"2-D profile of {a} and {b} (reading angles.parquet in chunks)")
            frames.append(pair_profiles(result, a, b, temperature_k=temperature_k, bin_width_deg=pair_bin_width_deg,
                                        n_bootstrap=n_bootstrap, seed=seed, notices=pset.notices))
        pset.profiles_2d = pd.concat(frames, ignore_index=True)
        settings["pair_bin_width_deg"] = float(pair_bin_width_deg)
    return pset


def _settings(s, temperature_k, n_bootstrap, seed, names, bandwidths, n_error_blocks):
    """The settings of a :class:`ProfileSet`; ``names`` (torsion, type) of each bandwidth; ``n_error_blocks``
    the blocks with samples of the best-sampled type (below 2 no profile has an error: :func:`error_blocks`)."""
    return {
        "temperature_k": temperature_k, "kt_kj_mol": s.kt, "bin_width_deg": float(s.bin_width_deg),
        "fine_bin_width_deg": s.fine, "n_bootstrap": n_bootstrap, "seed": seed,
        "bootstrap": "blocks resampled with replacement within each replica",
        "n_histogram_blocks": int(s.n_blocks), "n_blocks_with_samples": int(n_error_blocks),
        "bandwidth_rule": ("given" if s.bandwidth_deg is not None else
                           "0.9 * within-arc standard deviation * n_effective^(-1/5), at least the fine bin"),
        "bandwidths_deg": [{"type": typ, "torsion": tor, "bandwidth_deg": float(bw)}
                           for (tor, typ), bw in zip(names, bandwidths)],
        "error_floor": "kT sqrt(1/n - 1/N): a histogram bin's error is at least that of counting n effective "
                       "samples of N",
        "effective_samples_per_count": float(s.count_scale),
        "minimum_depth_rule": f"max({MIN_DEPTH_KT} kT, {MIN_DEPTH_SIGMA} combined standard errors)",
        "extremum_refinement": "least-squares cubic through the five bins around the extreme bin (vertex within "
                               "one bin, not beyond the bin's own value), else the three-point parabola, "
                               "else the bin",
        "state_free_energy_reference": "most populated state",
        "scheme": s.scheme.name,
        **({} if s.resampled is None else resampled_settings(s.resampled, s.bandwidth_deg)),
    }
