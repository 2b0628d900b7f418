r"""Figure 5: the 2-D free-energy map of a torsion pair (periodic axes, contours)."""

from __future__ import annotations

import numpy as np

from ...errors import DihedraError
from .common import _energy_suffix, _new_axes, _note, energy_columns
from .style import UNSAMPLED_COLOUR


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
    xa, xb, f = _map_grid(rows, col)
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
    short = _map_axes(ax, pair)
    if colorbar:
        _map_colorbar(ax, mesh, cs, levels, unit)
    unit_text = {"kj_mol": "kJ/mol", "kcal_mol": "kcal/mol", "kt": "kT"}[_energy_suffix(col)]
    names = "" if short else f"$\\varphi_1$: {pair[0]}; $\\varphi_2$: {pair[1]}. "
    _note(ax, f"{names}Contours every {step:g} {unit_text}; light grey: unsampled")
    return ax


def _map_grid(rows, col):
    """The pair's energies on the grid of bin centres: (angles a, angles b, F[b, a]), NaN where unsampled."""
    xa = np.sort(rows["angle_a_deg"].unique())
    xb = np.sort(rows["angle_b_deg"].unique())
    grid = rows.pivot_table(index="angle_b_deg", columns="angle_a_deg", values=col, dropna=False)
    grid = grid.reindex(index=xb, columns=xa)
    sampled = rows.pivot_table(index="angle_b_deg", columns="angle_a_deg", values="sampled", aggfunc="max",
                               dropna=False).reindex(index=xb, columns=xa)
    f = grid.to_numpy(float)
    return xa, xb, np.where(sampled.fillna(False).to_numpy(bool), f, np.nan)


def _map_axes(ax, pair):
    """Periodic angle axes named after the pair (phi_1, phi_2 when the labels are long); returns
    whether the labels were short enough to name the axes."""
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
    return short


def _map_colorbar(ax, mesh, cs, levels, unit):
    cb = ax.figure.colorbar(mesh, ax=ax, fraction=0.06, pad=0.03, aspect=22)
    cb.set_label(rf"$\mathit{{F}}$ / {unit}")
    cb.outline.set_linewidth(0.5)
    if cs is not None:
        cb.add_lines(cs)
    cb.set_ticks(levels[::max(1, int(np.ceil(len(levels) / 6)))])
