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
distances by MDAnalysis (van der Waals radii), with a notice.
"""

import numpy as np

from .torsions import TorsionSet, torsion_from_atoms

#: A centre whose two bonds make a larger angle (degrees) is treated as linear.
LINEAR_DEG = 170.0


def bond_graph(universe, notices):
    """Adjacency lists from the topology's bonds (guessing them if there are none)."""
    n = universe.atoms.n_atoms
    try:
        bonds = universe.bonds.indices
    except Exception:  # NoDataError: the topology has no bonds
        bonds = np.empty((0, 2), dtype=np.int64)
    if len(bonds) == 0:
        try:
            universe.guess_TopologyAttrs(to_guess=["bonds"])
            bonds = universe.bonds.indices
        except Exception as exc:  # noqa: BLE001 - report the cause
            notices.append(f"the topology has no bonds and guessing them failed ({exc}); "
                           "no rotatable bonds found.")
            bonds = np.empty((0, 2), dtype=np.int64)
        else:
            notices.append(f"the topology has no bonds; guessed {len(bonds)} bonds from interatomic "
                           "distances (check them, or use a topology with bonds).")
    adjacency = [[] for _ in range(n)]
    for i, j in np.asarray(bonds, dtype=np.int64):
        if i != j:
            adjacency[i].append(int(j))
            adjacency[j].append(int(i))
    return [sorted(set(a)) for a in adjacency]


def bridges(adjacency):
    """Set of bridges ``(min, max)`` of an undirected graph (iterative Tarjan)."""
    n = len(adjacency)
    disc = [-1] * n
    low = [0] * n
    out = set()
    timer = 0
    for root in range(n):
        if disc[root] != -1 or not adjacency[root]:
            continue
        disc[root] = low[root] = timer
        timer += 1
        stack = [(root, -1, iter(adjacency[root]))]
        while stack:
            node, parent, it = stack[-1]
            advanced = False
            for nxt in it:
                if nxt == parent:
                    continue
                if disc[nxt] == -1:
                    disc[nxt] = low[nxt] = timer
                    timer += 1
                    stack.append((nxt, node, iter(adjacency[nxt])))
                    advanced = True
                    break
                low[node] = min(low[node], disc[nxt])
            if not advanced:
                stack.pop()
                if stack:
                    p = stack[-1][0]
                    low[p] = min(low[p], low[node])
                    if low[node] > disc[p]:
                        out.add((min(p, node), max(p, node)))
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


def _linear(center, neighbours, positions, box):
    if positions is None or len(neighbours) != 2:
        return False
    from MDAnalysis.lib.distances import calc_angles
    from .angles import usable_box
    a, b = neighbours
    ang = np.degrees(calc_angles(positions[a], positions[center], positions[b], box=usable_box(box)))
    return bool(ang > LINEAR_DEG)


def rotatable_torsions(universe):
    """Torsions of every rotatable bond; see the module docstring for the rules.

    Returns
    -------
    TorsionSet
    """
    notices = []
    adjacency = bond_graph(universe, notices)
    ring_free = bridges(adjacency)
    heavy = _is_heavy(universe)
    masses = _masses(universe)
    positions = _positions(universe)
    box = universe.dimensions if positions is not None else None
    heavy_degree = np.array([sum(bool(heavy[j]) for j in nbrs) for nbrs in adjacency])

    def outer(end, other):
        candidates = [j for j in adjacency[end] if j != other]
        return min(candidates, key=lambda j: (not heavy[j], -masses[j], -heavy_degree[j], j))

    torsions = []
    n_ring = n_linear = 0
    for b, c in sorted(ring_free):
        if len(adjacency[b]) < 2 or len(adjacency[c]) < 2:
            continue
        if _linear(b, adjacency[b], positions, box) or _linear(c, adjacency[c], positions, box):
            n_linear += 1
            continue
        a, d = outer(b, c), outer(c, b)
        torsions.append(torsion_from_atoms(universe, (a, b, c, d)))
    n_bonds = sum(len(a) for a in adjacency) // 2
    n_ring = n_bonds - len(ring_free)
    if positions is None:
        notices.append("the topology has no coordinates; linear centres were not checked.")
    if n_linear:
        notices.append(f"skipped {n_linear} bond(s) at a linear centre (angle > {LINEAR_DEG:g} deg).")
    if n_ring and not torsions:
        notices.append(f"all {n_ring} non-terminal bond(s) lie in rings.")
    return TorsionSet(torsions, notices)
