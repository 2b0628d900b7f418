"""``dihedra convergence``: the convergence verdicts of a results folder again, with other targets."""

import os

from ..analysis.convergence import TARGET_ERROR, TARGET_ERROR_KJ_MOL, convergence
from ..io.resultsdir import load_results
from .common import print_notices, print_verdicts, say

#: The files of the convergence tables ('dihedra track' writes them into every results folder).
FILES = ("convergence.csv", "convergence_by_state.csv", "convergence_over_time.csv", "convergence.json")


def register(sub):
    p = sub.add_parser(
        "convergence", help="convergence verdicts per torsion type again, with other targets or time blocks",
        description="Judge the convergence of every torsion type of a results folder again from its state "
                    "time series: the start of the equilibrated part (Chodera, J. Chem. Theory Comput. 12 "
                    "(2016) 1799), whether the replicas agree, and the sampling still needed for a target "
                    "error. 'dihedra track' already wrote these tables with its targets; this prints them for "
                    "other targets and writes them in place of those only with --overwrite.")
    p.add_argument("folder", metavar="DIR", help="results folder written by 'dihedra track'")
    p.add_argument("--target-error", type=float, default=TARGET_ERROR, metavar="FRACTION",
                   help=f"target standard error of a population (default {TARGET_ERROR:g})")
    p.add_argument("--target-error-kj-mol", type=float, default=TARGET_ERROR_KJ_MOL, metavar="KJ_MOL",
                   help="target standard error of a free-energy difference between states, in kJ/mol "
                        f"(default {TARGET_ERROR_KJ_MOL:g})")
    p.add_argument("--temperature", type=float, default=None, metavar="K",
                   help="temperature in kelvin for the free-energy forecast (default: the one recorded by 'track')")
    p.add_argument("--time-blocks", type=int, default=500, metavar="N",
                   help="time blocks per replica that the state series is summed into (default 500): the "
                        "resolution of the detected start")
    p.add_argument("--overwrite", action="store_true",
                   help="write these tables in place of the folder's (those 'dihedra track' or an earlier 'dihedra "
                        "convergence' wrote); without it they are only printed (files dihedra did not write are "
                        "never replaced)")
    p.set_defaults(func=run)


def run(args):
    result = load_results(args.folder)
    conv = convergence(result, target_error=args.target_error, target_error_kj_mol=args.target_error_kj_mol,
                       temperature_k=args.temperature, n_time_blocks=args.time_blocks)
    print_verdicts(conv.convergence, f"convergence per type (population target {args.target_error:g}, "
                                     f"free-energy target {args.target_error_kj_mol:g} kJ/mol)")
    print_notices(conv.notices)
    found = [f for f in FILES if os.path.exists(os.path.join(result.folder, f))]
    if found and not args.overwrite:
        say(f"not written: {result.folder} keeps its convergence tables ({', '.join(found)}), which the report "
            "and figures read; give --overwrite to replace them with these.")
        return
    paths = conv.save(result.folder)
    say("written: " + ", ".join(os.path.basename(p) for p in paths) + f" in {result.folder}")
