"""The extremum of arcs of free-energy profiles (minima between barriers, barriers between minima)
computed arc by arc by the compiled kernel: against a NumPy reference written from the same rules
(gathered arcs, first position of the extreme value, Savitzky-Golay parabola through five bins,
three-point parabola, the bin itself), and against exact parabolas (analytic)."""

import numpy as np
import pytest

from dihedra.numerics.extrema import _window_extremum

# least-squares quadratic through x = -2..2 (Savitzky-Golay weights; common practice)
SG = np.array([[-3, 12, 17, 12, -3], [-2, -1, 0, 1, 2], [2, -1, -2, -1, 2]]) / np.array([[35], [10], [14]])


def reference(values, rows, start, length, kind):
    """NumPy reference: every arc gathered whole, resamples side by side."""
    m, n, r = values.shape
    f = len(rows)
    pos, val, ok = np.empty((r, f)), np.empty((r, f)), np.empty((r, f), dtype=bool)
    for a in range(f):
        cols = (start[a] + 1 + np.arange(length[a])) % n
        sub = values[rows[a]][cols]                     # (length, r)
        if kind == "min":
            best = sub.min(axis=0)
            ok[:, a] = np.isfinite(best)
        else:
            finite = np.isfinite(sub)
            ok[:, a] = finite.all(axis=0)
            sub = np.where(finite, sub, -np.inf)
            best = sub.max(axis=0)
        k = cols[(sub == best).argmax(axis=0)]           # first position of the extreme value
        y5 = values[rows[a]][(k[:, None] + np.arange(-2, 3)) % n, np.arange(r)[:, None]]   # (r, 5)
        with np.errstate(invalid="ignore", divide="ignore"):
            c = y5 @ SG.T
            x5 = -c[:, 1] / (2 * c[:, 2])
            bend = c[:, 2] < 0 if kind == "max" else c[:, 2] > 0
            good5 = np.isfinite(y5).all(axis=1) & bend & (np.abs(x5) <= 1)
            left, mid, right = y5[:, 1], y5[:, 2], y5[:, 3]
            denom = left - 2 * mid + right
            delta = 0.5 * (left - right) / denom
            good3 = np.isfinite(delta) & np.isfinite(left) & np.isfinite(right) & (denom != 0)
            delta = np.where(good3, np.clip(delta, -0.5, 0.5), 0.0)
            v3 = np.where(good3, mid - 0.25 * (left - right) * delta, mid)
            v5 = c[:, 0] + c[:, 1] * x5 + c[:, 2] * x5 ** 2
        pos[:, a] = np.where(good5, k + x5, k + delta)
        val[:, a] = np.where(good5, v5, v3)
    return pos, val, ok


@pytest.mark.parametrize("seed", range(40))
def test_kernel_equals_the_numpy_reference(seed):
    rng = np.random.default_rng(seed)
    m, n, r = rng.integers(1, 5), rng.integers(6, 80), rng.integers(1, 7)
    values = rng.normal(size=(m, n, r)).cumsum(axis=1)
    if seed % 3 == 0:
        values = np.round(values)                        # ties and flat stretches
    values[rng.random(values.shape) < 0.1] = np.inf      # unsampled bins
    if seed % 5 == 0:
        values[rng.random(values.shape) < 0.05] = np.nan
    f = int(rng.integers(1, 12))
    rows, start, length = rng.integers(0, m, f), rng.integers(-1, n, f), rng.integers(1, n, f)   # arcs may wrap
    for kind in ("min", "max"):
        got = _window_extremum(values, rows, start, length, kind)
        ref = reference(values, rows, start, length, kind)
        np.testing.assert_array_equal(got[2], ref[2])
        for a, b in zip(got[:2], ref[:2]):
            np.testing.assert_allclose(a, b, rtol=1e-12, atol=1e-12)


def test_exact_parabola_gives_its_vertex_and_flat_bins_the_bin_itself():
    # analytic: a parabola sampled at the bins is its own least-squares fit, vertex at 10.3 bins
    n = 36
    x = np.arange(n, dtype=float)
    for kind, sign in (("min", 1.0), ("max", -1.0)):
        prof = (sign * 0.8 * (x - 10.3) ** 2 + 5.0)[None, :, None]
        pos, val, ok = _window_extremum(prof, np.array([0]), np.array([3]), np.array([15]), kind)
        assert ok[0, 0] and pos[0, 0] == pytest.approx(10.3, abs=1e-12) and val[0, 0] == pytest.approx(5.0, abs=1e-12)
    # a flat bottom, bins 8..13: the first of them, its five neighbours (4, 4, 1, 1, 1) fitted by a
    # parabola whose vertex lies beyond one bin, so the three-point one (4, 1, 1): half a bin on
    flat = np.full((1, n, 1), 4.0)
    flat[0, 8:14, 0] = 1.0
    pos, val, ok = _window_extremum(flat, np.array([0]), np.array([2]), np.array([20]), "min")
    assert ok[0, 0] and pos[0, 0] == 8.5 and val[0, 0] == 1.0 - 0.25 * 3.0 * 0.5
    # five equal values around the minimum: no vertex to place (not one set by the rounding of the
    # fit's weights), the bin itself: the first of the arc 10..13
    pos, val, _ = _window_extremum(flat, np.array([0]), np.array([9]), np.array([4]), "min")
    assert pos[0, 0] == 10.0 and val[0, 0] == 1.0


def test_a_sparse_bin_between_unsampled_ones_is_no_minimum():
    # two wells (0 and 180 degrees) with sampled slopes up to 10 kJ/mol, the bins between them
    # unsampled but for single stray bins at 100 and -100 degrees (9 +- 1.5 kJ/mol): an unsampled
    # stretch only bounds the barrier from below, so a stray bin 1 kJ/mol under the highest sampled
    # walls is not 3 standard errors deep (the depth rule of the module notes) and is no minimum;
    # counted as infinitely high walls, the unsampled bins made both of them minima
    from dihedra.numerics.extrema import find_minima

    kt = 2.479
    angles = np.arange(-177.5, 180.0, 5.0)
    dist = np.minimum(np.abs(angles), 180.0 - np.abs(angles))     # to the nearer of the two wells
    free = np.where(dist <= 40.0, dist / 4.0, np.nan)                # 0 .. 10 kJ/mol slopes
    free = np.where(np.abs(angles) >= 140.0, free + 2.0, free)      # the well at 180 2 kJ/mol higher
    err = np.where(np.isfinite(free), 0.3, np.nan)
    for stray in (-102.5, 97.5):
        k = int(np.flatnonzero(angles == stray)[0])
        free[k], err[k] = 9.0, 1.5
    found = sorted(float(angles[i]) for i in find_minima(free, err, kt))
    assert found == [-2.5, 177.5]     # (ties: the first bin of a flat bottom going up the circle)
    # a real third well beside unsampled bins keeps its place: 4 kJ/mol with walls of 10
    deep = free.copy()
    k = int(np.flatnonzero(angles == 97.5)[0])
    deep[k - 3:k + 4] = [10.0, 7.0, 5.0, 4.0, 5.0, 7.0, 10.0]
    err2 = np.where(np.isfinite(deep), 0.3, np.nan)
    assert any(abs(float(angles[i]) - 97.5) < 1.0 for i in find_minima(deep, err2, kt))
