"""dihedra: conformer-aware torsion analysis of molecular-dynamics trajectories.

The Python API is the spine; the command line is a thin layer over it. Start from the atoms you
have::

    import MDAnalysis as mda
    import dihedra

    u = mda.Universe(dihedra.example_path("hexane.pdb"), dihedra.example_path("hexane.xtc"))
    ts = dihedra.TorsionStates(u.atoms, torsions="rotatable", scheme="anti-gauche").run()
    ts.results.populations_by_type        # pandas DataFrame

or from files, writing a results folder as ``dihedra track`` does::

    res = dihedra.track(dihedra.example_path("hexane.pdb"), [dihedra.example_path("hexane.xtc")],
                        torsions="rotatable", out="hexane-results")
    res = dihedra.load_results("hexane-results")   # later, in another session

Every analysis takes such a result as its first argument and returns a result object of
DataFrames with a ``save(folder)`` method.
"""

import _signal  # (the interpreter's built-in module: 'import signal' builds enums, a window for Ctrl-C)
import os as _os
import sys as _sys

#: SIGINT noted while the command line loads (see :func:`dihedra.cli.main`). As ``python -m
#: dihedra`` (argv[0] is "-m" while the package is found) or the ``dihedra`` script, Ctrl-C is noted
#: from the first import on: a KeyboardInterrupt raised inside the imports would end in a
#: traceback or be swallowed by them. A program that imports dihedra keeps its own handler.
EARLY_SIGINT = []
if _sys.argv[:1] == ["-m"] or _os.path.basename(_sys.argv[0] if _sys.argv else "") == "dihedra":
    _signal.signal(_signal.SIGINT, lambda signum, frame: EARLY_SIGINT.append(signum))

from ._version import __version__  # noqa: E402
from .errors import DihedraError  # noqa: E402

# The public names, imported when first used (PEP 562): ``import dihedra`` stays light, so that
# the command line can take over Ctrl-C before MDAnalysis, pandas and numba are loaded.
_LAZY = {
    "compare_with_scan": ".analysis.compare", "convergence": ".analysis.convergence",
    "ensemble_couplings": ".analysis.couplings", "state_kinetics": ".analysis.kinetics",
    "free_energy_profiles": ".analysis.profiles", "ramachandran_regions": ".analysis.ramachandran",
    "fit_torsion_correction": ".analysis.refit", "unbias_windows": ".analysis.windows",
    "load_results": ".io.resultsdir", "StateScheme": ".selection.schemes", "get_scheme": ".selection.schemes",
    "select_torsions": ".selection.specs", "Torsion": ".selection.torsions", "TorsionSet": ".selection.torsions",
    "track": ".tracking", "TrackResult": ".trajectory.result", "TorsionStates": ".trajectory.states",
}


def __getattr__(name):
    if name in _LAZY:
        from importlib import import_module

        value = getattr(import_module(_LAZY[name], __name__), name)
        globals()[name] = value
        return value
    raise AttributeError(f"module 'dihedra' has no attribute {name!r}")


def __dir__():
    return sorted(set(globals()) | set(_LAZY))


def example_path(name=""):
    """Path of a bundled example file (``hexane.pdb``, ``hexane.xtc``, ...) or of the folder."""
    from importlib.resources import files

    try:
        return str(files("dihedra.examples").joinpath(name))
    except ModuleNotFoundError:  # a source checkout: example_trajectories/ beside the package
        import os

        root = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
        return os.path.join(root, "example_trajectories", name)


__all__ = ["DihedraError", "StateScheme", "Torsion", "TorsionSet", "TorsionStates", "TrackResult", "__version__",
           "compare_with_scan", "convergence", "ensemble_couplings", "example_path", "fit_torsion_correction",
           "free_energy_profiles", "get_scheme", "load_results", "ramachandran_regions", "select_torsions",
           "state_kinetics", "track", "unbias_windows"]
