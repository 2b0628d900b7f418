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

from ._version import __version__
from .analysis.compare import compare_with_scan
from .analysis.convergence import convergence
from .analysis.couplings import ensemble_couplings
from .analysis.kinetics import state_kinetics
from .analysis.profiles import free_energy_profiles
from .analysis.ramachandran import ramachandran_regions
from .analysis.refit import fit_torsion_correction
from .analysis.windows import unbias_windows
from .errors import DihedraError
from .io.resultsdir import load_results
from .selection.schemes import StateScheme, get_scheme
from .selection.specs import select_torsions
from .selection.torsions import Torsion, TorsionSet
from .tracking import track
from .trajectory.result import TrackResult
from .trajectory.states import TorsionStates


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
