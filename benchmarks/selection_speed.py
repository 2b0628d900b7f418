"""Time the biopolymer torsion selections on systems of about 50,000 atoms.

Builds three systems from the MDAnalysisTests data files and times
:func:`dihedra.selection.biopolymer.protein_backbone_torsions`, :func:`protein_sidechain_torsions` and
:func:`nucleic_backbone_torsions` on each (best of 3), then prints one line per system and
function. Target: well under 1 s each.

* ``adk x15, bonds``: the CHARMM adenylate kinase (PSF, 3341 atoms) merged 15 times with
  ``MDAnalysis.Merge`` (50,115 atoms, bonds from the PSF, 15 segments);
* ``adk solvated, GROMACS .gro``: adenylate kinase in water (47,681 atoms, no bonds: links by
  distance);
* ``adk solvated, GROMACS .tpr``: the same system with bonds and GROMOS residue names.

Run::

    PYTHONPATH=. python benchmarks/selection_speed.py
"""

import time
import warnings

import numpy as np


def _systems():
    import MDAnalysis as mda
    from MDAnalysisTests.datafiles import DCD, GRO, PSF, TPR

    adk = mda.Universe(PSF, DCD)
    copies = 15
    merged = mda.Merge(*([adk.atoms] * copies))
    shift = np.repeat(np.arange(copies) * 80.0, adk.atoms.n_atoms)  # side by side along x
    positions = merged.atoms.positions
    positions[:, 0] += shift
    merged.atoms.positions = positions
    yield "adk x15, bonds", merged
    yield "adk solvated, GROMACS .gro", mda.Universe(GRO)
    yield "adk solvated, GROMACS .tpr", mda.Universe(TPR)
    from dihedra import example_path
    hexane = mda.Universe(example_path("hexane.pdb"))
    yield "hexane x80 (8,000 molecules)", mda.Merge(*([hexane.atoms] * 80))


def best_of(func, universe, repeats=3):
    times = []
    result = None
    for _ in range(repeats):
        start = time.perf_counter()
        result = func(universe)
        times.append(time.perf_counter() - start)
    return min(times), result


def main():
    from dihedra.selection.biopolymer import (nucleic_backbone_torsions, protein_backbone_torsions,
                                    protein_sidechain_torsions)
    from dihedra.selection.rotatable import rotatable_torsions

    warnings.filterwarnings("ignore")
    functions = (protein_backbone_torsions, protein_sidechain_torsions, nucleic_backbone_torsions,
                 rotatable_torsions)
    print(f"{'system':30s} {'atoms':>7s} {'function':28s} {'torsions':>8s} {'best of 3 (s)':>13s}")
    for name, universe in _systems():
        for func in functions:
            seconds, result = best_of(func, universe)
            print(f"{name:30s} {universe.atoms.n_atoms:7d} {func.__name__:28s} {len(result):8d} "
                  f"{seconds:13.3f}")


if __name__ == "__main__":
    main()
