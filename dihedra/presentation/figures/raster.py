r"""Figure 2: the state raster, many torsions against time coloured by state, and its chunked reader.

Large data
----------
:func:`read_state_raster` streams ``states.parquet`` and keeps, for each torsion row and time
column, the most frequent state of the frames in that column. Rows are grouped: the torsions of a
biopolymer by their name (all φ, then all ψ, then all ω, ... each in chain order, so a row's place
says its residue), other torsions by type. A protein's 639 backbone torsions are all drawn; only
above ``max_rows`` are the rows of every group thinned evenly, and the figure says so ("2000 of
12000 torsions").

Rare states
-----------
A state that the other torsions of a group do not take (the one cis ω of a chain, a rare rotamer)
would be lost: in a column to the most frequent state, between rows thinner than a pixel, or by
thinning. :mod:`~dihedra.presentation.figures.rarestates` keeps it: such a state takes a cell
where it holds a quarter of the frames, is drawn at least 1 pt thick over the raster, and its rows
are kept when the rows are thinned. The figure's note names the rare states it enlarged.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from ...errors import DihedraError
from ...io.series import ParquetSeries
from ...io.tables import read_optional_json, read_optional_table, read_table
from ...selection.schemes import scheme_from_dict
from .common import (_new_axes, _note, _replica_info, _time_label, _top_legend, _wrap, is_named_torsion, time_scale,
                     torsion_symbol)
from .rarestates import (RARE_COLUMN_SHARE, RARE_MIN_PT, RARE_SHARE, rare_cells, rare_rows, rare_runs, rare_states,
                         reduce_columns)
from .style import UNDEFINED_COLOUR, colour_groups, state_colours
from .timeseries import _check_columns, _mark_replicas, _replica_layout

#: Order of the named torsions of biopolymers in a raster grouped by name.
NAME_ORDER = ("phi", "psi", "omega", "chi1", "chi2", "chi3", "chi4", "chi5", "alpha", "beta", "gamma", "delta",
              "epsilon", "zeta", "chi", "nu0", "nu1", "nu2", "nu3", "nu4")


@dataclass
class StateRaster:
    """States of many torsions against time, aggregated for display: what :func:`plot_state_raster` draws.

    Attributes
    ----------
    codes : ndarray of int8, shape (n_rows, n_columns)
        State code drawn in each torsion row and time column (-1: undefined): the most frequent
        state of the column's frames, or a rare state that holds a quarter of them
        (:mod:`~dihedra.presentation.figures.rarestates`).
    rows, row_types : list of str
        Torsion label and type of each row.
    replica_columns : list of (first_column, n_columns, duration)
        The columns of each replica and its duration (ps, or frames when the time is unknown).
    frames_per_column : float
        Frames aggregated into one column (largest over replicas).
    n_torsions : int
        Torsions in the folder.
    time_known : bool
    row_groups : list of str
        The group of each row: the torsion name (``phi``) when grouped by name, else the type.
    row_residues : list
        Residue number of each row (None where unknown).
    grouping : {"name", "type"}
        Biopolymer torsions by name in chain order, other torsions by type.
    n_selected : int, optional
        Torsions chosen for the raster before any thinning (default: all of the folder); the rows
        are an evenly spaced subset of every group when fewer.
    selection : str
        What was chosen, for the note ("3 chosen types", "PHE:omega"); empty for all torsions.
    rare : ndarray of bool, shape (n_rows, n_states), optional
        The states rare in each row's group that the row visits
        (:func:`~dihedra.presentation.figures.rarestates.rare_states`); drawn at least
        ``RARE_MIN_PT`` thick.
    state_labels : list of str
        Name of each state code (for the note).
    """

    codes: np.ndarray
    rows: list
    row_types: list
    replica_columns: list
    frames_per_column: float
    n_torsions: int
    time_known: bool = True
    row_groups: list = field(default_factory=list)
    row_residues: list = field(default_factory=list)
    grouping: str = "type"
    n_selected: int | None = None
    selection: str = ""
    rare: np.ndarray | None = None
    state_labels: list = field(default_factory=list)
    n_rare_kept: int = 0
    n_rare_rows: int = 0

    @property
    def description(self):
        rows = self._rows_description()
        rows += ", grouped by torsion, residues in chain order" if self.grouping == "name" else \
            (", grouped by type" if len(set(self.row_types)) > 1 else "")
        if self.frames_per_column <= 1:
            cols = "one column per frame"
        else:
            cols = f"each column: most frequent state of {self.frames_per_column:g} frames"
        return f"{rows}; {cols}{self._rare_description()}"

    def rare_cells(self):
        """Mask of the cells drawn in a state rare for their row (drawn at least ``RARE_MIN_PT`` thick)."""
        return rare_cells(self.codes, self.rare)

    def rare_found(self):
        """``[(group, state), ...]`` of the rare states the raster draws, in row order."""
        mask = self.rare_cells()
        groups = self.row_groups or self.row_types
        found = {}
        for r in np.flatnonzero(mask.any(axis=1)):
            for code in np.unique(self.codes[r][mask[r]]):
                name = self.state_labels[code] if code < len(self.state_labels) else str(code)
                found[(str(groups[r]), name)] = None
        return list(found)

    def _rare_description(self):
        """What the raster does with rare states, when it draws any: they are drawn larger than their share."""
        found = self.rare_found()
        if not found:
            return ""
        names = ", ".join(f"{state} ({group})" for group, state in found[:4]) + (", ..." if len(found) > 4 else "")
        rows = len(np.flatnonzero(self.rare_cells().any(axis=1)))
        where = "" if self.frames_per_column <= 1 else \
            f" and shown from {RARE_COLUMN_SHARE * 100:g} % of a column's frames"
        return (f"; rare states (under {RARE_SHARE * 100:g} % of their group's frames) enlarged to at least "
                f"{RARE_MIN_PT:g} pt{where}: {names} in {rows} row{'s' if rows != 1 else ''}")

    def _rows_description(self):
        """Which torsions the rows are: all of the folder or those chosen, and, only when rows were
        left out to fit the figure, that they are an evenly spaced subset (with the rows kept for
        a rare state)."""
        n_rows = len(self.rows)
        chosen = self.n_torsions if self.n_selected is None else int(self.n_selected)
        thinned = "evenly spaced in every group"
        if self.n_rare_kept:
            visit = "visits" if self.n_rare_kept == 1 else "visit"
            thinned += (f", and {self.n_rare_kept} that {visit} a rare state" if self.n_rare_kept >= self.n_rare_rows
                        else f", and the {self.n_rare_kept} of {self.n_rare_rows} that visit a rare state most")
        if chosen >= self.n_torsions:
            return (f"all {n_rows} torsions" if n_rows == chosen
                    else f"{n_rows} of {self.n_torsions} torsions ({thinned})")
        what = f"{chosen} torsions of {self.selection}" if self.selection else f"{chosen} chosen torsions"
        of_all = f"of {self.n_torsions} in the folder"
        if n_rows == chosen:
            return f"the {what} ({of_all})"
        return f"{n_rows} of the {what} ({thinned}; {of_all})"

    @property
    def groups(self):
        """Runs of rows of one group: ``[(group, first_row, last_row), ...]``."""
        runs = []
        for k, g in enumerate(self.row_groups or self.row_types):
            if not runs or runs[-1][0] != g:
                runs.append([g, k, k])
            else:
                runs[-1][2] = k
        return [tuple(r) for r in runs]


def _row_order(table, labels):
    """Rows grouped: by torsion name in chain order when every torsion is a named biopolymer one
    with a residue number, else by type (file order within a type). Returns the labels, their
    groups, their residue numbers and the grouping."""
    table = table.set_index("torsion", drop=False)
    sub = table.loc[labels]
    names = sub["name"].astype(str) if "name" in sub.columns else \
        pd.Series([str(x).rpartition(":")[2] for x in labels], index=sub.index)
    resid = pd.to_numeric(sub["resid"], errors="coerce") if "resid" in sub.columns else None
    if resid is not None and resid.notna().all() and all(is_named_torsion(n) for n in names):
        rank = {n: NAME_ORDER.index(n) if n in NAME_ORDER else len(NAME_ORDER) for n in names}
        segs = sub["segid"].astype(str) if "segid" in sub.columns else pd.Series("", index=sub.index)
        seg_rank = {s: k for k, s in enumerate(dict.fromkeys(segs))}
        key = pd.DataFrame({"label": labels, "name": names.to_numpy(), "rank": [rank[n] for n in names],
                            "seg": [seg_rank[s] for s in segs], "resid": resid.to_numpy(),
                            "pos": np.arange(len(labels))})
        key = key.sort_values(["rank", "name", "seg", "resid", "pos"], kind="stable")
        return list(key["label"]), list(key["name"]), [int(r) for r in key["resid"]], "name"
    types = list(sub["type"].astype(str))
    type_order = {t: k for k, t in enumerate(dict.fromkeys(types))}
    order = sorted(range(len(labels)), key=lambda k: type_order[types[k]])  # stable: file order within
    res = [None] * len(labels) if resid is None else [None if pd.isna(r) else int(r) for r in resid]
    return [labels[k] for k in order], [types[k] for k in order], [res[k] for k in order], "type"


def _thin(groups, max_rows):
    """Indices of at most ``max_rows`` rows, evenly spaced within every run of one group (in
    proportion to its size, the first and last row of each group kept)."""
    n = len(groups)
    if n <= max_rows:
        return np.arange(n)
    runs = pd.Series(groups).ne(pd.Series(groups).shift()).cumsum().to_numpy()
    keep = []
    for r in np.unique(runs):
        idx = np.flatnonzero(runs == r)
        k = max(1, int(round(len(idx) * max_rows / n)))
        keep.extend(idx[np.unique(np.round(np.linspace(0, len(idx) - 1, k)).astype(int))])
    return np.asarray(sorted(keep))


def read_state_raster(folder, torsions=None, max_rows=2000, max_columns=600, batch_frames=None, selection=""):
    """Aggregate ``states.parquet`` for a state raster, reading it in chunks.

    Rows: the given torsions, or all of them, grouped (see :func:`_row_order`); more than
    ``max_rows`` are thinned to an evenly spaced subset of every group. Columns: the frames of
    each replica cut into at most ``max_columns`` columns in total (in proportion to the replica
    lengths, every column the same whole number of frames, the last one of a replica possibly
    fewer); each cell holds the most frequent state of its frames (ties: the lower code).
    ``selection`` says what ``torsions`` are for the note ("3 chosen types").

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
    labels = list(dict.fromkeys(torsions)) if torsions else all_labels
    n_selected = len(labels)
    _check_columns(series, "states", labels)
    labels, groups, residues, grouping = _row_order(table, labels)
    keep, representative, n_rare_kept, n_rare_rows = _rows_kept(folder, labels, groups, int(max_rows))
    labels, groups, residues = [labels[k] for k in keep], [groups[k] for k in keep], [residues[k] for k in keep]
    n_states = len(summary.get("scheme", {}).get("labels", [])) or 127
    info = _replica_info(summary)
    frames = np.array([n for n, _ in info], dtype=np.int64)
    if not len(frames) or frames.sum() == 0:
        raise DihedraError(f"{folder}/summary.json lists no analysed frames.")
    per_col = max(1, int(np.ceil(frames.sum() / max(1, int(max_columns)))))  # whole frames per column
    n_cols = np.maximum(1, -(-frames // per_col)).astype(np.int64)
    col_offset = np.r_[0, np.cumsum(n_cols)[:-1]]
    counts = _column_counts(series.iter_frames("states", labels, batch_frames), labels, len(frames), n_states,
                            per_col, n_cols, col_offset)
    state_labels, allowed = _states_of_rows(summary, [types.get(x, "") for x in labels], n_states)
    rare = rare_states(counts, groups, allowed, representative)
    mode = reduce_columns(counts, rare)
    spans = []
    for r, (n, dt) in enumerate(info):
        spans.append((int(col_offset[r]), int(n_cols[r]), n * (dt if dt is not None else 1.0)))
    return StateRaster(codes=mode, rows=labels, row_types=[types.get(x, "") for x in labels],
                       replica_columns=spans, frames_per_column=float(per_col),
                       n_torsions=len(all_labels), time_known=all(dt is not None for _, dt in info),
                       row_groups=groups, row_residues=residues, grouping=grouping, n_selected=n_selected,
                       selection=selection if torsions else "", rare=rare, state_labels=state_labels,
                       n_rare_kept=n_rare_kept, n_rare_rows=n_rare_rows)


def _rows_kept(folder, labels, groups, max_rows):
    """The rows of a raster: all, or above ``max_rows`` an evenly spaced subset of every group with
    the rows that visit a rare state most (up to a tenth of ``max_rows``; ``populations.csv``).
    Returns the indices kept, which of them stand for their group (the evenly spaced ones), how
    many were kept for a rare state and how many visit one (0 and 0 when nothing was thinned)."""
    if len(labels) <= max_rows:
        return np.arange(len(labels)), np.ones(len(labels), bool), 0, 0
    pops = read_optional_table(folder, "populations.csv", ("torsion", "state", "population"))
    must, n_rare_rows = rare_rows(pops, labels, groups, max_rows // 10)
    even = _thin(groups, max_rows - len(must))
    keep = np.union1d(even, must)
    return keep, np.isin(keep, even), len(must), n_rare_rows


def _states_of_rows(summary, row_types, n_states):
    """The state names of the folder's scheme and the states each row's type can take (all of
    them when the scheme is unreadable)."""
    try:
        scheme = scheme_from_dict(summary["scheme"])
    except (KeyError, TypeError, ValueError, DihedraError):  # an older or damaged summary: all states
        return [], None
    labels = list(scheme.labels)
    if len(labels) != n_states:
        return labels, None
    own = {t: np.isin(labels, scheme.states_of_type(t)) for t in dict.fromkeys(row_types)}
    return labels, np.array([own[t] for t in row_types], dtype=bool).reshape(len(row_types), n_states)


def _column_counts(chunks, labels, n_replicas, n_states, per_col, n_cols, col_offset):
    """Frames of each row (torsion) in each time column in each state, from the state chunks:
    shape (n_rows, n_columns, n_states + 1), index 0 undefined, k + 1 state k."""
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
    return counts.reshape(n_rows, total_cols, width)


def plot_state_raster(raster, scheme, ax=None, show_note=True, legend=True):
    """Figure 2: many torsions (rows) against time (columns), coloured by state.

    Rows are grouped (:attr:`StateRaster.grouping`): the groups are named at the left (the torsion
    symbol, φ, ψ, ω, χ1 ..., or the type), white lines separate them, and residue numbers run
    along the right where the rows have them and are too many to name one by one.

    Parameters
    ----------
    raster : StateRaster
        From :func:`read_state_raster` (aggregation and thinning are stated on the figure).
    scheme : StateScheme or SchemeSet
    show_note, legend : bool
        State the aggregation; show the state colours (a row above the axes; where a set of
        schemes gives one colour several states, one entry names them all: ``anti / trans``).

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
    _draw_rare(ax, raster, scheme, starts, scale)
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


def _draw_rare(ax, raster, scheme, starts, scale):
    """Cells in a state rare for their row, drawn again over the raster as lines at least
    ``RARE_MIN_PT`` thick and long (projecting caps), so that a row or column thinner than a pixel
    keeps them; under the white lines between groups and the replica marks."""
    from matplotlib.collections import LineCollection

    runs = rare_runs(raster.codes, raster.rare)
    if not runs:
        return None
    colours = state_colours(scheme)
    segments, seg_colours = [], []
    for k, (first, n, dur) in enumerate(raster.replica_columns):
        width = dur / max(n, 1)
        for row, a, b, code in runs:
            lo, hi = max(a, first), min(b, first + n - 1)
            if lo > hi:
                continue
            x0 = (starts[k] + (lo - first) * width) * scale
            x1 = (starts[k] + (hi - first + 1) * width) * scale
            segments.append([(x0, row), (x1, row)])
            seg_colours.append(colours[scheme.labels[code]])
    lines = LineCollection(segments, colors=seg_colours, linewidths=RARE_MIN_PT, capstyle="projecting",
                           zorder=1.5, rasterized=len(segments) > 2000)
    ax.add_collection(lines)
    return lines


def _raster_rows(ax, raster):
    """Name the raster rows: torsion labels when few, group names (symbols or types) when many,
    white lines between groups, residue numbers at the right."""
    n_rows = len(raster.rows)
    runs = raster.groups
    if n_rows <= 24:
        ax.set_yticks(range(n_rows))
        ax.set_yticklabels(raster.rows, fontsize=5.5 if n_rows > 12 else 6.0)
        ax.set_ylabel("torsion")
    elif len(runs) <= 16:
        if raster.grouping == "name":
            ticks, labels = _joined_labels(ax, runs, [torsion_symbol(g) for g, _, _ in runs], n_rows)
            ax.set_yticks(ticks)
            ax.set_yticklabels(labels, fontsize=8.0)
            ax.set_ylabel("torsion")
        else:
            ax.set_yticks([(a + b) / 2 for _, a, b in runs])
            ax.set_yticklabels([_wrap(ax, t, 40) for t, _, _ in runs], fontsize=5.5)
            ax.set_ylabel("torsion type")
        _residue_ticks(ax, raster, runs)
    else:
        ax.set_yticks([])
        ax.set_ylabel("torsions, grouped by " + ("torsion" if raster.grouping == "name" else "type"))
    if len(runs) <= 16:
        for _, a, _ in runs[1:]:
            ax.axhline(a - 0.5, color="white", lw=1.2)
    ax.tick_params(axis="y", length=0)
    for side in ("left", "bottom"):
        ax.spines[side].set_visible(False)


def _joined_labels(ax, runs, names, n_rows, min_height_pt=9.0):
    """Labels of the row groups at their centres; neighbouring groups too thin for a label of
    their own share one ("χ4, χ5") at the centre of their rows."""
    height_pt = ax.figure.get_figheight() * 72.0 * ax.get_position().height
    thin = [(b - a + 1) * height_pt / n_rows < min_height_pt for _, a, b in runs]
    ticks, labels, k = [], [], 0
    while k < len(runs):
        j = k
        while thin[k] and j + 1 < len(runs) and thin[j + 1]:
            j += 1
        ticks.append((runs[k][1] + runs[j][2]) / 2)
        labels.append(", ".join(names[k:j + 1]))
        k = j + 1
    return ticks, labels


_ROUND_STEPS = (1, 2, 5, 10, 20, 25, 50, 100, 200, 250, 500, 1000, 2000, 5000)


def _residue_ticks(ax, raster, runs, min_spacing_pt=8.0):
    """Residue numbers along the right edge: round numbers, in each group as many as fit in its
    height without touching."""
    res = raster.row_residues
    if not res or any(r is None for r in res) or raster.grouping != "name":
        return
    height_pt = ax.figure.get_figheight() * 72.0 * ax.get_position().height * 0.8
    n_rows = len(res)
    ticks, labels = [], []
    for _, a, b in runs:
        if b - a <= 2:
            continue
        fit = max(1, int(height_pt * (b - a + 1) / n_rows / min_spacing_pt))
        span = max(res[a:b + 1]) - min(res[a:b + 1]) + 1
        step = next((s for s in _ROUND_STEPS if span / s <= fit), 10000)
        for mark in range(-(-min(res[a:b + 1]) // step) * step, max(res[a:b + 1]) + 1, step):
            k = next(k for k in range(a, b + 1) if res[k] >= mark)  # the first residue from it
            ticks.append(k)
            labels.append(str(res[k]))
    if not ticks:
        return
    right = ax.secondary_yaxis("right")
    right.set_yticks(ticks)
    right.set_yticklabels(labels, fontsize=5.5)
    right.tick_params(axis="y", length=1.5, pad=1.0)
    right.set_ylabel("residue", fontsize=6.5)
    right.spines["right"].set_visible(False)


def _raster_handles(raster, scheme):
    """Legend entries of the raster: the states its rows can take (one entry per colour), and
    undefined frames when there are any."""
    from matplotlib.patches import Patch

    states = list(dict.fromkeys(s for t in dict.fromkeys(raster.row_types) for s in scheme.states_of_type(t)))
    states = [s for s in scheme.labels if s in set(states)]
    handles = [Patch(facecolor=c, alpha=1.0, edgecolor="none", label=" / ".join(group))
               for c, group in colour_groups(scheme, states)]
    if (raster.codes < 0).any():
        handles.append(Patch(facecolor=UNDEFINED_COLOUR, edgecolor="none", label="undefined"))
    return handles
