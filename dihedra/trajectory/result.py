"""The result of a tracking run, in memory or read back from a results folder.

:class:`TrackResult` holds the tables (torsions, populations, conformers), the block sums and the
summary, and gives access to the state (and angle) time series through a *series source*: the
Parquet files of a results folder (:class:`dihedra.io.series.ParquetSeries`) or arrays kept in
memory (:class:`MemorySeries`). Analyses read the time series only through
:meth:`TrackResult.iter_chunks` (or :meth:`~TrackResult.states` / :meth:`~TrackResult.angles`), so an
in-memory result and a folder work alike.

A time series is read in :class:`SeriesChunk` pieces: consecutive frames of one replica, with the
position of the first one within its replica, so that a reader can place every frame in its block
without counting rows itself.
"""

from __future__ import annotations

import contextlib
import os
import sys
from collections.abc import MutableMapping
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from ..errors import DihedraError
from ..selection.torsions import TorsionSet

#: The index columns of a time series, before the weight (if any) and one column per torsion.
INDEX_COLUMNS = ("replica", "frame", "time_ps")

#: Block sums that may be kept (and stored) in a narrower unsigned type, and the type they are
#: read as (the conformer counts by prefix: ``conformer_counts_w3`` for groups of three torsions).
NARROWED = {"histograms": np.int32, "state_counts": np.int64, "conformer_counts_w": np.int32}


def narrowed_type(name):
    """The type an array of the block sums is read as when it is kept narrow, or ``None`` for an
    array that is always kept as it is (see :data:`NARROWED`)."""
    if name in NARROWED:
        return NARROWED[name]
    prefix = "conformer_counts_w"
    return NARROWED[prefix] if name.startswith(prefix) and name[len(prefix):].isdigit() else None


#: Allocations from this size on are mapped from the system and returned to it when freed (glibc's
#: ``M_MMAP_THRESHOLD``, fixed: by default it rises to the largest block freed, up to 32 MB, and
#: freed arrays of that size then stay in the heap, counting in the peak of the steps after the pass).
MMAP_THRESHOLD = 256 << 10


def _libc():
    """glibc through ctypes, or None elsewhere. Loaded by its name: ``ctypes.util.find_library``
    runs ``ldconfig`` in a child process, a copy of this one (with a tree of processes measured,
    a fork of a 500 MB process looks like 500 MB more)."""
    import ctypes

    try:
        return ctypes.CDLL("libc.so.6")
    except OSError:
        return None


def bound_heap():
    """Fix glibc's mmap threshold at :data:`MMAP_THRESHOLD` for this process (nothing elsewhere):
    large arrays freed by the pass and the tables go back to the system at once. Measured on the
    benchmark system (1,500 frames of 15,000 torsions): a peak of about 540 MB instead of 580."""
    libc = _libc()
    if libc is not None and hasattr(libc, "mallopt"):
        libc.mallopt(-3, MMAP_THRESHOLD)   # M_MMAP_THRESHOLD
        arrow_on_system_heap()


def arrow_on_system_heap():
    """Let Arrow (Parquet, CSV, pandas' strings) allocate from the system heap instead of its own
    pool, unless the user chose a pool (``ARROW_DEFAULT_MEMORY_POOL``): freed buffers then go back
    to the system as the rest do. Measured on the benchmark system (1,500 frames of 15,000
    torsions, DCD): a peak of about 450 MB instead of 480, the same time."""
    import sys

    if os.environ.get("ARROW_DEFAULT_MEMORY_POOL"):
        return
    if "pyarrow" not in sys.modules:
        os.environ["ARROW_DEFAULT_MEMORY_POOL"] = "system"   # read when pyarrow is first imported
        return
    import pyarrow as pa

    pa.set_memory_pool(pa.system_memory_pool())


def release_memory():
    """Hand freed memory back to the system: what Arrow's memory pool keeps of buffers it freed
    (when pyarrow is in use) and glibc's heap (``malloc_trim``; nothing elsewhere). Large arrays,
    Arrow's writer and readers of the time series leave freed memory that both keep for later,
    which would count in the peak of the steps after them."""
    arrow = sys.modules.get("pyarrow")
    if arrow is not None:
        arrow.default_memory_pool().release_unused()
    libc = _libc()
    if libc is not None and hasattr(libc, "malloc_trim"):
        libc.malloc_trim(0)


class BlockParts:
    """An array of blocks, shape ``(n_blocks, ...)``, kept as parts until it is read.

    ``parts`` lists ``(block, piece)``; a piece is an array of one block, the ``.npy`` file of
    one (left by the pass in the run's scratch folder), or ``(cells, values)``, the non-empty
    cells of one; the pieces of a block add up to it, a block without pieces is zero. The fine
    histograms of a run are kept so (:func:`dihedra.trajectory.histograms.merge_hist_parts`):
    :func:`dihedra.io.blocks.save_npz` writes them block by block, and
    :class:`BlockSums` turns them into one array only when an analysis reads them.
    """

    def __init__(self, parts, shape, dtype):
        self.parts = list(parts)
        self.shape = tuple(int(x) for x in shape)
        self.dtype = np.dtype(dtype)
        self.ndim = len(self.shape)

    def __len__(self):
        return self.shape[0]

    def block(self, b):
        """Block ``b`` as an array (its pieces added in :attr:`dtype`)."""
        pieces = [piece for block, piece in self.parts if block == b]
        if len(pieces) == 1 and isinstance(pieces[0], str):   # one file: read as it is (no sum)
            one = np.load(pieces[0])
            if one.dtype == self.dtype and one.shape == self.shape[1:]:
                return one
        out = np.zeros(self.shape[1:], dtype=self.dtype)
        for piece in pieces:
            if isinstance(piece, str):
                piece = np.load(piece)
            if isinstance(piece, tuple):
                cells, values = piece
                out.reshape(-1)[cells] += values
            else:
                out += piece
        return out

    def shifted(self, offset):
        """The same parts with block numbers ``offset`` later (replicas one after another)."""
        return [(block + offset, piece) for block, piece in self.parts]

    def materialize(self):
        """The whole array; its files are read once and removed (the parts are then the
        blocks of this array)."""
        out = np.empty(self.shape, dtype=self.dtype)
        for b in range(self.shape[0]):
            out[b] = self.block(b)
        files = [piece for _, piece in self.parts if isinstance(piece, str)]
        self.parts = [(b, out[b]) for b in range(self.shape[0])]
        for path in files:
            with contextlib.suppress(OSError):
                os.remove(path)
        return out

    def __array__(self, dtype=None, copy=None):
        out = self.materialize()
        return out if dtype is None else out.astype(dtype)


def kept_block(blocks, name):
    """:meth:`BlockSums.kept` of ``blocks``, or ``blocks[name]`` of a plain mapping."""
    return blocks.kept(name) if hasattr(blocks, "kept") else blocks[name]


class BlockSums(MutableMapping):
    """The block sums of a run (``blocks.npz`` and ``histograms.parquet``), a mapping of name to array.

    The pass counts in the narrowest type the counts fit (uint8 histograms of short blocks, see
    :mod:`dihedra.numerics.counts`); an array named in :data:`NARROWED` is widened to its type
    the first time it is read from the mapping, so analyses always see int32 histograms and
    conformer counts and int64 state counts, while a run that never reads them (``dihedra
    track`` writing a folder) never holds the wide copy. An entry kept in parts or in a file
    (:class:`BlockParts`, :class:`dihedra.io.blocks.HistogramFile`) is read into one array then too. :attr:`stored`
    holds the entries as kept.

    Examples
    --------
    >>> b = BlockSums({"histograms": np.ones((1, 2, 3), dtype=np.uint8)})
    >>> b.stored["histograms"].dtype, b["histograms"].dtype
    (dtype('uint8'), dtype('int32'))
    """

    def __init__(self, arrays=()):
        self.stored = dict(arrays)

    def __getitem__(self, name):
        value = self.kept(name)
        wide = narrowed_type(name)
        if (wide is not None and isinstance(value, np.ndarray) and value.dtype.kind == "u"
                and value.dtype.itemsize < np.dtype(wide).itemsize):
            value = self.stored[name] = value.astype(wide)
        return value

    def kept(self, name):
        """Entry ``name`` as counted: read from its file or parts when needed, but not widened (a
        ``uint8`` histogram of the benchmark system is 86 MB, 346 MB as ``int32``), for code that
        converts it slice by slice itself."""
        value = self.stored[name]
        if hasattr(value, "materialize"):   # kept in parts or in a file (BlockParts, HistogramFile)
            value = self.stored[name] = value.materialize()
        return value

    def __setitem__(self, name, value):
        self.stored[name] = value

    def __delitem__(self, name):
        del self.stored[name]

    def __iter__(self):
        return iter(self.stored)

    def __len__(self):
        return len(self.stored)

    def __repr__(self):
        return f"BlockSums({', '.join(self.stored)})"


@dataclass
class SeriesChunk:
    """Consecutive frames of one replica of a time series.

    Attributes
    ----------
    replica : int
    first : int
        Position of the first frame within its replica (0 for the replica's first analysed frame).
    frame : ndarray of int64, shape (n,)
        Trajectory frame numbers.
    time_ps : ndarray of float64, shape (n,)
    weight : ndarray of float64, shape (n,), or None
    columns : list of str
        Torsion labels, one row of ``values`` each.
    values : ndarray, shape (n_columns, n)
        int8 state codes (-1 undefined) or float32 angles in degrees (NaN undefined).
    """

    replica: int
    first: int
    frame: np.ndarray
    time_ps: np.ndarray
    weight: np.ndarray | None
    columns: list
    values: np.ndarray

    def __len__(self):
        return len(self.frame)

    @property
    def position(self):
        """Position of every frame within its replica."""
        return self.first + np.arange(len(self.frame), dtype=np.int64)

    def to_frame(self):
        """The chunk as rows of the time series table (index columns, then one per torsion)."""
        data = {"replica": np.full(len(self), self.replica, dtype=np.int16), "frame": self.frame,
                "time_ps": self.time_ps}
        if self.weight is not None:
            data["weight"] = self.weight
        data.update(zip(self.columns, self.values))
        return pd.DataFrame(data)


def split_by_replica(replica, seen):
    """Runs of equal replica in a block of rows: yields ``(replica, lo, hi, first)`` with ``first``
    the position of row ``lo`` within its replica; ``seen`` (a dict replica -> rows so far) is
    updated, so that consecutive blocks of one series continue the count."""
    replica = np.asarray(replica)
    cuts = np.flatnonzero(np.diff(replica)) + 1
    for lo, hi in zip(np.r_[0, cuts], np.r_[cuts, len(replica)]):
        if hi <= lo:
            continue
        r = int(replica[lo])
        first = seen.get(r, 0)
        seen[r] = first + int(hi - lo)
        yield r, int(lo), int(hi), first


class MemorySeries:
    """Time series kept in memory: per kind, the chunks of a run in frame order."""

    def __init__(self, chunks):
        self._chunks = {kind: list(parts) for kind, parts in chunks.items()}

    @classmethod
    def from_parts(cls, parts):
        """The series kept by the in-memory writers of a pass (one ``{kind: chunks}`` per worker),
        per kind in replica and frame order."""
        out = {}
        for part in parts:
            for kind, chunks in part.items():
                out.setdefault(kind, []).extend(chunks)
        return cls({kind: sorted(chunks, key=lambda c: (c.replica, c.first)) for kind, chunks in out.items()})

    def has(self, kind):
        return kind in self._chunks

    def columns(self, kind):
        parts = self._chunks.get(kind) or []
        return list(parts[0].columns) if parts else []

    def iter_chunks(self, kind, columns=None, batch_frames=None):
        for part in self._chunks[kind]:
            where = {c: k for k, c in enumerate(part.columns)} if columns is not None else None
            rows = [where[c] for c in columns] if columns is not None else slice(None)
            step = int(batch_frames) if batch_frames else max(1, len(part))
            for lo in range(0, len(part), step):
                hi = min(len(part), lo + step)
                yield SeriesChunk(part.replica, part.first + lo, part.frame[lo:hi], part.time_ps[lo:hi],
                                  None if part.weight is None else part.weight[lo:hi],
                                  list(part.columns) if columns is None else list(columns),
                                  part.values[rows, lo:hi])


def _missing(kind):
    hint = " (run with keep_angles=True / --keep-angles)" if kind == "angles" else ""
    return DihedraError(f"this result has no {kind} time series{hint}.")


@dataclass
class TrackResult:
    """Everything a tracking run produced; the same content as a results folder.

    Attributes
    ----------
    torsion_set : TorsionSet
    torsions : DataFrame
        Layout of ``torsions.csv``.
    scheme : StateScheme
    populations, populations_by_type, populations_by_replica : DataFrame
        Per torsion, pooled per type, and per replica; ``population`` is a fraction in [0, 1].
    conformers, conformers_by_type : DataFrame
        Joint states of the torsions of each group, and pooled per group type.
    blocks : dict of ndarray
        Block sums from the pass (``state_counts`` (n_blocks, n_torsions, n_states),
        ``histograms`` (n_hist_blocks, n_torsions, n_bins), block frames, weights and replicas,
        ``bin_edges_deg``), the input for profiles and errors.
    summary : dict
        Inputs with SHA-256, frame ranges, time step, scheme, parameters, package versions.
    notices : list of str
        Things the user should know (skipped residues, undefined torsions, rough errors).
    folder : str or None
        The results folder, if written or loaded.
    series : object or None
        Where the time series are (see the module notes); ``None``: no time series.
    schemes : DataFrame or None
        The states of every torsion type (``schemes.csv``): scheme, state, arcs, why the type
        follows its scheme, and for basins their minima (see :func:`~dihedra.trajectory.assemble.scheme_table`).
    """

    torsion_set: TorsionSet
    torsions: pd.DataFrame
    scheme: object
    populations: pd.DataFrame
    populations_by_type: pd.DataFrame
    populations_by_replica: pd.DataFrame
    conformers: pd.DataFrame
    conformers_by_type: pd.DataFrame
    blocks: dict
    summary: dict
    notices: list = field(default_factory=list)
    folder: str | None = None
    series: object = None
    schemes: pd.DataFrame | None = None
    _scratch: object = None  # keeps a temporary folder alive for API-only runs
    time_blocks: object = None  # the convergence time blocks the pass counted (not saved: from the series)

    def has_series(self, kind):
        """Whether the result holds the ``"states"`` or ``"angles"`` time series."""
        return self.series is not None and self.series.has(kind)

    def iter_chunks(self, kind="states", columns=None, batch_frames=None):
        """Yield the ``kind`` time series (``"states"`` or ``"angles"``) as :class:`SeriesChunk`
        pieces in frame order, each within one replica."""
        if not self.has_series(kind):
            raise _missing(kind)
        yield from self.series.iter_chunks(kind, columns, batch_frames)

    def iter_states(self, columns=None, batch_frames=None):
        """Yield the state time series chunk by chunk (DataFrames), in frame order."""
        for chunk in self.iter_chunks("states", columns, batch_frames):
            yield chunk.to_frame()

    def states(self, columns=None, labels=False):
        """The state time series as a DataFrame (replica, frame, time_ps, [weight], one int8
        column per torsion: the position of the state in ``scheme.labels``, -1 undefined). With
        ``labels``, the torsion columns are categorical with the state labels as categories
        (undefined frames missing). For long runs prefer :meth:`iter_states`, which reads it in
        chunks."""
        frame = self._whole("states", columns)
        if labels:
            names = list(self.scheme.labels)
            for c in frame.columns[len(frame.columns) - len(columns or self.series.columns("states")):]:
                frame[c] = pd.Categorical.from_codes(frame[c].to_numpy().astype(np.int64), categories=names)
        return frame

    def angles(self, columns=None):
        """The angle time series (float32 degrees), if the run kept angles."""
        return self._whole("angles", columns)

    def _whole(self, kind, columns):
        parts = [c.to_frame() for c in self.iter_chunks(kind, columns)]
        if not parts:
            return pd.DataFrame(columns=list(INDEX_COLUMNS) + list(columns or self.series.columns(kind)))
        return pd.concat(parts, ignore_index=True) if len(parts) > 1 else parts[0]


def as_result(obj):
    """The :class:`TrackResult` of ``obj``: a result itself, or an analysis that has run
    (:class:`~dihedra.trajectory.states.TorsionStates`)."""
    if isinstance(obj, TrackResult):
        return obj
    inner = getattr(obj, "tracking_result", None)
    if isinstance(inner, TrackResult):
        return inner
    raise DihedraError(f"expected a tracking result (from dihedra.track, dihedra.load_results or a "
                       f"TorsionStates analysis after run()); got {type(obj).__name__}.")
