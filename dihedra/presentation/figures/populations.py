r"""Figure 4: state populations per type, sampled and, where the folder has them, predicted from the
static scan and given as reference values."""

from __future__ import annotations

import re

import numpy as np
import pandas as pd

from .common import _axes_width_pt, _new_axes, _top_legend
from .style import INK, NEUTRAL, POPULATION_LABEL, state_colours

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
            for prefix, out in (("predicted", pred), ("reference", ref)):
                m = re.fullmatch(rf"{prefix}_population_(.+)", key)
                if m and not key.startswith(f"{prefix}_population_err_"):
                    err = row.get(f"{prefix}_population_err_{m.group(1)}", np.nan)
                    out.append({"type": row["type"], "state": m.group(1), "population": float(value),
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
    order = list(dict.fromkeys(populations["type"]))
    types = [t for t in (types or order) if t in order]
    sources = [("sampled", populations)]
    for key, table in (("scan", predicted), ("experiment", experiment)):
        if table is not None and len(table) and set(types) & set(table["type"]):
            sources.append((key, table))
    ticks, ticklabels, centres, x = _draw_bars(ax, scheme, types, sources)
    ax.set_xticks(ticks)
    many = len(ticks) > (8 if _axes_width_pt(ax) < 300 else 16)
    ax.set_xticklabels(ticklabels, rotation=90 if many else 0, fontsize=6.0)
    ax.tick_params(axis="x", length=0)
    ax.set_xlim(-0.6, x - 1.7 + 0.6 if x > 0 else 1)
    ax.set_ylim(0, 1.0)
    ax.set_ylabel(POPULATION_LABEL)
    ax.yaxis.grid(True, color="#E3E7EA", lw=0.5, zorder=0)
    ax.set_axisbelow(True)
    _type_labels(ax, centres, x, many)
    if legend and len(sources) > 1:
        handles = [Patch(facecolor=NEUTRAL if SOURCE_STYLES[k]["fill"] else "white", edgecolor=NEUTRAL,
                         hatch=SOURCE_STYLES[k]["hatch"], label=SOURCE_STYLES[k]["label"]) for k, _ in sources]
        _top_legend(ax, handles)
    return ax


def _draw_bars(ax, scheme, types, sources):
    """One group of bars per type, one bar per state and source, with error bars.

    Returns the tick positions and labels (states), the centres of the type groups as
    ``(x, type, n_states)`` and the position after the last group."""
    colours = state_colours(scheme)
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
    return ticks, ticklabels, centres, x


def _type_labels(ax, centres, x, many):
    """Type names below the state names, centred under their groups and wrapped to the group width."""
    import textwrap

    sec = ax.secondary_xaxis("bottom")
    span = max(x - 1.7 + 1.2, 1.0)
    sec.set_xticks([c for c, _, _ in centres])
    sec.set_xticklabels([textwrap.fill(t, max(8, int(_axes_width_pt(ax) * (n + 0.7) / span / 3.4)),
                                       break_on_hyphens=False) for _, t, n in centres], fontsize=6.0)
    sec.tick_params(axis="x", length=0, pad=(32 if many else 11))
    sec.spines["bottom"].set_visible(False)
