r"""Figure 10: a fitted torsion correction: sampled, reweighted and target profiles or populations,
and the correction curve (the tables ``dihedra refit`` writes)."""

from __future__ import annotations

import numpy as np

from ...errors import DihedraError
from .common import _angle_axis, _as_bool, _new_axes, _note, _top_legend
from .style import INK, NEUTRAL, OKABE_ITO, POPULATION_LABEL

#: Colour and line of each source.
REFIT_STYLES = {
    "sampled": {"color": NEUTRAL, "ls": "-", "label": "sampled"},
    "reweighted": {"color": OKABE_ITO["blue"], "ls": "-", "label": "reweighted"},
    "target": {"color": "black", "ls": (0, (3.0, 1.4)), "label": "target"},
}


def _rows(table, name, what):
    rows = table[table["type"] == name]
    if not len(rows):
        known = ", ".join(list(dict.fromkeys(table["type"]))[:4])
        raise DihedraError(f"the refit {what} table has no type {name!r}; its types are {known}.")
    return rows


def has_target(table, name, column):
    """Whether the refit table holds target values of ``column`` for type ``name``."""
    rows = table[table["type"] == name]
    return bool(len(rows)) and column in rows.columns and np.isfinite(rows[column].to_numpy(float)).any()


def plot_refit_profile(profiles, name, ax=None, legend=True, note=None):
    """Sampled, reweighted and target free-energy profiles of one type (``refit_profiles.csv``),
    with the reweighted error band; fitted bins marked along the bottom. The energy axis ends a
    little above the sampled profile: a target beyond the sampled range is cut there.

    Returns
    -------
    Axes
    """
    from matplotlib.lines import Line2D
    from matplotlib.patches import Patch

    ax = _new_axes(ax)
    rows = _rows(profiles, name, "profiles").sort_values("angle_deg")
    x = rows["angle_deg"].to_numpy(float)
    handles = []
    for source in ("sampled", "reweighted", "target"):
        col = f"{source}_free_energy_kj_mol"
        y = rows[col].to_numpy(float)
        if not np.isfinite(y).any():
            continue
        st = REFIT_STYLES[source]
        if source == "reweighted":
            err = np.nan_to_num(rows["reweighted_free_energy_err_kj_mol"].to_numpy(float))
            ax.fill_between(x, y - err, y + err, step="mid", color=st["color"], alpha=0.25, lw=0, zorder=2)
        ax.step(x, y, where="mid", color=st["color"], ls=st["ls"], lw=1.0, zorder=3)
        handles.append(Line2D([], [], color=st["color"], ls=st["ls"], lw=1.0, label=st["label"]))
    drawn = [rows[f"{s}_free_energy_kj_mol"].to_numpy(float) for s in ("sampled", "reweighted")]
    top = max([float(np.nanmax(y)) for y in drawn if np.isfinite(y).any()] or [1.0])
    ax.set_ylim(min(0.0, ax.get_ylim()[0]), top * 1.25 + 0.5)   # a target beyond the sampled range is cut
    fitted = _as_bool(rows["fitted"]) if "fitted" in rows.columns else np.zeros(len(x), bool)
    if fitted.any():
        width = float(np.median(np.diff(x))) if len(x) > 1 else 10.0
        for xi in x[fitted]:
            ax.axvspan(xi - width / 2, xi + width / 2, ymin=0, ymax=0.025, color=INK, lw=0, zorder=1)
        handles.append(Patch(facecolor=INK, label="fitted bins"))
    _angle_axis(ax.set_xlabel, ax.set_xticks, ax.set_xlim)
    ax.set_ylabel(r"$\mathit{F}$ / kJ mol$^{-1}$")
    if legend:
        _top_legend(ax, handles, note or name, note_colour=INK)
    else:
        _note(ax, note or name, colour=INK)
    return ax


def plot_refit_populations(populations, name, ax=None, legend=True, note=None):
    """Target, sampled and reweighted state populations of one type (``refit_populations.csv``)
    as grouped bars with error bars.

    Returns
    -------
    Axes
    """
    from matplotlib.patches import Patch

    ax = _new_axes(ax)
    rows = _rows(populations, name, "populations")
    states = rows["state"].astype(str).tolist()
    x = np.arange(len(states), dtype=float)
    handles = []
    for k, source in enumerate(("target", "sampled", "reweighted")):
        y = rows[f"{source}_population"].to_numpy(float)
        if not np.isfinite(y).any():
            continue
        err = np.nan_to_num(rows[f"{source}_population_err"].to_numpy(float))
        st = REFIT_STYLES[source]
        fill = "white" if source == "target" else st["color"]
        ax.bar(x + (k - 1) * 0.27, np.nan_to_num(y), 0.25, yerr=err, color=fill, edgecolor=st["color"],
               hatch="////" if source == "target" else None, lw=0.6, ecolor=INK, zorder=2)
        handles.append(Patch(facecolor=fill, edgecolor=st["color"], hatch="////" if source == "target" else None,
                             label=st["label"]))
    ax.set_xticks(x)
    ax.set_xticklabels(states, fontsize=6.0)
    ax.tick_params(axis="x", length=0)
    ax.set_ylim(0, 1.0)
    ax.set_ylabel(POPULATION_LABEL)
    ax.yaxis.grid(True, color="#E3E7EA", lw=0.5, zorder=0)
    if legend:
        _top_legend(ax, handles, note or name, note_colour=INK)
    else:
        _note(ax, note or name, colour=INK)
    return ax


def plot_correction(correction, name, ax=None, note=None):
    """The fitted correction of one type (``refit_correction.csv``) with its bootstrap band.

    Returns
    -------
    Axes
    """
    ax = _new_axes(ax)
    rows = _rows(correction, name, "correction").sort_values("angle_deg")
    x = rows["angle_deg"].to_numpy(float)
    y = rows["delta_v_kj_mol"].to_numpy(float)
    err = np.nan_to_num(rows["delta_v_err_kj_mol"].to_numpy(float))
    ax.fill_between(x, y - err, y + err, color=OKABE_ITO["vermillion"], alpha=0.25, lw=0, zorder=2)
    ax.plot(x, y, color=OKABE_ITO["vermillion"], lw=1.1, zorder=3)
    _angle_axis(ax.set_xlabel, ax.set_xticks, ax.set_xlim)
    ax.set_ylabel(r"$\Delta\mathit{V}$ / kJ mol$^{-1}$")
    _note(ax, note or "correction (minimum 0) ± 1 s.e.", colour=INK)
    return ax
