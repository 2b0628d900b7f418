r"""The torsion correction of a tracking result: :func:`fit_torsion_correction` and its
:class:`RefitResult`.

Steps: read the target (:mod:`.targets`), choose the types, read the angles of their torsions once
(:mod:`.samples`), build the observables (:mod:`.observables`), estimate their sampling errors by a
block bootstrap at zero correction, choose the ridge strength by K-fold cross-validation over
contiguous pieces of the trajectory, fit, and refit every bootstrap replicate (the run's blocks
resampled, the target drawn from its errors; :mod:`.fit`) for the errors of the terms, the curve
and the observables; then the exports (:mod:`.exports`).
"""

from __future__ import annotations

import os
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from ...errors import DihedraError, one_of
from ...io.outputs import file_set, write_text
from ...io.tables import json_ready, write_json, write_table
from ...trajectory.result import as_result
from ...units import kt_kj_mol
from ..profiles import bootstrap_multiplicities, resolve_temperature
from .exports import correction_table, force_field_terms, openmm_xml, rb_table, terms_table, torsion_atoms
from .fit import (DEFAULT_FOLDS, REGULARISATION_GRID, ReweightingModel, combined_sigmas, cross_validate, features,
                  kish, nan_sd, sampled_errors)
from .notices import (choice_notices, determined_notice, limits, mirror_notice, target_states,
                      tied_notice, untargeted)
from .observables import coupling_set, coupling_values, match_label, population_set, profile_set
from .samples import WEIGHTS_PER, molecule_ids, read_samples
from .targets import read_target

DEFAULT_TERMS = 3
DEFAULT_BOOTSTRAP = 100
DEFAULT_BLOCKS = 10
DEFAULT_BIN_WIDTH_DEG = 10.0
DEFAULT_SEED = 20240719
#: Below this effective sample fraction a reweighting is not trustworthy.
MIN_EFFECTIVE_FRACTION = 0.1
#: Fewest torsion-frames of the run in a bin or state for its target to be fitted.
MIN_SAMPLES = 50

METHOD = ("Delta V_t(phi) = sum_n a_n cos(n phi) + b_n sin(n phi) per type t; weights w_s ~ w0_s exp(-sum of "
          "Delta V over the sample's torsions / kT); minimise chi-square per observable + lambda sum "
          "(coefficient/kT)^2; lambda by K-fold cross-validation over contiguous pieces of every replica; errors by "
          "refits of bootstrap replicates, each with the run's blocks resampled (block bootstrap) and the target "
          "values drawn from their errors (parametric bootstrap); effective sample size (sum w)^2 / sum w^2")
REFERENCES = [
    "Cesari, Bottaro, Lindorff-Larsen, Banas, Sponer & Bussi, J. Chem. Theory Comput. 15 (2019) 3425 "
    "(fitting force-field corrections to experimental data by reweighting)",
    "Pitera & Chodera, J. Chem. Theory Comput. 8 (2012) 3445 (maximum entropy and reweighting)",
    "Kish, Survey Sampling, Wiley (1965) (effective sample size of weighted samples)",
    "Efron & Tibshirani, An Introduction to the Bootstrap, Chapman & Hall (1993) (the parametric bootstrap of the "
    "target)",
]
CAUTIONS = [
    "Reweighting only redistributes the sampled frames: it cannot put probability where the run never went, "
    "and with a small effective sample fraction it rests on a few frames.",
    "The correction is fitted to this target at this temperature; a new simulation with it is the real test.",
    "With weights per molecule, the surroundings of a molecule are taken as unchanged by its correction (exact "
    "in a gas, an approximation in a liquid).",
]
_STEMS = {"population": ("population", ""), "free_energy": ("free_energy", "_kj_mol"), "coupling": ("j", "_hz")}


@dataclass
class RefitResult:
    """Result of :func:`fit_torsion_correction`; :meth:`save` writes it.

    Attributes
    ----------
    terms : DataFrame
        type, n, k_kj_mol, k_err_kj_mol, phase_deg, phase_err_deg (the correction as
        sum k_n [1 + cos(n phi - phase_n)]), cos_kj_mol, cos_err_kj_mol, sin_kj_mol,
        sin_err_kj_mol (the same as Fourier coefficients); errors from the bootstrap refits, which
        vary both the run (its blocks) and the target (its values drawn from their errors).
    correction : DataFrame
        type, angle_deg, delta_v_kj_mol (minimum 0), delta_v_err_kj_mol.
    populations, profiles : DataFrame
        Per type and state / bin: target, sampled and reweighted values with errors
        (``target_population``, ``sampled_population_err``, ``reweighted_free_energy_kj_mol``, ...),
        ``fitted`` and ``n_samples`` (torsion-frames of the run).
    couplings : DataFrame or None
        With a couplings target: label, matched_as, type, target_j_hz, target_j_err_hz,
        j_systematic_hz, sampled_j_hz, ..., reweighted_j_err_hz, fitted, n_samples.
    summary : DataFrame
        One row: the effective sample fraction (Kish) and its error, the largest weight,
        ``trustworthy`` (whether the reweighting kept enough effective samples: at least
        ``min_effective_fraction``; it rates the frames, not the correction's terms), the
        chi-square per observable before and after, the regularisation and its cross-validated
        score, coefficients and effective parameters.
    cross_validation : DataFrame
        regularisation, cv_score (mean chi-square per observable of the pieces left out), cv_score_err,
        chosen.
    ryckaert_bellemans : DataFrame or None
        type, power, coefficient_kj_mol, angle_convention (where the form exists).
    openmm_xml : str
        The OpenMM ForceField fragment.
    notices : list of str
    parameters : dict
    """

    terms: pd.DataFrame
    correction: pd.DataFrame
    populations: pd.DataFrame
    profiles: pd.DataFrame
    summary: pd.DataFrame
    cross_validation: pd.DataFrame
    openmm_xml: str
    couplings: pd.DataFrame | None = None
    ryckaert_bellemans: pd.DataFrame | None = None
    notices: list = field(default_factory=list)
    parameters: dict = field(default_factory=dict)

    @property
    def trustworthy(self):
        """Whether the reweighting kept enough effective samples (Kish's fraction at least the
        minimum asked for): the reweighted numbers rest on many frames. It does not rate the
        correction's terms: see their errors and the notices."""
        return bool(self.summary["trustworthy"].iloc[0])

    def save(self, folder):
        """Write the refit files into ``folder`` (see docs/refit.md); returns their paths."""
        os.makedirs(folder, exist_ok=True)
        fourier = ["type", "n", "cos_kj_mol", "cos_err_kj_mol", "sin_kj_mol", "sin_err_kj_mol"]
        tables = [("refit_terms.csv", self.terms.drop(columns=fourier[2:])),
                  ("refit_fourier.csv", self.terms[fourier]), ("refit_correction.csv", self.correction),
                  ("refit_populations.csv", self.populations), ("refit_profiles.csv", self.profiles),
                  ("refit_summary.csv", self.summary), ("refit_cross_validation.csv", self.cross_validation)]
        if self.couplings is not None:
            tables.append(("refit_couplings.csv", self.couplings))
        if self.ryckaert_bellemans is not None:
            tables.append(("refit_ryckaert_bellemans.csv", self.ryckaert_bellemans))
        with file_set(folder):   # (in place together: an interruption leaves the earlier set whole)
            paths = [write_table(frame, folder, name) for name, frame in tables]
            paths.append(write_text(folder, "refit_openmm.xml", self.openmm_xml))
            info = {"summary": self.summary.iloc[0].to_dict(), "notices": list(self.notices),
                    "parameters": self.parameters, "method": METHOD, "references": REFERENCES, "cautions": CAUTIONS,
                    "files": [os.path.basename(p) for p in paths]}
            paths.append(write_json(json_ready(info), folder, "refit.json"))
        return paths


# ----------------------------------------------------------------------------------------------
# Choosing what to correct
# ----------------------------------------------------------------------------------------------

def _types_of_target(result, tgt):
    """The torsion types a target refers to (in order)."""
    types, labels = result.torsion_set.types, result.torsion_set.labels
    out = []
    if tgt.kind == "couplings":
        for label in tgt.table["label"]:
            out.extend(types[k] for k in match_label(labels, types, label)[0])
        return list(dict.fromkeys(out))
    for name in tgt.types:
        if name in types:
            out.append(name)
        elif name in labels:
            out.append(types[labels.index(name)])
        else:
            raise DihedraError(f"the target names {name!r}, which is neither a torsion type nor a torsion label of "
                               f"this result (types: {', '.join(list(dict.fromkeys(types))[:5])}).")
    if tgt.kind == "profile" and (tgt.table["type"] == "").any():
        known = list(dict.fromkeys(types))
        if len(known) > 1 and not out:
            raise DihedraError(f"the target profile names no type and this result has {len(known)} types; give the "
                               f"type to correct (types=[...] / --types), e.g. {known[0]!r}.")
        out.extend(known if len(known) == 1 else [])
    return list(dict.fromkeys(out))


def _chosen_types(result, tgt, types):
    known = list(dict.fromkeys(result.torsion_set.types))
    if types:
        types = [types] if isinstance(types, str) else list(types)
        unknown = [t for t in types if t not in known]
        if unknown:
            raise DihedraError(f"{unknown[0]!r} is not a torsion type of this result; its types are "
                               f"{', '.join(known[:6])} (see torsions.csv).")
        return list(dict.fromkeys(types))
    chosen = _types_of_target(result, tgt)
    if not chosen:
        raise DihedraError("the target names no torsion type, torsion or residue of this result; give the types to "
                           f"correct (--types), e.g. {known[0]!r}.")
    return chosen


def _whole_number(name, value, low, what, high=None):
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < low or (high and value > high):
        span = f"from {low} to {high}" if high else f"of at least {low}"
        raise DihedraError(f"{name} must be a whole number {span} {what}; got {value!r}.")


def _number(name, value, ok, what):
    try:
        number = float(value)
    except (TypeError, ValueError):
        number = np.nan
    if not (np.isfinite(number) and ok(number)):
        raise DihedraError(f"{name} must be {what}; got {value!r}.")
    return number


def check_options(terms, n_bootstrap, n_blocks, n_folds, min_samples, bin_width_deg, min_effective_fraction,
                   regularisation, symmetric=True):
    """Refuse option values of :func:`fit_torsion_correction` before any work (one sentence each)."""
    if not isinstance(symmetric, (bool, np.bool_)):
        raise DihedraError(f"symmetric must be true (cosine terms only, the default) or false (sine terms as well); "
                           f"got {symmetric!r}.")
    _whole_number("terms", terms, 1, "(Fourier terms; 3 or 6 are usual)", high=12)
    _whole_number("n_bootstrap", n_bootstrap, 2, "resamples")
    _whole_number("n_blocks", n_blocks, 2, "blocks per replica")
    _whole_number("n_folds", n_folds, 2, "pieces per replica")
    _whole_number("min_samples", min_samples, 1, "torsion-frames")
    _number("bin_width_deg", bin_width_deg, lambda w: 0 < w <= 90 and abs(360.0 / w - round(360.0 / w)) < 1e-9,
            "a bin width in degrees that divides 360, at most 90")
    _number("min_effective_fraction", min_effective_fraction, lambda f: 0 <= f < 1, "a fraction in [0, 1)")
    if regularisation is not None:
        _number("regularisation", regularisation, lambda x: x >= 0,
                "a non-negative number (or None: chosen by cross-validation)")


def _observable_sets(samples, result, positions, tgt, relation, kt, bin_width_deg, min_samples, universe, notices):
    """Populations and profiles of every chosen type (with the target where it is one of these),
    and the couplings of a couplings target."""
    sets = [population_set(samples, result.scheme, tgt if tgt.kind == "populations" else None, min_samples, notices),
            profile_set(samples, bin_width_deg, kt, tgt if tgt.kind == "profile" else None, min_samples, notices)]
    if tgt.kind == "couplings":
        from ..couplings import HN_HA_FAMILY, get_relation, relation_kernels

        if relation is None:
            raise DihedraError("a target of measured couplings needs a Karplus relation: give relation= (--relation "
                               "NAME), e.g. vuister-bax-1993.")
        rel = get_relation(relation)
        subs = relation_kernels(rel, result, positions, notices, universe)[1] if rel.form == "haasnoot-altona" else None
        family = ([coupling_values(samples, get_relation(f), None) for f in HN_HA_FAMILY]
                  if rel.name in HN_HA_FAMILY else None)
        sets.append(coupling_set(samples, tgt, coupling_values(samples, rel, subs), family, rel.systematic_hz,
                                 min_samples, notices))
    return sets


# ----------------------------------------------------------------------------------------------
# Tables
# ----------------------------------------------------------------------------------------------

def _align(values, reference, sigma, fitted, groups):
    """``values`` shifted per group: onto ``reference`` over the fitted entries (weights
    1/sigma^2) where there are any, else so that the group's minimum is 0."""
    out = values.copy()
    for g in np.unique(groups):
        m = groups == g
        use = m & fitted & np.isfinite(values) & np.isfinite(reference)
        if use.any():
            inv = 1.0 / sigma[use] ** 2
            out[m] -= np.sum((values[use] - reference[use]) * inv) / np.sum(inv)
        elif np.isfinite(values[m]).any():
            out[m] -= np.nanmin(values[m])
    return out


def _observable_table(s, sigma, sampled, sampled_sd, reweighted, reweighted_sd):
    stem, unit = _STEMS[s.kind]
    table = s.rows.copy()
    target = s.target.copy()
    if s.kind == "free_energy":   # one constant per type: reweighted minimum 0, the others aligned on it
        groups = s.offset_group
        reweighted = _align(reweighted, np.full(len(reweighted), np.nan), sigma, s.fitted, groups)
        target = _align(target, reweighted, sigma, s.fitted, groups)
        sampled = _align(sampled, np.full(len(sampled), np.nan), sigma, s.fitted, groups)
    table[f"target_{stem}{unit}"] = target
    table[f"target_{stem}_err{unit}"] = s.target_err
    if s.kind == "coupling":
        table["j_systematic_hz"] = s.systematic_err
    table[f"sampled_{stem}{unit}"] = sampled
    table[f"sampled_{stem}_err{unit}"] = sampled_sd
    table[f"reweighted_{stem}{unit}"] = reweighted
    table[f"reweighted_{stem}_err{unit}"] = reweighted_sd
    table["fitted"] = s.fitted
    table["n_samples"] = s.counts.astype(np.int64)
    return table


def _bootstrap(model, lam, sigmas, theta, boot_cells, cell, rng):
    """Refit every replicate, the run's cells resampled and every target drawn from its errors
    (``rng``): coefficients, reweighted observables per set, effective fractions."""
    thetas, values, fractions = [], [], []
    zero = np.zeros(model.n_params)
    for row in boot_cells:
        mult = row[cell]
        t = model.fit(lam, sigmas, mult, theta, [s.drawn_target(rng) for s in model.sets])
        w = model.weights(t, mult)
        thetas.append(t)
        values.append([v for v, _ in model.values(w)])
        fractions.append(kish(w) / kish(model.weights(zero, mult)))
    per_set = [np.array([v[k] for v in values]) for k in range(len(model.sets))]
    return np.array(thetas), per_set, np.array(fractions)


def _summary_row(model, samples, fit, min_effective_fraction):
    theta, lam, sigmas = fit["theta"], fit["lam"], fit["sigmas"]
    zero = np.zeros(model.n_params)
    w, w0 = model.weights(theta), model.weights(zero)
    n_eff, n_eff0 = kish(w), kish(w0)
    frac = n_eff / n_eff0
    chosen = fit["cv"][fit["cv"]["chosen"]]
    return {"weights_per": samples.weights_per, "n_samples": samples.n_samples, "n_effective_sampled": n_eff0,
            "n_effective_reweighted": n_eff, "effective_sample_fraction": frac,
            "effective_sample_fraction_err": float(nan_sd(fit["fractions"])),
            "largest_weight_fraction": float(w.max()), "min_effective_fraction": float(min_effective_fraction),
            "trustworthy": bool(frac >= min_effective_fraction),
            "n_fitted_observables": int(sum(int(s.fitted.sum()) for s in model.sets)),
            "chi_square_sampled": model.score(zero, None, sigmas),
            "chi_square_reweighted": model.score(theta, None, sigmas),
            "n_coefficients": model.n_params,
            "effective_parameters": model.effective_parameters(theta, lam, sigmas),
            "regularisation": lam, "cv_score": float(chosen["cv_score"].iloc[0]) if len(chosen) else np.nan}


def fit_torsion_correction(result, target, *, temperature_k=None, types=None, terms=DEFAULT_TERMS, symmetric=True,
                           relation=None, weights_per="molecule", bin_width_deg=DEFAULT_BIN_WIDTH_DEG,
                           regularisation=None, n_folds=DEFAULT_FOLDS, n_bootstrap=DEFAULT_BOOTSTRAP,
                           n_blocks=DEFAULT_BLOCKS,
                           min_effective_fraction=MIN_EFFECTIVE_FRACTION, min_samples=MIN_SAMPLES, atom_classes=None,
                           atom_types=None, seed=DEFAULT_SEED, universe=None, log=None):
    """Fit the torsion correction that brings the reweighted ensemble to a target.

    Parameters
    ----------
    result : TrackResult or TorsionStates
        A tracking result with the angle time series (tracked with ``keep_angles=True``).
    target : str, DataFrame or Target
        A profile, populations or couplings target (file, results folder or table; the kind is told
        from the columns, see :mod:`dihedra.analysis.refit.targets`).
    temperature_k : float, optional
        The simulation's temperature; default the one ``track`` recorded.
    types : list of str, optional
        Torsion types to correct, all fitted together (default: those the target names).
    terms : int
        Fourier terms N (n = 1 .. N).
    symmetric : bool
        True (the default): cosine terms only, phases 0 or 180 deg, a correction with
        V(phi) = V(-phi), as a torsion type without a chiral centre needs (the torsion terms of
        AMBER, CHARMM and OPLS are such series; common practice); a notice names the types whose
        sampled profile is not mirror-symmetric. False: sine terms as well, for types at a chiral
        centre or in a chiral environment, where V(phi) and V(-phi) may differ.
    relation : str or KarplusRelation, optional
        The Karplus relation of a couplings target.
    weights_per : {"molecule", "frame"}
        One weight per molecule and frame (independent copies) or per frame (exact for any system).
    bin_width_deg : float
        Bins of the profiles.
    regularisation : float, optional
        Ridge strength; default chosen by cross-validation (see ``n_folds``).
    n_folds : int
        Contiguous pieces of every replica for the cross-validation.
    n_bootstrap, n_blocks, seed : int
        Bootstrap replicates (each resamples the run's blocks and draws the target from its
        errors), blocks per replica and the random seed.
    min_effective_fraction : float
        Below this Kish effective sample fraction the fit is reported as not trustworthy.
    min_samples : int
        Fewest torsion-frames in a bin or state for its target to be fitted.
    atom_classes, atom_types : dict, optional
        Atom name (or ``RESNAME:NAME``) -> class (or type) for the OpenMM fragment.
    universe : MDAnalysis.Universe, optional
        The bonds that define molecules (default: the topology recorded by track).
    log : callable, optional
        Receives progress.

    Returns
    -------
    RefitResult
        Nothing is written; :meth:`RefitResult.save` writes the files.
    """
    result = as_result(result)
    say = log or (lambda msg: None)
    check_options(terms, n_bootstrap, n_blocks, n_folds, min_samples, bin_width_deg, min_effective_fraction,
                   regularisation, symmetric)
    one_of("weights_per", weights_per, WEIGHTS_PER)
    early = []
    temperature_k = resolve_temperature(temperature_k, result.summary, say, early)
    kt = kt_kj_mol(temperature_k)
    tgt = read_target(target, temperature_k)
    notices = early + list(tgt.notices)
    chosen = set(_chosen_types(result, tgt, types))
    positions = [k for k, t in enumerate(result.torsion_set.types) if t in chosen]
    samples = read_samples(result, positions, molecule_ids(result, positions, weights_per, universe, notices),
                           weights_per)
    type_names = list(samples.type_names)     # the order of the coefficients: the types as the samples hold them
    atoms = torsion_atoms(result, type_names)
    groups, tied = force_field_terms(atoms, atom_classes, atom_types)
    notices.extend(tied_notice(names, pattern, "types" if atom_types else "classes") for names, pattern in tied)
    say(f"refit: {len(positions)} torsions of {len(type_names)} type(s), {samples.n_samples} samples")
    sets = _observable_sets(samples, result, positions, tgt, relation, kt, float(bin_width_deg), min_samples,
                            universe, notices)
    if not any(s.fitted.any() for s in sets):
        raise DihedraError("no target value lies where the run sampled (see the minimum of torsion-frames per bin or "
                           "state); nothing can be fitted by reweighting.")
    model = ReweightingModel(features(samples, terms, symmetric, groups), samples.sample_weights(), sets, kt,
                             mirrored=symmetric)
    fit = _estimate(model, samples, regularisation, n_folds, n_bootstrap, n_blocks, seed, say)
    theta, boot_theta = _per_type(fit["theta"], groups), _per_type(fit["boot_theta"], groups)
    summary = _summary_row(model, samples, fit, min_effective_fraction)
    terms_frame = terms_table(theta, boot_theta, type_names, terms, symmetric)
    limits(summary, tgt, symmetric, notices)
    group_names = [" = ".join(t for t, g in zip(type_names, groups) if g == k) for k in range(int(max(groups)) + 1)]
    notices.extend(n for n in [determined_notice(model, fit, group_names, terms, symmetric, tgt.kind, summary)] if n)
    notices.extend(mirror_notice(model, fit, min_samples) if symmetric else [])
    notices.extend(choice_notices(fit, terms_frame, symmetric))
    rb = rb_table(terms_frame, symmetric, notices)
    xml = openmm_xml(terms_frame, atoms, atom_classes, atom_types,
                     _xml_comments(summary, tgt, temperature_k, rb is not None and not symmetric), notices)
    parameters = {"temperature_k": temperature_k, "types": type_names, "terms": int(terms),
                  "symmetric": bool(symmetric),
                  "relation": None if relation is None else str(getattr(relation, "name", relation)),
                  "weights_per": weights_per, "bin_width_deg": float(bin_width_deg), "regularisation": regularisation,
                  "regularisation_grid": list(REGULARISATION_GRID), "n_folds": n_folds, "n_bootstrap": n_bootstrap,
                  "n_blocks": n_blocks, "min_effective_fraction": float(min_effective_fraction),
                  "min_samples": min_samples, "seed": seed, "target_kind": tgt.kind, "target_file": tgt.source,
                  "tied_types": [names for names, _ in tied]}
    tables = _observable_tables(model, fit)
    untargeted(model, tables[0], type_names, groups, notices)
    target_states(tables[0], tgt, (result.summary or {}).get("scheme"), notices)
    return RefitResult(terms=terms_frame, correction=correction_table(theta, boot_theta, type_names, terms, symmetric),
                       populations=tables[0], profiles=tables[1], couplings=tables[2] if len(tables) > 2 else None,
                       summary=pd.DataFrame([summary]), cross_validation=fit["cv"], ryckaert_bellemans=rb,
                       openmm_xml=xml, notices=notices, parameters=parameters)


def _estimate(model, samples, regularisation, n_folds, n_bootstrap, n_blocks, seed, say):
    """Sampling errors, the ridge strength, the fit and its bootstrap refits (a dict)."""
    cell, cell_replica = samples.cells(n_blocks)
    boot_cells = bootstrap_multiplicities(cell_replica, n_bootstrap, np.random.default_rng(seed))
    sampled = sampled_errors(model, (row[cell] for row in boot_cells))
    sigmas = combined_sigmas(model, sampled)
    if regularisation is None:
        say(f"refit: {n_folds}-fold cross-validation over contiguous pieces of the trajectory")
        cv, lam = cross_validate(model, sampled, samples.folds(n_folds))
    else:
        cv, lam = [], float(regularisation)
    theta = model.fit(lam, sigmas)
    say(f"refit: bootstrap of the run's blocks and the target's errors ({n_bootstrap} refits)")
    # the target's draws come from a stream of their own: the run's resamples stay those of the
    # same seed without them, so an exact target gives exactly the run's block bootstrap
    draws = np.random.default_rng([seed, 1])
    boot_theta, boot_values, fractions = _bootstrap(model, lam, sigmas, theta, boot_cells, cell, draws)
    cv_frame = pd.DataFrame(cv, columns=["regularisation", "cv_score", "cv_score_err"])
    cv_frame["chosen"] = cv_frame["regularisation"] == lam
    return {"theta": theta, "lam": lam, "sigmas": sigmas, "sampled_sd": sampled, "cv": cv_frame,
            "boot_theta": boot_theta, "boot_values": boot_values, "fractions": fractions}


def _observable_tables(model, fit):
    zero = np.zeros(model.n_params)
    sampled = [v for v, _ in model.values(model.weights(zero))]
    reweighted = [v for v, _ in model.values(model.weights(fit["theta"]))]
    return [_observable_table(s, sig, v, sd, rv, nan_sd(bv)) for s, sig, sd, v, rv, bv in
            zip(model.sets, fit["sigmas"], fit["sampled_sd"], sampled, reweighted, fit["boot_values"])]


def _per_type(theta, groups):
    """Coefficients of the fitted terms (..., n_groups * per) laid out per type (..., n_types * per)."""
    theta = np.asarray(theta, dtype=float)
    if theta.shape[-1] == 0 or len(groups) == 0:
        return theta
    per = theta.shape[-1] // (int(np.max(groups)) + 1)
    blocks = theta.reshape(theta.shape[:-1] + (-1, per))
    return blocks[..., np.asarray(groups), :].reshape(theta.shape[:-1] + (len(groups) * per,))


def _xml_comments(summary, tgt, temperature_k, sine_dropped):
    lines = [f"dihedra refit: torsion correction fitted by reweighting to a {tgt.kind} target"
             + (f" ({os.path.basename(tgt.source)})" if tgt.source else "") + f" at {temperature_k:g} K",
             "add it to the force field (PeriodicTorsionForce: E = k (1 + cos(n theta - phase)), k in kJ/mol, "
             "phase in radians); OpenMM applies the first <Proper> that matches a torsion, so where the force field "
             "already has a PeriodicTorsionForce <Proper> for these atom classes, add these terms to that entry "
             "instead",
             f"effective sample fraction {summary['effective_sample_fraction']:.3f}"]
    if sine_dropped:
        lines.insert(2, "these are the fitted terms in full, sine terms included; refit_ryckaert_bellemans.csv holds "
                        "only their cosine part")
    if not summary["trustworthy"]:
        lines.append("NOT TRUSTWORTHY as a result: use it only to start a new simulation with this correction")
    return lines
