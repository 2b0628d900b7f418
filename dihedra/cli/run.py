"""``dihedra run``: run a whole analysis described by one TOML file."""

from ..pipeline import load_pipeline, run_pipeline
from .common import say


def register(sub):
    p = sub.add_parser(
        "run", help="run a whole analysis described by one TOML file (track, profile, ..., report)",
        description="Run the steps of an analysis file: one table per subcommand with exactly its options "
                    "(e.g. [track] takes the options of 'dihedra track', keep_angles = true for --keep-angles), "
                    "and out = \"FOLDER\" for the results folder. Relative paths are relative to the file. The "
                    "file is copied into the results folder (analysis.toml) with a record of every step "
                    "(analysis.json).",
        epilog="See docs/pipelines.md for the layout and a full example.")
    p.add_argument("analysis", metavar="ANALYSIS.toml", help="the analysis file")
    p.add_argument("--out", metavar="DIR", default=None, help="results folder (replaces the file's out)")
    p.add_argument("--overwrite", action="store_true",
                   help="replace an existing results folder that dihedra made and that holds only its files")
    p.add_argument("--dry-run", action="store_true", help="check the file and print the commands, run nothing")
    p.set_defaults(func=run)


def run(args):
    overrides = {"track": {"overwrite": True}, "windows": {"overwrite": True}} if args.overwrite else None
    pipe = load_pipeline(args.analysis, out=args.out, overrides=overrides, log=say)
    if args.dry_run:
        for step in pipe.steps:
            print(step.command())
        return
    out = run_pipeline(pipe, log=say)
    say(f"analysis done; results in {out}")
