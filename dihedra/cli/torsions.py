"""``dihedra torsions``: list what a torsion specification selects, without reading a trajectory."""

import os

from ..trajectory.inputs import load_universe
from ..io.outputs import check_single_file, file_head_contains, write_file
from ..selection.specs import select_torsions
from .common import add_torsion_options, print_notices


def register(sub):
    p = sub.add_parser(
        "torsions", help="list the torsions a specification selects (no trajectory needed)",
        description="List the torsions a specification selects in a topology: label, type, atoms.")
    p.add_argument("topology", help="topology file")
    add_torsion_options(p)
    p.add_argument("--csv", metavar="FILE", default=None, help="also write the table as CSV (replaces only a table this command wrote)")
    p.set_defaults(func=run)


#: The start of the header of a table that 'torsions --csv' wrote (only such a file is replaced).
TABLE_HEAD = "torsion,type,atom_indices,"


def run(args):
    csv = None
    if args.csv:
        csv = check_single_file(args.csv, inputs=[args.topology], option="--csv", kind="torsion table",
                                ours=lambda p: file_head_contains(p, TABLE_HEAD, limit=len(TABLE_HEAD)))
    notices = []
    universe = load_universe(args.topology, notices=notices)
    tset = select_torsions(universe, args.torsions, keep_variants=args.keep_variants)
    table = tset.to_frame(universe)
    shown = table[["torsion", "type", "atom_indices", "atom_names"]]
    with_pd_options(lambda: print(shown.to_string(index=False)))
    print(f"{len(table)} torsions of {table['type'].nunique()} types")
    print_notices(notices + tset.notices)
    if csv:
        write_file(os.path.dirname(csv), os.path.basename(csv), lambda tmp: table.to_csv(tmp, index=False),
                   marked=False)
        print(f"table written to {csv}")


def with_pd_options(fn):
    import pandas as pd
    with pd.option_context("display.max_rows", 10000, "display.width", 200, "display.max_colwidth", 60):
        fn()
