"""Reading and writing a results folder (the only module that does).

A results folder holds tidy tables with unit-bearing column names plus a JSON summary:

``torsions.csv``                torsion, type, atom_indices, atom_names, resname, resid, segid, name,
                                group, order, n_undefined_frames
``populations.csv``             torsion, type, state, population, population_err, n_effective, n_samples
``populations_by_type.csv``     type, state, population, population_err, n_torsions
``populations_by_replica.csv``  replica, torsion, type, state, population, population_err, ...
``conformers.csv``              group, group_type, conformer, torsions, population, population_err,
                                n_effective
``conformers_by_type.csv``      group_type, state -> conformer, population, population_err, n_groups
``states.parquet/``             replica, frame, time_ps, [weight], then one int8 column per torsion
                                (codes in summary.json, -1 = undefined); a folder of Parquet files
                                (part-RRRR-FFFFFFFFFFFF.parquet: replica, first frame) in frame
                                order, row groups of a few MB
``angles.parquet/``             the same layout with float32 degrees (only with --keep-angles)
``blocks.npz``                  block sums of the pass: state counts and fine angle histograms per
                                block, with block frames, weights and replicas (input of profiles),
                                and the conformer counts (dense per group width, rows otherwise)
``summary.json``                inputs with SHA-256, frame ranges, time step, scheme, parameters,
                                package versions, notices

Analyses (profiles, kinetics, comparison, figures) read a folder with :func:`load_results` and add
their own files through :func:`write_table` / :func:`write_json`.
"""

from __future__ import annotations

import glob
import json
import os

import numpy as np
import pandas as pd
import pyarrow.parquet as pq

from ..errors import InputFileError

TABLES = {
    "torsions": "torsions.csv",
    "populations": "populations.csv",
    "populations_by_type": "populations_by_type.csv",
    "populations_by_replica": "populations_by_replica.csv",
    "conformers": "conformers.csv",
    "conformers_by_type": "conformers_by_type.csv",
}


def write_table(frame, folder, name, float_format="%.6g"):
    """Write a tidy table as CSV (no index).

    The text is that of ``frame.to_csv(path, index=False, float_format=float_format)``; tables of
    plain float, integer, boolean and string columns (all that dihedra writes) are formatted
    column by column and written with the ``csv`` module, about twice as fast as pandas; any
    other column type goes through pandas.
    """
    path = os.path.join(folder, name)
    if not _write_plain_csv(frame, path, float_format):
        frame.to_csv(path, index=False, float_format=float_format)
    return path


def _write_plain_csv(frame, path, float_format, rows_per_part=50_000):
    """Write like ``to_csv`` if every column is plain (NumPy float/int/bool, or all ``str``);
    return False without writing otherwise. Rows are formatted ``rows_per_part`` at a time; where
    no text needs quotes (no comma, quote or line break in any string) they are joined directly,
    else written with the ``csv`` module (the quoting rules of ``to_csv``)."""
    import csv

    if not frame.columns.is_unique:
        return False
    kinds = []
    quotes = False
    for name in frame.columns:
        col = frame[name]
        dtype = col.dtype
        if isinstance(dtype, np.dtype) and dtype.kind in "fiub":
            kinds.append(dtype.kind)
        elif dtype.kind == "O" and pd.api.types.infer_dtype(col, skipna=False) == "string":
            kinds.append("O")
            text = "".join(col.tolist())
            quotes = quotes or any(ch in text for ch in ',"\r\n')
        else:
            return False
    quotes = quotes or any(ch in str(c) for c in frame.columns for ch in ',"\r\n')
    plain = not quotes and len(kinds) > 1   # (csv quotes an empty field alone on its row)
    with open(path, "w", newline="") as fh:
        writer = csv.writer(fh, lineterminator=os.linesep)
        writer.writerow([str(c) for c in frame.columns])
        for lo in range(0, len(frame), rows_per_part):
            part = frame.iloc[lo:lo + rows_per_part]
            columns = []
            for k, kind in enumerate(kinds):
                values = part.iloc[:, k].tolist()
                if kind == "f":
                    columns.append([float_format % v if v == v else "" for v in values])
                elif kind in "iu":
                    columns.append(list(map(str, values)))
                elif kind == "b":
                    columns.append(["True" if v else "False" for v in values])
                else:
                    columns.append(values)
            if plain:
                fh.write(os.linesep.join(map(",".join, zip(*columns))))
                fh.write(os.linesep)
            else:
                writer.writerows(zip(*columns))
    return True


def write_json(data, folder, name):
    """Write a JSON document (NumPy scalars converted)."""
    path = os.path.join(folder, name)
    with open(path, "w") as fh:
        json.dump(data, fh, indent=2, default=_json_default)
        fh.write("\n")
    return path


def _json_default(obj):
    if isinstance(obj, np.integer):
        return int(obj)
    if isinstance(obj, np.floating):
        return float(obj)
    if isinstance(obj, np.ndarray):
        return obj.tolist()
    return str(obj)


def write_results(result, folder, blocks=True):
    """Write every table, the block sums (unless ``blocks=False``: written elsewhere) and the
    summary of a :class:`TrackResult`."""
    for attr, name in TABLES.items():
        write_table(getattr(result, attr), folder, name)
    if blocks:
        save_npz(os.path.join(folder, "blocks.npz"), result.blocks,
                 narrow=[k for k in result.blocks if narrowed_type(k)])
    write_json(result.summary, folder, "summary.json")


def save_npz(path, arrays, level=1, narrow=()):
    """``np.savez_compressed`` with a chosen zlib level (1: about 4 times faster than numpy's
    default on large histograms, files about 1.5 times larger); read it with ``np.load``.

    Integer arrays named in ``narrow`` whose values are all non-negative are stored in the
    smallest unsigned type that holds their maximum (uint8 or uint16; converted in pieces of
    16 MB): a histogram of a few thousand frames then compresses two to four times faster and
    the file is smaller. :func:`load_results` widens them back (see :data:`NARROWED`).
    """
    import zipfile

    with zipfile.ZipFile(path, "w", compression=zipfile.ZIP_DEFLATED, compresslevel=level,
                         allowZip64=True) as zf:
        for name, value in arrays.items():
            value = np.asanyarray(value)
            with zf.open(f"{name}.npy", "w", force_zip64=True) as fh:
                small = _narrow_dtype(value) if name in narrow else None
                if small is None:
                    np.lib.format.write_array(fh, value, allow_pickle=False)
                    continue
                np.lib.format.write_array_header_1_0(
                    fh, {"descr": np.lib.format.dtype_to_descr(small), "fortran_order": False,
                         "shape": value.shape})
                flat = value.reshape(-1)
                step = max(1, (16 << 20) // value.itemsize)
                for lo in range(0, len(flat), step):
                    fh.write(flat[lo:lo + step].astype(small).tobytes())


#: arrays of ``blocks.npz`` that may be stored narrow, and the type they are read back as (the
#: conformer counts by prefix: ``conformer_counts_w3`` for groups of three torsions, ...)
NARROWED = {"histograms": np.int32, "state_counts": np.int64, "conformer_counts_w": np.int32}


def narrowed_type(name):
    """The type an array of ``blocks.npz`` is read back as when it was stored narrow, or ``None``
    for an array that is always stored as it is (see :data:`NARROWED`)."""
    if name in NARROWED:
        return NARROWED[name]
    prefix = "conformer_counts_w"
    return NARROWED[prefix] if name.startswith(prefix) and name[len(prefix):].isdigit() else None


def _narrow_dtype(value):
    """uint8 or uint16 when every value of an integer array fits, else ``None``."""
    if value.dtype.kind not in "iu" or value.size == 0 or not value.flags.c_contiguous:
        return None
    if value.min() < 0:
        return None
    top = value.max()
    for small in (np.uint8, np.uint16):
        if top <= np.iinfo(small).max and np.dtype(small).itemsize < value.itemsize:
            return np.dtype(small)
    return None


# How the time series are encoded: plain values (a state code's dictionary and run-length
# encoding would make the file 2.5 times smaller but cost about twice the time per value), min/max
# statistics only for the index columns, and every column required (never null; undefined is -1
# or NaN). Measured on 15,000 int8 columns x 4,473 frames (one row group): 0.3-0.4 s instead of
# 0.7-1.2 s with Arrow's defaults; the benchmark's 4,000 frames: 16 MB instead of 6.6 MB (snappy).
SERIES_OPTIONS = dict(use_dictionary=False, compression="snappy")

#: Column chunks (columns x row groups) per file of a time series (see :class:`TimeSeriesWriter`).
COLUMN_CHUNKS_PER_FILE = 40_000


class TimeSeriesWriter:
    """``states.parquet`` (and ``angles.parquet``) written chunk by chunk, in replica and frame
    order, regrouped into row groups of ``row_group_frames`` frames that never span two replicas.

    Each time series is a folder of Parquet files (a Parquet dataset, read as one table by
    pandas, Arrow, polars or DuckDB): ``part-RRRR-FFFFFFFFFFFF.parquet``, named by the replica and
    the trajectory frame of its first row, so that the order of the names is the order of the
    frames. Several writers (the workers of a parallel run, each over its own frames) can write
    into the same folder. A file holds a few row groups only: Arrow's writer keeps the metadata of
    every row group it has written until the file is closed (about 0.8 kB per column and row
    group, 12 MB per row group of 15,000 torsions), so one file for a long run would grow without
    bound; starting a new file every :data:`COLUMN_CHUNKS_PER_FILE` column chunks keeps it at a
    few tens of MB.

    Parameters
    ----------
    folder : str
        Where the time series go.
    labels : list of str
        Torsion labels (one column each after replica, frame, time_ps and, if ``weighted``, weight).
    weighted : bool
    row_group_frames : int
    kinds : tuple of str
        ``("states",)``, ``("angles",)`` or both.

    :meth:`add` takes the index columns of a chunk and, per kind, its values as an array of shape
    (n_torsions, n_frames) (int8 state codes, float32 degrees). Call :meth:`close` at the end
    (also after an error: the files are then incomplete, and the caller removes them).
    """

    def __init__(self, folder, labels, weighted, row_group_frames, kinds=("states",)):
        import pyarrow as pa

        self._pa = pa
        self.weighted = bool(weighted)
        self.target = max(1, int(row_group_frames))
        self._writers, self._schemas, self._dirs = {}, {}, {}
        for kind in kinds:
            value_type = {"states": pa.int8(), "angles": pa.float32()}[kind]
            fields = [pa.field("replica", pa.int16(), nullable=False),
                      pa.field("frame", pa.int64(), nullable=False),
                      pa.field("time_ps", pa.float64(), nullable=False)]
            if self.weighted:
                fields.append(pa.field("weight", pa.float64(), nullable=False))
            self._index_names = [f.name for f in fields]
            schema = pa.schema(fields + [pa.field(label, value_type, nullable=False) for label in labels])
            self._schemas[kind] = schema
            self._dirs[kind] = os.path.join(folder, f"{kind}.parquet")
            os.makedirs(self._dirs[kind], exist_ok=True)
        self._groups_per_file = max(1, COLUMN_CHUNKS_PER_FILE // len(schema))
        self._groups_in_file = 0
        self._pending = {kind: [] for kind in kinds}
        self._n_pending = 0
        self._replica = None
        self._used = False

    def add(self, replica, index, values):
        """Append one chunk: ``index`` has ``frame``, ``time_ps`` (and ``weight``); ``values`` maps
        each kind to an (n_torsions, n_frames) array."""
        pa = self._pa
        if replica != self._replica and self._n_pending:
            self._write_pending()
        self._replica = replica
        n = len(index["frame"])
        head = [pa.array(np.full(n, replica, dtype=np.int16)), pa.array(np.asarray(index["frame"])),
                pa.array(np.asarray(index["time_ps"]))]
        if self.weighted:
            head.append(pa.array(np.asarray(index["weight"])))
        for kind, pending in self._pending.items():
            table = pa.Table.from_arrays(head + [pa.array(row) for row in values[kind]],
                                         schema=self._schemas[kind])
            pending.append(table)
        self._n_pending += n
        while self._n_pending >= self.target:
            rest = 0
            for kind, pending in self._pending.items():
                whole = pa.concat_tables(pending)
                self._write_group(kind, whole.slice(0, self.target))
                tail = whole.slice(self.target)
                rest = len(tail)
                self._pending[kind] = [tail] if rest else []
            self._n_pending = rest
            self._next_group()

    def _write_pending(self):
        for kind, pending in self._pending.items():
            if pending:
                self._write_group(kind, self._pa.concat_tables(pending))
            self._pending[kind] = []
        self._n_pending = 0
        self._next_group()

    def _write_group(self, kind, table):
        writer = self._writers.get(kind)
        if writer is None:
            first = int(table.column("frame")[0].as_py()) if len(table) else 0
            path = os.path.join(self._dirs[kind], f"part-{self._replica or 0:04d}-{first:012d}.parquet")
            writer = self._writers[kind] = pq.ParquetWriter(path, self._schemas[kind], **SERIES_OPTIONS,
                                                            write_statistics=self._index_names)
        writer.write_table(table, row_group_size=len(table))
        self._used = True

    def _next_group(self):
        """Count a row group; after the last one of a file, close the files (the next row group
        opens new ones)."""
        self._groups_in_file += 1
        if self._groups_in_file >= self._groups_per_file:
            self._close_files()

    def _close_files(self):
        for writer in self._writers.values():
            writer.close()
        self._writers = {}
        self._groups_in_file = 0

    def close(self):
        """Write what is pending and close the files (Arrow's pool then returns its free memory)."""
        try:
            if self._n_pending:
                self._write_pending()
            for kind, schema in self._schemas.items():   # no frames: one file with the columns
                if not self._used and kind not in self._writers:
                    self._write_group(kind, schema.empty_table())
        finally:
            try:
                self._close_files()
            finally:
                self._pending = None
                self._pa.default_memory_pool().release_unused()


def series_files(path):
    """The Parquet files of a time series in frame order: the parts of a ``states.parquet`` /
    ``angles.parquet`` folder, or ``[path]`` for a single file."""
    if not os.path.isdir(path):
        return [path]
    return sorted(glob.glob(os.path.join(path, "part-*.parquet")))


def series_schema(path):
    """The Arrow schema of a time series (of its first file)."""
    return pq.ParquetFile(series_files(path)[0]).schema_arrow


def read_table(path, columns=None):
    """A whole Parquet time series (a folder of parts or one file) as a DataFrame."""
    import pyarrow as pa

    cols = _with_index(columns)
    tables = [pq.read_table(f, columns=cols) for f in series_files(path)]
    return pa.concat_tables(tables).to_pandas()


def iter_table(path, columns=None, batch_frames=None):
    """Yield a Parquet time series in chunks (one row group, or at most ``batch_frames`` rows, at
    a time), in frame order."""
    cols = _with_index(columns)
    for name in series_files(path):
        pf = pq.ParquetFile(name)
        if batch_frames is None:
            for k in range(pf.num_row_groups):
                yield pf.read_row_group(k, columns=cols).to_pandas()
        else:
            for batch in pf.iter_batches(batch_size=int(batch_frames), columns=cols):
                yield batch.to_pandas()


def _with_index(columns):
    if columns is None:
        return None
    head = ["replica", "frame", "time_ps"]
    return head + [c for c in columns if c not in head]


def load_results(folder):
    """Load a results folder written by ``dihedra track`` as a :class:`~dihedra.track.TrackResult`."""
    from ..selection.schemes import StateScheme
    from ..selection.torsions import TorsionSet
    from ..tracking import TrackResult

    folder = os.fspath(folder)
    if not os.path.isdir(folder):
        raise InputFileError(f"results folder {folder} does not exist (run 'dihedra track ... --out {folder}' first).")
    missing = [n for n in list(TABLES.values()) + ["summary.json", "blocks.npz"]
               if not os.path.exists(os.path.join(folder, n))]
    if missing:
        raise InputFileError(f"{folder} is not a complete dihedra results folder: missing {', '.join(missing)}.")
    tables = {attr: pd.read_csv(os.path.join(folder, name), keep_default_na=False,
                                na_values=[""]) for attr, name in TABLES.items()}
    for attr in ("torsions",):
        tables[attr]["segid"] = tables[attr]["segid"].fillna("").astype(str)
    with open(os.path.join(folder, "summary.json")) as fh:
        summary = json.load(fh)
    with np.load(os.path.join(folder, "blocks.npz")) as npz:
        blocks = {k: npz[k] for k in npz.files}
    for name in list(blocks):   # stored narrow by write_results
        dtype = narrowed_type(name)
        if dtype is not None and blocks[name].dtype.kind == "u" and blocks[name].dtype.itemsize < np.dtype(dtype).itemsize:
            blocks[name] = blocks[name].astype(dtype)
    tset = TorsionSet.from_frame(tables["torsions"])
    return TrackResult(torsion_set=tset, scheme=StateScheme.from_dict(summary["scheme"]), blocks=blocks,
                       summary=summary, notices=list(summary.get("notices", [])),
                       folder=os.path.abspath(folder), **tables)
