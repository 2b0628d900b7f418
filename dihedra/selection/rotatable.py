"""The ``rotatable`` torsion specification: one torsion per rotatable bond of the bond graph.

A bond B-C is rotatable when

1. neither B nor C is terminal (each has another neighbour),
2. it lies in no ring (it is a bridge of the bond graph: removing it disconnects B from C), and
3. it is not linear: neither B nor C has exactly two neighbours at an angle above
   :data:`LINEAR_DEG` (checked on the topology's coordinates when it has any).

The outer atoms A (a neighbour of B other than C) and D (a neighbour of C other than B) follow one
deterministic rule: heavy atoms first (element not H), then the larger mass, then more heavy
neighbours (the chain continues there), then the lower index. So an alkane gets its C-C-C-C
torsions, and a bond whose end carries only hydrogens (ethane) gets an H-C-C-H torsion.

Bonds come from the topology. A topology without bonds gets bonds guessed from interatomic
distances by MDAnalysis (van der Waals radii) in the first frame, through the periodic box where
there is one (so a molecule split across the box's edge keeps its bonds), with a notice.
"""

import numpy as np

from .torsions import TorsionSet, bond_array, torsions_from_quads

#: A centre whose two bonds make a larger angle (degrees) is treated as linear.
LINEAR_DEG = 170.0


def _bond_graph(universe, notices):
    """Adjacency lists from the topology's bonds (guessing them if there are none)."""
    n = universe.atoms.n_atoms
    bonds = bond_array(universe)
    if bonds is None:
        bonds = _guess_bonds(universe, notices)
    bonds = bonds[bonds[:, 0] != bonds[:, 1]]
    both = np.concatenate([bonds, bonds[:, ::-1]])
    keys = np.unique(both[:, 0] * n + both[:, 1])  # sorted, both directions, no repeats
    first, second = keys // n, keys % n
    starts = np.searchsorted(first, np.arange(n + 1)).tolist()
    neighbours = second.tolist()
    return [neighbours[starts[i]:starts[i + 1]] for i in range(n)]


def _guess_bonds(universe, notices):
    """Bonds from interatomic distances (MDAnalysis, van der Waals radii), with a notice.

    Atom types without a tabulated radius (virtual sites such as TIP4P's MW, dummies) get radius 0,
    so they bond to nothing.
    """
    from MDAnalysis.guesser.tables import vdwradii

    try:
        types = set(np.unique(np.asarray(universe.atoms.types, dtype=str)))
    except Exception:  # noqa: BLE001 - no types: MDAnalysis guesses them
        types = set()
    unknown = sorted(t for t in types if t.upper() not in vdwradii)
    # the minimum image where there is a box: a molecule split across the box's edge (as a raw
    # trajectory writes it) keeps its bonds, so the bonds do not depend on how the frame is wrapped
    box = universe.dimensions
    box = box if box is not None and np.all(np.isfinite(box)) and np.all(np.asarray(box)[:3] > 0) else None
    try:
        universe.guess_TopologyAttrs(to_guess=["bonds"], vdwradii={t: 0.0 for t in unknown}, box=box)
        bonds = np.asarray(universe.bonds.indices, dtype=np.int64).reshape(-1, 2)
    except Exception as exc:  # noqa: BLE001 - report the cause
        notices.append(f"the topology has no bonds and guessing them failed ({exc}); "
                       "no rotatable bonds found.")
        return np.empty((0, 2), dtype=np.int64)
    extra = f"; atom types without a known radius ({', '.join(unknown[:5])}) bond to nothing" if unknown else ""
    where = " (minimum image in the periodic box)" if box is not None else ""
    notices.append(f"the topology has no bonds; guessed {len(bonds)} bonds from interatomic distances{where} "
                   f"in the first frame{extra} (check them, or use a topology with bonds).")
    return bonds


def _bridges(adjacency, roots=None, skip=None):
    """Set of bridges ``(min, max)`` of an undirected graph (iterative Tarjan).

    ``roots`` limits the search to the connected components of these atoms; atoms ``skip[i]``
    true are left out of the graph (terminal atoms: their bonds lie in no ring, and the bridges
    among the other bonds stay the same without them).
    """
    n = len(adjacency)
    disc = [-1] * n
    low = [0] * n
    out = set()
    timer = 0
    for root in (range(n) if roots is None else roots):
        if disc[root] != -1 or not adjacency[root] or (skip is not None and skip[root]):
            continue
        disc[root] = low[root] = timer
        timer += 1
        stack = [(root, -1, iter(adjacency[root]))]
        while stack:
            node, parent, it = stack[-1]
            advanced = False
            for nxt in it:
                if nxt == parent or (skip is not None and skip[nxt]):
                    continue
                if disc[nxt] == -1:
                    disc[nxt] = low[nxt] = timer
                    timer += 1
                    stack.append((nxt, node, iter(adjacency[nxt])))
                    advanced = True
                    break
                if disc[nxt] < low[node]:
                    low[node] = disc[nxt]
            if not advanced:
                stack.pop()
                if stack:
                    p = stack[-1][0]
                    if low[node] < low[p]:
                        low[p] = low[node]
                    if low[node] > disc[p]:
                        out.add((p, node) if p < node else (node, p))
    return out


def _is_heavy(universe):
    atoms = universe.atoms
    try:
        elements = np.char.upper(np.asarray(atoms.elements, dtype=str))
        known = elements != ""
        heavy = elements != "H"
        if known.all():
            return heavy
    except Exception:  # no elements
        pass
    names = np.char.upper(np.asarray(atoms.names, dtype=str))
    by_name = ~np.char.startswith(names, "H")
    try:
        masses = np.asarray(atoms.masses, dtype=float)
        return np.where(masses > 0, masses > 1.5, by_name)
    except Exception:
        return by_name


def _masses(universe):
    try:
        return np.asarray(universe.atoms.masses, dtype=float)
    except Exception:
        return np.zeros(universe.atoms.n_atoms)


def _positions(universe):
    try:
        return universe.atoms.positions
    except Exception:  # a topology without coordinates
        return None


def _linear_centres(adjacency, candidates, positions, box):
    """Atoms among ``candidates`` with exactly two neighbours at an angle above :data:`LINEAR_DEG`
    (one vectorised call; nothing when the topology has no coordinates)."""
    if positions is None:
        return set()
    from MDAnalysis.lib.distances import calc_angles

    from ..numerics.angles import usable_box
    centres = np.array([c for c in candidates if len(adjacency[c]) == 2], dtype=np.int64)
    if len(centres) == 0:
        return set()
    ends = np.array([adjacency[c] for c in centres], dtype=np.int64)
    ang = np.degrees(calc_angles(positions[ends[:, 0]], positions[centres], positions[ends[:, 1]],
                                 box=usable_box(box)))
    return set(centres[ang > LINEAR_DEG].tolist())


def _outer_choices(n, owner, flat, heavy, masses):
    """The outer atoms by the rule of the module docstring (heavy first, larger mass, more heavy
    neighbours, lower index): ``(best, second)``, for every atom its first and second neighbour
    in that order (-1 where it has fewer). The outer atom of bond B-C on B's side is ``best[B]``,
    or ``second[B]`` where that is C.

    ``owner, flat``: every bond in both directions. The rule ranks all atoms with one sort (the
    index breaks every tie, so it is a total order); ``None`` when a mass is NaN (no total order).
    """
    heavy = np.asarray(heavy, dtype=bool)
    if np.isnan(masses).any():
        return None
    heavy_degree = np.bincount(owner, weights=heavy[flat].astype(float), minlength=n).astype(int)
    rank = np.empty(n, dtype=np.int64)   # lexsort: the last key sorts first
    rank[np.lexsort((np.arange(n), -heavy_degree, -masses, ~heavy))] = np.arange(n)
    order = np.lexsort((rank[flat], owner))   # neighbours of every atom, best first
    neighbours = flat[order]
    start = np.searchsorted(owner[order], np.arange(n))
    count = np.bincount(owner, minlength=n)
    best = np.where(count >= 1, neighbours[np.minimum(start, len(flat) - 1)], -1)
    second = np.where(count >= 2, neighbours[np.minimum(start + 1, len(flat) - 1)], -1)
    return best, second


def _outer_by_keys(adjacency, heavy, masses, owner, flat):
    """``outer(end, other)`` comparing the rule's keys choice by choice (masses with NaN)."""
    heavy = np.asarray(heavy, dtype=bool)
    heavy_degree = np.bincount(owner, weights=heavy[flat].astype(float), minlength=len(adjacency)).astype(int)

    def outer(end, other):
        candidates = [j for j in adjacency[end] if j != other]
        return min(candidates, key=lambda j: (not heavy[j], -masses[j], -heavy_degree[j], j))
    return outer


def _quads(adjacency, inner, heavy, masses, owner, flat):
    """A-B-C-D for every bond B-C of ``inner`` (an (n, 2) array), the outer atoms by the rule."""
    if len(inner) == 0:
        return np.empty((0, 4), dtype=np.int64)
    choices = _outer_choices(len(adjacency), owner, flat, heavy, masses)
    if choices is None:
        outer = _outer_by_keys(adjacency, heavy, masses, owner, flat)
        return np.array([(outer(b, c), b, c, outer(c, b)) for b, c in inner.tolist()],
                        dtype=np.int64).reshape(-1, 4)
    best, second = choices
    b, c = inner[:, 0], inner[:, 1]
    a = np.where(best[b] != c, best[b], second[b])
    d = np.where(best[c] != b, best[c], second[c])
    return np.stack([a, b, c, d], axis=1)


def rotatable_torsions(universe):
    """Torsions of every rotatable bond; see the module docstring for the rules.

    Returns
    -------
    TorsionSet
    """
    notices = []
    adjacency = _bond_graph(universe, notices)
    degree = np.array([len(a) for a in adjacency], dtype=np.int64)
    # every bond in both directions (owner -> neighbour), and those between two non-terminal atoms
    owner = np.repeat(np.arange(len(adjacency)), degree)
    flat = np.fromiter((j for nbrs in adjacency for j in nbrs), dtype=np.int64, count=int(degree.sum()))
    between_inner = (degree[owner] >= 2) & (degree[flat] >= 2)
    # only components with a bond between two non-terminal atoms can hold a rotatable bond
    roots = np.unique(owner[between_inner]).tolist()
    inner = sorted(_bridges(adjacency, roots, skip=(degree < 2).tolist()))
    heavy = _is_heavy(universe)
    masses = _masses(universe)
    positions = _positions(universe)
    box = universe.dimensions if positions is not None else None
    linear = _linear_centres(adjacency, {a for bond in inner for a in bond}, positions, box)
    inner = np.array(inner, dtype=np.int64).reshape(-1, 2)
    at_linear = np.isin(inner, np.fromiter(linear, dtype=np.int64, count=len(linear))).any(axis=1)
    n_linear = int(at_linear.sum())
    quads = _quads(adjacency, inner[~at_linear], heavy, masses, owner, flat)
    torsions = torsions_from_quads(universe, quads)
    n_inner = int(np.count_nonzero(between_inner & (owner < flat)))
    n_ring = n_inner - len(inner)
    if positions is None:
        notices.append("the topology has no coordinates; linear centres were not checked.")
    if n_linear:
        notices.append(f"skipped {n_linear} bond(s) at a linear centre (angle > {LINEAR_DEG:g} deg).")
    if n_ring and not torsions:
        notices.append(f"all {n_ring} non-terminal bond(s) lie in rings.")
    return TorsionSet(torsions, notices)
