r"""Fitting a torsion correction by reweighting: the model, the regularised fit, cross-validation,
the block bootstrap and the effective sample size.

The correction of torsion type t is a Fourier series in the torsion angle,

.. math::  \Delta V_t(\phi) = \sum_{n=1}^{N} a_{tn} \cos n\phi + b_{tn} \sin n\phi \quad (+\ \text{const}),

linear in its coefficients :math:`\theta = (a, b)` (only the :math:`a` with ``symmetric=True``).
Sample s (a frame, or a molecule in a frame, see :mod:`.samples`) has the features
:math:`X_{s,tn} = \sum_{i \in s,\ \mathrm{type}(i) = t} (\cos n\phi_i, \sin n\phi_i)`, so its
correction is :math:`X_s \theta` and its weight

.. math::  w_s(\theta) \propto w^0_s \exp(-X_s \theta / k_B T),

with :math:`w^0_s` the run's own weight. Every observable is a ratio of weighted sums,
:math:`O(\theta) = \sum_s w_s A_s / \sum_s w_s D_s` (a population, the probability of a profile
bin, an average coupling), possibly through a transform (a free energy
:math:`-k_B T \ln(O/\Delta\phi)`, compared up to a constant per type). The fit minimises

.. math::  L(\theta) = \frac{1}{n} \sum_o \left(\frac{g_o(\theta) - T_o - c}{\sigma_o}\right)^2
           + \lambda \sum_p (\theta_p / k_B T)^2 ,

a chi-square per observable against the targets :math:`T_o` with
:math:`\sigma_o^2 = \sigma_{target}^2 + \sigma_{systematic}^2 + \sigma_{sampled}^2` (the sampled
part from the block bootstrap at :math:`\theta = 0`), plus a ridge penalty that keeps the
reweighted ensemble close to the sampled one. This is the force-field fitting by reweighting of
Cesari, Bottaro, Lindorff-Larsen, Banas, Sponer & Bussi, J. Chem. Theory Comput. 15 (2019) 3425,
with an L2 regulariser on the parameters; the reweighting itself is the maximum-entropy (minimum
relative entropy) change of the ensemble for a given change of the potential (Pitera & Chodera,
J. Chem. Theory Comput. 8 (2012) 3445). It is solved by :func:`scipy.optimize.least_squares` with
the analytic Jacobian.

The strength :math:`\lambda` is chosen by K-fold cross-validation over contiguous blocks of the
trajectory (:data:`DEFAULT_FOLDS` pieces of every replica): for every value of
:data:`REGULARISATION_GRID`, fit on all pieces but one and score the chi-square per observable of
the piece left out, each piece in turn; the value with the lowest mean score is used (ties go to
the stronger regularisation).

The errors of the coefficients (and of everything computed from them) are the spread of refits
over bootstrap replicates, each of which varies both sources of uncertainty: the run, by
resampling its blocks with replacement (a block bootstrap), and the target, by drawing every
target value from its stated error, :math:`T_o + \sigma_o^{draw} z_o` with :math:`z_o` standard
normal (the parametric bootstrap, Efron & Tibshirani, An Introduction to the Bootstrap, Chapman &
Hall 1993, from memory), where :math:`\sigma^{draw}` is the target's own error (with
the systematic error of a Karplus relation for couplings: the parts of :math:`\sigma_o` that are
not the run's). The objective keeps its fixed :math:`\sigma_o`; :meth:`ObservableSet.drawn_target`
makes one draw.

The effective sample size of the weights is Kish's, :math:`n_{eff} = (\sum w)^2 / \sum w^2`
(Kish, Survey Sampling, Wiley 1965); its ratio to that of the run's own weights is the effective
sample fraction the correction leaves.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from ...errors import DihedraError

#: The ridge strengths tried by cross-validation (dimensionless: penalty per (coefficient / kT)^2
#: against the chi-square per observable; at 1, a coefficient of 1 kT costs as much as every
#: observable one standard error off target, the strongest that still lets a correction of a few
#: kT reach a target).
REGULARISATION_GRID = tuple(float(x) for x in 10.0 ** np.arange(-4.0, 0.01, 0.5))
#: Contiguous pieces of every replica for the cross-validation.
DEFAULT_FOLDS = 5
#: Least-squares tolerances (relative change of the cost and of the coefficients).
_TOL = 1e-10


def basis_values(phi_deg, n_terms, symmetric=False):
    """The basis functions at ``phi_deg``: array (..., n_terms) of cos(n phi), or (..., 2 n_terms)
    of cos(n phi), sin(n phi) interleaved (n = 1 .. n_terms)."""
    phi = np.radians(np.asarray(phi_deg, dtype=float))[..., None] * np.arange(1, int(n_terms) + 1)
    if symmetric:
        return np.cos(phi)
    out = np.empty(phi.shape[:-1] + (2 * int(n_terms),))
    out[..., 0::2] = np.cos(phi)
    out[..., 1::2] = np.sin(phi)
    return out


def features(samples, n_terms, symmetric=False, groups=None):
    """The features X (n_samples, n_groups * per_type) of :class:`~.samples.TorsionSamples`:
    per sample the sum of each type's basis functions over its torsions (undefined angles add 0).

    ``groups`` (one index per type of ``samples.type_names``, default one group per type) ties
    types that are one force-field term: the torsions of a group share one set of coefficients."""
    per = int(n_terms) * (1 if symmetric else 2)
    groups = np.arange(len(samples.type_names)) if groups is None else np.asarray(groups, dtype=np.int64)
    n_groups = int(groups.max()) + 1 if len(groups) else 0
    out = np.zeros((samples.n_frames, samples.n_molecules, n_groups * per))
    for k in range(len(samples.labels)):
        values = basis_values(samples.angles[k], n_terms, symmetric)
        values[~np.isfinite(values)] = 0.0
        t = int(groups[samples.type_index[k]])
        out[:, int(samples.molecule[k]), t * per:(t + 1) * per] += values
    return out.reshape(samples.n_frames * samples.n_molecules, n_groups * per)


def kish(weights):
    """Kish's effective number of samples (sum w)^2 / sum w^2 (Kish, Survey Sampling, 1965)."""
    w = np.asarray(weights, dtype=float)
    total = w.sum()
    return float(total * total / np.sum(w * w)) if total > 0 else 0.0


@dataclass
class ObservableSet:
    """Observables of one kind: ratios of weighted sums over the samples.

    Attributes
    ----------
    kind : str
        ``population``, ``free_energy`` or ``coupling``.
    numerator : scipy.sparse matrix (n_obs, n_samples)
    denominator : scipy.sparse matrix (n_den, n_samples)
    den_index : ndarray (n_obs,)
        Denominator row of each observable.
    target, target_err, systematic_err : ndarray (n_obs,)
        NaN target: reported, not fitted.
    counts : ndarray (n_obs,)
        Unweighted numerator counts (torsion-frames) of the run.
    width_deg : float or None
        For free energies: the bin width; the observable is -kT ln(O / width).
    offset_group : ndarray (n_obs,) or None
        For free energies: observables of one group are compared up to one constant.
    fitted : ndarray of bool (n_obs,)
        Which observables enter the fit.
    rows : DataFrame
        What each observable is (type and state, type and bin centre, or coupling label).
    point_draw : callable or None
        ``point_draw(rng)`` gives one draw of the target from its original points (a profile's
        points, binned again); None: :meth:`drawn_target` draws every observable on its own.
    mirror : ndarray (n_obs,) or None
        Index of the observable at the mirror image, phi -> -phi (gauche- of gauche+, the bin at
        -65 deg of the one at +65; itself for anti; -1: none). A cosine-only fit compares the
        pairs through their sums (see :class:`ReweightingModel`).
    """

    kind: str
    numerator: object
    denominator: object
    den_index: np.ndarray
    target: np.ndarray
    target_err: np.ndarray
    systematic_err: np.ndarray
    counts: np.ndarray
    width_deg: float | None = None
    offset_group: np.ndarray | None = None
    fitted: np.ndarray = field(default=None)
    rows: object = None
    point_draw: object = None
    mirror: np.ndarray | None = None

    def __post_init__(self):
        if self.fitted is None:
            self.fitted = np.isfinite(self.target)

    def __len__(self):
        return len(self.den_index)

    def drawn_target(self, rng):
        """One parametric-bootstrap draw of the target: every value plus its uncertainty times a
        standard normal deviate (NaN stays NaN; populations kept within [0, 1]; a target without
        errors comes back unchanged).

        The uncertainty is what the fit's sigma holds besides the run's sampling error: the
        target's error and, for couplings, the Karplus relation's systematic error, each value
        drawn on its own, as the chi-square treats them.
        """
        if self.point_draw is not None:
            return self.point_draw(rng)
        sd = np.hypot(np.nan_to_num(self.target_err), np.nan_to_num(self.systematic_err))
        value = self.target + sd * rng.standard_normal(len(self.target))
        # a population outside [0, 1] is no population; a draw past an edge is put on it
        return np.clip(value, 0.0, 1.0) if self.kind == "population" else value


class ReweightingModel:
    """Observables of reweighted samples and the regularised least-squares fit of the correction.

    Parameters
    ----------
    x : ndarray (n_samples, n_params)
        Features (:func:`features`).
    base_weights : ndarray (n_samples,)
        The run's own weights.
    sets : list of ObservableSet
    kt : float
        Thermal energy in kJ/mol.
    mirrored : bool
        For a cosine-only correction (V(phi) = V(-phi)): the fit compares every pair of fitted
        mirror observables (:attr:`ObservableSet.mirror`) through their sum, one residual
        (d_i + d_j) / sqrt(sigma_i^2 + sigma_j^2), so the part of the target that differs between
        phi and -phi (which such a correction can reach only through the shapes of the sampled
        wells, with large coefficients) does not pull on the fit; :meth:`score` compares every
        observable on its own.
    """

    def __init__(self, x, base_weights, sets, kt, mirrored=False):
        self.x = np.asarray(x, dtype=float)
        self.log_w0 = np.log(np.maximum(np.asarray(base_weights, dtype=float), 1e-300))
        self.log_w0[np.asarray(base_weights) <= 0] = -np.inf
        self.sets = list(sets)
        self.kt = float(kt)
        self.mirrored = bool(mirrored)

    @property
    def n_params(self):
        return self.x.shape[1]

    def weights(self, theta, mult=None):
        """Normalised weights (sum 1) of the samples for coefficients ``theta`` and sample
        multiplicities ``mult`` (bootstrap counts, or a 0/1 mask of a half)."""
        logw = self.log_w0 - self.x @ np.asarray(theta, dtype=float) / self.kt
        if mult is not None:
            with np.errstate(divide="ignore"):
                logw = logw + np.log(mult)
        top = np.max(logw[np.isfinite(logw)])
        w = np.exp(logw - top)
        return w / w.sum()

    def values(self, w, jacobian=False):
        """Per set: the observable values (after the transform) and, with ``jacobian``, their
        derivatives (n_obs, n_params) for weights ``w`` from :meth:`weights`. Invalid values
        (empty denominator, empty bin of a free energy) are NaN."""
        wx = w[:, None] * self.x if jacobian else None
        out = []
        for s in self.sets:
            num, den = s.numerator @ w, (s.denominator @ w)[s.den_index]
            with np.errstate(invalid="ignore", divide="ignore"):
                ratio = num / den
                ok = (den > 0) & ((num > 0) if s.width_deg else True)
                value = -self.kt * np.log(ratio / s.width_deg) if s.width_deg else ratio.copy()
            value[~ok] = np.nan
            grad = None
            if jacobian:
                dnum = -(s.numerator @ wx) / self.kt
                dden = -(s.denominator @ wx)[s.den_index] / self.kt
                with np.errstate(invalid="ignore", divide="ignore"):
                    grad = (dnum - ratio[:, None] * dden) / den[:, None]
                    if s.width_deg:
                        grad = -self.kt * grad / ratio[:, None]
                grad[~ok] = 0.0
            out.append((value, grad))
        return out

    # -- residuals ---------------------------------------------------------------------------

    def _residuals(self, theta, mult, sigmas, lam, jacobian, targets=None, mirrored=None):
        targets = [s.target for s in self.sets] if targets is None else targets
        mirrored = self.mirrored if mirrored is None else mirrored
        parts, jparts, paired = [], [], 0
        for s, target, sigma, (value, grad) in zip(self.sets, targets, sigmas,
                                                   self.values(self.weights(theta, mult), jacobian)):
            use = s.fitted & np.isfinite(value)
            diff = np.where(use, value - target, 0.0)
            inv = np.where(use, 1.0 / sigma ** 2, 0.0)
            dgrad = grad.copy() if jacobian and s.offset_group is not None else grad
            if s.offset_group is not None:   # compared up to one constant per group
                groups = np.where(use, s.offset_group, -1)
                for g in np.unique(groups[groups >= 0]):
                    m = groups == g
                    diff[m] -= np.sum(diff[m] * inv[m]) / np.sum(inv[m])
                    if jacobian:
                        dgrad[m] -= (inv[m, None] * grad[m]).sum(axis=0) / np.sum(inv[m])
            r = np.where(use, diff / sigma, 0.0)
            jr = np.where(use[:, None], dgrad / sigma[:, None], 0.0) if jacobian else None
            if mirrored and s.mirror is not None:
                paired += _pair_mirrors(s.mirror, use, diff, sigma, dgrad if jacobian else None, r, jr)
            parts.append(r)
            if jacobian:
                jparts.append(jr)
        r = np.concatenate(parts)
        n = max(1, int(np.count_nonzero(np.concatenate([s.fitted for s in self.sets]))) - paired)
        penalty = np.sqrt(lam) * np.asarray(theta) / self.kt
        res = np.concatenate([r / np.sqrt(n), penalty])
        if not jacobian:
            return res, None
        jac = np.vstack([np.vstack(jparts) / np.sqrt(n), np.sqrt(lam) / self.kt * np.eye(self.n_params)])
        return res, jac

    def score(self, theta, mult, sigmas):
        """Chi-square per fitted observable (valid ones) at ``theta``, every observable on its own."""
        res, _ = self._residuals(theta, mult, sigmas, 0.0, False, mirrored=False)
        data = res[:-self.n_params] if self.n_params else res
        n_valid = 0
        for s, (value, _) in zip(self.sets, self.values(self.weights(theta, mult))):
            n_valid += int(np.count_nonzero(s.fitted & np.isfinite(value)))
        n = max(1, int(np.count_nonzero(np.concatenate([s.fitted for s in self.sets]))))
        return float(np.sum(data ** 2) * n / max(1, n_valid))

    def fit(self, lam, sigmas, mult=None, theta0=None, targets=None):
        """Coefficients minimising the regularised chi-square (see the module notes), against
        ``targets`` (per set, e.g. a draw of :meth:`ObservableSet.drawn_target`) or the sets' own."""
        from scipy.optimize import least_squares

        theta0 = np.zeros(self.n_params) if theta0 is None else np.asarray(theta0, dtype=float)
        cache = {}

        def both(theta):
            key = theta.tobytes()
            if key not in cache:
                cache.clear()
                cache[key] = self._residuals(theta, mult, sigmas, lam, True, targets)
            return cache[key]

        sol = least_squares(lambda t: both(t)[0], theta0, jac=lambda t: both(t)[1], method="trf",
                            ftol=_TOL, xtol=_TOL, gtol=_TOL, max_nfev=200)
        return sol.x

    def effective_parameters(self, theta, lam, sigmas):
        """Effective number of fitted coefficients of the ridge fit, sum s^2 / (s^2 + lam / kT^2)
        over the singular values s of the data part of the Jacobian (Hastie, Tibshirani &
        Friedman, The Elements of Statistical Learning, 2nd ed., 2009, section 3.4.1)."""
        _, jac = self._residuals(theta, None, sigmas, lam, True)
        s = np.linalg.svd(jac[:-self.n_params], compute_uv=False)
        return float(np.sum(s ** 2 / (s ** 2 + lam / self.kt ** 2)))

    def directions(self, theta, lam, sigmas):
        """The combinations of the coefficients the data determine, and how much.

        The singular value decomposition of the data part of the Jacobian, J = U S V^T: every
        row v of V^T is a combination of the coefficients (unit length), determined by the data
        to the share s^2 / (s^2 + lam / kT^2) (1: set by the target, 0: set by the ridge alone,
        which holds it at zero; the shares sum to :meth:`effective_parameters`), and the matching
        column u of U says which observables it moves.

        Returns
        -------
        share : ndarray (n_params,)
            In decreasing order (zero for directions beyond the number of observables).
        vt : ndarray (n_params, n_params)
            The combinations, one per row.
        u : ndarray (n_observables, n_params)
            The observables (all sets, in order) each combination moves; zero columns beyond the
            number of observables.
        """
        _, jac = self._residuals(theta, None, sigmas, lam, True)
        data = jac[:-self.n_params]
        u, s, vt = np.linalg.svd(data, full_matrices=True)
        s = np.concatenate([s, np.zeros(self.n_params - len(s))])[:self.n_params]
        u = np.hstack([u, np.zeros((u.shape[0], max(0, self.n_params - u.shape[1])))])[:, :self.n_params]
        ridge = lam / self.kt ** 2 if lam > 0 else 1e-12 * max(float(np.max(s ** 2, initial=0.0)), 1e-300)
        return s ** 2 / (s ** 2 + ridge), vt, u


def _pair_mirrors(mirror, use, diff, sigma, grad, r, jr):
    """Replace, in place, the residuals ``r`` (and Jacobian rows ``jr``) of every pair of used
    mirror observables i < j by one, (d_i + d_j) / sqrt(sigma_i^2 + sigma_j^2) at i and 0 at j;
    returns the number of pairs."""
    k = np.arange(len(mirror))
    j = np.asarray(mirror)
    ok = use & (j >= 0) & (j != k)
    ok[ok] &= use[j[ok]]
    first = np.flatnonzero(ok & (k < j))
    if not len(first):
        return 0
    second = j[first]
    both = np.hypot(sigma[first], sigma[second])
    r[first] = (diff[first] + diff[second]) / both
    r[second] = 0.0
    if jr is not None:
        jr[first] = (grad[first] + grad[second]) / both[:, None]
        jr[second] = 0.0
    return len(first)


def nan_sd(draws):
    """Standard deviation over axis 0 of the finite draws (NaN where fewer than two)."""
    import warnings

    draws = np.asarray(draws, dtype=float)
    if len(draws) < 2:
        return np.full(draws.shape[1:], np.nan)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)   # columns without two finite draws
        return np.nanstd(draws, axis=0, ddof=1)


def sampled_errors(model, multiplicities):
    """Per set: the bootstrap standard deviation of every observable at theta = 0."""
    zero = np.zeros(model.n_params)
    draws = [model.values(model.weights(zero, m)) for m in multiplicities]
    return [nan_sd([d[k][0] for d in draws]) for k in range(len(model.sets))]


def combined_sigmas(model, sampled_sd, factor=1.0):
    """sigma^2 = target_err^2 + systematic^2 + factor * sampled^2 per set (floored at a tiny value)."""
    out = []
    for s, sd in zip(model.sets, sampled_sd):
        sd = np.where(np.isfinite(sd), sd, 0.0)
        sigma = np.sqrt(np.nan_to_num(s.target_err) ** 2 + np.nan_to_num(s.systematic_err) ** 2 + factor * sd ** 2)
        floor = 1e-3 * model.kt if s.width_deg else 1e-6
        out.append(np.maximum(sigma, floor))
    return out


def cross_validate(model, sampled_sd, folds, grid=REGULARISATION_GRID):
    """Scores of every strength by K-fold cross-validation over contiguous pieces of the run: fit
    on all folds but one, chi-square per observable of the one left out, each fold in turn.

    The sampled errors ``sampled_sd`` (of the whole run) are scaled to the size of the training
    part (variance times K / (K - 1)) and of the fold left out (times K).

    Returns
    -------
    rows : list of dict
        regularisation, cv_score (mean over the folds), cv_score_err (their standard error).
    chosen : float
        The strength with the lowest mean score (ties: the strongest).
    """
    present = np.unique(folds)
    k = len(present)
    if k < 2:
        raise DihedraError("the run is too short to cross-validate the regularisation (fewer than two pieces); give "
                           "the regularisation (regularisation=X / --regularisation X).")
    train_sigma = combined_sigmas(model, sampled_sd, k / (k - 1))
    test_sigma = combined_sigmas(model, sampled_sd, float(k))
    rows, starts = [], {}
    for lam in sorted(grid):
        scores = []
        for f in present:
            theta = model.fit(lam, train_sigma, (folds != f).astype(float), starts.get(f))
            starts[f] = theta
            scores.append(model.score(theta, (folds == f).astype(float), test_sigma))
        rows.append({"regularisation": lam, "cv_score": float(np.mean(scores)),
                     "cv_score_err": float(np.std(scores, ddof=1) / np.sqrt(k))})
    best = min(r["cv_score"] for r in rows)
    chosen = max(r["regularisation"] for r in rows if r["cv_score"] <= best * (1 + 1e-9) + 1e-12)
    return rows, chosen
