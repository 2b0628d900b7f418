r"""Figure 8: convergence of the state populations (running population per replica against time)."""

from __future__ import annotations

import numpy as np

from ...errors import DihedraError
from .common import _new_axes, _note, _replica_info, _time_label, _top_legend, time_scale
from .style import INK, NEUTRAL, state_colours

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
    cols, final = _columns_of(result, name)
    info = _replica_info(result.summary)
    time_known = all(dt is not None for _, dt in info)
    tmax = max((n * (dt or 1.0) for n, dt in info), default=1.0)
    scale, unit = time_scale(tmax) if time_known else (1.0, "frames")
    colours = state_colours(result.scheme)
    reps = _draw_running(ax, result, cols, info, scale, colours)
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


def _columns_of(result, name):
    """Torsion columns of a type or torsion label, and its final populations table."""
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
    return cols, final


def _draw_running(ax, result, cols, info, scale, colours):
    """Running population of each state per replica from the block counts; returns the replicas."""
    blocks = result.blocks
    counts = np.asarray(blocks["state_counts"], dtype=float)[:, cols, :].sum(axis=1)
    rep = np.asarray(blocks["block_replica"])
    nframes = np.asarray(blocks["block_frames"], dtype=float)
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
    return reps
