"""The time series of a results folder: ``states.parquet/``, ``cores.parquet/`` and ``angles.parquet/``.

Each is a folder of Parquet files (a Parquet dataset that pandas, Arrow, polars or DuckDB read as
one table): ``part-RRRR-FFFFFFFFFFFF.parquet``, named by replica and first frame, one row per
frame: columns replica, frame, time_ps, [weight], then one fixed-size binary column that holds the
frame's values of every torsion, in the order of ``torsions.csv`` (the labels are also in the
schema's metadata, key ``dihedra.torsions``):

* ``states.parquet``: ``state_codes``, one byte per torsion, the int8 state code (-1 undefined);
* ``cores.parquet``: ``core_bits``, one bit per torsion (bit ``t % 8`` of byte ``t // 8``): whether
  the angle lies in the core of its state;
* ``angles.parquet``: ``angles_deg``, four bytes per torsion, float32 degrees (little-endian; NaN
  undefined).

With NumPy, a table ``t`` read by pandas gives the frames x torsions array
``np.frombuffer(b"".join(t["state_codes"]), np.int8).reshape(len(t), -1)``; :meth:`TrackResult.states()
<dihedra.trajectory.result.TrackResult.states>` gives the table with one column per torsion.
A frame's values are stored as they are computed, without a transpose into one column per
torsion: Parquet's cost per column and row group (about 10 microseconds to write, more to read)
made a 15,000-column file cost more than reading the trajectory, and row groups had to be large.

:class:`TimeSeriesWriter` writes them during the trajectory pass (the pass receives a
:class:`ParquetSeriesFactory`, so that every worker of a parallel run writes the files of its own
frames); :class:`ParquetSeries` reads them back in :class:`~dihedra.trajectory.result.SeriesChunk`
pieces, the one chunked reader of dihedra (also of the folders of earlier versions, which held one
column per torsion).
"""

from __future__ import annotations

import glob
import json
import os

import numpy as np
import pyarrow.parquet as pq

from ..errors import InputFileError
from ..trajectory.result import INDEX_COLUMNS, SeriesChunk, split_by_replica

#: Per kind of time series: the value column and how a frame's values of n torsions are stored.
VALUE_COLUMNS = {"states": "state_codes", "cores": "core_bits", "angles": "angles_deg"}

#: Schema metadata key of the torsion labels (a JSON list, in the order of the values).
LABELS_KEY = b"dihedra.torsions"

# Encoding: plain values, zstd (level 3) for the state codes and core bits (consecutive frames
# repeat most of their bytes; zstd finds the previous frame 15 to 100 kB back, snappy and LZ4 do
# not beyond 64 kB: about 0.02 bytes per torsion-frame at 2 % transitions per frame, 0.6 ns per
# value to write), snappy for angles (float32 noise does not compress; snappy passes it through
# fastest); statistics only for the index columns.
COMPRESSION = {"states": ("zstd", 3), "cores": ("zstd", 3), "angles": ("snappy", None)}

#: Row groups per file of a time series (see :class:`TimeSeriesWriter`).
ROW_GROUPS_PER_FILE = 128


def value_bytes(kind, n_torsions):
    """Bytes of one frame's values of ``n_torsions`` torsions in the ``kind`` series."""
    n = int(n_torsions)
    return {"states": n, "cores": (n + 7) // 8, "angles": 4 * n}[kind]


def _binary_column(pa, values, n_rows, width):
    """One fixed-size binary Arrow array of ``n_rows`` rows of ``width`` bytes: the rows of
    ``values`` (frames, ...), without a copy when they are contiguous. The array keeps ``values``
    alive; its memory must not change until the table is written (see :meth:`TimeSeriesWriter.add`)."""
    raw = np.ascontiguousarray(values).reshape(n_rows, -1).view(np.uint8)
    if raw.shape[1] != width:   # (no torsions: one zero byte per frame, Parquet needs a width)
        raw = np.zeros((n_rows, width), dtype=np.uint8)
    return pa.FixedSizeBinaryArray.from_buffers(pa.binary(width), n_rows, [None, pa.py_buffer(raw)])


class TimeSeriesWriter:
    """``states.parquet`` (``cores.parquet``, ``angles.parquet``) written chunk by chunk, in replica
    and frame order, regrouped into row groups of ``row_group_frames`` frames that never span two
    replicas.

    Each time series is a folder of Parquet files (a Parquet dataset, read as one table by
    pandas, Arrow, polars or DuckDB): ``part-RRRR-FFFFFFFFFFFF.parquet``, named by the replica and
    the trajectory frame of its first row, so that the order of the names is the order of the
    frames. Several writers (the workers of a parallel run, each over its own frames) can write
    into the same folder. A file holds at most :data:`ROW_GROUPS_PER_FILE` row groups (Arrow's
    writer keeps the metadata of every row group of a file until it is closed), then the next
    row group opens new files.

    Parameters
    ----------
    folder : str
        Where the time series go.
    labels : list of str
        Torsion labels, in the order of the values of a frame.
    weighted : bool
    row_group_frames : int
    kinds : tuple of str
        Some of ``"states"``, ``"cores"`` and ``"angles"``.

    :meth:`add` takes the index columns of a chunk and, per kind, its values as an array of one
    row per frame: (n_frames, n_torsions) int8 state codes or float32 degrees, or (n_frames,
    ceil(n_torsions / 8)) uint8 core bits packed along the torsions
    (``np.packbits(..., axis=1, bitorder="little")``), without a copy: frames that do not fill a
    row group wait in the writer as views of ``values`` until the next :meth:`add` or
    :meth:`close`, so the caller must not write into them before (the trajectory pass hands over
    full row groups, and a last, partial one that nothing writes into after). Call :meth:`close`
    at the end (also after an error: the files are then incomplete, and the caller removes them).
    """

    def __init__(self, folder, labels, weighted, row_group_frames, kinds=("states",)):
        import pyarrow as pa

        self._pa = pa
        self.weighted = bool(weighted)
        self.target = max(1, int(row_group_frames))
        self._writers, self._schemas, self._dirs, self._widths = {}, {}, {}, {}
        meta = {LABELS_KEY: json.dumps(list(labels)).encode()}
        for kind in kinds:
            width = max(1, value_bytes(kind, len(labels)))
            self._widths[kind] = width
            fields = [pa.field("replica", pa.int16(), nullable=False),
                      pa.field("frame", pa.int64(), nullable=False),
                      pa.field("time_ps", pa.float64(), nullable=False)]
            if self.weighted:
                fields.append(pa.field("weight", pa.float64(), nullable=False))
            self._index_names = [f.name for f in fields]
            fields.append(pa.field(VALUE_COLUMNS[kind], pa.binary(width), nullable=False))
            self._schemas[kind] = pa.schema(fields, metadata=meta)
            self._dirs[kind] = os.path.join(folder, f"{kind}.parquet")
            try:   # (never makedirs: a worker of a stopped run must not make its removed folder again)
                os.mkdir(self._dirs[kind])
            except FileExistsError:
                pass
        self._groups_in_file = 0
        self._pending = {kind: [] for kind in kinds}
        self._n_pending = 0
        self._replica = None
        self._used = False

    def add(self, replica, index, values):
        """Append one chunk: ``index`` has ``frame``, ``time_ps`` (and ``weight``); ``values`` maps
        each kind to an array of one row per frame."""
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
            column = _binary_column(pa, values[kind], n, self._widths[kind])
            pending.append(pa.Table.from_arrays(head + [column], schema=self._schemas[kind]))
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
        self._pending = {kind: [] for kind in self._pending}
        self._n_pending = 0
        self._next_group()

    def _write_group(self, kind, table):
        writer = self._writers.get(kind)
        if writer is None:
            first = int(table.column("frame")[0].as_py()) if len(table) else 0
            path = os.path.join(self._dirs[kind], f"part-{self._replica or 0:04d}-{first:012d}.parquet")
            codec, level = COMPRESSION[kind]
            writer = self._writers[kind] = pq.ParquetWriter(
                path, self._schemas[kind], use_dictionary=False, compression=codec, compression_level=level,
                write_statistics=self._index_names)
        writer.write_table(table, row_group_size=len(table))
        self._used = True

    def _next_group(self):
        """Count a row group; after the last one of a file, close the files (the next row group
        opens new ones)."""
        self._groups_in_file += 1
        if self._groups_in_file >= ROW_GROUPS_PER_FILE:
            self._close_files()

    def _close_files(self):
        writers, self._writers = self._writers, {}
        for writer in writers.values():
            writer.close()
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
        return _layout(series_schema(self.path(kind)), kind)[0]

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
        names, packed = _layout(schema, kind)
        labels = list(columns) if columns is not None else names
        where = {n: k for k, n in enumerate(names)}
        missing = [c for c in labels if c not in where]
        if missing:
            raise InputFileError(f"{path} has no column {missing[0]!r}.")
        weighted = "weight" in schema.names
        index = list(INDEX_COLUMNS) + (["weight"] if weighted else [])
        read = index + ([packed] if packed else labels)
        width = len(names) if packed else len(labels)
        batch = int(batch_frames) if batch_frames else max(64, READ_VALUES // max(1, width))
        pick = np.array([where[c] for c in labels], dtype=np.intp)
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
                    values = (_unpacked(kind, rb.column(len(index)), len(names), pick) if packed
                              else _wide(rb, labels))
                    for r, lo, hi, first in split_by_replica(rep, seen):
                        yield SeriesChunk(r, first, frame[lo:hi], time[lo:hi],
                                          None if weight is None else weight[lo:hi], labels,
                                          np.ascontiguousarray(values[:, lo:hi]))
        except (OSError, ValueError) as exc:   # (Arrow's errors of a damaged file are ValueErrors)
            raise damaged_series(path, exc) from None


def _layout(schema, kind):
    """``(labels, value column)`` of a time series schema: the torsion labels and the name of the
    binary column that holds them, or, in a folder of an earlier dihedra (one column per
    torsion), ``(column names, None)``."""
    packed = VALUE_COLUMNS.get(kind)
    if packed in schema.names:
        meta = schema.metadata or {}
        try:
            return list(json.loads(meta[LABELS_KEY])), packed
        except (KeyError, ValueError, TypeError):
            raise InputFileError(f"the {kind} time series has no torsion labels in its metadata; the results "
                                 "folder is damaged: run 'dihedra track' again.") from None
    return [n for n in schema.names if n not in INDEX_COLUMNS and n != "weight"], None


def _unpacked(kind, column, n_torsions, pick):
    """The values of the torsions ``pick`` (positions in the frame) of a fixed-size binary array:
    (len(pick), n_frames) int8 codes, booleans or float32 degrees."""
    n, width, offset = len(column), column.type.byte_width, column.offset
    raw = np.frombuffer(column.buffers()[1], dtype=np.uint8, count=(offset + n) * width)[offset * width:]
    raw = raw.reshape(n, width)
    if kind == "cores":
        bits = np.unpackbits(raw, axis=1, count=n_torsions, bitorder="little").view(np.bool_)
        return bits[:, pick].T
    dtype = np.dtype(np.int8 if kind == "states" else "<f4")
    values = raw[:, :n_torsions * dtype.itemsize].view(dtype)
    return values[:, pick].T


def _wide(rb, labels):
    """The columns ``labels`` of a batch of a wide time series (one column per torsion)."""
    # (by position: looking 15,000 names up one by one scans the schema each time)
    where = {n: k for k, n in enumerate(rb.schema.names)}
    cols = [rb.column(where[c]) for c in labels]
    dtype = cols[0].type.to_pandas_dtype() if cols else np.int8
    values = np.empty((len(labels), rb.num_rows), dtype=dtype)
    for k, col in enumerate(cols):
        values[k] = col.to_numpy(zero_copy_only=False)
    return values
