r"""Figures for a paper from a results folder: one function per figure, each only reads tables.

Every plot function takes the loaded results (a :class:`~dihedra.tracking.TrackResult`) or the
tables it needs, plus ``ax=None``, draws on ``ax`` (a new figure when ``None``) and returns the axes,
so figures compose into panels. None of them recomputes a result: they read the tables that
``track``, ``profile``, ``compare``, ``kinetics`` and ``couplings`` wrote.

===  =========================================  ==============================================
#    function                                   reads
===  =========================================  ==============================================
1    :func:`plot_angle_series`                  ``angles.parquet`` (via :func:`read_angle_series`)
2    :func:`plot_state_raster`                  ``states.parquet`` (via :func:`read_state_raster`)
3    :func:`plot_profile`                       ``profiles.csv`` (+ ``comparison_profiles.csv``)
4    :func:`plot_populations`                   ``populations_by_type.csv`` (+ ``comparison.csv``)
5    :func:`plot_free_energy_map`               ``profiles_2d.csv``
6    :func:`plot_transition_diagram`            ``transitions.csv``, ``lifetimes.csv``
7    :func:`plot_lifetimes`                     ``lifetimes.csv`` (+ a dwell-time table)
8    :func:`plot_convergence`                   ``blocks.npz``, ``populations*.csv``
9    :func:`plot_couplings`                     ``couplings_vs_experiment.csv``
===  =========================================  ==============================================

:func:`figure_set` decides which figures a folder can make (a figure appears as soon as its data
exist; what a folder lacks is skipped with a one-line note) and :func:`write_figures` saves them;
``dihedra figures`` and ``dihedra report`` use both.

Colours
-------
One colour per state in every figure, a fixed mapping per built-in scheme, taken from the
colour-blind-safe palette of Okabe & Ito (2008) (distinguishable under the common forms of colour
vision deficiency, Wong, Nat. Methods 8 (2011) 441). States that play the same part share a hue
across schemes, so a figure reads the same whichever scheme made it:

=====================  ==============  ==========
state                  colour          hex
=====================  ==============  ==========
anti, ap, staggered    blue            #0072B2
gauche+, +sc           orange          #E69F00
gauche-, -sc           reddish purple  #CC79A7
eclipsed, sp           vermillion      #D55E00
+ac                    sky blue        #56B4E9
-ac                    bluish green    #009E73
=====================  ==============  ==========

A custom scheme (TOML) takes :data:`CYCLIC_PALETTE` in the order of its state labels (blue,
orange, reddish purple, bluish green, vermillion, sky blue, yellow; it repeats after seven
states). Undefined frames are light grey (:data:`UNDEFINED_COLOUR`).

Style
-----
:func:`style` is a context manager with the look of dihedra figures: 8-point DejaVu Sans (shipped
with matplotlib), open axes (no top and right spines), ticks outside, thin lines, a slate ink
colour; PDF and PostScript embed TrueType fonts (``pdf.fonttype = 42``), PNG files are 300 dpi, and
figures are made at journal widths (:data:`SINGLE_COLUMN_IN` = 3.35 in, :data:`DOUBLE_COLUMN_IN`
= 7 in) with constrained layout (never ``bbox_inches="tight"``, which would change the width).

Large data
----------
Time-series figures never load a whole trajectory: :func:`read_angle_series` streams
``angles.parquet`` in chunks and keeps every k-th frame, :func:`read_state_raster` streams
``states.parquet`` and keeps, for each torsion row and time column, the most frequent state of the
frames in that column; more torsions than rows are thinned to an evenly spaced subset. Each figure
says on its face what it shows ("every 5th frame", "400 of 12000 torsions", "each column: most
frequent state of 250 frames").

Example
-------
>>> from dihedra import track, example_path
>>> from dihedra.presentation.plots import plot_convergence, style
>>> res = track(example_path("hexane.pdb"), [example_path("hexane.xtc")], stop=200)  # doctest: +SKIP
>>> with style():                                                                      # doctest: +SKIP
...     ax = plot_convergence(res, res.torsion_set.types[0])

References
----------
M. Okabe & K. Ito, Color Universal Design (CUD): how to make figures and presentations that are
friendly to colorblind people (2008), https://jfly.uni-koeln.de/color/. B. Wong, Points of view:
color blindness, Nat. Methods 8 (2011) 441. E. L. Kaplan & P. Meier, J. Am. Stat. Assoc. 53 (1958)
457 (survival curves of dwell times).
"""

from __future__ import annotations

import contextlib
import os
import re
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from ..errors import DihedraError, one_of
from ..io.outputs import write_file
from ..io.series import ParquetSeries
from ..io.tables import read_optional_json, read_optional_table as read_optional

# ----------------------------------------------------------------------------------------------
# Colours and style
# ----------------------------------------------------------------------------------------------

#: Okabe-Ito colours (Okabe & Ito 2008) by name.
OKABE_ITO = {
    "blue": "#0072B2", "orange": "#E69F00", "reddish purple": "#CC79A7", "bluish green": "#009E73",
    "vermillion": "#D55E00", "sky blue": "#56B4E9", "yellow": "#F0E442", "black": "#000000",
}

#: Fixed state colours of the built-in schemes (label -> hex).
STATE_COLOURS = {
    "anti-gauche": {"anti": OKABE_ITO["blue"], "gauche+": OKABE_ITO["orange"],
                    "gauche-": OKABE_ITO["reddish purple"]},
    "staggered-eclipsed": {"staggered": OKABE_ITO["blue"], "eclipsed": OKABE_ITO["vermillion"]},
    "klyne-prelog": {"sp": OKABE_ITO["vermillion"], "+sc": OKABE_ITO["orange"], "+ac": OKABE_ITO["sky blue"],
                     "ap": OKABE_ITO["blue"], "-ac": OKABE_ITO["bluish green"],
                     "-sc": OKABE_ITO["reddish purple"]},
}

#: Colours of custom schemes, in the order of their state labels (repeats after seven states).
CYCLIC_PALETTE = tuple(OKABE_ITO[k] for k in ("blue", "orange", "reddish purple", "bluish green",
                                                "vermillion", "sky blue", "yellow"))

#: Colour of undefined frames (-1) in state figures.
UNDEFINED_COLOUR = "#D9D9D9"
#: Colour of unsampled cells of 2-D maps.
UNSAMPLED_COLOUR = "#E4E7EA"
#: Ink of text, axes and neutral lines.
INK = "#22303C"
#: Neutral mid grey for secondary elements.
NEUTRAL = "#7A8691"

#: Journal widths in inches.
SINGLE_COLUMN_IN = 3.35
DOUBLE_COLUMN_IN = 7.0
WIDTHS = {"single": SINGLE_COLUMN_IN, "double": DOUBLE_COLUMN_IN}
#: File formats of ``dihedra figures``.
FORMATS = ("pdf", "png", "svg")

#: Axis labels (mathtext); units after a slash, as in IUPAC quantity calculus.
ANGLE_LABEL = r"$\varphi$ / deg"
POPULATION_LABEL = "population (fraction)"
ENERGY_UNIT_LABELS = {"kj_mol": r"kJ mol$^{-1}$", "kcal_mol": r"kcal mol$^{-1}$", "kt": r"$k_\mathrm{B}T$"}

#: Alpha of the state-sector bands behind curves.
SECTOR_ALPHA = 0.16

_RC = {
    "font.family": "sans-serif",
    "font.sans-serif": ["DejaVu Sans"],
    "font.size": 8.0,
    "axes.titlesize": 8.0,
    "axes.labelsize": 8.0,
    "xtick.labelsize": 7.0,
    "ytick.labelsize": 7.0,
    "legend.fontsize": 6.5,
    "legend.frameon": False,
    "legend.handlelength": 1.4,
    "legend.borderaxespad": 0.3,
    "mathtext.default": "regular",
    "text.color": INK,
    "axes.labelcolor": INK,
    "axes.edgecolor": INK,
    "axes.linewidth": 0.6,
    "axes.spines.top": False,
    "axes.spines.right": False,
    "axes.titlelocation": "left",
    "axes.titlepad": 3.0,
    "xtick.color": INK,
    "ytick.color": INK,
    "xtick.direction": "out",
    "ytick.direction": "out",
    "xtick.major.size": 2.5,
    "ytick.major.size": 2.5,
    "xtick.major.width": 0.6,
    "ytick.major.width": 0.6,
    "xtick.minor.size": 1.5,
    "ytick.minor.size": 1.5,
    "lines.linewidth": 1.1,
    "patch.linewidth": 0.5,
    "hatch.linewidth": 0.6,
    "errorbar.capsize": 1.5,
    "figure.dpi": 100,
    "figure.facecolor": "white",
    "savefig.dpi": 300,
    "savefig.facecolor": "white",
    "pdf.fonttype": 42,
    "ps.fonttype": 42,
    "svg.fonttype": "path",
    "svg.hashsalt": "dihedra",
    "image.interpolation": "nearest",
}


def rc_params():
    """The matplotlib settings of dihedra figures (a copy)."""
    return dict(_RC)


@contextlib.contextmanager
def style():
    """Context manager: draw and save figures in the dihedra look (see the module notes)."""
    import matplotlib

    with matplotlib.rc_context(_RC):
        yield


def state_colours(scheme):
    """Colour of every state of ``scheme``: dict label -> hex colour.

    Built-in schemes (also ``staggered-eclipsed:N``) have a fixed mapping (:data:`STATE_COLOURS`);
    any other scheme takes :data:`CYCLIC_PALETTE` in the order of its labels.
    """
    labels = list(scheme.labels)
    for fixed in STATE_COLOURS.values():
        if set(labels) == set(fixed):
            return {label: fixed[label] for label in labels}
    return {label: CYCLIC_PALETTE[k % len(CYCLIC_PALETTE)] for k, label in enumerate(labels)}


def _new_axes(ax, width="single", height_in=2.4):
    if ax is not None:
        return ax
    import matplotlib.pyplot as plt

    _, ax = plt.subplots(figsize=(WIDTHS.get(width, width), height_in), layout="constrained")
    return ax


def _width_in(width):
    if isinstance(width, str):
        one_of("figure width", width, tuple(WIDTHS))
        return WIDTHS[width]
    return float(width)


def energy_columns(frame, stem="free_energy"):
    """The energy column of a table in whatever unit it was written: (column, error column, label).

    ``profile --energy-unit`` writes ``free_energy_kj_mol``, ``free_energy_kcal_mol`` or
    ``free_energy_kt``; the label is the axis unit in mathtext.
    """
    for suffix, label in ENERGY_UNIT_LABELS.items():
        col = f"{stem}_{suffix}"
        if col in frame.columns:
            err = f"{stem}_err_{suffix}"
            return col, err if err in frame.columns else None, label
    raise DihedraError(f"the table has no {stem}_kj_mol, {stem}_kcal_mol or {stem}_kt column; its columns are "
                       f"{', '.join(map(str, frame.columns))}.")


def sector_spans(scheme):
    """State arcs as ``(state_code, lo_deg, hi_deg)`` pieces within [-180, 180] (wrapping arcs split)."""
    out = []
    for state, start, end in scheme.merged_arcs():
        shift = 360.0 * np.floor((start + 180.0) / 360.0)
        lo, hi = start - shift, end - shift
        if hi <= 180.0 + 1e-9:
            out.append((state, lo, min(hi, 180.0)))
        else:
            out.append((state, lo, 180.0))
            out.append((state, -180.0, hi - 360.0))
    return out


def _shade_sectors(ax, scheme, orientation="vertical", alpha=SECTOR_ALPHA):
    colours = state_colours(scheme)
    span = ax.axvspan if orientation == "vertical" else ax.axhspan
    for state, lo, hi in sector_spans(scheme):
        span(lo, hi, color=colours[scheme.labels[state]], alpha=alpha, lw=0, zorder=0)


def _state_handles(scheme, alpha=1.0, states=None):
    from matplotlib.patches import Patch

    colours = state_colours(scheme)
    labels = [s for s in scheme.labels if states is None or s in states]
    return [Patch(facecolor=colours[s], alpha=alpha, edgecolor="none", label=s) for s in labels]


def _angle_axis(axis_setter, ticks_setter, lim_setter):
    lim_setter(-180, 180)
    ticks_setter([-180, -120, -60, 0, 60, 120, 180])
    axis_setter(ANGLE_LABEL)


def time_scale(max_ps):
    """Factor and unit that make times readable: (1, 'ps'), (1e-3, 'ns') or (1e-6, 'µs')."""
    if max_ps >= 5e6:
        return 1e-6, "µs"
    if max_ps >= 5e3:
        return 1e-3, "ns"
    return 1.0, "ps"


def _note(ax, text, pad_rows=0, colour=NEUTRAL):
    """A short statement of what the figure shows (aggregation, downsampling), as the axes title,
    wrapped to the axes width; ``pad_rows`` legend rows above the axes are left free."""
    if text:
        ax.set_title(_wrap(ax, text, 6.0), fontsize=6.0, color=colour, loc="left",
                     pad=3.0 + 10.5 * pad_rows, linespacing=1.15)


def _axes_width_pt(ax):
    """Width available to a note or legend above ``ax``: its width before the layout, less the
    room constrained layout will take for tick labels (an estimate; no drawing needed)."""
    return ax.figure.get_figwidth() * 72.0 * ax.get_position().width * 0.86


def _wrap(ax, text, fontsize):
    import textwrap

    chars = max(24, int(_axes_width_pt(ax) / (0.58 * fontsize)))
    return textwrap.fill(str(text), chars, break_on_hyphens=False)


def _top_legend(ax, handles, note=None, fontsize=6.5, max_ncol=None, note_colour=NEUTRAL):
    """A legend in rows above the axes (inside the figure width), then the note above it."""
    labels = [h.get_label() for h in handles]
    width = _axes_width_pt(ax)
    ncol = len(labels) if max_ncol is None else min(len(labels), max_ncol)
    while ncol > 1:
        n_rows = int(np.ceil(len(labels) / ncol))
        cols = [labels[k * n_rows:(k + 1) * n_rows] for k in range(ncol)]  # legends fill columns first
        need = sum((2.6 + 0.56 * max(_visible_len(x) for x in col)) * fontsize + 6 for col in cols if col)
        if need <= width:
            break
        ncol -= 1
    n_rows = int(np.ceil(len(labels) / max(ncol, 1)))
    ax.legend(handles=_row_major(handles, ncol), loc="lower left", bbox_to_anchor=(0.0, 1.02), ncol=ncol,
              borderaxespad=0.0, columnspacing=1.0, handletextpad=0.4, fontsize=fontsize)
    _note(ax, note, pad_rows=n_rows, colour=note_colour)
    return n_rows


def _row_major(handles, ncol):
    """Reorder legend handles so that a legend with ``ncol`` columns reads row by row
    (matplotlib fills columns first); short last rows are padded with blank entries."""
    from matplotlib.patches import Patch

    n_rows = int(np.ceil(len(handles) / max(ncol, 1)))
    if n_rows <= 1:
        return list(handles)
    padded = list(handles) + [Patch(facecolor="none", edgecolor="none", label="")] * (n_rows * ncol - len(handles))
    return [padded[r * ncol + c] for c in range(ncol) for r in range(n_rows)]


def _visible_len(text):
    """Approximate number of printed characters of a label with mathtext."""
    t = re.sub(r"\\[A-Za-z]+", "x", str(text))
    return len(re.sub(r"[${}^_]", "", t))


def _darker(colour, amount=0.35):
    """A colour mixed towards the ink (for text in a state colour)."""
    from matplotlib.colors import to_rgb

    c, k = np.array(to_rgb(colour)), np.array(to_rgb(INK))
    return tuple((1 - amount) * c + amount * k)


def safe_name(name):
    """A file-name-safe version of a torsion or type label."""
    return re.sub(r"[^A-Za-z0-9+.=-]+", "_", str(name)).strip("_") or "x"


# ----------------------------------------------------------------------------------------------
# Reading time series in chunks
# ----------------------------------------------------------------------------------------------

def _replica_info(summary):
    """Per replica: frames analysed, time between analysed frames in ps (None if unknown or zero)."""
    out = []
    for rep in summary.get("replicas", []):
        dt = rep.get("time_between_analysed_frames_ps")
        known = rep.get("time_step_known", dt is not None) and dt is not None and float(dt) > 0
        out.append((int(rep.get("frames_analysed", 0)), float(dt) if known else None))
    return out


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
    path = os.path.join(folder, "angles.parquet")
    if not os.path.exists(path):
        raise DihedraError(f"{folder} has no angles.parquet; rerun 'dihedra track ... --keep-angles'.")
    summary = read_optional_json(folder, "summary.json") or {}
    info = _replica_info(summary)
    n_total = sum(n for n, _ in info) or None
    _check_columns(path, torsions)
    stride = max(1, int(np.ceil((n_total or max_points) / max(1, int(max_points)))))
    kept, seen = [], 0
    for chunk in ParquetSeries(folder).iter_frames("angles", list(torsions), batch_frames):
        idx = np.arange(seen, seen + len(chunk))
        kept.append(chunk.iloc[np.flatnonzero(idx % stride == 0)])
        seen += len(chunk)
    frame = pd.concat(kept, ignore_index=True) if kept else pd.DataFrame()
    return AngleSeries(frame=frame, torsions=list(torsions), stride=stride, n_frames=seen,
                       time_known=all(dt is not None for _, dt in info) if info else True)


def _check_columns(path, columns):
    folder, name = os.path.split(path)
    all_names = ParquetSeries(folder).columns(name.split(".")[0])
    names = set(all_names)
    missing = [c for c in columns if c not in names]
    if missing:
        some = all_names[:3]
        raise DihedraError(f"no torsion {missing[0]!r} in {os.path.basename(path)}; torsion labels look like "
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
    path = os.path.join(folder, "states.parquet")
    if not os.path.exists(path):
        raise DihedraError(f"{folder} has no states.parquet; rerun 'dihedra track'.")
    summary = read_optional_json(folder, "summary.json") or {}
    table = pd.read_csv(os.path.join(folder, "torsions.csv"), keep_default_na=False)
    all_labels = list(table["torsion"])
    types = dict(zip(table["torsion"], table["type"]))
    labels = list(torsions) if torsions else all_labels
    _check_columns(path, labels)
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
    total_cols = int(n_cols.sum())
    n_rows = len(labels)
    width = n_states + 1
    counts = np.zeros(n_rows * total_cols * width, dtype=np.int64)
    seen = np.zeros(len(frames), dtype=np.int64)
    row_index = np.arange(n_rows, dtype=np.int64)
    for chunk in ParquetSeries(folder).iter_frames("states", labels, batch_frames):
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
    spans = []
    for r, (n, dt) in enumerate(info):
        spans.append((int(col_offset[r]), int(n_cols[r]), n * (dt if dt is not None else 1.0)))
    return StateRaster(codes=mode, rows=labels, row_types=[types.get(x, "") for x in labels],
                       replica_columns=spans, frames_per_column=float(per_col),
                       n_torsions=len(all_labels), time_known=all(dt is not None for _, dt in info))


# ----------------------------------------------------------------------------------------------
# 1. Angle time series
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


def _time_label(unit, known=True):
    return rf"$\mathit{{t}}$ / {unit}" if known else "frame"


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
    from matplotlib.patches import Patch

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
    # rows: torsion labels when few, type names when many
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
    handles = []
    if legend:
        handles = _state_handles(scheme)
        if (raster.codes < 0).any():
            handles.append(Patch(facecolor=UNDEFINED_COLOUR, edgecolor="none", label="undefined"))
    note = raster.description if show_note else None
    if handles:
        _top_legend(ax, handles, note)
    else:
        _note(ax, note)
    return ax


# ----------------------------------------------------------------------------------------------
# 3. Free-energy profile
# ----------------------------------------------------------------------------------------------

def select_profile(profiles, name, estimate="histogram"):
    """Rows of one profile of ``profiles.csv``: a type (pooled rows) or a torsion label."""
    torsion = profiles["torsion"].fillna("").astype(str)
    est = profiles["estimate"] == estimate if "estimate" in profiles.columns else True
    rows = profiles[est & (profiles["type"] == name) & (torsion == "")]
    if not len(rows):
        rows = profiles[est & (torsion == name)]
    if not len(rows):
        known = list(dict.fromkeys(profiles["type"]))[:4]
        raise DihedraError(f"profiles.csv has no {estimate} profile of {name!r}; give a type (e.g. "
                           f"{', '.join(known)}) or a torsion label.")
    return rows.sort_values("angle_deg")


def _runs(mask):
    """Start and stop indices of the runs of True in a boolean array."""
    m = np.r_[False, np.asarray(mask, dtype=bool), False].astype(np.int8)
    d = np.diff(m)
    return list(zip(np.flatnonzero(d == 1), np.flatnonzero(d == -1)))


def _energy_suffix(column):
    for suffix in ENERGY_UNIT_LABELS:
        if column.endswith("_" + suffix):
            return suffix
    return None


def _convert_energy(values, from_suffix, to_suffix, temperature_k):
    """Energies between the column units kj_mol, kcal_mol and kt (kt needs the temperature)."""
    from ..units import from_kj_mol, to_kj_mol

    names = {"kj_mol": "kJ/mol", "kcal_mol": "kcal/mol", "kt": "kT"}
    if from_suffix == to_suffix:
        return np.asarray(values, dtype=float)
    return from_kj_mol(to_kj_mol(values, names[from_suffix], temperature_k), names[to_suffix], temperature_k)


def _label_sectors_top(ax, scheme, min_width_deg=25.0):
    """Name each state sector at the top of the axes, in its colour (instead of a legend)."""
    colours = state_colours(scheme)
    for state, lo, hi in sector_spans(scheme):
        if hi - lo >= min_width_deg:
            ax.text((lo + hi) / 2, 0.985, scheme.labels[state], transform=ax.get_xaxis_transform(),
                    ha="center", va="top", fontsize=5.8, color=_darker(colours[scheme.labels[state]]), zorder=4,
                    bbox={"facecolor": "white", "edgecolor": "none", "alpha": 0.7, "pad": 0.5})


def _as_bool(values):
    if getattr(values, "dtype", None) == bool:
        return np.asarray(values)
    return pd.Series(values).astype(str).str.lower().isin(["true", "1", "1.0"]).to_numpy()


def plot_profile(profiles, scheme, name, estimate="histogram", scan=None, ax=None, legend=True,
                 temperature_k=None):
    """Figure 3: a free-energy profile with its error band, state sectors shaded, unsampled regions
    marked, and the static scan overlaid when the folder holds a comparison.

    Parameters
    ----------
    profiles : DataFrame
        ``profiles.csv`` (in whatever energy unit it was written).
    scheme : StateScheme
    name : str
        Torsion type (the pooled profile) or torsion label.
    estimate : {"histogram", "kernel"}
    scan : DataFrame, optional
        ``comparison_profiles.csv`` (type, angle_deg, scan_free_energy_kj_mol): the scan's
        prediction, aligned to the profile by ``dihedra compare``; drawn when it holds ``name``.
    legend : bool
        Legend above the axes, state names at the top of their sectors.
    temperature_k : float, optional
        Needed only to draw a scan (kJ/mol) on a profile written in kT.

    Returns
    -------
    Axes
    """
    from matplotlib.lines import Line2D
    from matplotlib.patches import Patch
    from matplotlib.ticker import MaxNLocator

    ax = _new_axes(ax)
    rows = select_profile(profiles, name, estimate)
    col, err_col, unit = energy_columns(rows)
    x = rows["angle_deg"].to_numpy(float)
    sampled = _as_bool(rows["sampled"])
    f = np.where(sampled, rows[col].to_numpy(float), np.nan)
    err = np.nan_to_num(rows[err_col].to_numpy(float)) if err_col else np.zeros_like(f)
    _shade_sectors(ax, scheme)
    width = float(np.median(np.diff(x))) if len(x) > 1 else 360.0
    step = "mid" if estimate == "histogram" else None
    ax.fill_between(x, f - err, f + err, step=step, color=NEUTRAL, alpha=0.4, lw=0, zorder=2)
    if step:
        ax.step(x, f, where="mid", color=INK, lw=1.0, zorder=3)
    else:
        ax.plot(x, f, color=INK, lw=1.0, zorder=3)
    handles = [Line2D([], [], color=INK, lw=1.0, label="sampled"),
               Patch(facecolor=NEUTRAL, alpha=0.4, edgecolor="none", label="± 1 s.e.")]
    top = float(np.nanmax(f + err)) if np.isfinite(f).any() else 1.0
    if scan is not None and len(scan) and "type" in scan.columns:
        srows = scan[scan["type"] == name].sort_values("angle_deg")
        scol = [c for c in srows.columns if c.startswith("scan_free_energy_")]
        if len(srows) and scol:
            to = _energy_suffix(col)
            frm = _energy_suffix(scol[0])
            if frm == to or "kt" not in (frm, to) or temperature_k is not None:
                e = _convert_energy(srows[scol[0]].to_numpy(float), frm, to, temperature_k)
                ax.plot(srows["angle_deg"], e, color="black", ls=(0, (3.0, 1.4)), lw=1.1, zorder=3)
                handles.append(Line2D([], [], color="black", ls=(0, (3.0, 1.4)), lw=1.1,
                                      label="scan (aligned)"))
                near = np.interp(srows["angle_deg"].to_numpy(float), x, np.isfinite(f).astype(float), period=360.0)
                if (near > 0.5).any():  # the scan where the profile is sampled sets the top
                    top = max(top, float(np.nanmax(e[near > 0.5])))
    runs = _runs(~sampled)
    for a, b in runs:
        ax.axvspan(x[a] - width / 2, x[b - 1] + width / 2, facecolor="white", edgecolor=NEUTRAL,
                   hatch="/////", lw=0, zorder=1)
    if runs:
        handles.append(Patch(facecolor="white", edgecolor=NEUTRAL, hatch="/////", lw=0, label="unsampled"))
    _angle_axis(ax.set_xlabel, ax.set_xticks, ax.set_xlim)
    bottom = min(0.0, float(np.nanmin(f - err))) if np.isfinite(f).any() else 0.0
    ax.set_ylim(bottom, top * 1.15 + 0.3)
    ax.yaxis.set_major_locator(MaxNLocator(nbins=5, steps=[1, 2, 2.5, 5, 10]))
    ax.set_ylabel(rf"$\mathit{{F}}$ / {unit}")
    if legend:
        _label_sectors_top(ax, scheme)
        _top_legend(ax, handles, name, note_colour=INK)
    else:
        _note(ax, name, colour=INK)
    return ax


# ----------------------------------------------------------------------------------------------
# 4. Population bars
# ----------------------------------------------------------------------------------------------

SOURCE_STYLES = {
    "sampled": {"fill": True, "hatch": None, "label": "sampled"},
    "scan": {"fill": False, "hatch": "//////", "label": "predicted from the scan"},
    "experiment": {"fill": False, "hatch": "....", "label": "experiment / reference"},
}


def comparison_populations(comparison):
    """Predicted (scan) and reference state populations from ``comparison.csv`` as tidy tables.

    Returns ``(predicted, reference)``: DataFrames with type, state, population, population_err
    (either may be empty). Reads the columns ``predicted_population_<state>`` and
    ``reference_population_<state>`` / ``reference_population_err_<state>``.
    """
    cols = ["type", "state", "population", "population_err"]
    pred, ref = [], []
    for row in ([] if comparison is None else comparison.to_dict("records")):
        for key, value in row.items():
            key = str(key)
            if pd.isna(value):
                continue
            m = re.fullmatch(r"predicted_population_(.+)", key)
            if m and not key.startswith("predicted_population_err_"):
                err = row.get(f"predicted_population_err_{m.group(1)}", np.nan)
                pred.append({"type": row["type"], "state": m.group(1), "population": float(value),
                             "population_err": float(err) if pd.notna(err) else np.nan})
            m = re.fullmatch(r"reference_population_(.+)", key)
            if m and not key.startswith("reference_population_err_"):
                err = row.get(f"reference_population_err_{m.group(1)}", np.nan)
                ref.append({"type": row["type"], "state": m.group(1), "population": float(value),
                            "population_err": float(err) if pd.notna(err) else np.nan})
    return pd.DataFrame(pred, columns=cols), pd.DataFrame(ref, columns=cols)


def plot_populations(populations, scheme, types=None, predicted=None, experiment=None, ax=None, legend=True):
    """Figure 4: population bars with error bars per type and state: sampled, predicted from the
    scan, and experiment (or reference) where present.

    Parameters
    ----------
    populations : DataFrame
        ``populations_by_type.csv`` (type, state, population, population_err).
    scheme : StateScheme
    types : list of str, optional
        Types to show (default all, in table order).
    predicted, experiment : DataFrame, optional
        type, state, population[, population_err] (see :func:`comparison_populations`). Sampled
        bars are filled, scan predictions hatched, experiment dotted, all in the state colour.

    Returns
    -------
    Axes
    """
    from matplotlib.patches import Patch

    ax = _new_axes(ax)
    colours = state_colours(scheme)
    order = list(dict.fromkeys(populations["type"]))
    types = [t for t in (types or order) if t in order]
    sources = [("sampled", populations)]
    for key, table in (("scan", predicted), ("experiment", experiment)):
        if table is not None and len(table) and set(types) & set(table["type"]):
            sources.append((key, table))
    keyed = {k: t.set_index(["type", "state"]) for k, t in sources}
    bar_w = 0.8 / len(sources)
    ticks, ticklabels, centres = [], [], []
    x = 0.0
    for t in types:
        states = [s for s in scheme.labels if (t, s) in keyed["sampled"].index]
        start = x
        for s in states:
            for j, (key, _) in enumerate(sources):
                tab = keyed[key]
                if (t, s) not in tab.index:
                    continue
                row = tab.loc[(t, s)]
                p = float(row["population"])
                e = float(row["population_err"]) if pd.notna(row.get("population_err", np.nan)) else np.nan
                st = SOURCE_STYLES[key]
                xpos = x - 0.4 + bar_w * (j + 0.5)
                ax.bar(xpos, p, width=bar_w * 0.9, color=colours[s] if st["fill"] else "white",
                       edgecolor=colours[s], hatch=st["hatch"], lw=0.8, zorder=2)
                if np.isfinite(e):
                    ax.errorbar(xpos, p, yerr=e, fmt="none", ecolor=INK, elinewidth=0.7, capsize=1.5, zorder=3)
            ticks.append(x)
            ticklabels.append(s)
            x += 1.0
        centres.append(((start + x - 1.0) / 2, t, len(states)))
        x += 0.7
    ax.set_xticks(ticks)
    many = len(ticks) > (8 if _axes_width_pt(ax) < 300 else 16)
    ax.set_xticklabels(ticklabels, rotation=90 if many else 0, fontsize=6.0)
    ax.tick_params(axis="x", length=0)
    ax.set_xlim(-0.6, x - 1.7 + 0.6 if x > 0 else 1)
    ax.set_ylim(0, 1.0)
    ax.set_ylabel(POPULATION_LABEL)
    ax.yaxis.grid(True, color="#E3E7EA", lw=0.5, zorder=0)
    ax.set_axisbelow(True)
    sec = ax.secondary_xaxis("bottom")
    import textwrap
    span = max(x - 1.7 + 1.2, 1.0)
    sec.set_xticks([c for c, _, _ in centres])
    sec.set_xticklabels([textwrap.fill(t, max(8, int(_axes_width_pt(ax) * (n + 0.7) / span / 3.4)),
                                       break_on_hyphens=False) for _, t, n in centres], fontsize=6.0)
    sec.tick_params(axis="x", length=0, pad=(32 if many else 11))
    sec.spines["bottom"].set_visible(False)
    if legend and len(sources) > 1:
        handles = [Patch(facecolor=NEUTRAL if SOURCE_STYLES[k]["fill"] else "white", edgecolor=NEUTRAL,
                         hatch=SOURCE_STYLES[k]["hatch"], label=SOURCE_STYLES[k]["label"]) for k, _ in sources]
        _top_legend(ax, handles)
    return ax


# ----------------------------------------------------------------------------------------------
# 5. 2-D free-energy map
# ----------------------------------------------------------------------------------------------

def _nice_step(span, max_levels=10):
    for step in (0.5, 1.0, 2.0, 2.5, 5.0, 10.0, 20.0, 25.0, 50.0):
        if span / step <= max_levels:
            return step
    return span / max_levels


def plot_free_energy_map(profiles_2d, pair=None, ax=None, level_step=None, max_level=None, colorbar=True):
    """Figure 5: the 2-D free-energy map of a torsion pair, periodic axes, contours in kJ/mol.

    Parameters
    ----------
    profiles_2d : DataFrame
        ``profiles_2d.csv``.
    pair : (str, str), optional
        ``(torsion_a, torsion_b)`` as written there (default the first pair).
    level_step : float, optional
        Spacing of the contour levels in the table's energy unit (default: 0.5, 1, 2, 2.5, 5 ...,
        at most ten levels up to ``max_level``).
    max_level : float, optional
        Highest contour and top of the colour scale (default the highest sampled value, at most 30).

    Returns
    -------
    Axes
    """
    from matplotlib import colormaps

    ax = _new_axes(ax, height_in=2.9)
    pairs = list(dict.fromkeys(zip(profiles_2d["torsion_a"], profiles_2d["torsion_b"])))
    if pair is None:
        pair = pairs[0]
    pair = tuple(pair)
    if pair not in pairs:
        raise DihedraError(f"profiles_2d.csv has no pair {pair}; it has "
                           f"{', '.join('/'.join(p) for p in pairs)}.")
    rows = profiles_2d[(profiles_2d["torsion_a"] == pair[0]) & (profiles_2d["torsion_b"] == pair[1])]
    col, _, unit = energy_columns(rows)
    xa = np.sort(rows["angle_a_deg"].unique())
    xb = np.sort(rows["angle_b_deg"].unique())
    grid = rows.pivot_table(index="angle_b_deg", columns="angle_a_deg", values=col, dropna=False)
    grid = grid.reindex(index=xb, columns=xa)
    sampled = rows.pivot_table(index="angle_b_deg", columns="angle_a_deg", values="sampled", aggfunc="max",
                               dropna=False).reindex(index=xb, columns=xa)
    f = grid.to_numpy(float)
    f = np.where(sampled.fillna(False).to_numpy(bool), f, np.nan)
    fmax = float(np.nanmax(f)) if np.isfinite(f).any() else 1.0
    top = float(max_level) if max_level is not None else min(fmax, 30.0)
    step = float(level_step) if level_step else _nice_step(top)
    levels = np.arange(0.0, top + 1e-9, step)
    wa, wb = (xa[1] - xa[0]) if len(xa) > 1 else 360.0, (xb[1] - xb[0]) if len(xb) > 1 else 360.0
    ea = np.r_[xa - wa / 2, xa[-1] + wa / 2]
    eb = np.r_[xb - wb / 2, xb[-1] + wb / 2]
    cmap = colormaps["cividis"].with_extremes(bad=UNSAMPLED_COLOUR)
    mesh = ax.pcolormesh(ea, eb, np.ma.masked_invalid(f), cmap=cmap, vmin=0, vmax=top, shading="flat",
                         rasterized=True)
    # periodic contours: pad one cell on every side by wrapping, so lines run through the edges
    cs = None
    if len(levels) > 1 and np.isfinite(f).sum() > 3:
        fp = np.pad(f, 1, mode="wrap")
        xp = np.r_[xa[0] - wa, xa, xa[-1] + wa]
        yp = np.r_[xb[0] - wb, xb, xb[-1] + wb]
        cs = ax.contour(xp, yp, np.ma.masked_invalid(fp), levels=levels[1:], colors="white", linewidths=0.45,
                        alpha=0.85)
    ax.set_xlim(-180, 180)
    ax.set_ylim(-180, 180)
    ticks = [-180, -90, 0, 90, 180]
    ax.set_xticks(ticks)
    ax.set_yticks(ticks)
    short = max(len(pair[0]), len(pair[1])) <= 24
    ax.set_xlabel(rf"$\varphi$({pair[0]}) / deg" if short else r"$\varphi_1$ / deg")
    ax.set_ylabel(rf"$\varphi$({pair[1]}) / deg" if short else r"$\varphi_2$ / deg")
    for side in ("top", "right"):
        ax.spines[side].set_visible(True)
    if colorbar:
        cb = ax.figure.colorbar(mesh, ax=ax, fraction=0.06, pad=0.03, aspect=22)
        cb.set_label(rf"$\mathit{{F}}$ / {unit}")
        cb.outline.set_linewidth(0.5)
        if cs is not None:
            cb.add_lines(cs)
        cb.set_ticks(levels[::max(1, int(np.ceil(len(levels) / 6)))])
    unit_text = {"kj_mol": "kJ/mol", "kcal_mol": "kcal/mol", "kt": "kT"}[_energy_suffix(col)]
    names = "" if short else f"$\\varphi_1$: {pair[0]}; $\\varphi_2$: {pair[1]}. "
    _note(ax, f"{names}Contours every {step:g} {unit_text}; light grey: unsampled")
    return ax


# ----------------------------------------------------------------------------------------------
# 6. Transition diagram
# ----------------------------------------------------------------------------------------------

def plot_transition_diagram(transitions, lifetimes, name, level="type", weight="rate", scheme=None, ax=None,
                            max_states=8, min_population=0.002):
    """Figure 6: states as nodes sized by population, arrows weighted by rates (or counts).

    Parameters
    ----------
    transitions, lifetimes : DataFrame
        ``transitions.csv`` and ``lifetimes.csv`` of ``dihedra kinetics``.
    name : str
        The torsion label, type or conformer type (column ``name``).
    level : {"type", "torsion", "conformer"}
    weight : {"rate", "count"}
        Arrow widths in proportion to the rate constant ``rate_per_ps`` or to ``count``; each
        arrow is labelled with its value.
    scheme : StateScheme, optional
        For the state colours (states outside the scheme, such as conformers, are grey).
    max_states : int
        At most this many (most populated) states are drawn; the rest is stated on the figure.
    min_population : float
        States below this population (``population_counted``) are left out.

    Returns
    -------
    Axes
    """
    from matplotlib.patches import Circle, FancyArrowPatch

    one_of("arrow weight", weight, ("rate", "count"))
    ax = _new_axes(ax, height_in=2.6)
    lt = lifetimes[(lifetimes["level"] == level) & (lifetimes["name"] == name)]
    tr = transitions[(transitions["level"] == level) & (transitions["name"] == name)]
    if not len(lt):
        raise DihedraError(f"lifetimes.csv has no {level} {name!r}.")
    if "population_counted" in lt.columns:
        pops = dict(zip(lt["state"], lt["population_counted"].astype(float)))
    else:
        pops = {s: 1.0 / len(lt) for s in lt["state"]}
    states = [s for s in sorted(pops, key=lambda s: -pops[s]) if pops[s] >= min_population][:max_states]
    if scheme is not None and set(states) <= set(scheme.labels):
        states = [s for s in scheme.labels if s in states]
    left_out = len(pops) - len(states)
    colours = state_colours(scheme) if scheme is not None else {}
    n = len(states)
    angles = np.pi / 2 - 2 * np.pi * np.arange(n) / max(n, 1)
    pos = {s: (np.array([np.cos(a), np.sin(a)]) if n > 1 else np.zeros(2)) for s, a in zip(states, angles)}
    pmax = max((pops[s] for s in states), default=1.0)
    r_min, r_max = 0.08, (0.30 if n > 4 else 0.36)
    radius = {s: r_min + (r_max - r_min) * np.sqrt(pops[s] / pmax) for s in states}
    wcol = "rate_per_ps" if weight == "rate" else "count"
    tr = tr[tr["from_state"].isin(states) & tr["to_state"].isin(states) & (tr["count"] > 0)]
    wmax = float(tr[wcol].max()) if len(tr) else 1.0
    bend = 0.3
    for row in tr.itertuples(index=False):
        a, b = pos[row.from_state], pos[row.to_state]
        d = b - a
        dist = float(np.linalg.norm(d))
        if dist == 0:
            continue
        u = d / dist
        p0 = a + u * (radius[row.from_state] + 0.04)
        p1 = b - u * (radius[row.to_state] + 0.04)
        w = float(getattr(row, wcol))
        lw = 0.5 + 2.6 * w / wmax if wmax > 0 else 0.5
        ax.add_patch(FancyArrowPatch(
            p0, p1, connectionstyle=f"arc3,rad={bend}", lw=lw, color=INK, alpha=0.85, zorder=2,
            arrowstyle=f"-|>,head_length={2.2 + 0.8 * lw:.1f},head_width={1.3 + 0.5 * lw:.1f}",
            shrinkA=0, shrinkB=0))
        dd = p1 - p0
        mid = (p0 + p1) / 2 + 0.5 * bend * np.array([dd[1], -dd[0]])
        ax.text(mid[0], mid[1], f"{w:.2g}" if weight == "rate" else f"{int(w)}", fontsize=5.5, ha="center",
                va="center", color=INK, zorder=4,
                bbox={"facecolor": "white", "edgecolor": "none", "pad": 0.3, "alpha": 0.9})
    xs, ys = [], []
    for s in states:
        c = colours.get(s, "#BFC6CC")
        ax.add_patch(Circle(pos[s], radius[s], facecolor=c, edgecolor=INK, lw=0.6, zorder=3))
        outward = pos[s] / (np.linalg.norm(pos[s]) or 1.0) if n > 1 else np.array([0.0, 1.0])
        lp = pos[s] + outward * (radius[s] + 0.07)
        ha = "center" if abs(outward[0]) < 0.3 else ("left" if outward[0] > 0 else "right")
        va = "center" if abs(outward[1]) < 0.3 else ("bottom" if outward[1] > 0 else "top")
        ax.text(lp[0], lp[1], f"{s}\n{pops[s]:.2f}", fontsize=6, ha=ha, va=va, color=INK, zorder=4,
                linespacing=1.05, multialignment="center")
        xs += [pos[s][0] - radius[s], pos[s][0] + radius[s]]
        ys += [pos[s][1] - radius[s], pos[s][1] + radius[s]]
    ax.set_aspect("equal")
    if xs:
        ax.set_xlim(min(xs) - 0.55, max(xs) + 0.55)
        ax.set_ylim(min(ys) - 0.3, max(ys) + 0.3)
    ax.axis("off")
    what = r"rate constant $\mathit{k}$ / ps$^{-1}$" if weight == "rate" else "transition count"
    note = f"{name}. Arrows: {what}; nodes: population (area)"
    if left_out:
        note += f"; {left_out} rarer state(s) not drawn"
    _note(ax, note)
    return ax


# ----------------------------------------------------------------------------------------------
# 7. Lifetimes
# ----------------------------------------------------------------------------------------------

def survival_curve(dwell_ps, n_complete, n_censored):
    """Kaplan-Meier survival S(t) of dwell times with right-censoring (a display transform).

    Parameters
    ----------
    dwell_ps : array
        Dwell times of the segments (one entry per distinct length).
    n_complete, n_censored : array
        Complete and censored segments of each length.

    Returns
    -------
    (t, S) with S(t) just after each t (ties: events before censorings).
    """
    d = np.asarray(dwell_ps, dtype=float)
    e = np.asarray(n_complete, dtype=float)
    c = np.asarray(n_censored, dtype=float)
    order = np.argsort(d)
    d, e, c = d[order], e[order], c[order]
    at_risk = np.cumsum((e + c)[::-1])[::-1]
    with np.errstate(invalid="ignore", divide="ignore"):
        h = np.where(at_risk > 0, e / at_risk, 0.0)
    return d, np.cumprod(1.0 - h)


def plot_lifetimes(lifetimes, name, level="type", scheme=None, dwell_times=None, ax=None, legend=True):
    """Figure 7: dwell times (lifetimes) of each state on a log axis, with the exponential expected
    from the rates.

    The dashed line of each state is ``S(t) = exp(-t / tau)``, the fraction of visits still in the
    state after ``t`` if leaving it were memoryless at the total exit rate of the Markov rates,
    ``tau = mean_from_rates_ps``. With a dwell-time table (``dwell_times``: level, name, state,
    dwell_ps, n_complete, n_censored) the observed Kaplan-Meier survival is drawn as steps.
    Without one, the observed dwell-time summaries of ``lifetimes.csv`` are placed where an
    exponential has them: the median at S = 1/2 and the mean (with its 95 % bootstrap interval) at
    S = 1/e; on the dashed line means memoryless, left of it means faster first exits.

    Returns
    -------
    Axes
    """
    from matplotlib.lines import Line2D

    ax = _new_axes(ax)
    lt = lifetimes[(lifetimes["level"] == level) & (lifetimes["name"] == name)]
    if not len(lt):
        raise DihedraError(f"lifetimes.csv has no {level} {name!r}.")
    colours = state_colours(scheme) if scheme is not None else {}
    order = [s for s in (scheme.labels if scheme is not None else []) if s in set(lt["state"])]
    order += [s for s in dict.fromkeys(lt["state"]) if s not in order]
    dwell = None
    if dwell_times is not None and len(dwell_times):
        dwell = dwell_times[(dwell_times["level"] == level) & (dwell_times["name"] == name)]
        dwell = dwell if len(dwell) else None
    dashed = (0, (3.5, 1.5))
    handles, tmax = [], 0.0
    for k, s in enumerate(order):
        row = lt[lt["state"] == s].iloc[0]
        c = colours.get(s, CYCLIC_PALETTE[k % len(CYCLIC_PALETTE)])
        tau = float(row.get("mean_from_rates_ps", np.nan))
        ends = [3.0 * tau] if np.isfinite(tau) else []
        if dwell is not None and len(dwell[dwell["state"] == s]):
            part = dwell[dwell["state"] == s]
            t, surv = survival_curve(part["dwell_ps"], part["n_complete"], part["n_censored"])
            ok = surv > 0
            ax.step(np.r_[0.0, t[ok]], np.r_[1.0, surv[ok]], where="post", color=c, lw=1.0, zorder=3)
            ends.append(float(t[surv >= 0.02].max()) if (surv >= 0.02).any() else float(t.max()))
        else:
            mean, med = float(row.get("mean_ps", np.nan)), float(row.get("median_ps", np.nan))
            lo, hi = float(row.get("ci_low_ps", np.nan)), float(row.get("ci_high_ps", np.nan))
            if np.isfinite(mean):
                xerr = [[max(mean - lo, 0.0)], [max(hi - mean, 0.0)]] if np.isfinite(lo) and np.isfinite(hi) \
                    else None
                ax.errorbar([mean], [np.exp(-1.0)], xerr=xerr, fmt="o", ms=3.4, color=c, mec=INK, mew=0.4,
                            elinewidth=0.9, capsize=1.6, zorder=4)
                ends.append(hi if np.isfinite(hi) else mean)
            if np.isfinite(med):
                ax.plot([med], [0.5], marker="s", ms=3.2, color="white", mec=c, mew=1.1, ls="none", zorder=4)
                ends.append(med)
        if np.isfinite(tau) and tau > 0:
            end = max(ends)
            tt = np.linspace(0, end * 1.05, 200)
            ax.plot(tt, np.exp(-tt / tau), color=c, lw=0.9, ls=dashed, zorder=2)
        tmax = max([tmax] + ends)
        handles.append(Line2D([], [], color=c, lw=0.9, ls=dashed,
                              label=rf"{s}, $\tau$ = {tau:.3g} ps" if np.isfinite(tau) else s))
    if dwell is not None:
        handles.append(Line2D([], [], color=NEUTRAL, lw=1.0, label="observed (Kaplan-Meier)"))
    else:
        handles.append(Line2D([], [], color=NEUTRAL, marker="o", ms=3.4, mec=INK, mew=0.4, ls="none",
                              label="observed mean, 95% CI (at 1/e)"))
        handles.append(Line2D([], [], color="white", marker="s", ms=3.2, mec=NEUTRAL, mew=1.1, ls="none",
                              label="observed median (at 1/2)"))
    from matplotlib.ticker import FixedLocator, FuncFormatter, NullLocator

    ax.set_yscale("log")
    ax.set_ylim(0.02, 1.2)
    ax.yaxis.set_major_locator(FixedLocator([0.02, 0.05, 0.1, 0.2, 0.5, 1.0]))
    ax.yaxis.set_major_formatter(FuncFormatter(lambda v, _: f"{v:g}"))
    ax.yaxis.set_minor_locator(NullLocator())
    ax.set_xlim(0, tmax * 1.05 if tmax > 0 else 1)
    ax.set_xlabel(r"dwell time $\mathit{t}$ / ps")
    ax.set_ylabel(r"fraction still in state, $\mathit{S}(\mathit{t})$")
    note = rf"{name}. Dashed: exp($-t/\tau$), $\tau$ = 1 / (total exit rate)"
    if legend:
        ax.legend(handles=handles, loc="upper right", fontsize=5.8, handlelength=2.0, borderaxespad=0.2)
    _note(ax, note)
    return ax


# ----------------------------------------------------------------------------------------------
# 8. Convergence
# ----------------------------------------------------------------------------------------------

REPLICA_STYLES = ("-", (0, (4, 1.5)), (0, (1, 1.2)), (0, (4, 1.2, 1, 1.2)))


def plot_convergence(result, name, ax=None, legend=True):
    """Figure 8: each state population against simulation time, per replica, with the error band.

    Lines: the running population of each state (cumulative over the blocks of the pass, so the
    value at time t uses the frames up to t) for each replica; band: the final pooled population
    with its standard error (``populations_by_type.csv``, or ``populations.csv`` for a torsion).

    Parameters
    ----------
    result : TrackResult
        From :func:`dihedra.io.resultsdir.load_results`.
    name : str
        Torsion type or torsion label.

    Returns
    -------
    Axes
    """
    from matplotlib.lines import Line2D

    ax = _new_axes(ax)
    types = list(result.torsion_set.types)
    labels = list(result.torsion_set.labels)
    if name in types:
        cols = [k for k, t in enumerate(types) if t == name]
        final = result.populations_by_type[result.populations_by_type["type"] == name]
    elif name in labels:
        cols = [labels.index(name)]
        final = result.populations[result.populations["torsion"] == name]
    else:
        raise DihedraError(f"{name!r} is neither a torsion type nor a torsion label of this folder.")
    blocks = result.blocks
    counts = np.asarray(blocks["state_counts"], dtype=float)[:, cols, :].sum(axis=1)
    rep = np.asarray(blocks["block_replica"])
    nframes = np.asarray(blocks["block_frames"], dtype=float)
    info = _replica_info(result.summary)
    time_known = all(dt is not None for _, dt in info)
    tmax = max((n * (dt or 1.0) for n, dt in info), default=1.0)
    scale, unit = time_scale(tmax) if time_known else (1.0, "frames")
    colours = state_colours(result.scheme)
    reps = list(dict.fromkeys(rep.tolist()))
    for j, r in enumerate(reps):
        sel = rep == r
        c = np.cumsum(counts[sel], axis=0)
        tot = c.sum(axis=1)
        dt = info[r][1] if r < len(info) and info[r][1] is not None else 1.0
        t = np.cumsum(nframes[sel]) * dt * scale
        ok = tot > 0
        for k, s in enumerate(result.scheme.labels):
            ax.plot(t[ok], c[ok, k] / tot[ok], color=colours[s], lw=0.9,
                    ls=REPLICA_STYLES[j % len(REPLICA_STYLES)], zorder=3)
    for row in final.itertuples(index=False):
        c = colours.get(row.state, NEUTRAL)
        p, e = float(row.population), float(row.population_err)
        if np.isfinite(e):
            ax.axhspan(p - e, p + e, color=c, alpha=0.25, lw=0, zorder=1)
        ax.axhline(p, color=c, lw=0.5, alpha=0.9, zorder=1)
    ax.set_xlim(0, tmax * scale)
    ax.set_ylim(0, 1)
    ax.set_xlabel(_time_label(unit, time_known))
    ax.set_ylabel("running population")
    note = f"{name}. Lines: running population" + (" per replica" if len(reps) > 1 else "") + \
        "; bands: final population ± 1 s.e."
    if legend:
        handles = [Line2D([], [], color=colours[s], lw=1.2, label=s) for s in result.scheme.labels]
        if len(reps) > 1:
            handles += [Line2D([], [], color=INK, lw=0.9, ls=REPLICA_STYLES[j % len(REPLICA_STYLES)],
                               label=f"replica {r + 1}") for j, r in enumerate(reps[:len(REPLICA_STYLES)])]
        _top_legend(ax, handles, note)
    else:
        _note(ax, note)
    return ax


# ----------------------------------------------------------------------------------------------
# 9. Couplings
# ----------------------------------------------------------------------------------------------

def _first_column(frame, candidates):
    for c in candidates:
        if c in frame.columns:
            return c
    return None


RELATION_MARKERS = ("o", "s", "D", "^", "v", "P")


def plot_couplings(couplings, ax=None, label_outliers=True, legend=True):
    """Figure 9: predicted against experimental 3J couplings with error bars and the identity line.

    Parameters
    ----------
    couplings : DataFrame
        ``couplings_vs_experiment.csv`` of ``dihedra couplings --experimental``: ``j_hz`` (predicted,
        with the statistical error ``j_err_hz`` and the relation's own spread ``j_systematic_hz``),
        ``j_exp_hz`` with ``j_exp_err_hz``, ``outlier``, ``label`` and ``relation``. Rows without a
        prediction (unmatched labels) are left out.

    Dark error bars are statistical (and experimental) errors; the pale, wider vertical bars add
    the relation's systematic spread. Outliers are drawn in vermillion and named.

    Returns
    -------
    Axes
    """
    ax = _new_axes(ax, height_in=3.0)
    pred = _first_column(couplings, ["j_hz", "predicted_j_hz"])
    exp = _first_column(couplings, ["j_exp_hz", "experimental_j_hz"])
    if pred is None or exp is None:
        raise DihedraError("the couplings table needs a predicted (j_hz) and an experimental (j_exp_hz) "
                           f"column; it has {', '.join(map(str, couplings.columns))}.")
    data = couplings[np.isfinite(pd.to_numeric(couplings[pred], errors="coerce"))
                     & np.isfinite(pd.to_numeric(couplings[exp], errors="coerce"))]
    if not len(data):
        raise DihedraError("no experimental coupling matched a predicted one; nothing to plot.")

    def col(name, fallback=0.0):
        c = _first_column(data, [name])
        return data[c].to_numpy(float) if c else np.full(len(data), fallback)

    x, y = data[exp].to_numpy(float), data[pred].to_numpy(float)
    xe, ye = np.nan_to_num(col("j_exp_err_hz")), np.nan_to_num(col("j_err_hz"))
    ys = np.sqrt(ye ** 2 + np.nan_to_num(col("j_systematic_hz")) ** 2)
    out = _as_bool(data["outlier"]) if "outlier" in data.columns else np.zeros(len(data), bool)
    rel = data["relation"].astype(str).to_numpy() if "relation" in data.columns else np.full(len(data), "")
    lo = float(min(np.min(x - xe), np.min(y - ys), 0.0)) - 0.5
    hi = float(max(np.max(x + xe), np.max(y + ys))) + 0.8
    ax.plot([lo, hi], [lo, hi], color=NEUTRAL, lw=0.8, ls=(0, (3, 1.6)), zorder=1, label="identity")
    ax.errorbar(x, y, yerr=ys, fmt="none", ecolor="#C9D3DB", elinewidth=2.2, capsize=0, zorder=1.5)
    for k, r in enumerate(dict.fromkeys(rel)):
        for mask, colour in ((~out & (rel == r), OKABE_ITO["blue"]), (out & (rel == r), OKABE_ITO["vermillion"])):
            if mask.any():
                ax.errorbar(x[mask], y[mask], xerr=xe[mask], yerr=ye[mask], fmt=RELATION_MARKERS[k % 6], ms=3.4,
                            color=colour, ecolor=INK, mec=INK, mew=0.4, elinewidth=0.7, capsize=1.2, zorder=3,
                            label=(r or "couplings") if colour == OKABE_ITO["blue"] else f"{r} outliers".strip())
    label_col = _first_column(data, ["label", "torsion"])
    if label_outliers and label_col and out.any():
        for xi, yi, name in zip(x[out], y[out], data.loc[out, label_col]):
            ax.annotate(str(name), (xi, yi), xytext=(3, -7), textcoords="offset points", fontsize=5.5, color=INK)
    ax.set_xlim(lo, hi)
    ax.set_ylim(lo, hi)
    ax.set_aspect("equal")
    ax.set_xlabel(r"experimental $^3\mathit{J}$ / Hz")
    ax.set_ylabel(r"predicted $^3\mathit{J}$ / Hz")
    if legend:
        ax.legend(loc="upper left", fontsize=5.8)
    _note(ax, "dark bars: statistical and experimental errors; pale bars: with the relation's own spread")
    return ax


# ----------------------------------------------------------------------------------------------
# The figure set of a results folder
# ----------------------------------------------------------------------------------------------

@dataclass
class FigureItem:
    """One figure of the set: a file stem, a caption, and the matplotlib figure."""

    name: str
    caption: str
    figure: object
    kind: str = ""


@dataclass
class FigureSet:
    """The figures a folder can make, and a one-line note for each one it cannot."""

    items: list = field(default_factory=list)
    skipped: list = field(default_factory=list)


def _figure(width_in, height_in):
    from matplotlib.figure import Figure

    return Figure(figsize=(width_in, height_in), layout="constrained")


def _pick(values, chosen, limit):
    """``chosen`` items that exist in ``values`` (all when ``chosen`` is None), at most ``limit``."""
    values = list(dict.fromkeys(values))
    if chosen:
        return [v for v in values if v in set(chosen)]
    return values[:limit]


def figure_set(folder, width="single", torsions=None, types=None, max_types=4, max_series=3, log=None):
    """Build every figure the results folder has data for.

    Parameters
    ----------
    folder : str
        A results folder (``dihedra track`` plus whatever later steps wrote).
    width : {"single", "double"}
        Journal width of the figures (3.35 or 7 inches); the square ones (2-D maps, couplings)
        are always one column wide.
    torsions : list of str, optional
        Torsion labels for the time-series figures (default: the first torsion of up to
        ``max_series`` types) and the raster rows (default all).
    types : list of str, optional
        Types for the per-type figures (default: the first ``max_types`` of torsions.csv).
    log : callable, optional
        Receives one-line notes on what is skipped and why.

    Returns
    -------
    FigureSet
    """
    from ..io.resultsdir import load_results

    say = log or (lambda msg: None)
    result = load_results(folder)
    folder = result.folder
    scheme = result.scheme
    w = _width_in(width)
    out = FigureSet()

    def skip(what, why):
        out.skipped.append(f"{what}: {why}")
        say(f"skipped {what}: {why}")

    all_types = list(dict.fromkeys(result.torsion_set.types))
    labels = list(result.torsion_set.labels)
    if torsions:
        unknown = [t for t in torsions if t not in labels]
        if unknown:
            raise DihedraError(f"no torsion {unknown[0]!r} in {folder}; labels look like "
                               f"{', '.join(labels[:3])} (see torsions.csv).")
    if types:
        unknown = [t for t in types if t not in all_types]
        if unknown:
            raise DihedraError(f"no torsion type {unknown[0]!r} in {folder}; its types are "
                               f"{', '.join(all_types[:6])}.")
    chosen_types = _pick(all_types, types, max_types)
    if not types and len(all_types) > max_types:
        say(f"note: per-type figures for the first {max_types} of {len(all_types)} types (choose with --types)")
    series_torsions = list(torsions) if torsions else \
        [labels[result.torsion_set.types.index(t)] for t in all_types[:max_series]]

    # 1. angle time series
    if os.path.exists(os.path.join(folder, "angles.parquet")):
        series = read_angle_series(folder, series_torsions[:max(max_series, len(torsions or []))])
        n = len(series.torsions)
        fig = _figure(w, 0.55 + 1.05 * n)
        axes = fig.subplots(n, 1, sharex=True, squeeze=False)[:, 0]
        for k, (ax, lab) in enumerate(zip(axes, series.torsions)):
            plot_angle_series(series, scheme, lab, ax=ax, show_note=k == 0)
            if k < n - 1:
                ax.set_xlabel("")
        out.items.append(FigureItem("angle_series", f"Angle time series of {n} torsion(s) with the state sectors "
                                    f"as bands ({series.description}).", fig, "series"))
    else:
        skip("angle time series", "no angles.parquet (track with --keep-angles)")

    # 2. state raster
    if os.path.exists(os.path.join(folder, "states.parquet")):
        raster = read_state_raster(folder, torsions=torsions)
        fig = _figure(w, 2.4 if len(raster.rows) <= 12 else 2.9)
        plot_state_raster(raster, scheme, ax=fig.add_subplot())
        out.items.append(FigureItem("state_raster", f"States of torsions against time ({raster.description}).",
                                    fig, "raster"))
    else:
        skip("state raster", "no states.parquet")

    # 3. profiles
    profiles = read_optional(folder, "profiles.csv")
    scan = read_optional(folder, "comparison_profiles.csv")
    if profiles is not None:
        have = set(profiles["type"])
        for t in [t for t in chosen_types if t in have]:
            fig = _figure(w, 2.2)
            plot_profile(profiles, scheme, t, scan=scan, ax=fig.add_subplot())
            compared = scan is not None and "type" in scan.columns and t in set(scan["type"])
            out.items.append(FigureItem(
                f"profile_{safe_name(t)}",
                f"Free-energy profile of {t} (histogram estimate) with its bootstrap error band, state sectors "
                f"shaded, unsampled bins hatched" + ("; dashed: the static scan's prediction, aligned." if compared
                                                     else "."), fig, "profile"))
    else:
        skip("free-energy profiles", "no profiles.csv (run 'dihedra profile')")

    # 4. populations
    comparison = read_optional(folder, "comparison.csv")
    predicted, reference = comparison_populations(comparison)
    fig = _figure(w, 2.3)
    plot_populations(result.populations_by_type, scheme, types=chosen_types, predicted=predicted,
                     experiment=reference, ax=fig.add_subplot())
    extra = [x for x, tab in (("the scan's prediction", predicted), ("reference values", reference)) if len(tab)]
    out.items.append(FigureItem("populations", "State populations per type with standard errors (sampled"
                                + (", " + " and ".join(extra) if extra else "") + ").", fig, "populations"))
    if comparison is None:
        skip("scan-predicted populations", "no comparison.csv (run 'dihedra compare')")

    # 5. 2-D maps
    maps = read_optional(folder, "profiles_2d.csv")
    if maps is not None and len(maps):
        for a, b in list(dict.fromkeys(zip(maps["torsion_a"], maps["torsion_b"]))):
            fig = _figure(SINGLE_COLUMN_IN, SINGLE_COLUMN_IN * 0.82 + 0.25)  # square maps: one column
            plot_free_energy_map(maps, (a, b), ax=fig.add_subplot())
            out.items.append(FigureItem(f"free_energy_map_{safe_name(a)}__{safe_name(b)}",
                                        f"2-D free-energy map of {a} and {b} (periodic axes).", fig, "map"))
    else:
        skip("2-D free-energy maps", "no profiles_2d.csv (run 'dihedra profile --pair A B')")

    # 6./7. kinetics
    transitions = read_optional(folder, "transitions.csv")
    lifetimes = read_optional(folder, "lifetimes.csv")
    dwell = read_optional(folder, "dwell_times.csv")
    if transitions is not None and lifetimes is not None:
        have = set(lifetimes.loc[lifetimes["level"] == "type", "name"])
        for t in [t for t in chosen_types if t in have]:
            fig = _figure(w, 2.6)
            plot_transition_diagram(transitions, lifetimes, t, level="type", scheme=scheme, ax=fig.add_subplot())
            out.items.append(FigureItem(f"transitions_{safe_name(t)}",
                                        f"Transitions between the states of {t}: node area ~ population, arrow "
                                        "width ~ rate constant (per ps).", fig, "transitions"))
            fig = _figure(w, 2.3)
            plot_lifetimes(lifetimes, t, level="type", scheme=scheme, dwell_times=dwell, ax=fig.add_subplot())
            out.items.append(FigureItem(f"lifetimes_{safe_name(t)}",
                                        f"Dwell times of the states of {t} on a log axis with the exponential "
                                        "expected from the rates.", fig, "lifetimes"))
        if dwell is None:
            say("note: lifetimes figures show the observed mean and median on the exponential from the rates "
                "(the folder stores no dwell-time distribution)")
    else:
        skip("transition diagrams and lifetimes", "no transitions.csv / lifetimes.csv (run 'dihedra kinetics')")

    # 8. convergence
    kind = str(result.summary.get("kind", ""))
    if "window" in kind:
        skip("convergence", f"a folder of {kind}: every window is biased, so its running populations are not "
                            "the unbiased ones")
    for t in chosen_types if "window" not in kind else []:
        fig = _figure(w, 2.2)
        plot_convergence(result, t, ax=fig.add_subplot())
        out.items.append(FigureItem(f"convergence_{safe_name(t)}",
                                    f"Convergence of the state populations of {t}: running population per "
                                    "replica against simulation time, with the final value ± 1 standard error.",
                                    fig, "convergence"))

    # 9. couplings
    couplings = read_optional(folder, "couplings_vs_experiment.csv")
    if couplings is not None and "j_hz" in couplings.columns:
        couplings = couplings[np.isfinite(pd.to_numeric(couplings["j_hz"], errors="coerce"))]
    if couplings is not None and len(couplings):
        fig = _figure(min(w, SINGLE_COLUMN_IN), 3.3)
        plot_couplings(couplings, ax=fig.add_subplot())
        out.items.append(FigureItem("couplings", "Predicted against experimental 3J couplings with error bars and "
                                    "the identity line.", fig, "couplings"))
    else:
        skip("couplings", "no couplings_vs_experiment.csv (run 'dihedra couplings --experimental FILE')")
    return out


def write_figures(folder, formats=("pdf", "png"), width="single", torsions=None, types=None, out_dir=None,
                  log=None):
    """Write every figure the folder has data for into ``out_dir`` (default ``folder/figures``).

    Returns
    -------
    (paths, skipped) : list of str, list of str
    """
    fmts = [f.strip().lower().lstrip(".") for f in (formats.split(",") if isinstance(formats, str) else formats)]
    fmts = [f for f in fmts if f]
    for f in fmts:
        one_of("figure format", f, FORMATS)
    if not fmts:
        raise DihedraError("give at least one figure format (pdf, png or svg).")
    # into the results folder's figures/ (replacing figures dihedra drew there before), or into
    # out_dir (never over an existing file)
    base, sub = (os.fspath(folder), "figures/") if out_dir is None else (os.fspath(out_dir), "")
    paths = []
    with style():
        fset = figure_set(folder, width=width, torsions=torsions, types=types, log=log)
        os.makedirs(base, exist_ok=True)
        for item in fset.items:
            for f in fmts:
                def save(tmp, fig=item.figure, fmt=f):
                    fig.savefig(tmp, format=fmt, dpi=300 if fmt == "png" else None, metadata=_metadata(fmt))
                paths.append(write_file(base, f"{sub}{item.name}.{f}", save))
    return paths, fset.skipped


def _metadata(fmt):
    from .._version import __version__
    creator = f"dihedra {__version__}"
    if fmt == "png":
        return {"Software": creator}
    if fmt == "pdf":
        return {"Creator": creator}
    if fmt == "svg":
        return {"Creator": creator}
    return None
