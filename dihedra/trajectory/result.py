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

from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from ..errors import DihedraError
from ..selection.torsions import TorsionSet

#: The index columns of a time series, before the weight (if any) and one column per torsion.
INDEX_COLUMNS = ("replica", "frame", "time_ps")


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
            rows = [part.columns.index(c) for c in columns] if columns is not None else slice(None)
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

    def states(self, columns=None):
        """The state time series as a DataFrame (replica, frame, time_ps, [weight], one int8
        column per torsion). For long runs prefer :meth:`iter_states`, which reads it in chunks."""
        return self._whole("states", columns)

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
