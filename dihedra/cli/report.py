"""``dihedra report``: one self-contained HTML report of a results folder."""

from ..presentation.figures import WIDTHS
from ..presentation.report import write_report
from .common import add_types_option, say


def register(sub):
    p = sub.add_parser(
        "report", help="one self-contained HTML report of a results folder (readable offline, prints to PDF)",
        description="Write report.html: inputs and provenance, torsions, populations, profiles and the "
                    "comparison with a scan (verdicts and cautions), kinetics, couplings, and every figure the "
                    "folder has data for, embedded. No scripts and no external requests.")
    p.add_argument("folder", metavar="DIR", help="results folder")
    p.add_argument("--out", metavar="FILE", default=None, help="HTML file to write (default DIR/report.html)")
    p.add_argument("--width", choices=list(WIDTHS), default="single",
                   help="journal width the figures are drawn at (default single)")
    p.add_argument("--no-figures", action="store_true", help="leave the figures out (faster)")
    p.add_argument("--overwrite", action="store_true",
                   help="accepted as by every command that writes; the report is made from the folder and always "
                        "replaces the report dihedra wrote before (never another file)")
    add_types_option(p, "torsion types the tables and per-type figures show, or single torsions by their label "
                        "(default: every type when there are at most 24, else the four whose torsions spend most "
                        "time outside their main state; the other types in one line each, the full tables "
                        "linked)")
    p.set_defaults(func=run)


def run(args):
    path = write_report(args.folder, out=args.out, width=args.width, figures=not args.no_figures, types=args.types,
                        log=say)
    print(f"report written to {path}")
