"""``dihedra windows``: unbiased torsion profile from umbrella windows, by MBAR and by WHAM."""

from ..analysis.profiles import DEFAULT_BIN_WIDTH_DEG, DEFAULT_SEED
from ..analysis.windows import (DEFAULT_BOOTSTRAP, DEFAULT_MAX_MBAR_SAMPLES, MIN_OVERLAP, read_windows,
                                unbias_windows, window_inputs)
from ..io.outputs import check_folder_target
from .common import add_scheme_option, print_notices, say, workers_option
from .profile import report_profiles


def register(sub):
    p = sub.add_parser(
        "windows", help="unbiased profile from umbrella windows along a torsion (MBAR and WHAM)",
        description="Track every umbrella window of WINDOWS.csv (columns trajectory, topology, torsions, "
                    "centre_deg, k_kj_mol_rad2; bias 0.5 k d^2 on the minimum-image angle difference in "
                    "radians, on every selected torsion; relative paths relative to the CSV), remove the "
                    "biases by MBAR (pymbar) and by WHAM, check the overlap of neighbouring windows, and "
                    "write a results folder with the MBAR-weighted histograms and the files of 'dihedra "
                    "profile', plus windows.csv, window_overlap.csv, windows_profiles.csv and windows.json.")
    p.add_argument("windows", metavar="WINDOWS.csv", help="table of windows, one row per biased simulation")
    p.add_argument("--temperature", type=float, required=True, metavar="K",
                   help="temperature of the simulations in kelvin (required)")
    p.add_argument("--out", required=True, metavar="DIR", help="results folder to create")
    add_scheme_option(p)
    p.add_argument("--bin-width", type=float, default=DEFAULT_BIN_WIDTH_DEG, metavar="DEG",
                   help=f"profile bin width, a divisor of 360 (default {DEFAULT_BIN_WIDTH_DEG:g})")
    p.add_argument("--bandwidth", type=float, default=None, metavar="DEG",
                   help="von Mises kernel standard deviation (default: rule of thumb)")
    p.add_argument("--bootstrap", type=int, default=DEFAULT_BOOTSTRAP, metavar="N",
                   help=f"block-bootstrap resamples for the errors (default {DEFAULT_BOOTSTRAP})")
    p.add_argument("--seed", type=int, default=DEFAULT_SEED, metavar="N", help="seed of the bootstrap")
    p.add_argument("--start", type=int, default=None, metavar="N",
                   help="first frame of every window (drop equilibration)")
    p.add_argument("--stop", type=int, default=None, metavar="N", help="stop before this frame in every window")
    p.add_argument("--step", type=int, default=None, metavar="N", help="use every N-th frame")
    p.add_argument("--workers", type=workers_option, default=1, metavar="N",
                   help="worker processes per window, or 'auto' (as many as pay, as for track; default 1)")
    p.add_argument("--max-mbar-samples", type=int, default=DEFAULT_MAX_MBAR_SAMPLES, metavar="N",
                   help=f"samples handed to pymbar at most (default {DEFAULT_MAX_MBAR_SAMPLES})")
    p.add_argument("--overwrite", action="store_true",
                   help="replace an existing results folder that dihedra made and that holds only its files")
    p.set_defaults(func=run)


def run(args):
    # the target is checked before the long computation, and again when the folder is written
    check_folder_target(args.out, overwrite=args.overwrite, inputs=window_inputs(read_windows(args.windows),
                                                                                  args.windows))
    wres = unbias_windows(args.windows, temperature_k=args.temperature, scheme=args.scheme,
                          bin_width_deg=args.bin_width, bandwidth_deg=args.bandwidth, n_bootstrap=args.bootstrap,
                          seed=args.seed, start=args.start, stop=args.stop, step=args.step, workers=args.workers,
                          max_mbar_samples=args.max_mbar_samples, log=say)
    wres.save(args.out, overwrite=args.overwrite)
    warnings = [n for n in wres.notices if n.startswith("WARNING")]
    for note in warnings:   # first and on their own: the numbers below rest on the window table
        say(note)
    report(wres)
    print_notices([n for n in wres.notices if n not in warnings])
    print(f"results written to {wres.result.folder}")
    if not wres.info["restraints_consistent"]:   # a script must not go on with this profile
        say(f"dihedra windows: the samples contradict the window table (WARNING above): the profile, populations "
            f"and overlap in {wres.result.folder} are unusable until the table is fixed; exit status 1.")
        return 1
    return 0


def report(wres):
    w = wres.windows
    if not wres.info["restraints_consistent"]:   # (also here: this part may be read without the warnings)
        print("UNUSABLE: the samples contradict the window table (see the WARNING); every number below rests on it.")
    print(f"{len(w)} windows, {int(w['n_samples'].sum())} samples; statistical inefficiency of the bias energy "
          f"{w['statistical_inefficiency'].min():.1f}-{w['statistical_inefficiency'].max():.1f}")
    ov = wres.overlap
    if len(ov) and ov["mbar_overlap"].notna().any():
        worst = ov.loc[ov["mbar_overlap"].idxmin()]
        print(f"overlap of neighbouring windows: MBAR overlap {ov['mbar_overlap'].min():.3f} (windows "
              f"{int(worst['window_a'])}-{int(worst['window_b'])}) to {ov['mbar_overlap'].max():.3f}; "
              f"{int(ov['poor'].sum())} poor pair(s) (below {MIN_OVERLAP:g})")
    elif len(ov):
        print("overlap of neighbouring windows: not assessed (the samples contradict the window table)")
    for row in wres.agreement.itertuples(index=False):
        if not row.n_bins:
            print(f"type {row.type}: MBAR vs WHAM: no profile bin holds both estimates")
            continue
        print(f"type {row.type}: MBAR vs WHAM over {row.n_bins} bins: largest difference "
              f"{row.max_abs_difference_kj_mol:.2f} kJ/mol ({row.max_difference_over_error:.1f} combined errors); "
              f"{100 * row.fraction_within:.0f} % of bins within 2 errors")
    report_profiles(wres.profiles, "kJ/mol")
