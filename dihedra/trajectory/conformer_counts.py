"""Conformer counts of the trajectory pass: joint states of the torsions of each group, per block.

A conformer group (the torsions of one molecule or residue, in chain order) of ``w`` torsions with
``n_s`` states each has ``n_s ** w`` joint states; member ``j`` weighs ``n_s ** j`` in the joint
code. Groups of equal size form a class and are counted together. A class whose cells
(blocks x groups x joint states) fit in :data:`DENSE_CONFORMER_CELLS` is counted densely (per
block, group and joint state, a compiled loop; uint8 counts, widened as the blocks fill: see
:mod:`dihedra.numerics.counts`); larger classes are counted as sorted rows
(block, group, joint code, frames) of the block being filled. Frames in which a member is undefined
are left out for that group.
"""

from __future__ import annotations

import os

import numpy as np

from ..numerics.counts import fit_counts

#: Groups with more torsions than this get no conformer statistics (their joint states explode).
MAX_CONFORMER_TORSIONS = 12

#: Conformer classes with at most this many (block, group, joint state) cells are counted densely.
DENSE_CONFORMER_CELLS = 1 << 25

#: Temporary arrays of the sparse counting stay below this many bytes.
_WORK_BYTES = 8 << 20


def conformer_layout(torsion_set, n_states, max_torsions=MAX_CONFORMER_TORSIONS):
    """Groups for conformer counting (worked out once per torsion set: a pass and its tables ask
    three times, and 15,000 torsions take a tenth of a second each).

    Returns
    -------
    groups : list of str
        Group names with between 2 and ``max_torsions`` torsions.
    members : list of ndarray
        Torsion positions of each group, in chain order.
    skipped : list of str
        Groups left out because they have too many torsions.
    """
    memo = torsion_set.__dict__.setdefault("_conformer_layouts", {})
    key = (int(n_states), int(max_torsions), len(torsion_set.torsions))
    if key not in memo:
        memo[key] = _layout(torsion_set, n_states, max_torsions)
    groups, members, skipped = memo[key]
    return list(groups), list(members), list(skipped)


def _layout(torsion_set, n_states, max_torsions):
    by_group = {}
    for pos, t in enumerate(torsion_set.torsions):
        by_group.setdefault(t.group, []).append((t.order, pos))
    groups, members, skipped = [], [], []
    for name, items in by_group.items():
        if len(items) < 2:
            continue
        if len(items) > max_torsions or n_states ** len(items) >= 2 ** 62:
            skipped.append(name)
            continue
        groups.append(name)
        members.append(np.array([p for _, p in sorted(items)], dtype=np.int64))
    return groups, members, skipped


def conformer_classes(members, n_states):
    """Groups of equal size, counted together: {size: (group ids, members, powers, n_joint)}."""
    by_size = {}
    for g, m in enumerate(members):
        by_size.setdefault(len(m), []).append(g)
    classes = {}
    for width, gids in by_size.items():
        gids = np.asarray(gids, dtype=np.int64)
        classes[width] = (gids, np.vstack([members[g] for g in gids]),
                          n_states ** np.arange(width, dtype=np.int64), n_states ** width)
    return classes


def joint_cells(codes, members, powers, size):
    """Joint codes of conformer groups in slices of frames: yields ``(lo, hi, cell, ok)`` with
    ``cell = group * size + joint`` (frames lo..hi, groups) and ``ok`` where no member is
    undefined."""
    n = len(codes)
    n_g, width = members.shape
    step = max(1, _WORK_BYTES // (8 * n_g * width))
    offsets = np.arange(n_g, dtype=np.int64) * size
    for lo in range(0, n, step):
        sub = codes[lo:lo + step][:, members]                 # (f, n_g, width)
        ok = (sub >= 0).all(axis=2)
        cell = sub.astype(np.int64) @ powers + offsets[None, :]
        yield lo, min(n, lo + step), cell, ok


def _strictly_sorted(rows):
    """Whether (block, group, joint) rows increase strictly in lexicographic order."""
    if len(rows) < 2:
        return True
    a, b = rows[:-1, :3], rows[1:, :3]
    gt = b > a
    eq = b == a
    return bool(np.all(gt[:, 0] | (eq[:, 0] & (gt[:, 1] | (eq[:, 1] & gt[:, 2])))))


def reduce_conformer_rows(rows, weights):
    """Sum duplicate (block, group, joint) rows of conformer counts.

    Returns the rows sorted by block, group and joint code, with ``frames`` summed, and the
    summed weights.
    """
    rows = np.asarray(rows, dtype=np.int64).reshape(-1, 4)
    weights = np.asarray(weights, dtype=np.float64)
    if len(rows) == 0:
        return np.empty((0, 4), dtype=np.int64), np.empty(0)
    if _strictly_sorted(rows):   # already sorted and unique (a serial run): nothing to do
        return rows, weights
    order = np.lexsort((rows[:, 2], rows[:, 1], rows[:, 0]))
    rows, weights = rows[order], weights[order]
    new = np.ones(len(rows), dtype=bool)
    new[1:] = np.any(rows[1:, :3] != rows[:-1, :3], axis=1)
    starts = np.flatnonzero(new)
    counts = np.add.reduceat(rows[:, 3], starts)
    wsum = np.add.reduceat(weights, starts)
    return np.column_stack([rows[starts, :3], counts]), wsum


class ConformerCounter:
    """The conformer counts of one worker (or of a serial pass) over its state blocks.

    Parameters
    ----------
    torsion_set, n_states
        The torsions (their groups) and the states of the scheme.
    n_state_blocks : int
        State blocks of the whole run (dense or not is decided by the whole run, so that every
        worker and a serial run decide alike).
    first_block, n_blocks : int
        The state blocks this worker touches.
    weighted : bool
    kernels : module
        The compiled kernels (:mod:`dihedra.numerics._kernels`).
    """

    def __init__(self, torsion_set, n_states, n_state_blocks, first_block, n_blocks, weighted, kernels):
        _, members, _ = conformer_layout(torsion_set, n_states)
        self.classes = conformer_classes(members, n_states)
        self.first_block = first_block
        self.weighted = weighted
        self._kernels = kernels
        self.dense = {}
        for key, (gids, mem, powers, size) in self.classes.items():
            if n_state_blocks * len(gids) * size <= DENSE_CONFORMER_CELLS:
                counts = np.zeros((n_blocks, len(gids), size), np.uint8)
                wts = np.zeros(counts.shape, np.float64) if weighted else np.zeros((0, 0, 0))
                self.dense[key] = (counts, wts)
        self._frames = np.zeros(n_blocks, dtype=np.int64)   # frames counted per block: the bound
        self._cur_block = -1
        self._cur = {}
        self._rows, self._wts = [], []

    def __bool__(self):
        return bool(self.classes)

    def count(self, codes, sblock, weights):
        """Count the joint states of ``codes`` (n_frames, n_torsions) int8, frames in state blocks
        ``sblock`` with ``weights``."""
        local = sblock - self.first_block
        self._frames += np.bincount(local, minlength=len(self._frames))
        most = int(self._frames.max(initial=0))
        for key, (counts, wts) in list(self.dense.items()):
            counts = fit_counts(counts, most)
            self.dense[key] = (counts, wts)
            _, members, powers, _ = self.classes[key]
            self._kernels.count_conformers(codes, local, members, powers, counts, weights, wts, self.weighted)
        sparse = [key for key in self.classes if key not in self.dense]
        if not sparse:
            return
        # classes too large for dense counts: rows per block, split where the block changes
        cuts = np.flatnonzero(np.diff(sblock)) + 1
        for lo, hi in zip(np.r_[0, cuts], np.r_[cuts, len(codes)]):
            b = int(sblock[lo])
            if b != self._cur_block:
                self._retire_block()
                self._cur_block = b
            for key in sparse:
                _, members, powers, size = self.classes[key]
                for f0, f1, cell, ok in joint_cells(codes[lo:hi], members, powers, size):
                    wsub = np.broadcast_to(weights[lo + f0:lo + f1, None], ok.shape)[ok]
                    self._add(key, cell[ok], wsub)

    def _add(self, key, cell, weights):
        cur = self._cur.get(key)
        cells, inv = np.unique(cell, return_inverse=True)
        cnt = np.bincount(inv, minlength=len(cells))
        wts = np.bincount(inv, weights=weights, minlength=len(cells))
        if cur is not None:
            cells = np.concatenate([cur[0], cells])
            cells, inv = np.unique(cells, return_inverse=True)
            cnt = np.bincount(inv, weights=np.concatenate([cur[1], cnt]), minlength=len(cells))
            wts = np.bincount(inv, weights=np.concatenate([cur[2], wts]), minlength=len(cells))
        self._cur[key] = (cells, cnt.astype(np.int64), wts)

    def _retire_block(self):
        if self._cur_block < 0:
            return
        for key, (cells, cnt, wts) in self._cur.items():
            gids, _, _, size = self.classes[key]
            rows = np.column_stack([np.full(len(cells), self._cur_block, dtype=np.int64),
                                    gids[cells // size], cells % size, cnt])
            self._rows.append(rows)
            self._wts.append(wts)
        self._cur = {}
        self._cur_block = -1

    def hand_over(self, stem=None):
        """The counts at the end of a worker's pass: ``(dense, rows, weights, row_files)``.

        ``dense`` lists ``(width, first state block, counts, weights or None)``; with ``stem`` (a
        worker of a parallel run that hands large sums back through files) the arrays are saved
        as ``.npy`` files and their paths given instead, and the rows go to ``row_files``."""
        self._retire_block()
        dense = []
        for key, (counts, wts) in self.dense.items():
            wts = wts if self.weighted else None
            if stem is not None:
                counts = _save(f"{stem}.conformers{key:03d}.npy", counts)
                if wts is not None:
                    wts = _save(f"{stem}.conformer_weights{key:03d}.npy", wts)
            dense.append((key, self.first_block, counts, wts))
        self.dense = {}
        rows = np.empty((0, 4), dtype=np.int64)
        wts = np.empty(0, dtype=np.float64)
        files = []
        if self._rows:
            # (one class of groups, the usual case: its rows as they are, no copy of 10^7 rows)
            rows = self._rows[0] if len(self._rows) == 1 else np.vstack(self._rows)
            wts = self._wts[0] if len(self._wts) == 1 else np.concatenate(self._wts)
            rows, wts = reduce_conformer_rows(rows, wts)
            if stem is not None:
                files = [(_save(stem + ".conformer_rows.npy", rows), _save(stem + ".conformer_weights.npy", wts))]
                rows, wts = np.empty((0, 4), dtype=np.int64), np.empty(0, dtype=np.float64)
        self._rows, self._wts = [], []
        return dense, rows, wts, files


def _save(path, array):
    np.save(path, array)
    return path


def _take(item):
    """An array, or the array of a worker's file (read, then the file removed)."""
    if isinstance(item, str):
        path, item = item, np.load(item)
        os.remove(path)
    return item


def merge_rows(rows, weights, files):
    """Rows of the parent and of the workers' files, summed where two workers counted the same
    block (rows of a serial run are sorted and unique already: nothing to do)."""
    rows, wts = [rows], [weights]
    for rows_path, wts_path in files:
        rows.append(_take(rows_path))
        wts.append(_take(wts_path))
    if len(rows) > 1:
        rows, wts = [np.vstack(rows)], [np.concatenate(wts)]
    return reduce_conformer_rows(rows[0], wts[0])


def merge_dense(parts, n_state_blocks, weighted):
    """{width: (counts (n_state_blocks, n_groups, n_joint) int32, weights or None)} from the
    dense parts of the workers (one part covering every block, a serial run: no copy)."""
    out = {}
    for width, lo, counts, wts in parts:
        counts, wts = _take(counts), _take(wts)
        if width not in out:
            if lo == 0 and len(counts) == n_state_blocks:
                out[width] = (counts, wts)
                continue
            full = np.zeros((n_state_blocks,) + counts.shape[1:], dtype=np.int32)
            out[width] = (full, np.zeros(full.shape) if weighted else None)
        total, total_w = out[width]
        total[lo:lo + len(counts)] += counts
        if weighted:
            total_w[lo:lo + len(counts)] += wts
    return out


def dense_conformers(blocks, tset, n_states):
    """{width: (group ids, counts (n_blocks, n_groups, n_joint), weights)} of the conformer
    classes that the pass counted densely (weights are the counts as floats when unweighted;
    counts in the type they were counted in, uint8 to int32)."""
    _, members, _ = conformer_layout(tset, n_states)
    kept = getattr(blocks, "stored", blocks)   # (as counted: uint8 counts are not widened for this)
    out = {}
    for width, (gids, _, _, _) in conformer_classes(members, n_states).items():
        counts = kept.get(f"conformer_counts_w{width}")
        if counts is not None:
            out[width] = (gids, counts, kept.get(f"conformer_weights_w{width}"))
    return out


def conformer_rows(blocks, tset, n_states):
    """All conformer counts as rows (block, group, joint code, frames) sorted by block, group and
    code, with their weights: the sparse rows of ``blocks`` and the dense classes together."""
    rows, wts = [blocks["conformer_rows"]], [blocks["conformer_weights"]]
    for gids, counts, weights in dense_conformers(blocks, tset, n_states).values():
        block, group, code = np.nonzero(counts)
        rows.append(np.column_stack([block, gids[group], code, counts[block, group, code]]).astype(np.int64))
        wts.append((counts if weights is None else weights)[block, group, code].astype(np.float64))
    return reduce_conformer_rows(np.vstack(rows), np.concatenate(wts))
