"""State and conformer populations with autocorrelation-aware standard errors.

Functions here turn the block sums of the trajectory pass into tidy tables:

* per torsion: the fraction of (weighted) frames in each state, with the blocking standard error
  (:func:`dihedra.numerics.statistics.blocking_error`), raised for the bias of a run of few
  correlation times with one correlation time fitted per type and state
  (:mod:`dihedra.numerics.blocking_bias`), and the effective sample size it implies;
* per replica: the same for each replica alone;
* per type: the mean over the torsions of a type; its standard error is sqrt(sum se_i^2) / n for
  torsions that are copies of one molecule, and includes the spread between the torsions when they
  differ more than their errors explain (random effects, :mod:`dihedra.numerics.heterogeneity`);
* conformers: the joint state of the torsions of one group, per group and pooled per group type
  (the tuple of torsion types along the chain) in the same way.

An error that cannot be estimated (fewer than two blocks with frames, e.g. a single frame) is
NaN, and so is every pooled error it enters. A state never entered (or never left) in any block
has an error of 0 and ``n_effective`` NaN: the run shows no fluctuation of it at all.
"""

import warnings

import numpy as np
import pandas as pd

from ..errors import name_list
from .heterogeneity import pooled_mean_error
from .statistics import BlockingLevels, blocking_error, short_run_errors

#: Below this many effective samples a population's error bar is itself rough.
MIN_EFFECTIVE_SAMPLES = 20

#: Values per blocking call (bounds the temporary arrays, about 8 MB each).
_WORK_VALUES = 1 << 18


def torsion_populations(state_counts, block_replica, labels, types, state_labels):
    """Per-torsion populations.

    Parameters
    ----------
    state_counts : ndarray, shape (n_blocks, n_torsions, n_states)
    block_replica : ndarray, shape (n_blocks,)
    labels, types : list of str, length n_torsions
    state_labels : sequence of str, length n_states

    Returns
    -------
    DataFrame with columns torsion, type, state, population, population_err, n_effective,
    n_samples
    """
    state_counts = np.asarray(state_counts)
    n_t, n_s = state_counts.shape[1:]
    mean, se, n_eff, n_samples, found = _state_blocking(state_counts, block_replica)
    if found is not None:   # the short-run correction, one correlation time per type and state (copies share it)
        se, n_eff = short_run_errors(mean, se, n_eff, found, _type_state_pools(types, n_s))
    if np.all(n_samples == np.round(n_samples)):  # frame counts (unweighted run)
        n_samples = n_samples.astype(np.int64)
    rows = np.arange(n_t * n_s)
    return pd.DataFrame({
        "torsion": _strings_taken(labels, rows // n_s),
        "type": _strings_taken(types, rows // n_s),
        "state": _strings_taken(state_labels, rows % n_s),
        "population": mean.reshape(-1),
        "population_err": se.reshape(-1),
        "n_effective": n_eff.reshape(-1),
        "n_samples": n_samples.reshape(-1),
    })


def _state_blocking(state_counts, block_replica):
    """Blocking of every (torsion, state) column, a slice of torsions at a time, without the
    short-run correction: mean, se, n_eff, n_samples (n_torsions, n_states) and the joined
    :class:`~dihedra.numerics.statistics.BlockingLevels` (``None`` without torsions)."""
    n_b, n_t, n_s = state_counts.shape
    mean, se, n_eff, n_samples = (np.empty((n_t, n_s)) for _ in range(4))
    step = max(1, _WORK_VALUES // max(1, n_b * n_s))   # (torsions at a time: the errors are per torsion)
    found = []
    for lo in range(0, n_t, step):
        counts = state_counts[:, lo:lo + step].astype(float)
        totals = counts.sum(axis=2, keepdims=True)  # valid frames per block and torsion
        mean[lo:lo + step], se[lo:lo + step], n_eff[lo:lo + step], levels = blocking_error(
            counts, totals, block_replica, short_run=False, levels=True)
        found.append(levels)
        n_samples[lo:lo + step] = totals.sum(axis=0)
    return mean, se, n_eff, n_samples, BlockingLevels.joined(found) if found else None


def _type_state_pools(types, n_states):
    """The pool of every (torsion, state) column: one per type and state."""
    code = pd.factorize(pd.Series(list(types), dtype=object))[0] if len(types) else np.zeros(0, dtype=np.int64)
    return code[:, None] * n_states + np.arange(n_states)[None, :]


def type_state_spans(state_counts, block_replica, types):
    """The length of each replica in correlation times, per torsion type and state: the span fitted
    to the blocking levels of the state's population, the torsions of a type pooled
    (:func:`dihedra.numerics.blocking_bias.corrected_errors`). Returns {type: array (n_states,)},
    NaN where none could be fitted (too few blocks, no state changes, a state never entered)."""
    from .blocking_bias import MIN_LEVELS, corrected_errors

    state_counts = np.asarray(state_counts)
    n_t, n_s = state_counts.shape[1:]
    if not n_t:
        return {}
    _, se, _, _, found = _state_blocking(state_counts, block_replica)
    if len(found.n_blocks) < MIN_LEVELS:
        return {t: np.full(n_s, np.nan) for t in types}
    _, span = corrected_errors(se.reshape(-1), found.se.reshape(len(found.n_blocks), -1), found.n_blocks,
                               found.n_replicas, _type_state_pools(types, n_s).reshape(-1))
    by_torsion = span.reshape(n_t, n_s)
    out = {}
    with warnings.catch_warnings():   # (all-NaN states: NaN, as meant)
        warnings.simplefilter("ignore", RuntimeWarning)
        for t, rows in pd.Series(np.arange(n_t)).groupby(pd.Series(list(types), dtype=object), sort=False):
            out[t] = np.nanmin(by_torsion[rows.to_numpy()], axis=0)
    return out


def type_spans(state_counts, block_replica, types):
    """The shortest over its states of :func:`type_state_spans` of each type ({type: span}, NaN
    where none was fitted)."""
    out = {}
    for t, spans in type_state_spans(state_counts, block_replica, types).items():
        out[t] = float(np.nanmin(spans)) if np.isfinite(spans).any() else np.nan
    return out


def replica_populations(state_counts, block_replica, labels, types, state_labels, pooled=None):
    """Per-torsion populations of each replica alone (columns as above plus ``replica``).

    ``pooled``, the table of :func:`torsion_populations` for the same arguments, is taken as it
    is when there is only one replica (the same blocks give the same numbers)."""
    frames = []
    block_replica = np.asarray(block_replica)
    replicas = np.unique(block_replica)
    if pooled is not None and len(replicas) == 1:
        out = pooled.copy()
        out.insert(0, "replica", int(replicas[0]))
        return out
    for r in replicas:
        sel = block_replica == r
        df = torsion_populations(np.asarray(state_counts)[sel], block_replica[sel], labels, types,
                                 state_labels)
        df.insert(0, "replica", int(r))
        frames.append(df)
    return pd.concat(frames, ignore_index=True)


def pool_by_type(populations, key="type", item="torsion", count_name="n_torsions"):
    """Pool per-item populations per type: the mean over the items, its error, and their
    heterogeneity (:func:`dihedra.numerics.heterogeneity.pooled_mean_error`).

    Parameters
    ----------
    populations : DataFrame
        With columns ``key``, ``item``, ``state``, ``population``, ``population_err``.

    Returns
    -------
    DataFrame
        ``key``, ``state``, ``population``, ``population_err`` (NaN where an item's error is not
        estimable), ``count_name``, ``i_squared`` (fraction), ``cochran_q``, ``cochran_q_p_value``,
        ``between_sd`` (the DerSimonian-Laird between-item standard deviation of the population)
        and ``heterogeneous`` (Cochran's Q below the 5 % level: the error includes the spread
        between the items).
    """
    def agg(g):
        n = g[item].nunique()
        r = pooled_mean_error(g["population"].to_numpy(), g["population_err"].to_numpy())
        return pd.Series({
            "population": g["population"].mean(),
            "population_err": r["se"],
            count_name: n,
            "i_squared": r["i_squared"], "cochran_q": r["q"], "cochran_q_p_value": r["q_p_value"],
            "between_sd": r["tau"], "heterogeneous": r["heterogeneous"],
        })

    order = {s: k for k, s in enumerate(pd.unique(populations["state"]))}
    out = (populations.groupby([key, "state"], sort=False)[[item, "population", "population_err"]]
           .apply(agg).reset_index())
    if out.empty:
        return pd.DataFrame(columns=[key, "state", "population", "population_err", count_name] + POOLED_COLUMNS)
    out[count_name] = out[count_name].astype(int)
    out["heterogeneous"] = out["heterogeneous"].astype(bool)
    out["_o"] = out["state"].map(order)
    out = out.sort_values([key, "_o"], kind="stable", key=natural_order).drop(columns="_o").reset_index(drop=True)
    return out


def natural_order(column):
    """A sort key of a column of names that orders the numbers in them by value (``POPE:C22-...``
    before ``POPE:C210-...``, as a chain runs); other columns as they are (for ``sort_values``)."""
    if column.dtype.kind in "biuf":
        return column
    return column.astype(str).str.replace(r"\d+", lambda m: m.group().zfill(12), regex=True)


#: The heterogeneity columns of pooled tables (see :func:`pool_by_type`).
POOLED_COLUMNS = ["i_squared", "cochran_q", "cochran_q_p_value", "between_sd", "heterogeneous"]


def heterogeneity_notice(pooled, key, what):
    """One sentence naming the pooled rows whose items are heterogeneous (or ``None``)."""
    if pooled.empty or "heterogeneous" not in pooled:
        return None
    het = pooled[pooled["heterogeneous"].astype(bool)]
    if het.empty:
        return None
    names = list(dict.fromkeys(het[key]))
    shown = name_list(names, 8)
    items = "torsions" if key == "type" else "groups"
    return (f"{len(names)} {what} differ between their {items} more than their own error bars explain "
            f"(Cochran's Q, p < 0.05): {shown}. Either the {items} are not equivalent (residues in different "
            "surroundings) or their own errors are too small (a run of few correlation times); their pooled "
            "errors include the spread between them (DerSimonian-Laird; I^2 in the table).")


def conformer_populations(rows, weights, block_replica, n_blocks, groups, members, labels, types,
                          state_labels, resnames, dense=None):
    """Conformer populations per group and pooled per group type.

    Parameters
    ----------
    rows : ndarray (n_rows, 4)
        (global block, group, joint code, frames) from the trajectory pass.
    weights : ndarray (n_rows,)
        Weight sums of the rows (equal to the frames when unweighted).
    block_replica : ndarray (n_blocks,)
    groups : list of str
    members : list of ndarray
        Torsion positions of each group in chain order.
    labels, types, resnames : list of str
        Torsion labels, types and residue names.
    dense : dict, optional
        Classes of groups counted densely by the pass: {width: (group ids, counts of shape
        (n_blocks, n_groups, n_joint), weights of the same shape or ``None`` when unweighted)};
        their groups are not in ``rows``.

    Returns
    -------
    by_group, by_type : DataFrames
        ``by_group`` columns: group, group_type, conformer, torsions, population, population_err,
        n_effective; ``by_type``: group_type, conformer, torsions (types), population,
        population_err, n_groups.
    """
    group_types = [" | ".join(types[p] for p in m) for m in members]
    type_names = _short_type_names(group_types, resnames, members)
    pair_group, pair_code, mean, se, n_eff = _conformer_columns(rows, weights, len(groups), n_blocks,
                                                                block_replica, dense,
                                                                pd.factorize(pd.Series(type_names, dtype=object))[0])
    width = np.array([len(m) for m in members], dtype=np.int64)
    names = np.array(groups, dtype=object)
    joined = np.array(["|".join(labels[p] for p in m) for m in members], dtype=object)
    group_type = np.array(type_names, dtype=object)[pair_group]
    conformer_text, conformer = _conformer_labels(pair_code, width[pair_group], state_labels)
    pooled = _pooled_conformers(group_type, names[pair_group], conformer_text[conformer], mean, se)
    # rows by group name, then by population (largest first; NaN last), ties as they come: the
    # order is found on numbers and the table made once in it (a sort of the finished table copies
    # every column of strings)
    name_rank = np.empty(len(names), dtype=np.int64)
    name_rank[np.argsort(names, kind="stable")] = np.arange(len(names))
    order = np.lexsort((-np.asarray(mean, dtype=float), name_rank[pair_group]))
    by_group = pd.DataFrame({
        "group": _strings_taken(names, pair_group[order]),
        "group_type": _strings_taken(type_names, pair_group[order]),
        "conformer": _strings_taken(conformer_text, conformer[order]),
        "torsions": _strings_taken(joined, pair_group[order]),
        "population": mean[order], "population_err": se[order], "n_effective": n_eff[order],
    })
    return by_group, pooled


def _conformer_columns(rows, weights, n_groups, n_blocks, block_replica, dense, group_type=None):
    """Population, error and effective samples of every observed (group, joint code), in group and
    code order: the sparse rows taken in slices of about _WORK_VALUES block x column cells (memory
    stays bounded), the densely counted classes in their own pieces. The short-run correction of
    the errors is fitted per conformer of a group type (``group_type``: a number per group)."""
    rows = np.asarray(rows, dtype=np.int64).reshape(-1, 4)
    weights = np.asarray(weights, dtype=float)
    order = np.lexsort((rows[:, 2], rows[:, 1]))
    starts = np.searchsorted(rows[order, 1], np.arange(n_groups + 1))
    parts = []
    g0 = 0
    while g0 < n_groups:
        # groups g0..g1-1: their rows are order[starts[g0]:starts[g1]]
        g1 = int(np.searchsorted(starts, starts[g0] + max(1, _WORK_VALUES // max(1, n_blocks)),
                                 side="right")) - 1
        g1 = min(n_groups, max(g1, g0 + 1))
        sel = order[starts[g0]:starts[g1]]
        if len(sel):
            parts.append(_conformer_blocking(rows[sel], weights[sel], g0, g1, n_blocks, block_replica))
        g0 = g1
    del order
    for gids, counts, wts in (dense or {}).values():
        parts.extend(_dense_blocking(gids, counts, wts, block_replica))
    if not parts:
        return (np.empty(0, dtype=np.int64), np.empty(0, dtype=np.int64), np.empty(0), np.empty(0), np.empty(0))
    columns = [np.concatenate(x) for x in zip(*(p[:5] for p in parts))]
    columns[3], columns[4] = _conformer_short_run(columns, parts, group_type)
    if dense:   # the columns in group and code order, as from rows alone
        order = np.lexsort((columns[1], columns[0]))
        columns = [x[order] for x in columns]
    return tuple(columns)


def _conformer_short_run(columns, parts, group_type):
    """Errors and effective samples of the conformer columns raised for a short run
    (:func:`~dihedra.numerics.statistics.short_run_errors`), one correlation time per group type
    and conformer, fitted over the parts whose blocking had the same levels. Each part carries the
    levels of its columns (NaN for a column corrected alone already: a group with empty blocks
    where the others have frames) or ``None`` (all of them corrected alone)."""
    pair_group, pair_code, mean, se, n_eff = (np.array(c) for c in columns)
    kind = (np.zeros(len(pair_group), dtype=np.int64) if group_type is None
            else np.asarray(group_type, dtype=np.int64)[pair_group])
    pool = pd.factorize(pd.Series(kind * (int(pair_code.max(initial=0)) + 1) + pair_code))[0]
    ends = np.cumsum([len(p[0]) for p in parts])
    spans = [np.arange(end - len(p[0]), end) for p, end in zip(parts, ends)]
    alike = {}
    for p, cols in zip(parts, spans):
        if p[5] is not None:
            alike.setdefault(tuple(p[5].n_blocks), []).append((p[5], cols))
    for group in alike.values():
        cols = np.concatenate([c for _, c in group])
        levels = BlockingLevels(np.concatenate([f.se for f, _ in group], axis=1), group[0][0].n_blocks,
                                group[0][0].n_replicas)
        se[cols], n_eff[cols] = short_run_errors(mean[cols], se[cols], n_eff[cols], levels, pool[cols])
    return se, n_eff


def _pooled_conformers(group_type, group, conformer, population, population_err):
    """Conformer populations pooled per group type from the rows of the per-group table (in the
    pass's order: by group, then code): every group of a type contributes to every conformer seen
    in that type (0 if unseen). The columns of :func:`pool_by_type`, computed on a (groups x
    conformers) grid per type (no table of every group and conformer is made)."""
    columns = ["group_type", "conformer", "population", "population_err", "n_groups"] + POOLED_COLUMNS
    if not len(group):
        return pd.DataFrame(columns=columns)
    type_code, type_names = pd.factorize(group_type)
    group_code = pd.factorize(group)[0]
    conf_code, conf_names = pd.factorize(conformer)
    pop = np.asarray(population, dtype=float)
    err = np.asarray(population_err, dtype=float)
    order_of_type = np.argsort(type_code, kind="stable")
    bounds = np.searchsorted(type_code[order_of_type], np.arange(len(type_names) + 1))
    rank = {}   # a conformer's rank: types in order of appearance, conformers in order within a type
    rows = []
    for t, name in enumerate(type_names):
        sel = order_of_type[bounds[t]:bounds[t + 1]]
        confs = pd.unique(conf_code[sel])   # (in order of appearance)
        for c in confs:
            rank.setdefault(c, len(rank))
        groups = pd.unique(group_code[sel])
        where = (_positions(groups, group_code[sel]), _positions(confs, conf_code[sel]))
        grid_pop, grid_err = np.zeros((len(groups), len(confs))), np.zeros((len(groups), len(confs)))
        grid_pop[where], grid_err[where] = pop[sel], err[sel]
        for j, c in enumerate(confs):
            column = grid_pop[:, j]
            r = pooled_mean_error(column, grid_err[:, j])
            seen = column[~np.isnan(column)]   # (the mean skips NaN, as pandas' does)
            rows.append((name, conf_names[c], float(seen.mean()) if len(seen) else np.nan, r["se"], len(groups),
                         r["i_squared"], r["q"], r["q_p_value"], r["tau"], bool(r["heterogeneous"]), rank[c]))
    pooled = pd.DataFrame(rows, columns=columns + ["_o"])
    pooled = pooled.sort_values(["group_type", "_o"], kind="stable", key=natural_order).drop(columns="_o")
    return pooled.sort_values(["group_type", "population"], ascending=[True, False], kind="stable",
                              key=natural_order).reset_index(drop=True)


def _positions(distinct, codes):
    """The position in ``distinct`` of each of ``codes`` (non-negative integers)."""
    lookup = np.empty(int(distinct.max()) + 1, dtype=np.int64)
    lookup[distinct] = np.arange(len(distinct))
    return lookup[codes]


def _conformer_blocking(rows, weights, g0, g1, n_blocks, block_replica):
    """Blocking errors of the (group, joint code) columns of groups g0..g1-1 from their rows
    (sorted by group and code): returns pair_group, pair_code, mean, se, n_effective."""
    new = np.ones(len(rows), dtype=bool)
    new[1:] = (rows[1:, 1] != rows[:-1, 1]) | (rows[1:, 2] != rows[:-1, 2])
    pair = np.cumsum(new) - 1
    pair_group, pair_code = rows[new, 1], rows[new, 2]
    n_pairs, n_groups = len(pair_group), g1 - g0
    table = np.bincount(rows[:, 0] * n_pairs + pair, weights=weights,
                        minlength=n_blocks * n_pairs).reshape(n_blocks, n_pairs)
    totals = np.bincount(rows[:, 0] * n_groups + (rows[:, 1] - g0), weights=weights,
                         minlength=n_blocks * n_groups).reshape(n_blocks, n_groups)
    return (pair_group, pair_code) + _column_blocking(table, totals, pair_group - g0, block_replica)


def _dense_blocking(gids, counts, weights, block_replica):
    """Blocking errors of the (group, joint code) columns seen in dense conformer counts
    (n_blocks, n_groups, n_joint), in slices of groups: yields pair_group, pair_code, mean, se,
    n_effective per slice (groups in order, codes in order within a group)."""
    n_blocks, n_groups, size = counts.shape
    step = max(1, _WORK_VALUES // max(1, n_blocks * size))
    for a in range(0, n_groups, step):
        c = counts[:, a:a + step]
        w = c if weights is None else weights[:, a:a + step]
        local, code = np.nonzero((c > 0).any(axis=0))
        if not len(local):
            continue
        table = w[:, local, code].astype(np.float64)
        totals = w.sum(axis=2, dtype=np.float64)
        yield (gids[a + local], code.astype(np.int64)) + _column_blocking(table, totals, local, block_replica)


def _column_blocking(table, totals, local, block_replica):
    """mean, se, n_effective of the columns of ``table`` (n_blocks, n_pairs), column k belonging
    to group ``local[k]`` with weight sums ``totals[:, local[k]]``, and the
    :class:`~dihedra.numerics.statistics.BlockingLevels` of the columns blocked together (NaN for
    those blocked, and corrected for a short run, alone; ``None`` if all were)."""
    n_pairs = table.shape[1]
    mean, se, n_eff = np.empty(n_pairs), np.empty(n_pairs), np.empty(n_pairs)
    # blocking over all groups at once; a group with an empty block where others have frames
    # (all frames of a member undefined) drops that block, so it is done on its own
    used = totals.sum(axis=1) > 0
    regular = np.all((totals > 0) == used[:, None], axis=0)[local]
    cols = np.flatnonzero(regular)
    found = None
    if len(cols) == n_pairs:   # (the usual case: no copy of the table or of the weights)
        mean[:], se[:], n_eff[:], found = blocking_error(table, totals, block_replica, weight_columns=local,
                                                         short_run=False, levels=True)
    elif len(cols):
        mean[cols], se[cols], n_eff[cols], part = blocking_error(table[:, cols], totals, block_replica,
                                                                 weight_columns=local[cols], short_run=False,
                                                                 levels=True)
        found = BlockingLevels(np.full((len(part.n_blocks), n_pairs), np.nan), part.n_blocks, part.n_replicas)
        found.se[:, cols] = part.se
    for g in np.unique(local[~regular]):
        cols = np.flatnonzero(local == g)
        mean[cols], se[cols], n_eff[cols] = blocking_error(table[:, cols], totals[:, g], block_replica)
    return mean, se, n_eff, found


def _conformer_labels(codes, widths, state_labels):
    """The distinct labels (``"anti|gauche+|anti"``: digit j = state of member j, base n_states)
    of joint ``codes`` of groups of ``widths`` torsions, and the position of each code's label:
    ``(labels (object array), positions)``."""
    n_s = len(state_labels)
    codes, widths = np.asarray(codes, dtype=np.int64), np.asarray(widths, dtype=np.int64)
    if not len(codes):
        return np.empty(0, dtype=object), np.empty(0, dtype=np.int64)
    span = int(widths.max()) + 1
    uniq, inv = np.unique(codes * span + widths, return_inverse=True)   # one key per (code, width)
    text = ["|".join(state_labels[(int(k // span) // n_s ** j) % n_s] for j in range(int(k % span)))
            for k in uniq]
    out = np.empty(len(text), dtype=object)
    out[:] = text
    return out, inv.reshape(-1)


def _strings_taken(distinct, positions):
    """The column ``distinct[positions]`` taken from a Series of the distinct strings (pandas
    would otherwise convert the Python string of every row, 0.1 s for the 116,000 rows of the
    benchmark's conformer table); its type is what pandas gives a column of such strings."""
    base = np.empty(len(distinct), dtype=object)
    base[:] = list(distinct)
    return pd.Series(base).take(np.asarray(positions, dtype=np.int64)).reset_index(drop=True)


def _short_type_names(group_types, resnames, members):
    """Readable names of group types: the residue of the group (the residue part of its torsion
    types, else the residue name), and where one residue has group types with different torsions
    (a terminal residue has no phi, or no psi and omega), the type with the most torsions keeps the
    plain name and the others say what they lack or add: ``MET`` and ``MET (no phi)``.

    >>> _short_type_names(["MET:psi | MET:omega", "MET:phi | MET:psi | MET:omega"], ["MET", "MET"],
    ...                   [[0, 1], [2, 3, 4]])
    ['MET (no phi)', 'MET']
    """
    parts = {gt: [p.strip() for p in gt.split(" | ")] for gt in dict.fromkeys(group_types)}
    base_of, count = {}, {}
    for gt, m in zip(group_types, members):
        count[gt] = count.get(gt, 0) + 1
        if gt not in base_of:
            head = parts[gt][0].partition(":")
            base_of[gt] = head[0] if head[1] and head[0] else (str(resnames[m[0]]) or "group")
    by_base = {}
    for gt, base in base_of.items():
        by_base.setdefault(base, []).append(gt)
    names, used = {}, set()
    for base, gts in by_base.items():
        angles = {gt: [p.partition(":")[2] or p for p in parts[gt]] for gt in gts}
        full = max(gts, key=lambda gt: (len(angles[gt]), count[gt]))
        for gt in gts:
            name = base if gt == full or len(gts) == 1 else f"{base} ({_difference(angles[full], angles[gt])})"
            unique, n = name, 1
            while unique in used:
                n += 1
                unique = f"{name}#{n}"
            used.add(unique)
            names[gt] = unique
    return [names[gt] for gt in group_types]


def _difference(full, own):
    """``no phi``, ``+chi3``, ``no phi; +chi3`` or the own torsions: how a group type differs."""
    lacks = [a for a in full if a not in own]
    adds = [a for a in own if a not in full]
    text = "; ".join(x for x in (("no " + ", ".join(lacks)) if lacks else "",
                                  ("+" + ", +".join(adds)) if adds else "") if x)
    return text or ", ".join(own)
