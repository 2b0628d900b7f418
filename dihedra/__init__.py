"""dihedra: conformer-aware torsion analysis of molecular-dynamics trajectories.

The Python API mirrors the command line::

    from dihedra import track, example_path
    res = track(example_path("hexane.pdb"), [example_path("hexane.xtc")],
                torsions="rotatable", scheme="anti-gauche")
    res.populations_by_type      # pandas DataFrame
"""

from ._version import __version__  # noqa: E402,F401

from .errors import DihedraError  # noqa: E402
from .selection.schemes import StateScheme, get_scheme  # noqa: E402
from .selection.torsions import Torsion, TorsionSet, select_torsions  # noqa: E402


def example_path(name=""):
    """Path of a bundled example file (``hexane.pdb``, ``hexane.xtc``, ...) or of the folder."""
    from importlib.resources import files

    try:
        return str(files("dihedra.examples").joinpath(name))
    except ModuleNotFoundError:  # a source checkout: example_trajectories/ beside the package
        import os

        root = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
        return os.path.join(root, "example_trajectories", name)


def track(*args, **kwargs):
    """See :func:`dihedra.track.track`."""
    from .tracking import track as _track

    return _track(*args, **kwargs)


def load_results(folder):
    """See :func:`dihedra.io.resultsdir.load_results`."""
    from .io.resultsdir import load_results as _load

    return _load(folder)


__all__ = ["DihedraError", "StateScheme", "Torsion", "TorsionSet", "example_path", "get_scheme",
           "load_results", "select_torsions", "track"]
