r"""Figure 5: the 2-D free-energy map of a torsion pair (periodic axes, contours)."""

from __future__ import annotations

import numpy as np

from ...errors import DihedraError
from .common import _energy_suffix, _new_axes, _note, energy_columns, torsion_symbol
from .style import UNSAMPLED_COLOUR


def _nice_step(span, max_levels=10):
    for step in (0.5, 1.0, 2.0, 2.5, 5.0, 10.0, 20.0, 25.0, 50.0):
        if span / step <= max_levels:
            return step
    return span / max_levels


#: The ceiling of the colour scale of 2-D maps, in kJ/mol (6 kT at 300 K: a bin that much above the
#: lowest holds 0.25 % of its density): higher sampled bins take the top colour.
MAP_CEILING_KJ_MOL = 15.0
_CEILINGS = {"kj_mol": MAP_CEILING_KJ_MOL, "kcal_mol": MAP_CEILING_KJ_MOL / 4.184, "kt": 6.0}


def map_colormap():
    """The colour map of 2-D free-energy maps: dark blue at the lowest free energy, fading through
    green to a pale yellow at the ceiling (matplotlib's YlGnBu, reversed, without its near-white
    end), so that the eye goes to the basins and not to the rarest bins."""
    from matplotlib import colormaps
    from matplotlib.colors import ListedColormap

    base = colormaps["YlGnBu_r"]
    return ListedColormap(base(np.linspace(0.0, 0.88, 256)), name="dihedra-basins")


def plot_free_energy_map(profiles_2d, pair=None, ax=None, level_step=None, max_level=None, colorbar=True):
    """Figure 5: the 2-D free-energy map of a torsion pair, periodic axes, contours.

    The colours run from dark (the lowest free energy, the basins) to pale (the ceiling): at most
    :data:`MAP_CEILING_KJ_MOL` kJ/mol (3.6 kcal/mol, or 6 kT) above the minimum, and no higher
    than the highest sampled bin; bins above the ceiling take the top colour (the colour bar's
    arrow), and unsampled bins are hatched, as in the 1-D profiles. The ceiling is stated on the
    figure.

    Parameters
    ----------
    profiles_2d : DataFrame
        ``profiles_2d.csv``.
    pair : (str, str), optional
        ``(torsion_a, torsion_b)`` as written there (default the first pair).
    level_step : float, optional
        Spacing of the contour levels in the table's energy unit (default: 0.5, 1, 2, 2.5, 5 ...,
        at most ten levels up to the ceiling).
    max_level : float, optional
        The ceiling: highest contour and top of the colour scale, in the table's unit.

    Returns
    -------
    Axes
    """
    from matplotlib.patches import Rectangle

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
    suffix = _energy_suffix(col)
    xa, xb, f = _map_grid(rows, col)
    fmax = float(np.nanmax(f)) if np.isfinite(f).any() else 1.0
    ceiling = _CEILINGS[suffix]
    top = float(max_level) if max_level is not None else min(fmax, ceiling)
    capped = fmax > top * (1 + 1e-9)
    step = float(level_step) if level_step else _nice_step(top)
    levels = np.arange(0.0, top + 1e-9, step)
    wa, wb = (xa[1] - xa[0]) if len(xa) > 1 else 360.0, (xb[1] - xb[0]) if len(xb) > 1 else 360.0
    ea = np.r_[xa - wa / 2, xa[-1] + wa / 2]
    eb = np.r_[xb - wb / 2, xb[-1] + wb / 2]
    ax.add_patch(Rectangle((-180, -180), 360, 360, facecolor="white", edgecolor=UNSAMPLED_COLOUR, hatch="/////",
                           lw=0, zorder=0))
    cmap = map_colormap().with_extremes(bad=(0, 0, 0, 0), over=map_colormap()(1.0))
    mesh = ax.pcolormesh(ea, eb, np.ma.masked_invalid(f), cmap=cmap, vmin=0, vmax=top, shading="flat",
                         rasterized=True, zorder=1)
    cs = _periodic_contours(ax, xa, xb, f, wa, wb, levels, top)
    short = _map_axes(ax, pair)
    if colorbar:
        _map_colorbar(ax, mesh, cs, levels, unit, capped)
    unit_text = {"kj_mol": "kJ/mol", "kcal_mol": "kcal/mol", "kt": "kT"}[suffix]
    names = "" if short else f"{_symbols(pair)[0]}: {pair[0]}; {_symbols(pair)[1]}: {pair[1]}. "
    scale = (f"colours up to {top:g} {unit_text} above the minimum, higher bins in the top colour; " if capped
             else f"colours up to the highest sampled bin, {top:.3g} {unit_text}; ")
    _note(ax, f"{names}{scale}contours every {step:g} {unit_text}; hatched: unsampled")
    return ax


def _periodic_contours(ax, xa, xb, f, wa, wb, levels, top):
    """Contours on the periodic grid: padded by one wrapped cell on every side, so that lines run
    through the edges; white over the dark low half of the scale, dark over the pale upper half."""
    from .style import INK

    if len(levels) <= 1 or np.isfinite(f).sum() <= 3:
        return None
    fp = np.pad(f, 1, mode="wrap")
    xp = np.r_[xa[0] - wa, xa, xa[-1] + wa]
    yp = np.r_[xb[0] - wb, xb, xb[-1] + wb]
    colours = ["white" if lv < 0.5 * top else INK for lv in levels[1:]]
    return ax.contour(xp, yp, np.ma.masked_invalid(fp), levels=levels[1:], colors=colours, linewidths=0.45,
                      alpha=0.8, zorder=2)


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


def _symbols(pair):
    """The axis symbols of a pair: the torsions' own (ψ, φ, χ1 ...) when they differ, else numbered
    (φ1, φ2)."""
    a, b = torsion_symbol(pair[0]), torsion_symbol(pair[1])
    if a != b:
        return a, b
    return a[:-1] + "_1$", b[:-1] + "_2$"


def _map_axes(ax, pair):
    """Periodic angle axes named by the pair's symbols (with the residue where the torsions are
    named biopolymer ones: "φ (ALA) / deg"); returns whether the axis labels name the torsions
    (else the note does)."""
    ax.set_xlim(-180, 180)
    ax.set_ylim(-180, 180)
    ticks = [-180, -90, 0, 90, 180]
    ax.set_xticks(ticks)
    ax.set_yticks(ticks)
    sa, sb = _symbols(pair)
    owners = [str(p).rpartition(":")[0] for p in pair]
    named = torsion_symbol(pair[0]) != torsion_symbol(pair[1]) and all(owners) and max(len(o) for o in owners) <= 12
    if named:
        ax.set_xlabel(f"{sa} ({owners[0]}) / deg")
        ax.set_ylabel(f"{sb} ({owners[1]}) / deg")
    else:
        ax.set_xlabel(f"{sa} / deg")
        ax.set_ylabel(f"{sb} / deg")
    for side in ("top", "right"):
        ax.spines[side].set_visible(True)
    return named


def _map_colorbar(ax, mesh, cs, levels, unit, capped):
    cb = ax.figure.colorbar(mesh, ax=ax, fraction=0.06, pad=0.03, aspect=22, extend="max" if capped else "neither")
    cb.set_label(rf"$\mathit{{F}}$ / {unit}")
    cb.outline.set_linewidth(0.5)
    if cs is not None:
        cb.add_lines(cs)
    cb.set_ticks(levels[::max(1, int(np.ceil(len(levels) / 6)))])
