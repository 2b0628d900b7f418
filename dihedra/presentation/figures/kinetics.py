r"""Figures 6 and 7: the transition diagram and the dwell times (lifetimes) of the states.

References
----------
E. L. Kaplan & P. Meier, J. Am. Stat. Assoc. 53 (1958) 457 (survival curves of dwell times, as
computed by the kinetics: ``dwell_survival.csv``).
"""

from __future__ import annotations

import numpy as np

from ...errors import DihedraError, one_of
from .common import _new_axes, _note, _note_above, _top_legend
from .style import CYCLIC_PALETTE, INK, NEUTRAL, state_colours

# ----------------------------------------------------------------------------------------------
# 6. Transition diagram
# ----------------------------------------------------------------------------------------------


def plot_transition_diagram(transitions, lifetimes, name, level="type", weight="count", scheme=None, ax=None,
                            max_states=8, min_population=0.002, table=True, max_table_rows=8):
    """Figure 6: states as nodes sized by population, arrows as wide as the transitions observed,
    and a table of the rate constants below.

    Parameters
    ----------
    transitions, lifetimes : DataFrame
        ``transitions.csv`` and ``lifetimes.csv`` of ``dihedra kinetics``.
    name : str
        The torsion label, type or conformer type (column ``name``).
    level : {"type", "torsion", "conformer"}
    weight : {"count", "flux"}
        Arrow widths in proportion to the number of observed transitions ``count`` (default) or
        to the flux, population times rate (``population_counted * rate_per_ps``); never to the
        rate alone, which a single event out of a rarely visited state makes large. Each arrow is
        labelled with its count and an arrow sign along its direction.
    scheme : StateScheme, optional
        For the state colours (states outside the scheme, such as conformers, are grey).
    max_states : int
        At most this many (most populated) states are drawn; the rest is stated on the figure.
    min_population : float
        States below this population (``population_counted``) are left out.
    table : bool
        Below the diagram, a table of the transitions between the drawn states: direction, count
        and rate constant per ns (rounded to its error; an upper limit ``< x (95 %)`` where no
        event was seen). Needs ``ax`` to be a subplot (its place is split in two).
    max_table_rows : int
        The most frequent transitions shown, then those never seen; the rest is counted.

    Returns
    -------
    Axes
        The diagram's axes.
    """
    one_of("arrow weight", weight, ("count", "flux"))
    ax = _new_axes(ax, height_in=3.4 if table else 2.6)
    lt = lifetimes[(lifetimes["level"] == level) & (lifetimes["name"] == name)]
    tr = transitions[(transitions["level"] == level) & (transitions["name"] == name)]
    if not len(lt):
        raise DihedraError(f"lifetimes.csv has no {level} {name!r}.")
    if "population_counted" in lt.columns:
        pops = dict(zip(lt["state"], lt["population_counted"].astype(float)))
    else:
        pops = {s: 1.0 / len(lt) for s in lt["state"]}
    states = [s for s in sorted(pops, key=lambda s: -pops[s]) if pops[s] >= min_population][:max_states]
    if scheme is not None and set(states) <= set(scheme.labels):
        states = [s for s in scheme.labels if s in states]
    left_out = len(pops) - len(states)
    colours = state_colours(scheme) if scheme is not None else {}
    among = tr[tr["from_state"].isin(states) & tr["to_state"].isin(states)]
    if table:
        ax, tab = _split_for_table(ax, min(len(among), max_table_rows + 1))
    pos, radius = _node_layout(states, pops)
    _draw_arrows(ax, among[among["count"] > 0], pos, radius, weight, pops)
    xs, ys, labels = _draw_nodes(ax, states, pos, radius, pops, colours)
    # equal scales by widening the data limits, not by narrowing the axes: the note keeps the
    # width of the figure instead of the width of the drawing
    ax.set_aspect("equal", adjustable="datalim")
    if xs:   # the extent as data limits: fixed limits would fight the equal aspect
        ax.update_datalim([(min(xs) - 0.55, min(ys) - 0.3), (max(xs) + 0.55, max(ys) + 0.3)])
        ax.margins(0)
        ax.autoscale_view()
    ax.axis("off")
    what = "transitions seen" if weight == "count" else "flux (population x rate)"
    note = f"{name}. Arrows: {what} (width), count and direction (label); nodes: population (area)"
    if left_out:
        note += f"; {left_out} rarer state(s) not drawn"
    _note_above(ax, note, labels)
    if table:
        _rate_table(tab, among, max_table_rows)
    return ax


def _split_for_table(ax, n_rows):
    """Replace ``ax`` by two axes in its place: the diagram above, the rate table below."""
    spec = ax.get_subplotspec()
    fig = ax.figure
    if spec is None:
        raise DihedraError("the transition diagram's table needs a subplot to split (or table=False).")
    ax.remove()
    gs = spec.subgridspec(2, 1, height_ratios=[2.5, 0.34 + 0.135 * (n_rows + 1)], hspace=0.0)
    return fig.add_subplot(gs[0]), fig.add_subplot(gs[1])


def _rate_table(tab, tr, max_rows, fontsize=5.8):
    """The transitions as a small table: direction, count, rate constant per ns (rounded to its
    error; ``< x (95 %)`` where none was seen)."""
    from ..rounding import format_rate

    tab.axis("off")
    seen = tr[tr["count"] > 0].sort_values("count", ascending=False, kind="stable")
    never = tr[tr["count"] == 0]
    rows = list(seen.itertuples(index=False)) + list(never.itertuples(index=False))
    shown, rest = rows[:max_rows], len(rows) - max_rows
    header = ("transition", "count", r"$\mathit{k}$ / ns$^{-1}$")
    xs, aligns = (0.0, 0.52, 0.98), ("left", "right", "right")
    step = 1.0 / (len(shown) + 1 + (rest > 0))
    for c, (x, ha) in enumerate(zip(xs, aligns)):
        tab.text(x, 1.0, header[c], ha=ha, va="top", fontsize=fontsize, color=NEUTRAL, transform=tab.transAxes)
    for k, r in enumerate(shown):
        y = 1.0 - (k + 1) * step
        rate = format_rate(r.rate_per_ps, getattr(r, "rate_err_per_ps", np.nan), r.count,
                           getattr(r, "rate_ci_high_per_ps", np.nan), scale=1000.0)
        cells = (f"{r.from_state} \u2192 {r.to_state}", f"{int(r.count)}", rate)
        for c, (x, ha) in enumerate(zip(xs, aligns)):
            tab.text(x, y, cells[c], ha=ha, va="top", fontsize=fontsize, color=INK if r.count else NEUTRAL,
                     transform=tab.transAxes)
    if rest > 0:
        tab.text(0.0, 1.0 - (len(shown) + 1) * step, f"... {rest} more transitions in transitions.csv", ha="left",
                 va="top", fontsize=fontsize, color=NEUTRAL, transform=tab.transAxes)
    if not rows:
        tab.text(0.0, 1.0 - step, "no transition between the drawn states", ha="left", va="top",
                 fontsize=fontsize, color=NEUTRAL, transform=tab.transAxes)


def _node_layout(states, pops):
    """Node centres on a circle (the first state at the top, clockwise) and radii (area ~ population)."""
    n = len(states)
    angles = np.pi / 2 - 2 * np.pi * np.arange(n) / max(n, 1)
    pos = {s: (np.array([np.cos(a), np.sin(a)]) if n > 1 else np.zeros(2)) for s, a in zip(states, angles)}
    pmax = max((pops[s] for s in states), default=1.0)
    r_min, r_max = 0.08, (0.30 if n > 4 else 0.36)
    radius = {s: r_min + (r_max - r_min) * np.sqrt(pops[s] / pmax) for s in states}
    return pos, radius


def _draw_arrows(ax, tr, pos, radius, weight, pops, bend=0.3):
    """One curved arrow per observed transition, its width in proportion to the count (or the
    flux), labelled with the count and an arrow sign pointing the way it goes."""
    from matplotlib.patches import FancyArrowPatch

    w_all = tr["count"].to_numpy(float) if weight == "count" else \
        np.array([pops.get(a, 0.0) for a in tr["from_state"]]) * tr["rate_per_ps"].to_numpy(float)
    wmax = float(np.nanmax(w_all)) if len(w_all) else 1.0
    for row, w in zip(tr.itertuples(index=False), w_all):
        a, b = pos[row.from_state], pos[row.to_state]
        d = b - a
        dist = float(np.linalg.norm(d))
        if dist == 0:
            continue
        u = d / dist
        p0 = a + u * (radius[row.from_state] + 0.04)
        p1 = b - u * (radius[row.to_state] + 0.04)
        lw = 0.5 + 2.6 * w / wmax if wmax > 0 and np.isfinite(w) else 0.5
        ax.add_patch(FancyArrowPatch(
            p0, p1, connectionstyle=f"arc3,rad={bend}", lw=lw, color=INK, alpha=0.85, zorder=2,
            arrowstyle=f"-|>,head_length={2.2 + 0.8 * lw:.1f},head_width={1.3 + 0.5 * lw:.1f}",
            shrinkA=0, shrinkB=0))
        dd = p1 - p0
        normal = np.array([dd[1], -dd[0]])
        mid = (p0 + p1) / 2 + 0.5 * bend * normal + 0.12 * normal / (np.linalg.norm(normal) or 1.0)
        angle = float(np.degrees(np.arctan2(dd[1], dd[0])))
        sign = "\u2192"
        if angle > 90 or angle < -90:   # keep the text upright: turn it and the sign around
            angle, sign = angle - 180 if angle > 90 else angle + 180, "\u2190"
        ax.text(mid[0], mid[1], f"{int(row.count)} {sign}" if sign == "\u2192" else f"{sign} {int(row.count)}",
                fontsize=5.5, ha="center", va="center", color=INK, zorder=4, rotation=angle,
                rotation_mode="anchor")


def _draw_nodes(ax, states, pos, radius, pops, colours):
    """The state circles with their name and population outside; returns the x and y extents and
    the labels."""
    from matplotlib.patches import Circle

    n = len(states)
    xs, ys, labels = [], [], []
    for s in states:
        c = colours.get(s, "#BFC6CC")
        ax.add_patch(Circle(pos[s], radius[s], facecolor=c, edgecolor=INK, lw=0.6, zorder=3))
        outward = pos[s] / (np.linalg.norm(pos[s]) or 1.0) if n > 1 else np.array([0.0, 1.0])
        lp = pos[s] + outward * (radius[s] + 0.07)
        ha = "center" if abs(outward[0]) < 0.3 else ("left" if outward[0] > 0 else "right")
        va = "center" if abs(outward[1]) < 0.3 else ("bottom" if outward[1] > 0 else "top")
        labels.append(ax.text(lp[0], lp[1], f"{s}\n{pops[s]:.2f}", fontsize=6, ha=ha, va=va, color=INK, zorder=4,
                              linespacing=1.05, multialignment="center"))
        xs += [pos[s][0] - radius[s], pos[s][0] + radius[s]]
        ys += [pos[s][1] - radius[s], pos[s][1] + radius[s]]
    return xs, ys, labels


# ----------------------------------------------------------------------------------------------
# 7. Lifetimes
# ----------------------------------------------------------------------------------------------

#: Line style of the exponentials expected from the rates.
_DASHED = (0, (3.5, 1.5))


def _observed_survival(survival, state):
    """The observed survival ``(t, S)`` of one state from the Kaplan-Meier table of the kinetics
    (``dwell_survival.csv``: level, name, state, time_ps, survival; already cut to one level and
    name), or ``None`` when the table has no row of ``state``. Presentation draws the curve the
    kinetics computed; it does not compute one."""
    part = survival[survival["state"] == state]
    if not len(part):
        return None
    return part["time_ps"].to_numpy(dtype=float), part["survival"].to_numpy(dtype=float)


def plot_lifetimes(lifetimes, name, level="type", scheme=None, survival=None, ax=None, legend=True):
    """Figure 7: dwell times (lifetimes) of each state on a log axis, with the exponential expected
    from the rates.

    The dashed line of each state is ``S(t) = exp(-t / tau)``, the fraction of visits still in the
    state after ``t`` if leaving it were memoryless at the total exit rate of the Markov rates,
    ``tau = mean_from_rates_ps``. With the Kaplan-Meier table of the kinetics (``survival``, the
    layout of ``dwell_survival.csv``) the observed survival is drawn as steps.
    Without one, the observed dwell-time summaries of ``lifetimes.csv`` are placed where an
    exponential has them: the median at S = 1/2 and the mean (with its 95 % bootstrap interval) at
    S = 1/e; on the dashed line means memoryless, left of it means faster first exits.

    The time axis ends where the observed dwell times end (a fitted lifetime longer than the run
    does not stretch it; its line runs to the edge), and the legend stands above the axes, so it
    never covers a curve (a state never left is a line along S = 1).

    Returns
    -------
    Axes
    """
    from matplotlib.lines import Line2D

    from ..rounding import format_plain

    ax = _new_axes(ax)
    lt = lifetimes[(lifetimes["level"] == level) & (lifetimes["name"] == name)]
    if not len(lt):
        raise DihedraError(f"lifetimes.csv has no {level} {name!r}.")
    colours = state_colours(scheme) if scheme is not None else {}
    order = [s for s in (scheme.labels if scheme is not None else []) if s in set(lt["state"])]
    order += [s for s in dict.fromkeys(lt["state"]) if s not in order]
    dwell = None
    if survival is not None and len(survival):
        dwell = survival[(survival["level"] == level) & (survival["name"] == name)]
        dwell = dwell if len(dwell) else None
    handles, observed, taus, drawn = [], [], [], []
    for k, s in enumerate(order):
        row = lt[lt["state"] == s].iloc[0]
        c = colours.get(s, CYCLIC_PALETTE[k % len(CYCLIC_PALETTE)])
        tau = float(row.get("mean_from_rates_ps", np.nan))
        curve = _observed_survival(dwell, s) if dwell is not None else None
        observed += _draw_survival(ax, *curve, c) if curve is not None else _draw_summaries(ax, row, c)
        ok = np.isfinite(tau) and tau > 0
        taus.append(tau if ok else np.nan)
        drawn.append((tau, c) if ok else None)
        handles.append(Line2D([], [], color=c, lw=0.9, ls=_DASHED,
                              label=rf"{s}, $\tau$ = {format_plain(tau, 3)} ps" if ok else f"{s} (never left)"))
    finite = [x for x in observed if np.isfinite(x) and x > 0]
    tmax = max(finite) if finite else 3.0 * np.nanmax(taus) if np.isfinite(taus).any() else 1.0
    for item in drawn:
        if item is not None:
            tt = np.linspace(0, tmax * 1.05, 200)
            ax.plot(tt, np.exp(-tt / item[0]), color=item[1], lw=0.9, ls=_DASHED, zorder=2)
    handles += _observed_handles(dwell is not None)
    _survival_axes(ax, tmax)
    note = rf"{name}. Dashed: exp($-t/\tau$), $\tau$ = 1 / (total exit rate)"
    if legend:
        _top_legend(ax, handles, note, fontsize=6.0)
    else:
        _note(ax, note)
    return ax


def _draw_survival(ax, t, surv, colour):
    """The observed survival as steps; returns where it should end on the time axis (its last
    point with S >= 0.02, the bottom of the axis)."""
    ok = surv > 0
    ax.step(np.r_[0.0, t[ok]], np.r_[1.0, surv[ok]], where="post", color=colour, lw=1.0, zorder=3)
    return [float(t[surv >= 0.02].max()) if (surv >= 0.02).any() else float(t.max())]


def _draw_summaries(ax, row, colour):
    """The observed mean (with its 95 % interval) at S = 1/e and the median at S = 1/2 of one
    state's ``lifetimes.csv`` row; returns the times the axis should reach."""
    ends = []
    mean, med = float(row.get("mean_ps", np.nan)), float(row.get("median_ps", np.nan))
    lo, hi = float(row.get("ci_low_ps", np.nan)), float(row.get("ci_high_ps", np.nan))
    if np.isfinite(mean):
        xerr = [[max(mean - lo, 0.0)], [max(hi - mean, 0.0)]] if np.isfinite(lo) and np.isfinite(hi) \
            else None
        ax.errorbar([mean], [np.exp(-1.0)], xerr=xerr, fmt="o", ms=3.4, color=colour, mec=INK, mew=0.4,
                    elinewidth=0.9, capsize=1.6, zorder=4)
        ends.append(hi if np.isfinite(hi) else mean)
    if np.isfinite(med):
        ax.plot([med], [0.5], marker="s", ms=3.2, color="white", mec=colour, mew=1.1, ls="none", zorder=4)
        ends.append(med)
    return ends


def _observed_handles(have_curves):
    """Legend entries of what was observed: the survival curves, or the mean and median markers."""
    from matplotlib.lines import Line2D

    if have_curves:
        return [Line2D([], [], color=NEUTRAL, lw=1.0, label="observed (Kaplan-Meier)")]
    return [Line2D([], [], color=NEUTRAL, marker="o", ms=3.4, mec=INK, mew=0.4, ls="none",
                   label="observed mean, 95% CI (at 1/e)"),
            Line2D([], [], color="white", marker="s", ms=3.2, mec=NEUTRAL, mew=1.1, ls="none",
                   label="observed median (at 1/2)")]


def _survival_axes(ax, tmax):
    """Log axis of the surviving fraction (0.02 to 1) against the dwell time (0 to ``tmax``)."""
    from matplotlib.ticker import FixedLocator, FuncFormatter, NullLocator

    ax.set_yscale("log")
    ax.set_ylim(0.02, 1.2)
    ax.yaxis.set_major_locator(FixedLocator([0.02, 0.05, 0.1, 0.2, 0.5, 1.0]))
    ax.yaxis.set_major_formatter(FuncFormatter(lambda v, _: f"{v:g}"))
    ax.yaxis.set_minor_locator(NullLocator())
    ax.set_xlim(0, tmax * 1.05 if tmax > 0 else 1)
    ax.set_xlabel(r"dwell time $\mathit{t}$ / ps")
    ax.set_ylabel(r"fraction still in state, $\mathit{S}(\mathit{t})$")
