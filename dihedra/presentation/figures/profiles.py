r"""Figure 3: free-energy profiles, with the static scan overlaid when the folder holds a comparison."""

from __future__ import annotations

import numpy as np

from ...errors import DihedraError
from .common import (_angle_axis, _as_bool, _energy_suffix, _new_axes, _note, _shade_sectors, _top_legend,
                     energy_columns, sector_spans)
from .style import INK, NEUTRAL, _darker, state_colours


#: The legend's words for a profile without errors (its samples lie in one block: a single frame).
NO_ERROR_BAND = "no error band: one frame"


def select_profile(profiles, name, estimate="histogram"):
    """Rows of one profile of ``profiles.csv``: a type (pooled rows) or a torsion label."""
    torsion = profiles["torsion"].astype(object).where(profiles["torsion"].notna(), "").astype(str)
    est = profiles["estimate"] == estimate if "estimate" in profiles.columns else True
    rows = profiles[est & (profiles["type"] == name) & (torsion == "")]
    if not len(rows):
        rows = profiles[est & (torsion == name)]
    if not len(rows):
        known = list(dict.fromkeys(profiles["type"]))[:4]
        raise DihedraError(f"profiles.csv has no {estimate} profile of {name!r}; give a type (e.g. "
                           f"{', '.join(known)}) or a torsion label.")
    return rows.sort_values("angle_deg")


def has_profile_errors(profiles, name, estimate="histogram"):
    """Whether the profile ``name`` of ``profiles.csv`` has an error in some sampled bin (none: its
    samples lie in one block of frames, a single frame)."""
    rows = select_profile(profiles, name, estimate)
    _, err_col, _ = energy_columns(rows)
    return bool(err_col) and bool(np.isfinite(rows.loc[_as_bool(rows["sampled"]), err_col].to_numpy(float)).any())


def _runs(mask):
    """Start and stop indices of the runs of True in a boolean array."""
    m = np.r_[False, np.asarray(mask, dtype=bool), False].astype(np.int8)
    d = np.diff(m)
    return list(zip(np.flatnonzero(d == 1), np.flatnonzero(d == -1)))


def _convert_energy(values, from_suffix, to_suffix, temperature_k):
    """Energies between the column units kj_mol, kcal_mol and kt (kt needs the temperature)."""
    from ...units import from_kj_mol, to_kj_mol

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


def plot_profile(profiles, scheme, name, estimate="histogram", scan=None, ax=None, legend=True,
                 temperature_k=None):
    """Figure 3: a free-energy profile with its error band, state sectors shaded, unsampled regions
    marked, and the static scan overlaid when the folder holds a comparison. A profile without errors
    (a single frame: empty errors in ``profiles.csv``) has no band, and its legend says so
    (:data:`NO_ERROR_BAND`).

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
    if "type" in rows and len(rows):   # a set of schemes: the arcs of this type's own scheme
        scheme = scheme.for_type(str(rows["type"].iloc[0]))
    col, err_col, unit = energy_columns(rows)
    x = rows["angle_deg"].to_numpy(float)
    sampled = _as_bool(rows["sampled"])
    f = np.where(sampled, rows[col].to_numpy(float), np.nan)
    has_errors = has_profile_errors(rows, name, estimate)   # (none: a single frame, nothing to resample)
    err = np.nan_to_num(rows[err_col].to_numpy(float)) if has_errors else np.zeros_like(f)
    _shade_sectors(ax, scheme)
    width = float(np.median(np.diff(x))) if len(x) > 1 else 360.0
    step = "mid" if estimate == "histogram" else None
    if has_errors:
        ax.fill_between(x, f - err, f + err, step=step, color=NEUTRAL, alpha=0.4, lw=0, zorder=2)
    if step:
        ax.step(x, f, where="mid", color=INK, lw=1.0, zorder=3)
    else:
        ax.plot(x, f, color=INK, lw=1.0, zorder=3)
    handles = [Line2D([], [], color=INK, lw=1.0, label="sampled"),
               Patch(facecolor=NEUTRAL, alpha=0.4, edgecolor="none", label="± 1 s.e.") if has_errors else
               Patch(facecolor="none", edgecolor="none", label=NO_ERROR_BAND)]
    top = float(np.nanmax(f + err)) if np.isfinite(f).any() else 1.0
    top = _draw_scan(ax, scan, name, col, x, f, temperature_k, handles, top)
    _hatch_unsampled(ax, x, sampled, width, handles)
    _angle_axis(ax.set_xlabel, ax.set_xticks, ax.set_xlim, name)
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


def _draw_scan(ax, scan, name, col, x, f, temperature_k, handles, top):
    """Overlay the static scan's aligned prediction of ``name`` (dashed, converted to the profile's
    energy unit) and add its legend entry; returns the top of the energy axis, raised to the scan
    where the profile is sampled."""
    from matplotlib.lines import Line2D

    if scan is None or not len(scan) or "type" not in scan.columns:
        return top
    srows = scan[scan["type"] == name].sort_values("angle_deg")
    scol = [c for c in srows.columns if c.startswith("scan_free_energy_")]
    if not (len(srows) and scol):
        return top
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
    return top


def _hatch_unsampled(ax, x, sampled, width, handles):
    """Hatch the runs of unsampled bins (bins ``width`` wide) and add their legend entry."""
    from matplotlib.patches import Patch

    runs = _runs(~sampled)
    for a, b in runs:
        ax.axvspan(x[a] - width / 2, x[b - 1] + width / 2, facecolor="white", edgecolor=NEUTRAL,
                   hatch="/////", lw=0, zorder=1)
    if runs:
        handles.append(Patch(facecolor="white", edgecolor=NEUTRAL, hatch="/////", lw=0, label="unsampled"))
