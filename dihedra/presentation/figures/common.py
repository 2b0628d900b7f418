r"""Drawing helpers shared by the figure families: new axes, notes and legends above the axes,
state sectors and the angle axis, time units, energy columns and replica information."""

from __future__ import annotations

import re

import numpy as np
import pandas as pd

from ...errors import DihedraError
from .style import ANGLE_LABEL, ENERGY_UNIT_LABELS, NEUTRAL, SECTOR_ALPHA, WIDTHS, state_colours


def _new_axes(ax, width="single", height_in=2.4):
    if ax is not None:
        return ax
    import matplotlib.pyplot as plt

    _, ax = plt.subplots(figsize=(WIDTHS.get(width, width), height_in), layout="constrained")
    return ax


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


def _energy_suffix(column):
    for suffix in ENERGY_UNIT_LABELS:
        if column.endswith("_" + suffix):
            return suffix
    return None


def sector_spans(scheme):
    """State arcs as ``(state_code, lo_deg, hi_deg)`` pieces within [-180, 180] (wrapping arcs split).

    A set of schemes without a torsion type (:meth:`~dihedra.selection.schemes.SchemeSet.for_type`
    picks the part) has no single set of arcs: no pieces."""
    if len(scheme.coded_parts()) > 1:
        return []
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


#: Symbols of the named torsions of biopolymers (IUPAC-IUB, J. Mol. Biol. 52 (1970) 1 for
#: proteins; IUPAC-IUB, Eur. J. Biochem. 131 (1983) 9 for nucleic acids), in mathtext.
TORSION_SYMBOLS = {"phi": r"\varphi", "psi": r"\psi", "omega": r"\omega", "alpha": r"\alpha", "beta": r"\beta",
                   "gamma": r"\gamma", "delta": r"\delta", "epsilon": r"\varepsilon", "zeta": r"\zeta",
                   "chi": r"\chi", "nu": r"\nu"}


def torsion_symbol(name=None):
    r"""The symbol of a torsion type or label in mathtext: the biopolymer name after the colon
    (``ALA:psi`` -> ψ, ``ARG12:chi2`` -> χ2, ``DA:nu0`` -> ν0, ``DG3:epsilon`` -> ε), φ for
    every other torsion (``HEX:C1-C2-C3-C4``).

    Examples
    --------
    >>> torsion_symbol("ALA:psi"), torsion_symbol("ARG12:chi2"), torsion_symbol("HEX:C1-C2-C3-C4")
    ('$\\psi$', '$\\chi_{2}$', '$\\varphi$')
    """
    part = str(name or "").rpartition(":")[2].strip().lower()
    m = re.fullmatch(r"([a-z]+?)(\d?)", part)
    if m and m.group(1) in TORSION_SYMBOLS and (not m.group(2) or m.group(1) in ("chi", "nu")):
        sub = f"_{{{m.group(2)}}}" if m.group(2) else ""
        return f"${TORSION_SYMBOLS[m.group(1)]}{sub}$"
    return "$\\varphi$"


def is_named_torsion(name):
    """Whether a torsion type or label carries a biopolymer name (phi, psi, chi1, alpha, ...)."""
    return torsion_symbol(name) != "$\\varphi$" or str(name).rpartition(":")[2].strip().lower() == "phi"


def angle_label(name=None):
    """Axis label of the angle of ``name`` (its symbol, see :func:`torsion_symbol`) in degrees."""
    return f"{torsion_symbol(name)} / deg" if name is not None else ANGLE_LABEL


def _angle_axis(axis_setter, ticks_setter, lim_setter, name=None):
    lim_setter(-180, 180)
    ticks_setter([-180, -120, -60, 0, 60, 120, 180])
    axis_setter(angle_label(name))


def time_scale(max_ps):
    """Factor and unit that make times readable: (1, 'ps'), (1e-3, 'ns') or (1e-6, 'µs')."""
    if max_ps >= 5e6:
        return 1e-6, "µs"
    if max_ps >= 5e3:
        return 1e-3, "ns"
    return 1.0, "ps"


def _time_label(unit, known=True):
    return rf"$\mathit{{t}}$ / {unit}" if known else "frame"


def _replica_info(summary):
    """Per replica: frames analysed, time between analysed frames in ps (None if unknown or zero)."""
    out = []
    for rep in summary.get("replicas", []):
        dt = rep.get("time_between_analysed_frames_ps")
        known = rep.get("time_step_known", dt is not None) and dt is not None and float(dt) > 0
        out.append((int(rep.get("frames_analysed", 0)), float(dt) if known else None))
    return out


def _as_bool(values):
    if getattr(values, "dtype", None) == bool:
        return np.asarray(values)
    return pd.Series(values).astype(str).str.lower().isin(["true", "1", "1.0"]).to_numpy()


# ----------------------------------------------------------------------------------------------
# Notes and legends above the axes
# ----------------------------------------------------------------------------------------------

def _note(ax, text, pad_rows=0, colour=NEUTRAL):
    """A short statement of what the figure shows (aggregation, downsampling), as the axes title,
    wrapped to the axes width; ``pad_rows`` legend rows above the axes are left free."""
    if text:
        ax.set_title(_wrap(ax, text, 6.0), fontsize=6.0, color=colour, loc="left",
                     pad=3.0 + 10.5 * pad_rows, linespacing=1.15)


def _note_above(ax, text, artists, colour=NEUTRAL):
    """A note like :func:`_note`, but above the highest of the axes and ``artists``: labels of a
    drawing in data coordinates may reach above the axes, where the title would cover them (the
    title only clears the axes and its tick labels). Returns the note (an annotation), or None."""
    if not text:
        return None
    from matplotlib.transforms import Bbox

    def drawing(renderer):
        return Bbox.union([ax.bbox] + [a.get_window_extent(renderer) for a in artists])

    return ax.annotate(_wrap(ax, text, 6.0), xy=(0.0, 1.0), xycoords=("axes fraction", drawing), xytext=(0.0, 3.0),
                       textcoords="offset points", ha="left", va="bottom", fontsize=6.0, color=colour,
                       linespacing=1.15, annotation_clip=False, clip_on=False)


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


def single_frames(result):
    """Whether every replica of ``result`` (a result, or anything with its ``summary``) has at most one
    frame: a single structure, with nothing to draw against time."""
    frames = [int(r.get("frames_analysed", 0)) for r in (result.summary or {}).get("replicas", [])]
    return bool(frames) and max(frames) <= 1
