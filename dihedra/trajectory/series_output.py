"""The time series of the trajectory pass on their way out: chunks handed to a writer, here or in a
background thread.

The pass does not know where the series go: it is given a factory (``series(labels, weighted,
chunk_frames, kinds)``) that makes a writer with ``add(replica, index, values)`` and ``close()``:
Parquet files of a results folder (:class:`dihedra.io.series.ParquetSeriesFactory`) or arrays kept
in memory (:class:`MemorySeriesFactory`). ``index`` holds ``frame``, ``time_ps``, ``position`` (of
each frame within the replica) and, for a weighted run, ``weight``; ``values`` maps ``"states"``
(``"cores"``, ``"angles"``) to arrays of one row per frame: (n_frames, n_torsions) int8 codes or
float32 degrees, (n_frames, ceil(n_torsions / 8)) uint8 core bits packed along the torsions.
"""

from __future__ import annotations

import contextlib

import numpy as np

from ..errors import OutputWriteError
from .overlap import Both
from .result import SeriesChunk

#: Default size of a chunk (and of a Parquet row group) of the time series, in bytes of values.
CHUNK_BYTES = 4 << 20


def default_chunk_frames(n_torsions, keep_angles, threads=1):
    """Frames per chunk (and Parquet row group): about ``CHUNK_BYTES`` of values, 64 to 100,000;
    half of that with a second thread, where a full chunk is written while the next fills a
    second buffer: the two hold what one chunk would, so the peak does not rise once a run
    outgrows its first chunk."""
    per_frame = max(1, int(n_torsions)) * (1 + 4 * bool(keep_angles))
    return int(max(64, min(100_000, CHUNK_BYTES // per_frame))) // (2 if threads > 1 else 1)


@contextlib.contextmanager
def writing():
    """An ``OSError`` of the time series writer raised as :class:`~dihedra.errors.OutputWriteError`
    (an ``OSError`` while reading means a damaged trajectory; while writing, a full disk)."""
    try:
        yield
    except OSError as exc:
        where = f" into {exc.filename}" if getattr(exc, "filename", None) else ""
        raise OutputWriteError(exc.errno, f"writing the time series{where} failed: {exc.strerror or exc}") from exc


class SeriesOutput:
    """The writer of one pass, made at the first chunk; chunks are written in order, in the
    calling thread or (``background=True``) in one background thread."""

    def __init__(self, factory, labels, weighted, chunk_frames):
        self._factory = factory
        self._layout = (list(labels), bool(weighted), int(chunk_frames))
        self._writer = None
        self._pool = None
        self._pending = None
        self.collected = None   # what an in-memory writer kept, after close()

    def add(self, replica, index, values, background=False):
        """Write a chunk (the previous one is finished first: order is kept)."""
        self.wait()
        with writing():
            if self._writer is None:
                self._writer = self._factory(*self._layout, tuple(values))
            if not background:
                self._writer.add(replica, index, values)
                return
        self._pending = self._executor().submit(self._writer.add, replica, index, values)

    def wait(self):
        """Wait for the chunk being written in the background (and raise its error)."""
        pending, self._pending = self._pending, None
        if pending is not None:
            with writing():
                pending.result()

    def close_in_background(self):
        """Queue the closing of the writer after the last chunk."""
        if self._writer is None:
            return
        writer, self._writer = self._writer, None
        self._pending = Both(self._pending, self._executor().submit(self._close, writer))

    def close(self):
        """Wait for every chunk and close the writer (also after an error: the files are then
        incomplete, and whoever asked for them removes them)."""
        try:
            self.wait()
        finally:
            pool, self._pool = self._pool, None
            if pool is not None:
                pool.shutdown()
        writer, self._writer = self._writer, None
        if writer is not None:
            with writing():
                self._close(writer)

    def _close(self, writer):
        writer.close()
        if getattr(writer, "chunks", None) is not None:
            self.collected = writer.chunks

    def _executor(self):
        if self._pool is None:
            from concurrent.futures import ThreadPoolExecutor
            self._pool = ThreadPoolExecutor(1, thread_name_prefix="dihedra-series")
        return self._pool


class ChunkBuffers:
    """The chunk of the time series being filled, one row per frame: int8 codes, float32 angles
    (if kept) and the core bits packed along the torsions (if recorded), and a second set that
    the next chunk fills while the first is written (made at the first :meth:`swap`: runs of one
    chunk never need it)."""

    def __init__(self, n_frames, n_torsions, angles=False, cores=False):
        self.codes = np.empty((n_frames, n_torsions), dtype=np.int8)
        self.angles = np.empty((n_frames, n_torsions), dtype=np.float32) if angles else None
        self.cores = np.zeros((n_frames, (n_torsions + 7) // 8), dtype=np.uint8) if cores else None
        self._spare = None

    def fill(self, r0, r1, codes, angles=None, cores=None):
        """Rows ``r0 .. r1`` from the buffered frames (cores: 0/1 per torsion, packed here)."""
        self.codes[r0:r1] = codes
        if self.angles is not None:
            self.angles[r0:r1] = angles
        if self.cores is not None:
            self.cores[r0:r1] = np.packbits(cores, axis=1, bitorder="little")

    def values(self, n):
        """The first ``n`` rows of each kind, as views (``{"states": ..., "angles": ..., "cores": ...}``)."""
        return {kind: buf[:n] for kind, buf in (("states", self.codes), ("angles", self.angles),
                                                ("cores", self.cores)) if buf is not None}

    def swap(self):
        """Fill the other set next (the one just handed over is being written)."""
        mine = (self.codes, self.angles, self.cores)
        if self._spare is None:
            self._spare = tuple(None if b is None else np.empty_like(b) for b in mine)
        (self.codes, self.angles, self.cores), self._spare = self._spare, mine

    def drop_spare(self):
        self._spare = None


class MemorySeriesFactory:
    """Makes writers that keep the time series in memory (copies of the chunks), for a
    :class:`~dihedra.trajectory.result.MemorySeries`."""

    def __call__(self, labels, weighted, chunk_frames, kinds):
        return _MemoryWriter(labels, weighted, kinds)


class _MemoryWriter:
    def __init__(self, labels, weighted, kinds):
        self.labels = list(labels)
        self.weighted = weighted
        self.chunks = {kind: [] for kind in kinds}

    def add(self, replica, index, values):
        position = np.asarray(index["position"])
        for kind, array in values.items():   # (one row per frame; kept one row per torsion)
            if kind == "cores":   # bits packed along the torsions
                array = np.unpackbits(array, axis=1, count=len(self.labels), bitorder="little").view(np.bool_)
            self.chunks[kind].append(SeriesChunk(
                int(replica), int(position[0]) if len(position) else 0, np.array(index["frame"]),
                np.array(index["time_ps"]), np.array(index["weight"]) if self.weighted else None,
                self.labels, np.ascontiguousarray(array.T)))

    def close(self):
        pass
