r"""Features of histogram profiles: minima, barriers and state free energies, with bootstrap errors.

The minima and barriers are computed by :mod:`dihedra.numerics.extrema` (the state scheme
``basins`` uses the same rules); this module adds the per-profile interface and the state free
energies.


* **minima** -- local minima (periodic; unsampled bins count as infinitely high) whose depth
  below the lower of their two flanking barriers is at least max(0.5 kT, 3 sigma), sigma the
  combined error of minimum and barrier; shallower dips are merged into their neighbours.
  Positions and values are refined with a least-squares cubic through the five bins around
  the extreme bin (a three-point parabola where that fails; a refined minimum never lies above
  the bin it refines).
* **barriers** -- the highest point between each pair of neighbouring minima, with its free energy
  above the global minimum and its height above each of the two minima. A barrier whose region
  holds unsampled bins is reported with ``sampled = False`` and no height (it is higher than any
  sampled value; the data cannot say how much).
* **state free energies** -- dG_B = -kT ln(p_B / p_A) for each state B of the run's scheme, relative
  to the most populated state A, from the state counts of the pass (bootstrapped on blocks of the
  same length as the histogram blocks).

The errors of minima, barriers and state free energies come from the same block-bootstrap
resamples as the profiles (:mod:`.estimation`); those of minima and barriers are never less than
the counting floors of the bins they come from. Stacks of profiles are handled at once (see
:mod:`dihedra.numerics.extrema`).
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from ...errors import name_list
from ...numerics.extrema import (BARRIER_FIELDS, MIN_DEPTH_KT, MIN_DEPTH_SIGMA,  # noqa: F401
                                 MIN_RESAMPLED_FRACTION, MINIMUM_FIELDS, _features_stack, _minima_stack,
                                 find_minima)
from .estimation import DEFAULT_BOOTSTRAP, DEFAULT_SEED, Profile1D, bootstrap_multiplicities, bootstrap_spread



def profile_features(profile, kt):
    """Minima and barriers of a histogram profile, with bootstrap errors.

    Returns
    -------
    minima : list of dict
        angle_deg, angle_err_deg, free_energy_kj_mol (above the global minimum), its error.
    barriers : list of dict
        from_minimum_deg, to_minimum_deg, angle_deg, angle_err_deg, free_energy_kj_mol (above the
        global minimum) and error, height_from_first_kj_mol / height_from_second_kj_mol with
        errors, sampled.
    """
    stack = Profile1D(angle_deg=profile.angle_deg, samples=np.atleast_2d(profile.samples),
                      density_per_deg=np.atleast_2d(profile.density_per_deg),
                      free_energy_kj_mol=np.atleast_2d(profile.free_energy_kj_mol),
                      free_energy_err_kj_mol=np.atleast_2d(profile.free_energy_err_kj_mol),
                      sampled=np.atleast_2d(profile.sampled),
                      boot_free_energy=np.where(np.isfinite(profile.boot_free_energy), profile.boot_free_energy,
                                                np.inf).T[None],
                      boot_valid_fraction=np.atleast_2d(profile.boot_valid_fraction),
                      err_floor_kj_mol=(None if getattr(profile, "err_floor_kj_mol", None) is None
                                        else np.atleast_2d(profile.err_floor_kj_mol)))
    minima, barriers = _features_stack(stack, kt)
    return ([{f: _scalar(minima[f][k]) for f in MINIMUM_FIELDS} for k in range(len(minima["row"]))],
            [{f: _scalar(barriers[f][k]) for f in BARRIER_FIELDS} for k in range(len(barriers["row"]))])


def _scalar(x):
    return bool(x) if isinstance(x, (bool, np.bool_)) else float(x)


# ----------------------------------------------------------------------------------------------
# State free energies
# ----------------------------------------------------------------------------------------------

def _merge_blocks_to(values, replica, per_replica):
    """Merge neighbouring blocks pairwise (within replicas) until at most ``per_replica`` remain."""
    from ...numerics.statistics import merge_pairs

    values = np.asarray(values, dtype=float)
    replica = np.asarray(replica)
    weights = np.ones(len(replica))
    while max(np.bincount(replica - replica.min())) > per_replica:
        values, weights, replica = merge_pairs(values, weights, replica)
    return values, replica


def state_blocks(result, n_bootstrap=DEFAULT_BOOTSTRAP, seed=DEFAULT_SEED):
    """State counts merged into blocks as long as the histogram blocks, and bootstrap multiplicities.

    Returns
    -------
    counts : ndarray (n_blocks, n_torsions, n_states)
    replica : ndarray (n_blocks,)
    mult : ndarray (n_bootstrap, n_blocks)   (drawn with ``seed + 1``)
    """
    blocks = result.blocks
    per_rep = int(np.max(np.bincount(np.asarray(blocks["hist_block_replica"]))))
    counts, replica = _merge_blocks_to(blocks["state_counts"], blocks["block_replica"], per_rep)
    mult = bootstrap_multiplicities(replica, n_bootstrap, np.random.default_rng(seed + 1))
    return counts, replica, mult


def _state_free_energy_stack(state_counts, kt, mult, ratio=None):
    """:func:`state_free_energies` for a stack: state_counts (n_blocks, m, n_states); the errors
    divided by the square root of ``ratio`` (m, n_states), the fraction of the variance that
    resampling blocks of a short run sees (a state population is correlated through and through);
    NaN for a row with fewer than two blocks with samples.

    Returns
    -------
    dict of ndarrays: ``has`` (m,) (some samples), ``reference`` (m,) (most populated state), and
    (m, n_states) ``population``, ``population_err``, ``free_energy_kj_mol``, ``free_energy_err_kj_mol``.
    """
    counts = np.asarray(state_counts, dtype=float)
    main = counts.sum(axis=0)
    total = main.sum(axis=1)
    boot = np.tensordot(mult, counts, axes=(1, 0))  # (n_boot, m, n_states)
    with np.errstate(invalid="ignore", divide="ignore"):
        p = main / total[:, None]
        pb = boot / boot.sum(axis=-1, keepdims=True)
    out = {"has": total > 0, **_state_dg(p, pb, kt)}
    if ratio is not None:   # (m, n_states); a free energy against the reference state: the smaller of the two
        r = np.asarray(ratio, dtype=float)
        ref = r[np.arange(len(r)), out["reference"]][:, None]
        out["population_err"] = out["population_err"] / np.sqrt(r)
        out["free_energy_err_kj_mol"] = out["free_energy_err_kj_mol"] / np.sqrt(np.minimum(r, ref))
    # fewer than two blocks with samples (a single frame): no error can be estimated, as in track
    alone = ((counts.sum(axis=2) > 0).sum(axis=0) < 2)[:, None]
    for key in ("population_err", "free_energy_err_kj_mol"):
        out[key] = np.where(alone, np.nan, out[key])
    return out


def _state_dg(p, pb, kt):
    """State free energies from the state probabilities of a stack (m, n_states) and of its
    resamples (n_bootstrap, m, n_states): the fields of :func:`_state_free_energy_stack` but ``has``."""
    rows = np.arange(p.shape[0])
    with np.errstate(invalid="ignore", divide="ignore"):
        ref = np.argmax(np.where(np.isnan(p), -np.inf, p), axis=1)
        dg = -kt * np.log(p / p[rows, ref][:, None]) + 0.0   # + 0.0: no negative zero
        dgb = -kt * np.log(pb / pb[:, rows, ref][..., None])
    dgb[~np.isfinite(dgb)] = np.nan
    dg_err, _ = bootstrap_spread(dgb)
    p_err, _ = bootstrap_spread(pb)
    return {"reference": ref, "population": p, "population_err": p_err,
            "free_energy_kj_mol": np.where(p > 0, dg, np.nan),
            "free_energy_err_kj_mol": np.where(p > 0, dg_err, np.nan)}


def _state_rows(st, state_labels):
    """The rows of the first profile of a stack of state free energies (:func:`_state_dg`)."""
    ref = int(st["reference"][0])
    return [{"state": label, "reference_state": state_labels[ref], "population": st["population"][0, s],
             "population_err": st["population_err"][0, s], "free_energy_kj_mol": st["free_energy_kj_mol"][0, s],
             "free_energy_err_kj_mol": st["free_energy_err_kj_mol"][0, s]}
            for s, label in enumerate(state_labels)]


def state_free_energies(state_counts, block_replica, state_labels, kt, mult):
    """dG_B = -kT ln(p_B / p_A) per state, A the most populated, with bootstrap errors.

    Parameters
    ----------
    state_counts : ndarray (n_blocks, n_states)
    mult : ndarray (n_bootstrap, n_blocks)

    Returns
    -------
    list of dict: state, reference_state, population, population_err, free_energy_kj_mol, error.
    """
    st = _state_free_energy_stack(np.asarray(state_counts, dtype=float)[:, None, :], kt, mult)
    if not st["has"][0]:
        return []
    return _state_rows(st, state_labels)


def state_free_energies_of_probabilities(population, boot_population, state_labels, kt):
    """:func:`state_free_energies` from state probabilities (n_states,) and those of the bootstrap
    resamples (n_bootstrap, n_states), e.g. reweighted ones; the same rows."""
    return _state_rows(_state_dg(np.asarray(population)[None, :], np.asarray(boot_population)[:, None, :], kt),
                       state_labels)


def with_spread_between_torsions(state_dg, populations_by_type, kt, torsions=()):
    """The type rows (``torsion == ""``) of a state free-energy table with errors that include the
    spread between the torsions of a type, as the pooled populations of the run have them; also the
    rows of the ``torsions`` named (each alone in its type, with the type's rows).

    The bootstrap of a type's pooled counts resamples blocks of time only: torsions of one type in
    different surroundings (the residues of a protein), or torsions that never change state, give
    it a small error (0 where nothing moves) however much they differ. ``populations_by_type``
    (the run's pooled table: mean over the torsions, its error with the random-effects spread where
    they are heterogeneous) gives the population error that does not hide that; each type row
    takes the larger of the two (the bootstrap sees torsions of a type that move together, which
    the pooled table takes as independent; the umbrella windows' bootstrap also re-estimates their
    free energies), and the free-energy error the larger of the bootstrap's and
    kT sqrt((se_B / p_B)^2 + (se_A / p_A)^2) from those population errors (A the reference state;
    the delta method without the covariance of the two, which is negative for populations that
    sum to one: an upper estimate).

    Returns
    -------
    DataFrame
        ``state_dg`` with ``population_err`` and ``free_energy_err_kj_mol`` of the type rows raised
        where the pooled table's errors are larger (rows of types or states it lacks unchanged).
    """
    if populations_by_type is None or not len(state_dg) or not len(populations_by_type):
        return state_dg
    pooled = populations_by_type.set_index(["type", "state"])["population_err"]
    pooled = pooled[~pooled.index.duplicated()]
    out = state_dg.copy()
    rows = np.flatnonzero(out["torsion"].astype(str).isin(["", *torsions]).to_numpy())
    tor, typ, state, reference = (out[c].astype(str).to_numpy()[rows]
                                  for c in ("torsion", "type", "state", "reference_state"))
    key, ref = pd.MultiIndex.from_arrays([typ, state]), pd.MultiIndex.from_arrays([typ, reference])
    se = pooled.reindex(key).to_numpy(dtype=float)
    se_ref = pooled.reindex(ref).to_numpy(dtype=float)
    p = out["population"].to_numpy(dtype=float)[rows]
    p_ref = pd.Series(p, index=pd.MultiIndex.from_arrays([tor, typ, state])).reindex(
        pd.MultiIndex.from_arrays([tor, typ, reference])).to_numpy(dtype=float)
    is_ref = state == reference
    with np.errstate(invalid="ignore", divide="ignore"):
        # (the reference against itself: 0, but no error where its population has none, a single frame)
        delta = np.where(is_ref, np.where(np.isfinite(se_ref), 0.0, np.nan),
                         kt * np.sqrt((se / p) ** 2 + (se_ref / p_ref) ** 2))
    for column, floor in (("population_err", se), ("free_energy_err_kj_mol", np.where(p > 0, delta, np.nan))):
        values = out[column].to_numpy(dtype=float).copy()
        values[rows] = np.where(np.isfinite(floor), np.fmax(values[rows], floor), values[rows])
        out[column] = values
    return out


def type_notices(result):
    """The notices of a profile on the run's types: mixtures (:func:`mixture_notice`) and types
    whose torsions never changed state (:func:`frozen_notice`)."""
    found = (mixture_notice(getattr(result, "populations_by_type", None)), frozen_notice(result))
    return [n for n in found if n]


def frozen_notice(result):
    """A sentence on the types none of whose torsions changed state (but for momentary excursions;
    :func:`dihedra.trajectory.convergence.frozen_types`), or ``None``: their profiles hold the
    starting structures, not an equilibrium."""
    from ...trajectory.convergence import frozen_types

    names = [t for t in dict.fromkeys(result.torsion_set.types) if t in frozen_types(result)]
    if not names:
        return None
    shown = name_list(names, 6)
    return (f"{len(names)} type(s) never changed state in any torsion, but for momentary excursions ({shown}; "
            "state_changes_seen in convergence.csv): their profiles, minima, barriers and state free energies "
            "show the starting structures (each torsion where it began), not an equilibrium between states; "
            "read none of them as free energies: whatever error bars they carry do not measure any sampling between "
            "states.")


def mixture_notice(populations_by_type):
    """A sentence on the types whose torsions differ more than their errors explain (the run's
    pooled table marks them ``heterogeneous``), or ``None``."""
    if populations_by_type is None or "heterogeneous" not in populations_by_type:
        return None
    flagged = populations_by_type[populations_by_type["heterogeneous"].astype(bool)]
    names = list(dict.fromkeys(flagged["type"].astype(str)))
    if not names:
        return None
    shown = name_list(names, 6)
    return (f"{len(names)} type(s) pool torsions that differ more than their own error bars explain ({shown}; "
            "heterogeneous in populations_by_type.csv): their pooled profiles, minima and barriers describe a "
            "mixture, and their error bars cover sampling in time only; their state populations and free "
            "energies include the spread between the torsions. The profiles of single torsions (per_torsion=True, "
            "--per-torsion on the command line) show how they differ.")


def profile_notices(by_type, barriers):
    """Notices on unvisited bins and unsampled barriers of the pooled profiles."""
    notices = []
    unvisited = {t: int((~h.sampled).sum()) for t, (h, _) in by_type.items()}
    n_bins = sum(unvisited.values())
    if n_bins:
        n_types = sum(1 for v in unvisited.values() if v)
        notices.append(f"{n_bins} histogram bins of {n_types} type(s) were never visited: they are "
                       "marked sampled = False with no free energy (the data give only a lower bound there).")
    pooled_barriers = barriers[barriers["torsion"] == ""]
    n_unsampled = int((~pooled_barriers["sampled"].astype(bool)).sum())
    if n_unsampled:
        notices.append(f"{n_unsampled} barrier(s) of the pooled profiles cross unsampled "
                       "regions; their height is unknown (higher than any sampled value).")
    return notices

