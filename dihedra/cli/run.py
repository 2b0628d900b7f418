"""``dihedra run``: run a whole analysis described by one TOML file."""

from ..pipeline import load_pipeline, run_pipeline
from .common import say


def register(sub):
    p = sub.add_parser(
        "run", help="run a whole analysis described by one TOML file (track, profile, ..., report)",
        description="Run the steps of an analysis file: one table per step, whose keys are the keyword "
                    "arguments of the Python function it calls ([track]: dihedra.track, e.g. keep_angles = true, "
                    "temperature_k = 298.15; [profile]: dihedra.free_energy_profiles; ...), and out = \"FOLDER\" "
                    "for the results folder. Relative paths are relative to the file. The file is copied into "
                    "the results folder (analysis.toml) with a record of every step (analysis.json).",
        epilog="See docs/pipelines.md for the layout and a full example.")
    p.add_argument("analysis", metavar="ANALYSIS.toml", help="the analysis file")
    p.add_argument("--out", metavar="DIR", default=None, help="results folder (replaces the file's out)")
    p.add_argument("--overwrite", action="store_true",
                   help="replace an existing results folder that dihedra made and that holds only its files")
    p.add_argument("--dry-run", action="store_true", help="check the file and print the calls, run nothing")
    p.set_defaults(func=run)


def run(args):
    pipe = load_pipeline(args.analysis, out=args.out, overwrite=args.overwrite, log=say)
    if args.dry_run:
        for step in pipe.steps:
            print(step.call())
        return
    out = run_pipeline(pipe, log=say)
    say(f"analysis done; results in {out}")
