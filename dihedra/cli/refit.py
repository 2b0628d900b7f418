"""``dihedra refit``: a torsion correction that brings a results folder's ensemble to a target."""

from ..analysis.refit import (DEFAULT_BIN_WIDTH_DEG, DEFAULT_BLOCKS, DEFAULT_BOOTSTRAP, DEFAULT_FOLDS, DEFAULT_TERMS,
                              MIN_EFFECTIVE_FRACTION, WEIGHTS_PER, fit_torsion_correction)
from ..analysis.refit.driver import DEFAULT_SEED
from ..errors import DihedraError
from ..io.resultsdir import load_results
from ..io.outputs import check_earlier_outputs
from .common import add_overwrite_option, add_types_option, format_pm, print_notices, say


def register(sub):
    p = sub.add_parser(
        "refit", help="fit a torsion correction that reweights the sampled ensemble onto a target",
        description="Fit, for the chosen torsion types together, a Fourier correction sum_n k_n [1 + cos(n phi - "
                    "phase_n)] (phases 0 or 180 deg unless --sine-terms) whose Boltzmann factor reweights the frames "
                    "of a results folder (tracked with "
                    "--keep-angles) onto a target: a free-energy profile (angle_deg, free_energy_kj_mol; or another "
                    "results folder), state populations (type, state, population[, population_err]) or measured 3J "
                    "couplings (torsion, J_hz, J_err_hz, with --relation); the kind is told from the columns. Ridge "
                    "regularisation chosen by cross-validation over contiguous pieces of the trajectory, bootstrap "
                    "errors (the run's blocks resampled and the target drawn from its own errors), Kish's effective "
                    "sample fraction (below --min-effective-fraction too few frames carry the weight and the fit is "
                    "reported as not trustworthy). "
                    "Writes refit_terms.csv, refit_fourier.csv, refit_correction.csv, "
                    "refit_populations.csv, refit_profiles.csv, refit_summary.csv, refit_cross_validation.csv, "
                    "refit_ryckaert_bellemans.csv (where that form exists), refit_openmm.xml and refit.json into DIR. "
                    "Method: Cesari et al., J. Chem. Theory Comput. 15 (2019) 3425; Pitera & Chodera, J. Chem. "
                    "Theory Comput. 8 (2012) 3445; Kish, Survey Sampling (1965).")
    p.add_argument("folder", metavar="DIR", help="results folder written by 'dihedra track --keep-angles'")
    p.add_argument("--target", required=True, metavar="FILE",
                   help="target profile, populations or couplings (CSV), or a results folder (its profiles.csv)")
    p.add_argument("--temperature", type=float, default=None, metavar="K",
                   help="simulation temperature in kelvin (required unless track recorded one)")
    add_types_option(p, "torsion types to correct, fitted together (default: the types the target names)")
    p.add_argument("--terms", type=int, default=DEFAULT_TERMS, metavar="N",
                   help=f"Fourier terms n = 1..N (default {DEFAULT_TERMS}; at most 5 for a Ryckaert-Bellemans form)")
    shape = p.add_mutually_exclusive_group()
    shape.add_argument("--sine-terms", dest="symmetric", action="store_false",
                       help="fit sine terms as well (phases other than 0 and 180 deg), for types at a chiral centre "
                            "or in a chiral environment, where V(phi) and V(-phi) may differ (default: cosine terms "
                            "only, V(phi) = V(-phi), as for a torsion without a chiral centre)")
    shape.add_argument("--symmetric", dest="symmetric", action="store_true",
                       help="cosine terms only (phases 0 or 180 deg): the default, kept for earlier scripts")
    p.set_defaults(symmetric=True)
    p.add_argument("--relation", metavar="NAME", default=None,
                   help="Karplus relation of a couplings target (a built-in name or a .toml file)")
    p.add_argument("--weights-per", choices=WEIGHTS_PER, default="molecule",
                   help="one weight per molecule and frame (default: independent copies, e.g. a gas; the mean-field "
                        "approximation in a liquid) or per frame (exact for any system)")
    p.add_argument("--bin-width", type=float, default=DEFAULT_BIN_WIDTH_DEG, metavar="DEG",
                   help=f"bins of the profiles, a divisor of 360 (default {DEFAULT_BIN_WIDTH_DEG:g})")
    p.add_argument("--regularisation", type=float, default=None, metavar="X",
                   help="ridge strength (default: chosen by cross-validation over --folds pieces of the trajectory)")
    p.add_argument("--folds", type=int, default=DEFAULT_FOLDS, metavar="N",
                   help=f"contiguous pieces of every replica for the cross-validation (default {DEFAULT_FOLDS})")
    p.add_argument("--bootstrap", type=int, default=DEFAULT_BOOTSTRAP, metavar="N",
                   help=f"bootstrap refits for the errors, blocks of the run resampled and the target drawn from "
                        f"its errors (default {DEFAULT_BOOTSTRAP}, fewer than the 200 resamples of the other "
                        "commands: each resample is a whole fit with its cross-validation)")
    p.add_argument("--blocks", type=int, default=DEFAULT_BLOCKS, metavar="N",
                   help=f"bootstrap blocks per replica (default {DEFAULT_BLOCKS})")
    p.add_argument("--min-effective-fraction", type=float, default=MIN_EFFECTIVE_FRACTION, metavar="F",
                   help=f"below this Kish effective sample fraction the fit is not trustworthy (default "
                        f"{MIN_EFFECTIVE_FRACTION:g})")
    p.add_argument("--atom-classes", metavar="NAME=CLASS,...", default=None,
                   help="atom classes of the OpenMM fragment by atom name (or RESNAME:NAME), e.g. "
                        "C1=CH3,C2=CH2,C3=CH2,C4=CH3 (default: the atom names stand in)")
    p.add_argument("--atom-types", metavar="NAME=TYPE,...", default=None,
                   help="match the OpenMM fragment by atom types instead of classes")
    p.add_argument("--seed", type=int, default=DEFAULT_SEED, metavar="N", help="seed of the bootstrap")
    add_overwrite_option(p, "refit files (refit_*.csv, refit_openmm.xml, refit.json)")
    p.set_defaults(func=run)


def parse_mapping(text, option):
    """``NAME=VALUE,NAME=VALUE`` as a dict (None for None)."""
    if text is None:
        return None
    out = {}
    for item in str(text).split(","):
        if not item.strip():
            continue
        name, sep, value = item.partition("=")
        if not sep or not name.strip() or not value.strip():
            raise DihedraError(f"{option} takes NAME=VALUE pairs separated by commas (e.g. C1=CH3,C2=CH2); got "
                               f"{item.strip()!r}.")
        out[name.strip()] = value.strip()
    return out


def run(args):
    result = load_results(args.folder)
    check_earlier_outputs(result.folder, "dihedra refit", args.overwrite, prefixes=("refit_", "refit."))
    fit = fit_torsion_correction(
        result, args.target, temperature_k=args.temperature, types=args.types, terms=args.terms,
        symmetric=args.symmetric, relation=args.relation, weights_per=args.weights_per, bin_width_deg=args.bin_width,
        regularisation=args.regularisation, n_folds=args.folds, n_bootstrap=args.bootstrap, n_blocks=args.blocks,
        min_effective_fraction=args.min_effective_fraction, atom_classes=parse_mapping(args.atom_classes,
                                                                                       "--atom-classes"),
        atom_types=parse_mapping(args.atom_types, "--atom-types"), seed=args.seed, log=say)
    paths = fit.save(result.folder)
    report(fit)
    print_notices(fit.notices)
    say("written: " + ", ".join(p.rsplit("/", 1)[-1] for p in paths) + f" in {result.folder}")


def report(fit):
    s = fit.summary.iloc[0]
    p = fit.parameters
    print(f"torsion correction fitted to a {p['target_kind']} target at {p['temperature_k']:g} K "
          f"(weights per {s['weights_per']}, {int(s['n_samples'])} samples):")
    tied = {name: group for group in p.get("tied_types", []) for name in group}
    for name, sub in fit.terms.groupby("type", sort=False):
        shared = [t for t in tied.get(name, []) if t != name]
        also = f"   (one force-field term with {', '.join(shared)}: the same coefficients)" if shared else ""
        if p.get("symmetric"):   # (phases 0 or 180: the signed cosine coefficient says both, with its error)
            print(f"  {name}: dV(phi) = sum a_n cos(n phi) + constant "
                  f"(= k_n [1 + cos(n phi - phase_n)], k_n = |a_n|, phase_n 0 for a_n > 0, 180 below){also}")
            for row in sub.itertuples(index=False):
                print(f"    n = {row.n}   a = {format_pm(row.cos_kj_mol, row.cos_err_kj_mol, 3):>17} kJ/mol")
            continue
        print(f"  {name}: dV(phi) = sum k_n [1 + cos(n phi - phase_n)]{also}")
        for row in sub.itertuples(index=False):
            print(f"    n = {row.n}   k = {format_pm(row.k_kj_mol, row.k_err_kj_mol, 3):>17} kJ/mol   "
                  f"phase = {format_pm(row.phase_deg, row.phase_err_deg, 1):>15} deg")
    print(reweighting_line(s))
    rest = ("; the regularisation sets the rest, see the notes"
            if s["effective_parameters"] < s["n_coefficients"] - 0.5 else "")
    print(f"chi-square per observable {s['chi_square_sampled']:.2f} sampled -> {s['chi_square_reweighted']:.2f} "
          f"reweighted ({int(s['n_fitted_observables'])} fitted observables; {s['effective_parameters']:.1f} of "
          f"{int(s['n_coefficients'])} coefficients determined by the data{rest})")
    cv = "cross-validated score {:.3g}".format(s["cv_score"]) if s["cv_score"] == s["cv_score"] else "given"
    print(f"regularisation {s['regularisation']:g} ({cv})")
    pops = fit.populations
    print("populations (target / sampled / reweighted; *: a target not fitted, see the notes):")
    for row in pops.itertuples(index=False):
        target = ("-" if row.target_population != row.target_population else
                  format_pm(row.target_population, row.target_population_err)
                  if row.target_population_err == row.target_population_err and row.target_population_err > 0
                  else f"{row.target_population:.3f}")
        target += " " if row.fitted or target == "-" else "*"
        sampled = format_pm(row.sampled_population, row.sampled_population_err)
        print(f"  {row.type} {row.state:<12} {target:>15}   {sampled}"
              f"   {format_pm(row.reweighted_population, row.reweighted_population_err)}")


def reweighting_line(s):
    """The line on the reweighting: whether enough effective samples (Kish) carry the weight. It
    rates the frames, not the correction's terms (their errors and the notes do that)."""
    fraction = format_pm(s["effective_sample_fraction"], s["effective_sample_fraction_err"])
    how = (f"Kish effective sample fraction {fraction}, minimum {s['min_effective_fraction']:g}; largest weight "
           f"{s['largest_weight_fraction']:.2g} of the total")
    if s["trustworthy"]:
        return f"reweighting: enough effective samples ({how}); this rates the frames, not the correction's terms"
    return (f"reweighting: TOO FEW EFFECTIVE SAMPLES ({how}): the reweighted numbers rest on a few frames; a new "
            "simulation with this correction is needed")
