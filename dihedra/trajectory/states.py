"""Torsion states of the atoms you have: the analysis class of dihedra, in the MDAnalysis idiom.

:class:`TorsionStates` takes an ``AtomGroup`` (or a ``Universe``), selects its torsions, and
``run()`` streams the trajectory once (serial, or split over processes with the
``multiprocessing`` and ``dask`` backends, with identical results). It leaves tidy tables in
``results`` and writes nothing; every analysis of dihedra (profiles, kinetics, comparison with a
scan, couplings) takes the analysis itself as its input.

Example
-------
>>> import MDAnalysis as mda
>>> import dihedra
>>> u = mda.Universe(dihedra.example_path("hexane.pdb"), dihedra.example_path("hexane.xtc"))
>>> ts = dihedra.TorsionStates(u.atoms, torsions="rotatable", scheme="anti-gauche").run(stop=20)
>>> ts.results.populations_by_type.columns.tolist()[:5]
['type', 'state', 'population', 'population_err', 'n_torsions']
>>> sorted(ts.results.populations_by_type["state"].unique())
['anti', 'gauche+', 'gauche-']
"""

from __future__ import annotations

import time
import warnings

import numpy as np

from ..errors import DihedraError, SelectionError
from ..selection.choice import choose_schemes
from ..units import check_temperature
from ..selection.specs import select_torsions
from ..selection.torsions import TorsionSet
from .assemble import assemble_result, block_sums, make_summary, pass_threads, replica_info, scheme_table
from .convergence import convergence_tables
from .timeblocks import pass_time_blocks
from .discard import parse_discard, plan_discard
from .result import MemorySeries
from .series_output import MemorySeriesFactory
from .trackpass import TorsionPass

#: The tables that :class:`TorsionStates` leaves in ``results``.
TABLES = ("torsions", "populations", "populations_by_type", "populations_by_replica", "conformers",
          "conformers_by_type")


class TorsionStates(TorsionPass):
    """States, populations with autocorrelation-aware errors, and conformers of the torsions of an
    atom group, in one pass over the trajectory.

    Parameters
    ----------
    atomgroup : MDAnalysis.AtomGroup or MDAnalysis.Universe
        The atoms whose torsions are followed: the specification is applied to the whole
        topology and only torsions whose four atoms are all in ``atomgroup`` are kept.
    torsions : str, list of str or TorsionSet
        Torsion specifications: ``"rotatable"``, ``"protein-backbone"``, ``"protein-sidechains"``,
        ``"nucleic-backbone"``, four 0-based atom indices ``"A,B,C,D"``, or a TOML file of named
        torsions (see :func:`dihedra.select_torsions`); or a ready :class:`TorsionSet`.
    scheme : str or StateScheme, optional
        State scheme: ``"anti-gauche"``, ``"staggered-eclipsed[:N]"``, ``"klyne-prelog"``,
        ``"cis-trans"``, ``"coplanar-perpendicular"``, ``"symmetric-rotor"``, ``"syn-anti"``,
        ``"sugar-pucker"``, the sets ``"chi-rotamers"``, ``"protein"`` and ``"nucleic"``, a TOML
        file of named sectors, or a
        :class:`StateScheme`; or chosen per torsion type: ``"auto"`` (the chemistry of the central
        bond), ``"basins"`` (the basins of the sampled distribution, by a first pass in ``run()``;
        needs ``temperature_k``) or a scheme map (TOML; see :mod:`dihedra.selection.choice`).
        Default: ``"protein"`` when only protein torsions are chosen, ``"nucleic"`` for
        ``"nucleic-backbone"`` alone, else ``"anti-gauche"``.
    weights : array-like, optional
        One weight per analysed frame (reweighting a biased run).
    keep_states : bool
        Keep the state time series in memory (``results.states``; int8 codes, 1 byte per torsion
        and frame); the kinetics need it.
    keep_angles : bool
        Keep the angle time series too (``results.angles``, float32 degrees; 4 bytes per torsion
        and frame); 2-D profiles need it (kinetics runs without it, from the state codes and the
        core bits of every frame).
    dt_ps : float, optional
        Time between stored frames in ps, replacing the trajectory's own.
    temperature_k : float, optional
        The simulation temperature, recorded for the analyses that need one.
    bin_width_deg : float
        Width of the fine angle histograms (a divisor of 360; default 1 degree).
    n_state_blocks, n_hist_blocks : int
        Blocks for the population errors (blocking analysis) and for the bootstrap errors of
        profiles.
    discard : str or int, optional
        Drop the start of the analysed frames: ``"auto"`` (the start detected by a quick first pass,
        see :mod:`dihedra.trajectory.discard`), a number of frames (``500``) or a time
        (``"250 ps"``); ``weights`` are still given for every analysed frame.
    keep_variants : bool
        Type protein and nucleic-acid torsions by the topology's residue name (``HSD:psi``)
        instead of the standard residue (``HIS:psi``, the default).
    verbose : bool
        Show a progress bar.

    Attributes
    ----------
    results.torsions : DataFrame
        One row per torsion: label, type, atom indices and names, residue, group.
    results.populations : DataFrame
        Per torsion and state: ``population`` (fraction), ``population_err`` (standard error from
        block averaging), ``n_effective``, ``n_samples``.
    results.populations_by_type, results.populations_by_replica : DataFrame
        Pooled over the torsions of a type (with the heterogeneity between them: ``i_squared``,
        ``cochran_q``, ...); per replica (one here).
    results.conformers, results.conformers_by_type : DataFrame
        Joint states of the torsions of each group (molecule or residue).
    results.schemes : DataFrame
        The states of every torsion type (arcs, why it follows its scheme, basin minima).
    results.states, results.angles : DataFrame
        The time series (``replica``, ``frame``, ``time_ps``, one column per torsion), when kept.
    results.convergence : DataFrame
        With the states kept: per type, the start, errors, forecast and verdict of
        :func:`dihedra.convergence` (an unequilibrated start is also a notice).
    tracking_result : TrackResult
        The same as one object: what every analysis of dihedra takes.

    Notes
    -----
    ``run(start, stop, step, frames, backend="serial" | "multiprocessing" | "dask",
    n_workers=N)`` gives identical results with every backend: workers sum exact block counts.
    """

    def __init__(self, atomgroup, torsions="rotatable", scheme=None, *, weights=None, keep_states=True,
                 keep_angles=False, dt_ps=None, temperature_k=None, bin_width_deg=1.0, n_state_blocks=64,
                 n_hist_blocks=16, discard=None, keep_variants=False, verbose=False):
        universe = getattr(atomgroup, "universe", None)
        if universe is None or not hasattr(atomgroup, "atoms"):
            raise DihedraError(f"TorsionStates takes an MDAnalysis AtomGroup or Universe; got "
                               f"{type(atomgroup).__name__}.")
        tset = torsions if isinstance(torsions, TorsionSet) else select_torsions(universe, torsions,
                                                                                         keep_variants=keep_variants)
        tset = torsions_within(tset, atomgroup.atoms, universe)
        self._choice = choose_schemes(scheme, universe, tset, torsions)
        if self._choice.needs_data:   # (basins: imported only for them)
            from .basins import need_temperature

            need_temperature(temperature_k)
        self._basins = self._basin_record = None
        scheme = self._choice.provisional() if self._choice.needs_data else self._choice.resolve()
        check_pass_options(dt_ps=dt_ps, temperature_k=temperature_k, bin_width_deg=bin_width_deg,
                           n_state_blocks=n_state_blocks, n_hist_blocks=n_hist_blocks)
        series = MemorySeriesFactory() if keep_states or keep_angles else None
        super().__init__(universe, tset, scheme, n_state_blocks=n_state_blocks, n_hist_blocks=n_hist_blocks,
                         bin_width_deg=bin_width_deg, weights=weights, series=series, keep_angles=keep_angles,
                         dt_ps=dt_ps, verbose=verbose)
        self.temperature_k = temperature_k
        self._discard, self._discard_record = (discard, parse_discard(discard)), None
        self._weights_given = self.weights
        self._make_tables = True
        self._threads_asked = None
        self._range = {}

    def plumb(self, *, parts_dir=None, series=None, chunk_frames=None, replica=0, defer_close=False, threads=None):
        """Internal settings of a pass that :func:`dihedra.track` runs for one replica of a results
        folder: no tables of its own (the replicas' block sums are merged), the time series
        written by ``series``, worker files in ``parts_dir``, the replica number."""
        self._make_tables = False
        self.parts_dir, self.series, self.chunk_frames = parts_dir, series, chunk_frames
        self.replica, self.defer_close, self._threads_asked = int(replica), bool(defer_close), threads
        return self

    def run(self, start=None, stop=None, step=None, frames=None, verbose=None, *, n_workers=None, n_parts=None,
            backend=None, unsupported_backend=False, progressbar_kwargs=None):
        """Stream the frames and fill ``results`` (see :class:`MDAnalysis.analysis.base.AnalysisBase`).

        A serial run on a machine with two or more cores reads the trajectory in one thread and
        computes in a second one; the results are the same."""
        check_frame_range(start, stop, step)
        chosen = (len(range(*self._trajectory.check_slice_indices(start, stop, step))) if frames is None else
                  int(np.count_nonzero(frames)) if np.asarray(frames).dtype == bool else len(frames))
        if chosen == 0:   # (else an IndexError deep in the pass)
            if frames is not None:
                raise DihedraError("frames selects no frame; give the indices (or a mask) of at least one.")
            raise no_frames_error("the trajectory", start, stop, step, self._trajectory.n_frames)
        self.threads = pass_threads(self._threads_asked, backend or "serial")
        self._range = dict(start=start, stop=stop, step=step)
        self._started = time.time()
        if self._discard[1] is not None and self._make_tables:
            start, frames = self._drop_start(start, stop, step, frames)
        if self._choice.needs_data and self._basins is None:
            self._find_basins(start, stop, step, frames, backend, n_workers)
        kwargs = dict(start=start, stop=stop, step=step, frames=frames, verbose=verbose)
        if backend not in (None, "serial") or n_workers not in (None, 1):
            kwargs.update(n_workers=n_workers, n_parts=n_parts, backend=backend,
                          unsupported_backend=unsupported_backend)
        if progressbar_kwargs is not None:
            kwargs["progressbar_kwargs"] = progressbar_kwargs
        with warnings.catch_warnings():
            warnings.filterwarnings("ignore", message="Reader has no dt information")
            warnings.filterwarnings("ignore", category=DeprecationWarning)
            return super().run(**kwargs)

    def _drop_start(self, start, stop, step, frames):
        """The first frame (or the frames) left after ``discard``; the weights of those frames."""
        if frames is not None:
            chosen = np.asarray(frames)
            chosen = np.flatnonzero(chosen) if chosen.dtype == bool else chosen.astype(np.int64)
        else:
            chosen = np.arange(*self._trajectory.check_slice_indices(start, stop, step))
        given = self._weights_given
        if given is not None and len(given) != len(chosen):
            raise DihedraError(f"weights has {len(given)} values but {len(chosen)} frames are analysed; "
                               "give one weight per analysed frame.")
        (k,), self._discard_record = plan_discard(self._discard[0], [(self._universe, chosen, given, self.dt_ps)],
                                                  self.torsion_set, self.scheme)
        self.weights = None if given is None else np.asarray(given)[k:]
        return (start, chosen[k:]) if frames is not None else (int(chosen[k]), None)

    def _find_basins(self, start, stop, step, frames, backend, n_workers):
        """The basins of the types that asked for them: a first pass over the frames of this run."""
        from .basins import plan_basins

        if frames is not None:
            chosen = np.asarray(frames)
            chosen = np.flatnonzero(chosen) if chosen.dtype == bool else chosen.astype(np.int64)
        else:
            chosen = np.arange(*self._trajectory.check_slice_indices(start, stop, step))
        self.scheme, self._basins, self._basin_record, notes = plan_basins(
            self._choice, [(self._universe, chosen, self.weights, self.dt_ps)], self.torsion_set, self.temperature_k,
            backend=backend if isinstance(backend, str) else None, n_workers=n_workers or 1)
        self.torsion_set.notices.extend(n for n in notes if n not in self.torsion_set.notices)

    def _prepare(self):
        if self.weights is not None and len(self.weights) != self._n_total:
            raise DihedraError(f"weights has {len(self.weights)} values but {self._n_total} frames are analysed; "
                               "give one weight per analysed frame.")
        super()._prepare()

    def _conclude(self):
        super()._conclude()
        if self._make_tables:
            self._fill_results()

    def _fill_results(self):
        """The tables, the summary and the time series of this run, as ``results`` and as one
        :class:`TrackResult` (``tracking_result``)."""
        notices = list(self.torsion_set.notices)
        blocks = block_sums([self])
        result = assemble_result(self.torsion_set, self.scheme, self._universe, notices, blocks)
        result.schemes = scheme_table(self.scheme, self.torsion_set.types, self._choice.reasons, self._basins)
        result.time_blocks = pass_time_blocks([self], self.torsion_set.types, self.scheme.labels)
        reader = self._universe.trajectory
        info = replica_info(self._universe, getattr(reader, "filename", None), self.frames, self, self.dt_ps,
                            notices)
        params = dict(self._range, workers=None, threads=int(self.threads), keep_angles=self.keep_angles,
                      weights="array" if self.weights is not None else None, weights_column=None, dt_ps=self.dt_ps,
                      n_state_blocks=self.n_state_blocks, n_hist_blocks=self.n_hist_blocks,
                      bin_width_deg=self.bin_width_deg, temperature_k=self.temperature_k,
                      discard=self._discard_record,
                      scheme_choice=dict(self._choice.record(), basins=self._basin_record))
        result.summary.update(make_summary(getattr(self._universe, "filename", None), [info], self.scheme,
                                           self.torsion_set, params, notices,
                                           time.time() - getattr(self, "_started", time.time())))
        parts = self.results.pop("series_parts", None) or []
        if parts:
            result.series = MemorySeries.from_parts(parts)
        if result.has_series("states"):
            conv = convergence_tables(result, temperature_k=self.temperature_k)
            self.results.convergence = conv.convergence
            notices.extend(n for n in conv.run_notices(self._discard_record) if n not in notices)
            result.summary["notices"] = list(notices)
        for name in TABLES:
            self.results[name] = getattr(result, name)
        if result.has_series("states"):
            self.results.states = result.states()
        if result.has_series("angles"):
            self.results.angles = result.angles()
        self.results.blocks = result.blocks
        self.results.schemes = result.schemes
        self.results.summary = result.summary
        self.results.notices = result.notices
        self.tracking_result = result


def positive_number(name, value, unit="", allow_none=True):
    """``value`` as a finite positive float (``None`` passes when ``allow_none``); else a
    :class:`DihedraError` naming ``name``."""
    if value is None and allow_none:
        return None
    try:
        number = float(value)
    except (TypeError, ValueError):
        number = float("nan")
    if isinstance(value, bool) or not (np.isfinite(number) and number > 0):
        raise DihedraError(f"{name} must be a positive number{' of ' + unit if unit else ''}; got {value!r}.")
    return number


def whole_number(name, value, minimum=1, allow_none=True):
    """``value`` as an int of at least ``minimum`` (``None`` passes when ``allow_none``)."""
    if value is None and allow_none:
        return None
    ok = isinstance(value, (int, np.integer)) and not isinstance(value, bool)
    if not ok and isinstance(value, (float, np.floating)) and np.isfinite(value) and value == int(value):
        value, ok = int(value), True
    if not ok or int(value) < minimum:
        raise DihedraError(f"{name} must be a whole number of at least {minimum}; got {value!r}.")
    return int(value)


def check_pass_options(*, dt_ps=None, temperature_k=None, bin_width_deg=1.0, n_state_blocks=64, n_hist_blocks=16):
    """Refuse options of a trajectory pass that would give wrong numbers later: a time step or a
    temperature that is not a finite positive number, a fine bin width that does not divide 360
    (at most 65535 bins), block counts below 1."""
    positive_number("dt_ps (the time between stored frames)", dt_ps, "ps")
    if temperature_k is not None:
        check_temperature(temperature_k)
    width = positive_number("bin_width_deg", bin_width_deg, "degrees", allow_none=False)
    n_bins = int(round(360.0 / width))
    if abs(n_bins * width - 360.0) > 1e-9 or not 1 <= n_bins < 2 ** 16:
        raise DihedraError(f"bin_width_deg must divide 360 into at most 65535 bins; got {bin_width_deg!r}.")
    whole_number("n_state_blocks", n_state_blocks, allow_none=False)
    whole_number("n_hist_blocks", n_hist_blocks, allow_none=False)


def check_frame_range(start, stop, step):
    """Refuse a frame step below 1 (frames are analysed forwards) and start or stop that are not
    whole numbers."""
    whole_number("step (use every N-th frame)", step)
    for name, value in (("start", start), ("stop", stop)):
        if value is not None:
            whole_number(name, value, minimum=-(2 ** 62))


def describe_frame_range(start, stop, step):
    """A frame range in words (only what was given): 'from frame 20 up to frame 10, every 2nd frame'.

    Examples
    --------
    >>> describe_frame_range(2000, None, None)
    'from frame 2000 to the end'
    >>> describe_frame_range(None, 10, 3)
    'from the first frame up to frame 10 (not included), every 3rd frame'
    """
    first = f"from frame {start}" if start is not None else "from the first frame"
    last = f"up to frame {stop} (not included)" if stop is not None else "to the end"
    every = ""
    if step not in (None, 1):
        suffix = {1: "st", 2: "nd", 3: "rd"}.get(int(step) % 10 if int(step) % 100 not in (11, 12, 13) else 0, "th")
        every = f", every {step}{suffix} frame"
    return f"{first} {last}{every}"


def no_frames_error(where, start, stop, step, n):
    """The error of a frame range that selects none of the ``n`` frames of a trajectory."""
    return DihedraError(f"{where}: the frames {describe_frame_range(start, stop, step)} are none of its {n} frames "
                        f"(numbered 0..{n - 1}); give a start below the stop within them (start, stop; --start, "
                        "--stop on the command line).")


def torsions_within(tset, atoms, universe):
    """The torsions of ``tset`` whose four atoms are all in ``atoms`` (a notice for the others)."""
    if len(atoms) == universe.atoms.n_atoms:
        return tset
    inside = np.zeros(universe.atoms.n_atoms, dtype=bool)
    inside[atoms.ix] = True
    keep = [t for t in tset.torsions if inside[list(t.indices)].all()]
    if not keep:
        raise SelectionError(f"none of the {len(tset)} selected torsions has all four atoms in the atom group "
                             f"of {len(atoms)} atoms; select a larger group or other torsions.")
    notices = list(tset.notices)
    if len(keep) < len(tset):
        notices.append(f"{len(tset) - len(keep)} selected torsion(s) reach outside the atom group and were left "
                       "out.")
    return TorsionSet(torsions=keep, notices=notices)

