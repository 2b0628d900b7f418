"""State dynamics: transitions, dwell times, rates, Markov timescales and Eyring barriers.

This package turns state time series (one discrete trajectory per torsion and replica) into the
kinetics of torsion states and conformers. Plain functions take arrays and return arrays or tidy
DataFrames; :func:`state_kinetics` reads the time series of a tracking result chunk by chunk and
returns a :class:`KineticsResult`, whose ``save(folder)`` writes the tables.

Modules
-------
:mod:`.assignment`  core sets and fill-forward (which state each frame is in), conformer codes
:mod:`.tally`       lagged pair counts and dwell segments, streamed over the chunks of a result
:mod:`.estimators`  rates, populations from rates, Kaplan-Meier dwell times, Eyring and TST
:mod:`.markov`      reversible maximum-likelihood Markov models, implied timescales, MFPT
:mod:`.tables`      from counts and segments to the rows of the tables, many subjects at once
:mod:`.spacing`     what the frame spacing lets the tables resolve: notices and flag columns
:mod:`.driver`      :func:`state_kinetics` and :class:`KineticsResult`

State assignment
----------------
*Transition-based (core-set) assignment* (default; Buchete & Hummer, J. Phys. Chem. B 112 (2008)
6057). Every state has a core: its sector of the scheme shrunk by a margin ``m`` on both sides
(:meth:`dihedra.selection.schemes.StateScheme.core_codes`). The trajectory keeps the state of the last core
it visited until it enters another core; frames before the first core visit are unassigned. Noise
inside a well and recrossings of the barrier that do not reach the other core are therefore not
transitions. The default margin is :data:`DEFAULT_CORE_MARGIN_DEG` = 20 degrees: with the
``anti-gauche`` scheme the cores are gauche+ (20, 100], gauche- [-100, -20) and anti beyond
+-140, that is 80-degree cores around the minima of an sp3-sp3 torsion, and 40-degree buffers
around the crisp boundaries (0 and +-120 degrees).

*Crisp assignment* uses the state codes of the state time series as they are (every frame in the
state whose sector holds its angle). It counts every recrossing of a boundary and overestimates
rates; it is kept for comparison.

In both, a frame whose torsion is undefined (collinear atoms, NaN coordinates) keeps the state of
the frame before it. A new replica starts unassigned, so no transition ever joins two replicas.

Conformers are the joint states of the torsions of one group (molecule or residue), in chain order
(the ``group``/``order`` columns of ``torsions.csv``), built from the per-torsion assignments; a
conformer is unassigned until every torsion of the group is assigned.

Counts and rates
----------------
With frames ``dt`` apart, ``C_ij(tau)`` counts the pairs of frames ``(t, t + tau)`` of one discrete
trajectory in states ``i`` and ``j`` (sliding window, both assigned). Pooled results (per torsion
type, per conformer type) sum the counts of every trajectory of the pool (one per torsion, or per
group, and replica). The transitions are ``n_ij = C_ij(1)`` for ``i != j``, and the time at risk in
``i`` is ``T_i = dt sum_j C_ij(1)``. The rate constants are the maximum-likelihood estimates of a
Markov jump process,

    k_ij = n_ij / T_i,   se(k_ij) = sqrt(n_ij) / T_i,

with an exact 95 % Poisson interval (Garwood 1936) that stays meaningful when ``n_ij`` is 0. The
equilibrium populations the rates imply, ``pi`` with ``pi K = 0`` for the generator
``K_ij = k_ij``, ``K_ii = -sum_j k_ij``, are reported next to the directly counted fractions of
frames; a large difference means unconverged or non-stationary sampling.

Dwell times (lifetimes)
-----------------------
A segment is a maximal run of one state in one discrete trajectory; its dwell time is its number of
frames times ``dt``. The first segment of each trajectory (started before the first frame, or, with
core assignment, at the first core visit) and the last one (still running at the last frame) are
*right-censored*: their observed length is a lower bound of the dwell time. All segments enter the
Kaplan-Meier estimate of the survival function ``S(t)``: complete segments as events, censored ones
as survivors at their observed length (ties: events before censorings). ``mean_ps`` is the area
under ``S`` up to the longest observed segment (the restricted mean; flagged ``mean_restricted``
when that segment is censored, in which case it slightly underestimates), ``median_ps`` the first
time with ``S <= 1/2``, and ``ci_low_ps``/``ci_high_ps`` a 95 % interval of the mean (NaN for a
state left only once: one complete visit gives no spread): for pooled
rows (types, conformers) a percentile bootstrap that resamples segments (complete and censored)
with replacement; for single torsions, by default, ``mean exp(+-1.96 se / mean)`` with the
Kaplan-Meier variance of the restricted mean, ``se^2 = sum_i A_i^2 d_i / (Y_i (Y_i - d_i))``
(``A_i`` the area under ``S`` beyond duration ``i``, ``Y_i`` the segments at risk, ``d_i`` the
complete ones ending there; Klein & Moeschberger, *Survival Analysis*, 2003, sect. 4.5), because a
bootstrap of 1000 Kaplan-Meier curves per state of each of 10^4 torsions costs minutes
(``--torsion-bootstrap`` bootstraps them too; ``kinetics.json`` records which). The Markov reading,
``mean_from_rates_ps = T_i / sum_j n_ij = 1 / sum_j k_ij``, is reported next to it. For the pooled
rows the observed dwell-time distribution (``dwell_times``) and its Kaplan-Meier survival curve
(``dwell_survival``: ``S`` just after each distinct dwell time, with the segments at risk) are
tables of their own.

Markov state model
------------------
For each lag ``tau`` (``--lag-ps``, a whole number of frames) the reversible maximum-likelihood transition matrix is
estimated from ``C(tau)`` on its largest strongly connected set, for all torsions at once: the
estimate solves ``X_ij = (c_ij + c_ji) / (q_i + q_j)`` with ``q_i = c_i / sum_j X_ij`` (Bowman et
al. 2009; Prinz et al. 2011, eq. 25), found by Newton's method on a convex function of ``ln q``
(:func:`reversible_transition_matrices`; the tests compare it with deeptime). Implied timescales
``t_k(tau) = -tau / ln |lambda_k(tau)|`` (eigenvalues ``lambda_1 = 1 > |lambda_2| >= ...``) become
flat in ``tau`` once the model is Markovian; choose ``tau`` there. Mean first-passage times solve
``m_i = tau + sum_{k != j} T_ik(tau) m_k`` for target ``j``. For a two-state chain the timescale is
``-tau / ln(1 - p12 - p21)``.

Computation
-----------
The time series is read once, in chunks of about ``CHUNK_VALUES`` values (all threads together,
so the memory does not grow with the frames), by a few threads that each take whole molecules'
columns (Parquet reads only the columns asked for; NumPy and Arrow release the interpreter lock).
For every lag one ``bincount`` per chunk adds the pairs of all torsions to dense ``(torsion, from,
to)`` counts; the joint codes of conformers, too many for dense counts, are ranked within the
chunk and their pairs counted by one sort of integer keys. Segments are found from the changes of
state. Everything after that is array arithmetic over all torsions at once (rates, populations,
Kaplan-Meier statistics, Markov models) and the tables are built column by column, their text as
categorical codes, so the cost grows with the number of samples, not with a per-torsion loop: 1.2 x
10^8 samples (15,000 torsions x 8,000 frames) take 10-17 s on two cores shared with other jobs
(docs/performance.md).

Transition-state theory
-----------------------
The Eyring equation with transmission coefficient ``kappa = 1`` (IUPAC Gold Book),

    k = (k_B T / h) exp(-dG / (R T)),

turns each rate into a free-energy barrier ``dG = -R T ln(k h / (k_B T))`` (constants CODATA 2018,
:mod:`dihedra.units`), shown next to the barrier of the free-energy profile when one is given
(``barriers``: the table of ``barriers.csv`` written by ``dihedra profile``). TST counts every
crossing of the barrier top as a reaction, so it gives an upper bound on the rate: an observed
rate below the TST rate of the profile barrier is expected (recrossings, friction). The prefactor
``k_B T / h`` is not the torsional attempt frequency either, so the two barriers are a consistency
check, not two measurements of one quantity.

Example
-------
>>> from dihedra.analysis.kinetics import analyse_state_series
>>> import numpy as np
>>> traj = np.array([0, 0, 0, 1, 1, 0, 0, 0, 1, 1, 1])
>>> tables = analyse_state_series([traj], ["a", "b"], dt_ps=1.0, lags=[1])
>>> tables["transitions"][["from_state", "to_state", "count"]].values.tolist()
[['a', 'b', 2], ['b', 'a', 1]]

References
----------
N.-V. Buchete & G. Hummer, J. Phys. Chem. B 112 (2008) 6057 (core sets, transition-based
assignment). E. L. Kaplan & P. Meier, J. Am. Stat. Assoc. 53 (1958) 457. J. P. Klein & M. L.
Moeschberger, Survival Analysis, 2nd ed., Springer (2003). G. R. Bowman et al., J. Chem. Phys. 131
(2009) 124101. J.-H. Prinz et al., J. Chem. Phys. 134 (2011) 174105 (Markov models, reversible
estimator, implied timescales). H. Eyring, J. Chem. Phys. 3 (1935) 107. F. Garwood, Biometrika
28 (1936) 437.
"""

from .assignment import ASSIGNMENTS, DEFAULT_CORE_MARGIN_DEG, CoreCodes, check_core_margin, fill_forward
from .driver import TABLE_FILES, KineticsResult, frame_interval_ps, state_kinetics
from .estimators import (DEFAULT_BOOTSTRAP, TST_CAUTION, eyring_barrier_kj_mol, eyring_rate_per_s, kaplan_meier,
                         kaplan_meier_groups)
from .markov import DEFAULT_LAGS, largest_connected_set, markov_model, reversible_transition_matrices
from .tables import TABLE_COLUMNS, analyse_state_series
from .tally import StateTally, tally_result

__all__ = ["ASSIGNMENTS", "DEFAULT_BOOTSTRAP", "DEFAULT_CORE_MARGIN_DEG", "DEFAULT_LAGS", "TABLE_COLUMNS",
           "TABLE_FILES", "TST_CAUTION", "CoreCodes", "KineticsResult", "StateTally", "analyse_state_series",
           "check_core_margin", "eyring_barrier_kj_mol", "eyring_rate_per_s", "fill_forward", "frame_interval_ps",
           "kaplan_meier", "kaplan_meier_groups", "largest_connected_set", "markov_model",
           "reversible_transition_matrices", "state_kinetics", "tally_result"]
