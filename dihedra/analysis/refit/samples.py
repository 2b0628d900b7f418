r"""The samples a torsion correction reweights: the angles of the chosen torsions, read once.

A *sample* is what one weight belongs to. With ``weights_per="frame"`` it is a frame: the
correction of every chosen torsion in the frame enters one weight, which is exact for any system
(a liquid, a protein). With ``weights_per="molecule"`` (the default) it is one molecule in one
frame: the Boltzmann factor of a correction factorises over molecules that do not interact, so
independent copies of a molecule (a gas) are reweighted one by one, and the effective sample size
does not collapse with the number of copies; in a liquid this neglects how the surroundings
respond to the changed molecule (the usual mean-field approximation of reweighting a liquid).
Torsions of one molecule always share a weight, so coupled torsions are reweighted jointly.

Molecules are the connected pieces of the bond graph of the topology recorded by ``track`` (or of
a ``universe`` given); without bonds, each residue (the torsion's conformer group) counts as one.

Blocks (for the block bootstrap) are ``n_blocks`` contiguous pieces of each replica; the folds
(for cross-validation) are ``n_folds`` contiguous pieces of each replica.
"""

from __future__ import annotations

import os
from dataclasses import dataclass

import numpy as np

from ...errors import DihedraError, one_of

#: How a weight is shared: one per frame, or one per molecule and frame.
WEIGHTS_PER = ("molecule", "frame")


@dataclass
class TorsionSamples:
    """The angles of the chosen torsions and how they make samples.

    Attributes
    ----------
    labels, types : list of str
        Label and type of every chosen torsion.
    type_names : list of str
        The chosen types, in order; ``type_index`` points into it.
    type_index, molecule : ndarray (n_torsions,)
        Type and molecule (0 .. n_molecules - 1; all 0 with ``weights_per="frame"``) of each torsion.
    angles : ndarray (n_torsions, n_frames) float32
        Degrees, NaN where undefined.
    replica, position : ndarray (n_frames,)
        Replica of each frame and its position within the replica.
    frame_weight : ndarray (n_frames,)
        The run's own frame weights (1 for an unweighted run).
    weights_per : str
    """

    labels: list
    types: list
    type_names: list
    type_index: np.ndarray
    molecule: np.ndarray
    angles: np.ndarray
    replica: np.ndarray
    position: np.ndarray
    frame_weight: np.ndarray
    weights_per: str

    @property
    def n_frames(self):
        return self.angles.shape[1]

    @property
    def n_molecules(self):
        return int(self.molecule.max()) + 1 if len(self.molecule) else 1

    @property
    def n_samples(self):
        return self.n_frames * self.n_molecules

    def sample_index(self, k):
        """Sample of every frame of torsion ``k``: frame * n_molecules + molecule."""
        return np.arange(self.n_frames, dtype=np.int64) * self.n_molecules + int(self.molecule[k])

    def sample_weights(self):
        """The run's weight of every sample (the frame's weight)."""
        return np.repeat(self.frame_weight, self.n_molecules)

    def frame_blocks(self, n_blocks):
        """Block of every frame: ``n_blocks`` contiguous blocks per replica, numbered over replicas."""
        out = np.empty(self.n_frames, dtype=np.int64)
        offset = 0
        for r in np.unique(self.replica):
            idx = np.flatnonzero(self.replica == r)
            n = min(int(n_blocks), len(idx))
            out[idx] = offset + (self.position[idx] - self.position[idx].min()) * n // (np.ptp(self.position[idx]) + 1)
            offset += n
        return out

    def cells(self, n_blocks):
        """Bootstrap cell of every sample and the replica of every cell: time blocks, crossed with
        molecules when the weights are per molecule."""
        blocks = self.frame_blocks(n_blocks)
        n_mol = self.n_molecules
        cell = (blocks[:, None] * n_mol + np.arange(n_mol)[None, :]).ravel()
        n_cells = (int(blocks.max()) + 1) * n_mol
        cell_replica = np.zeros(n_cells, dtype=np.int64)
        cell_replica[cell] = np.repeat(self.replica, n_mol)
        return cell, cell_replica

    def folds(self, n_folds):
        """Fold of every sample for cross-validation: the k-th of ``n_folds`` contiguous pieces of
        its replica (0 .. n_folds - 1)."""
        fold = np.empty(self.n_frames, dtype=np.int64)
        for r in np.unique(self.replica):
            idx = np.flatnonzero(self.replica == r)
            pos = self.position[idx]
            fold[idx] = (pos - pos.min()) * int(n_folds) // (np.ptp(pos) + 1)
        return np.repeat(fold, self.n_molecules)


def _topology_fragments(result, universe, notices):
    """Fragment (molecule) index of every atom, or None without a bond graph."""
    from ...trajectory.inputs import load_universe

    if universe is None:
        path = (result.summary.get("topology") or {}).get("path")
        if not path or not os.path.exists(path):
            notices.append(f"the topology recorded by track ({path}) is not there: each residue was taken as one "
                           "molecule.")
            return None
        try:
            universe = load_universe(path)
        except DihedraError as exc:
            notices.append(f"the topology could not be read ({exc}); each residue was taken as one molecule.")
            return None
    try:
        if len(universe.bonds) == 0:
            raise AttributeError
        return np.asarray(universe.atoms.fragindices)
    except (AttributeError, Exception):  # noqa: BLE001 - a topology without bonds
        notices.append("the topology has no bonds: each residue (conformer group) was taken as one molecule.")
        return None


def molecule_ids(result, positions, weights_per="molecule", universe=None, notices=None):
    """Molecule of each chosen torsion (0-based, in order of appearance); all 0 per frame."""
    notices = [] if notices is None else notices
    one_of("weights_per", weights_per, WEIGHTS_PER)
    positions = list(positions)
    if weights_per == "frame":
        return np.zeros(len(positions), dtype=np.int64)
    fragments = _topology_fragments(result, universe, notices)
    if fragments is not None:
        indices = result.torsion_set.indices[positions]
        if indices.size and indices.max() >= len(fragments):
            raise DihedraError(f"the topology has {len(fragments)} atoms but a torsion names atom "
                               f"{int(indices.max())}; "
                               "give the universe the run was tracked with.")
        keys = fragments[indices[:, 1]]
    else:
        groups = [result.torsion_set.torsions[k].group for k in positions]
        keys = np.unique(groups, return_inverse=True)[1]
    _, first = np.unique(keys, return_index=True)
    order = {key: rank for rank, key in enumerate(keys[np.sort(first)])}
    return np.array([order[k] for k in keys], dtype=np.int64)


def read_samples(result, positions, molecules, weights_per="molecule"):
    """Read the angles of the torsions at ``positions`` (``result.iter_chunks("angles")``).

    Raises a :class:`DihedraError` when the result kept no angles.
    """
    if not result.has_series("angles"):
        raise DihedraError("refitting reweights every frame by the angles of its torsions, and this result has no "
                           "angle time series: track again with keep_angles=True (--keep-angles).")
    positions = list(positions)
    labels = [result.torsion_set.labels[k] for k in positions]
    types = [result.torsion_set.types[k] for k in positions]
    type_names = list(dict.fromkeys(types))
    parts, replica, position, weight = [], [], [], []
    for chunk in result.iter_chunks("angles", columns=labels):
        parts.append(np.asarray(chunk.values, dtype=np.float32))
        replica.append(np.full(len(chunk), chunk.replica, dtype=np.int64))
        position.append(chunk.position)
        weight.append(np.ones(len(chunk)) if chunk.weight is None else np.asarray(chunk.weight, dtype=float))
    if not parts:
        raise DihedraError("the angle time series of this result has no frames; nothing to reweight.")
    frame_weight = np.concatenate(weight)
    if not (np.isfinite(frame_weight).all() and (frame_weight >= 0).all() and frame_weight.sum() > 0):
        raise DihedraError("the run's frame weights are not finite non-negative numbers with a positive sum; "
                           "check the weights file given to track.")
    return TorsionSamples(labels=labels, types=types, type_names=type_names,
                          type_index=np.array([type_names.index(t) for t in types], dtype=np.int64),
                          molecule=np.asarray(molecules, dtype=np.int64), angles=np.concatenate(parts, axis=1),
                          replica=np.concatenate(replica), position=np.concatenate(position),
                          frame_weight=frame_weight, weights_per=weights_per)
