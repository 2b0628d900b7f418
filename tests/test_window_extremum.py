"""The extremum of arcs of free-energy profiles (minima between barriers, barriers between minima):
the extreme bin found arc by arc by the compiled kernel and refined by a least-squares cubic, against
a NumPy reference written from the same rules (gathered arcs, first position of the extreme value,
numpy.polyfit's cubic through five bins, three-point parabola, the bin itself), against exact
cubics (analytic) and against the exact minimum of the Ryckaert-Bellemans potential (scipy)."""

import numpy as np
import pytest
from scipy import integrate, optimize

from dihedra.numerics.extrema import _window_extremum


def cubic_extremum(y5, kind):
    """Extremum of numpy.polyfit's least-squares cubic through y5 at x = -2..2 (the one of the right
    kind), and its value; None when the cubic has none."""
    c = np.polyfit(np.arange(-2, 3), y5, 3)
    slope = np.polyder(c)
    roots = np.roots(slope) if abs(slope[0]) > 1e-12 * np.abs(slope).max() else np.roots(slope[1:])
    for x in roots[np.isreal(roots)].real:
        curve = np.polyval(np.polyder(slope), x)
        if (curve > 1e-12 if kind == "min" else curve < -1e-12):
            return x, np.polyval(c, x)
    return None


def reference(values, rows, start, length, kind):
    """NumPy reference: every arc gathered whole, resamples one by one."""
    m, n, r = values.shape
    f = len(rows)
    pos, val, ok = np.empty((r, f)), np.empty((r, f)), np.empty((r, f), dtype=bool)
    bins = np.empty((r, f), dtype=np.int64)
    sign = 1.0 if kind == "min" else -1.0
    for a in range(f):
        cols = (start[a] + 1 + np.arange(length[a])) % n
        for s in range(r):
            sub = values[rows[a], cols, s]
            if kind == "min":
                ok[s, a] = not np.isnan(sub).any() and np.isfinite(sub.min())
                k = cols[int(np.argmin(sub))] if ok[s, a] else cols[0]
            else:
                ok[s, a] = np.isfinite(sub).all()
                score = np.where(np.isfinite(sub), sub, -np.inf)
                k = cols[int(np.argmax(score))]          # first position of the largest value
            bins[s, a] = k
            y5 = values[rows[a], (k + np.arange(-2, 3)) % n, s]
            y1, y2, y3 = y5[1:4]
            found = cubic_extremum(y5, kind) if np.isfinite(y5).all() else None
            if found is not None and abs(found[0]) <= 1 and sign * (y2 - found[1]) >= 0:
                pos[s, a], val[s, a] = k + found[0], found[1]
                continue
            bend = y1 - 2 * y2 + y3
            if np.isfinite([y1, y2, y3]).all() and sign * bend > 0:
                delta = np.clip(0.5 * (y1 - y3) / bend, -0.5, 0.5)
                pos[s, a], val[s, a] = k + delta, y2 - 0.25 * (y1 - y3) * delta
            else:
                pos[s, a], val[s, a] = k, y2
    return pos, val, ok, bins


@pytest.mark.parametrize("seed", range(40))
def test_extremum_equals_the_numpy_reference(seed):
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
        pos, val, ok, k = _window_extremum(values, rows, start, length, kind)
        ref = reference(values, rows, start, length, kind)
        np.testing.assert_array_equal(ok, ref[2])
        np.testing.assert_array_equal(k, ref[3])
        np.testing.assert_allclose(pos, ref[0], rtol=1e-9, atol=1e-9)
        np.testing.assert_allclose(val, ref[1], rtol=1e-9, atol=1e-9)
        # a refined value never lies beyond the bin it refines (above it for a minimum)
        at = values[rows[None, :], k, np.arange(len(pos))[:, None]]
        sign = 1.0 if kind == "min" else -1.0
        with np.errstate(invalid="ignore"):
            assert np.all(~ok | (sign * (at - val) >= 0))


def test_exact_cubic_gives_its_extremum_and_flat_bins_the_bin_itself():
    # analytic: a cubic sampled at the bins is its own least-squares fit; a(x - x0)^2 + b(x - x0)^3
    # has its local minimum at x0 (f'(x0) = 0, f''(x0) = 2a > 0), a skewed well that a parabola
    # through five bins misplaces by 1.7 b / a bins (the x^3 term projects onto its slope)
    n = 36
    x = np.arange(n, dtype=float)
    for kind, sign in (("min", 1.0), ("max", -1.0)):
        prof = (sign * (0.8 * (x - 10.3) ** 2 + 0.05 * (x - 10.3) ** 3) + 5.0)[None, :, None]
        pos, val, ok, _ = _window_extremum(prof, np.array([0]), np.array([3]), np.array([15]), kind)
        assert ok[0, 0] and pos[0, 0] == pytest.approx(10.3, abs=1e-9) and val[0, 0] == pytest.approx(5.0, abs=1e-9)
    # a flat bottom, bins 8..13: the first of them, its five neighbours (4, 4, 1, 1, 1) fitted by a
    # cubic whose extremum lies beyond one bin, so the three-point parabola (4, 1, 1): half a bin on
    flat = np.full((1, n, 1), 4.0)
    flat[0, 8:14, 0] = 1.0
    pos, val, ok, _ = _window_extremum(flat, np.array([0]), np.array([2]), np.array([20]), "min")
    assert ok[0, 0] and pos[0, 0] == 8.5 and val[0, 0] == 1.0 - 0.25 * 3.0 * 0.5
    # five equal values around the minimum: no extremum to place (not one set by the rounding of the
    # fit's weights), the bin itself: the first of the arc 10..13
    pos, val, _, _ = _window_extremum(flat, np.array([0]), np.array([9]), np.array([4]), "min")
    assert pos[0, 0] == 10.0 and val[0, 0] == 1.0


def test_a_sparse_bin_is_not_refined_above_its_own_value():
    # a 9-count bin between bins of 1-3 counts (free energies of a butane torsion's anti-gauche
    # slope): the least-squares curves through the five bins pass well above the low bin, and a
    # "refined" minimum higher than the bin it refines would be no refinement: the three-point
    # parabola is taken, whose vertex lies below the bin (by construction: it passes through it)
    n = 36
    prof = np.full((1, n, 1), 20.0)
    prof[0, 8:13, 0] = [10.86, 13.59, 8.14, 11.87, 10.86]
    pos, val, ok, k = _window_extremum(prof, np.array([0]), np.array([6]), np.array([7]), "min")
    assert ok[0, 0] and k[0, 0] == 10 and val[0, 0] <= 8.14 and abs(pos[0, 0] - 10) <= 0.5


def test_position_of_the_butane_gauche_minimum_from_exact_bin_averages():
    # analytic: -kT ln of the exact bin averages of exp(-V/kT) over 5-degree bins (scipy quad) of the
    # Ryckaert-Bellemans potential (Ryckaert & Bellemans, Faraday Discuss. Chem. Soc. 66 (1978) 95);
    # its minimum near 60 degrees by scipy.optimize. The well is skewed (steeper towards cis): a
    # parabola through five bins puts it 0.75 degrees off, the cubic within 0.05
    coeff = [9.28, 12.16, -13.12, -3.06, 26.24, -31.5]
    kt = 8.314462618e-3 * 298.15

    def energy(phi):
        return sum(c * np.cos(np.radians(phi - 180.0)) ** j for j, c in enumerate(coeff))

    centres = -177.5 + 5.0 * np.arange(72)
    free = np.array([-kt * np.log(integrate.quad(lambda a: np.exp(-energy(a) / kt), c - 2.5, c + 2.5)[0] / 5.0)
                     for c in centres])
    true = optimize.minimize_scalar(energy, bounds=(40, 80), method="bounded", options={"xatol": 1e-8}).x
    arc_start = int(np.flatnonzero(centres == 17.5)[0])     # the arc 22.5 .. 97.5 (the well at -60 is its mirror)
    pos, _, ok, _ = _window_extremum(free[None, :, None], np.array([0]), np.array([arc_start]), np.array([16]), "min")
    angle = centres[0] + 5.0 * pos[0, 0]
    assert ok[0, 0] and abs(angle - true) < 0.05, (angle, true)


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
