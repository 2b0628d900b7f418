r"""Figure 4: state populations per type, sampled and, where the folder has them, predicted from the
static scan and given as reference values.

Layout
------
A few types stand side by side: a group of upright bars per type, every state named under its bar
and the type under its group. When those names would not fit the width without touching (tens of
types, or long type names) the groups stand in rows instead: the types named down the left, a
horizontal bar per state, the states named by colour in a legend above, and a figure of its own
grows with the types (:data:`ROW_SLOT_PT` per bar), so no text is squeezed onto another.
:func:`plot_group_bars` draws both for any table of fractions per group and label (the
Ramachandran regions per residue type too).
"""

from __future__ import annotations

import re

import numpy as np
import pandas as pd

from .common import _axes_width_pt, _new_axes, _top_legend
from .style import INK, NEUTRAL, POPULATION_LABEL, group_by_colour, state_colours

SOURCE_STYLES = {
    "sampled": {"fill": True, "hatch": None, "label": "sampled"},
    "scan": {"fill": False, "hatch": "//////", "label": "predicted from the scan"},
    "experiment": {"fill": False, "hatch": "....", "label": "experiment / reference"},
}

#: Size of the names under and beside the bars (points).
LABEL_PT = 6.0
#: Space between two groups of bars, in bar slots.
GROUP_GAP = 0.7
#: Height of one bar slot when the groups stand in rows (points; more when sources share a slot).
ROW_SLOT_PT = 4.2
#: What a figure in rows needs besides its bars and legend (points): the population axis, its
#: label and the margins.
_ROWS_FRAME_PT = 44.0


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
            for prefix, out in (("predicted", pred), ("reference", ref)):
                m = re.fullmatch(rf"{prefix}_population_(.+)", key)
                if m and not key.startswith(f"{prefix}_population_err_"):
                    err = row.get(f"{prefix}_population_err_{m.group(1)}", np.nan)
                    out.append({"type": row["type"], "state": m.group(1), "population": float(value),
                                "population_err": float(err) if pd.notna(err) else np.nan})
    return pd.DataFrame(pred, columns=cols), pd.DataFrame(ref, columns=cols)


def plot_populations(populations, scheme, types=None, predicted=None, experiment=None, ax=None, legend=True,
                     grow=None):
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
    grow : bool, optional
        Let the figure of ``ax`` take the height that types in rows need (see the module notes);
        default: when this function makes the figure (``ax=None``).

    Returns
    -------
    Axes
    """
    return plot_group_bars(populations, scheme.labels, state_colours(scheme), groups=types,
                           extra=(("scan", predicted), ("experiment", experiment)), ax=ax, legend=legend,
                           grow=grow)


def plot_group_bars(table, labels, colours, groups=None, extra=(), ax=None, legend=True, grow=None,
                    column="state", group_column="type"):
    """Bars of fractions with error bars per group (a torsion type) and label (a state), in the
    layout that fits (see the module notes).

    Parameters
    ----------
    table : DataFrame
        ``group_column``, ``column``, population, population_err: the sampled values (filled bars).
    labels : sequence of str
        The labels in the order of their bars within a group.
    colours : dict
        The colour of every label.
    groups : list of str, optional
        Groups to show (default all, in table order).
    extra : sequence of (key, DataFrame)
        Other sources of :data:`SOURCE_STYLES` (``"scan"``, ``"experiment"``) in the same columns,
        drawn beside the sampled bars where they have the group.
    grow : bool, optional
        As in :func:`plot_populations`.

    Returns
    -------
    Axes
    """
    grow = ax is None if grow is None else grow
    ax = _new_axes(ax, height_in=2.3)
    names = {column: "state", group_column: "type"}
    table = table.rename(columns=names)
    order = list(dict.fromkeys(table["type"]))
    groups = [g for g in (groups or order) if g in order]
    sources = [("sampled", table)]
    for key, other in extra:
        other = None if other is None else other.rename(columns=names)
        if other is not None and len(other) and set(groups) & set(other["type"]):
            sources.append((key, other))
    present = set(zip(table["type"], table["state"]))
    members = [(g, [s for s in labels if (g, s) in present]) for g in groups]
    upright = _upright_labels(_axes_width_pt(ax), members)
    if upright is None:
        legend_rows = _draw_rows(ax, sources, members, colours, legend)
        if grow:
            ax.figure.set_figheight(rows_height_in(members, len(sources), legend_rows))
    else:
        _draw_upright(ax, sources, members, colours, *upright)
        if legend and len(sources) > 1:
            _top_legend(ax, _source_handles(sources))
    return ax


def rows_height_in(members, n_sources=1, legend_rows=1):
    """Height in inches of a figure whose ``members`` (``[(group, labels), ...]``) stand in rows."""
    slot_pt = ROW_SLOT_PT * (1.0 + 0.5 * (n_sources - 1))
    return max(2.3, (_slots(members)[1] * slot_pt + _ROWS_FRAME_PT + 10.5 * legend_rows) / 72.0)


def _slots(members):
    """Where the bar slots of every group stand: ``([(group, [(label, x), ...]), ...], span)``;
    slots one apart, groups :data:`GROUP_GAP` further, the span 0.6 beyond both ends."""
    out, x = [], 0.0
    for g, labels in members:
        out.append((g, [(s, x + k) for k, s in enumerate(labels)]))
        x += len(labels) + GROUP_GAP
    return out, max(x - GROUP_GAP + 0.2, 1.0)


def _text_width_pt(text, size=LABEL_PT):
    """Width of one line of text in points in the current font (measured, nothing drawn)."""
    from matplotlib.font_manager import FontProperties
    from matplotlib.textpath import TextPath

    return TextPath((0, 0), str(text), prop=FontProperties(size=size)).get_extents().width if text else 0.0


def _fit_label(text, room_pt, max_lines=3):
    """``text`` wrapped to at most ``max_lines`` lines, each at most ``room_pt`` wide (a name
    without spaces breaks anywhere), or None when it cannot be."""
    import textwrap

    text = str(text)
    for chars in range(len(text), min(len(text), 3) - 1, -1):   # lines of three characters at least
        lines = textwrap.wrap(text, chars, break_on_hyphens=False) or [""]
        if len(lines) > max_lines:
            return None
        if max(_text_width_pt(x) for x in lines) <= room_pt:
            return "\n".join(lines)
    return None


def _upright_labels(width_pt, members):
    """The group names wrapped to their groups, whether the labels under the bars stand turned,
    and the widest label, when the upright layout fits ``width_pt``; None when its names would
    touch (then the rows layout)."""
    slot = width_pt / _slots(members)[1]
    widest = max((_text_width_pt(s) for _, labels in members for s in labels), default=0.0)
    turned = widest > 0.9 * slot
    if turned and slot < 1.5 * LABEL_PT:   # turned labels need a line of text each
        return None
    names = [_fit_label(g, (len(labels) + GROUP_GAP) * slot - 2.0) for g, labels in members]
    if any(n is None for n in names):
        return None
    return names, turned, widest


def _draw_upright(ax, sources, members, colours, names, turned, widest):
    """Groups side by side: upright bars, the labels under the bars, the group names under them."""
    placed, span = _slots(members)
    _draw_bars(ax, sources, placed, colours, rows=False)
    ticks = [(s, x) for _, slots in placed for s, x in slots]
    ax.set_xticks([x for _, x in ticks])
    ax.set_xticklabels([s for s, _ in ticks], rotation=90 if turned else 0, fontsize=LABEL_PT)
    ax.tick_params(axis="x", length=0)
    ax.set_xlim(-0.6, span - 0.6)
    ax.set_ylim(0, 1.0)
    ax.set_ylabel(POPULATION_LABEL)
    ax.yaxis.grid(True, color="#E3E7EA", lw=0.5, zorder=0)
    ax.set_axisbelow(True)
    sec = ax.secondary_xaxis("bottom")
    sec.set_xticks([_centre(slots) for _, slots in placed if slots])
    sec.set_xticklabels([n for n, (_, slots) in zip(names, placed) if slots], fontsize=LABEL_PT)
    sec.tick_params(axis="x", length=0, pad=widest + 6.0 if turned else 11.0)
    sec.spines["bottom"].set_visible(False)


def _draw_rows(ax, sources, members, colours, legend):
    """Groups in rows: horizontal bars, the group names at the left, the labels by colour in a
    legend above (with the sources when there are several); returns the legend's rows."""
    from matplotlib.patches import Patch

    placed, span = _slots(members)
    _draw_bars(ax, sources, placed, colours, rows=True)
    ax.set_yticks([_centre(slots) for _, slots in placed if slots])
    ax.set_yticklabels([g for g, slots in placed if slots], fontsize=LABEL_PT)
    ax.tick_params(axis="y", length=0)
    ax.set_ylim(span - 0.6, -0.6)   # the first group at the top
    ax.set_xlim(0, 1.0)
    ax.set_xlabel(POPULATION_LABEL)
    ax.xaxis.grid(True, color="#E3E7EA", lw=0.5, zorder=0)
    ax.set_axisbelow(True)
    if not legend:
        return 0
    shown = list(dict.fromkeys(s for _, slots in placed for s, _ in slots))
    handles = [Patch(facecolor=c, edgecolor="none", label=" / ".join(group))
               for c, group in group_by_colour(colours, shown)]
    return _top_legend(ax, handles + (_source_handles(sources) if len(sources) > 1 else []))


def _centre(slots):
    return (slots[0][1] + slots[-1][1]) / 2


def _source_handles(sources):
    from matplotlib.patches import Patch

    return [Patch(facecolor=NEUTRAL if SOURCE_STYLES[k]["fill"] else "white", edgecolor=NEUTRAL,
                  hatch=SOURCE_STYLES[k]["hatch"], label=SOURCE_STYLES[k]["label"]) for k, _ in sources]


def _draw_bars(ax, sources, placed, colours, rows):
    """One bar per slot and source with its error bar: upright, or along the rows."""
    keyed = {k: t.set_index(["type", "state"]) for k, t in sources}
    bar_w = 0.8 / len(sources)
    for g, slots in placed:
        for s, x in slots:
            for j, (key, _) in enumerate(sources):
                if (g, s) not in keyed[key].index:
                    continue
                row = keyed[key].loc[(g, s)]
                p = float(row["population"])
                e = float(row["population_err"]) if pd.notna(row.get("population_err", np.nan)) else np.nan
                st = SOURCE_STYLES[key]
                at = x - 0.4 + bar_w * (j + 0.5)
                look = dict(color=colours[s] if st["fill"] else "white", edgecolor=colours[s], hatch=st["hatch"],
                            lw=0.8, zorder=2)
                if rows:
                    ax.barh(at, p, height=bar_w * 0.9, **look)
                else:
                    ax.bar(at, p, width=bar_w * 0.9, **look)
                if np.isfinite(e):
                    ax.errorbar(*((p, at) if rows else (at, p)), **({"xerr": e} if rows else {"yerr": e}),
                                fmt="none", ecolor=INK, elinewidth=0.7, capsize=1.5, zorder=3)
