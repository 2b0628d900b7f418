r"""The rule that keeps a rare state visible in the state raster (figure 2).

A protein's raster has hundreds of rows in a few centimetres, so a row is less than a pixel high,
and a column may hold hundreds of frames. A torsion in a state that the other torsions of its
group do not take (the one cis ω of a chain, a rare rotamer) would be lost twice: in its column to
the most frequent state, and between its neighbouring rows when the image is drawn. Here:

* a state is *rare* in a group of rows (all ω of a protein, or one torsion type) when it holds
  under :data:`RARE_SHARE` of the frames of those torsions of the group that can take it (a set
  of schemes gives a proline χ2 states that no other χ2 has: they are compared with prolines only);
* in a column of many frames, a rare state takes the cell where it holds at least
  :data:`RARE_COLUMN_SHARE` of the frames; every other cell keeps its most frequent state;
* cells in a rare state are drawn once more over the raster, at least :data:`RARE_MIN_PT` thick
  and long, so that they survive rows and columns thinner than a pixel;
* when there are more rows than the raster draws, the rows that visit a rare state are kept
  besides the evenly spaced ones (:func:`rare_rows`, from ``populations.csv``).

A rare state is therefore drawn larger than its share: the figure's note says which states were
so drawn. Without a rare state the raster is the plain most-frequent-state raster.

Examples
--------
>>> import numpy as np
>>> counts = np.zeros((100, 1, 3), dtype=int)   # 100 rows, 1 column, undefined + 2 states
>>> counts[:, 0, 1] = 10                          # every row: 10 frames in state 0 ...
>>> counts[7, 0] = (0, 0, 10)                     # ... but row 7 in state 1 (1 % of the frames)
>>> rare = rare_states(counts, ["omega"] * 100)
>>> np.flatnonzero(rare[:, 1]).tolist(), bool(rare[:, 0].any())
([7], False)
"""

from __future__ import annotations

import numpy as np

#: A state is rare in its group of rows below this share of the frames of the group's torsions
#: that can take it.
RARE_SHARE = 0.02
#: A rare state takes a cell (a column of a row) where it holds at least this share of the frames.
RARE_COLUMN_SHARE = 0.25
#: Least thickness and length (points) of a cell in a rare state as drawn.
RARE_MIN_PT = 1.0


def rare_states(counts, groups, allowed=None, representative=None):
    """The rare states of every row: those rare in the row's group that the row visits.

    Parameters
    ----------
    counts : ndarray, shape (n_rows, n_columns, n_states + 1)
        Frames of each row in each column in each state (index 0: undefined, k + 1: state k).
    groups : sequence
        Group of each row (the torsion name in a raster grouped by name, else the type).
    allowed : ndarray of bool, shape (n_rows, n_states), optional
        States each row's type can take (default: all).
    representative : ndarray of bool, shape (n_rows,), optional
        Rows that stand for their group in the shares (default: all); rows kept only because
        they are in a rare state are left out, lest they make it common.

    Returns
    -------
    ndarray of bool, shape (n_rows, n_states)
        ``True`` where the row visits the state and the state is rare in the row's group.
    """
    per_row = counts[:, :, 1:].sum(axis=1).astype(float)          # frames of each row in each state
    n_rows, n_states = per_row.shape
    allowed = np.ones((n_rows, n_states), bool) if allowed is None else np.asarray(allowed, bool)
    weight = np.ones(n_rows, bool) if representative is None else np.asarray(representative, bool)
    groups = np.asarray([str(g) for g in groups], dtype=object)
    rare = np.zeros((n_rows, n_states), bool)
    for g in dict.fromkeys(groups):
        rows = groups == g
        use = rows & weight
        frames = per_row[use].sum(axis=0)
        possible = (per_row[use].sum(axis=1)[:, None] * allowed[use]).sum(axis=0)
        with np.errstate(invalid="ignore", divide="ignore"):
            share = np.where(possible > 0, frames / possible, 0.0)
        rare_here = share < RARE_SHARE
        rare[rows] = rare_here[None, :] & allowed[rows] & (per_row[rows] > 0)
    return rare


def reduce_columns(counts, rare=None):
    """The state drawn in every cell: the most frequent state of its frames (ties: the lower
    code; -1 where undefined frames are the most or there are none), except that a rare state of
    the row takes the cell where it holds at least :data:`RARE_COLUMN_SHARE` of its frames (of
    several, the one with most frames).

    Parameters
    ----------
    counts : ndarray, shape (n_rows, n_columns, n_states + 1)
        As in :func:`rare_states`.
    rare : ndarray of bool, shape (n_rows, n_states), optional
        From :func:`rare_states`; None: the plain most frequent state.

    Returns
    -------
    ndarray of int8, shape (n_rows, n_columns)
    """
    states = counts[:, :, 1:]
    total = counts.sum(axis=2)
    mode = states.argmax(axis=2).astype(np.int8)
    mode[(counts[:, :, 0] > states.max(axis=2)) | (total == 0)] = -1
    if rare is None or not rare.any():
        return mode
    rows = np.flatnonzero(rare.any(axis=1))   # only the rows that visit a rare state
    rare_counts = np.where(rare[rows, None, :], states[rows], 0)
    takes = rare_counts.max(axis=2) >= np.maximum(RARE_COLUMN_SHARE * total[rows], 1)
    sub = mode[rows]
    sub[takes] = rare_counts.argmax(axis=2)[takes]
    mode[rows] = sub
    return mode


def rare_cells(codes, rare):
    """Mask of the cells of ``codes`` (n_rows, n_columns) whose state is rare for their row."""
    if rare is None or not rare.size:
        return np.zeros(codes.shape, bool)
    rows = np.broadcast_to(np.arange(codes.shape[0])[:, None], codes.shape)
    return (codes >= 0) & rare[rows, np.maximum(codes, 0)]


def rare_runs(codes, rare):
    """Runs of cells in one rare state along each row: ``[(row, first_column, last_column, code)]``."""
    mask = rare_cells(codes, rare)
    runs = []
    for r in np.flatnonzero(mask.any(axis=1)):
        cols = np.flatnonzero(mask[r])
        row = codes[r, cols]
        breaks = np.flatnonzero((np.diff(cols) != 1) | (np.diff(row) != 0)) + 1
        for part in np.split(np.arange(len(cols)), breaks):
            runs.append((int(r), int(cols[part[0]]), int(cols[part[-1]]), int(row[part[0]])))
    return runs


def rare_rows(populations, labels, groups, limit):
    """Rows to keep when a raster is thinned, because they visit a rare state: the torsions of
    ``labels`` with a population in a state rare in their group (:data:`RARE_SHARE` of the
    populations of the group's torsions that have the state), most first, at most ``limit``.

    Parameters
    ----------
    populations : DataFrame or None
        ``populations.csv`` (torsion, state, population; each torsion has rows of its own states).
    labels, groups : sequence
        The torsions chosen for the raster and their groups, before thinning.
    limit : int

    Returns
    -------
    (ndarray of int, int)
        Indices into ``labels`` of the rows kept (ascending), and how many rows visit a rare state.
    """
    if populations is None or not len(populations) or limit <= 0:
        return np.zeros(0, dtype=np.int64), 0
    pops = populations[["torsion", "state", "population"]]
    index = {lab: k for k, lab in enumerate(labels)}
    pops = pops[pops["torsion"].isin(index)].copy()
    pops["group"] = [str(groups[index[t]]) for t in pops["torsion"]]
    share = pops.groupby(["group", "state"])["population"].transform("mean")
    visits = pops[(share < RARE_SHARE) & (pops["population"] > 0)]
    most = visits.groupby("torsion")["population"].max().sort_values(ascending=False, kind="stable")
    chosen = np.sort(np.array([index[t] for t in most.index[:int(limit)]], dtype=np.int64))
    return chosen, len(most)
