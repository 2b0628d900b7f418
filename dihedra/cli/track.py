"""``dihedra track``: follow torsions through trajectories and write a results folder."""

from ..tracking import track
from .common import (add_scheme_option, add_torsion_options, add_track_options, print_notices,
                     print_population_table, say)


def register(sub):
    p = sub.add_parser(
        "track", help="follow torsions through trajectories: states, populations, conformers",
        description="Follow torsions through one or more trajectories of one system (replicas) and "
                    "write a results folder: torsions.csv, populations.csv, populations_by_type.csv, "
                    "conformers.csv, states.parquet, blocks.npz and summary.json.")
    p.add_argument("topology", help="topology file (PDB with CONECT, PSF, TPR, PRMTOP, GRO, ...)")
    p.add_argument("trajectories", nargs="+", metavar="TRAJ",
                   help="trajectory files; several are replicas of the same system")
    add_torsion_options(p)
    add_scheme_option(p)
    p.add_argument("--out", required=True, metavar="DIR", help="results folder to create")
    add_track_options(p)
    p.set_defaults(func=run)


def run(args):
    result = track(args.topology, args.trajectories, torsions=args.torsions, scheme=args.scheme,
                   start=args.start, stop=args.stop, step=args.step, workers=args.workers,
                   backend=args.backend, scheduler=args.scheduler, keep_angles=args.keep_angles, weights=args.weights,
                   out=args.out, overwrite=args.overwrite, dt_ps=args.dt_ps,
                   temperature_k=args.temperature, threads=args.threads, log=say)
    report_track(result)


def report_track(result):
    s = result.summary
    print(f"{s['n_torsions']} torsions, {len(result.torsions['type'].unique())} types, "
          f"{s['n_frames_analysed']} frames from {len(s['replicas'])} replica(s), "
          f"scheme {result.scheme.name}")
    print("populations pooled per type (fraction ± standard error):")
    print_population_table(result.populations_by_type, result.scheme.labels)
    if len(result.conformers_by_type):
        top = result.conformers_by_type.groupby("group_type", sort=False).head(3)
        print("most populated conformers per molecule type:")
        for row in top.itertuples(index=False):
            print(f"  {row.group_type:<10} {row.conformer:<32} {row.population:.3f} ± {row.population_err:.3f}")
    print_notices(result.notices)
    print(f"results written to {result.folder}")
