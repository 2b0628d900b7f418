"""What a fitted torsion correction can and cannot say, as notices: the honest limits of the
reweighting, which combinations of the coefficients the target sets and which the regularisation
alone, a sampled profile that is not mirror-symmetric under a cosine-only fit, choices to revisit,
types without a target and types that are one force-field term; and the state populations a
target folder brings along, shown beside the reweighted ones as a check."""

from __future__ import annotations

import numpy as np

from ...errors import name_list
from .fit import REGULARISATION_GRID

#: Chi-square per observable above which the output says the target is not reached.
CHI_SQUARE_POOR = 2.0
#: A combination of the coefficients determined to at least this share counts as set by the target.
SET_BY_DATA = 0.5
#: Below this p-value (chi-square of the mirror pairs of bins) a sampled profile is not mirror-symmetric.
MIRROR_P = 1e-3


def limits(summary, tgt, symmetric, notices):
    """The honest limits of a fit, as notices: too few effective samples (first), a profile's
    errors drawn independently, a target not reached."""
    frac, threshold = summary["effective_sample_fraction"], summary["min_effective_fraction"]
    if not summary["trustworthy"]:
        notices.insert(0, f"NOT TRUSTWORTHY: the reweighting keeps an effective sample fraction of {frac:.3f} (below "
                          f"{threshold:g}): the reweighted numbers rest on a few frames and are not a result: a new "
                          "simulation with this correction is needed.")
    if tgt.kind == "profile" and (tgt.table["free_energy_err_kj_mol"] > 0).any():
        notices.append("the errors of the target profile's points were drawn independently (a table of points has no "
                       "covariance): errors that neighbouring points share (a profile from one calculation, e.g. "
                       "umbrella windows) move the smooth terms together and are missing from the errors of the terms; "
                       "the target's own state populations, with their errors, are a check.")
    if summary["chi_square_reweighted"] > CHI_SQUARE_POOR:
        more = ", sine terms for a type at a chiral centre (--sine-terms, symmetric=False)" if symmetric else ""
        notices.append(f"the reweighted ensemble does not reach the target within its errors (chi-square per "
                       f"observable {summary['chi_square_reweighted']:.2f} after, {summary['chi_square_sampled']:.2f} "
                       f"before): more terms, more types{more}, or a target outside what the run sampled.")


def coefficient_names(group_names, n_terms, symmetric):
    """Name and term (a group of types) of every fitted coefficient: a_n the cosine, b_n the sine
    coefficient of term n, in the order of the fit."""
    out = []
    for name in group_names:
        for n in range(1, int(n_terms) + 1):
            out.append((f"a{n}", name))
            if not symmetric:
                out.append((f"b{n}", name))
    return out


def observable_names(model):
    """A short name of every observable of the model's sets, in order (``anti of TYPE``, ``TYPE at
    +65 deg``, ``J of LABEL``)."""
    out = []
    for s in model.sets:
        rows = s.rows
        for k in range(len(s)):
            if s.kind == "population":
                out.append(f"{rows['state'].iloc[k]} of {rows['type'].iloc[k]}")
            elif s.kind == "free_energy":
                out.append(f"{rows['type'].iloc[k]} at {rows['angle_deg'].iloc[k]:+.0f} deg")
            else:
                out.append(f"J of {rows['label'].iloc[k]}")
    return out


def _combination(v, names):
    """``-0.71 a1 + 0.70 a2 of TYPE``: the components of a unit vector of at least 0.2 (at most 6),
    term by term, the largest positive (the sign of a singular vector is arbitrary)."""
    v = np.asarray(v, dtype=float)
    v = v if v[np.argmax(np.abs(v))] > 0 else -v
    keep = sorted(k for k in np.argsort(-np.abs(v))[:6] if abs(v[k]) >= 0.2)
    parts = []
    for group in dict.fromkeys(names[k][1] for k in keep):
        terms = []
        for k in (k for k in keep if names[k][1] == group):
            sign = ("- " if terms else "-") if v[k] < 0 else ("+ " if terms else "")
            terms.append(f"{sign}{abs(v[k]):.2f} {names[k][0]}")
        parts.append(f"{' '.join(terms)} of {group}")
    return parts[0] if len(parts) == 1 else " with ".join(parts) + " together"


def _left_to_the_ridge(share, vt, names):
    """The coefficients the data leave wholly to the regularisation (their share of the
    determined combinations, sum_i share_i v_ik^2, below 0.1): the text (``b1, a3 of every term``)
    and the set of their names."""
    determined = (share[:, None] * vt ** 2).sum(axis=0)
    free = [names[k] for k in range(len(names)) if determined[k] < 0.1]
    groups = list(dict.fromkeys(g for _, g in names))
    out, everywhere = [], []
    for coef in dict.fromkeys(c for c, _ in free):
        mine = [g for c, g in free if c == coef]
        if len(mine) == len(groups):
            everywhere.append(coef)
        else:
            out.append(f"{coef} of {', '.join(mine)}")
    if everywhere:
        out.insert(0, ", ".join(everywhere) + (" of every term" if len(groups) > 1 else f" of {groups[0]}"))
    return "; ".join(out), {c for c, _ in free}


def determined_notice(model, fit, group_names, n_terms, symmetric, target_kind, summary):
    """The notice for a fit whose data determine fewer coefficients than it has (None otherwise):
    which combinations the target sets (and the observables that set them), and that every other
    combination is set mainly by the regularisation, which holds it near zero."""
    n_params, effective = model.n_params, float(summary["effective_parameters"])
    if target_kind != "populations" and not effective < n_params - 0.5:
        return None
    head = ("populations alone under-determine the correction: they fix how much weight each state gets, not the "
            "shape of the profile within and between the states (barrier heights); " if target_kind == "populations"
            else "")
    share, vt, u = model.directions(fit["theta"], fit["lam"], fit["sigmas"])
    names = coefficient_names(group_names, n_terms, symmetric)
    what = observable_names(model)
    fitted = np.concatenate([s.fitted for s in model.sets])
    set_by = [i for i in range(n_params) if share[i] >= SET_BY_DATA]
    listed = []
    for i in set_by[:6]:
        weight = np.where(fitted, np.abs(u[:, i]), 0.0)
        moved = [what[j] for j in np.argsort(-weight)[:3] if weight[j] >= 0.3 or j == np.argmax(weight)]
        listed.append(f"{_combination(vt[i], names)} (determined to {share[i]:.2f}; it moves "
                      f"{', '.join(dict.fromkeys(moved))})")
    sets = ("the target sets " + "; ".join(listed) + (f" and {len(set_by) - 6} more" if len(set_by) > 6 else "")
            if listed else "no combination of them is set mainly by the target")
    rest = n_params - len(set_by)
    free, free_names = _left_to_the_ridge(share, vt, names)
    wholly = f"; among them, wholly, {free}" if free else ""
    sines = ("; the sine coefficients b_n, which set how the correction differs between phi and -phi (gauche+ "
             "against gauche-), are among them" if any(c.startswith("b") for c in free_names) else "")
    symbols = "a_n: the cosine coefficient" if symmetric else "a_n, b_n: the cosine and sine coefficients"
    advice = "Fit a profile for the shape." if target_kind == "populations" else "Fewer terms would do."
    return (f"{head}the data determine about {effective:.1f} of the {n_params} coefficients ({symbols} of term n, "
            f"kJ/mol): {sets}. The other {rest} combination(s) are set mainly by the regularisation (determined to "
            f"less than half{wholly}{sines}), which holds them near zero: there the correction is the smallest that "
            "meets the target, not a value the data measured, and the errors of the terms (kept small by the "
            f"regularisation) do not say how well it is known. {advice}")


def mirror_asymmetry(model, sampled_sd, min_samples):
    """How far the sampled profile of every type differs between phi and -phi: per type
    (name, chi-square, pairs, p-value) over the mirror pairs of bins (centres c and -c) that both
    hold at least ``min_samples`` torsion-frames, z = (F(c) - F(-c)) / sqrt(sd_c^2 + sd_-c^2) with
    the block-bootstrap errors ``sampled_sd`` of the run (one array per set of the model); the
    chi-square of a mirror-symmetric distribution follows the chi-square distribution with as many
    degrees of freedom as pairs (scipy's ``chi2.sf`` gives p)."""
    from scipy.stats import chi2

    values = model.values(model.weights(np.zeros(model.n_params)))
    out = []
    for s, (value, _), sd in zip(model.sets, values, sampled_sd):
        if s.kind != "free_energy":
            continue
        angles = s.rows["angle_deg"].to_numpy(float)
        types = s.rows["type"].to_numpy()
        for name in dict.fromkeys(types):
            mine = np.flatnonzero(types == name)
            where = {round(float(angles[k]), 6): k for k in mine}
            z = []
            for k in mine:
                other = where.get(round(-float(angles[k]), 6))
                if other is None or angles[k] <= 0 or min(s.counts[k], s.counts[other]) < min_samples:
                    continue
                err = np.hypot(sd[k], sd[other])
                if np.isfinite(value[k]) and np.isfinite(value[other]) and err > 0:
                    z.append((value[k] - value[other]) / err)
            if z:
                stat = float(np.sum(np.square(z)))
                out.append((name, stat, len(z), float(chi2.sf(stat, len(z)))))
    return out


def mirror_notice(model, fit, min_samples, p_value=MIRROR_P):
    """For a cosine-only fit: one notice naming the types whose sampled profile differs between
    phi and -phi beyond its sampling errors (:func:`mirror_asymmetry`, p below ``p_value``), or []."""
    found = [f"{name} (chi-square {stat:.0f} for {pairs} mirror pairs of bins, p = {p:.1g})"
             for name, stat, pairs, p in mirror_asymmetry(model, fit["sampled_sd"], min_samples) if p < p_value]
    if not found:
        return []
    return [f"the sampled profile of {name_list(found, 4)} differs between phi and -phi beyond its sampling errors: "
            "the molecule or its surroundings are chiral there, or the run is not converged; the correction has "
            "cosine terms only (V(phi) = V(-phi), the default), which keeps that asymmetry as sampled and cannot fit "
            "one in the target: for a type at a chiral centre, fit sine terms as well (--sine-terms, "
            "symmetric=False)."]


def choice_notices(fit, terms_frame, symmetric):
    """Notices on choices a user may want to revisit: a cross-validated strength at the end of its
    grid, and sine terms (a correction that differs between phi and -phi) fitted where a cosine
    series would do for a molecule without a stereocentre."""
    out = []
    lam, grid = fit["lam"], sorted(REGULARISATION_GRID)
    if len(fit["cv"]) and lam in (grid[0], grid[-1]):
        side = "strongest" if lam == grid[-1] else "weakest"
        out.append(f"cross-validation chose the {side} regularisation of its grid ({lam:g}): the best strength may lie "
                   "beyond it; compare the cross-validation scores (refit_cross_validation.csv) or give "
                   "--regularisation (regularisation=X) to try others.")
    if not symmetric and len(terms_frame):
        sine = terms_frame["sin_kj_mol"].abs()
        clear = terms_frame[(sine > 2.0 * terms_frame["sin_err_kj_mol"].fillna(np.inf)) & (sine > 0.05)]
        if len(clear):
            names = name_list(list(dict.fromkeys(clear["type"])), 4)
            out.append(f"the corrections of {names} have sine terms (phases other than 0 and 180 degrees): they make "
                       "V(phi) differ from V(-phi), as only a chiral centre or a chiral environment can; for a "
                       "molecule without one, fit cosines alone (the default: without --sine-terms, "
                       "symmetric=True).")
    return out


def untargeted(model, populations, type_names, groups, notices):
    """A notice for corrected types without a target: their terms come only from their coupling to
    the targeted ones, and their populations move with nothing to hold them (a type tied to a
    targeted one shares its terms, and is not named)."""
    targeted = set()
    for s in model.sets:
        if s.rows is not None and "type" in s.rows.columns:
            targeted |= set(s.rows.loc[s.fitted, "type"])
    held = {int(g) for t, g in zip(type_names, groups) if t in targeted}
    for name in [t for t, g in zip(type_names, groups) if t not in targeted and int(g) not in held]:
        rows = populations[populations["type"] == name]
        shift = (rows["reweighted_population"] - rows["sampled_population"]).abs()
        worst = rows.loc[shift.idxmax()]
        notices.append(f"{name} has no target: its terms come only from its coupling to the targeted types (the "
                       f"torsions of one molecule share a weight), and its {worst['state']} population moved from "
                       f"{worst['sampled_population']:.3f} to {worst['reweighted_population']:.3f}; give it a target "
                       "(e.g. its sampled populations, to hold them) or leave it out of the types.")


def tied_notice(names, pattern, whats):
    return (f"{' and '.join(names)} are one force-field term (atom {whats} {pattern}, forwards or reversed: OpenMM "
            "matches them with one <Proper>), so they were fitted with shared coefficients and the XML has one entry "
            f"for them; give atom {whats} that tell them apart to fit them separately.")


def _same_scheme(one, other):
    """Whether two schemes of summary.json define the same states (labels and boundaries)."""
    keys = ("labels", "boundaries_deg", "arc_states")
    return all(one.get(k) == other.get(k) for k in keys) if one and other else one == other


def target_states(populations, tgt, run_scheme, notices):
    """Fill the target columns of the populations table (in place) from the state populations a
    profile target's folder brings along (:attr:`~.targets.Target.states`), where the table has no
    target value of its own; they are not fitted, a check. A notice says where they come from and
    how far the reweighted populations lie from them (or why they are not shown)."""
    states = getattr(tgt, "states", None)
    if not states or populations is None or not len(populations):
        return
    source = states["source"]
    if states.get("scheme") and run_scheme and not _same_scheme(states["scheme"], run_scheme):
        notices.append(f"the target folder's state populations ({source}) are not shown: its states are those of "
                       f"another scheme ({states['scheme'].get('name', '?')}) than the run's.")
        return
    table = states["table"].set_index(["type", "state"])
    filled, worst = [], None
    for i, row in populations.iterrows():
        key = (row["type"], row["state"])
        if np.isfinite(row["target_population"]) or key not in table.index:
            continue
        value = table.loc[key]
        value = value.iloc[0] if value.ndim > 1 else value
        populations.at[i, "target_population"] = float(value["population"])
        populations.at[i, "target_population_err"] = float(value["population_err"])
        filled.append(i)
        err = np.hypot(float(value["population_err"]), float(row["reweighted_population_err"]))
        if np.isfinite(err) and err > 0:
            z = (row["reweighted_population"] - float(value["population"])) / err
            if worst is None or abs(z) > abs(worst[0]):
                worst = (z, row["type"], row["state"])
    if not filled:
        return
    how = (f"; the reweighted populations lie within {abs(worst[0]):.1f} combined errors of them (largest: "
           f"{worst[2]} of {worst[1]})" if worst else "")
    notices.append(f"the target populations shown for the states come from the target folder ({source}): they are "
                   f"not fitted, a check of the reweighted ones against the target's own states{how}.")
