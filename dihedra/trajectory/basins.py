r"""States from the sampled distribution (``--scheme basins``): the free-energy basins of each
torsion type.

Method
------
The fine angle histograms of the torsions of a type are pooled and smoothed with the von Mises
kernel of the profiles (:mod:`dihedra.numerics.density`; bandwidth by the same rule, 0.9 s
n_eff^(-1/5), s the within-state spread of the angle), and F = -kT ln p is computed with its
block-bootstrap error. Its minima and the barriers between them follow the rules of the profile
features (:mod:`dihedra.numerics.extrema`): a minimum counts when it lies at least max(0.5 kT,
3 combined standard errors) below the lower of its two barriers; shallower dips merge into their
neighbours. Every basin is one state, from the barrier before its minimum to the barrier after it
(open at its start, closed at its end); a barrier across unsampled bins lies in the middle of them,
so an unsampled region is a boundary, never a state. The spread s needs states, so the bandwidth
is found twice: first within the 120-degree sectors of ``anti-gauche``, then within the basins
found with it.

Labels
------
A basin is named by the Klyne-Prelog sector of its minimum (Klyne & Prelog, Experientia 16 (1960)
521), in words of the trade where they fit, so that a label means the same position in every type
and run: a type whose minima all lie in sp and ap and include one in sp is a planar pair, ``cis``
(sp) and ``trans`` (ap); one whose minima all lie in ap, +sc and -sc has ``anti``, ``gauche+`` and
``gauche-``; any other keeps the sector names for all its basins (``+sc`` and ``-ac``, not
``gauche+`` beside ``-ac``), so that one type speaks one naming system. Two minima in one sector
are told apart by their angle (``gauche+@45``, ``gauche+@85``).

Cost
----
The states are needed before the pass that counts them, so ``basins`` reads the trajectory
twice: a first pass (fine histograms only; no time series, the torsions of the basin types only),
then the pass of the run with the basins as its scheme. The first pass costs about as much as the
pass of the run without its time series (``benchmarks/bench_basins.py`` measures both).
"""

from __future__ import annotations

import time
import warnings

import numpy as np
import pandas as pd

from ..errors import DihedraError
from ..numerics.density import (_kernel_stack, bootstrap_multiplicities, default_bandwidths_deg,
                                effective_samples)
from ..numerics.extrema import MIN_DEPTH_KT, MIN_DEPTH_SIGMA, _features_stack
from ..numerics.populations import torsion_populations
from ..selection.schemes import StateScheme, _from_arcs, anti_gauche, klyne_prelog
from ..selection.torsions import TorsionSet
from ..units import kt_kj_mol
from .assemble import pass_threads
from .trackpass import TorsionPass

#: Bootstrap resamples of the basin search, and their seed (results are reproducible).
N_BOOTSTRAP = 200
SEED = 20240607
#: Name of the scheme of every basin type.
NAME = "basins"
#: Columns of the basin table (schemes.csv of a results folder).
COLUMNS = ["type", "state", "minimum_deg", "minimum_err_deg", "free_energy_kj_mol", "free_energy_err_kj_mol",
           "from_deg", "to_deg", "from_barrier_sampled", "bandwidth_deg"]

_WORDS = {"ap": "anti", "+sc": "gauche+", "-sc": "gauche-"}
#: Order of the labels in a scheme (then by angle), as in the built-in schemes.
_RANK = ("trans", "cis", "anti", "gauche+", "gauche-", "sp", "+sc", "+ac", "ap", "-ac", "-sc")


def basin_labels(minima_deg):
    """The labels of basins whose minima lie at ``minima_deg`` (see the module notes).

    Examples
    --------
    >>> basin_labels([180.0, 62.0, -65.0])
    ['anti', 'gauche+', 'gauche-']
    >>> basin_labels([179.0, 2.0]), basin_labels([100.0, -100.0])
    (['trans', 'cis'], ['+ac', '-ac'])
    """
    kp = klyne_prelog()
    sectors = [kp.labels[c] for c in kp.assign(np.asarray(minima_deg, dtype=float))]
    planar = "sp" in sectors and set(sectors) <= {"sp", "ap"}
    # one naming system per type: words only where every minimum has one (a basin at +sc beside
    # one at -ac stays +sc, not gauche+)
    words = {"sp": "cis", "ap": "trans"} if planar else _WORDS if set(sectors) <= set(_WORDS) else {}
    base = [words.get(s, s) for s in sectors]
    return [b if base.count(b) == 1 else f"{b}@{round(float(x)):d}" for b, x in zip(base, minima_deg)]


def basin_scheme(minima_deg, barriers_deg):
    """The scheme of one type: basin k runs from ``barriers_deg[k - 1]`` (open) to
    ``barriers_deg[k]`` (closed), the barrier after its minimum ``minima_deg[k]``.

    Examples
    --------
    >>> s = basin_scheme([-60.0, 60.0, 180.0], [0.0, 120.0, -120.0])
    >>> s.labels, [s.labels[c] for c in s.assign([-10.0, 100.0, 150.0])]
    (('anti', 'gauche+', 'gauche-'), ['gauche-', 'gauche+', 'anti'])
    """
    labels = basin_labels(minima_deg)
    if len(labels) == 1:
        return StateScheme(name=NAME, labels=(labels[0],), boundaries_deg=(180.0,), arc_states=(0,),
                           start_closed=(False,))
    starts = np.roll(np.asarray(barriers_deg, dtype=float), 1)
    order = sorted(labels, key=lambda label: (_RANK.index(label.partition("@")[0]), labels.index(label)))
    return _from_arcs(NAME, [(label, float(s), False) for label, s in zip(labels, starts)], labels=order)


def _pooled(hist, types, wanted):
    """Fine block histograms summed over the torsions of each wanted type: (n_blocks, n_types, n_bins)."""
    types = np.asarray(types, dtype=object)
    return np.stack([np.asarray(hist[:, types == t], dtype=float).sum(axis=1) for t in wanted], axis=1)


def find_basins(hist, hist_block_replica, types, wanted, temperature_k, n_effective, fine_width_deg=1.0,
                n_bootstrap=N_BOOTSTRAP, seed=SEED):
    """The basins of each wanted torsion type from fine block histograms.

    Parameters
    ----------
    hist : ndarray (n_blocks, n_torsions, n_bins)
        Fine angle histograms per block (the pass's ``histograms``).
    hist_block_replica : ndarray (n_blocks,)
        Replica of each block (bootstrap resamples never mix replicas).
    types : list of str
        Type of each torsion.
    wanted : list of str
        The types to find basins for.
    temperature_k : float
    n_effective : ndarray (n_torsions,)
        Effective independent samples of each torsion (for the bandwidth rule).

    Returns
    -------
    schemes : dict
        type -> :class:`StateScheme` (named ``basins``).
    table : DataFrame
        :data:`COLUMNS`, one row per basin.
    notices : list of str
    """
    kt = kt_kj_mol(temperature_k)
    pooled = _pooled(hist, types, wanted)
    totals = pooled.sum(axis=(0, 2))
    neff = np.array([np.asarray(n_effective)[np.asarray(types, dtype=object) == t].sum() for t in wanted])
    mult = bootstrap_multiplicities(hist_block_replica, n_bootstrap, np.random.default_rng(seed))
    partition = [anti_gauche()] * len(wanted)
    for _ in range(2):   # bandwidth within anti-gauche sectors, then within the basins found with it
        bws = default_bandwidths_deg(pooled.sum(axis=0), partition, neff, fine_width_deg)
        stack = _kernel_stack(pooled, mult, kt, bws, fine_width_deg)
        minima, barriers, partition = _significant_basins(stack, kt)
    rows, notices = [], []
    for k, t in enumerate(wanted):
        if totals[k] <= 0:
            notices.append(f"type {t} was never defined in the frames, so it has no basins: one state, unsampled.")
            partition[k] = StateScheme(name=NAME, labels=("unsampled",), boundaries_deg=(180.0,), arc_states=(0,),
                                       start_closed=(False,))
            continue
        rows.extend(_table_rows(t, minima, barriers, k, partition[k], bws[k]))
    table = pd.DataFrame(rows, columns=COLUMNS)
    unsampled = table.loc[~table["from_barrier_sampled"].astype(bool), "type"].unique()
    if len(unsampled):
        notices.append(f"{len(unsampled)} type(s) have basins bounded by unsampled regions (e.g. {unsampled[0]}): "
                       "such a boundary lies in the middle of the unvisited angles; no state is made of them.")
    return dict(zip(wanted, partition)), table, notices


def _significant_basins(stack, kt, max_rounds=20):
    """Minima, barriers and the basin scheme of every row of a kernel stack, keeping only basins
    whose population is at least :data:`MIN_DEPTH_SIGMA` bootstrap errors above zero: a few stray
    visits to an otherwise unsampled region (an island between unvisited bins, whose barriers are
    unknown and so never too low) make no state; their bins can no longer hold a minimum and join
    the boundary region between the basins around them."""
    m, n = stack.free_energy_kj_mol.shape
    with np.errstate(over="ignore", invalid="ignore"):
        boot = np.exp(-np.asarray(stack.boot_free_energy, dtype=float) / kt)   # (m, n, r); unsampled: 0
    boot = np.where(np.isfinite(boot), boot, 0.0)
    boot /= np.maximum(boot.sum(axis=1, keepdims=True), 1e-300)
    density = np.nan_to_num(np.asarray(stack.density_per_deg, dtype=float)) * stack.width_deg
    stack.boot_valid_fraction = np.array(stack.boot_valid_fraction, dtype=float, copy=True)
    for _ in range(max_rounds):
        minima, barriers = _features_stack(stack, kt)
        schemes = [_scheme_of_row(minima, barriers, k) for k in range(m)]
        dropped = False
        for k, scheme in enumerate(schemes):
            if scheme.n_states < 2:
                continue
            codes = scheme.assign(stack.angle_deg)
            pop = np.bincount(codes, density[k], minlength=scheme.n_states)
            boot_pop = np.stack([boot[k, codes == s].sum(axis=0) for s in range(scheme.n_states)])
            weak = pop < MIN_DEPTH_SIGMA * boot_pop.std(axis=1, ddof=1)
            if weak.any() and not weak.all():
                stack.boot_valid_fraction[k, np.isin(codes, np.flatnonzero(weak))] = 0.0
                dropped = True
        if not dropped:
            break
    return minima, barriers, schemes


def _scheme_of_row(minima, barriers, k):
    sel = minima["row"] == k
    if not sel.any():
        return anti_gauche()
    return basin_scheme(minima["angle_deg"][sel], barriers["angle_deg"][barriers["row"] == k])


def _table_rows(ttype, minima, barriers, k, scheme, bandwidth):
    sel = np.flatnonzero(minima["row"] == k)
    bsel = np.flatnonzero(barriers["row"] == k)
    ends = barriers["angle_deg"][bsel]
    starts = np.roll(ends, 1)
    sampled = np.roll(barriers["sampled"][bsel], 1)
    labels = basin_labels(minima["angle_deg"][sel])
    one = len(sel) == 1
    return [(ttype, label, float(minima["angle_deg"][i]), float(minima["angle_err_deg"][i]),
             float(minima["free_energy_kj_mol"][i]), float(minima["free_energy_err_kj_mol"][i]),
             np.nan if one else float(a), np.nan if one else float(b), bool(s), float(bandwidth))
            for label, i, a, b, s in zip(labels, sel, starts, ends, sampled)]


def first_pass(replicas, tset, scheme, backend=None, n_workers=1, threads=None):
    """The fine histograms and state counts of every replica, by a pass without time series.

    ``replicas`` is a list of (universe, frames, weights, dt_ps); ``backend`` and ``n_workers``
    as the run's own pass takes them (a backend name, or a backend object such as the
    :class:`~dihedra.trajectory.distributed.DistributedBackend` of a dask cluster, whose workers
    then share this pass too). Returns (histograms, hist_block_replica, state_counts,
    block_replica)."""
    serial = backend in (None, "serial") and int(n_workers or 1) <= 1
    hists, hreps, counts, sreps = [], [], [], []
    for r, (universe, frames, weights, dt_ps) in enumerate(replicas):
        tp = TorsionPass(universe, tset, scheme, weights=weights, series=None, replica=r, dt_ps=dt_ps,
                         threads=pass_threads(threads, "serial" if serial else "parallel"))
        kwargs = {"frames": np.asarray(frames)}
        if not serial:
            from .distributed import backend_kwargs

            kwargs.update(backend_kwargs(backend if backend not in (None, "serial") else "multiprocessing",
                                         int(n_workers or 1)))
        with warnings.catch_warnings():
            warnings.filterwarnings("ignore", message="Reader has no dt information")
            warnings.filterwarnings("ignore", category=DeprecationWarning)
            tp.run(**kwargs)
        hists.append(tp.results.histograms)
        hreps.append(np.full(tp.n_hist_blocks, r))
        counts.append(tp.results.state_counts)
        sreps.append(np.full(tp.n_state_blocks, r))
    return np.concatenate(hists), np.concatenate(hreps), np.concatenate(counts), np.concatenate(sreps)


def need_temperature(temperature_k):
    """Refuse basins without a temperature (their depth is counted in kT)."""
    if temperature_k is None:
        raise DihedraError("--scheme basins needs the temperature (its basins must be 0.5 kT deep): give "
                           "--temperature K (temperature_k).")


def plan_basins(choice, replicas, tset, temperature_k, backend=None, n_workers=1, threads=None):
    """The scheme of a run whose choice (:class:`~dihedra.selection.choice.SchemeChoice`) has basin
    types: a first pass over ``replicas`` (list of (universe, frames, weights, dt_ps)), then the
    basins of each of those types.

    Returns
    -------
    scheme : StateScheme or SchemeSet
    table : DataFrame
        The basins (:data:`COLUMNS`).
    record : dict
        What the first pass did (frames, seconds) and the rules, for the summary.
    notices : list of str
    """
    need_temperature(temperature_k)
    started = time.time()
    wanted = choice.basin_types
    sub = TorsionSet([t for t in tset.torsions if t.type in set(wanted)])
    provisional = anti_gauche()
    hist, hrep, counts, srep = first_pass(replicas, sub, provisional, backend, n_workers, threads)
    pops = torsion_populations(counts, srep, sub.labels, sub.types, provisional.labels)
    neff = effective_samples(pops, sub.labels)
    basins, table, notices = find_basins(hist, hrep, sub.types, wanted, temperature_k, neff)
    record = {"method": "minima of the von Mises kernel profile pooled per type, at least "
                        f"max({MIN_DEPTH_KT} kT, {MIN_DEPTH_SIGMA} combined standard errors) deep; boundaries at "
                        "the barriers between them (unsampled regions: boundaries)",
              "temperature_k": float(temperature_k), "n_bootstrap": N_BOOTSTRAP, "seed": SEED,
              "first_pass": {"torsions": len(sub), "frames": [int(len(f)) for _, f, _, _ in replicas],
                             "seconds": round(time.time() - started, 3),
                             "backend": backend if isinstance(backend, str) or backend is None
                             else type(backend).__name__, "workers": int(n_workers or 1)}}
    return choice.resolve(basins), table, record, notices
