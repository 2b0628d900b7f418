"""The time series of a results folder: ``states.parquet/``, ``cores.parquet/`` and ``angles.parquet/``.

Each is a folder of Parquet files (a Parquet dataset that pandas, Arrow, polars or DuckDB read as
one table): ``part-RRRR-FFFFFFFFFFFF.parquet``, named by replica and first frame, columns replica,
frame, time_ps, [weight], then one column per torsion (int8 state codes, -1 undefined; booleans,
in the core of the state or not; float32 degrees). :class:`TimeSeriesWriter` writes them during the trajectory pass (the pass receives a
:class:`ParquetSeriesFactory`, so that every worker of a parallel run writes the files of its own
frames); :class:`ParquetSeries` reads them back in :class:`~dihedra.trajectory.result.SeriesChunk`
pieces, the one chunked reader of dihedra.
"""

from __future__ import annotations

import glob
import os

import numpy as np
import pyarrow.parquet as pq

from ..errors import InputFileError
from ..trajectory.result import INDEX_COLUMNS, SeriesChunk, split_by_replica

# How the time series are encoded: plain values (a state code's dictionary and run-length
# encoding would make the file 2.5 times smaller but cost about twice the time per value), min/max
# statistics only for the index columns, and every column required (never null; undefined is -1
# or NaN). Measured on 15,000 int8 columns x 4,473 frames (one row group): 0.3-0.4 s instead of
# 0.7-1.2 s with Arrow's defaults; the benchmark's 4,000 frames: 16 MB instead of 6.6 MB (snappy).
SERIES_OPTIONS = dict(use_dictionary=False, compression="snappy")

#: Column chunks (columns x row groups) per file of a time series (see :class:`TimeSeriesWriter`).
COLUMN_CHUNKS_PER_FILE = 40_000


def _columns(pa, values, n):
    """One Arrow array per row of ``values`` (n_torsions, n_frames; booleans may come as packed
    bits, ``np.packbits(..., axis=1, bitorder="little")``: uint8), without copying when the rows
    are contiguous (a view of the pass's chunk buffer): 15,000 copied arrays cost about 50 MB
    and 0.03 s more. The arrays keep ``values`` alive; its memory must not change until the
    table is written (see :meth:`TimeSeriesWriter.add`)."""
    values = np.asarray(values)
    if values.dtype == np.bool_:   # Arrow stores booleans as bits
        values = np.packbits(values, axis=1, bitorder="little")
    n_rows = len(values)
    if values.dtype == np.uint8 and n_rows and n:   # packed bits
        if values.strides[1] != 1:
            values = np.ascontiguousarray(values)
        stride = values.strides[0]
        buf = pa.foreign_buffer(values.ctypes.data, (n_rows - 1) * stride + (n + 7) // 8, base=values)
        return [pa.Array.from_buffers(pa.bool_(), n, [None, buf], offset=r * stride * 8) for r in range(n_rows)]
    if values.dtype == np.uint8:   # packed bits of no frames (or no torsions): empty boolean columns
        values = np.zeros((n_rows, n), dtype=np.bool_)
    n = values.shape[1]
    item = values.dtype.itemsize
    if n_rows == 0 or n == 0 or values.strides[1] != item or values.strides[0] % item:
        return [pa.array(np.ascontiguousarray(row)) for row in values]
    stride = values.strides[0] // item
    span = ((n_rows - 1) * stride + n) * item
    buf = pa.foreign_buffer(values.ctypes.data, span, base=values)
    kind = pa.from_numpy_dtype(values.dtype)
    return [pa.Array.from_buffers(kind, n, [None, buf], offset=r * stride) for r in range(n_rows)]


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
        Some of ``"states"``, ``"cores"`` and ``"angles"``.

    :meth:`add` takes the index columns of a chunk and, per kind, its values as an array of shape
    (n_torsions, n_frames) (int8 state codes, float32 degrees, booleans or their bits packed
    along the frames as uint8, ``np.packbits(..., axis=1, bitorder="little")``), without a copy: frames that do
    not fill a row group wait in the writer as views of ``values`` until the next :meth:`add` or
    :meth:`close`, so the caller must not write into them before (the trajectory pass hands
    over full row groups, and a last, partial one that nothing writes into after). Call :meth:`close` at the end
    (also after an error: the files are then incomplete, and the caller removes them).
    """

    def __init__(self, folder, labels, weighted, row_group_frames, kinds=("states",)):
        import pyarrow as pa

        self._pa = pa
        self.weighted = bool(weighted)
        self.target = max(1, int(row_group_frames))
        self._writers, self._schemas, self._dirs = {}, {}, {}
        for kind in kinds:
            value_type = {"states": pa.int8(), "angles": pa.float32(), "cores": pa.bool_()}[kind]
            fields = [pa.field("replica", pa.int16(), nullable=False),
                      pa.field("frame", pa.int64(), nullable=False),
                      pa.field("time_ps", pa.float64(), nullable=False)]
            if self.weighted:
                fields.append(pa.field("weight", pa.float64(), nullable=False))
            self._index_names = [f.name for f in fields]
            schema = pa.schema(fields + [pa.field(label, value_type, nullable=False) for label in labels])
            self._schemas[kind] = schema
            self._dirs[kind] = os.path.join(folder, f"{kind}.parquet")
            try:   # (never makedirs: a worker of a stopped run must not make its removed folder again)
                os.mkdir(self._dirs[kind])
            except FileExistsError:
                pass
        self._groups_per_file = max(1, COLUMN_CHUNKS_PER_FILE // len(schema))
        self._groups_in_file = 0
        self._pending = {kind: [] for kind in kinds}
        self._n_pending = 0
        self._replica = None
        self._used = False
        self._pool = None
        self._closing = False

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
            table = pa.Table.from_arrays(head + _columns(pa, values[kind], n), schema=self._schemas[kind])
            pending.append(table)
        self._n_pending += n
        while self._n_pending >= self.target:
            wholes = {kind: pa.concat_tables(pending) for kind, pending in self._pending.items()}
            self._each_kind(lambda kind: self._write_group(kind, wholes[kind].slice(0, self.target)))
            rest = 0
            for kind, whole in wholes.items():
                tail = whole.slice(self.target)
                rest = len(tail)
                self._pending[kind] = [tail] if rest else []
            self._n_pending = rest
            self._next_group()

    def _write_pending(self):
        tables = {kind: self._pa.concat_tables(pending) for kind, pending in self._pending.items() if pending}
        self._each_kind(lambda kind: self._write_group(kind, tables[kind]), list(tables))
        self._pending = {kind: [] for kind in self._pending}
        self._n_pending = 0
        self._next_group()

    def _each_kind(self, work, kinds=None):
        """``work(kind)`` for every kind; in :meth:`close`, the kinds at the same time (Arrow
        encodes and writes without Python's lock: the last row groups of states and cores, for
        which the run waits, of 15,000 columns each in about half the time on two cores; during
        the pass one after the other, in the pass's writing thread: each writer of 15,000
        columns needs about 60 MB while it writes)."""
        kinds = list(self._pending) if kinds is None else kinds
        if len(kinds) < 2 or not self._closing:
            for kind in kinds:
                work(kind)
            return
        if self._pool is None:
            from concurrent.futures import ThreadPoolExecutor
            self._pool = ThreadPoolExecutor(2, thread_name_prefix="dihedra-parquet")
        others = [self._pool.submit(work, kind) for kind in kinds[1:]]
        try:
            work(kinds[0])
        finally:
            for f in others:
                f.result()

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
        writers, self._writers = self._writers, {}
        self._each_kind(lambda kind: writers[kind].close(), list(writers))
        self._groups_in_file = 0

    def close(self):
        """Write what is pending and close the files (Arrow's pool then returns its free memory)."""
        self._closing = True
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
                if self._pool is not None:
                    self._pool.shutdown()
                    self._pool = None
                self._pa.default_memory_pool().release_unused()


def series_files(path):
    """The Parquet files of a time series in frame order: the parts of a ``states.parquet`` /
    ``angles.parquet`` folder, or ``[path]`` for a single file."""
    if not os.path.isdir(path):
        return [path]
    return sorted(glob.glob(os.path.join(path, "part-*.parquet")))


def series_schema(path):
    """The Arrow schema of a time series (of its first file)."""
    files = series_files(path)
    if not files:
        raise InputFileError(f"the time series {path} holds no Parquet file; the results folder is damaged: run "
                             "'dihedra track' again.")
    try:
        return pq.ParquetFile(files[0]).schema_arrow
    except (OSError, ValueError) as exc:   # (Arrow's errors of a damaged file are ValueErrors)
        raise damaged_series(path, exc) from None


def damaged_series(path, exc):
    text = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
    return InputFileError(f"the time series {path} cannot be read ({text}); the results folder is damaged: run "
                          "'dihedra track' again.")


class ParquetSeriesFactory:
    """Makes the :class:`TimeSeriesWriter` of a pass (picklable: workers of a parallel run call it
    with the layout of their chunks and write into the same folder)."""

    def __init__(self, folder):
        self.folder = os.fspath(folder)

    def __call__(self, labels, weighted, row_group_frames, kinds):
        return TimeSeriesWriter(self.folder, labels, weighted, row_group_frames, kinds=kinds)


#: Values decoded from Parquet per read (reads are costly per column, so they are large).
READ_VALUES = 16_000_000


class ParquetSeries:
    """The time series of a results folder, read in chunks (see the module notes)."""

    def __init__(self, folder):
        self.folder = os.fspath(folder)
        self._opened = {}   # the last files read: their footers, parsed once

    def __getstate__(self):
        return {"folder": self.folder, "_opened": {}}

    def path(self, kind):
        return os.path.join(self.folder, f"{kind}.parquet")

    def _file(self, name):
        """``pq.ParquetFile`` of ``name``, kept for the next read of other columns (the footer of
        15,000 columns takes about 0.1-0.5 s to parse; a few files are kept)."""
        key = (name, os.path.getmtime(name), os.path.getsize(name))
        pf = self._opened.get(key)
        if pf is None:
            while len(self._opened) >= 2:
                self._opened.pop(next(iter(self._opened)))
            pf = self._opened[key] = pq.ParquetFile(name)
        return pf

    def has(self, kind):
        return os.path.exists(self.path(kind))

    def columns(self, kind):
        names = series_schema(self.path(kind)).names
        return [n for n in names if n not in INDEX_COLUMNS and n != "weight"]

    def iter_frames(self, kind, columns=None, batch_frames=None):
        """:meth:`iter_chunks` as DataFrames (rows of the time series table)."""
        for chunk in self.iter_chunks(kind, columns, batch_frames):
            yield chunk.to_frame()

    def iter_chunks(self, kind, columns=None, batch_frames=None):
        """Yield :class:`~dihedra.trajectory.result.SeriesChunk` pieces of the ``kind`` series in
        frame order, at most ``batch_frames`` frames each (default about READ_VALUES values)."""
        path = self.path(kind)
        files = series_files(path)
        if not files:
            series_schema(path)   # (its error: no Parquet file)
        try:
            schema = self._file(files[0]).schema_arrow
        except (OSError, ValueError) as exc:   # (Arrow's errors of a damaged file are ValueErrors)
            raise damaged_series(path, exc) from None
        labels = list(columns) if columns is not None else [n for n in schema.names
                                                            if n not in INDEX_COLUMNS and n != "weight"]
        present = set(schema.names)   # (schema.names builds a new list at every use)
        missing = [c for c in labels if c not in present]
        if missing:
            raise InputFileError(f"{path} has no column {missing[0]!r}.")
        weighted = "weight" in schema.names
        read = list(INDEX_COLUMNS) + (["weight"] if weighted else []) + labels
        batch = int(batch_frames) if batch_frames else max(64, READ_VALUES // max(1, len(labels)))
        seen = {}
        try:
            for name in files:
                # a reader of its own (two iterations of one file at a time must not share one:
                # Arrow's read cache mixes them up), on the footer parsed once
                reader = pq.ParquetFile(name, metadata=self._file(name).metadata)
                for rb in reader.iter_batches(batch_size=batch, columns=read):
                    rep = rb.column("replica").to_numpy()
                    frame = rb.column("frame").to_numpy()
                    time = rb.column("time_ps").to_numpy()
                    weight = rb.column("weight").to_numpy() if weighted else None
                    # (by position: looking 15,000 names up one by one scans the schema each time,
                    # 15 s for one batch)
                    where = {n: k for k, n in enumerate(rb.schema.names)}
                    cols = [rb.column(where[c]) for c in labels]
                    for r, lo, hi, first in split_by_replica(rep, seen):
                        m = hi - lo
                        dtype = cols[0].type.to_pandas_dtype() if cols else np.int8
                        values = np.empty((len(labels), m), dtype=dtype)
                        for k, col in enumerate(cols):
                            values[k] = col.slice(lo, m).to_numpy(zero_copy_only=False)
                        yield SeriesChunk(r, first, frame[lo:hi], time[lo:hi],
                                          None if weight is None else weight[lo:hi], labels, values)
        except (OSError, ValueError) as exc:   # (Arrow's errors of a damaged file are ValueErrors)
            raise damaged_series(path, exc) from None
