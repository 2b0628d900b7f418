"""Is it converged? Equilibration detection, replica agreement and a forecast of the sampling still
needed, as one verdict per torsion type.

:func:`convergence` takes any tracking result and returns a :class:`ConvergenceResult`: per type,
the detected start of the equilibrated part, whether the replicas agree, the simulated time still
needed for a target error, and ``converged`` or ``not converged: <reasons>``; per type and state,
the numbers behind them; and the populations of growing prefixes and shrinking suffixes of the run.
``dihedra track`` writes the same tables into every results folder (``convergence.csv``,
``convergence_by_state.csv``, ``convergence_over_time.csv``, ``convergence.json``). The methods
(Chodera 2016 equilibration detection, a chi-square test of the replicas, the statistical
inefficiency of Chodera et al. 2007) and their thresholds are described in
:mod:`dihedra.trajectory.convergence` and :mod:`dihedra.numerics.convergence`, where they are
computed (below the tracking layer, so that ``track`` can use them).

Example
-------
>>> import dihedra
>>> res = dihedra.track(dihedra.example_path("hexane.pdb"), [dihedra.example_path("hexane.xtc")],
...                     torsions="rotatable", stop=200)
>>> conv = dihedra.convergence(res, target_error=0.02)
>>> conv.convergence.columns[:4].tolist()
['type', 'verdict', 'n_torsions', 'n_replicas']
>>> sorted(conv.over_time["direction"].unique())
['backward', 'forward']
"""

from __future__ import annotations

from dataclasses import dataclass

from ...io.outputs import file_set
from ...io.tables import read_optional_table, write_json, write_table
from ...trajectory.convergence import (AGREE_P, DG_MIN_POPULATION, DISAGREE_P, TARGET_ERROR, TARGET_ERROR_KJ_MOL,
                                       Convergence, convergence_tables)
from ...trajectory.result import as_result

__all__ = ["AGREE_P", "DG_MIN_POPULATION", "DISAGREE_P", "ConvergenceResult", "TARGET_ERROR",
           "TARGET_ERROR_KJ_MOL", "convergence"]


@dataclass
class ConvergenceResult(Convergence):
    """The convergence tables of a run (see :class:`dihedra.trajectory.convergence.Convergence`),
    with :meth:`save`."""

    def save(self, folder):
        """Write ``convergence.csv``, ``convergence_by_state.csv``, ``convergence_over_time.csv``
        and ``convergence.json`` into ``folder``; returns their paths."""
        with file_set(folder):   # (all four or none replaced)
            paths = [write_table(table, folder, name) for name, table in self.tables().items()]
            paths.append(write_json(self.record(), folder, "convergence.json"))
        return paths


def convergence(result, *, target_error=TARGET_ERROR, target_error_kj_mol=TARGET_ERROR_KJ_MOL, temperature_k=None,
                n_time_blocks=500, n_points=10, time_step_known=None):
    """Convergence of the state populations of every torsion type.

    Parameters
    ----------
    result : TrackResult or TorsionStates
        A tracking result with its state time series (:func:`dihedra.track`,
        :func:`dihedra.load_results`, or a :class:`dihedra.TorsionStates` after ``run()``).
    target_error : float
        Target standard error of a population (a fraction; default 0.01).
    target_error_kj_mol : float
        Target standard error of the free-energy difference of a state to the most populated one
        of its type (kJ/mol; default 0.5), for states of at least :data:`DG_MIN_POPULATION`.
    temperature_k : float, optional
        For that free-energy forecast (default: the run's recorded temperature; without one it is
        left out).
    n_time_blocks : int
        Time blocks per replica that the state series is summed into (default 500): the
        resolution of the detected start and the points of the error estimates.
    n_points : int
        Prefixes and suffixes of the forward and backward populations (default 10).
    time_step_known : bool, optional
        Whether the frames have physical times (default: as the run's summary records; a
        trajectory without a time step gets MDAnalysis' 1 ps per frame). Without them the
        forecasts give the sampling still needed as a multiple of the run, not as a time.

    Returns
    -------
    ConvergenceResult
        ``convergence`` (per type: ``verdict``, ``t0_ps``, ``t0_frames``, ``start``,
        ``replicas`` (``agree``, ``tension``, ``disagree`` or ``one replica``) with
        ``replica_chi2``, ``replica_dof``, ``replica_p_value``, ``population_err_max``,
        ``time_needed_ps``, ``replicas_needed``, ``forecast``, the same for the free-energy
        difference, ...), ``by_state``, ``over_time``, ``run`` (the start of the run as a whole),
        ``notices``, ``parameters``.

    References
    ----------
    Chodera, J. Chem. Theory Comput. 12 (2016) 1799 (equilibration detection); Chodera, Swope,
    Pitera, Seok & Dill, J. Chem. Theory Comput. 3 (2007) 26 (statistical inefficiency).
    """
    conv = convergence_tables(as_result(result), target_error=target_error, target_error_kj_mol=target_error_kj_mol,
                              temperature_k=temperature_k, n_time_blocks=n_time_blocks, n_points=n_points,
                              time_step_known=time_step_known)
    return ConvergenceResult(**vars(conv))


def sampling_verdicts(result):
    """{type: verdict} of the convergence checks of ``result``: its folder's ``convergence.csv``
    where it has one, else computed from its state series; empty without either."""
    folder = getattr(result, "folder", None)
    table = read_optional_table(folder, "convergence.csv") if folder else None
    if table is None and result.has_series("states"):
        table = convergence_tables(result).convergence
    if table is None or "verdict" not in table:
        return {}
    return dict(zip(table["type"].astype(str), table["verdict"].astype(str)))
