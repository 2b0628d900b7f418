"""``dihedra compare``: sampled free-energy profile versus a static torsion scan, with a verdict per type."""

from ..analysis.compare import Thresholds, compare_with_scan, format_comparison
from ..analysis.profiles import (DEFAULT_BIN_WIDTH_DEG, DEFAULT_BOOTSTRAP, DEFAULT_SEED, check_estimate_options,
                                 resolve_temperature)
from ..analysis.reference_populations import compare_reference_populations, format_reference
from ..analysis.scans import read_scan
from ..errors import DihedraError
from ..io.resultsdir import load_results
from ..io.outputs import check_earlier_outputs
from .common import _Renamed, add_overwrite_option, add_renamed, add_types_option, print_notices, say


def register(sub):
    p = sub.add_parser(
        "compare", help="compare sampled profiles with a static torsion scan (force-field validation)",
        description="Compare the sampled free-energy profile of torsion types with a static torsion scan "
                    "(CSV of angle and energy, a TOML file of torsion parameters, or a scan written by "
                    "'dihedra scan'): aligned profiles, RMSE, minima and barriers, state populations with "
                    "z-scores, Jensen-Shannon divergence and a verdict (consistent / inconsistent / "
                    "undersampled). Writes comparison.csv, comparison_profiles.csv and comparison.json "
                    "into DIR. With --reference-populations, measured state populations are compared too "
                    "(z-scores, a verdict per type; columns reference_* of comparison.csv).")
    p.add_argument("folder", metavar="DIR", help="results folder written by 'dihedra track'")
    p.add_argument("--scan", default=None, metavar="FILE", help="scan CSV, or a .toml parameter file")
    p.add_argument("--reference-populations", default=None, metavar="FILE",
                   help="CSV of measured or reference state populations (type, state, population, "
                        "population_err; 'A|B' sums states): z-scores and a verdict in the same output")
    p.add_argument("--scan-angle-unit", choices=["deg", "rad"], default=None,
                   help="unit of the angles in the scan file (read; required unless the column name carries it)")
    add_renamed(p, "--angle-unit", "--scan-angle-unit", "scan_angle_unit", choices=["deg", "rad"], action=_Renamed)
    p.add_argument("--scan-energy-unit", default=None, metavar="UNIT",
                   help="unit of the energies in the scan file (read): kJ/mol, kcal/mol, hartree, eV or kT "
                        "(required unless the column name carries it); the outputs are in kJ/mol")
    add_renamed(p, "--energy-unit", "--scan-energy-unit", "scan_energy_unit", action=_Renamed)
    p.add_argument("--scan-columns", default=None, metavar="ANGLE,ENERGY",
                   help="names of the angle and energy columns of the scan file (default: the first two "
                        "numeric columns)")
    add_renamed(p, "--columns", "--scan-columns", "scan_columns", action=_Renamed)
    p.add_argument("--scan-kind", choices=["rigid", "relaxed"], default=None,
                   help="whether the scan is rigid or relaxed (recorded; default from the file, else unspecified)")
    add_types_option(p, "torsion types the scan describes, or 'all' (default: the folder's only type)",
                     former=("--type",))
    p.add_argument("--temperature", type=float, default=None, metavar="K",
                   help="temperature in kelvin (required unless track recorded one)")
    p.add_argument("--bin-width", type=float, default=DEFAULT_BIN_WIDTH_DEG, metavar="DEG",
                   help=f"bin width of the profiles compared (default {DEFAULT_BIN_WIDTH_DEG:g})")
    th = Thresholds()
    p.add_argument("--tolerance", type=float, default=th.tolerance_kj_mol, metavar="KJ_MOL",
                   help=f"agreement tolerance for the verdict in kJ/mol (default {th.tolerance_kj_mol:g})")
    p.add_argument("--bootstrap", type=int, default=DEFAULT_BOOTSTRAP, metavar="N",
                   help=f"block-bootstrap resamples (default {DEFAULT_BOOTSTRAP})")
    p.add_argument("--seed", type=int, default=DEFAULT_SEED, metavar="N", help="seed of the bootstrap")
    add_overwrite_option(p, "comparison files (comparison.csv, comparison_profiles.csv, comparison.json)")
    p.set_defaults(func=run)


#: The files of 'dihedra compare'.
OUTPUTS = ("comparison.csv", "comparison_profiles.csv", "comparison.json")


def run(args):
    if args.scan is None and args.reference_populations is None:
        raise DihedraError("give --scan FILE, --reference-populations FILE, or both.")
    check_estimate_options(args.bootstrap)   # before any work or note
    result = load_results(args.folder)
    check_earlier_outputs(result.folder, "dihedra compare", args.overwrite, names=OUTPUTS)
    if args.scan is None:
        return run_reference_only(args, result)
    # (a temperature given that is not the run's is pointed out by the comparison itself, once)
    temperature = resolve_temperature(args.temperature, result.summary, say if args.temperature is None else None)
    scan = read_scan(args.scan, angle_unit=args.scan_angle_unit, energy_unit=args.scan_energy_unit,
                     columns=args.scan_columns, kind=args.scan_kind, temperature_k=temperature)
    thresholds = Thresholds(tolerance_kj_mol=args.tolerance)
    cmp = compare_with_scan(result, scan, temperature_k=temperature, types=args.types,
                            bin_width_deg=args.bin_width, thresholds=thresholds, n_bootstrap=args.bootstrap,
                            seed=args.seed)
    ref = None
    if args.reference_populations:
        ref = compare_reference_populations(result, args.reference_populations)
        cmp.add_reference(ref)
    paths = cmp.save(result.folder)
    print(format_comparison(cmp))
    if ref is not None:
        print("\n" + format_reference(ref))
    print_notices(cmp.notices)
    print("\nwritten: " + ", ".join(p.rsplit("/", 1)[-1] for p in paths) + f" in {result.folder}")


def run_reference_only(args, result):
    """Reference populations without a scan: comparison.csv and comparison.json only."""
    ref = compare_reference_populations(result, args.reference_populations)
    paths = ref.save(result.folder)
    print(format_reference(ref))
    print_notices(ref.notices)
    print("\nwritten: " + ", ".join(p.rsplit("/", 1)[-1] for p in paths) + f" in {result.folder}")
