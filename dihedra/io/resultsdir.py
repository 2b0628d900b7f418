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
    replica, frame, time_ps, [weight], then one int8 column per torsion (codes in summary.json,
    -1 = undefined); a folder of Parquet files (part-RRRR-FFFFFFFFFFFF.parquet: replica, first
    frame) in frame order, row groups of a few MB
``cores.parquet/``
    the same layout with one boolean column per torsion: whether the frame's angle lies in the
    core of its state (its sector shrunk by 20 degrees on both sides), for core-set kinetics
    without the angles (:mod:`dihedra.trajectory.cores`)
``angles.parquet/``
    the same layout with float32 degrees (only with --keep-angles)
``blocks.npz``
    block sums of the pass: state counts and fine angle histograms per block, with block frames,
    weights and replicas (input of profiles), and the conformer counts (dense per group width,
    rows otherwise)
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

from ..errors import InputFileError
from ..selection.schemes import scheme_from_dict
from ..selection.torsions import TorsionSet
from ..trajectory.result import TrackResult
from .blocks import load_blocks, narrowed_type, save_npz
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


def write_results(result, folder, blocks=True):
    """Write every table, the block sums (unless ``blocks=False``: written elsewhere) and the
    summary of a :class:`~dihedra.trajectory.result.TrackResult`."""
    for attr, name in TABLES.items():
        write_table(getattr(result, attr), folder, name)
    if getattr(result, "schemes", None) is not None:
        write_table(result.schemes, folder, "schemes.csv")
    if blocks:
        save_npz(os.path.join(folder, "blocks.npz"), result.blocks,
                 narrow=[k for k in result.blocks if narrowed_type(k)])
    write_json(result.summary, folder, "summary.json")


def load_results(folder):
    """Load a results folder written by ``dihedra track`` as a
    :class:`~dihedra.trajectory.result.TrackResult` (its time series read from the folder when
    asked for)."""
    folder = os.fspath(folder)
    if not os.path.isdir(folder):
        raise InputFileError(f"results folder {folder} does not exist (run 'dihedra track ... --out {folder}' first).")
    missing = [n for n in list(TABLES.values()) + ["summary.json", "blocks.npz"]
               if not os.path.exists(os.path.join(folder, n))]
    if missing:
        raise InputFileError(f"{folder} is not a complete dihedra results folder: missing {', '.join(missing)}.")
    tables = {attr: read_table(folder, name) for attr, name in TABLES.items()}
    tables["torsions"]["segid"] = tables["torsions"]["segid"].fillna("").astype(str)
    summary = read_json(folder, "summary.json")
    blocks = load_blocks(os.path.join(folder, "blocks.npz"))
    tset = TorsionSet.from_frame(tables["torsions"])
    return TrackResult(torsion_set=tset, scheme=scheme_from_dict(summary["scheme"]), blocks=blocks,
                       summary=summary, notices=list(summary.get("notices", [])),
                       folder=os.path.abspath(folder), series=ParquetSeries(os.path.abspath(folder)),
                       schemes=read_optional_table(folder, "schemes.csv"), **tables)
