"""``dihedra couplings``: ensemble-averaged 3J couplings of a results folder, against experiment."""

from ..analysis.couplings import (BUILTIN_RELATIONS, coupling_file_names, ensemble_couplings, get_relation,
                                  read_experimental)
from ..io.outputs import check_earlier_outputs
from ..io.resultsdir import load_results
from .common import add_overwrite_option, add_types_option, format_pm, print_notices, say


def register(sub):
    p = sub.add_parser(
        "couplings", help="ensemble-averaged 3J couplings (Karplus relations), optionally against experiment",
        description="Average a Karplus relation over the sampled torsion distributions of a results folder "
                    "(the fine histograms, weighted when the run was) and write, for each relation, "
                    "couplings_RELATION.csv and couplings_RELATION.json; with --experimental also "
                    "couplings_RELATION_vs_experiment.csv with deviations, chi-square and a verdict. Runs with "
                    "other relations add their own files. Built-in relations: " + ", ".join(BUILTIN_RELATIONS) + ".")
    p.add_argument("folder", metavar="DIR", help="results folder written by 'dihedra track' or 'dihedra windows'")
    p.add_argument("--relation", action="append", required=True, metavar="NAME",
                   help="Karplus relation (repeatable): " + ", ".join(BUILTIN_RELATIONS)
                        + ", or a .toml file with a [relation] table")
    p.add_argument("--experimental", metavar="FILE", default=None,
                   help="CSV of measured couplings: torsion (or residue), J_hz, J_err_hz and optionally "
                        "coupled_atoms (e.g. HN,HA2: one H-alpha of a glycine instead of their sum)")
    add_types_option(p, "torsion types, or single torsions by their label, to average (default: the torsions the "
                        "relation is meant for, e.g. protein phi)", former=("--select",))
    add_overwrite_option(p, "files of the same relation")
    p.set_defaults(func=run)


def run(args):
    result = load_results(args.folder)
    relations = [get_relation(r) for r in args.relation]
    check_earlier_outputs(result.folder, "dihedra couplings", args.overwrite,
                          names=[n for r in relations for n in coupling_file_names(r.name, True)])
    experimental = read_experimental(args.experimental) if args.experimental else None
    cres = ensemble_couplings(result, relations, types=args.types, experimental=experimental)
    paths = cres.save(result.folder, experimental_path=args.experimental)
    report(cres, cres.experiment_summary)
    print_notices(cres.notices)
    say("written: " + ", ".join(p.rsplit("/", 1)[-1] for p in paths) + f" in {result.folder}")


def _row_name(row):
    """``GLY10:phi [HN,HA2]`` / ``GLY:phi [HN,HA2] (mean of type)``: the coupled protons where a
    torsion has more than one row (glycine)."""
    protons = getattr(row, "coupled_atoms", "")
    base = row.torsion or f"{row.type}"
    tag = f" [{protons}]" if isinstance(protons, str) and protons and row.type.startswith("GLY") else ""
    return f"{base}{tag}" + ("" if row.torsion else " (mean of type)")


def report(cres, summary, max_rows=30):
    table = cres.couplings
    for rel, sub in table.groupby("relation", sort=False):
        first = sub.iloc[0]
        print(f"{rel}: <{first['coupling']}> in Hz (statistical error; relation's own spread separately)")
        shown = sub[sub["level"] == "type"] if (sub["level"] == "type").any() and len(sub) > max_rows else sub
        names = [_row_name(row) for row in shown.itertuples(index=False)]
        width = max(8, *(len(x) for x in names))
        for name, row in zip(names[:max_rows], shown.head(max_rows).itertuples(index=False)):
            sys_text = f"   systematic {row.j_systematic_hz:.2f}" if row.j_systematic_hz == row.j_systematic_hz else ""
            print(f"  {name:<{width}}  {format_pm(row.j_hz, row.j_err_hz, 2):>16}{sys_text}")
        if len(shown) > max_rows:
            print(f"  ... {len(shown) - max_rows} more rows in {coupling_file_names(rel)[0]}")
    for s in summary or []:
        if s["n_points"] == 0:
            print(f"{s['relation']} vs experiment: no experimental value matched a torsion "
                  f"({'; '.join(s['unmatched'][:3])})")
            continue
        print(f"{s['relation']} vs experiment: {s['n_points']} points, RMSD {s['rmsd_hz']:.2f} Hz, mean "
              f"deviation {s['mean_deviation_hz']:+.2f} Hz, chi-square per point {s['chi_square_per_point']:.2f} "
              f"(p = {s['p_value']:.3g}) -> {s['verdict']}")
        if s["outliers"]:
            print(f"  outliers (|z| > 3): {', '.join(s['outliers'])}")
        if s["unmatched"]:
            print(f"  not matched: {', '.join(s['unmatched'][:5])}" + (" ..." if len(s["unmatched"]) > 5 else ""))
