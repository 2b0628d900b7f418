"""``dihedra torsions``: list what a torsion specification selects, without reading a trajectory."""

from ..inputs import load_universe
from ..torsions import select_torsions
from .common import add_torsion_options, print_notices


def register(sub):
    p = sub.add_parser(
        "torsions", help="list the torsions a specification selects (no trajectory needed)",
        description="List the torsions a specification selects in a topology: label, type, atoms.")
    p.add_argument("topology", help="topology file")
    add_torsion_options(p)
    p.add_argument("--csv", metavar="FILE", default=None, help="also write the table as CSV")
    p.set_defaults(func=run)


def run(args):
    notices = []
    universe = load_universe(args.topology, notices=notices)
    tset = select_torsions(universe, args.torsions)
    table = tset.to_frame(universe)
    shown = table[["torsion", "type", "atom_indices", "atom_names"]]
    with_pd_options(lambda: print(shown.to_string(index=False)))
    print(f"{len(table)} torsions of {table['type'].nunique()} types")
    print_notices(notices + tset.notices)
    if args.csv:
        table.to_csv(args.csv, index=False)
        print(f"table written to {args.csv}")


def with_pd_options(fn):
    import pandas as pd
    with pd.option_context("display.max_rows", 10000, "display.width", 200, "display.max_colwidth", 60):
        fn()
