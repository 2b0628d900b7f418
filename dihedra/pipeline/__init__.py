"""One-file pipelines: a TOML file that describes a whole analysis, run by ``dihedra run``.

Each table of the file is one call of the Python API, and its keys are that function's keyword
arguments: ``[track]`` calls :func:`dihedra.track`, ``[profile]``
:func:`dihedra.free_energy_profiles`, ``[compare]`` :func:`dihedra.compare_with_scan`,
``[kinetics]`` :func:`dihedra.state_kinetics`, ``[couplings]`` :func:`dihedra.ensemble_couplings`,
``[windows]`` :func:`dihedra.unbias_windows`, ``[figures]`` and ``[report]`` the figure set and the
report, ``[scan]`` a computed scan (see :mod:`dihedra.pipeline.steps` for the few keys that are not
keyword arguments, such as the scan file of ``[compare]``). Example::

    out = "hexane-results"              # the results folder (relative to this file)
    steps = ["track", "profile", "figures", "report"]   # optional; default: every table, in order

    [track]
    topology = "hexane.pdb"
    trajectories = ["hexane.xtc"]
    torsions = ["rotatable"]
    temperature_k = 298.15
    keep_angles = true

    [profile]
    pairs = [["HEX:C1-C2-C3-C4", "HEX:C2-C3-C4-C5"]]

    [figures]
    formats = "pdf,png"

Top-level keys: ``out`` (the results folder), ``steps`` (which tables run, in which order; a step
without a table runs with its defaults) and ``base_dir`` (the folder that relative paths are
relative to; default the folder of the TOML file). A table may be an array of tables
(``[[compare]]``) to run a step several times.

Rules:

* The steps that make the results folder (``track``, ``windows``) write it at the top-level
  ``out``; every other step analyses that folder. Neither may be set in a table.
* An unknown key is an error that names the key, the table and the valid keys (with the closest
  one as a suggestion). Switches take ``true``/``false``, numbers a number, and a key of a list
  (``trajectories``, ``lags``, ``types``) a list.
* Paths are relative to ``base_dir``: the keys that take files (``topology``, ``trajectories``,
  ``weights``, ``scan``, ``experimental``, ...), and ``torsions``, ``scheme`` or ``relation``
  strings that name a ``.toml`` file; a name such as ``rotatable`` or ``klyne-prelog`` is never
  a path.
* Every table is checked before the first step runs (unknown keys, types, missing input files,
  bin widths), so a mistake in ``[report]`` does not surface after a long ``track``.
* :func:`run_pipeline` copies the TOML file into the results folder as ``analysis.toml`` (with a
  ``base_dir`` line added, so the copy runs from anywhere) and records the call of each step, its
  duration and the file's SHA-256 in ``analysis.json``.
"""

from .runner import (COPY_NAME, RECORD_NAME, TOP_LEVEL_KEYS, Pipeline, Step, load_pipeline, run_pipeline,
                     table_arguments)
from .steps import STEP_ORDER, STEPS

__all__ = ["COPY_NAME", "RECORD_NAME", "STEPS", "STEP_ORDER", "TOP_LEVEL_KEYS", "Pipeline", "Step", "load_pipeline",
           "run_pipeline", "table_arguments"]
