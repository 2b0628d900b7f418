r"""Figure 1: the angle time series, the chunked reader behind it, and the layout of replicas on one
time axis (shared with the state raster of :mod:`~dihedra.presentation.figures.raster`).

Large data
----------
Time-series figures never load a whole trajectory: :func:`read_angle_series` streams
``angles.parquet`` in chunks and keeps every k-th frame, and says so on the figure ("every 5th
frame").
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from ...errors import DihedraError
from ...io.series import ParquetSeries
from ...io.tables import read_optional_json, read_optional_table
from .common import _angle_axis, _new_axes, _note, _replica_info, _shade_sectors, _time_label, sector_spans, time_scale
from .style import INK, _darker, state_colours

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
    types : dict
        Torsion label -> type (from ``torsions.csv``; empty when the folder has none).
    """

    frame: pd.DataFrame
    torsions: list
    stride: int
    n_frames: int
    time_known: bool = True
    types: dict = None

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
    table = read_optional_table(folder, "torsions.csv")
    types = {} if table is None else dict(zip(table["torsion"], table["type"]))
    return AngleSeries(frame=frame, torsions=list(torsions), stride=stride, n_frames=seen,
                       time_known=all(dt is not None for _, dt in info) if info else True,
                       types={t: types[t] for t in torsions if t in types})


def _check_columns(series, kind, columns):
    all_names = series.columns(kind)
    names = set(all_names)
    missing = [c for c in columns if c not in names]
    if missing:
        some = all_names[:3]
        raise DihedraError(f"no torsion {missing[0]!r} in {kind}.parquet; torsion labels look like "
                           f"{', '.join(some)} (see torsions.csv).")


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
    scheme = scheme.for_type((series.types or {}).get(label, ""))  # a set of schemes: this torsion's part
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
    _angle_axis(ax.set_ylabel, ax.set_yticks, ax.set_ylim, label)
    ax.set_xlabel(_time_label(unit, series.time_known))
    if legend:
        _label_bands(ax, scheme)
    _note(ax, f"{label} ({series.description})" if show_note else label, colour=INK)
    return ax
