"""``dihedra torsions``: list what a torsion specification selects, without reading a trajectory."""

import os

from ..trajectory.inputs import load_universe
from ..io.outputs import check_single_file, file_head_contains, write_file
from ..selection.choice import BASINS, choose_schemes
from ..selection.specs import select_torsions
from .common import add_scheme_option, add_torsion_options, print_notices


def register(sub):
    p = sub.add_parser(
        "torsions", help="list the torsions a specification selects (no trajectory needed)",
        description="List the torsions a specification selects in a topology: label, type, atoms; with "
                    "--scheme, also the scheme each torsion and type would follow and why ('--scheme auto': "
                    "the class of the central bond, its periodicity and the rule with its source).")
    p.add_argument("topology", help="topology file")
    add_torsion_options(p)
    add_scheme_option(p)
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
    shown = ["torsion", "type", "atom_indices", "atom_names"]
    if args.scheme is not None:
        choice = choose_schemes(args.scheme, universe, tset, args.torsions)
        table = with_schemes(table, choice)
        shown = ["torsion", "atom_names"] + [c for c in ("bond", "periodicity") if c in table] + ["scheme"]
        notices.extend(choice.notices)
    with_pd_options(lambda: print(table[shown].to_string(index=False)))
    print(f"{len(table)} torsions of {table['type'].nunique()} types")
    if args.scheme is not None:
        print("scheme of each type, and why:")
        for row in choice.rows().itertuples(index=False):
            print(f"  {row.type}: {row.scheme}: {row.reason}")
    print_notices(notices + tset.notices)
    if csv:
        write_file(os.path.dirname(csv), os.path.basename(csv), lambda tmp: table.to_csv(tmp, index=False),
                   marked=False)
        print(f"table written to {csv}")


def with_schemes(table, choice):
    """The torsion table with the scheme of each torsion and why (``bond``, ``centres`` and
    ``periodicity`` from the chemistry where it was asked; ``scheme_reason``)."""
    table = table.copy()
    if choice.table is not None:
        chem = choice.table.set_index("torsion")
        for col in ("bond", "centres", "periodicity"):
            table[col] = chem.loc[table["torsion"], col].to_numpy()
    names = {t: (s if isinstance(s, str) else s.name) for t, s in choice.by_type.items()}
    table["scheme"] = [names[t] + (" (from the trajectory)" if names[t] == BASINS else "") for t in table["type"]]
    table["scheme_reason"] = [choice.reasons.get(t, "") for t in table["type"]]
    return table


def with_pd_options(fn):
    import pandas as pd
    with pd.option_context("display.max_rows", 10000, "display.width", 200, "display.max_colwidth", 60):
        fn()
