"""dihedra: conformer-aware torsion analysis of molecular-dynamics trajectories.

The public API is re-exported here; see README.md for the command line.
"""

__version__ = "0.1.0"
