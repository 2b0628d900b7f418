"""``dihedra track``: follow torsions through trajectories and write a results folder."""

from ..errors import name_list
from ..io.tables import read_optional_table
from ..tracking import track
from .common import (add_scheme_option, add_torsion_options, add_track_options, format_pm, print_notices,
                     print_population_table, print_verdicts, say)


def register(sub):
    p = sub.add_parser(
        "track", help="follow torsions through trajectories: states, populations, conformers",
        description="Follow torsions through one or more trajectories of one system (replicas) and "
                    "write a results folder: torsions.csv, populations.csv, populations_by_type.csv, "
                    "conformers.csv, states.parquet (the state of every frame), cores.parquet (whether each "
                    "frame lies in the core of its state, for kinetics), blocks.npz and histograms.parquet (block "
                    "sums for errors and profiles), convergence.csv and "
                    "summary.json.")
    p.add_argument("topology", help="topology file (PDB with CONECT, PSF, TPR, PRMTOP, GRO, ...)")
    p.add_argument("trajectories", nargs="+", metavar="TRAJ",
                   help="trajectory files; several are replicas of the same system")
    add_torsion_options(p)
    add_scheme_option(p)
    p.add_argument("--out", required=True, metavar="DIR", help="results folder to create")
    add_track_options(p)
    add_convergence_options(p)
    p.add_argument("--allow-duplicates", action="store_true",
                   help="accept the same trajectory file twice as two replicas (refused by default: copies "
                        "are not independent and would shrink every error)")
    p.set_defaults(func=run)


def add_convergence_options(p):
    """--discard and the targets of the convergence forecast."""
    p.add_argument("--discard", default=None, metavar="auto|N|TIME",
                   help="drop the start of every replica before anything is computed: 'auto' (detected by "
                        "equilibration detection on a quick first pass), N frames, or a time such as '250ps' or "
                        "'1.5ns', counted from the first analysed frame; recorded in summary.json")
    p.add_argument("--target-error", type=float, default=0.01, metavar="FRACTION",
                   help="target standard error of a population for the forecast of convergence.csv (default 0.01)")
    p.add_argument("--target-error-kj-mol", type=float, default=0.5, metavar="KJ_MOL",
                   help="target standard error of a free-energy difference between states, in kJ/mol "
                        "(default 0.5)")


def run(args):
    result = track(args.topology, args.trajectories, torsions=args.torsions, scheme=args.scheme,
                   start=args.start, stop=args.stop, step=args.step, workers=args.workers,
                   backend=args.backend, scheduler=args.scheduler, keep_angles=args.keep_angles, weights=args.weights,
                   out=args.out, overwrite=args.overwrite, dt_ps=args.dt_ps,
                   temperature_k=args.temperature, threads=args.threads, keep_variants=args.keep_variants,
                   allow_duplicates=args.allow_duplicates, log=say, discard=_discard_value(args.discard),
                   target_error=args.target_error, target_error_kj_mol=args.target_error_kj_mol)
    report_track(result)


def report_track(result):
    s = result.summary
    print(f"{s['n_torsions']} torsions, {len(result.torsions['type'].unique())} types, "
          f"{s['n_frames_analysed']} frames from {len(s['replicas'])} replica(s), "
          f"scheme {result.scheme.name}")
    print_schemes(result)
    print("populations pooled per type (fraction ± standard error; n/a: not estimable):")
    print_population_table(result.populations_by_type, result.scheme.labels)
    if len(result.conformers_by_type):
        top = result.conformers_by_type.groupby("group_type", sort=False).head(3)
        print("most populated conformers per molecule type:")
        for row in top.itertuples(index=False):
            print(f"  {row.group_type:<10} {row.conformer:<32} {format_pm(row.population, row.population_err)}")
    print_convergence(result)
    print_notices(result.notices)
    print(f"results written to {result.folder}")


def print_schemes(result, max_rows=40):
    """The scheme of every type when they differ (auto, basins, a scheme map): the types of each
    scheme on one line, and the basins found, type by type."""
    table = result.schemes
    asked = ((result.summary.get("parameters") or {}).get("scheme_choice") or {}).get("asked")
    if table is None or not len(table) or asked not in ("auto", "basins") and table["scheme"].nunique() < 2:
        return
    print("scheme of each type (schemes.csv lists every state and why):")
    by_scheme, shown = {}, 0
    for ttype, rows in table.groupby("type", sort=False):
        if rows["scheme"].iloc[0] == "basins" and "minimum_deg" in rows:
            shown += 1
            if shown > max_rows:
                continue
            states = ", ".join(f"{r.state} (minimum {r.minimum_deg:.1f}"
                               + ("" if r.from_deg != r.from_deg else f", {r.from_deg:.1f} to {r.to_deg:.1f}") + ")"
                               for r in rows.itertuples(index=False))
            print(f"  {ttype}: basins: {states} deg")
        else:
            by_scheme.setdefault(rows["scheme"].iloc[0], []).append(str(ttype))
    if shown > max_rows:
        print(f"  ... and {shown - max_rows} more types with basins")
    for scheme, types in by_scheme.items():
        print(f"  {scheme}: {name_list(types, 10)}" if len(types) > 1 else f"  {types[0]}: {scheme}")


def _discard_value(text):
    """``--discard`` as the API takes it: a whole number is frames, anything else as given."""
    if text is not None and text.strip().isdigit():
        return int(text)
    return text


def print_convergence(result):
    """The verdict of every type (convergence.csv), with the start that was dropped."""
    table = read_optional_table(result.folder, "convergence.csv") if result.folder else None
    if table is None or not len(table):
        return
    dropped = (result.summary.get("parameters") or {}).get("discard")
    head = "convergence per type"
    if dropped:
        spans = sorted(set(round(x, 3) for x in dropped["discarded_ps"]))
        head += f" (start dropped: {', '.join(f'{x:g}' for x in spans)} ps, --discard {dropped['requested']})"
    print_verdicts(table, head)
