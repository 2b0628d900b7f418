r"""Density estimates of a periodic torsion angle and their block-bootstrap resamples.

The probability density p(phi) is estimated from the fine (1 degree) angle histograms that the
trajectory pass keeps per block (``blocks.npz``), in two ways, both periodic in phi:

* **histogram** -- the fine bins are summed into bins of ``bin_width_deg`` (default
  :data:`DEFAULT_BIN_WIDTH_DEG` = 5 degrees: narrow against a torsion well of 20-40 degrees,
  wide enough for a few hundred samples per bin at a barrier 5 kT high in a typical run);
  p = n_bin / (N w). Bins open at their left edge and closed at their right, as in the pass.
* **kernel** -- a von Mises kernel density, K(d) ~ exp(kappa cos d), evaluated on the fine grid by
  circular convolution of the fine histogram (a binned kernel estimate). The bandwidth is stated
  as the kernel standard deviation sigma in degrees, kappa = 1/sigma^2 (sigma in radians). Default
  rule (Silverman's rule of thumb applied within states): sigma = 0.9 s n_eff^(-1/5), where s is
  the population-weighted within-arc standard deviation of the angle about the circular mean of
  each arc of the run's state scheme, and n_eff is the effective number of independent samples
  (the median over states of the blocking estimate ``n_effective`` in populations.csv, summed over
  the torsions of a type); never below the fine bin width. The bandwidth used is written with
  every kernel row (``bandwidth_deg``) and printed.

Unsampled regions: a histogram bin without samples has ``sampled = False`` and an empty free
energy (NaN in memory, an empty cell in the CSV), never 0 or infinity. A kernel grid point counts
as sampled when the fine histogram has samples within one bandwidth of it.

Errors: a block bootstrap. The trajectory pass cuts each replica into 16 equal, contiguous
blocks of frames; a bootstrap resample draws blocks with replacement *within each replica*
(blocks are long, so the autocorrelation inside them is kept, and replicas are never mixed).
``free_energy_err_kj_mol`` is the standard deviation over resamples of -kT ln p (the normalised
density; the free-energy origin carries no error) over the resamples in which the bin is sampled,
and never less than the counting floor of the histogram bin, kT sqrt(1/n - 1/N) for n effective
samples in the bin of N (:func:`~dihedra.numerics.density.counting_error_floor`; a weighted
run's effective samples from :func:`effective_count_scale`): a bin with a few samples leaves most
blocks empty, and the bootstrap spread of such a bin collapses. In a run of few correlation times
the blocks are correlated and the bootstrap sees only a fraction r of the correlated variance: the
part of each bin's variance above its counting floor is divided by r, r from the span of the
type's state populations (:func:`short_run_ratios`,
:func:`~dihedra.numerics.density.short_run_spread`). A profile whose samples lie in fewer than two
blocks (a single frame) has no errors at all (NaN, an empty cell): one block is the
same in every resample, and the counting floor would count the torsions of one structure as
independent samples (:data:`~dihedra.numerics.density.MIN_BOOTSTRAP_BLOCKS`).

Every estimate works on a *stack* of torsions or types at once (one array operation over the
stack: the block bootstrap as one matrix product, free energies and their spread, kernel smoothing
of the blocks by FFT); the per-torsion kernel error is accumulated from sums over resamples
without keeping them (:func:`_kernel_columns`).

References
----------
Block bootstrap: Kuensch, Ann. Stat. 17 (1989) 1217. Binned kernel density estimates: Silverman,
Appl. Stat. 31 (1982) 93; rule of thumb: Silverman, Density Estimation (1986), eq. 3.31.
"""

from __future__ import annotations

import functools

import numpy as np

from ...errors import DihedraError
# the pure numerical pieces live in numerics (the state scheme ``basins`` uses them too)
from ...numerics.density import (KERNEL_FLOOR, MIN_BOOTSTRAP_BLOCKS, Profile1D,  # noqa: F401
                                 _circular_deviation_deg, _circular_reach,
                                 _histogram_stack, _kernel_setup, _kernel_stack, _resampled_free_energy,
                                 _row_min, _spread_last, _unstack, _von_mises_transform, bin_centres,
                                 blocks_with_samples, bootstrap_multiplicities, bootstrap_spread, counting_error_floor,
                                 default_bandwidths_deg, effective_samples, free_energy_from_counts,
                                 kernel_counting_floor, rebin, short_run_spread, von_mises_smooth)

#: Default width of the histogram bins of 1-D profiles (degrees).
DEFAULT_BIN_WIDTH_DEG = 5.0
#: Default width of the bins of 2-D profiles (degrees).
DEFAULT_PAIR_BIN_WIDTH_DEG = 10.0
#: Bootstrap resamples for the error band.
DEFAULT_BOOTSTRAP = 200
#: Seed of the bootstrap (results are reproducible; change with ``seed``).
DEFAULT_SEED = 20240607
#: Resampled kernel values (single precision) handled at a time per thread (stays in the cache).
_KERNEL_CHUNK = 1 << 19


# ----------------------------------------------------------------------------------------------
# Bins, bootstrap resamples, free energies
# ----------------------------------------------------------------------------------------------

def check_bin_width(bin_width_deg, fine_width_deg=1.0, what="bin width"):
    """Return the number of fine bins per bin, refusing widths that do not tile the circle."""
    try:
        width = float(bin_width_deg)
    except (TypeError, ValueError):
        raise DihedraError(f"the {what} must be a number of degrees; got {bin_width_deg!r}.") from None
    factor = width / fine_width_deg
    n_fine = int(round(360.0 / fine_width_deg))
    if not np.isfinite(factor) or factor < 1 or abs(factor - round(factor)) > 1e-9 \
            or n_fine % int(round(factor)):
        ok = [d for d in (1, 2, 3, 4, 5, 6, 9, 10, 12, 15, 20, 30) if d >= fine_width_deg]
        raise DihedraError(f"the {what} must be a multiple of the fine histogram bin "
                           f"({fine_width_deg:g} deg) that divides 360 (e.g. "
                           f"{', '.join(f'{d:g}' for d in ok[:8])}); got {bin_width_deg!r}.")
    return int(round(factor))


def check_estimate_options(n_bootstrap, bandwidth_deg=None):
    """Return ``n_bootstrap`` as int, refusing fewer than 20 resamples or a bandwidth that is not a
    positive number of degrees (``None``: the default rule)."""
    if isinstance(n_bootstrap, bool) or not float(n_bootstrap).is_integer():
        raise DihedraError(f"the number of bootstrap resamples must be a whole number; got {n_bootstrap!r}.")
    n_bootstrap = int(n_bootstrap)
    if n_bootstrap < 20:
        raise DihedraError(f"the bootstrap needs at least 20 resamples for a usable error; got {n_bootstrap}.")
    if bandwidth_deg is not None and not (0 < float(bandwidth_deg) < float("inf")):
        raise DihedraError(f"the kernel bandwidth must be a positive number of degrees; got {bandwidth_deg!r}.")
    return n_bootstrap


def effective_count_scale(result):
    """Effective samples per unit of histogram count, for the counting floor of the bin errors
    (:func:`~dihedra.numerics.density.counting_error_floor`).

    1 for an unweighted run (a count is a frame). The histograms of a weighted run hold sums of
    weights, in whatever unit the weights have: Kish's effective sample size (sum w)^2 / sum w^2
    (Kish, Survey Sampling, Wiley 1965) per unit of weight, (sum w) / (sum w^2), from the weights
    of the state time series; a result without it gets frames per unit of weight instead (the
    spread of the weights then not counted: an upper estimate of the effective samples). Both
    take the weights of a bin to spread like those of the whole run.
    """
    blocks = result.blocks
    frames = np.asarray(blocks.get("hist_block_frames", ()), dtype=float)
    weights = np.asarray(blocks.get("hist_block_weights", ()), dtype=float)
    if frames.shape != weights.shape or not len(frames) or np.array_equal(frames, weights):
        return 1.0
    if result.has_series("states"):
        total = total_sq = 0.0
        for chunk in result.iter_chunks("states", columns=[]):
            if chunk.weight is None:
                return 1.0
            w = np.asarray(chunk.weight, dtype=float)
            total += float(w.sum())
            total_sq += float(np.dot(w, w))
        if total_sq > 0:
            return total / total_sq
    return float(frames.sum() / weights.sum()) if weights.sum() > 0 else 1.0


# ----------------------------------------------------------------------------------------------
# Density estimates
# ----------------------------------------------------------------------------------------------

def _profiles_from_blocks(block_counts, mult, kt, width, count_scale=1.0, ratio=None):
    """Histogram profiles for a stack: block_counts (n_blocks, m, n_bins) -> list of Profile1D."""
    return _unstack(_histogram_stack(block_counts, mult, kt, width, count_scale, ratio))


def _kernel_columns(fine_block_counts, mult, kt, bandwidths, fine_width, count_scale=1.0, ratio=None):
    """Kernel profiles of a stack without keeping the resamples (per-torsion rows).

    Returns the bandwidths (m,) and (m, n) arrays: smoothed counts, density, free energy (shifted),
    its error (NaN where not sampled) and the sampled mask.

    The error is the bootstrap standard deviation of :func:`_kernel_stack`, computed without
    keeping the resampled free energies. With s_j the smoothed blocks (masked to the sampled
    points), s = sum_j s_j and S = sum_x s(x), resample b has density sum_j m_bj s_j(x) / T_b,
    T_b = sum_x sum_j m_bj s_j(x); relative to the estimate its ln is ln g_b(x) - ln t_b with
    g_b(x) = sum_j m_bj s_j(x) / s(x) (one matrix product in single precision) and
    t_b = T_b / S, so sums over resamples of ln g, (ln g)^2 and ln g ln t give the variance
    (relative accuracy about 1e-5). Points where some resample has no positive density are
    recomputed exactly in double precision, leaving those resamples out as :func:`bootstrap_spread`
    does. No error is below the point's counting floor (``kernel_counting_floor``); ``ratio``
    raises the spread for a short run (``short_run_spread``).
    """
    bws, smooth, sampled, smooth_blocks = _kernel_setup(fine_block_counts, bandwidths, fine_width)
    density, free = free_energy_from_counts(smooth, fine_width, kt)
    ok = sampled & (smooth > 0)
    masked = smooth_blocks * sampled
    n_boot = len(mult)
    total = mult @ masked.sum(axis=-1)  # T_b, (n_boot, m)
    m, n = smooth.shape
    s1, s2, s3 = np.empty((m, n)), np.empty((m, n)), np.empty((m, n))
    with np.errstate(divide="ignore", invalid="ignore"):
        log_t = np.log(total / smooth.sum(axis=-1))
        scaled = (masked * np.where(ok, 1.0 / smooth, 0.0)).astype(np.float32)
        mult32, log_t32 = mult.astype(np.float32), log_t.astype(np.float32)
        step = max(1, _KERNEL_CHUNK // (n_boot * n))  # torsions whose resamples stay in the cache
        for lo in range(0, m, step):
            hi = min(m, lo + step)
            g = mult32 @ scaled[:, lo:hi].reshape(len(mult32[0]), -1)  # ln g_b(x), (n_boot, k n)
            np.log(g, out=g)
            s1[lo:hi] = g.sum(axis=0).reshape(hi - lo, n)
            s2[lo:hi] = np.einsum("bk,bk->k", g, g).reshape(hi - lo, n)
            s3[lo:hi] = np.einsum("bm,bmx->mx", log_t32[:, lo:hi], g.reshape(n_boot, hi - lo, n))
        sum_t, sum_t2 = log_t.sum(axis=0)[:, None], (log_t ** 2).sum(axis=0)[:, None]
        dev = s1 - sum_t
        var = (s2 - 2.0 * s3 + sum_t2 - dev * dev / n_boot) / (n_boot - 1)
        err = kt * np.sqrt(np.clip(var, 0.0, None))
    bad = ok & ~(np.isfinite(s1) & np.isfinite(s3))
    if bad.any():  # some resample is empty there: the resamples themselves, as in _kernel_stack
        k, x = np.nonzero(bad)
        boot = np.clip(mult @ masked[:, k, x], 0.0, None)
        with np.errstate(divide="ignore", invalid="ignore"):
            bfree = -kt * (np.log(boot) - np.log(total[:, k] * fine_width))
        bfree[~(boot > 0)] = np.nan
        err[k, x] = bootstrap_spread(bfree)[0]
    floor = kernel_counting_floor(smooth, bws, fine_width, kt, count_scale)
    if ratio is not None:
        err = short_run_spread(err, floor, ratio)[0]
    err = np.where(ok, np.fmax(err, floor), np.nan)
    err = np.where((blocks_with_samples(fine_block_counts) < MIN_BOOTSTRAP_BLOCKS)[:, None], np.nan, err)
    return bws, smooth, density, free - _row_min(free)[:, None], err, ok


def _kernel_profiles(fine_block_counts, mult, kt, bandwidths, fine_width, count_scale=1.0, ratio=None):
    """Kernel profiles for a stack of fine block histograms (n_blocks, m, n_fine)."""
    return _unstack(_kernel_stack(fine_block_counts, mult, kt, bandwidths, fine_width, count_scale, ratio))


def short_run_ratios(result, types):
    """For each of ``types`` and each state of the run's scheme, (m, n_states): the fraction of the
    correlated variance that a bootstrap over the histogram blocks sees
    (:func:`~dihedra.numerics.blocking_bias.level_ratio` of the blocks of one replica at the span
    in correlation times fitted to the state's population,
    :func:`~dihedra.numerics.populations.type_state_spans`); a state without a fitted span takes
    the smallest ratio of its type, a type without any 1."""
    from ...numerics.blocking_bias import MAX_VARIANCE_FACTOR, level_ratio
    from ...numerics.populations import type_state_spans
    from ...trajectory.result import kept_block

    blocks = result.blocks
    counts = kept_block(blocks, "state_counts")
    spans = type_state_spans(counts, blocks["block_replica"], list(result.torsion_set.types))
    replica = np.asarray(blocks["hist_block_replica"])
    per_replica = len(replica) / max(1, len(np.unique(replica)))
    out = np.ones((len(types), counts.shape[2]))
    for k, t in enumerate(types):
        span = spans.get(t)
        if span is None or not np.isfinite(span).any() or per_replica < 2:
            continue
        with np.errstate(invalid="ignore"):
            ratio = np.maximum(level_ratio(span, per_replica), 1.0 / MAX_VARIANCE_FACTOR)
        out[k] = np.where(np.isfinite(ratio), ratio, np.nanmin(ratio))
    return out


def short_run_ratio_map(result, types):
    """{type: ratios by state} of :func:`short_run_ratios` for the distinct ``types``."""
    distinct = list(dict.fromkeys(types))
    return dict(zip(distinct, short_run_ratios(result, distinct)))


def bin_ratios(state_ratios, schemes, n_bins):
    """(m, n_bins): the short-run ratio (:func:`short_run_ratios`, (m, n_states)) of the state
    that each of ``n_bins`` equal bins of the circle lies in, by its centre, under the row's scheme."""
    state_ratios = np.asarray(state_ratios, dtype=float)
    return np.stack([row[_bin_codes(scheme, n_bins)] for row, scheme in zip(state_ratios, schemes)]) \
        if len(state_ratios) else np.ones((0, n_bins))


def stack_ratios(by_type, scheme, types, n_bins, n_fine):
    """The short-run ratios of a stack of torsions or types (``by_type``: {type: ratios by state}):
    by state (m, n_states), by histogram bin (m, n_bins) and by fine bin (m, n_fine)."""
    by_state = np.array([by_type[t] for t in types]).reshape(len(types), -1)
    schemes = [scheme.for_type(t) for t in types]
    return by_state, bin_ratios(by_state, schemes, n_bins), bin_ratios(by_state, schemes, n_fine)


@functools.lru_cache(maxsize=64)
def _bin_codes(scheme, n_bins):
    return scheme.assign(bin_centres(n_bins)).astype(np.int64)


def default_bandwidth_deg(fine_counts, scheme, n_effective, fine_width_deg=1.0):
    """The default kernel bandwidth (standard deviation, degrees) for one torsion or type.

    sigma = 0.9 s n_eff^(-1/5), s = population-weighted within-arc standard deviation of the
    angle (each arc of ``scheme`` about its own circular mean), at least ``fine_width_deg``.
    """
    return float(default_bandwidths_deg(np.asarray(fine_counts, dtype=float)[None, :], scheme,
                                        [n_effective], fine_width_deg)[0])


def _bandwidths(bandwidth_deg, fine_counts, scheme, n_effective, fine):
    """The given bandwidth for every row, or the default rule."""
    if bandwidth_deg is not None:
        return np.full(len(fine_counts), float(bandwidth_deg))
    return default_bandwidths_deg(fine_counts, scheme, np.asarray(n_effective, dtype=float), fine)


def error_blocks(fine_block_counts, members, labels=None):
    """The blocks behind the errors of every profile and what a reader must know of them.

    ``fine_block_counts`` (n_blocks, n_torsions, n_fine) are the block histograms of the run,
    ``members`` {type: torsion positions} the types and ``labels`` the torsions when they are
    profiled too. Returns the number of blocks with samples of the best-sampled type (the settings
    record it; fewer than :data:`MIN_BOOTSTRAP_BLOCKS`: no profile has an error) and the notices:
    the profiles without errors (samples in a single block: a single frame), and those
    whose errors come from fewer than :data:`~dihedra.numerics.statistics.MIN_BLOCKS` blocks, where
    the spread of k resampled blocks is itself uncertain by about 1 / sqrt(2 (k - 1)) (30-70 %; the
    standard error of a standard deviation from k values, common practice), so those errors are rough.
    """
    from ...errors import name_list
    from ...numerics.statistics import MIN_BLOCKS

    held = np.asarray(fine_block_counts).sum(axis=-1) > 0   # (n_blocks, n_torsions)
    by_type = {t: int(held[:, idx].any(axis=1).sum()) for t, idx in members.items()}
    rows = list(by_type.items())
    if labels is not None:
        rows += list(zip(labels, held.sum(axis=0).tolist()))
    none = [name for name, k in rows if k < MIN_BOOTSTRAP_BLOCKS]
    few = [(name, k) for name, k in rows if MIN_BOOTSTRAP_BLOCKS <= k < MIN_BLOCKS]
    notices = []
    if none:
        notices.append(f"{'all ' if len(none) == len(rows) else ''}{len(none)} profile(s) have no errors "
                       f"({name_list(none, 4)}): their samples lie in fewer "
                       f"than {MIN_BOOTSTRAP_BLOCKS} of the blocks of frames that the bootstrap resamples (a single "
                       "frame), so there is nothing to resample; their bins, minima, barriers and state "
                       "free energies have empty errors (n/a), and no error band is drawn.")
    if few:
        low, high = min(k for _, k in few), max(k for _, k in few)
        span = str(low) if low == high else f"{low} to {high}"
        notices.append(f"the errors of {len(few)} profile(s) ({name_list([n for n, _ in few], 4)}) come from a "
                       f"bootstrap over only {span} blocks with samples (fewer than "
                       f"{MIN_BLOCKS}: a run of few frames): they are rough, an error from k blocks being itself "
                       f"uncertain by about 1/sqrt(2 (k - 1)), {1 / np.sqrt(2 * (low - 1)):.0%} for {low}.")
    return max(by_type.values(), default=0), notices


def error_source(settings):
    """Where the errors of a profile set come from (``settings``: those of the set, or profiles.json),
    in words: the block bootstrap, rough from fewer than 8 blocks with samples, or none (the samples
    lie in one block: a single frame).

    >>> error_source({"n_bootstrap": 200, "n_blocks_with_samples": 1})[:9]
    'no errors'
    """
    from ...numerics.statistics import MIN_BLOCKS

    if "n_type_resamples" in settings:   # (a folder of umbrella windows: the windows' own bootstrap)
        return f"errors of the types from the windows' own bootstrap ({settings['n_type_resamples']} resamples)"
    held = settings.get("n_blocks_with_samples")
    if held is not None and held < MIN_BOOTSTRAP_BLOCKS:
        return "no errors (the samples lie in one block of frames, a single frame: nothing to resample)"
    rough = f" of only {held} blocks with samples (rough)" if held is not None and held < MIN_BLOCKS else ""
    brief = settings.get("resamples_brief", "block-bootstrap resamples")
    return f"errors from {settings['n_bootstrap']} {brief}{rough}"
