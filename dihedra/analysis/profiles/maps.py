r"""Two-dimensional free-energy profiles F(phi_a, phi_b) of pairs of torsions.

A 2-D profile needs the angle time series (``angles.parquet``, written by
``track --keep-angles``, or kept in memory by ``track(..., keep_angles=True)``); it is read only
through :meth:`~dihedra.trajectory.result.TrackResult.iter_chunks`, in chunks, so memory does not
grow with the trajectory. Pairs given as torsion types pool every group (molecule or residue) that
holds one torsion of each type. Densities, free energies and block-bootstrap errors are those of
the 1-D histogram estimate (:mod:`.estimation`) on square bins.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from ...errors import DihedraError
from ...trajectory.result import as_result
from ...units import kt_kj_mol
from .estimation import (DEFAULT_BOOTSTRAP, DEFAULT_PAIR_BIN_WIDTH_DEG, DEFAULT_SEED, MIN_BOOTSTRAP_BLOCKS, bin_centres,
                         bootstrap_multiplicities, bootstrap_spread, check_bin_width, counting_error_floor,
                         effective_count_scale, free_energy_from_counts)


def _resolve_pairs(result, a, b):
    """Torsion positions of the pairs named by (label, label) or (type, type)."""
    labels = result.torsion_set.labels
    lookup = {label: k for k, label in enumerate(labels)}
    if a in lookup and b in lookup:
        if a == b:
            raise DihedraError(f"a 2-D profile needs two different torsions; got {a!r} twice.")
        return [(lookup[a], lookup[b])]
    types = result.torsion_set.types
    known_types = set(types)
    for name in (a, b):
        if name not in lookup and name not in known_types:
            raise DihedraError(f"{name!r} is neither a torsion label nor a torsion type of this run; see "
                               "torsions.csv (e.g. " + ", ".join(labels[:2] + sorted(known_types)[:2]) + ").")
    if a in lookup or b in lookup:
        raise DihedraError(f"give either two torsion labels or two torsion types for a pair; got {a!r} and {b!r}.")
    groups = {}
    for k, t in enumerate(result.torsion_set.torsions):
        groups.setdefault(t.group, {}).setdefault(t.type, []).append(k)
    out = [(g[a][0], g[b][0]) for g in groups.values()
           if len(g.get(a, [])) == 1 and len(g.get(b, [])) == 1 and a != b]
    if not out:
        raise DihedraError(f"no molecule or residue holds exactly one torsion of type {a!r} and one of type "
                           f"{b!r}; name two torsion labels instead.")
    return out


def check_pairs(result, pairs, bin_width_deg=DEFAULT_PAIR_BIN_WIDTH_DEG):
    """Refuse, before any work, pairs that name no torsions of the result, a result without the
    angle time series, or a bin width that does not divide 360."""
    if not pairs:
        return
    for pair in pairs:
        if isinstance(pair, str) or len(pair) != 2:
            raise DihedraError(f"a pair is two torsion labels or two torsion types; got {pair!r}.")
        _resolve_pairs(result, *pair)
    if not result.has_series("angles"):
        raise DihedraError(f"2-D profiles need the angle time series, and {result.folder or 'this result'} "
                           "has no angles.parquet; rerun 'dihedra track ... --keep-angles'.")
    check_bin_width(bin_width_deg, 1.0, "2-D bin width")


def pair_profiles(result, a, b, *, temperature_k, bin_width_deg=DEFAULT_PAIR_BIN_WIDTH_DEG,
                  n_bootstrap=DEFAULT_BOOTSTRAP, seed=DEFAULT_SEED, batch_frames=None, notices=None):
    """Periodic 2-D free-energy profile F(phi_a, phi_b) from ``angles.parquet``, read in chunks.

    ``a`` and ``b`` are two torsion labels, or two torsion types (then every group with one
    torsion of each type contributes, pooled). Errors by the same block bootstrap as 1-D profiles,
    with the frames of each replica cut into the same number of blocks as the histograms, and never
    below the counting floor of the bin (:func:`~dihedra.numerics.density.counting_error_floor`);
    no errors at all (NaN) when fewer than two blocks hold samples (a single frame).

    Parameters
    ----------
    result : TrackResult
        A tracking result with the angle time series (see :func:`~dihedra.trajectory.result.as_result`).
    a, b : str
        Two torsion labels, or two torsion types.
    temperature_k : float
    bin_width_deg : float
        Bin width along each angle; a divisor of 360.
    n_bootstrap, seed : int
        Block-bootstrap resamples and their random seed.
    batch_frames : int, optional
        Frames read per chunk.
    notices : list, optional
        Receives a notice when some bins were never visited.

    Returns
    -------
    DataFrame with columns torsion_a, torsion_b, n_pairs, angle_a_deg, angle_b_deg,
    probability_density_per_deg2, free_energy_kj_mol, free_energy_err_kj_mol, sampled, n_samples.
    """
    result = as_result(result)
    kt = kt_kj_mol(temperature_k)
    if not result.has_series("angles"):
        raise DihedraError(f"2-D profiles need the angle time series, and {result.folder or 'this result'} "
                           "has no angles.parquet; rerun 'dihedra track ... --keep-angles'.")
    factor = check_bin_width(bin_width_deg, 1.0, "2-D bin width")
    nb = 360 // factor
    pairs = _resolve_pairs(result, a, b)
    hist, per_rep = _pair_histograms(result, pairs, bin_width_deg, nb, batch_frames)
    replica_of_block = np.repeat(np.arange(hist.shape[0] // per_rep), per_rep)
    mult = bootstrap_multiplicities(replica_of_block, n_bootstrap, np.random.default_rng(seed))
    counts = hist.sum(axis=0)
    density, free = free_energy_from_counts(counts, bin_width_deg ** 2, kt)
    _, bfree = free_energy_from_counts(mult @ hist, bin_width_deg ** 2, kt)
    err, _ = bootstrap_spread(bfree)
    err = np.where(counts > 0, np.fmax(err, counting_error_floor(counts, kt, effective_count_scale(result))), err)
    if (hist.sum(axis=1) > 0).sum() < MIN_BOOTSTRAP_BLOCKS:   # (one block with samples: nothing to resample)
        err = np.full_like(err, np.nan)
    if np.isfinite(free).any():
        free = free - np.nanmin(free)
    centres = bin_centres(nb)
    gx, gy = np.meshgrid(centres, centres, indexing="ij")
    single = len(pairs) == 1 and a in result.torsion_set.labels
    if notices is not None and (counts == 0).any():
        notices.append(f"2-D profile {a} / {b}: {int((counts == 0).sum())} of {counts.size} bins were never "
                       "visited (sampled = False, no free energy).")
    return pd.DataFrame({
        "torsion_a": a, "torsion_b": b, "n_pairs": len(pairs) if not single else 1,
        "angle_a_deg": gx.ravel(), "angle_b_deg": gy.ravel(),
        "probability_density_per_deg2": density, "free_energy_kj_mol": free,
        "free_energy_err_kj_mol": np.where(counts > 0, err, np.nan), "sampled": counts > 0,
        "n_samples": counts})


def _pair_histograms(result, pairs, bin_width_deg, nb, batch_frames=None):
    """Block histograms (n_blocks, nb * nb) of the angle pairs, pooled over ``pairs``, with the
    frames of each replica cut into as many blocks as the pass cut them for the 1-D histograms;
    returns them and the blocks per replica."""
    labels = result.torsion_set.labels
    cols = sorted({labels[i] for p in pairs for i in p}, key=labels.index)
    column = {c: k for k, c in enumerate(cols)}
    replicas = result.summary.get("replicas", [])
    n_frames = [int(r["frames_analysed"]) for r in replicas]
    per_rep = int(result.summary.get("parameters", {}).get("n_hist_blocks") or 16)
    hist = np.zeros((per_rep * max(1, len(n_frames)), nb * nb))
    for chunk in result.iter_chunks("angles", cols, batch_frames):
        rep = chunk.replica
        weight = chunk.weight if chunk.weight is not None else np.ones(len(chunk))
        total = n_frames[rep] if n_frames else len(chunk)
        block = rep * per_rep + np.minimum(chunk.position * per_rep // max(total, 1), per_rep - 1)
        for ia, ib in pairs:
            x = chunk.values[column[labels[ia]]].astype(float)
            y = chunk.values[column[labels[ib]]].astype(float)
            ok = np.isfinite(x) & np.isfinite(y)
            bx = np.clip(np.ceil((x[ok] + 180.0) / bin_width_deg).astype(np.int64) - 1, 0, nb - 1)
            by = np.clip(np.ceil((y[ok] + 180.0) / bin_width_deg).astype(np.int64) - 1, 0, nb - 1)
            flat = block[ok] * nb * nb + bx * nb + by
            hist += np.bincount(flat, weights=weight[ok], minlength=hist.size).reshape(hist.shape)
    return hist, per_rep
