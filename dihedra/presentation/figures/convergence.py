r"""Figure 8: convergence of the state populations: running population per replica against time, with
the forward and backward populations of ``convergence_over_time.csv`` and their errors."""

from __future__ import annotations

import numpy as np

from ...errors import DihedraError
from ...io.tables import read_optional_table
from .common import _new_axes, _note, _replica_info, _time_label, _top_legend, time_scale
from .style import INK, NEUTRAL, state_colours

REPLICA_STYLES = ("-", (0, (4, 1.5)), (0, (1, 1.2)), (0, (4, 1.2, 1, 1.2)))


def plot_convergence(result, name, ax=None, legend=True, over_time=None):
    """Figure 8: each state population against simulation time, per replica, with the error band,
    and the forward and backward populations with their errors.

    Lines: the running population of each state (cumulative over the blocks of the pass, so the
    value at time t uses the frames up to t) for each replica; band: the final pooled population
    with its standard error (``populations_by_type.csv``, or ``populations.csv`` for a torsion).
    For a type, filled circles: the forward populations (frames from the start up to t) at t;
    open squares: the backward populations (frames from t to the end) at t, each ± 1 standard
    error (``convergence_over_time.csv``, pooled over the replicas): where the start drifts, the
    two disagree.

    Parameters
    ----------
    result : TrackResult
        From :func:`dihedra.io.resultsdir.load_results`.
    name : str
        Torsion type or torsion label.
    over_time : DataFrame, optional
        The forward/backward table (default: ``convergence_over_time.csv`` of the result's
        folder, when there is one).

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
    own = result.scheme.states_of_type(_type_of(result, name))   # a set of schemes: this type's states
    reps = _draw_running(ax, result, cols, info, scale, colours, own)
    marked = _draw_forward_backward(ax, result, name, over_time, scale if time_known else None, colours)
    banded = False
    for row in final.itertuples(index=False):
        c = colours.get(row.state, NEUTRAL)
        p, e = float(row.population), float(row.population_err)
        if np.isfinite(e):
            ax.axhspan(p - e, p + e, color=c, alpha=0.25, lw=0, zorder=1)
            banded = True
        ax.axhline(p, color=c, lw=0.5, alpha=0.9, zorder=1)
    ax.set_xlim(0, tmax * scale)
    ax.set_ylim(0, 1)
    ax.set_xlabel(_time_label(unit, time_known))
    ax.set_ylabel("running population")
    note = f"{name}. Lines: running population" + (" per replica" if len(reps) > 1 else "") + \
        ("; bands: final population ± 1 s.e." if banded else "; thin lines: final population (no error)") + \
        ("; ● forward (start to t), □ backward (t to end) ± 1 s.e." if marked else "")
    if legend:
        handles = [Line2D([], [], color=colours[s], lw=1.2, label=s) for s in result.scheme.labels if s in own]
        if len(reps) > 1:
            handles += [Line2D([], [], color=INK, lw=0.9, ls=REPLICA_STYLES[j % len(REPLICA_STYLES)],
                               label=f"replica {r + 1}") for j, r in enumerate(reps[:len(REPLICA_STYLES)])]
        _top_legend(ax, handles, note)
    else:
        _note(ax, note)
    return ax


def _draw_forward_backward(ax, result, name, over_time, scale, colours):
    """Forward populations (filled circles at the end of their frames) and backward ones (open
    squares at their start), ± 1 s.e.; whether any were drawn (only for a type, on a time axis)."""
    if over_time is None and getattr(result, "folder", None):
        over_time = read_optional_table(result.folder, "convergence_over_time.csv")
    if over_time is None or scale is None or not len(over_time):
        return False
    sub = over_time[over_time["type"] == name]
    for (state, direction), part in sub.groupby(["state", "direction"], sort=False):
        c = colours.get(state, NEUTRAL)
        forward = direction == "forward"
        x = (part["to_ps"] if forward else part["from_ps"]).to_numpy(float) * scale
        y, e = part["population"].to_numpy(float), part["population_err"].to_numpy(float)
        ax.errorbar(x, y, yerr=np.where(np.isfinite(e), e, 0.0), fmt="none", ecolor=c, elinewidth=0.7,
                    capsize=1.5, zorder=4)
        ax.scatter(x, y, s=9, marker="o" if forward else "s", facecolors=c if forward else "white",
                   edgecolors=c, linewidths=0.7, zorder=5)
    return len(sub) > 0


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


def _type_of(result, name):
    """The torsion type of a type or torsion label."""
    labels = list(result.torsion_set.labels)
    return result.torsion_set.types[labels.index(name)] if name in labels else name


def _draw_running(ax, result, cols, info, scale, colours, states):
    """Running population of each of ``states`` per replica from the block counts; returns the replicas."""
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
            if s not in states:
                continue
            ax.plot(t[ok], c[ok, k] / tot[ok], color=colours[s], lw=0.9,
                    ls=REPLICA_STYLES[j % len(REPLICA_STYLES)], zorder=3)
    return reps
