r"""Do the samples fit the window table? The restraint check of umbrella windows.

A window table with a slip in it (a centre off by half a turn or given as 720, a force constant
per degree squared or in kcal/mol) still gives windows that overlap and MBAR and WHAM profiles
that agree, and so a confident but wrong profile. Two checks test the table against the samples
before the biases are removed; a window that fails either is reported loudly (a ``WARNING:``
first among the notices; ``restraint_consistent`` false in windows.csv, ``restraints_consistent``
false in windows.json), and the result is unusable until the table is fixed.

Each window on its own
----------------------
The bias :math:`\tfrac12 k d^2` holds a window at a mean offset :math:`\bar d` from its centre
only against a mean force :math:`k \bar d` of the system, and narrows it to a variance
:math:`kT / (k + F'')` (Kumar et al. 1992; the harmonic approximation of the biased
distribution). A window that needs a mean force above :data:`MAX_MEAN_FORCE` (with
:math:`|\bar d|` more than four restraint widths :math:`\sqrt{kT/k}`, beyond noise) or a
curvature :math:`F'' < -` :data:`MAX_CURVATURE` to explain its samples contradicts its restraint:
a centre off by 180 degrees or by whole turns of a typo, a force constant far too stiff.

This cannot see a force constant that is too weak: the windows are then narrower than their
restraint alone would allow, and a free-energy well narrows a window too.

Neighbouring windows together: the force constants
--------------------------------------------------
Whatever the free energy F, window i samples :math:`p_i(\phi) \propto e^{-F(\phi)/kT - u_i(\phi)}`,
so where two windows both sample, :math:`\ln h_i(\phi) - \ln h_j(\phi) = -(u_i(\phi) - u_j(\phi))
+ c`: how differently two windows sample the angles they share is set by their biases alone, not
by F (the relation WHAM rests on; Kumar et al. 1992). If the true biases are :math:`\lambda` times
the stated ones, :math:`\lambda` is the slope of that log ratio against
:math:`z = -(u_i - u_j)/kT` of the table. It is estimated for each neighbouring pair by maximum
likelihood: given a bin's total :math:`h_i + h_j`, its count :math:`h_i` is binomial with log odds
:math:`a + \lambda z` (a logistic regression; conditioning on the totals makes it free of F and of
the cut-off of sparse bins, which biases a fit of the log ratio towards 0), with the standard error
of the fit times :math:`\sqrt{g}` of the two windows (correlated samples).

A correct table gives :math:`\lambda = 1` (0.94-1.04 on the bundled butane windows, 0.83-1.16 on
synthetic windows of k = 40 over barriers of 45 kJ/mol). A force constant per degree squared
given for one per radian squared gives :math:`(180/\pi)^2 = 3283`, kcal/mol given for kJ/mol
4.184, the k of a bias :math:`k d^2` given for that of :math:`\tfrac12 k d^2` 2. The table's force
constants contradict the samples when more than half of the neighbouring pairs that share at least
:data:`MIN_SHARED_SAMPLES` samples (:math:`\sum_b \min(h_i, h_j)`) put :math:`\lambda` beyond
:data:`K_RATIO_TOLERANCE` (or below its inverse) by more than :data:`K_RATIO_SIGMA` standard
errors, on the same side; every window of such a pair is reported, with the slip the factor
matches. A :math:`\lambda` below 0 by more than :data:`K_RATIO_SIGMA` standard errors in more than
half of the pairs is no force constant at all: the samples lie on the other side of the centres
than the restraints pull (centres with the wrong sign, or the angle convention flipped; -1 when
every centre has the wrong sign), and the warning says so. Windows that share no samples cannot be
compared (the overlap check reports them).
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from ...units import wrap_deg
from .solver import bias_kj_mol

#: A window's samples contradict its stated restraint when, to hold them where they are, the free
#: energy along the torsion would need a mean force above this (kJ/mol/rad) or a curvature below
#: minus :data:`MAX_CURVATURE` (kJ/mol/rad^2). Torsion free energies of molecules stay well inside
#: both: the Ryckaert-Bellemans butane potential (Ryckaert & Bellemans, Faraday Discuss. Chem.
#: Soc. 66 (1978) 95) has a largest slope of 66 kJ/mol/rad and a curvature of -233 kJ/mol/rad^2
#: at its cis barrier top; a two-fold amide barrier of about 85 kJ/mol (from memory) a largest
#: slope of about 85 and a top curvature of about -170.
MAX_MEAN_FORCE = 150.0
#: See :data:`MAX_MEAN_FORCE`.
MAX_CURVATURE = 600.0
#: The samples of a pair of neighbouring windows contradict the table's force constants when their
#: ratio lambda (true / stated) lies beyond this factor (either way) by more than
#: :data:`K_RATIO_SIGMA` standard errors. 1.5 keeps the smallest slip (the factor 2 of the
#: conventions 0.5 k d^2 and k d^2) in sight.
K_RATIO_TOLERANCE = 1.5
#: See :data:`K_RATIO_TOLERANCE`.
K_RATIO_SIGMA = 4.0
#: Neighbouring windows that share fewer samples than this (sum over bins of the smaller count)
#: are not compared.
MIN_SHARED_SAMPLES = 20
#: Slips whose factor lambda (true / stated force constant) the warning names: factor, how it is
#: written, the slip when the table's k is too weak by it, and when too stiff.
UNIT_SLIPS = (
    (np.degrees(1.0) ** 2, "(180/pi)^2 = 3283", "k per degree squared (kJ/mol/deg2) given as per radian squared",
     "k per radian squared multiplied by (180/pi)^2 once too often"),
    (4.184, "4.184", "k in kcal/mol given as kJ/mol", "k in kJ/mol multiplied by 4.184 once too often"),
    (2.0, "2", "the k of a bias k d^2 given for the k of 0.5 k d^2", "the k of a bias 0.5 k d^2 doubled"),
    (2.0 * 4.184, "2 x 4.184", "AMBER's k (bias k d^2, kcal/mol) given for the k of 0.5 k d^2 in kJ/mol",
     "the k of 0.5 k d^2 in kJ/mol converted as if it were AMBER's k in kcal/mol"),
    (4.184 * np.degrees(1.0) ** 2, "4.184 (180/pi)^2 = 13737", "k in kcal/mol/deg2 given as kJ/mol/rad2",
     "k in kJ/mol/rad2 converted as if it were in kcal/mol/deg2"),
)


# ----------------------------------------------------------------------------------------------
# Each window on its own
# ----------------------------------------------------------------------------------------------

def window_statistics(data, kt):
    """windows.csv without the window free energies: per window the samples, the mean and spread
    of the angle, the statistical inefficiency g of the bias energy and the restraint check of
    the window on its own (:func:`restraint_check`)."""
    from ...numerics.statistics import statistical_inefficiency

    rows = []
    for row in data.windows.itertuples(index=False):
        k = row.window
        sel = data.window == k
        a = data.angle_deg[sel]
        rad = np.radians(a)
        mean = float(np.degrees(np.arctan2(np.sin(rad).mean(), np.cos(rad).mean())))
        spread = float(np.degrees(np.sqrt(-2.0 * np.log(max(np.hypot(np.sin(rad).mean(), np.cos(rad).mean()),
                                                             1e-12)))))
        tors = data.torsion[sel]
        gs = []
        for t in np.unique(tors)[:10]:
            series = bias_kj_mol(a[tors == t], row.centre_deg, row.k_kj_mol_rad2)
            gs.append(statistical_inefficiency(series))
        rows.append({
            "window": k + 1, "centre_deg": row.centre_deg, "k_kj_mol_rad2": row.k_kj_mol_rad2,
            "trajectory": row.trajectory, "n_frames": int(row.n_frames), "n_samples": int(sel.sum()),
            "mean_angle_deg": mean, "circular_sd_deg": spread,
            "statistical_inefficiency": float(np.mean(gs)) if gs else np.nan,
            "n_effective": float(sel.sum() / np.mean(gs)) if gs else np.nan,
            "correlation_times": correlation_times(int(row.n_frames), np.mean(gs) if gs else np.nan),
            **restraint_check(mean, spread, row.centre_deg, row.k_kj_mol_rad2, kt)})
    return pd.DataFrame(rows)


def correlation_times(n_frames, g):
    """A window's length in correlation times of its bias energy: n_frames / tau with tau = (g - 1)
    / 2 frames, the correlation time of an exponential autocorrelation whose statistical
    inefficiency is g (g = 1 + 2 tau for tau of a few frames and more; common practice); inf for
    g = 1 (no correlation seen), NaN where g is unknown.

    >>> correlation_times(1000, 21.0), correlation_times(1000, 1.0)
    (100.0, inf)
    """
    if not np.isfinite(g):
        return np.nan
    return float(n_frames) / ((g - 1.0) / 2.0) if g > 1.0 else np.inf


def restraint_check(mean_deg, sd_deg, centre_deg, k_kj_mol_rad2, kt):
    """Whether a window's sampled mean and spread fit its restraint (see *Each window on its own*):
    the columns mean_offset_deg, restraint_sd_deg, mean_force_kj_mol_rad, curvature_kj_mol_rad2
    and restraint_consistent of windows.csv."""
    offset = float(wrap_deg(mean_deg - centre_deg))
    width = np.sqrt(kt / k_kj_mol_rad2)                       # rad
    force = k_kj_mol_rad2 * abs(np.radians(offset))
    sd = max(np.radians(sd_deg), 1e-9)
    curvature = kt / sd ** 2 - k_kj_mol_rad2                  # F'' from var = kT / (k + F'')
    bad = (force > MAX_MEAN_FORCE and abs(np.radians(offset)) > 4 * width) or curvature < -MAX_CURVATURE
    return {"mean_offset_deg": offset, "restraint_sd_deg": float(np.degrees(width)),
            "mean_force_kj_mol_rad": float(force), "curvature_kj_mol_rad2": float(curvature),
            "restraint_consistent": not bad}


# ----------------------------------------------------------------------------------------------
# Neighbouring windows together: the force constants
# ----------------------------------------------------------------------------------------------

def force_constant_ratios(hist, windows, pairs, kt, inefficiency):
    """lambda (true / stated force constant) of each neighbouring pair from its biased histograms.

    Parameters
    ----------
    hist : ndarray (K, 360)
        Samples of each window in 1-degree bins.
    windows : DataFrame
        centre_deg and k_kj_mol_rad2 per window (row k = window k).
    pairs : list of (int, int)
        The neighbouring pairs.
    kt : float
    inefficiency : ndarray (K,)
        Statistical inefficiency of each window (its samples count 1/g each).

    Returns
    -------
    DataFrame
        shared_samples, force_constant_ratio and force_constant_ratio_err per pair (NaN where the
        pair shares fewer than :data:`MIN_SHARED_SAMPLES` samples).
    """
    centres = windows["centre_deg"].to_numpy(float)
    ks = windows["k_kj_mol_rad2"].to_numpy(float)
    angles = np.arange(360) - 179.5
    rows = []
    for i, j in pairs:
        shared = float(np.minimum(hist[i], hist[j]).sum())
        lam = se = np.nan
        if shared >= MIN_SHARED_SAMPLES:
            total = hist[i] + hist[j]
            ok = total > 0
            z = (bias_kj_mol(angles[ok], centres[j], ks[j]) - bias_kj_mol(angles[ok], centres[i], ks[i])) / kt
            lam, se = _binomial_slope(hist[i][ok], total[ok], z)
            se *= np.sqrt(max([1.0] + [g for g in (inefficiency[i], inefficiency[j]) if np.isfinite(g)]))
        rows.append({"shared_samples": shared, "force_constant_ratio": lam, "force_constant_ratio_err": se})
    return pd.DataFrame(rows, columns=["shared_samples", "force_constant_ratio", "force_constant_ratio_err"])


def _binomial_slope(hits, totals, z, max_iter=100):
    """Maximum-likelihood slope and its standard error of hits ~ Binomial(totals, p), logit p = a +
    slope z (Newton's method with step halving on the concave log-likelihood); NaN when z does not
    vary or the fit does not converge (bins that nearly separate the two windows)."""
    zc = z - np.average(z, weights=totals)
    scale = np.sqrt(np.average(zc ** 2, weights=totals))
    if not scale > 0:
        return np.nan, np.nan
    x = np.stack([np.ones_like(zc), zc / scale], axis=1)     # scaled: a slip of 3283 fits like one of 1

    def loglik(beta):
        eta = x @ beta
        return float(hits @ eta - totals @ np.logaddexp(0.0, eta))

    beta, value = np.zeros(2), loglik(np.zeros(2))
    for _ in range(max_iter):
        eta = x @ beta
        p = np.exp(eta - np.logaddexp(0.0, eta))
        info = (x * (totals * p * (1.0 - p))[:, None]).T @ x
        step = np.linalg.lstsq(info, x.T @ (hits - totals * p), rcond=None)[0]
        t = 1.0
        while loglik(beta + t * step) < value - 1e-12 * abs(value) and t > 1e-6:
            t *= 0.5
        beta = beta + t * step
        value = loglik(beta)
        if np.max(np.abs(t * step)) < 1e-9:
            cov = np.linalg.pinv(info)
            return float(beta[1] / scale), float(np.sqrt(cov[1, 1]) / scale)
    return np.nan, np.nan


def judge_force_constants(ratios, pairs):
    """Whether the table's force constants contradict the samples (see *Neighbouring windows
    together*): ``(side, flagged)``, side ``"opposite"`` (lambda below 0: the samples lie on the
    other side of the centres), ``"weaker"`` or ``"stiffer"`` (or None) and the 0-based windows of
    the contradicting pairs."""
    lam = ratios["force_constant_ratio"].to_numpy(float)
    se = ratios["force_constant_ratio_err"].to_numpy(float)
    measured = np.isfinite(lam) & np.isfinite(se)
    with np.errstate(invalid="ignore"):
        sides = {"opposite": lam + K_RATIO_SIGMA * se < 0.0,
                 "weaker": lam - K_RATIO_SIGMA * se > K_RATIO_TOLERANCE,
                 "stiffer": lam + K_RATIO_SIGMA * se < 1.0 / K_RATIO_TOLERANCE}
    for side, hit in sides.items():
        if measured.any() and (hit & measured).sum() > measured.sum() / 2:
            return side, sorted({w for p, h in zip(pairs, hit) if h for w in p})
    return None, []


def k_from_samples(ratios, pairs, windows):
    """Per window: its stated k times the median lambda of its measured pairs (NaN without one, and
    where that median is not positive: no restraint pulls the samples where they are)."""
    lam = ratios["force_constant_ratio"].to_numpy(float)
    out = np.full(len(windows), np.nan)
    for w in range(len(windows)):
        mine = [lam[n] for n, p in enumerate(pairs) if w in p and np.isfinite(lam[n])]
        if mine and np.median(mine) > 0:
            out[w] = windows["k_kj_mol_rad2"].iloc[w] * float(np.median(mine))
    return out


# ----------------------------------------------------------------------------------------------
# What is said
# ----------------------------------------------------------------------------------------------

def restraint_warnings(wtab, own_bad, side, flagged, ratios):
    """The loud warnings (or none): windows that contradict their restraint on their own
    (``own_bad``, a mask over the rows of ``wtab``) and force constants that contradict the
    neighbouring pairs (``side``, ``flagged`` from :func:`judge_force_constants`)."""
    out = []
    bad = wtab[own_bad]
    if len(bad):
        shown = "; ".join(f"window {int(r.window)} (centre {r.centre_deg:g} deg, k {r.k_kj_mol_rad2:.6g}): sampled "
                          f"around {r.mean_angle_deg:.0f} deg, spread {r.circular_sd_deg:.0f} deg where the restraint "
                          f"allows {r.restraint_sd_deg:.2g}" for r in bad.head(4).itertuples(index=False))
        more = f" and {len(bad) - 4} more" if len(bad) > 4 else ""
        out.append(f"WARNING: {len(bad)} window(s) contradict their stated restraint: {shown}{more}. Their samples "
                   f"need a mean force above {MAX_MEAN_FORCE:g} kJ/mol/rad or a curvature below -{MAX_CURVATURE:g} "
                   "kJ/mol/rad2 to be where they are; the profile, overlap and MBAR-WHAM agreement rest on the window "
                   "table and are unusable: check the centres (degrees, IUPAC sign) and force constants "
                   "(kJ/mol/rad2) against the simulation input.")
    if side is not None:
        out.append(_force_constant_warning(wtab, side, flagged, ratios))
    return out


def _force_constant_warning(wtab, side, flagged, ratios):
    lam_all = ratios["force_constant_ratio"].to_numpy(float)
    measured = int(np.isfinite(lam_all).sum())
    lam = float(np.nanmedian(lam_all))
    marked = (f"{len(flagged)} window(s) are marked restraint_consistent false; the profile, populations and overlap "
              "rest on the stated biases and are unusable: ")
    if side == "opposite":
        return (f"WARNING: the samples lie on the other side of the window centres than the restraints pull: "
                f"neighbouring windows sample the angles they share in proportions that fit the stated biases only "
                f"with their sign reversed (a factor of about {lam:.3g} on the force constants, where a correct "
                f"table gives 1; {measured} neighbouring pair(s) compared), as when the centres have the wrong sign "
                f"or the angle convention is flipped (-1: every centre with the wrong sign). " + marked
                + "check the signs of centre_deg against the simulation input (dihedra uses the IUPAC sign).")
    factor = lam if side == "weaker" else 1.0 / lam
    k_stated = float(np.median(wtab["k_kj_mol_rad2"]))
    return (f"WARNING: the force constants of the window table are about {_factor(factor)} times {side} than the "
            f"samples show: neighbouring windows sample the angles they share in proportions that need about "
            f"{_factor(lam)} times the stated k (about {k_stated * lam:.3g} kJ/mol/rad2 where the table gives "
            f"{k_stated:.6g}; {measured} neighbouring pair(s) compared).{_likely_slip(lam)} " + marked
            + "give k_kj_mol_rad2 in kJ/mol/rad2, for the bias 0.5 k d^2.")


def _factor(x):
    """A factor as it is read: 3250, 4.18, 0.0012."""
    return f"{x:.0f}" if x >= 100 else f"{x:.3g}"


def _likely_slip(lam):
    """``" Its factor is close to ...: <slip>?"`` for the slip of :data:`UNIT_SLIPS` within 25 % of
    the factor ``lam`` (either way), or ``""``."""
    if not lam > 0:
        return ""
    for factor, written, weak, stiff in UNIT_SLIPS:
        for value, what in ((factor, weak), (1.0 / factor, stiff)):
            if abs(np.log(lam / value)) < np.log(1.25):
                return f" Its factor is close to {written}: {what}?"
    return ""


def restraint_rule():
    """The rules of both checks, for windows.json."""
    return (f"a window contradicts its restraint when its samples need a mean force above {MAX_MEAN_FORCE:g} "
            f"kJ/mol/rad (offset beyond 4 restraint widths) or a curvature below -{MAX_CURVATURE:g} kJ/mol/rad2; "
            "the force constants contradict the samples when in more than half of the neighbouring pairs that "
            f"share at least {MIN_SHARED_SAMPLES} samples the slope lambda of ln(h_i/h_j) against the stated "
            f"-(u_i - u_j)/kT (1 for a correct table) lies beyond {K_RATIO_TOLERANCE:g} or below "
            f"1/{K_RATIO_TOLERANCE:g} by more than {K_RATIO_SIGMA:g} standard errors, on the same side (below 0: "
            "the samples lie on the other side of the centres than the restraints pull)")
