"""The tracking job: trajectories in, torsion states and populations out.

:func:`track` runs a :class:`~dihedra.trajectory.states.TorsionStates` pass over each replica (one
trajectory of the same system each), merges the block sums (blocks never span two replicas),
computes populations with their errors, and returns a :class:`~dihedra.trajectory.result.TrackResult`. With ``out`` it also writes the results
folder (:mod:`dihedra.io.resultsdir`); it is assembled in a temporary folder beside ``out`` and moved
into place at the end, so an interrupted run never leaves a half-written folder.

Example
-------
>>> from dihedra import track, example_path
>>> res = track(example_path("hexane.pdb"), [example_path("hexane.xtc")],
...             torsions="rotatable", scheme="anti-gauche", stop=50)
>>> sorted(res.populations_by_type["state"].unique())
['anti', 'gauche+', 'gauche-']
"""

from __future__ import annotations

import contextlib
import os
import shutil
import sys
import tempfile
import time

import numpy as np

from .errors import DihedraError, OutputWriteError
from .io.blocks import HISTOGRAMS_FILE, HistogramFile, narrowed_type, save_blocks
from .io.staging import StagedFolder
from .io.resultsdir import write_results
from .io.series import ParquetSeries, ParquetSeriesFactory
from .io.tables import write_json, write_table
from .selection.choice import choose_schemes
from .selection.specs import select_torsions
from .selection.torsions import TorsionSet
from .trajectory import interrupts
from .trajectory.assemble import (assemble_result, block_sums, make_summary, pass_threads, plan_workers, replica_info,
                                 scheme_table)
from .trajectory.convergence import (TARGET_ERROR, TARGET_ERROR_KJ_MOL, check_targets, convergence_tables,
                                     times_known)
from .trajectory.discard import plan_discard
from .trajectory.inputs import FileHashes, check_readable, load_universe, truncated_error, usable_frames
from .trajectory.result import BlockParts, bound_heap, release_memory
from .trajectory.states import (TorsionStates, check_frame_range, check_pass_options, describe_frame_range,
                                 no_frames_error, torsions_within, whole_number)
from .trajectory.timeblocks import pass_time_blocks
from .trajectory.weights import weight_notices, weights_per_replica


def run_inputs(topology, trajectories, torsions=None, scheme=None, weights=None):
    """The files a tracking run reads (for the output checks: a results folder never replaces
    one of them)."""
    files = [topology, *trajectories]
    for spec in ([torsions] if isinstance(torsions, (str, os.PathLike)) else list(torsions or [])):
        if isinstance(spec, (str, os.PathLike)):
            files.append(spec)
    if isinstance(scheme, (str, os.PathLike)):
        files.append(scheme)
    if weights is not None:
        files.append(str(weights))
        files.append(str(weights).rsplit(":", 1)[0])
    return [os.fspath(f) for f in files if isinstance(f, (str, os.PathLike))]


def _frame_indices(universe, start, stop, step, where):
    """The frames analysed: ``start:stop:step`` of the frames that can be read (an XTC frame cut at
    the end of the file is left out)."""
    n = usable_frames(universe.trajectory)
    span = describe_frame_range(start, stop, step)
    try:
        universe.trajectory.check_slice_indices(start, stop, step)
        frames = np.arange(*slice(start, stop, step).indices(n))
    except (ValueError, TypeError) as exc:
        raise DihedraError(f"{where}: the frames {span} are not a valid range ({exc}); give start, stop and "
                           "step (--start, --stop, --step) as whole numbers, step above 0.") from None
    if len(frames) == 0:
        raise no_frames_error(where, start, stop, step, n)
    return frames


def track(topology, trajectories=None, torsions="rotatable", scheme=None, *, start=None,
          stop=None, step=None, workers=None, backend=None, scheduler=None, keep_angles=False, weights=None, out=None,
          overwrite=False, dt_ps=None, temperature_k=None, n_state_blocks=64, n_hist_blocks=16,
          bin_width_deg=1.0, chunk_frames=None, threads=None, keep_variants=False, allow_duplicates=False,
          progress=None, log=None, discard=None, target_error=TARGET_ERROR, target_error_kj_mol=TARGET_ERROR_KJ_MOL):
    """Follow torsions through one or more replica trajectories, and write a results folder.

    Parameters
    ----------
    topology : str, MDAnalysis.Universe or MDAnalysis.AtomGroup
        Topology file (with bonds for ``rotatable``; PDB with CONECT, PSF, TPR, PRMTOP, ...), or a
        Universe / AtomGroup already loaded: its trajectory is the one replica and only torsions
        whose four atoms are in the group are followed (``trajectories`` must then be ``None``).
    trajectories : str or list of str
        One trajectory per replica of the same system (with a topology file).
    torsions : str or list of str or TorsionSet
        Torsion specifications (see :func:`dihedra.selection.specs.select_torsions`).
    scheme : str or StateScheme, optional
        State scheme name or TOML file (see :func:`dihedra.selection.schemes.get_scheme`); default
        ``protein`` when only protein torsions are chosen (cis/trans omega, side-chain rotamer
        wells), ``nucleic`` for ``nucleic-backbone`` alone (syn/anti chi, sugar pucker from
        delta), else ``anti-gauche``. Chosen per torsion type: ``"auto"`` (from the chemistry of
        the central bond, :mod:`dihedra.selection.chemistry`), ``"basins"`` (the free-energy basins
        of the sampled distribution, found by a first pass; needs ``temperature_k``; see
        :mod:`dihedra.trajectory.basins`), or a scheme map (a TOML file of rules, see
        :mod:`dihedra.selection.choice`). ``schemes.csv`` lists the states of every type and why.
    start, stop, step : int, optional
        Frame range, applied to every replica.
    workers : int or "auto", optional
        Worker processes per replica. ``"auto"`` or ``None`` (default): as many as pay on this machine for
        the size of the run (a serial run already reads and computes in two threads; a worker
        needs two more cores and about 3 x 10^8 torsion-frames to earn back its start-up; see
        :func:`dihedra.trajectory.assemble.plan_workers`); a number: at most that many, by the
        same rule, unless a parallel ``backend`` is named (then exactly that many). The choice
        is logged and recorded in the summary (``parameters.workers_choice``).
    backend : str or MDAnalysis backend object, optional
        ``serial``, ``multiprocessing``, ``dask`` or a ``BackendBase`` instance (default:
        ``multiprocessing`` when more than one worker is chosen).
    scheduler : str or distributed.Client, optional
        Address of a running dask.distributed scheduler (``tcp://host:8786``) or a client: the
        frames of every replica are spread over all its workers (see :mod:`dihedra.trajectory.distributed`
        for the shared-file-system requirement); replaces ``workers`` and ``backend``.
    keep_angles : bool
        Also write the angle time series (``angles.parquet``).
    weights : str, optional
        ``FILE[:COLUMN]`` of per-frame weights (see :func:`~dihedra.trajectory.weights.load_weights`).
    out : str, optional
        Results folder to write; without it, results stay in Python (time series in a temporary
        folder that lives as long as the result).
    overwrite : bool
        Replace an existing ``out`` (only a folder dihedra made that holds only its files).
    dt_ps : float, optional
        Time between stored frames in ps, replacing the trajectory's own.
    temperature_k : float, optional
        Recorded in the summary (profiles need it; tracking does not, except with basins).
    n_state_blocks, n_hist_blocks, bin_width_deg, chunk_frames
        Block structure and fine histogram resolution (see :class:`~dihedra.trajectory.trackpass.TorsionPass`).
    keep_variants : bool
        Type protein and nucleic-acid torsions by the topology's residue name (``HSD:psi``)
        instead of the standard residue (``HIS:psi``, the default); see
        :func:`~dihedra.selection.specs.select_torsions`.
    allow_duplicates : bool
        Accept the same trajectory (the same SHA-256) twice as two replicas; by default that is
        refused, since copies are not independent samples and would shrink every error.
    threads : int, optional
        Threads per pass: 2 lets a second thread compute while the first reads the trajectory
        (serial runs, and workers with two cores each). Default: 2 for a serial run when this
        process may use two or more cores, for workers as :func:`plan_workers` decides, else 1.
        Results are identical.
    progress : bool, optional
        Show a progress bar (default: when standard error is a terminal and the run is serial).
    log : callable, optional
        Receives progress lines (default: nothing).
    discard : str or int, optional
        Drop the start of every replica: ``"auto"`` (detected by a quick first pass, see
        :mod:`dihedra.trajectory.discard`), a number of frames (``500``) or a time (``"250 ps"``),
        counted from the first analysed frame. Recorded in the summary (``parameters.discard``).
    target_error, target_error_kj_mol : float
        Target standard errors of a population (fraction, default 0.01) and of a free-energy
        difference between states (kJ/mol, default 0.5) for the forecast of ``convergence.csv``
        (see :func:`dihedra.convergence`).

    Returns
    -------
    TrackResult

    See Also
    --------
    dihedra.TorsionStates : the same analysis on an atom group, in memory.
    """
    _check_options(start, stop, step, workers, threads, dt_ps, temperature_k, bin_width_deg, n_state_blocks,
                   n_hist_blocks, chunk_frames)
    run = _Run(out, overwrite, log)
    check_targets(target_error, target_error_kj_mol)
    group, topology, trajectories = _inputs(topology, trajectories)
    try:
        with run.phase("inputs"):
            run.begin(topology, trajectories, torsions, scheme, weights)
            digests = (_check_duplicates(trajectories, allow_duplicates, run.notices, run.hashes)
                       if group is None else {})
            universes = _universes(group, topology, trajectories, run.notices)
        with run.phase("selection"):
            tset = torsions if isinstance(torsions, TorsionSet) else select_torsions(universes[0], torsions,
                                                                                        keep_variants=keep_variants)
            if group is not None:   # (only the torsions inside the group, as TorsionStates follows them)
                tset = torsions_within(tset, group, universes[0])
        run.notices.extend(tset.notices)
        choice = choose_schemes(scheme, universes[0], tset, torsions)
        run.notices.extend(choice.notices)
        if choice.needs_data:   # (basins: imported only for them)
            from .trajectory.basins import need_temperature, plan_basins

            need_temperature(temperature_k)
        scheme = choice.provisional() if choice.needs_data else choice.resolve()
        frames = [_frame_indices(u, start, stop, step, f"trajectory {t}")
                  for u, t in zip(universes, trajectories)]
        weight_arrays, weight_column = (weights_per_replica(weights, frames) if weights is not None
                                        else ([None] * len(universes), None))
        # --discard: the start dropped where the frames are chosen, so every table starts there
        drop, discard_record = plan_discard(discard, [(u, f, w, dt_ps) for u, f, w in
                                                      zip(universes, frames, weight_arrays)], tset, scheme)
        frames = [f[k:] for f, k in zip(frames, drop)]
        weight_arrays = [None if w is None else w[k:] for w, k in zip(weight_arrays, drop)]
        run.notices.extend(weight_notices(weight_arrays))
        backend, n_workers, threads = run.plan(workers, backend, scheduler, threads, max(map(len, frames)), len(tset))
        basins = None
        if choice.needs_data:   # the basins: a first pass over the frames the run keeps
            run.say(f"basins of {len(choice.basin_types)} torsion type(s): a first pass for their histograms")
            scheme, basins, basin_record, notes = plan_basins(
                choice, [(u, f, w, dt_ps) for u, f, w in zip(universes, frames, weight_arrays)], tset, temperature_k,
                backend=backend, n_workers=n_workers, threads=threads)
            run.notices.extend(notes)
        if progress is None:
            progress = backend == "serial" and sys.stderr.isatty()
        replicas = []
        for r, (u, traj, fr, w) in enumerate(zip(universes, trajectories, frames, weight_arrays)):
            run.say(f"replica {r + 1}/{len(universes)}: {traj}: {len(fr)} frames, {len(tset)} torsions")
            tp = TorsionStates(group if group is not None else u.atoms, tset, scheme, weights=w,
                               keep_angles=keep_angles, dt_ps=dt_ps, temperature_k=temperature_k,
                               bin_width_deg=bin_width_deg, n_state_blocks=n_state_blocks,
                               n_hist_blocks=n_hist_blocks)
            tp.plumb(parts_dir=run.parts_dir, series=ParquetSeriesFactory(run.work), chunk_frames=chunk_frames,
                     replica=r, defer_close=backend == "serial", threads=threads)
            run.add_pass(tp)
            with run.hashes.paused(), run.phase("pass"):   # (the cores are the pass's)
                _run_pass(tp, traj, fr, backend, n_workers, progress, r, len(universes))
            interrupts.check()
            replicas.append(replica_info(u, traj, fr, tp, dt_ps, run.notices))
            if traj in digests:
                replicas[-1]["sha256"] = digests[traj]
        run.notices.extend(_spacing_notices(replicas))
        params = dict(start=start, stop=stop, step=step, workers=n_workers, workers_asked=workers,
                      workers_choice=run.choice, threads=int(run.passes[0].threads),
                      backend=backend if isinstance(backend, str) else type(backend).__name__,
                      scheduler=None if scheduler is None else str(backend.client.scheduler.address),
                      keep_angles=bool(keep_angles), weights=None if weights is None else str(weights),
                      weights_column=weight_column, dt_ps=dt_ps, n_state_blocks=n_state_blocks,
                      n_hist_blocks=n_hist_blocks, bin_width_deg=bin_width_deg, temperature_k=temperature_k,
                      discard=discard_record, target_error=target_error, target_error_kj_mol=target_error_kj_mol,
                      keep_variants=bool(keep_variants), allow_duplicates=bool(allow_duplicates),
                      scheme_choice=dict(choice.record(), basins=basin_record if basins is not None else None))
        return run.finish(tset, scheme, universes[0], topology, replicas, params,
                          scheme_table(scheme, tset.types, choice.reasons, basins))
    finally:
        run.close()


class _Run:
    """The working state of one :func:`track` call: the staging (or scratch) folder, the passes,
    the background writer of the block sums and a dask client it opened; :meth:`close` leaves nothing
    behind after an error."""

    def __init__(self, out, overwrite, log):
        self.out, self.overwrite = out, overwrite
        self.say = log or (lambda msg: None)
        self.started = time.time()
        self.staging = self.scratch = self.client = self.hashes = None
        self.choice = None
        # seconds by phase, for the summary (start-up: from the start of the process to track())
        self.phases = {"startup": _process_age()}
        self.peaks = {"startup": _peak_memory_mb()}
        self.passes, self.writers, self.notices = [], [], []

    def begin(self, topology, trajectories, torsions, scheme, weights):
        """Check the output folder and make the place where the run writes."""
        bound_heap()
        if self.out is not None:
            with interrupts.signals_held():   # an interrupt comes before the staging folder exists or after it is known
                self.staging = StagedFolder.begin(self.out, overwrite=self.overwrite, command="track",
                                                  inputs=run_inputs(topology, trajectories, torsions, scheme, weights))
            self.work = self.staging.path
        else:
            self.scratch = tempfile.TemporaryDirectory(prefix="dihedra-")
            self.work = self.scratch.name
        self.parts_dir = os.path.join(self.work, "_parts")
        os.makedirs(self.parts_dir)
        # the SHA-256 of the inputs (for the summary), in a background thread while the topology
        # is read and the tables are made
        self.hashes = FileHashes([f for f in (topology, *trajectories) if f and os.path.isfile(f)])

    @contextlib.contextmanager
    def phase(self, name):
        """Add the seconds of this block to phase ``name`` (``summary.json``: phase_seconds) and
        note the process's peak memory at its end (``peak_memory_mb_after``: the phase where it
        first reaches its final value set the peak)."""
        t0 = time.perf_counter()
        try:
            yield
        finally:
            self.phases[name] = self.phases.get(name, 0.0) + time.perf_counter() - t0
            self.peaks[name] = _peak_memory_mb()

    def plan(self, workers, backend, scheduler, threads, n_frames, n_torsions):
        """``(backend, workers, threads)`` of the passes: a dask.distributed backend with
        ``scheduler``; exactly ``workers`` processes with an explicit parallel ``backend``;
        else as many as pay (:func:`~dihedra.trajectory.assemble.plan_workers`, at most
        ``workers``). The choice is said (``log``) and kept in :attr:`choice`."""
        if not (workers in (None, "auto") or (isinstance(workers, (int, np.integer)) and not isinstance(workers, bool)
                                              and workers >= 1)):
            raise DihedraError(f"workers must be 'auto' or a whole number of at least 1; got {workers!r}.")
        if scheduler is not None:
            from .trajectory.distributed import DistributedBackend, connect
            client, owned = connect(scheduler)
            self.client = client if owned else None
            backend = DistributedBackend(client)
            self.choice = f"dask scheduler {client.scheduler.address}: {backend.n_workers} worker threads"
            n = backend.n_workers
        elif backend not in (None, "serial") and workers not in (None, "auto"):
            n = int(workers)   # a backend named: the workers asked for, as many as that
            self.choice = f"{n} worker process(es), backend {backend} (as asked)"
        else:
            n, planned, self.choice = plan_workers(workers, n_frames, n_torsions, threads=threads)
            if n == 1 and backend not in (None, "serial"):
                self.choice += f"; backend {backend} unused for one process (--workers N asks for N of them)"
            backend = "multiprocessing" if n > 1 and backend in (None, "serial") else backend or "serial"
            threads = planned if threads is None else threads
        self.say(f"workers: {self.choice}")
        return backend if n > 1 or not isinstance(backend, str) else "serial", n, threads

    def add_pass(self, tp):
        # a serial pass writes its last row group while the next pass starts or the populations
        # are computed (one at a time: one chunk buffer more at most)
        if self.passes:
            self.passes[-1].finish_series()
        self.passes.append(tp)

    def finish(self, tset, scheme, universe, topology, replicas, params, schemes=None):
        """The result and its folder: the block sums written by another thread (zstd and zlib
        release Python's lock) while this one computes the populations and writes the tables;
        the convergence tables; ``summary.json`` last, with the seconds and peak memory of every
        phase."""
        # the last row group of the time series first: Arrow's writer of 15,000 columns takes
        # about 100 MB while it writes, which the tables would otherwise come on top of
        with self.phase("series"):
            self.passes[-1].finish_series()
        release_memory()
        with self.phase("tables"):
            blocks = block_sums(self.passes)
            work = self.work
            narrow = [k for k in blocks if narrowed_type(k)]
            self.writers = [_Background(lambda: save_blocks(work, blocks, narrow=narrow))]
            result = assemble_result(tset, scheme, universe, self.notices, blocks)
            result.schemes = schemes
            result.time_blocks = pass_time_blocks(self.passes, tset.types, scheme.labels)
            release_memory()
            write_results(result, work, blocks=False, summary=False)
            for w in self.writers:
                w.join()
            self.writers = []
            # the histogram blocks the passes left in the scratch folder are in histograms.parquet
            # now: the result reads them from there if an analysis asks for them
            shutil.rmtree(self.parts_dir, ignore_errors=True)
            release_memory()
        with self.phase("convergence"):
            write_convergence(result, work, params, time_step_known=times_known(replicas))
        with self.phase("hashing_wait"):
            summary = make_summary(topology, replicas, scheme, tset, params, self.notices,
                                   time.time() - self.started, hashes=self.hashes)
        summary["phase_seconds"] = {k: round(v, 3) for k, v in self.phases.items()}
        summary["peak_memory_mb_after"] = {k: v for k, v in self.peaks.items() if v is not None}
        summary.update((k, v) for k, v in result.summary.items() if k not in summary)   # (the convergence)
        result.summary = summary
        write_json(summary, work, "summary.json")
        if self.staging is not None:
            result.folder = self.staging.commit()
            self.staging = None
            folder = result.folder
        else:
            result._scratch, self.scratch = self.scratch, None
            folder = result._scratch.name
        result.series = ParquetSeries(folder)
        if isinstance(blocks.stored.get("histograms"), BlockParts):
            blocks["histograms"] = HistogramFile(os.path.join(folder, HISTOGRAMS_FILE))
        return result

    def close(self):
        for w in self.writers:   # an error: let the writing thread end before the folder goes
            w.thread.join()
        for tp in self.passes:
            try:
                tp.finish_series()
            except Exception:  # noqa: BLE001 - the original error matters
                pass
        if self.hashes is not None:
            self.hashes.cancel()
        if self.client is not None:
            self.client.close()
        if self.staging is not None:
            self.staging.discard()
        if self.scratch is not None:
            self.scratch.cleanup()


def _spacing_notices(replicas):
    """A notice when replicas with known time steps store their analysed frames at different
    intervals: the populations pool frames, so each replica weighs by its frames, not its time."""
    known = [(os.path.basename(str(r["trajectory"])), r["time_between_analysed_frames_ps"]) for r in replicas
             if r.get("time_step_known")]
    spacings = sorted({round(dt, 6) for _, dt in known})
    if len(spacings) < 2 or spacings[-1] <= spacings[0] * 1.001:
        return []
    shown = ", ".join(f"{name} {dt:g} ps" for name, dt in known[:4]) + (" ..." if len(known) > 4 else "")
    return [f"the replicas' analysed frames are different times apart ({shown}): the populations pool frames, so "
            "each replica weighs by its number of frames, not by its simulated time, and kinetics refuses such a "
            "folder; analyse them with --step so that their frames are equally far apart, or track them "
            "separately."]


def write_convergence(result, folder, params, time_step_known=None):
    """convergence.csv (and its by-state, over-time and JSON companions) from the series just
    written into ``folder``; its notices join the run's, its summary ``result.summary``
    (written to summary.json by the caller)."""
    started = time.time()
    result.series = ParquetSeries(folder)
    conv = convergence_tables(result, target_error=params["target_error"],
                              target_error_kj_mol=params["target_error_kj_mol"],
                              temperature_k=params.get("temperature_k"), time_step_known=time_step_known)
    for name, table in conv.tables().items():
        write_table(table, folder, name)
    write_json(conv.record(), folder, "convergence.json")
    result.notices.extend(n for n in conv.run_notices(params.get("discard")) if n not in result.notices)
    result.summary["notices"] = list(result.notices)
    result.summary["convergence"] = dict(conv.summary(), seconds=round(time.time() - started, 3))
    return conv


def _inputs(topology, trajectories):
    """``(atom group or None, topology path, trajectory paths)`` of what :func:`track` was given."""
    if hasattr(topology, "universe") and hasattr(topology, "atoms"):
        if trajectories is not None:
            raise DihedraError("with a Universe or AtomGroup, give no trajectories: its own trajectory is analysed "
                               "(load further replicas as Universes of their own and track each).")
        u = topology.universe
        traj = getattr(u.trajectory, "filename", None)
        return topology.atoms, getattr(u, "filename", None), [traj]
    if trajectories is None:
        raise DihedraError("give at least one trajectory.")
    if isinstance(trajectories, (str, os.PathLike)):
        trajectories = [trajectories]
    trajectories = [os.fspath(t) for t in trajectories]
    if not trajectories:
        raise DihedraError("give at least one trajectory.")
    return None, os.fspath(topology), trajectories


def _check_duplicates(trajectories, allow, notices, hashes):
    """SHA-256 of every trajectory (when there are several; from ``hashes``, the run's
    :class:`~dihedra.trajectory.inputs.FileHashes`); the same file twice is refused unless
    ``allow`` (then a notice)."""
    if len(trajectories) < 2:
        return {}
    digests, first = {}, {}
    for k, t in enumerate(trajectories):
        check_readable(t, "trajectory")
        digests[t] = hashes.get(t)
        if digests[t] in first:
            j = first[digests[t]]
            text = (f"replicas {j} ({trajectories[j]}) and {k} ({t}) are the same trajectory (same SHA-256)")
            if not allow:
                raise DihedraError(f"{text}: copies are not independent replicas and would shrink every error; "
                                   "give each trajectory once, or --allow-duplicates if you mean it.")
            notices.append(f"{text}; kept as asked (--allow-duplicates), but they are not independent: errors "
                           "and replica spreads are too small.")
        first.setdefault(digests[t], k)
    return digests


def _universes(group, topology, trajectories, notices):
    """The Universe of every replica (the group's own, or each trajectory with the topology)."""
    if group is not None:
        return [group.universe]
    check_readable(topology, "topology")
    for t in trajectories:
        check_readable(t, "trajectory")
    return [load_universe(topology, t, notices) for t in trajectories]


def _check_options(start, stop, step, workers, threads, dt_ps, temperature_k, bin_width_deg, n_state_blocks,
                   n_hist_blocks, chunk_frames):
    """Refuse, before any work, the options that would give wrong numbers later."""
    check_frame_range(start, stop, step)
    if not (workers in (None, "auto") or (isinstance(workers, (int, np.integer)) and not isinstance(workers, bool)
                                          and workers >= 1)):
        raise DihedraError(f"workers must be 'auto' or a whole number of at least 1; got {workers!r}.")
    whole_number("chunk_frames", chunk_frames)
    if threads is not None:
        pass_threads(threads, "serial")
    check_pass_options(dt_ps=dt_ps, temperature_k=temperature_k, bin_width_deg=bin_width_deg,
                       n_state_blocks=n_state_blocks, n_hist_blocks=n_hist_blocks)


def _run_pass(tp, traj, frames, backend, n_workers, progress, r, n_replicas):
    """Run one replica's pass over ``frames`` (a range: first, last, step); a damaged trajectory
    becomes one clear error."""
    step = int(frames[1] - frames[0]) if len(frames) > 1 else 1
    run_kwargs = dict(start=int(frames[0]), stop=int(frames[-1]) + 1, step=step)
    if backend == "serial":
        run_kwargs.update(verbose=bool(progress),
                          progressbar_kwargs={"desc": f"replica {r + 1}/{n_replicas}", "leave": True}
                          if progress else None)
    else:
        from .trajectory.distributed import backend_kwargs

        run_kwargs.update(backend_kwargs(backend, n_workers))
    try:
        tp.run(**run_kwargs)
    except OutputWriteError:
        raise
    except (OSError, EOFError) as exc:
        raise truncated_error(traj, tp._universe, exc) from None


def _peak_memory_mb():
    """The peak resident memory of this process so far, in MB of 10^6 bytes (None where the system
    does not say)."""
    try:
        import resource
    except ImportError:   # (Windows)
        return None
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    return round(peak * (1 if sys.platform == "darwin" else 1024) / 1e6)   # (bytes on macOS, kB elsewhere)


def _process_age():
    """Seconds since this process started (Linux ``/proc``; 0 elsewhere)."""
    try:
        with open("/proc/self/stat") as fh:
            start = int(fh.read().rsplit(")", 1)[1].split()[19]) / os.sysconf("SC_CLK_TCK")
        with open("/proc/uptime") as fh:
            return max(0.0, float(fh.read().split()[0]) - start)
    except (OSError, ValueError, IndexError, AttributeError):
        return 0.0


class _Background:
    """A function run in a thread; :meth:`join` waits for it and raises its error."""

    def __init__(self, func):
        import threading

        self.error = None

        def run():
            try:
                func()
            except BaseException as exc:  # noqa: BLE001 - raised in the calling thread by join()
                self.error = exc
        self.thread = threading.Thread(target=run, name="dihedra-write", daemon=True)
        self.thread.start()

    def join(self):
        self.thread.join()
        if self.error is not None:
            raise self.error


