"""From the block sums of the passes to a result: the arrays of ``blocks.npz`` (replicas one
after another), the tables (populations, conformers, torsions), the notices and the summary
(inputs, frame ranges, time steps, parameters, versions)."""

from __future__ import annotations

import os
import sys
import time
import warnings

import numpy as np
import pandas as pd

from .._version import __version__
from ..errors import DihedraError
from ..numerics.populations import (MIN_EFFECTIVE_SAMPLES, conformer_populations, heterogeneity_notice,
                                    pool_by_type, replica_populations, torsion_populations)
from .conformer_counts import conformer_layout, dense_conformers, reduce_conformer_rows
from .inputs import cached_sha256
from .result import BlockParts, BlockSums, TrackResult, kept_block

#: How the summary says that a trajectory stores no time step.
NO_TIME_STEP = "none (the trajectory stores no time step; MDAnalysis assumed 1 ps per frame)"


def block_sums(passes):
    """The block sums of all replicas (the arrays of ``blocks.npz``)."""
    state_counts = _stack([p.results.state_counts for p in passes])
    block_replica = np.concatenate([np.full(p.n_state_blocks, r) for r, p in enumerate(passes)])
    histograms = stack_histograms(passes)
    hist_block_replica = np.concatenate([np.full(p.n_hist_blocks, r) for r, p in enumerate(passes)])
    blocks = BlockSums({
        "state_counts": state_counts,
        "block_replica": block_replica,
        "block_frames": _stack([p.results.block_frames for p in passes]),
        "block_weights": _stack([p.results.block_weights for p in passes]),
        "histograms": histograms,
        "hist_block_replica": hist_block_replica,
        "hist_block_frames": _stack([p.results.hist_block_frames for p in passes]),
        "hist_block_weights": _stack([p.results.hist_block_weights for p in passes]),
        "bin_edges_deg": np.linspace(-180.0, 180.0, histograms.shape[2] + 1),
        "undefined": np.sum([p.results.undefined for p in passes], axis=0),
    })
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


def stack_histograms(passes):
    """The histogram blocks of all replicas in one array: one replica's array as it is, several
    copied one by one into a single allocation (each pass releases its own as it goes); blocks
    kept in files stay there (one :class:`~dihedra.trajectory.result.BlockParts`)."""
    if len(passes) == 1:
        return passes[0].results.histograms
    hists = [p.results.histograms for p in passes]
    if any(isinstance(h, BlockParts) for h in hists):   # blocks in files: the list of parts
        parts, k = [], 0
        for h in hists:
            parts += h.shifted(k) if isinstance(h, BlockParts) else [(k + b, h[b]) for b in range(len(h))]
            k += len(h)
        return BlockParts(parts, (k,) + tuple(hists[0].shape[1:]), np.result_type(*(h.dtype for h in hists)))
    first = passes[0].results.histograms
    dtype = np.result_type(*(p.results.histograms for p in passes))   # (each narrow as its frames allow)
    out = np.empty((sum(len(p.results.histograms) for p in passes),) + first.shape[1:], dtype=dtype)
    k = 0
    for p in passes:
        h = p.results.histograms
        out[k:k + len(h)] = h
        k += len(h)
        p.results.histograms = out[k - len(h):k]   # a view: the pass keeps no copy of its own
        del h
    return out


def assemble_result(tset, scheme, universe, notices, blocks):
    """Populations, conformers and the torsion table from the block sums (:func:`_block_sums`)."""
    labels, types = tset.labels, tset.types
    resnames = [t.resname for t in tset.torsions]
    # (the counts as kept, in their narrow type: the tables read them a slice at a time)
    state_counts, block_replica = kept_block(blocks, "state_counts"), blocks["block_replica"]
    conf_rows, conf_w = blocks["conformer_rows"], blocks["conformer_weights"]
    dense = dense_conformers(blocks, tset, scheme.n_states)

    own = own_states(scheme, types)
    pops = undefined_as_nan(torsion_populations(state_counts, block_replica, labels, types, scheme.labels))
    by_rep = undefined_as_nan(replica_populations(state_counts, block_replica, labels, types, scheme.labels,
                                                  pooled=pops))
    if own is not None:   # a set of schemes: each torsion has rows for the states of its own part
        pops = pops[own].reset_index(drop=True)
        by_rep = by_rep[np.tile(own, len(by_rep) // len(own))].reset_index(drop=True)
    by_type = pool_defined(pops)
    groups, members, skipped = conformer_layout(tset, scheme.n_states)
    conf, conf_type = conformer_populations(conf_rows, conf_w, block_replica, len(block_replica), groups,
                                            members, labels, types, scheme.labels, resnames, dense=dense)
    if skipped:
        notices.append(f"no conformers for {len(skipped)} group(s) with too many torsions "
                       f"(e.g. {skipped[0]}); their torsions are still analysed one by one.")
    undefined = blocks["undefined"]
    never = pops.loc[pops["n_samples"] == 0, "torsion"].unique()
    if len(never):
        notices.append(f"{len(never)} torsion(s) have no defined frame at all (e.g. {never[0]}: NaN coordinates or "
                       "collinear atoms in every analysed frame); their populations are NaN, and the pooled "
                       "populations of their types leave them out.")
    if undefined.any():
        worst = int(np.argmax(undefined))
        notices.append(f"{int((undefined > 0).sum())} torsion(s) were undefined in some frames (collinear "
                       f"atoms or NaN coordinates), e.g. {labels[worst]} in {int(undefined[worst])} frames; "
                       "those frames are left out of their populations and histograms.")
    notices.extend(error_notices(pops, by_type, conf_type))
    rough = pops[(pops["n_effective"] < MIN_EFFECTIVE_SAMPLES) & (pops["population"] > 0)]
    if len(rough):
        notices.append(f"{rough['torsion'].nunique()} torsion(s) have states with fewer than "
                       f"{MIN_EFFECTIVE_SAMPLES} effective samples (e.g. {rough['torsion'].iloc[0]}, "
                       f"{rough['state'].iloc[0]}): each of these torsions alone is not converged and its own error "
                       "bars (populations.csv) are rough; the populations pooled per type have their own verdict "
                       "(convergence.csv).")
    table = tset.to_frame(universe)
    table["n_undefined_frames"] = undefined
    of_type = {t: scheme.scheme_of_type(t) for t in dict.fromkeys(types)}
    for frame in (table, pops, by_type, by_rep):   # the scheme each torsion follows
        frame["scheme"] = [of_type[t] for t in frame["type"].tolist()]   # (a list: Arrow strings iterate slowly)
    return TrackResult(torsion_set=tset, torsions=table, scheme=scheme, populations=pops,
                       populations_by_type=by_type, populations_by_replica=by_rep, conformers=conf,
                       conformers_by_type=conf_type, blocks=blocks, summary={}, notices=notices)


#: Columns of :func:`scheme_table` (``schemes.csv``).
SCHEME_COLUMNS = ["type", "scheme", "state", "from_deg", "to_deg", "reason"]


def scheme_table(scheme, types, reasons=None, basins=None):
    """The states of every torsion type: one row per arc (a state may have several), from_deg
    (excluded) to to_deg (included) going up the circle, with the reason the type follows its
    scheme and, for basins (a table of :mod:`dihedra.trajectory.basins`), their minima.

    Examples
    --------
    >>> from dihedra.selection.schemes import get_scheme
    >>> scheme_table(get_scheme("cis-trans"), ["NMA:C-N"])[["state", "from_deg", "to_deg"]].values.tolist()
    [['cis', -90.0, 90.0], ['trans', 90.0, -90.0]]
    """
    rows = []
    for t in dict.fromkeys(types):
        part = scheme.parts[scheme.part_index(t)] if hasattr(scheme, "parts") else scheme
        for state, lo, hi in part.sector_table():
            whole = len(part.boundaries_deg) == 1
            rows.append((t, part.name, state, None if whole else lo, None if whole else hi,
                         (reasons or {}).get(t, "")))
    table = pd.DataFrame(rows, columns=SCHEME_COLUMNS)
    if basins is not None and len(basins):
        extra = basins.drop(columns=["from_deg", "to_deg"])
        table = table.merge(extra, on=["type", "state"], how="left")
    return table


def own_states(scheme, types):
    """For a set of schemes, the mask of the (torsion, state) rows of the populations table that
    belong to each torsion's own part (torsion-major); ``None`` for a single scheme."""
    if len(scheme.coded_parts()) == 1:
        return None
    labels = list(scheme.labels)
    allowed = {t: np.isin(labels, scheme.states_of_type(t)) for t in dict.fromkeys(types)}
    return np.concatenate([allowed[t] for t in types]) if types else np.zeros(0, dtype=bool)


def error_notices(pops, by_type, conf_type):
    """Sentences on errors that are missing, 0, or include the spread between torsions."""
    out = []
    missing = pops[pops["population_err"].isna() & (pops["n_samples"] > 0)]   # (none defined: a notice of its own)
    if len(missing):
        out.append(f"{missing['torsion'].nunique()} torsion(s) have no error estimate (e.g. {missing['torsion'].iloc[0]}): "
                   "fewer than two blocks of frames hold them (a single frame, or too few frames); their "
                   "errors and the pooled errors they enter are n/a.")
    stuck = pops[(pops["population"] == 1.0) & (pops["population_err"] == 0)]
    # (a torsion whose scheme has one state, a symmetric rotor, stays in it by definition)
    stuck = stuck[stuck["torsion"].map(pops["torsion"].value_counts()) > 1]
    if len(stuck):
        out.append(f"{stuck['torsion'].nunique()} torsion(s) never left one state (e.g. {stuck['torsion'].iloc[0]} in "
                   f"{stuck['state'].iloc[0]}): their error of 0 only says that no transition was seen, and their "
                   "n_effective is n/a.")
    unseen = by_type[(by_type["population"] == 0) & (by_type["population_err"] == 0)] if len(by_type) else by_type
    if len(unseen):   # (only a type's own states are rows of the table)
        first = unseen.iloc[0]
        out.append(f"{len(unseen)} state(s) of torsion types were never visited by any of their torsions (e.g. "
                   f"{first['type']} {first['state']}): their population of 0 +- 0 only says that no frame was "
                   "there, not that the state is empty: a count of zero in n independent samples still allows a "
                   "population up to about 3 / n (the rule of three, 95 %), and n is at most the torsions' "
                   "effective samples (n_effective in populations.csv).")
    for table, key, what in ((by_type, "type", "torsion types"), (conf_type, "group_type", "conformer types")):
        note = heterogeneity_notice(table, key, what)
        if note:
            out.append(note)
    return out


def undefined_as_nan(pops):
    """Rows of torsions without one defined frame (``n_samples`` 0): population and error NaN,
    no effective samples (not 0 +- 0 from infinitely many)."""
    none = (pops["n_samples"] == 0).to_numpy()
    if none.any():
        pops = pops.copy()
        pops.loc[none, ["population", "population_err"]] = np.nan
        pops["n_effective"] = np.where(none, 0.0, pops["n_effective"].to_numpy(dtype=float))
    return pops


def pool_defined(pops):
    """:func:`~dihedra.numerics.populations.pool_by_type` of the torsions with defined frames; a type
    without any gets NaN rows with ``n_torsions`` 0."""
    defined = pops["n_samples"] > 0
    if defined.all():
        return pool_by_type(pops)
    pooled = pool_by_type(pops[defined]) if defined.any() else None
    empty = pops[~pops["type"].isin(pops.loc[defined, "type"])]
    rows = empty.drop_duplicates(["type", "state"])[["type", "state"]].assign(
        population=np.nan, population_err=np.nan, n_torsions=0)
    order = {s: k for k, s in enumerate(pd.unique(pops["state"]))}
    out = pd.concat([p for p in (pooled, rows) if p is not None], ignore_index=True)
    out = out.assign(_o=out["state"].map(order)).sort_values(["type", "_o"], kind="stable")
    return out.drop(columns="_o").reset_index(drop=True)


def replica_info(universe, traj, frames, tp, dt_ps, notices=None):
    """What the summary records of one replica: file, frames, and the time step with its source.

    A time step is known when ``dt_ps`` is given or when the trajectory stores one that is finite,
    positive and the same between all analysed frames; otherwise ``time_step_known`` is false (and
    a sentence saying why goes to ``notices``): every time-based output then needs ``--dt-ps``."""
    reader = universe.trajectory
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        dt = reader.dt
    no_dt = any("dt information" in str(w.message) for w in caught)
    step = int(frames[1] - frames[0]) if len(frames) > 1 else 1
    if dt_ps is not None:
        source = "--dt-ps"
        dt_used = float(dt_ps)
    elif no_dt:
        source = NO_TIME_STEP
        dt_used = float(dt)
    else:
        dt_used = float(dt)
        problem = time_step_problem(dt_used, tp.times)
        source = "trajectory" if problem is None else f"unknown ({problem})"
    known = source in ("--dt-ps", "trajectory")
    if not known and notices is not None:
        name = os.path.basename(str(traj)) if traj else "the trajectory"
        notices.append(f"{name}: time step unknown ({source.partition('(')[2].rstrip(')')}); times are not "
                       "physical, and kinetics and time axes need --dt-ps PS (the time between stored frames).")
    return {
        "trajectory": os.path.abspath(traj) if traj else None,
        "n_frames_in_file": int(reader.n_frames),
        "frames_analysed": int(len(frames)),
        "first_frame": int(frames[0]),
        "last_frame": int(frames[-1]),
        "frame_step": step,
        "time_step_ps": dt_used,
        "time_between_analysed_frames_ps": dt_used * step,
        "time_step_source": source,
        "time_step_known": known,
        "first_time_ps": float(tp.times[0]) if len(tp.times) else None,
        "last_time_ps": float(tp.times[-1]) if len(tp.times) else None,
    }


def time_step_problem(dt, times, rtol=1e-3):
    """Why a stored time step cannot be used (``None`` if it can): zero, negative or not finite,
    or times between the analysed frames that are not all equal (to ``rtol``; float32 times of
    XTC files differ in their last digits).

    >>> time_step_problem(0.0, [0.0, 0.0]) is not None, time_step_problem(2.0, [0.0, 2.0, 4.0])
    (True, None)
    >>> time_step_problem(1.0, [0.0, 1.0, 5.0])
    'the times between frames vary from 1 to 4 ps'
    """
    if not np.isfinite(dt) or dt <= 0:
        return f"the trajectory stores a time step of {dt:g} ps"
    gaps = np.diff(np.asarray(times, dtype=float))
    if len(gaps) and (not np.all(np.isfinite(gaps)) or np.ptp(gaps) > rtol * np.max(np.abs(gaps))
                      or np.min(gaps) <= 0):
        return f"the times between frames vary from {np.min(gaps):g} to {np.max(gaps):g} ps"
    return None


def usable_cores():
    """The cores this process may run on (``os.sched_getaffinity``; the CPU count elsewhere)."""
    try:
        return len(os.sched_getaffinity(0))
    except AttributeError:   # not on Linux
        return os.cpu_count() or 1


def pass_threads(threads, backend):
    """Threads of each pass: as asked (1 or 2), else 2 for a serial run with two usable cores
    and 1 for each worker of a parallel run."""
    if threads is None:
        return 2 if backend == "serial" and usable_cores() >= 2 else 1
    if threads not in (1, 2) or isinstance(threads, bool):
        raise DihedraError(f"threads must be 1 or 2; got {threads!r}.")
    return int(threads)


#: Torsion-frames (torsions x frames of a replica) from which one more worker process pays for
#: its start-up, when the cores for it are free (see docs/performance.md, where it is measured).
TORSION_FRAMES_PER_WORKER = 300_000_000


def plan_workers(asked, n_frames, n_torsions, cores=None, threads=None):
    """How many worker processes a replica of ``n_frames`` frames and ``n_torsions`` torsions is
    split over, and the threads of each (``threads`` when given): ``(workers, threads, reason)``.

    A serial run already uses two cores (one thread reads, one computes), so a worker process
    pays only with two more cores for it, and only when it has enough frames to earn back its
    start-up (a process, the Universe, the compiled kernels, its blocks):
    :data:`TORSION_FRAMES_PER_WORKER` torsion-frames each. ``asked`` is ``"auto"`` (or
    ``None``) or the largest number of workers the user allows.

    Examples
    --------
    >>> plan_workers("auto", 1500, 15_000, cores=2)[:2]
    (1, 2)
    >>> plan_workers(4, 100_000, 15_000, cores=8)[:2]
    (4, 2)
    """
    cores = usable_cores() if cores is None else int(cores)
    by_cores = max(1, cores // 2)
    by_size = max(1, int(n_frames) * int(n_torsions) // TORSION_FRAMES_PER_WORKER)
    limit = min(by_cores, by_size, max(1, int(n_frames)))
    auto = asked in (None, "auto")
    n = limit if auto else min(int(asked), limit)
    chosen = threads is not None
    threads = int(threads) if chosen else 2 if cores >= 2 * n and cores >= 2 else 1
    as_asked = " (--threads)" if chosen else ""
    if n == 1:
        why = f"one process with {threads} thread(s){as_asked}"
        if not auto and int(asked) == 1:
            why += " (as asked)"
        elif by_cores == 1:
            why += f": a serial run already uses {min(cores, 2)} of the {cores} usable core(s)" if not chosen else (
                f": one process, as a serial run uses {min(cores, 2)} of the {cores} usable core(s)")
        else:
            why += (f": {int(n_frames) * int(n_torsions):.3g} torsion-frames are fewer than the "
                    f"{2 * TORSION_FRAMES_PER_WORKER:.3g} from which a second worker pays")
    else:
        why = f"{n} worker processes with {threads} thread(s) each{as_asked} ({cores} usable cores)"
    return n, threads, why


def package_versions():
    import importlib.metadata as md
    out = {"python": sys.version.split()[0], "dihedra": __version__}
    for name in ("MDAnalysis", "numpy", "scipy", "pandas", "pyarrow"):
        try:
            out[name] = md.version(name)
        except md.PackageNotFoundError:
            pass
    return out


def make_summary(topology, replicas, scheme, tset, params, notices, seconds, hashes=None):
    """The summary of a run (``summary.json``): ``replicas`` from :func:`replica_info`, each given
    the SHA-256 of its trajectory here (from ``hashes``, a :class:`~dihedra.trajectory.inputs.FileHashes`
    started earlier, when given)."""
    def digest(path):
        if hashes is not None and path and os.path.isfile(path):
            return hashes.get(path)
        return _sha256_of(path)

    for info in replicas:
        if not info.get("sha256"):
            info["sha256"] = digest(info["trajectory"])
    return {
        "dihedra_version": __version__,
        "created": time.strftime("%Y-%m-%dT%H:%M:%S%z"),
        "command": " ".join(sys.argv) if sys.argv and sys.argv[0].endswith("dihedra") else None,
        "topology": {"path": os.path.abspath(topology) if topology else None, "sha256": digest(topology)},
        "replicas": replicas,
        "n_torsions": len(tset),
        "n_frames_analysed": int(sum(r["frames_analysed"] for r in replicas)),
        "scheme": scheme.to_dict(),
        "parameters": params,
        "units": {"angle": "deg", "time": "ps", "population": "fraction", "energy": "kJ/mol"},
        "temperature_k": params.get("temperature_k"),
        "notices": list(notices),
        "run_seconds": round(seconds, 3),
        "versions": package_versions(),
    }


def _sha256_of(path):
    """SHA-256 of a file, or ``None`` for a Universe that was not read from a file."""
    return cached_sha256(path) if path and os.path.isfile(path) else None
