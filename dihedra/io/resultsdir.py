"""Reading and writing a results folder (the only module that does).

A results folder holds tidy tables with unit-bearing column names plus a JSON summary:

``torsions.csv``
    torsion, type, atom_indices, atom_names, resname, resid, segid, name, group, order,
    n_undefined_frames, scheme (the scheme the torsion follows)
``populations.csv``
    torsion, type, state, population, population_err, n_effective, n_samples, scheme
``populations_by_type.csv``
    type, state, population, population_err, n_torsions, ..., scheme
``populations_by_replica.csv``
    replica, torsion, type, state, population, population_err, ...
``conformers.csv``
    group, group_type, conformer, torsions, population, population_err, n_effective
``conformers_by_type.csv``
    group_type, state -> conformer, population, population_err, n_groups
``states.parquet/``
    one row per frame: replica, frame, time_ps, [weight], state_codes (a fixed-size binary column:
    the int8 code of every torsion in the order of torsions.csv; codes in summary.json, -1 =
    undefined); a folder of Parquet files (part-RRRR-FFFFFFFFFFFF.parquet: replica, first frame)
    in frame order (:mod:`dihedra.io.series`)
``cores.parquet/``
    the same layout with core_bits, one bit per torsion: whether the frame's angle lies in the
    core of its state (its sector shrunk by 20 degrees on both sides), for core-set kinetics
    without the angles (:mod:`dihedra.trajectory.cores`)
``angles.parquet/``
    the same layout with angles_deg, float32 degrees (only with --keep-angles)
``blocks.npz``
    block sums of the pass: state counts per block, with block frames, weights and replicas (of
    the state blocks and of the histogram blocks), the bin edges, and the conformer counts (dense
    per group width, rows otherwise)
``histograms.parquet``
    the fine angle histograms per block (input of profiles): rows of block, replica,
    first_torsion and counts (binary: n_bins values of each of consecutive torsions in
    torsions.csv order, of the type and shape in the schema metadata ``dihedra.histograms``),
    zstd (:mod:`dihedra.io.blocks`)
``schemes.csv``
    type, scheme, state, from_deg, to_deg, reason (and, for basins, the minimum of each basin
    with its error): the states of every torsion type
``summary.json``
    inputs with SHA-256, frame ranges, time step, scheme, parameters, package versions, notices
``dihedra-files.json``
    the files dihedra wrote into the folder (:mod:`dihedra.io.outputs`)

Analyses read a folder with :func:`load_results` and add their own files through
:func:`dihedra.io.tables.write_table` / :func:`~dihedra.io.tables.write_json`; the time series are
read and written by :mod:`dihedra.io.series`, the block sums by :mod:`dihedra.io.blocks`.
"""

from __future__ import annotations

import os

import numpy as np

from ..errors import InputFileError
from ..selection.schemes import scheme_from_dict
from ..selection.torsions import TorsionSet
from ..trajectory.assemble import own_states
from ..trajectory.result import TrackResult
from .blocks import HISTOGRAMS_FILE, damaged_file, load_blocks, narrowed_type, save_blocks
from .series import ParquetSeries
from .tables import read_json, read_optional_table, read_table, write_json, write_table

TABLES = {
    "torsions": "torsions.csv",
    "populations": "populations.csv",
    "populations_by_type": "populations_by_type.csv",
    "populations_by_replica": "populations_by_replica.csv",
    "conformers": "conformers.csv",
    "conformers_by_type": "conformers_by_type.csv",
}


def write_results(result, folder, blocks=True, summary=True):
    """Write every table, the block sums (unless ``blocks=False``: written elsewhere) and the
    summary (unless ``summary=False``: written last by the caller) of a
    :class:`~dihedra.trajectory.result.TrackResult`."""
    for attr, name in TABLES.items():
        write_table(getattr(result, attr), folder, name)
    if getattr(result, "schemes", None) is not None:
        write_table(result.schemes, folder, "schemes.csv")
    if blocks:
        save_blocks(folder, result.blocks, narrow=[k for k in result.blocks if narrowed_type(k)])
    if summary:
        write_json(result.summary, folder, "summary.json")


def load_results(folder):
    """Load a results folder written by ``dihedra track`` as a
    :class:`~dihedra.trajectory.result.TrackResult` (its time series read from the folder when
    asked for).

    The folder is checked for consistency first, cheaply (:func:`check_consistent`): a damaged or
    cut table, summary or block file is one :class:`~dihedra.errors.InputFileError`, never other
    numbers."""
    folder = os.fspath(folder)
    if os.path.exists(folder) and not os.path.isdir(folder):
        raise InputFileError(f"{folder} is a file, not a results folder: give the folder that 'dihedra track "
                             "--out DIR' wrote.")
    if not os.path.isdir(folder):
        raise InputFileError(f"results folder {folder} does not exist (run 'dihedra track ... --out {folder}' first).")
    missing = [n for n in list(TABLES.values()) + ["summary.json", "blocks.npz"]
               if not os.path.exists(os.path.join(folder, n))]
    if missing:
        raise InputFileError(f"{folder} is not a complete dihedra results folder: missing {', '.join(missing)}.")
    tables = {attr: read_table(folder, name, REQUIRED_COLUMNS.get(name, ())) for attr, name in TABLES.items()}
    tables["torsions"]["segid"] = tables["torsions"]["segid"].fillna("").astype(str)
    summary = read_json(folder, "summary.json")
    scheme = _scheme(folder, summary)
    blocks = _blocks(folder)
    try:
        tset = TorsionSet.from_frame(tables["torsions"])
    except (TypeError, ValueError, AttributeError) as exc:
        raise InputFileError(f"{os.path.join(folder, 'torsions.csv')} is damaged ({exc}); run 'dihedra track' "
                             "again.") from None
    check_consistent(folder, tables, blocks, scheme, summary)
    return TrackResult(torsion_set=tset, scheme=scheme, blocks=blocks,
                       summary=summary, notices=list(summary.get("notices", [])),
                       folder=os.path.abspath(folder), series=ParquetSeries(os.path.abspath(folder)),
                       schemes=read_optional_table(folder, "schemes.csv"), **tables)


#: Columns every table of a results folder has (a table without them is damaged or foreign).
REQUIRED_COLUMNS = {
    "torsions.csv": ("torsion", "type", "atom_indices", "name", "resname", "resid", "segid", "group", "order"),
    "populations.csv": ("torsion", "type", "state", "population", "population_err", "n_samples"),
    "populations_by_type.csv": ("type", "state", "population", "population_err"),
    "populations_by_replica.csv": ("replica", "torsion", "type", "state", "population"),
}


def _damaged(folder, name, what):
    return damaged_file(os.path.join(folder, name), what)


def _scheme(folder, summary):
    try:
        return scheme_from_dict(summary["scheme"])
    except (KeyError, TypeError, ValueError, IndexError) as exc:
        raise _damaged(folder, "summary.json", f"no readable state scheme: {type(exc).__name__} {exc}") from None


def _blocks(folder):
    import zipfile
    import zlib

    try:
        return load_blocks(os.path.join(folder, "blocks.npz"))
    except (zipfile.BadZipFile, zlib.error, EOFError, ValueError, KeyError, OSError) as exc:
        raise _damaged(folder, "blocks.npz", exc) from None


def check_consistent(folder, tables, blocks, scheme, summary):
    """Refuse a folder whose tables disagree with its own block sums (a table cut short, or files
    of two runs): the torsion axis of the blocks against torsions.csv, and the rows of the
    population tables against the torsions, types, states and replicas."""
    if not isinstance(summary, dict):
        raise _damaged(folder, "summary.json", "not a JSON object")
    for key in ("state_counts", "block_replica"):
        if key not in blocks:
            raise _damaged(folder, "blocks.npz", f"no array {key}")
    if "histograms" not in getattr(blocks, "stored", blocks):   # (a mapping's `in` would read it)
        raise InputFileError(f"{folder} is not a complete dihedra results folder: missing {HISTOGRAMS_FILE}.")
    torsions = tables["torsions"]
    n_t, n_s = len(torsions), scheme.n_states
    counts, hist = blocks["state_counts"], blocks.stored["histograms"]   # (its shape: not read yet)
    if counts.ndim != 3 or hist.ndim != 3 or counts.shape[1:] != (n_t, n_s) or hist.shape[1] != n_t:
        raise _damaged(folder, "torsions.csv", f"{n_t} torsions of {n_s} states, but the block sums hold "
                                               f"{counts.shape[1] if counts.ndim == 3 else '?'} torsions")
    if summary.get("n_torsions") not in (None, n_t):
        raise _damaged(folder, "torsions.csv", f"{n_t} rows, but summary.json counts {summary['n_torsions']} torsions")
    types = [str(t) for t in torsions["type"]]
    own = own_states(scheme, types)   # (a set of schemes: each torsion has the states of its own part)
    per_torsion = np.full(n_t, n_s) if own is None else own.reshape(n_t, n_s).sum(axis=1)
    first_of_type = np.unique(types, return_index=True)[1] if n_t else np.zeros(0, dtype=int)
    n_rep = len(set(blocks["block_replica"].tolist()))
    expected = {"populations": int(per_torsion.sum()), "populations_by_type": int(per_torsion[first_of_type].sum()),
                "populations_by_replica": n_rep * int(per_torsion.sum())}
    for attr, rows in expected.items():
        if len(tables[attr]) != rows:
            raise _damaged(folder, TABLES[attr], f"{len(tables[attr])} rows where {n_t} torsions of "
                                                 f"{len(first_of_type)} types and {n_rep} replica(s) give {rows}")
    if list(dict.fromkeys(tables["populations"]["torsion"])) != list(torsions["torsion"]):
        raise _damaged(folder, "populations.csv", "its torsions are not those of torsions.csv")
