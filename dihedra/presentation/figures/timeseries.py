r"""Figures 1 and 2: the angle time series and the state raster, and the chunked readers behind them.

Large data
----------
Time-series figures never load a whole trajectory: :func:`read_angle_series` streams
``angles.parquet`` in chunks and keeps every k-th frame, :func:`read_state_raster` streams
``states.parquet`` and keeps, for each torsion row and time column, the most frequent state of the
frames in that column; more torsions than rows are thinned to an evenly spaced subset. Each figure
says on its face what it shows ("every 5th frame", "400 of 12000 torsions", "each column: most
frequent state of 250 frames").
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from ...errors import DihedraError
from ...io.series import ParquetSeries
from ...io.tables import read_optional_json, read_table
from .common import (_angle_axis, _new_axes, _note, _replica_info, _shade_sectors, _time_label, _top_legend,
                     _wrap, sector_spans, time_scale)
from .style import INK, UNDEFINED_COLOUR, _darker, state_colours

# ----------------------------------------------------------------------------------------------
# Reading time series in chunks
# ----------------------------------------------------------------------------------------------


@dataclass
class AngleSeries:
    """A downsampled angle time series: what :func:`plot_angle_series` draws.

    Attributes
    ----------
    frame : DataFrame
        replica, frame, time_ps and one float column (degrees) per torsion, every ``stride``-th frame.
    torsions : list of str
    stride : int
        One frame in ``stride`` is kept.
    n_frames : int
        Frames in the folder (all replicas).
    time_known : bool
        Whether the trajectory had a usable time step (else time_ps counts frames).
    """

    frame: pd.DataFrame
    torsions: list
    stride: int
    n_frames: int
    time_known: bool = True

    @property
    def description(self):
        return "every frame" if self.stride == 1 else f"every {self.stride}th of {self.n_frames} frames"


def read_angle_series(folder, torsions, max_points=4000, batch_frames=None):
    """Read the angles of a few torsions from ``angles.parquet`` in chunks, keeping every k-th frame.

    Parameters
    ----------
    folder : str
        Results folder written with ``track --keep-angles``.
    torsions : list of str
        Torsion labels (columns of ``angles.parquet``).
    max_points : int
        At most about this many frames are kept (k = ceil(n_frames / max_points)).

    Returns
    -------
    AngleSeries
    """
    series = ParquetSeries(folder)
    if not series.has("angles"):
        raise DihedraError(f"{folder} has no angles.parquet; rerun 'dihedra track ... --keep-angles'.")
    summary = read_optional_json(folder, "summary.json") or {}
    info = _replica_info(summary)
    n_total = sum(n for n, _ in info) or None
    _check_columns(series, "angles", torsions)
    stride = max(1, int(np.ceil((n_total or max_points) / max(1, int(max_points)))))
    kept, seen = [], 0
    for chunk in series.iter_frames("angles", list(torsions), batch_frames):
        idx = np.arange(seen, seen + len(chunk))
        kept.append(chunk.iloc[np.flatnonzero(idx % stride == 0)])
        seen += len(chunk)
    frame = pd.concat(kept, ignore_index=True) if kept else pd.DataFrame()
    return AngleSeries(frame=frame, torsions=list(torsions), stride=stride, n_frames=seen,
                       time_known=all(dt is not None for _, dt in info) if info else True)


def _check_columns(series, kind, columns):
    all_names = series.columns(kind)
    names = set(all_names)
    missing = [c for c in columns if c not in names]
    if missing:
        some = all_names[:3]
        raise DihedraError(f"no torsion {missing[0]!r} in {kind}.parquet; torsion labels look like "
                           f"{', '.join(some)} (see torsions.csv).")


@dataclass
class StateRaster:
    """States of many torsions against time, aggregated for display: what :func:`plot_state_raster` draws.

    Attributes
    ----------
    codes : ndarray of int8, shape (n_rows, n_columns)
        Most frequent state code of each torsion row in each time column (-1: undefined).
    rows, row_types : list of str
        Torsion label and type of each row.
    replica_columns : list of (first_column, n_columns, duration)
        The columns of each replica and its duration (ps, or frames when the time is unknown).
    frames_per_column : float
        Frames aggregated into one column (largest over replicas).
    n_torsions : int
        Torsions in the folder (rows are an evenly spaced subset when fewer).
    time_known : bool
    """

    codes: np.ndarray
    rows: list
    row_types: list
    replica_columns: list
    frames_per_column: float
    n_torsions: int
    time_known: bool = True

    @property
    def description(self):
        n_rows = len(self.rows)
        rows = (f"all {n_rows} torsions" if n_rows == self.n_torsions
                else f"{n_rows} of {self.n_torsions} torsions (evenly spaced)")
        if self.frames_per_column <= 1:
            cols = "one column per frame"
        else:
            cols = f"each column: most frequent state of {self.frames_per_column:g} frames"
        return f"{rows}; {cols}"


def read_state_raster(folder, torsions=None, max_rows=400, max_columns=600, batch_frames=None):
    """Aggregate ``states.parquet`` for a state raster, reading it in chunks.

    Rows: the given torsions, or all of them, grouped by type (in the order of ``torsions.csv``
    within a type); more than ``max_rows`` are thinned to an evenly spaced subset. Columns: the frames
    of each replica cut into at most ``max_columns`` columns in total (in proportion to the replica
    lengths, every column the same whole number of frames, the last one of a replica possibly
    fewer); each cell holds the most frequent state of its frames (ties: the lower code).

    Returns
    -------
    StateRaster
    """
    series = ParquetSeries(folder)
    if not series.has("states"):
        raise DihedraError(f"{folder} has no states.parquet; rerun 'dihedra track'.")
    summary = read_optional_json(folder, "summary.json") or {}
    table = read_table(folder, "torsions.csv", ("torsion", "type"))
    all_labels = list(table["torsion"])
    types = dict(zip(table["torsion"], table["type"]))
    labels = list(torsions) if torsions else all_labels
    _check_columns(series, "states", labels)
    type_order = {t: k for k, t in enumerate(dict.fromkeys(types[x] for x in labels))}
    labels = sorted(labels, key=lambda x: type_order[types[x]])  # stable: grouped by type, file order within
    if len(labels) > max_rows:
        pick = np.unique(np.round(np.linspace(0, len(labels) - 1, int(max_rows))).astype(int))
        labels = [labels[k] for k in pick]
    n_states = len(summary.get("scheme", {}).get("labels", [])) or 127
    info = _replica_info(summary)
    frames = np.array([n for n, _ in info], dtype=np.int64)
    if not len(frames) or frames.sum() == 0:
        raise DihedraError(f"{folder}/summary.json lists no analysed frames.")
    per_col = max(1, int(np.ceil(frames.sum() / max(1, int(max_columns)))))  # whole frames per column
    n_cols = np.maximum(1, -(-frames // per_col)).astype(np.int64)
    col_offset = np.r_[0, np.cumsum(n_cols)[:-1]]
    mode = _column_modes(series.iter_frames("states", labels, batch_frames), labels, len(frames), n_states,
                         per_col, n_cols, col_offset)
    spans = []
    for r, (n, dt) in enumerate(info):
        spans.append((int(col_offset[r]), int(n_cols[r]), n * (dt if dt is not None else 1.0)))
    return StateRaster(codes=mode, rows=labels, row_types=[types.get(x, "") for x in labels],
                       replica_columns=spans, frames_per_column=float(per_col),
                       n_torsions=len(all_labels), time_known=all(dt is not None for _, dt in info))


def _column_modes(chunks, labels, n_replicas, n_states, per_col, n_cols, col_offset):
    """Most frequent state code of each row (torsion) in each time column, from the state chunks
    (-1 where undefined frames are the majority or the column is empty)."""
    total_cols = int(n_cols.sum())
    n_rows = len(labels)
    width = n_states + 1
    counts = np.zeros(n_rows * total_cols * width, dtype=np.int64)
    seen = np.zeros(n_replicas, dtype=np.int64)
    row_index = np.arange(n_rows, dtype=np.int64)
    for chunk in chunks:
        rep = chunk["replica"].to_numpy(np.int64)
        pos = np.empty(len(chunk), dtype=np.int64)
        for r in np.unique(rep):
            sel = np.flatnonzero(rep == r)
            pos[sel] = seen[r] + np.arange(len(sel))
            seen[r] += len(sel)
        col = col_offset[rep] + np.minimum(pos // per_col, n_cols[rep] - 1)
        codes = chunk[labels].to_numpy(np.int64) + 1  # -1 -> 0
        flat = (row_index[None, :] * total_cols + col[:, None]) * width + codes
        counts += np.bincount(flat.ravel(), minlength=counts.size)
    counts = counts.reshape(n_rows, total_cols, width)
    empty = counts.sum(axis=2) == 0
    mode = counts[:, :, 1:].argmax(axis=2).astype(np.int8)
    undefined_major = counts[:, :, 0] > counts[:, :, 1:].max(axis=2)
    mode[undefined_major | empty] = -1
    return mode


# ----------------------------------------------------------------------------------------------
# Replicas on one time axis
# ----------------------------------------------------------------------------------------------

def _replica_layout(durations, gap_fraction=0.015):
    """Start of each replica on a shared time axis (replicas one after another, a small gap)."""
    total = float(sum(durations)) or 1.0
    gap = gap_fraction * total if len(durations) > 1 else 0.0
    starts = np.r_[0.0, np.cumsum(np.asarray(durations, dtype=float) + gap)[:-1]]
    return starts, total + gap * (len(durations) - 1)


def _mark_replicas(ax, starts, durations, scale):
    """Dashed lines between replicas and a small label at the top of each one, inside the axes."""
    if len(starts) < 2:
        return
    for k, (s, d) in enumerate(zip(starts, durations)):
        if k:
            ax.axvline(s * scale, color=INK, lw=0.6, ls=(0, (2, 1.5)), zorder=3)
        ax.text((s + 0.015 * sum(durations)) * scale, 0.985, f"replica {k + 1}",
                transform=ax.get_xaxis_transform(), ha="left", va="top", fontsize=5.5, color=INK, zorder=4,
                bbox={"facecolor": "white", "edgecolor": "none", "alpha": 0.75, "pad": 0.6})


# ----------------------------------------------------------------------------------------------
# 1. Angle time series
# ----------------------------------------------------------------------------------------------

def _label_bands(ax, scheme, min_width_deg=20.0):
    """Name each state sector at the right of the axes, in its colour (instead of a legend)."""
    colours = state_colours(scheme)
    for state, lo, hi in sector_spans(scheme):
        if hi - lo >= min_width_deg:
            ax.text(1.012, (lo + hi) / 2, scheme.labels[state], transform=ax.get_yaxis_transform(),
                    ha="left", va="center", fontsize=6, color=_darker(colours[scheme.labels[state]]),
                    clip_on=False)


def plot_angle_series(series, scheme, torsion=None, ax=None, show_note=True, legend=True):
    """Figure 1: the angle of a torsion against time, with the state sectors as bands.

    Parameters
    ----------
    series : AngleSeries
        From :func:`read_angle_series` (the downsampling is stated on the figure).
    scheme : StateScheme
    torsion : str, optional
        Which torsion of ``series`` (default the first).
    ax : matplotlib Axes, optional
    show_note : bool
        State the downsampling next to the torsion label above the axes.
    legend : bool
        Name the state sectors at the right of the axes.

    Returns
    -------
    Axes
    """
    ax = _new_axes(ax, height_in=1.8)
    label = torsion or series.torsions[0]
    if label not in series.frame.columns:
        raise DihedraError(f"the angle series holds no torsion {label!r}; it has {', '.join(series.torsions)}.")
    frame = series.frame
    clock = "time_ps" if series.time_known else "frame"  # without a time step, frames
    reps = sorted(frame["replica"].unique()) if len(frame) else [0]
    durations, firsts = [], []
    for r in reps:
        t = frame.loc[frame["replica"] == r, clock].to_numpy(float)
        firsts.append(float(t.min()) if len(t) else 0.0)
        durations.append(float(t.max() - t.min()) if len(t) else 0.0)
    starts, total = _replica_layout(durations)
    scale, unit = time_scale(total) if series.time_known else (1.0, "frames")
    _shade_sectors(ax, scheme, orientation="horizontal")
    for k, r in enumerate(reps):
        part = frame[frame["replica"] == r]
        x = (part[clock].to_numpy(float) - firsts[k] + starts[k]) * scale
        ax.plot(x, part[label].to_numpy(float), ls="none", marker="o", ms=1.0, mew=0, color=INK,
                rasterized=len(x) > 3000)
    _mark_replicas(ax, starts, durations, scale)
    ax.set_xlim(0, total * scale if total > 0 else 1)
    _angle_axis(ax.set_ylabel, ax.set_yticks, ax.set_ylim)
    ax.set_xlabel(_time_label(unit, series.time_known))
    if legend:
        _label_bands(ax, scheme)
    _note(ax, f"{label} ({series.description})" if show_note else label, colour=INK)
    return ax


# ----------------------------------------------------------------------------------------------
# 2. State raster
# ----------------------------------------------------------------------------------------------

def plot_state_raster(raster, scheme, ax=None, show_note=True, legend=True):
    """Figure 2: many torsions (rows) against time (columns), coloured by state.

    Parameters
    ----------
    raster : StateRaster
        From :func:`read_state_raster` (aggregation and thinning are stated on the figure).
    scheme : StateScheme
    show_note, legend : bool
        State the aggregation; show the state colours (a row above the axes).

    Returns
    -------
    Axes
    """
    from matplotlib.colors import ListedColormap

    ax = _new_axes(ax, height_in=2.6)
    colours = state_colours(scheme)
    cmap = ListedColormap([UNDEFINED_COLOUR] + [colours[s] for s in scheme.labels])
    durations = [d for _, _, d in raster.replica_columns]
    starts, total = _replica_layout(durations)
    scale, unit = time_scale(total) if raster.time_known else (1.0, "frames")
    n_rows = len(raster.rows)
    for k, (first, n, dur) in enumerate(raster.replica_columns):
        block = raster.codes[:, first:first + n].astype(np.int16) + 1
        ax.imshow(block, cmap=cmap, vmin=0, vmax=len(scheme.labels), aspect="auto", interpolation="nearest",
                  extent=(starts[k] * scale, (starts[k] + dur) * scale, n_rows - 0.5, -0.5),
                  rasterized=True)
    _mark_replicas(ax, starts, durations, scale)
    ax.set_xlim(0, total * scale if total > 0 else 1)
    ax.set_ylim(n_rows - 0.5, -0.5)
    ax.set_xlabel(_time_label(unit, raster.time_known))
    _raster_rows(ax, raster)
    note = raster.description if show_note else None
    handles = _raster_handles(raster, scheme) if legend else []
    if handles:
        _top_legend(ax, handles, note)
    else:
        _note(ax, note)
    return ax


def _raster_rows(ax, raster):
    """Name the raster rows: torsion labels when few, type names when many, white lines between types."""
    n_rows = len(raster.rows)
    runs = []
    for k, t in enumerate(raster.row_types):
        if not runs or runs[-1][0] != t:
            runs.append([t, k, k])
        else:
            runs[-1][2] = k
    if n_rows <= 24:
        ax.set_yticks(range(n_rows))
        ax.set_yticklabels(raster.rows, fontsize=5.5 if n_rows > 12 else 6.0)
        ax.set_ylabel("torsion")
    elif len(runs) <= 16:
        ax.set_yticks([(a + b) / 2 for _, a, b in runs])
        ax.set_yticklabels([_wrap(ax, t, 40) for t, _, _ in runs], fontsize=5.5)
        ax.set_ylabel("torsion type")
    else:
        ax.set_yticks([])
        ax.set_ylabel("torsions, grouped by type")
    if len(runs) <= 16:
        for _, a, _ in runs[1:]:
            ax.axhline(a - 0.5, color="white", lw=0.8)
    ax.tick_params(axis="y", length=0)
    for side in ("left", "bottom"):
        ax.spines[side].set_visible(False)


def _raster_handles(raster, scheme):
    """Legend entries of the raster: the states of the scheme, and undefined frames when there are any."""
    from matplotlib.patches import Patch

    colours = state_colours(scheme)
    handles = [Patch(facecolor=colours[s], alpha=1.0, edgecolor="none", label=s) for s in scheme.labels]
    if (raster.codes < 0).any():
        handles.append(Patch(facecolor=UNDEFINED_COLOUR, edgecolor="none", label="undefined"))
    return handles
