"""The tracking job: trajectories in, torsion states and populations out.

:func:`track` runs :class:`~dihedra.trajectory.trackpass.TorsionPass` over each replica (one trajectory of the
same system each), merges the block sums (blocks never span two replicas), computes populations
with their errors, and returns a :class:`TrackResult`. With ``out`` it also writes the results
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

import os
import shutil
import sys
import tempfile
import time
import warnings

import numpy as np
import pandas as pd

from ._version import __version__
from .errors import DihedraError, InputFileError, OutputWriteError
from .io.outputs import StagedFolder
from .io.series import ParquetSeries, ParquetSeriesFactory
from .numerics.populations import (MIN_EFFECTIVE_SAMPLES, conformer_populations, pool_by_type,
                                   replica_populations, torsion_populations)
from .selection.schemes import get_scheme
from .selection.torsions import TorsionSet, select_torsions
from .trajectory.inputs import check_readable, load_universe, sha256, truncated_error
from .trajectory.result import TrackResult
from .trajectory.trackpass import TorsionPass, conformer_layout, reduce_conformer_rows


def load_weights(spec, n_frames_per_replica):
    """Per-frame weights from ``FILE`` or ``FILE:COLUMN`` (CSV).

    The column is ``COLUMN``, else the one named ``weight``, else the last column. Rows are matched
    to analysed frames by the columns ``replica`` and ``frame`` when present, else in order (all
    replicas one after another).
    """
    path, _, column = str(spec).partition(":") if not os.path.exists(str(spec)) else (str(spec), "", "")
    check_readable(path, "weights file")
    try:
        table = pd.read_csv(path)
    except Exception as exc:  # noqa: BLE001
        raise InputFileError(f"weights file {path} is not a readable CSV table: {exc}.") from None
    if column:
        if column not in table.columns:
            raise InputFileError(f"weights file {path} has no column {column!r}; its columns are "
                                 f"{', '.join(map(str, table.columns))}.")
    else:
        column = "weight" if "weight" in table.columns else table.columns[-1]
    w = pd.to_numeric(table[column], errors="coerce").to_numpy(dtype=float)
    if np.any(~np.isfinite(w)) or np.any(w < 0):
        bad = int(np.flatnonzero(~np.isfinite(w) | (w < 0))[0])
        raise InputFileError(f"weights file {path}, column {column!r}: row {bad + 1} is not a finite "
                             f"non-negative number ({table[column].iloc[bad]!r}).")
    return w, column, table


def _weights_per_replica(spec, frames_per_replica):
    w, column, table = load_weights(spec, frames_per_replica)
    total = sum(len(f) for f in frames_per_replica)
    if "frame" in table.columns:
        rep = table["replica"].to_numpy(int) if "replica" in table.columns else np.zeros(len(table), int)
        lookup = {(int(r), int(f)): x for r, f, x in zip(rep, table["frame"].to_numpy(int), w)}
        out = []
        for r, frames in enumerate(frames_per_replica):
            missing = [int(f) for f in frames if (r, int(f)) not in lookup]
            if missing:
                raise InputFileError(f"weights file {spec} has no weight for replica {r}, frame {missing[0]} "
                                     f"({len(missing)} analysed frames are missing).")
            out.append(np.array([lookup[(r, int(f))] for f in frames]))
    else:
        if len(w) != total:
            raise InputFileError(f"weights file {spec} has {len(w)} rows but {total} frames are analysed; "
                                 "give one weight per analysed frame (replicas one after another), or "
                                 "add 'replica' and 'frame' columns.")
        out, k = [], 0
        for frames in frames_per_replica:
            out.append(w[k:k + len(frames)])
            k += len(frames)
    if sum(float(x.sum()) for x in out) <= 0:
        raise InputFileError(f"weights file {spec}: all weights of the analysed frames are zero.")
    return out, column


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
    n = universe.trajectory.n_frames
    try:
        s0, s1, st = universe.trajectory.check_slice_indices(start, stop, step)
    except (ValueError, TypeError) as exc:
        raise DihedraError(f"{where}: invalid frame range start={start} stop={stop} step={step}: {exc}.") from None
    frames = np.arange(s0, s1, st)
    if len(frames) == 0:
        raise DihedraError(f"{where}: the frame range start={start} stop={stop} step={step} selects no "
                           f"frames (the trajectory has {n} frames, numbered 0..{n - 1}).")
    return frames


def track(topology, trajectories, torsions="rotatable", scheme="anti-gauche", *, start=None,
          stop=None, step=None, workers=1, backend=None, scheduler=None, keep_angles=False, weights=None, out=None,
          overwrite=False, dt_ps=None, temperature_k=None, n_state_blocks=64, n_hist_blocks=16,
          bin_width_deg=1.0, chunk_frames=None, threads=None, progress=None, log=None):
    """Follow torsions through one or more replica trajectories.

    Parameters
    ----------
    topology : str
        Topology file (with bonds for ``rotatable``; PDB with CONECT, PSF, TPR, PRMTOP, ...).
    trajectories : str or list of str
        One trajectory per replica of the same system.
    torsions : str or list of str or TorsionSet
        Torsion specifications (see :func:`dihedra.selection.torsions.select_torsions`).
    scheme : str or StateScheme
        State scheme name or TOML file (see :func:`dihedra.selection.schemes.get_scheme`).
    start, stop, step : int, optional
        Frame range, applied to every replica.
    workers : int
        Processes per replica; more than one uses ``backend`` (default ``multiprocessing``).
    backend : str or MDAnalysis backend object, optional
        ``serial``, ``multiprocessing``, ``dask`` or a ``BackendBase`` instance.
    scheduler : str or distributed.Client, optional
        Address of a running dask.distributed scheduler (``tcp://host:8786``) or a client: the
        frames of every replica are spread over all its workers (see :mod:`dihedra.trajectory.distributed`
        for the shared-file-system requirement); replaces ``workers`` and ``backend``.
    keep_angles : bool
        Also write the angle time series (``angles.parquet``).
    weights : str, optional
        ``FILE[:COLUMN]`` of per-frame weights (see :func:`load_weights`).
    out : str, optional
        Results folder to write; without it, results stay in Python (time series in a temporary
        folder that lives as long as the result).
    overwrite : bool
        Replace an existing ``out``.
    dt_ps : float, optional
        Time between stored frames in ps, replacing the trajectory's own.
    temperature_k : float, optional
        Recorded in the summary (profiles need it; tracking does not).
    n_state_blocks, n_hist_blocks, bin_width_deg, chunk_frames
        Block structure and fine histogram resolution (see :class:`TorsionPass`).
    threads : int, optional
        Threads per pass: 2 lets a second thread compute while the first reads the trajectory
        (serial runs; each worker of a parallel run uses one thread). Default: 2 for a serial run
        when this process may use two or more cores, else 1. Results are identical.
    progress : bool, optional
        Show a progress bar (default: when standard error is a terminal and the run is serial).
    log : callable, optional
        Receives progress lines (default: nothing).

    Returns
    -------
    TrackResult
    """
    t_start = time.time()
    say = log or (lambda msg: None)
    if isinstance(trajectories, (str, os.PathLike)):
        trajectories = [trajectories]
    trajectories = [os.fspath(t) for t in trajectories]
    if not trajectories:
        raise DihedraError("give at least one trajectory.")
    staging = (StagedFolder.begin(out, overwrite=overwrite, command="track",
                                  inputs=run_inputs(topology, trajectories, torsions, scheme, weights))
               if out is not None else None)
    scratch = None
    own_client = None
    writers = []
    passes = []
    try:
        if staging is None:
            scratch = tempfile.TemporaryDirectory(prefix="dihedra-")
            work = scratch.name
        else:
            work = staging.path
        parts_dir = os.path.join(work, "_parts")
        os.makedirs(parts_dir)
        notices = []
        scheme = get_scheme(scheme)
        check_readable(topology, "topology")
        for t in trajectories:
            check_readable(t, "trajectory")
        universes = [load_universe(topology, t, notices) for t in trajectories]
        tset = torsions if isinstance(torsions, TorsionSet) else select_torsions(universes[0], torsions)
        notices.extend(tset.notices)
        frames = [_frame_indices(u, start, stop, step, f"trajectory {t}")
                  for u, t in zip(universes, trajectories)]
        weight_arrays, weight_column = (_weights_per_replica(weights, frames) if weights is not None
                                        else ([None] * len(universes), None))
        n_workers = max(1, int(workers or 1))
        if scheduler is not None:
            from .trajectory.distributed import DistributedBackend, connect
            client, owned = connect(scheduler)
            own_client = client if owned else None
            backend = DistributedBackend(client)
            say(f"dask scheduler {client.scheduler.address}: {backend.n_workers} worker threads")
        if backend is None:
            backend = "multiprocessing" if n_workers > 1 else "serial"
        if progress is None:
            progress = backend == "serial" and sys.stderr.isatty()
        threads = _pass_threads(threads, backend)
        replica_info = []
        for r, (u, traj, fr, w) in enumerate(zip(universes, trajectories, frames, weight_arrays)):
            say(f"replica {r + 1}/{len(universes)}: {traj}: {len(fr)} frames, {len(tset)} torsions")
            # a serial pass writes its last row group while the next pass starts or the
            # populations are computed (one at a time: one chunk buffer more at most)
            if passes:
                passes[-1].finish_series()
            tp = TorsionPass(u, tset, scheme, n_state_blocks=n_state_blocks, n_hist_blocks=n_hist_blocks,
                             bin_width_deg=bin_width_deg, weights=w, parts_dir=parts_dir,
                             series=ParquetSeriesFactory(work), keep_angles=keep_angles, chunk_frames=chunk_frames,
                             replica=r, dt_ps=dt_ps, threads=threads, defer_close=backend == "serial")
            run_kwargs = dict(start=start, stop=stop, step=step)
            if backend == "serial":
                run_kwargs.update(verbose=bool(progress),
                                  progressbar_kwargs={"desc": f"replica {r + 1}/{len(universes)}",
                                                      "leave": True} if progress else None)
            else:
                run_kwargs.update(backend=backend, n_workers=None if not isinstance(backend, str) else n_workers,
                                  unsupported_backend=not isinstance(backend, str))
            try:
                with warnings.catch_warnings():
                    warnings.filterwarnings("ignore", message="Reader has no dt information")
                    warnings.filterwarnings("ignore", category=DeprecationWarning)
                    tp.run(**run_kwargs)
            except OutputWriteError:
                raise
            except (OSError, EOFError) as exc:
                raise truncated_error(traj, u, exc) from None
            passes.append(tp)
            replica_info.append(_replica_info(u, traj, fr, tp, dt_ps))
        # the time series are written (each pass, serial or every worker, wrote the files of its
        # frames); blocks.npz is written by another thread (zlib releases Python's lock) while
        # this one computes the populations and writes the tables
        from .io.blocks import narrowed_type, save_npz
        from .io.resultsdir import write_results
        shutil.rmtree(parts_dir, ignore_errors=True)
        blocks = _block_sums(passes)

        def write_blocks():
            save_npz(os.path.join(work, "blocks.npz"), blocks, narrow=[k for k in blocks if narrowed_type(k)])
        writers = [_Background(write_blocks)]
        result = _assemble(tset, scheme, universes[0], notices, blocks)
        result.summary.update(_summary(topology, trajectories, replica_info, scheme, tset, dict(
            start=start, stop=stop, step=step, workers=n_workers, threads=int(threads),
            backend=backend if isinstance(backend, str) else type(backend).__name__,
            scheduler=None if scheduler is None else str(backend.client.scheduler.address),
            keep_angles=bool(keep_angles), weights=None if weights is None else str(weights),
            weights_column=weight_column, dt_ps=dt_ps, n_state_blocks=n_state_blocks,
            n_hist_blocks=n_hist_blocks, bin_width_deg=bin_width_deg,
            temperature_k=temperature_k), notices, time.time() - t_start))
        write_results(result, work, blocks=False)
        for w in writers:
            w.join()
        writers = []
        passes[-1].finish_series()
        if staging is not None:
            result.folder = staging.commit()
            staging = None
            result.series = ParquetSeries(result.folder)
        else:
            result._scratch = scratch
            result.series = ParquetSeries(scratch.name)
            scratch = None
        return result
    finally:
        for w in writers:   # an error: let the writing thread end before the folder goes
            w.thread.join()
        for tp in passes:
            try:
                tp.finish_series()
            except Exception:  # noqa: BLE001 - the original error matters
                pass
        if own_client is not None:
            own_client.close()
        if staging is not None:
            staging.discard()
        if scratch is not None:
            scratch.cleanup()


def _replica_info(universe, traj, frames, tp, dt_ps):
    reader = universe.trajectory
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        dt = reader.dt
    no_dt = any("dt information" in str(w.message) for w in caught)
    if dt_ps is not None:
        source = "--dt-ps"
        dt_used = float(dt_ps)
    elif no_dt:
        source = "none (the trajectory stores no time step; MDAnalysis assumed 1 ps per frame)"
        dt_used = float(dt)
    else:
        source = "trajectory"
        dt_used = float(dt)
    return {
        "trajectory": os.path.abspath(traj),
        "n_frames_in_file": int(reader.n_frames),
        "frames_analysed": int(len(frames)),
        "first_frame": int(frames[0]),
        "last_frame": int(frames[-1]),
        "frame_step": int(frames[1] - frames[0]) if len(frames) > 1 else 1,
        "time_step_ps": dt_used,
        "time_between_analysed_frames_ps": dt_used * (int(frames[1] - frames[0]) if len(frames) > 1 else 1),
        "time_step_source": source,
        "time_step_known": source != "none (the trajectory stores no time step; MDAnalysis assumed 1 ps per frame)",
        "first_time_ps": float(tp.times[0]) if len(tp.times) else None,
        "last_time_ps": float(tp.times[-1]) if len(tp.times) else None,
    }


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


def _block_sums(passes):
    """The block sums of all replicas (the arrays of ``blocks.npz``)."""
    state_counts = np.concatenate([p.results.state_counts for p in passes])
    block_replica = np.concatenate([np.full(p.n_state_blocks, r) for r, p in enumerate(passes)])
    histograms = _stack_histograms(passes)
    hist_block_replica = np.concatenate([np.full(p.n_hist_blocks, r) for r, p in enumerate(passes)])
    blocks = {
        "state_counts": state_counts,
        "block_replica": block_replica,
        "block_frames": np.concatenate([p.results.block_frames for p in passes]),
        "block_weights": np.concatenate([p.results.block_weights for p in passes]),
        "histograms": histograms,
        "hist_block_replica": hist_block_replica,
        "hist_block_frames": np.concatenate([p.results.hist_block_frames for p in passes]),
        "hist_block_weights": np.concatenate([p.results.hist_block_weights for p in passes]),
        "bin_edges_deg": np.linspace(-180.0, 180.0, histograms.shape[2] + 1),
        "undefined": np.sum([p.results.undefined for p in passes], axis=0),
    }
    # conformer rows: shift each replica's blocks to the global block numbering (one replica:
    # its rows as they are, sorted and unique already)
    offset, rows, wts = 0, [], []
    for p in passes:
        cr = np.asarray(p.results.conformer_counts, dtype=np.int64).reshape(-1, 4)
        if offset:
            cr = cr.copy()
            cr[:, 0] += offset
        rows.append(cr)
        wts.append(np.asarray(p.results.conformer_weights, dtype=float))
        offset += p.n_state_blocks
    conf_rows, conf_w = reduce_conformer_rows(rows[0] if len(rows) == 1 else np.vstack(rows),
                                              wts[0] if len(wts) == 1 else np.concatenate(wts))
    blocks["conformer_rows"] = conf_rows
    blocks["conformer_weights"] = conf_w
    # conformer classes counted densely (groups of equal width): one array per width, the
    # replicas' blocks one after another
    for width in sorted(passes[0].results.conformer_dense):
        blocks[f"conformer_counts_w{width}"] = _stack([p.results.conformer_dense[width][0] for p in passes])
        if passes[0].results.conformer_dense[width][1] is not None:
            blocks[f"conformer_weights_w{width}"] = _stack([p.results.conformer_dense[width][1] for p in passes])
    return blocks


def _stack(arrays):
    return arrays[0] if len(arrays) == 1 else np.concatenate(arrays)


def dense_conformers(blocks, tset, n_states):
    """{width: (group ids, counts (n_blocks, n_groups, n_joint), weights)} of the conformer
    classes that the pass counted densely (weights are the counts as floats when unweighted)."""
    from .trajectory.trackpass import _conformer_classes
    _, members, _ = conformer_layout(tset, n_states)
    out = {}
    for width, (gids, _, _, _) in _conformer_classes(members, n_states).items():
        counts = blocks.get(f"conformer_counts_w{width}")
        if counts is not None:
            out[width] = (gids, counts, blocks.get(f"conformer_weights_w{width}"))
    return out


def conformer_rows(blocks, tset, n_states):
    """All conformer counts as rows (block, group, joint code, frames) sorted by block, group and
    code, with their weights: the sparse rows of ``blocks`` and the dense classes together."""
    rows, wts = [blocks["conformer_rows"]], [blocks["conformer_weights"]]
    for gids, counts, weights in dense_conformers(blocks, tset, n_states).values():
        block, group, code = np.nonzero(counts)
        rows.append(np.column_stack([block, gids[group], code, counts[block, group, code]]).astype(np.int64))
        wts.append((counts if weights is None else weights)[block, group, code].astype(np.float64))
    return reduce_conformer_rows(np.vstack(rows), np.concatenate(wts))


def _assemble(tset, scheme, universe, notices, blocks):
    """Populations, conformers and the torsion table from the block sums (:func:`_block_sums`)."""
    labels, types = tset.labels, tset.types
    resnames = [t.resname for t in tset.torsions]
    state_counts, block_replica = blocks["state_counts"], blocks["block_replica"]
    conf_rows, conf_w = blocks["conformer_rows"], blocks["conformer_weights"]
    dense = dense_conformers(blocks, tset, scheme.n_states)

    pops = torsion_populations(state_counts, block_replica, labels, types, scheme.labels)
    by_type = pool_by_type(pops)
    by_rep = replica_populations(state_counts, block_replica, labels, types, scheme.labels, pooled=pops)
    groups, members, skipped = conformer_layout(tset, scheme.n_states)
    conf, conf_type = conformer_populations(conf_rows, conf_w, block_replica, len(block_replica), groups,
                                            members, labels, types, scheme.labels, resnames, dense=dense)
    if skipped:
        notices.append(f"no conformers for {len(skipped)} group(s) with too many torsions "
                       f"(e.g. {skipped[0]}); their torsions are still analysed one by one.")
    undefined = blocks["undefined"]
    if undefined.any():
        worst = int(np.argmax(undefined))
        notices.append(f"{int((undefined > 0).sum())} torsion(s) were undefined in some frames (collinear "
                       f"atoms or NaN coordinates), e.g. {labels[worst]} in {int(undefined[worst])} frames; "
                       "those frames are left out of their populations and histograms.")
    rough = pops[(pops["n_effective"] < MIN_EFFECTIVE_SAMPLES) & (pops["population"] > 0)]
    if len(rough):
        notices.append(f"{rough['torsion'].nunique()} torsion(s) have states with fewer than "
                       f"{MIN_EFFECTIVE_SAMPLES} effective samples (e.g. {rough['torsion'].iloc[0]}, "
                       f"{rough['state'].iloc[0]}): sampling is not converged and their error bars are rough.")
    table = tset.to_frame(universe)
    table["n_undefined_frames"] = undefined
    return TrackResult(torsion_set=tset, torsions=table, scheme=scheme, populations=pops,
                       populations_by_type=by_type, populations_by_replica=by_rep, conformers=conf,
                       conformers_by_type=conf_type, blocks=blocks, summary={}, notices=notices)


def _pass_threads(threads, backend):
    """Threads of each pass: as asked (1 or 2), else 2 for a serial run with two usable cores."""
    if backend != "serial":
        return 1
    if threads is None:
        try:
            cores = len(os.sched_getaffinity(0))
        except AttributeError:   # not on Linux
            cores = os.cpu_count() or 1
        return 2 if cores >= 2 else 1
    if int(threads) not in (1, 2):
        raise ValueError(f"threads must be 1 or 2; got {threads!r}")
    return int(threads)


def _stack_histograms(passes):
    """The histogram blocks of all replicas in one array: one replica's array as it is, several
    copied one by one into a single allocation (each pass releases its own as it goes)."""
    if len(passes) == 1:
        return passes[0].results.histograms
    first = passes[0].results.histograms
    out = np.empty((sum(len(p.results.histograms) for p in passes),) + first.shape[1:], dtype=first.dtype)
    k = 0
    for p in passes:
        h = p.results.histograms
        out[k:k + len(h)] = h
        k += len(h)
        p.results.histograms = out[k - len(h):k]   # a view: the pass keeps no copy of its own
        del h
    return out


def _package_versions():
    import importlib.metadata as md
    out = {"python": sys.version.split()[0], "dihedra": __version__}
    for name in ("MDAnalysis", "numpy", "scipy", "pandas", "pyarrow"):
        try:
            out[name] = md.version(name)
        except md.PackageNotFoundError:
            pass
    return out


def _summary(topology, trajectories, replica_info, scheme, tset, params, notices, seconds):
    for info in replica_info:
        info["sha256"] = sha256(info["trajectory"])
    return {
        "dihedra_version": __version__,
        "created": time.strftime("%Y-%m-%dT%H:%M:%S%z"),
        "command": " ".join(sys.argv) if sys.argv and sys.argv[0].endswith("dihedra") else None,
        "topology": {"path": os.path.abspath(topology), "sha256": sha256(topology)},
        "replicas": replica_info,
        "n_torsions": len(tset),
        "n_frames_analysed": int(sum(r["frames_analysed"] for r in replica_info)),
        "scheme": scheme.to_dict(),
        "parameters": params,
        "units": {"angle": "deg", "time": "ps", "population": "fraction", "energy": "kJ/mol"},
        "temperature_k": params.get("temperature_k"),
        "notices": list(notices),
        "run_seconds": round(seconds, 3),
        "versions": _package_versions(),
    }
