r"""Figure 9: predicted against experimental 3J couplings."""

from __future__ import annotations

import numpy as np
import pandas as pd

from ...errors import DihedraError
from .common import _as_bool, _new_axes, _note
from .style import INK, NEUTRAL, OKABE_ITO

RELATION_MARKERS = ("o", "s", "D", "^", "v", "P")


def _first_column(frame, candidates):
    for c in candidates:
        if c in frame.columns:
            return c
    return None


def plot_couplings(couplings, ax=None, label_outliers=True, legend=True):
    """Figure 9: predicted against experimental 3J couplings with error bars and the identity line.

    Parameters
    ----------
    couplings : DataFrame
        ``couplings_vs_experiment.csv`` of ``dihedra couplings --experimental``: ``j_hz`` (predicted,
        with the statistical error ``j_err_hz`` and the relation's own spread ``j_systematic_hz``),
        ``j_exp_hz`` with ``j_exp_err_hz``, ``outlier``, ``label`` and ``relation``. Rows without a
        prediction (unmatched labels) are left out.

    Dark error bars are statistical (and experimental) errors; the pale, wider vertical bars add
    the relation's systematic spread. Outliers are drawn in vermillion and named.

    Returns
    -------
    Axes
    """
    ax = _new_axes(ax, height_in=3.0)
    pred = _first_column(couplings, ["j_hz", "predicted_j_hz"])
    exp = _first_column(couplings, ["j_exp_hz", "experimental_j_hz"])
    if pred is None or exp is None:
        raise DihedraError("the couplings table needs a predicted (j_hz) and an experimental (j_exp_hz) "
                           f"column; it has {', '.join(map(str, couplings.columns))}.")
    data = couplings[np.isfinite(pd.to_numeric(couplings[pred], errors="coerce"))
                     & np.isfinite(pd.to_numeric(couplings[exp], errors="coerce"))]
    if not len(data):
        raise DihedraError("no experimental coupling matched a predicted one; nothing to plot.")

    def col(name, fallback=0.0):
        c = _first_column(data, [name])
        return data[c].to_numpy(float) if c else np.full(len(data), fallback)

    x, y = data[exp].to_numpy(float), data[pred].to_numpy(float)
    xe, ye = np.nan_to_num(col("j_exp_err_hz")), np.nan_to_num(col("j_err_hz"))
    ys = np.sqrt(ye ** 2 + np.nan_to_num(col("j_systematic_hz")) ** 2)
    out = _as_bool(data["outlier"]) if "outlier" in data.columns else np.zeros(len(data), bool)
    rel = data["relation"].astype(str).to_numpy() if "relation" in data.columns else np.full(len(data), "")
    lo = float(min(np.min(x - xe), np.min(y - ys), 0.0)) - 0.5
    hi = float(max(np.max(x + xe), np.max(y + ys))) + 0.8
    ax.plot([lo, hi], [lo, hi], color=NEUTRAL, lw=0.8, ls=(0, (3, 1.6)), zorder=1, label="identity")
    ax.errorbar(x, y, yerr=ys, fmt="none", ecolor="#C9D3DB", elinewidth=2.2, capsize=0, zorder=1.5)
    for k, r in enumerate(dict.fromkeys(rel)):
        for mask, colour in ((~out & (rel == r), OKABE_ITO["blue"]), (out & (rel == r), OKABE_ITO["vermillion"])):
            if mask.any():
                ax.errorbar(x[mask], y[mask], xerr=xe[mask], yerr=ye[mask], fmt=RELATION_MARKERS[k % 6], ms=3.4,
                            color=colour, ecolor=INK, mec=INK, mew=0.4, elinewidth=0.7, capsize=1.2, zorder=3,
                            label=(r or "couplings") if colour == OKABE_ITO["blue"] else f"{r} outliers".strip())
    label_col = _first_column(data, ["label", "torsion"])
    if label_outliers and label_col and out.any():
        for xi, yi, name in zip(x[out], y[out], data.loc[out, label_col]):
            ax.annotate(str(name), (xi, yi), xytext=(3, -7), textcoords="offset points", fontsize=5.5, color=INK)
    ax.set_xlim(lo, hi)
    ax.set_ylim(lo, hi)
    ax.set_aspect("equal")
    ax.set_xlabel(r"experimental $^3\mathit{J}$ / Hz")
    ax.set_ylabel(r"predicted $^3\mathit{J}$ / Hz")
    if legend:
        ax.legend(loc="upper left", fontsize=5.8)
    _note(ax, "dark bars: statistical and experimental errors; pale bars: with the relation's own spread")
    return ax
